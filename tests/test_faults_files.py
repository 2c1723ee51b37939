"""Fault suite for files: roomcorr only touches what is its own, replaces atomically,
detects damage without crashing, and turns disk errors into one line.

Every case checks the promise of the issue it comes from: exit status 2 with one
error line (or the documented success), nothing outside the chosen folder touched,
no earlier output damaged. The refusals run ``roomcorr.cli.main`` in-process (the
same code path as the command, but fast); kills, Ctrl-C and closed pipes run the
command in a subprocess as a user would.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import json
import os
import random
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from conftest import REPO, synthetic_ir

from roomcorr import rooms as R
from roomcorr.audio_io import write_wav
from roomcorr.cli import main
from roomcorr.design.realise.safety import CAUTIONS
from roomcorr.errors import OutputError

FS = 48000
TEMP_PREFIXES = (".roomcorr-tmp-", ".roomcorr-old-")


# --------------------------------------------------------------------------- helpers


def _sha(p: Path) -> str:
    # SHA-256 from the standard library (hashlib), not roomcorr's own helper.
    return hashlib.sha256(p.read_bytes()).hexdigest()


def snapshot(root: Path, skip: tuple[Path, ...] = ()) -> dict[str, str]:
    """Every file and link below ``root`` (outside ``skip``) with its content digest."""
    out = {}
    for p in sorted(root.rglob("*")):
        if any(p == s or s in p.parents for s in skip):
            continue
        rel = p.relative_to(root).as_posix()
        if p.is_symlink():
            out[rel] = "link:" + os.readlink(p)
        elif p.is_file():
            out[rel] = _sha(p)
        elif p.is_dir():
            out[rel] = "dir"
    return out


def error_lines(stderr: str) -> list[str]:
    """Standard-error lines apart from the safety cautions."""
    return [ln for ln in stderr.splitlines() if ln.strip() and ln not in CAUTIONS]


def cli(capsys, *args: str) -> tuple[int, str, str]:
    code = main([str(a) for a in args])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def assert_one_line_error(code: int, err: str, *words: str) -> None:
    lines = error_lines(err)
    assert code == 2, err
    assert len(lines) == 1 and lines[0].startswith("roomcorr: error: "), err
    assert "Traceback" not in err
    for w in words:
        assert w in lines[0], lines[0]


def run(*args, cwd=None, **kw) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        env=env,
        timeout=300,
        **kw,
    )


def popen(*args, cwd=None, **kw) -> subprocess.Popen:
    env = dict(os.environ, PYTHONPATH=str(REPO), OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    return subprocess.Popen(
        [sys.executable, "-m", "roomcorr", *map(str, args)], cwd=cwd, env=env, **kw
    )


def design_is_whole(d: Path) -> bool:
    """The folder holds exactly the files its manifest lists, each with its SHA-256."""
    man = json.loads((d / "manifest.json").read_text())
    listed = {e["path"]: e["sha256"] for e in man["files"]}
    present = {
        p.relative_to(d).as_posix()
        for p in d.rglob("*")
        if p.is_file() and p.name != "manifest.json"
    }
    return present == set(listed) and all(_sha(d / k) == v for k, v in listed.items())


def leftovers(folder: Path) -> list[str]:
    found = [*folder.rglob(".roomcorr-tmp-*"), *folder.rglob(".roomcorr-old-*")]
    return sorted(p.name for p in found)


# --------------------------------------------------------------------------- fixtures


def _write_irs(folder: Path, shift_s: float = 0.0) -> Path:
    folder.mkdir(parents=True)
    for p in range(2):
        irs = np.stack(
            [
                synthetic_ir(FS, n=12000, delay_s=0.004 + 0.0003 * p + shift_s, seed=10 * p + c)
                for c in range(2)
            ]
        )
        write_wav(folder / f"pos{p + 1}.wav", 0.5 * irs, FS)
    return folder


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> Path:
    """IR folders, a plain design folder and a room with two measurements and a design."""
    root = tmp_path_factory.mktemp("base")
    _write_irs(root / "irs")
    _write_irs(root / "irs2", shift_s=0.0006)
    assert main(["design", str(root / "irs"), "--out", str(root / "d"), "--rates", "48000"]) == 0
    room = R.init_room(root / "room")
    with R.new_run(room, "measurement") as m1:  # as 'measure' writes it: WAVs and a record
        for p in sorted((root / "irs").glob("*.wav")):
            shutil.copy(p, m1 / p.name)
        (m1 / "measurement.json").write_text(json.dumps({"positions": [], "loopback": False}))
    assert main(["design", "--room", str(room.root), "--rates", "48000"]) == 0
    R.add_measurement(room, [root / "irs2"])
    return root


@pytest.fixture
def work(base: Path, tmp_path: Path, monkeypatch) -> Path:
    """A private copy of the base folders; the working folder is ``work/cwd``."""
    w = tmp_path / "w"
    shutil.copytree(base, w, symlinks=True)
    (w / "victim.txt").write_text("not roomcorr's\n")
    (w / "cwd").mkdir()
    monkeypatch.chdir(w / "cwd")
    return w


def _room(work: Path) -> R.Room:
    return R.open_room(work / "room")


def _run_dir(work: Path, kind: str, index: int = -1) -> Path:
    return R.list_runs(_room(work), kind, include_incomplete=False)[index].path


# ----------------------------------------------------------------- never touch what is not ours


def _add_entry(d: Path, path: str) -> None:
    m = json.loads((d / "manifest.json").read_text())
    m["files"].append({"path": path, "kind": "fir", "sha256": "0" * 64})
    (d / "manifest.json").write_text(json.dumps(m))


@pytest.mark.parametrize("command", ["design", "demo"])
@pytest.mark.parametrize("escape", ["../victim.txt", "ABS"])
def test_replace_never_deletes_what_a_manifest_names_outside(work, capsys, command, escape):
    d = work / "d"
    if command == "demo":
        m = json.loads((d / "manifest.json").read_text())
        m["demo"] = True  # the demo replaces its own earlier output without --replace
        (d / "manifest.json").write_text(json.dumps(m))
    _add_entry(d, str(work / "victim.txt") if escape == "ABS" else escape)
    before = snapshot(work)
    args = ["design", work / "irs", "--out", d, "--replace", "--rates", "48000"]
    if command == "demo":
        args = ["demo", "--out", d, "--rates", "48000"]
    code, _, err = cli(capsys, *args)
    assert_one_line_error(code, err, "damaged manifest", "outside")
    assert snapshot(work) == before  # the victim, the old design: all as they were


def test_manifest_entry_through_a_link_is_refused(work, capsys):
    d = work / "d"
    (d / "escape.wav").symlink_to(work / "victim.txt")
    _add_entry(d, "escape.wav")
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs", "--out", d, "--replace", "--rates", "48000")
    assert_one_line_error(code, err, "outside")
    assert snapshot(work) == before


def test_out_that_is_a_link_is_refused(work, capsys):
    (work / "elsewhere").mkdir()
    (work / "cwd" / "out").symlink_to(work / "elsewhere")
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs", "--out", "out", "--rates", "48000")
    assert_one_line_error(code, err, "symbolic link")
    assert snapshot(work) == before


def test_replace_refuses_a_folder_with_files_it_did_not_write(work, capsys):
    (work / "d" / "my-notes.txt").write_text("keep me")
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs", "--out", work / "d", "--replace")
    assert_one_line_error(code, err, "my-notes.txt")
    assert snapshot(work) == before


@pytest.mark.parametrize("kind", ["designs", "measurements"])
def test_run_folder_that_is_a_link_is_refused(work, capsys, kind):
    room = _room(work)
    outside = work / "outside"
    shutil.move(room.root / kind, outside)
    (room.root / kind).symlink_to(outside)
    before = snapshot(work)
    if kind == "designs":
        code, _, err = cli(capsys, "design", "--room", room.root, "--rates", "48000")
        assert_one_line_error(code, err, "symbolic link")
    else:
        with pytest.raises(OutputError, match="symbolic link"), R.new_run(room, "measurement"):
            pass
    assert snapshot(work) == before  # no run landed outside


def test_run_id_that_leads_outside_the_room_is_refused(work, capsys):
    room = _room(work)
    (work / "outside-run").mkdir()
    shutil.copy(work / "irs" / "pos1.wav", work / "outside-run" / "pos1.wav")
    (room.measurements_dir / "2030-01-01_000000Z").symlink_to(work / "outside-run")
    first = _run_dir(work, "measurement", 0).name
    code, _, err = cli(capsys, "compare", first, "2030-01-01", "--room", room.root)
    assert_one_line_error(code, err, "damaged run", "outside the room")
    code, out, _ = cli(capsys, "history", room.root)
    assert code == 0 and "2030-01-01_000000Z" in out and "damaged" in out


def test_compare_does_not_read_a_calibration_outside_the_room(work, capsys):
    # The manifest of the room's design names a FIFO outside the room as its
    # calibration: reading it would block for ever, so the command finishing
    # proves it was never opened.
    fifo = work / "outside.fifo"
    os.mkfifo(fifo)
    d = _run_dir(work, "design")
    m = json.loads((d / "manifest.json").read_text())
    m["settings"]["design"]["calibration"] = str(fifo)
    (d / "manifest.json").write_text(json.dumps(m))
    # Re-seal the run so only the calibration path is in question here.
    marker = json.loads((d / "complete.json").read_text())
    marker["files"]["manifest.json"] = _sha(d / "manifest.json")
    marker["sizes"]["manifest.json"] = (d / "manifest.json").stat().st_size
    (d / "complete.json").write_text(json.dumps(marker))
    r = run("compare", "--json", cwd=work / "room")
    assert r.returncode == 0, r.stderr
    fit = json.loads(r.stdout)["filter_fit"]
    assert fit["available"] is False and "outside the room folder" in fit["reason"]


def test_report_of_someone_elses_folder_goes_to_a_new_folder(work, capsys):
    before = snapshot(work, skip=(work / "cwd",))
    code, out, err = cli(capsys, "report", work / "irs")
    assert code == 0, err
    assert snapshot(work, skip=(work / "cwd",)) == before  # the WAV folder is untouched
    assert (work / "cwd" / "irs-report" / "report.html").is_file()
    assert "irs-report" in out
    # --out: an explicit folder; one holding other files is refused.
    code, _, err = cli(capsys, "report", work / "irs", "--out", work / "cwd" / "mine")
    assert code == 0 and (work / "cwd" / "mine" / "report.html").is_file()
    code, _, err = cli(capsys, "report", work / "irs", "--out", work / "d")
    assert_one_line_error(code, err, "not a roomcorr report")


def test_report_out_into_a_finished_run_is_refused(work, capsys):
    d = _run_dir(work, "design")
    before = snapshot(work)
    code, _, err = cli(capsys, "report", work / "irs", "--out", d)
    assert_one_line_error(code, err, "finished run")
    assert snapshot(work) == before


# --------------------------------------------------------------------------- atomic


def test_finished_run_cannot_be_replaced(work, capsys):
    d = _run_dir(work, "design")
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs2", "--out", d, "--replace")
    assert_one_line_error(code, err, "finished run")
    assert snapshot(work) == before
    assert R.verify_run(d) == []


def test_atomic_path_leaves_no_temp_file_when_interrupted_at_once(tmp_path, monkeypatch):
    # Ctrl-C arriving right after the temporary file is created (before any
    # writing): the file must not be left behind.
    import roomcorr.deliver.atomic as atomic

    real_close = os.close
    hit = {"n": 0}

    def close_then_interrupt(fd):
        real_close(fd)
        if hit["n"] == 0:
            hit["n"] += 1
            raise KeyboardInterrupt

    monkeypatch.setattr(atomic.os, "close", close_then_interrupt)
    with pytest.raises(KeyboardInterrupt), atomic.atomic_path(tmp_path / "a.txt") as tmp:
        tmp.write_text("never")
    monkeypatch.undo()
    assert list(tmp_path.iterdir()) == []


def test_interrupted_swap_is_undone_by_the_next_run(tmp_path):
    # A process killed between parking the old folder and moving the new one in
    # (the fallback swap where no atomic exchange exists) leaves the old folder
    # parked; the next clean-up moves it back whole.
    from roomcorr.deliver.atomic import OLD_PREFIX, clean_stale

    dead = subprocess.run(
        [sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True
    ).stdout.strip()
    parked = tmp_path / f"{OLD_PREFIX}out-{dead}-{'ab' * 8}"
    parked.mkdir()
    (parked / "manifest.json").write_text("{}")
    stage = tmp_path / f".roomcorr-tmp-out-{dead}-{'cd' * 8}"
    stage.mkdir()
    clean_stale(tmp_path, "out")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]
    assert (tmp_path / "out" / "manifest.json").read_text() == "{}"


def _kill_loop(make_args, check, cwd: Path, seed: int, n: int) -> int:
    """Start the command ``n`` times and kill it after a random (seeded) delay;
    ``check()`` after every kill. Returns how many runs were cut short."""
    rng = random.Random(seed)
    cut = 0
    for i in range(n):
        sig = signal.SIGKILL if i % 2 == 0 else signal.SIGINT
        proc = popen(*make_args(), cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        with contextlib.suppress(subprocess.TimeoutExpired):
            proc.wait(timeout=rng.uniform(0.3, 2.5))  # the random delay, not a timing check
        if proc.poll() is None:
            proc.send_signal(sig)
            cut += 1
        proc.wait(timeout=120)
        check()
    return cut


@pytest.mark.parametrize("command", ["design", "report"])
def test_ctrl_c_at_every_write_step_leaves_the_earlier_output_whole(
    work, capsys, monkeypatch, command
):
    # Deterministic companion of the kill loops below: Ctrl-C arrives at the
    # k-th file moved into place, for every k the command reaches.
    d = work / "d"
    if command == "report":
        import roomcorr.report.html as rh

        real_build, cache = rh.build_report, []

        def build_once(*a, **kw):  # the figures are not what is tested here: draw them once
            if not cache:
                cache.append(real_build(*a, **kw))
                return cache[0]
            # Later reports differ from the first in every file, so a mixture shows.
            import copy

            later = copy.deepcopy(cache[0])
            later.subtitle += " (again)"
            for sec in later.sections:
                for f in sec.figures:
                    f.png += b"again"
            return later

        monkeypatch.setattr(rh, "build_report", build_once)
        assert main(["report", str(d)]) == 0
    capsys.readouterr()
    old = snapshot(work)
    args = ["design", work / "irs2", "--out", d, "--replace", "--rates", "48000"]
    if command == "report":
        args = ["report", d]
    real = os.replace
    k = 0
    while True:
        k += 1
        calls = {"n": 0}

        def interrupting(src, dst, _k=k, _calls=calls):
            _calls["n"] += 1
            if _calls["n"] == _k:
                raise KeyboardInterrupt
            return real(src, dst)

        monkeypatch.setattr(os, "replace", interrupting)
        code, _, err = cli(capsys, *args)
        monkeypatch.setattr(os, "replace", real)
        if code == 0:
            break  # k is past the last file: the command finished
        assert code == 130, err
        assert snapshot(work) == old, f"interrupt at file {k}"  # old output whole, no temp
    assert k > 3 and design_is_whole(d)


def _without_leftovers(snap: dict[str, str]) -> dict[str, str]:
    return {k: v for k, v in snap.items() if not Path(k).parts[0].startswith(TEMP_PREFIXES)}


def test_interrupted_design_replace_leaves_old_or_new_whole(work):
    d = work / "d"
    outside = snapshot(work, skip=(d,))
    old = snapshot(d)

    def check():
        assert design_is_whole(d)  # the old design or the new one, never a mixture
        assert not leftovers(d)
        # A killed run may leave its staging folder beside d (tidied by the next
        # run); nothing else outside d changes.
        assert _without_leftovers(snapshot(work, skip=(d,))) == outside

    def args():
        return ["design", work / "irs2", "--out", d, "--replace", "--rates", "48000"]

    assert _kill_loop(args, check, work / "cwd", seed=13, n=3) >= 1
    # The next run finishes and tidies what the killed ones left beside the folder.
    r = run(*args(), cwd=work / "cwd")
    assert r.returncode == 0, r.stderr
    check()
    assert snapshot(work, skip=(d,)) == outside and not leftovers(work)
    assert snapshot(d) != old  # the new design (other measurements) is in place


def test_interrupted_report_leaves_old_or_new_whole(work):
    d = work / "d"
    assert run("report", d, cwd=work / "cwd").returncode == 0
    outside = snapshot(work, skip=(d,))

    def check():
        assert design_is_whole(d)  # the manifest lists the report, with digests
        page = (d / "report.html").read_text(encoding="utf-8")
        assert page.rstrip().endswith("</html>")
        figs = {p.name for p in (d / "report").iterdir()}
        listed = {
            Path(e["path"]).name
            for e in json.loads((d / "manifest.json").read_text())["files"]
            if e["kind"] == "report-figure"
        }
        assert figs == listed

    assert _kill_loop(lambda: ["report", d], check, work / "cwd", seed=5, n=2) >= 1
    assert run("report", d, cwd=work / "cwd").returncode == 0
    check()
    assert snapshot(work, skip=(d,)) == outside and not leftovers(work)


def test_interrupted_room_design_runs_are_never_taken_for_finished(work):
    room = _room(work)
    before = snapshot(work, skip=(room.root,))

    def check():
        for r in R.list_runs(room):
            if r.complete:
                assert R.verify_run(r.path) == []
        h = run("history", "--json", room.root, cwd=work / "cwd")
        assert h.returncode == 0, h.stderr
        assert all(e["status"] in ("complete", "incomplete") for e in json.loads(h.stdout)["runs"])

    assert _kill_loop(lambda: ["design", "--rates", "48000"], check, room.root, seed=21, n=3) >= 1
    assert snapshot(work, skip=(room.root,)) == before


# --------------------------------------------------------------------------- damage is detected


def _npz_without_keys(p: Path) -> None:
    with open(p, "wb") as fh:
        np.savez(fh, freq_hz=np.ones(3))


def _npz_with_inf(p: Path) -> None:
    with np.load(p) as z:
        data = {k: z[k] for k in z.files}
    key = next(k for k in data if k.startswith("fir_"))
    data[key] = data[key].copy()
    data[key][0, 5] = np.inf
    with open(p, "wb") as fh:
        np.savez(fh, **data)


def _wav_with_inf(p: Path) -> None:
    import soundfile as sf

    h, fs = sf.read(p)
    h[10] = np.inf
    sf.write(p, h, fs, subtype="FLOAT")


def _edit_hash(p: Path) -> None:
    m = json.loads(p.read_text())
    rel = next(iter(m["files"]))
    m["files"][rel] = "f" * 64
    p.write_text(json.dumps(m))


def _deep(p: Path) -> None:
    # 100,000 levels of nesting: Python's json module fails with RecursionError near 1000
    p.write_text("[" * 100_000 + "]" * 100_000)


def _big_int(p: Path) -> None:
    # 5000 digits: beyond sys.get_int_max_str_digits (4300), json.loads raises ValueError
    doc = json.loads(p.read_text())
    doc["big"] = 0
    p.write_text(json.dumps(doc).replace('"big": 0', '"big": ' + "9" * 5000))


def _edit_json(**changes):
    def edit(p: Path) -> None:
        doc = json.loads(p.read_text())
        doc.update(changes)
        p.write_text(json.dumps(doc))

    return edit


def _npz_one_point(p: Path) -> None:
    """design.npz with a one-point frequency grid, and the manifest's SHA-256 updated to it."""
    with np.load(p) as z:
        data = {k: z[k] for k in z.files}
    data["freq_hz"] = np.array([1000.0])
    with open(p, "wb") as fh:
        np.savez(fh, **data)
    man = p.parent / "manifest.json"
    doc = json.loads(man.read_text())
    for e in doc["files"]:
        if e["path"] == p.name:
            e["sha256"] = _sha(p)
    man.write_text(json.dumps(doc))


