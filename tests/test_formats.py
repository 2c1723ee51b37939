"""Filter files in every format, routes in the manifest, and two outside tools applying them."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import correlate, fftconvolve
from speaker_rooms import Room, seats, simulate

from roomcorr.deliver.export import read_manifest, sha256_of, write_design
from roomcorr.deliver.formats import coefficients_text, read_filter_file
from roomcorr.deliver.routes import route_diagram
from roomcorr.pipeline import run_design
from roomcorr.settings import FILTER_FORMATS, Settings, design_from_dict

RATES = (44100, 48000)


def _room() -> Room:
    return Room(
        speakers_m=[(0.5, 1.2, 1.0), (0.5, 2.9, 1.0), (4.9, 0.3, 0.3)],
        kinds=["main", "main", "sub"],
        gains_db=[0.0, -1.0, 2.0],
        mics_m=seats((3.1, 2.05, 1.1), 3),
    )


@pytest.fixture(scope="module")
def design(tmp_path_factory):
    irs = simulate(_room(), length_s=0.4)
    settings = Settings(
        design=design_from_dict(
            {
                "channel_names": ["left", "right", "sub"],
                "subwoofer": "sub",
                "sample_rates": list(RATES),
                "taps": 8192,
                "formats": list(FILTER_FORMATS),
            }
        )
    )
    result = run_design(irs, 48000, settings)
    out = tmp_path_factory.mktemp("formats") / "design"
    write_design(result, out)
    return result, out


def test_every_format_holds_the_same_filter(design):
    result, out = design
    for fs in RATES:
        h64 = result.firs[fs]
        multi, fs_multi = sf.read(out / f"fir/{fs}/all.wav", dtype="float64", always_2d=True)
        assert fs_multi == fs and multi.shape == (h64.shape[1], 3)  # channels in output order
        for c, name in enumerate(["left", "right", "sub"]):
            wav, fs_wav = sf.read(out / f"fir/{fs}/{name}.wav", dtype="float64")
            h32 = h64[c].astype(np.float32).astype(np.float64)
            assert fs_wav == fs
            np.testing.assert_array_equal(wav, h32)
            np.testing.assert_array_equal(multi[:, c], h32)
            np.testing.assert_array_equal(
                read_filter_file(out / f"fir/{fs}/{name}.f32", "f32"), h32
            )
            np.testing.assert_array_equal(
                read_filter_file(out / f"fir/{fs}/{name}.f64", "f64"), h64[c]
            )
            # 9 significant digits give the float32 value back exactly (IEEE 754 binary32)
            txt = read_filter_file(out / f"fir/{fs}/{name}.txt", "txt")
            np.testing.assert_array_equal(txt.astype(np.float32), h64[c].astype(np.float32))
            raw = (out / f"fir/{fs}/{name}.f32").read_bytes()
            assert raw[:4] == np.array([h64[c][0]], dtype="<f4").tobytes()  # little-endian


def test_manifest_lists_every_file_with_its_sha256(design):
    _, out = design
    man = read_manifest(out)
    listed = {e["path"]: e for e in man["files"]}
    on_disk = {str(p.relative_to(out)) for p in out.rglob("*") if p.is_file()}
    assert on_disk - {"manifest.json"} == set(listed)
    for rel, e in listed.items():
        assert e["sha256"] == sha256_of(out / rel)
    formats = {e.get("format", "wav") for e in man["files"] if e["kind"] == "fir"}
    assert formats == set(FILTER_FORMATS)


def test_routes_and_outputs(design):
    result, out = design
    man = read_manifest(out)
    routes = man["routes"]
    # two inputs x (own main + subwoofer) x two rates
    assert len(routes) == 2 * 2 * len(RATES)
    for r in routes:
        assert (out / r["path"]).is_file()
        assert r["path"] == f"fir/{r['sample_rate']}/{r['output_name']}.wav"
        if r["output_name"] == "sub":
            assert r["gain_db"] == pytest.approx(-20 * np.log10(2), abs=1e-3)
        else:
            assert r["output"] == r["input"] and r["gain_db"] == 0.0
    outs = {o["name"]: o for o in man["outputs"]}
    assert set(outs) == {"left", "right", "sub"}
    assert all(o["in_filters"] for o in outs.values())
    for o in outs.values():
        for fs, n in o["delay_samples"].items():
            assert abs(n - o["delay_ms"] / 1000 * int(fs)) <= 0.5
    xo = man["system"]["crossover"]
    assert 50 <= xo["frequency_hz"] <= 150 and xo["slope_db_per_octave"] == 24
    diagram = route_diagram(["left", "right", "sub"], result.system)
    assert "fir/RATE/sub.wav" in diagram and diagram.count("-6.02 dB") == 2


def _test_signal(fs: int) -> np.ndarray:
    rng = np.random.default_rng(7)
    x = 0.1 * rng.standard_normal(fs // 2)
    x[: fs // 20] *= np.linspace(0, 1, fs // 20)
    return x.astype(np.float32).astype(np.float64)


def _tool_output(argv: list[str], x: np.ndarray, fs: int, tmp_path, tag: str) -> np.ndarray:
    """Write ``x`` as x.wav, run the tool (``{x}``/``{y}`` stand for the files), read y."""
    x_path, y_path = tmp_path / "x.wav", tmp_path / f"y_{tag}.wav"
    sf.write(x_path, x, fs, subtype="FLOAT")
    argv = [str(x_path) if a == "{x}" else str(y_path) if a == "{y}" else a for a in argv]
    subprocess.run(argv, check=True, capture_output=True)
    y, fs_y = sf.read(y_path, dtype="float64")
    assert fs_y == fs
    return y


def _aligned_error_db(y: np.ndarray, ref: np.ndarray) -> tuple[float, int]:
    """Error of ``y`` against ``ref`` after removing the tool's fixed offset (samples)."""
    c = correlate(y, ref, "full", method="fft")
    lag = int(np.argmax(np.abs(c))) - (ref.size - 1)
    a = y[max(lag, 0) :]
    b = ref[max(-lag, 0) :]
    n = min(a.size, b.size)
    a, b = a[:n], b[:n]
    return float(20 * np.log10(np.linalg.norm(a - b) / np.linalg.norm(b))), lag


