"""Tests for roomcorr.analysis.bands (IEC 61260-1:2014 fractional-octave bands)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from roomcorr.analysis.bands import (
    G,
    band_centres_hz,
    band_edges_hz,
    nominal_hz,
    nominal_label,
    octave_centres_hz,
)


def test_octave_ratio_is_base_ten():
    # IEC 61260-1:2014, 5.2: G = 10^(3/10)
    assert G == pytest.approx(1.99526231496888, rel=1e-14)


def test_third_octave_x_minus_10_is_exactly_100_hz():
    # IEC 61260-1:2014 eq. (2) with b = 3, x = -10: 1000 * G^(-10/3) = 100 Hz exactly
    # (REFERENCES.md check value).
    assert band_centres_hz(3, 99.0, 101.0).tolist() == [100.0]
    # ... and every decade multiple is exact as well (x = -20, -30, +10).
    assert band_centres_hz(3, 10.0, 10.0).tolist() == [10.0]
    assert band_centres_hz(3, 10000.0, 10000.0).tolist() == [10000.0]


def test_octave_x_1_is_1995_26_hz():
    # IEC 61260-1:2014 eq. (2), b = 1, x = 1: 1000 * G = 1995.26 Hz (REFERENCES.md).
    (fm,) = band_centres_hz(1, 1900.0, 2100.0)
    assert fm == pytest.approx(1995.26, abs=0.005)


def test_even_b_has_no_band_at_1khz():
    # IEC 61260-1:2014 eq. (3): for even b, f_m = 1000 G^((2x+1)/(2b)); 1 kHz is a band edge.
    fm = band_centres_hz(6, 900.0, 1100.0)
    assert not np.any(np.isclose(fm, 1000.0))
    lo, hi = band_edges_hz(fm, 6)
    assert np.any(np.isclose(hi, 1000.0, rtol=1e-12))
    assert fm[np.searchsorted(fm, 1000.0)] == pytest.approx(1000.0 * G ** (1 / 12), rel=1e-12)


@pytest.mark.parametrize("b", [1, 2, 3, 6, 12, 24])
def test_edges_ratio_and_geometric_mean(b):
    # IEC 61260-1:2014 eqs. (4), (5): f2/f1 = G^(1/b), f_m = sqrt(f1 f2), and
    # neighbouring bands share their edges (contiguous bank).
    fm = band_centres_hz(b, 20.0, 20000.0)
    lo, hi = band_edges_hz(fm, b)
    np.testing.assert_allclose(hi / lo, G ** (1.0 / b), rtol=1e-12)
    np.testing.assert_allclose(np.sqrt(lo * hi), fm, rtol=1e-12)
    np.testing.assert_allclose(hi[:-1], lo[1:], rtol=1e-12)
    # The range is covered: first band holds 20 Hz, last holds 20 kHz.
    assert lo[0] <= 20.0 < hi[0]
    assert lo[-1] < 20000.0 <= hi[-1]


@pytest.mark.parametrize("b", [1, 2, 3, 6, 12, 24])
@pytest.mark.parametrize(
    "rng_hz", [(20.0, 20000.0), (63.0, 8000.0), (10.0, 24000.0), (37.0, 9100.0)]
)
def test_matches_pyfar_exact_frequencies(b, rng_hz):
    # pyfar.constants.fractional_octave_frequencies_exact implements IEC 61260-1:2014
    # eqs. (1)-(5) independently. (Ranges that end exactly on a band edge are left
    # out: pyfar rounds half-to-even there, we leave out a band that only touches.)
    pc = pytest.importorskip("pyfar.constants")
    centres, lower, upper = pc.fractional_octave_frequencies_exact(b, rng_hz)
    ours = band_centres_hz(b, *rng_hz)
    np.testing.assert_allclose(ours, centres, rtol=1e-12)
    lo, hi = band_edges_hz(ours, b)
    np.testing.assert_allclose(lo, lower, rtol=1e-12)
    np.testing.assert_allclose(hi, upper, rtol=1e-12)


@pytest.mark.parametrize("b", [1, 3])
def test_matches_pyfar_dsp_filter_frequencies(b):
    # Older pyfar entry point (deprecated there), which carries the IEC nominal table.
    pf = pytest.importorskip("pyfar")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        nominal, exact = pf.dsp.filter.fractional_octave_frequencies(b, (25.0, 20000.0))
    ours = band_centres_hz(b, nominal[0], nominal[-1])
    np.testing.assert_allclose(ours, exact, rtol=1e-12)
    assert [nominal_hz(f) for f in ours] == pytest.approx(list(nominal), rel=1e-12)


def test_octave_centres_between_nominal_limits():
    # Common practice octave table 63 Hz .. 8 kHz: eight bands, 63.1 .. 7943 Hz.
    fm = octave_centres_hz(63.0, 8000.0)
    assert fm.size == 8
    assert fm[0] == pytest.approx(63.0957, rel=1e-5)  # 1000 G^-4
    assert fm[-1] == pytest.approx(7943.28, rel=1e-6)  # 1000 G^3


def test_touching_band_left_out():
    lo_edge = 100.0 * G ** (-1.0 / 6.0)  # lower edge of the 100 Hz third-octave band
    fm = band_centres_hz(3, lo_edge, 110.0)
    assert fm[0] == 100.0


def test_nominal_labels_third_octave_and_octave():
    # Nominal mid-band frequencies, IEC 61260-1:2014 annex E / ISO 266 R10 series.
    third = [nominal_label(f) for f in band_centres_hz(3, 25.0, 20000.0)]
    assert third == (
        "25 31.5 40 50 63 80 100 125 160 200 250 315 400 500 630 800 1k 1.25k 1.6k 2k "
        "2.5k 3.15k 4k 5k 6.3k 8k 10k 12.5k 16k 20k"
    ).split()
    octave = [nominal_label(f) for f in band_centres_hz(1, 31.5, 16000.0)]
    assert octave == "31.5 63 125 250 500 1k 2k 4k 8k 16k".split()
    assert nominal_label(np.float64(12589.25)) == "12.5k"


def test_nominal_rejects_frequencies_between_bands():
    # A sixth-octave centre halfway between two third-octave bands has no nominal value.
    with pytest.raises(ValueError, match="nominal"):
        nominal_label(1000.0 * G ** (1 / 12))
    with pytest.raises(ValueError):
        nominal_label(0.0)


def test_bad_arguments():
    with pytest.raises(ValueError):
        band_centres_hz(0, 20.0, 20000.0)
    with pytest.raises(ValueError):
        band_centres_hz(2.5, 20.0, 20000.0)  # type: ignore[arg-type]
    with pytest.raises(ValueError):
        band_centres_hz(3, 1000.0, 100.0)
    with pytest.raises(ValueError):
        band_edges_hz(np.array([1000.0]), -1)