def _extra_wav(p: Path) -> None:
    """A sixth position copied into a finished measurement (issue 22: used silently)."""
    shutil.copy(p.parent / "pos1.wav", p.parent / "pos9.wav")


def _swap_wavs(p: Path) -> None:
    a, b = p.parent / "pos1.wav", p.parent / "pos2.wav"
    da, db = a.read_bytes(), b.read_bytes()
    a.write_bytes(db)
    b.write_bytes(da)


def _weakened_marker_then_swap(p: Path) -> None:
    """complete.json replaced by a bare ``{"complete": true}``, then two positions swapped."""
    p.write_text('{"complete": true}')
    _swap_wavs(p)


DAMAGE = {
    # (kind of run, file, how it is damaged)
    "manifest-deep": ("design", "manifest.json", _deep),
    "manifest-big-int": ("design", "manifest.json", _big_int),
    "manifest-design-settings-number": (
        "design",
        "manifest.json",
        _edit_json(settings={"design": 5}),
    ),
    "manifest-measurements-number": ("design", "manifest.json", _edit_json(measurements=5)),
    "npz-one-point": ("design", "design.npz", _npz_one_point),
    "marker-deep": ("measurement", "complete.json", _deep),
    "marker-big-int": ("measurement", "complete.json", _big_int),
    "marker-weakened": ("measurement", "complete.json", _weakened_marker_then_swap),
    "record-deep": ("measurement", "measurement.json", _deep),
    "record-big-int": ("measurement", "measurement.json", _big_int),
    "record-positions-number": ("measurement", "measurement.json", _edit_json(positions=5)),
    "extra-wav": ("measurement", "pos1.wav", _extra_wav),
    "wav-deleted": ("design", "fir/48000/left.wav", lambda p: p.unlink()),
    "wav-byte-changed": (
        "design",
        "fir/48000/left.wav",
        lambda p: p.write_bytes(p.read_bytes()[:-1] + bytes([p.read_bytes()[-1] ^ 1])),
    ),
    "manifest-list": ("design", "manifest.json", lambda p: p.write_text("[]")),
    "manifest-empty-object": ("design", "manifest.json", lambda p: p.write_text("{}")),
    "manifest-files-number": ("design", "manifest.json", lambda p: p.write_text('{"files": 3}')),
    "manifest-entry-number": ("design", "manifest.json", lambda p: p.write_text('{"files": [1]}')),
    "manifest-truncated": ("design", "manifest.json", lambda p: p.write_text(p.read_text()[:40])),
    "manifest-not-utf8": ("design", "manifest.json", lambda p: p.write_bytes(b"\xff\xfe{")),
    "manifest-gain-text": (
        "design",
        "manifest.json",
        lambda p: p.write_text(
            p.read_text().replace('"peak_gain_db": ', '"peak_gain_db": "x", "_": ')
        ),
    ),
    "npz-not-zip": ("design", "design.npz", lambda p: p.write_bytes(b"not a zip archive")),
    "npz-missing-keys": ("design", "design.npz", _npz_without_keys),
    "npz-inf-filter": ("design", "design.npz", _npz_with_inf),
    "wav-inf-filter": ("design", "fir/48000/left.wav", _wav_with_inf),
    "marker-list": ("design", "complete.json", lambda p: p.write_text("[]")),
    "marker-files-list": (
        "measurement",
        "complete.json",
        lambda p: p.write_text('{"complete": true, "files": []}'),
    ),
    "marker-escape": (
        "measurement",
        "complete.json",
        lambda p: p.write_text(json.dumps({"complete": True, "files": {"../../x": "0" * 64}})),
    ),
    "marker-edited-hash": ("measurement", "complete.json", _edit_hash),
    "record-list": ("measurement", "measurement.json", lambda p: p.write_text("[]")),
    "wav-truncated": ("measurement", "pos1.wav", lambda p: p.write_bytes(p.read_bytes()[:100])),
}


