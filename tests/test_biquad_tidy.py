"""Biquad sets spend no section twice on one frequency and none on a near-zero gain.

Issue 22, item 9: a ten-section set held 92.1 Hz twice at Q 12 and a -0.01 dB shelf.
Checked against the Audio EQ Cookbook (coefficients written out here from the
note, independently of roomcorr.design.realise.biquad) and scipy.signal.freqz.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import REPO
from scipy.signal import freqz

from roomcorr.audio_io import read_ir_set
from roomcorr.deliver.export_iir import hz_range
from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise.biquad import Section
from roomcorr.design.realise.iir_fit import SENS_LIMIT_DB, design_iir
from roomcorr.pipeline import run_design
from roomcorr.settings import Settings

DEMO = REPO / "measurements_demo"


def cookbook_peaking(f0: float, gain_db: float, q: float, fs: float) -> tuple[np.ndarray, ...]:
    """Peaking EQ of R. Bristow-Johnson's Audio EQ Cookbook (W3C note, 2021), as printed."""
    a = 10 ** (gain_db / 40)
    w0 = 2 * np.pi * f0 / fs
    alpha = np.sin(w0) / (2 * q)
    b = np.array([1 + alpha * a, -2 * np.cos(w0), 1 - alpha * a])
    den = np.array([1 + alpha / a, -2 * np.cos(w0), 1 - alpha / a])
    return b / den[0], den / den[0]


def _db_at(sections: list[Section], f_hz: np.ndarray, fs: float) -> np.ndarray:
    """Cascade magnitude by scipy.signal.freqz of the cookbook coefficients (outside reference)."""
    total = np.zeros(f_hz.size)
    for s in sections:
        assert s.kind == "peaking"
        b, a = cookbook_peaking(s.f0_hz, s.gain_db, s.q, fs)
        _, h = freqz(b, a, worN=f_hz, fs=fs)
        total += 20 * np.log10(np.abs(h))
    return total


def test_roomcorr_coefficients_are_the_cookbooks():
    fs = 48000.0
    s = Section("peaking", 92.1, -5.0, 12.0)
    b, a = cookbook_peaking(s.f0_hz, s.gain_db, s.q, fs)
    c = bq.coefficients([s], fs)[0]
    np.testing.assert_allclose(c, [b[0], b[1], b[2], a[1], a[2]], rtol=1e-12, atol=1e-12)


def test_two_sections_on_one_frequency_become_one():
    fs = 48000.0
    pair = [Section("peaking", 92.11, -4.35, 12.0), Section("peaking", 92.14, -5.08, 12.0)]
    (one,) = bq.tidy_sections(pair)
    assert one.gain_db == pytest.approx(-9.43)
    assert one.q == 12.0 and 92.11 < one.f0_hz < 92.14
    # at the centre the cascade and the merged section agree (gains add in dB there;
    # cookbook: |H(f0)| = A^2), and nearby within a fraction of a dB (scipy.signal.freqz)
    f = np.array([one.f0_hz])
    assert _db_at(pair, f, fs)[0] == pytest.approx(_db_at([one], f, fs)[0], abs=0.01)
    grid = np.geomspace(60, 140, 200)
    assert np.max(np.abs(_db_at(pair, grid, fs) - _db_at([one], grid, fs))) < 0.5


def test_near_zero_and_distinct_sections():
    secs = [
        Section("highshelf", 330.7, -0.01, 0.70),
        Section("peaking", 100.0, -3.0, 4.0),
        Section("peaking", 110.0, -3.0, 4.0),  # 0.14 octave away: a different job
        Section("lowshelf", 100.0, -2.0, 0.7),  # another kind on the same frequency
    ]
    out = bq.tidy_sections(secs)
    assert sorted((s.f0_hz, s.kind) for s in out) == [
        (100.0, "lowshelf"), (100.0, "peaking"), (110.0, "peaking")]
    assert bq.is_tidy(out) and not bq.is_tidy(secs)
    # a merge that would pass the gain range is clipped to it
    (m,) = bq.tidy_sections([Section("peaking", 50, -9, 5), Section("peaking", 50.5, -9, 5)],
                            gain_range_db=(-15.0, 4.0))
    assert m.gain_db == -15.0


def test_a_float32_split_stays_split():
    # -9 dB at Q 7 at 38 Hz: one section would change by about 0.6 dB when rounded to
    # float32 at 96 kHz (float32_sensitivity_db), two of half the depth by 0.3 dB each;
    # such a pair is a deliberate split and is kept, at 48 kHz it is merged
    pair = [Section("peaking", 37.98, -5.21, 5.95), Section("peaking", 38.01, -3.67, 8.45)]
    assert len(bq.tidy_sections(pair, fs_max=96000.0, sens_limit_db=SENS_LIMIT_DB)) == 2
    assert len(bq.tidy_sections(pair, fs_max=48000.0, sens_limit_db=SENS_LIMIT_DB)) == 1
    # the sensitivity the rule uses follows its formula's fs^2 law (0.59 dB -> a quarter)
    one = bq.tidy_sections(pair)[0]
    s96, s48 = (bq.float32_sensitivity_db(np.array([0]), np.array([one.f0_hz]),
                                          np.array([one.gain_db]), np.array([one.q]), fs)[0]
                for fs in (96000.0, 48000.0))
    assert s96 > SENS_LIMIT_DB > s48 and s96 / s48 == pytest.approx(4.0)


def test_hz_range_of_a_one_point_dip():
    assert hz_range(193.2, 193.4) == "193 Hz"
    assert hz_range(102.0, 123.0) == "102-123 Hz"


@pytest.fixture(scope="module")
def demo_iir():
    irs, fs, _ = read_ir_set(sorted(DEMO.glob("pos*.wav")))
    settings = Settings()
    settings.design.sample_rates = (48000,)
    settings.design.iir = True
    result = run_design(irs, fs, settings)
    return design_iir(result)


def test_demo_biquads_are_tidy_stable_and_fit(demo_iir):
    for ch in demo_iir.channels:
        secs = ch.sections[48000]
        # no section that one robust float32 section could replace, none under 0.1 dB
        assert bq.is_tidy(ch.sections_analog, 48000.0, SENS_LIMIT_DB), ch.sections_analog
        assert bq.is_tidy(secs, 48000.0, SENS_LIMIT_DB), secs
        assert all(abs(s.gain_db) >= bq.MIN_GAIN_DB for s in secs)
        # on the demo no split is needed at all: no two peaking sections within 1/24 octave
        peaks = sorted(s.f0_hz for s in secs if s.kind == "peaking")
        assert np.all(np.diff(np.log2(peaks)) >= bq.MERGE_OCT)
        # the stability proof after float32 rounding still holds (poles inside the margin)
        radii = bq.pole_radii(ch.coeffs[48000])
        assert np.all(radii <= 1 - bq.POLE_MARGIN)
    for st in demo_iir.stats:
        # measured before this change: 0.81 (left) and 0.74 (right) dB RMS, ten sections each
        assert st.rms_error_db <= {0: 0.81, 1: 0.75}[st.channel]
