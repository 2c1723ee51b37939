"""Atomic writes and the design writer's all-or-nothing behaviour."""

from __future__ import annotations

import json
import os
import stat

import numpy as np
import pytest

from roomcorr.deliver.atomic import atomic_write_text
from roomcorr.deliver.export import load_design_curves, sha256_of, write_design
from roomcorr.errors import OutputError
from roomcorr.pipeline import run_design
from roomcorr.settings import Settings, design_from_dict


def test_atomic_write_leaves_no_temp_and_normal_mode(tmp_path):
    p = atomic_write_text(tmp_path / "a.txt", "hello")
    assert p.read_text() == "hello"
    assert not list(tmp_path.glob(".roomcorr-tmp-*"))
    umask = os.umask(0)
    os.umask(umask)
    assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~umask


def test_atomic_write_failure_keeps_old(tmp_path):
    from roomcorr.deliver.atomic import atomic_path

    p = atomic_write_text(tmp_path / "a.txt", "old")
    with pytest.raises(RuntimeError), atomic_path(p) as tmp:
        tmp.write_text("half")
        raise RuntimeError("disk full")
    assert p.read_text() == "old"
    assert not list(tmp_path.glob(".roomcorr-tmp-*"))


@pytest.fixture
def result(ir_set):
    irs, fs = ir_set
    return run_design(irs, fs, Settings(design=design_from_dict({"sample_rates": [48000]})))


def test_write_design_and_reload(tmp_path, result):
    entries = write_design(result, tmp_path / "d")
    m = json.loads((tmp_path / "d" / "manifest.json").read_text())
    assert m["files"] == entries
    for e in entries:
        assert sha256_of(tmp_path / "d" / e["path"]) == e["sha256"]
    curves = load_design_curves(tmp_path / "d")
    assert np.allclose(curves["channels"][0]["correction_db"], result.channels[0].correction_db)
    assert set(curves["firs"]) == {48000}


def test_failure_midway_leaves_nothing(tmp_path, result, monkeypatch):
    import roomcorr.deliver.export as export

    calls = {"n": 0}
    real = export.write_wav

    def flaky(*a, **k):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError("disk full")
        return real(*a, **k)

    monkeypatch.setattr(export, "write_wav", flaky)
    with pytest.raises(OutputError, match="cannot write the design"):
        write_design(result, tmp_path / "d")
    assert not (tmp_path / "d").exists()
    assert list(tmp_path.iterdir()) == []  # no staging folder left either


def test_replace_needed_and_removes_stale(tmp_path, result):
    write_design(result, tmp_path / "d")
    with pytest.raises(OutputError, match="--replace"):
        write_design(result, tmp_path / "d")
    result.firs[44100] = result.firs[48000][:, :100]
    result.stats = result.stats + [type(s)(**{**s.__dict__, "fs": 44100}) for s in result.stats]
    write_design(result, tmp_path / "d", replace=True)
    del result.firs[44100]
    write_design(result, tmp_path / "d", replace=True)
    assert not (tmp_path / "d" / "fir" / "44100" / "left.wav").exists()