@pytest.mark.skipif(shutil.which("ffmpeg") is None, reason="ffmpeg not installed")
def test_ffmpeg_afir_applies_the_wav_filters_like_fftconvolve(design, tmp_path):
    _, out = design
    fs = 48000
    x = _test_signal(fs)
    for name in ("left", "sub"):
        wav = str(out / f"fir/{fs}/{name}.wav")
        h, _ = sf.read(wav, dtype="float64")
        ref = fftconvolve(x, h)  # scipy, float64
        afir = "[0:a][1:a]afir=gtype=none:precision=double"
        argv = ["ffmpeg", "-v", "error", "-y", "-i", "{x}", "-i", wav]
        argv += ["-filter_complex", afir, "-c:a", "pcm_f32le", "{y}"]
        y = _tool_output(argv, x, fs, tmp_path, name)
        # ffmpeg 5.1's afir with gtype=none scales its output by exactly 2 (observed
        # here; its own convention); a fixed power-of-two scale is taken out, nothing else
        scale = float(np.dot(y, ref[: y.size]) / np.dot(ref[: y.size], ref[: y.size]))
        assert min(abs(scale - 1), abs(scale - 2)) < 1e-5
        err_db, lag = _aligned_error_db(y / round(scale), ref)
        assert lag == 0
        assert err_db < -90, f"{name}: {err_db:.1f} dB"


@pytest.mark.skipif(shutil.which("sox") is None, reason="sox not installed")
def test_sox_fir_applies_the_text_filters_like_fftconvolve(design, tmp_path):
    _, out = design
    fs = 44100
    x = _test_signal(fs)
    for name in ("right", "sub"):
        txt = str(out / f"fir/{fs}/{name}.txt")
        coefs = read_filter_file(txt, "txt")
        ref = fftconvolve(x, coefs)
        argv = ["sox", "{x}", "-e", "floating-point", "-b", "32", "{y}", "fir", txt]
        y = _tool_output(argv, x, fs, tmp_path, name)
        err_db, lag = _aligned_error_db(y, ref)
        # sox treats the filter as linear phase and advances its output by (N - 1) / 2
        assert lag == -((coefs.size - 1) // 2)
        assert err_db < -90, f"{name}: {err_db:.1f} dB"


def test_coefficients_text_is_one_number_per_line():
    h = np.array([1.0, -0.5, 1e-9, 0.1])
    lines = coefficients_text(h).splitlines()
    assert len(lines) == 4 and [float(v) for v in lines] == pytest.approx(h.tolist())


def _cli(*args: str, cwd=None) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "roomcorr", *args], capture_output=True, text=True, cwd=cwd
    )


@pytest.fixture(scope="module")
def ir_files(tmp_path_factory):
    irs = simulate(_room(), length_s=0.4)
    d = tmp_path_factory.mktemp("irs")
    for p in range(irs.shape[0]):
        sf.write(d / f"pos{p + 1}.wav", irs[p].T, 48000, subtype="FLOAT")
    return sorted(str(p) for p in d.glob("pos*.wav"))


