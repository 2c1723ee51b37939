"""An input peak above the safe level is a visible warning, not a silent "ok" (issue 22, item 9)."""

from __future__ import annotations

import numpy as np
import pytest
from test_quality import GOOD, LIMITS

from roomcorr.app.history import _record_figures, format_history
from roomcorr.measure import quality as q
from roomcorr.measure.levels import rms_dbfs
from roomcorr.measure.session import gate_lines
from roomcorr.report.quality import quality_section


def _peak_dbfs_of_sine(amplitude: float) -> float:
    # peak in dBFS of a sine of this amplitude: 20 log10(amplitude) (AES17: a full-scale
    # sine peaks at 0 dBFS and reads 0 dBFS RMS; checked against rms_dbfs below)
    t = np.arange(48000) / 48000
    x = amplitude * np.sin(2 * np.pi * 1000 * t)
    assert rms_dbfs(x) == pytest.approx(20 * np.log10(amplitude), abs=1e-3)
    return q.peak_dbfs(x)


def test_a_hot_input_warns_but_does_not_stop():
    peak = _peak_dbfs_of_sine(10 ** (-1.6 / 20))  # the issue's -1.6 dBFS
    assert peak == pytest.approx(-1.6, abs=1e-3)
    gates = q.evaluate_gates(dict(GOOD, peak_dbfs=peak), LIMITS)
    head = next(g for g in gates if g.name == "headroom")
    assert not head.passed and head.severity == "warning"
    assert "headroom" in head.message and "-1.6 dBFS" in head.message
    assert q.blocking(gates) == []
    q.raise_on_failure(gates, "position 1")  # a warning never stops the run
    assert any(line.strip().startswith("WARN headroom") for line in gate_lines(gates))
    assert q.warnings_of(gates) == [head.message]
    assert q.warnings_of([g.to_dict() for g in gates]) == [head.message]


def test_a_quiet_enough_input_passes_the_headroom_gate():
    gates = q.evaluate_gates(dict(GOOD, peak_dbfs=-3.5), LIMITS)
    assert all(g.passed for g in gates)
    # the limit itself: -3 dBFS passes, anything above warns (common practice: 3 dB headroom)
    gates = q.evaluate_gates(dict(GOOD, peak_dbfs=q.HEADROOM_PEAK_DBFS), LIMITS)
    assert all(g.passed for g in gates)
    gates = q.evaluate_gates(dict(GOOD, peak_dbfs=float("nan")), LIMITS)
    assert not next(g for g in gates if g.name == "headroom").passed  # NaN is not "ok"


def _record(peak: float) -> dict:
    gates = [g.to_dict() for g in q.evaluate_gates(dict(GOOD, peak_dbfs=peak), LIMITS)]
    return {"positions": [{"channels": [{"gates": gates, "figures": {"min_snr_db": 50.0}}]}]}


def test_history_and_report_show_the_warning():
    figs = _record_figures(_record(-1.6))
    assert figs["gates_warned"] == ["headroom"] and "gates_failed" not in figs
    lines = format_history([{"run_id": "m1", "kind": "measurement", "status": "complete",
                             "figures": {**figs, "positions": 1, "channels": 1,
                                         "sample_rate": 48000, "length_ms": 500.0,
                                         "arrival_ms": [3.0], "peak_dbfs": -1.6}}])
    assert any("WARNING: headroom" in ln for ln in lines)
    assert "WARNING" not in " ".join(
        format_history([{"run_id": "m1", "kind": "measurement", "status": "complete",
                         "figures": _record_figures(_record(-12.0))}])
    )
    rec = _record(-1.6)["positions"][0]["channels"][0]
    sec = quality_section(
        [{"label": "position 1", "gates": rec["gates"], "snr_db": {"1000": 50.0},
          "repeat_db": None}],
        png=lambda fig: b"",
    )
    text = " ".join(sec.paragraphs)
    assert "Warning:" in text and "headroom" in text
    assert "Every recording passed every quality check" not in text
