"""Tests of roomcorr.deliver.export_iir: files re-read and re-evaluated with independent tools."""

from __future__ import annotations

import csv
import hashlib
import json
import re

import numpy as np
import pytest
from scipy.signal import freqz, sosfreqz

from roomcorr.deliver import export
from roomcorr.deliver.export_iir import write_iir
from roomcorr.design.realise import biquad as bq
from roomcorr.design.realise import iir_fit as fit
from roomcorr.design.realise.biquad import Section
from roomcorr.errors import OutputError
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
    from roomcorr.design.realise.iir_fit import design_iir
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


def test_table_is_sorted_by_frequency_and_csv_keeps_cascade_order(folder, design):
    out, _ = folder
    for ch in design.channels:
        secs = ch.sections[48000]
        rows = [ln.split() for ln in (out / f"iir/48000/{ch.name}.txt").read_text().splitlines()
                if ln[:3].strip().isdigit()]
        freqs = [float(r[2]) for r in rows]
        assert freqs == sorted(freqs)
        # '#' is the cascade stage: each row names the section at that place in the CSV
        for r in rows:
            s = secs[int(r[0]) - 1]
            assert float(r[2]) == pytest.approx(s.f0_hz, abs=0.005)
            assert float(r[4]) == pytest.approx(s.q, abs=5e-4)
        with open(out / f"iir/48000/{ch.name}.csv", newline="") as fh:
            stages = [row for row in csv.reader(fh)][2:]
        assert [row[1] for row in stages] == [s.kind for s in secs]
        assert [int(row[0]) for row in stages] == list(range(1, len(secs) + 1))


@pytest.fixture(scope="module")
def demo_iir(tmp_path_factory):
    """The demo room's design with biquads: its cascades hold narrow sections by refused dips."""
    from conftest import REPO

    from roomcorr.audio_io import read_ir_set
    from roomcorr.design.realise.iir_fit import design_iir
    from roomcorr.pipeline import run_design
    from roomcorr.settings import Settings, design_from_dict

    irs, fs, _ = read_ir_set([REPO / "measurements_demo"])
    result = run_design(irs, fs, Settings(design=design_from_dict({"sample_rates": [48000]})))
    out = tmp_path_factory.mktemp("demo_iir")
    export.write_design(result, out)
    iir = design_iir(result)
    write_iir(iir, out, fir=result)
    return out, result, iir


def test_both_pre_gains_are_stated(demo_iir):
    out, result, iir = demo_iir
    doc = json.loads((out / "iir/48000/left.json").read_text())
    assert doc["pre_gain_db"] == pytest.approx(iir.pre_gain_db)
    assert doc["fir_pre_gain_db"] == pytest.approx(result.pre_gain_db)
    text = (out / "iir/48000/left.txt").read_text()
    assert f"{iir.pre_gain_db:.2f} dB for these biquads" in text
    assert f"the FIR files use {result.pre_gain_db:.2f} dB" in text
    assert "own" in doc["pre_gain_note"]


def test_narrow_sections_beside_refused_dips_are_explained(demo_iir):
    from roomcorr.deliver.export_iir import BESIDE_OCT, HIGH_Q
    from roomcorr.report.summary import WITHHELD_NOTABLE_DB

    out, result, iir = demo_iir
    explained = 0
    for ch in iir.channels:
        doc = json.loads((out / f"iir/48000/{ch.name}.json").read_text())
        fch = result.channels[ch.index]
        refused = fch.boost_withheld_db > WITHHELD_NOTABLE_DB
        for i, s in enumerate(ch.sections[48000], start=1):
            near = refused & (np.abs(np.log2(result.freq_hz / s.f0_hz)) <= BESIDE_OCT)
            noted = any(n.startswith(f"Section {i} ") for n in doc["notes"])
            if s.kind == "peaking" and s.q >= HIGH_Q and near.any():
                assert noted, (ch.name, i, s)
                explained += 1
        for note in doc["notes"]:
            assert "refused" in note
            # the figure a note states is the cascade's largest rise above the designed
            # correction inside that dip, recomputed here with scipy's sosfreqz
            i = int(note.split()[1])
            lo_txt, hi_txt = re.search(r"dip at (\d+)(?:-(\d+))? Hz", note).groups()
            lo, hi = float(lo_txt), float(hi_txt or lo_txt)  # "dip at 193 Hz": one point
            assert hi_txt != lo_txt  # never "193-193 Hz"
            rise = float(re.search(r"(?:at most|up to) (\d+\.\d) dB", note).group(1))
            m = (result.freq_hz >= lo - 0.5) & (result.freq_hz <= hi + 0.5)
            c = ch.coeffs[48000]
            sos = np.c_[c[:, :3], np.ones(len(c)), c[:, 3:]]
            _, h = sosfreqz(sos, worN=result.freq_hz[m], fs=48000)
            got = max(float(np.max(20 * np.log10(np.abs(h)) - fch.correction_db[m])), 0.0)
            assert abs(got - rise) <= 0.15, (note, got)
            withheld = float(re.search(r"where (\d+\.\d) dB of boost", note).group(1))
            assert ("not filled" in note) == (rise < 0.5 * withheld), note
            assert 1 <= i <= len(ch.sections[48000])
        text = (out / f"iir/48000/{ch.name}.txt").read_text()
        assert ("Narrow sections beside refused dips" in text) == bool(doc["notes"])
    assert explained >= 2  # the demo room has several (a check that can fail)