@pytest.mark.parametrize("name", sorted(DAMAGE))
def test_damaged_run_is_named_and_everything_else_still_works(work, capsys, name):
    kind, rel, damage = DAMAGE[name]
    room = _room(work)
    run_dir = _run_dir(work, kind, -1 if kind == "design" else 0)
    damage(run_dir / rel)
    before = snapshot(work, skip=(work / "cwd",))
    code, out, err = cli(capsys, "history", "--json", room.root)
    assert code == 0, err
    runs = {e["run_id"]: e for e in json.loads(out)["runs"]}
    assert runs[run_dir.name]["status"] == "damaged"
    assert runs[run_dir.name]["figures"]["problem"]
    others = [e for k, e in runs.items() if k != run_dir.name]
    assert others and all(e["status"] == "complete" for e in others)
    code, out, err = cli(capsys, "history", room.root)
    assert code == 0 and "damaged" in out
    # compare: the two measurements, or (one damaged) a one-line refusal.
    code, out, err = cli(capsys, "compare", "--room", room.root)
    if code != 0:
        assert_one_line_error(code, err)
    else:
        assert "filter check" in out
    # report of the damaged run: one line naming the problem, nothing written.
    code, out, err = cli(capsys, "report", run_dir)
    assert_one_line_error(code, err)
    assert snapshot(work, skip=(work / "cwd",)) == before