def test_cli_design_with_subwoofer_formats_and_no_align(ir_files, tmp_path):
    out = tmp_path / "d"
    r = _cli(
        "design",
        *ir_files,
        "--names",
        "left,right,sub",
        "--subwoofer",
        "sub",
        "--no-align",
        "--formats",
        "txt,f32",
        "--rates",
        "48000",
        "--taps",
        "8192",
        "--out",
        str(out),
    )
    assert r.returncode == 0, r.stderr
    assert "Linkwitz-Riley" in r.stdout and "fir/RATE/sub.wav" in r.stdout
    assert "set them as trims on the playback device" in r.stdout
    man = json.loads((out / "manifest.json").read_text())
    assert {e.get("format", "wav") for e in man["files"] if e["kind"] == "fir"} == {
        "wav",
        "txt",
        "f32",
    }
    assert not any(o["in_filters"] for o in man["outputs"])
    assert man["settings"]["design"]["channel_names"] == ["left", "right", "sub"]


@pytest.mark.parametrize(
    "args, words",
    [
        (["--names", "left,right", "--subwoofer", "left"], "--names gives 2 names for 3"),
        (["--names", "left,right,sub", "--subwoofer", "woofer"], "subwoofer"),
        (["--names", "left,left,sub"], "own name"),
        (["--crossover-range", "10,400"], "crossover_range_hz"),
        (["--formats", "mp3"], "formats"),
    ],
)
def test_cli_bad_system_options(ir_files, tmp_path, args, words):
    out = tmp_path / "bad"
    r = _cli("design", *ir_files, *args, "--rates", "48000", "--taps", "4096", "--out", str(out))
    assert r.returncode == 2, r.stderr
    lines = [ln for ln in r.stderr.splitlines() if ln.startswith("roomcorr: error")]
    assert len(lines) == 1 and words in lines[0], r.stderr
    assert "Traceback" not in r.stderr
    assert not out.exists() or not any(out.rglob("*"))


def test_report_has_the_system_section(design):
    from roomcorr.deliver.export import load_design_curves
    from roomcorr.report.html import build_report, render_html

    _, out = design
    curves = load_design_curves(out)
    report = build_report(curves, read_manifest(out)["settings"], dpi=40)
    sec = next(s for s in report.sections if s.id == "system")
    assert sec.table[0][:3] == ["output", "role", "delay (ms)"]
    assert [row[0] for row in sec.table[1:]] == ["left", "right", "sub"]
    assert len(sec.figures) == 2  # one per main loudspeaker
    assert any("Linkwitz-Riley" in p for p in sec.paragraphs)
    assert "Loudspeakers together" in render_html(report)


def test_documented_route_picture_is_the_codes(design):
    """The route picture in the manifest reference is the one the code draws."""
    from conftest import REPO

    result, _ = design
    picture = route_diagram(["left", "right", "sub"], result.system)
    assert picture in (REPO / "docs" / "reference" / "manifest.md").read_text(encoding="utf-8")


def test_design_takes_the_names_measure_stored(ir_files, tmp_path):
    folder = tmp_path / "meas"
    folder.mkdir()
    for f in ir_files:
        shutil.copy(f, folder)
    record = {"settings": {"outputs": [1, 2, 3], "names": ["front-l", "front-r", "lfe"]}}
    (folder / "measurement.json").write_text(json.dumps(record))
    out = tmp_path / "d"
    r = _cli(
        "design",
        str(folder),
        "--subwoofer",
        "lfe",
        "--rates",
        "48000",
        "--taps",
        "4096",
        "--out",
        str(out),
    )
    assert r.returncode == 0, r.stderr
    man = json.loads((out / "manifest.json").read_text())
    assert [c["name"] for c in man["channels"]] == ["front-l", "front-r", "lfe"]
    assert (out / "fir/48000/lfe.wav").is_file()


def test_measure_settings_keep_names_per_output():
    from roomcorr.errors import SettingsError
    from roomcorr.measure.settings import MeasureSettings

    ms = MeasureSettings.from_dict({"outputs": [1, 2, 3], "names": ["left", "right", "sub"]})
    assert ms.names == ("left", "right", "sub")
    assert ms.to_dict()["names"] == ("left", "right", "sub")
    with pytest.raises(SettingsError, match="--names gives 2 names for 3 outputs"):
        MeasureSettings.from_dict({"outputs": [1, 2, 3], "names": ["left", "right"]})
