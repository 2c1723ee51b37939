"""Tests of roomcorr.export_iir: files re-read and re-evaluated with independent tools."""

from __future__ import annotations

import csv
import hashlib
import json

import numpy as np
import pytest
from scipy.signal import freqz, sosfreqz

from roomcorr import export
from roomcorr.design import biquad as bq
from roomcorr.design import iir_fit as fit
from roomcorr.design.biquad import Section
from roomcorr.errors import OutputError
from roomcorr.export_iir import write_iir
from roomcorr.grid import log_grid

FREQ = log_grid()
BAND = (30.0, 15000.0)


@pytest.fixture(scope="module")
def design():
    curves = []
    for i, (name, g) in enumerate((("left", -8.0), ("right", -5.0))):
        target = bq.analog_response_db(
            [Section("peaking", 50.0 + 10 * i, g, 5.0), Section("peaking", 900.0, 3.5, 1.2)],
            FREQ)
        curves.append((i, name, target, np.zeros_like(FREQ), BAND))
    return fit.design_iir_curves(FREQ, curves, (44100, 48000),
                                 fit.FitLimits(n_sections=4, fs_max=48000.0), ceiling_db=-0.5)


@pytest.fixture
def folder(tmp_path, design):
    export.write_manifest(tmp_path, {"format_version": 1, "files": []})
    entries = write_iir(design, tmp_path)
    return tmp_path, entries


def test_files_and_manifest(folder, design):
    out, entries = folder
    assert len(entries) == 2 * 2 * 3
    man = export.read_manifest(out)
    iir = [e for e in man["files"] if e["kind"] == "iir"]
    assert len(iir) == 12
    for e in iir:
        data = (out / e["path"]).read_bytes()
        assert e["sha256"] == hashlib.sha256(data).hexdigest()  # hashlib as the reference
        assert e["worst_case_gain_db"] >= e["peak_gain_db"] - 1e-3
        assert e["peak_gain_db"] <= -0.5 + 1e-9
        assert e["fit_rms_error_db"] is not None and e["fit_max_error_db"] >= 0
    assert not list(out.rglob(".roomcorr-tmp-*"))


def test_json_holds_the_checked_coefficients(folder, design):
    out, _ = folder
    ch = design.channels[1]
    doc = json.loads((out / "iir/48000/right.json").read_text())
    c = np.array([s["coefficients"] for s in doc["sections"]])
    assert np.array_equal(c, ch.coeffs[48000])  # exact round trip of float32-exact values
    assert doc["pre_gain_db"] == design.pre_gain_db
    assert [s["type"] for s in doc["sections"]] == [s.kind for s in ch.sections[48000]]


def test_csv_cascade_reproduces_design_response(folder, design):
    # Re-evaluate the CSV with scipy.signal.sosfreqz (independent of our response code).
    out, _ = folder
    fs = 44100
    with open(out / f"iir/{fs}/left.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows[0]["type"] == "gain"
    assert float(rows[0]["b0"]) == pytest.approx(10 ** (design.pre_gain_db / 20))
    sos = np.array([[float(r[k]) for k in ("b0", "b1", "b2")] + [1.0, float(r["a1"]),
                                                                  float(r["a2"])] for r in rows])
    f = np.geomspace(20, 20000, 300)
    _, h = sosfreqz(sos, worN=f, fs=fs)
    ours = bq.cascade_response_db(design.channels[0].coeffs[fs], f, fs) + design.pre_gain_db
    # (the linear pre-gain is rounded down to float32: below 1e-6 dB)
    np.testing.assert_allclose(20 * np.log10(np.abs(h)), ours, atol=1e-5)
    assert np.all(20 * np.log10(np.abs(h)) <= ours + 1e-9)
    # float32 device: the same values rounded to float32 are unchanged
    assert np.array_equal(sos.astype(np.float32).astype(float), sos)
    # ...and each row as a plain b/a pair with scipy.signal.freqz
    r = rows[1]
    _, h1 = freqz([float(r["b0"]), float(r["b1"]), float(r["b2"])],
                  [1.0, float(r["a1"]), float(r["a2"])], worN=[1000.0], fs=fs)
    assert np.isfinite(abs(h1[0]))


def test_table_lists_parameters(folder, design):
    out, _ = folder
    text = (out / "iir/48000/left.txt").read_text()
    for s in design.channels[0].sections[48000]:
        assert f"{s.f0_hz:.2f}" in text and f"{s.q:.3f}" in text
    assert "Pre-gain" in text and "protect your hearing" in text


def test_missing_folder_is_an_output_error(tmp_path, design):
    with pytest.raises(OutputError):
        write_iir(design, tmp_path / "nope")


def test_with_the_fir_pipeline(tmp_path, ir_set):
    # End to end with the lead's pipeline: run_design -> write_design -> design_iir -> write_iir.
    from roomcorr.design.iir_fit import design_iir
    from roomcorr.pipeline import run_design
    from roomcorr.settings import Settings, design_from_dict

    irs, fs = ir_set
    result = run_design(irs, fs, Settings(design=design_from_dict(
        {"sample_rates": [48000], "iir": True, "iir_sections": 6})))
    export.write_design(result, tmp_path)
    iir = design_iir(result)
    write_iir(iir, tmp_path)
    man = export.read_manifest(tmp_path)
    kinds = {e["kind"] for e in man["files"]}
    assert {"fir", "iir"} <= kinds
    for e in man["files"]:
        if e["kind"] == "iir":
            assert e["sections"] <= 6
            assert e["fir_rms_error_db"] is not None
            assert e["peak_gain_db"] <= result.settings.design.ceiling_db + 1e-9
            assert e["max_boost_db"] <= result.settings.design.max_boost_db + fit.BOOST_TOL_DB
    # The IIR follows the FIR design about as well as it follows the curve it was fitted to
    # (the FIR itself follows the curve closely).
    s = iir.stats[0]
    assert abs(s.rms_error_fir_db - s.rms_error_db) < 0.5