@pytest.mark.parametrize(
    "name",
    [k for k in sorted(DAMAGE) if DAMAGE[k][0] == "design" and DAMAGE[k][1] != "complete.json"],
)
def test_damaged_design_folder_outside_a_room(work, capsys, name):
    _, rel, damage = DAMAGE[name]
    d = work / "d"
    damage(d / rel)
    before = snapshot(work, skip=(work / "cwd",))
    code, _, err = cli(capsys, "report", d)
    # Every file is checked against the manifest first (issue 22: a deleted or changed
    # FIR was reported from design.npz and the manifest rewritten with the stale hash).
    assert_one_line_error(code, err)
    assert snapshot(work, skip=(work / "cwd",)) == before
    if name.startswith("wav-"):  # replacing the design still works and makes it whole
        code, _, err = cli(capsys, "design", work / "irs", "--out", d, "--replace")
        assert code == 0, err
        assert design_is_whole(d)


# --------------------------------------------------------------------------- disk errors


@contextlib.contextmanager
def small_disk(where: Path, size: str = "64k", readonly: bool = False):
    """A tmpfs of ``size`` mounted at ``where``; skips where mounting is not permitted."""
    where.mkdir()
    opts = f"size={size}" + (",ro" if readonly else "")
    r = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(where)], capture_output=True, text=True
    )
    if r.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here ({r.stderr.strip()}); see the ENOSPC test")
    try:
        yield where
    finally:
        subprocess.run(["umount", str(where)], check=False)


@pytest.mark.parametrize("readonly", [False, True], ids=["full", "read-only"])
def test_full_or_read_only_disk(work, capsys, readonly):
    with small_disk(work / "mnt", readonly=readonly) as mnt:
        before = snapshot(work, skip=(mnt,))
        code, _, err = cli(capsys, "design", work / "irs", "--out", mnt / "out", "--rates", "48000")
        why = "read-only" if readonly else "no space left"
        assert_one_line_error(code, err, why)
        code, _, err = cli(capsys, "report", work / "d", "--out", mnt / "rep")
        assert_one_line_error(code, err, why)
        assert list(mnt.iterdir()) == []  # nothing left behind
        assert snapshot(work, skip=(mnt,)) == before


def test_full_disk_in_a_room(work, capsys):
    room = _room(work)
    designs = R.list_runs(room, "design")
    shutil.rmtree(room.designs_dir)
    with small_disk(room.designs_dir, size="32k") as mnt:
        code, _, err = cli(capsys, "design", "--room", room.root, "--rates", "48000")
        assert_one_line_error(code, err, "no space left")
        assert list(mnt.iterdir()) == []  # the failed run leaves no folder
    assert designs  # (the room had one before the disk was swapped in)


def test_enospc_midway_without_a_mount(work, capsys, monkeypatch):
    # Where no tmpfs can be mounted: the disk "fills" on the second WAV.
    import roomcorr.deliver.export as export

    real = export.write_wav
    calls = {"n": 0}

    def flaky(*a, **k):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(a[0]))
        return real(*a, **k)

    monkeypatch.setattr(export, "write_wav", flaky)
    d = work / "d"
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs2", "--out", d, "--replace", "--rates", "48000")
    assert_one_line_error(code, err, "no space left")
    assert snapshot(work) == before and design_is_whole(d)


@pytest.mark.parametrize("where", ["under-a-file", "long-name"])
@pytest.mark.parametrize("command", ["design", "report"])
def test_impossible_out_paths(work, capsys, where, command):
    out = work / "victim.txt" / "x" if where == "under-a-file" else work / ("n" * 300)
    before = snapshot(work)
    if command == "design":
        code, _, err = cli(capsys, "design", work / "irs", "--out", out, "--rates", "48000")
    else:
        code, _, err = cli(capsys, "report", work / "d", "--out", out)
    assert_one_line_error(code, err)
    assert snapshot(work) == before


# --------------------------------------------------------------------------- command line


def test_closed_pipe_ends_quietly(work):
    proc = popen(
        "compare",
        work / "irs",
        work / "irs2",
        "--json",
        "--no-filter-check",
        cwd=work / "cwd",
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    proc.stdout.close()  # the reader went away before anything was written
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 141  # 128 + SIGPIPE, as a shell reports it
    assert "Traceback" not in err and "BrokenPipe" not in err and error_lines(err) == []


@pytest.mark.parametrize("spec", [",", ", ,", " , "])
def test_compare_with_commas_only(work, capsys, spec):
    code, _, err = cli(capsys, "compare", spec, spec)
    assert_one_line_error(code, err, "commas only")


def test_manifest_records_every_input(work, capsys):
    cal = work / "mic.txt"
    cal.write_text("20 0.5\n1000 0\n20000 -1\n")
    out = work / "cwd" / "new"
    code, _, err = cli(
        capsys,
        "design",
        work / "irs",
        "--out",
        out,
        "--rates",
        "48000",
        "--calibration",
        cal,
        "--target",
        "flat",
    )
    assert code == 0, err
    inputs = json.loads((out / "manifest.json").read_text())["inputs"]
    by_role: dict[str, list] = {}
    for e in inputs:
        by_role.setdefault(e["role"], []).append(e)
    wavs = sorted((work / "irs").glob("*.wav"))
    assert [e["sha256"] for e in by_role["measurement"]] == [_sha(p) for p in wavs]
    assert by_role["calibration"][0]["sha256"] == _sha(cal)
    assert Path(by_role["target"][0]["path"]).is_file()  # the preset file itself
    assert by_role["target"][0]["sha256"] == _sha(Path(by_role["target"][0]["path"]))


def test_history_survives_a_run_folder_being_written(work, capsys):
    # A staging folder of a design in progress sits in designs/ under a hidden
    # name: history does not list it, and nothing is taken for a run.
    room = _room(work)
    (room.designs_dir / f".roomcorr-tmp-x-{os.getpid()}-{'0' * 16}").mkdir()
    code, out, err = cli(capsys, "history", "--json", room.root)
    assert code == 0, err
    assert all(not e["run_id"].startswith(".") for e in json.loads(out)["runs"])


def test_working_folder_is_never_swapped_away(work, capsys, monkeypatch):
    # 'design --out .' would replace the folder the shell stands in: refused.
    monkeypatch.chdir(work / "d")
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs", "--out", ".", "--replace")
    assert_one_line_error(code, err, "working folder")
    assert snapshot(work) == before
    # 'report .' inside a design folder replaces the folder as a whole, like --replace
    # (issue 22: all or nothing under a kill); the command then stands in the new
    # folder and says how a shell finds it.
    code, out, err = cli(capsys, "report", ".")
    assert code == 0, err
    assert "cd ." in out
    assert os.stat(".").st_ino == os.stat(work / "d").st_ino
    assert Path("report.html").is_file() and design_is_whole(work / "d")
    assert not leftovers(work)


def test_killed_report_dot_leaves_old_or_new_whole(work):
    # issue 22: 'report .' killed right after report/ appeared left report.html and
    # figures the manifest did not list, and 'design --replace' then refused the folder
    d = work / "d"
    rng = random.Random(22)
    for i in range(6):
        proc = popen("report", ".", cwd=d, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            proc.wait(timeout=rng.uniform(1.0, 6.0))
        except subprocess.TimeoutExpired:
            proc.send_signal(signal.SIGKILL if i % 2 else signal.SIGINT)
        proc.wait()
        assert design_is_whole(d), i
    r = run("design", work / "irs", "--out", d, "--replace", "--rates", "48000", cwd=work)
    assert r.returncode == 0, r.stderr
    assert design_is_whole(d) and not leftovers(work)


@pytest.mark.parametrize("kind", ["design", "measurement"])
def test_nothing_writes_inside_a_finished_run(work, capsys, kind):
    run_dir = _run_dir(work, kind)
    before = snapshot(work)
    code, _, err = cli(capsys, "design", work / "irs", "--out", run_dir / "sub")
    assert_one_line_error(code, err, "finished run")
    code, _, err = cli(capsys, "report", work / "irs", "--out", run_dir / "sub")
    assert_one_line_error(code, err, "finished run")
    if kind == "measurement":  # measure refuses it too, before any sound plays
        from roomcorr.measure.session import run_measurement
        from roomcorr.measure.settings import MeasureSettings

        with pytest.raises(OutputError, match="finished run"):
            run_measurement(MeasureSettings(), run_dir, replace=True)
    assert snapshot(work) == before


def test_raw_recordings_are_checked_by_size(work, capsys):
    # history hashes what it reads; the raw recordings it only checks by size.
    room = _room(work)
    with R.new_run(room, "measurement") as m:
        for p in sorted((work / "irs").glob("*.wav")):
            shutil.copy(p, m / p.name)
        (m / "raw").mkdir()
        (m / "raw" / "pos1_out1.wav").write_bytes(b"\0" * 64)
    (m / "raw" / "pos1_out1.wav").write_bytes(b"\0" * 65)
    code, out, err = cli(capsys, "history", "--json", room.root)
    assert code == 0, err
    entry = next(e for e in json.loads(out)["runs"] if e["run_id"] == m.name)
    assert (
        entry["status"] == "damaged"
        and "raw/pos1_out1.wav: size changed" in (entry["figures"]["problem"])
    )


def test_design_differences_names_what_changed(work):
    from roomcorr.deliver.export import design_differences

    d = work / "d"
    assert design_differences(d) == [] and design_is_whole(d)
    _wav_with_inf(d / "fir" / "48000" / "left.wav")
    (d / "extra.txt").write_text("x")
    (d / "design.npz").unlink()
    assert sorted(design_differences(d)) == [
        "design.npz: missing",
        "extra.txt: not listed",
        "fir/48000/left.wav: SHA-256 differs",
    ]
    assert not design_is_whole(d)  # the test's own check (hashlib) agrees


@pytest.mark.parametrize("kind", ["design", "measurement"])
def test_a_report_beside_a_finished_run_keeps_it_sound(work, capsys, kind):
    # a run is sealed by its record; the report added beside it is the one thing
    # allowed in it unlisted (any other unlisted file makes the run damaged)
    run_dir = _run_dir(work, kind)
    code, _, err = cli(capsys, "report", run_dir)
    assert code == 0, err
    assert (run_dir / "report.html").is_file()
    for run in R.list_runs(_room(work)):
        assert R.check_run(run) is None, run.run_id
    (run_dir / "notes.txt").write_text("added by hand\n")
    run = next(r for r in R.list_runs(_room(work)) if r.path == run_dir)
    assert "notes.txt" in R.check_run(run)
