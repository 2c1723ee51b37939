"""Checks of the report: summary sentences, filter response, prediction, page, browser render."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from roomcorr.grid import log_grid
from roomcorr.report import html as rh
from roomcorr.report import summary
from roomcorr.report.curves import filter_response, iir_response_db, predicted_responses

FS = 48000


# ----------------------------------------------------------------------------- summary sentences


def _flat_channel(freq, **over):
    n = freq.size
    ch = {
        "index": 0,
        "name": "left",
        "measured_db": np.zeros((2, n)),
        "average_db": np.zeros(n),
        "spread_db": np.full(n, 0.5),
        "target_db": np.zeros(n),
        "raw_correction_db": np.zeros(n),
        "correction_db": np.zeros(n),
        "boost_withheld_db": np.zeros(n),
        "band_hz": (30.0, 16000.0),
    }
    ch.update(over)
    return ch


def _bump(freq, f0, depth_db, width_oct):
    return depth_db * np.exp(-0.5 * (np.log2(freq / f0) / width_oct) ** 2)


def test_deep_narrow_dip_is_called_a_cancellation_and_left():
    # the example sentence of the report issue: "a 14 dB dip at 87 Hz is a cancellation;
    # boosting it would waste 14 dB of headroom, so it was left"
    f = log_grid()
    dip = _bump(f, 87.0, 14.0, 0.03)
    ch = _flat_channel(
        f, average_db=-dip, raw_correction_db=dip, boost_withheld_db=dip.copy()
    )
    text = " ".join(summary.channel_sentences(f, ch, max_boost_db=4.0))
    assert "a 14 dB dip at 87 Hz is a cancellation" in text
    assert "waste 14 dB of headroom, so it was left" in text


def test_disagreeing_positions_and_cap_are_told_apart():
    f = log_grid()
    # a broad shallow dip where positions disagree by 5 dB: refused because of the spread
    dip = _bump(f, 300.0, 5.0, 0.3)
    ch = _flat_channel(
        f,
        average_db=-dip,
        raw_correction_db=dip,
        boost_withheld_db=dip.copy(),
        spread_db=np.where(dip > 1, 5.0, 0.5),
    )
    regions = summary.withheld_regions(f, ch, 4.0)
    assert regions[0]["reason"] == "spread"
    assert regions[0]["freq_hz"] == pytest.approx(300, rel=0.01)
    # a broad 8 dB dip filled up to the 4 dB cap: refused because of the cap
    dip = _bump(f, 2000.0, 8.0, 0.5)
    ch = _flat_channel(
        f,
        average_db=-dip,
        raw_correction_db=dip,
        correction_db=np.minimum(dip, 4.0),
        boost_withheld_db=np.maximum(dip - 4.0, 0.0),
    )
    regions = summary.withheld_regions(f, ch, 4.0)
    assert [r["reason"] for r in regions] == ["cap"]
    text = " ".join(summary.channel_sentences(f, ch, 4.0))
    assert "lifted by 4.0 dB only" in text


def test_cuts_and_pre_gain_are_reported():
    f = log_grid()
    peak = _bump(f, 62.0, 10.0, 0.1)
    ch = _flat_channel(f, average_db=peak, raw_correction_db=-peak, correction_db=-peak)
    curves = {"freq_hz": f, "pre_gain_db": -3.24, "channels": [ch]}
    lines = summary.summary_sentences(curves, 4.0)
    assert any("10.0 dB at 62 Hz" in s and "cut" in s for s in lines)
    assert any("lowered by 3.2 dB" in s for s in lines)
    assert any("between 30 Hz and 16 kHz" in s for s in lines)


def test_fmt_hz():
    assert [summary.fmt_hz(x) for x in (87.2, 120, 1234, 15000)] == [
        "87 Hz", "120 Hz", "1.2 kHz", "15 kHz"
    ]


# ----------------------------------------------------------------------------- filter analysis


def test_filter_response_of_a_pure_delay():
    # analytic: a delay of k samples has 0 dB gain, phase -2 pi f k / fs, group delay k / fs
    k = 48
    h = np.zeros(256)
    h[k] = 1.0
    f = np.array([100.0, 1000.0, 5000.0, 30000.0])
    gain, phase, gd = filter_response(h, FS, f)
    np.testing.assert_allclose(gain[:3], 0.0, atol=1e-4)
    want = np.degrees(np.angle(np.exp(-2j * np.pi * f[:3] * k / FS)))
    np.testing.assert_allclose(phase[:3], want, atol=1e-3)
    np.testing.assert_allclose(gd[:3], 1000.0 * k / FS, rtol=1e-6)
    assert np.isnan(gain[3])  # above Nyquist


def test_filter_response_matches_scipy():
    # scipy.signal.freqz and group_delay as the reference, on a decaying random FIR
    from scipy.signal import freqz, group_delay

    rng = np.random.default_rng(3)
    h = rng.standard_normal(512) * np.exp(-np.arange(512) / 60.0)
    f = np.geomspace(20, 20000, 200)
    gain, phase, gd = filter_response(h, FS, f)
    _, ref = freqz(h, worN=f, fs=FS)
    _, ref_gd = group_delay((h, [1.0]), w=f, fs=FS)
    np.testing.assert_allclose(gain, 20 * np.log10(np.abs(ref)), atol=0.01)
    dphi = np.angle(np.exp(1j * np.radians(phase)) / ref)
    np.testing.assert_allclose(dphi, 0.0, atol=0.01)
    np.testing.assert_allclose(gd, ref_gd / FS * 1000, atol=0.01)


def test_iir_response_is_the_cookbook_peak():
    # Audio EQ Cookbook peaking filter: gain at f0 equals the set gain (REFERENCES.md)
    fs, f0, gain_db, q = 48000, 1000.0, 6.0, 2.0
    a = 10 ** (gain_db / 40)
    w0 = 2 * np.pi * f0 / fs
    alpha = np.sin(w0) / (2 * q)
    b = np.array([1 + alpha * a, -2 * np.cos(w0), 1 - alpha * a])
    den = np.array([1 + alpha / a, -2 * np.cos(w0), 1 - alpha / a])
    c = [*(b / den[0]), *(den[1:] / den[0])]
    doc = {"sample_rate": fs, "pre_gain_db": -6.0, "pre_gain_linear": 10 ** (-6 / 20),
           "sections": [{"coefficients": c}]}
    db = iir_response_db(doc, np.array([f0, 20.0, 30000.0]))
    assert db[0] == pytest.approx(0.0, abs=1e-9)  # +6 dB section, -6 dB pre-gain
    assert db[1] == pytest.approx(-6.0, abs=0.01)  # unity far below f0
    assert np.isnan(db[2])


def _synthetic_room(n_pos=2, dur_s=0.6, seed=5):
    """An invented small room: direct sound, one wall reflection, two modes, diffuse tail."""
    rng = np.random.default_rng(seed)
    n = int(dur_s * FS)
    t = np.arange(n) / FS
    irs = np.zeros((n_pos, 1, n))
    for p in range(n_pos):
        t0 = 0.004 + 0.0005 * p
        i0 = int(t0 * FS)
        irs[p, 0, i0] = 1.0
        irs[p, 0, i0 + int(0.0031 * FS)] += 0.6
        tt = np.clip(t - t0, 0, None) * (t >= t0)
        irs[p, 0] += 0.05 * np.sin(2 * np.pi * 52 * tt) * 10 ** (-3 * tt / 0.9) * (t >= t0)
        irs[p, 0] += 0.03 * np.sin(2 * np.pi * 130 * tt) * 10 ** (-3 * tt / 0.4) * (t >= t0)
        irs[p, 0] += 0.02 * rng.standard_normal(n) * 10 ** (-3 * tt / 0.35) * (t >= t0)
        irs[p, 0] += 1e-5 * rng.standard_normal(n)
    return irs


def test_predicted_response_of_a_plain_gain():
    # convolving with 0.5 * delta lowers every position by 20 log10(0.5) = -6.02 dB (analytic)
    irs = _synthetic_room()[:, 0]
    f = log_grid()
    fir = np.zeros(64)
    fir[0] = 0.5
    measured = np.zeros((irs.shape[0], f.size))
    pred, conv = predicted_responses(irs, FS, fir, f, measured)
    m = (f > 30) & (f < 20000)
    np.testing.assert_allclose(pred[:, m], 20 * np.log10(0.5), atol=1e-6)
    np.testing.assert_allclose(conv, 0.5 * irs, atol=1e-12)


# ----------------------------------------------------------------------------- the whole page


def _record(n_positions):
    """A measurement.json record in the layout written by roomcorr.measure.session."""
    figures = {
        "snr_db_per_octave": {"63": 52.0, "125": 60.0, "1000": 71.0},
        "repeat_disagreement_db": -38.5,
        "harmonic_distortion": {
            "fundamental_hz": [63.0, 125.0, 1000.0],
            "orders": {"2": [-30.0, -38.0, -50.0], "3": [-40.0, None, -60.0]},
        },
    }
    gates = [
        {"name": "snr", "passed": True, "value": 52.0, "limit": 30.0, "unit": "dB", "message": ""},
        {"name": "clipping", "passed": False, "value": 3, "limit": 0, "unit": "samples",
         "message": "lower the level"},
    ]
    return {
        "positions": [
            {"position": p + 1, "file": f"pos{p + 1}.wav",
             "channels": [{"output": 1, "figures": figures, "gates": gates}]}
            for p in range(n_positions)
        ]
    }


_ENV = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}


@pytest.fixture(scope="module")
def design_folder(tmp_path_factory):
    from roomcorr.deliver.export import write_design
    from roomcorr.deliver.export_iir import write_iir
    from roomcorr.design.realise.iir_fit import design_iir
    from roomcorr.pipeline import run_design
    from roomcorr.settings import DesignSettings, Settings

    base = tmp_path_factory.mktemp("design")
    out = base / "out"
    session = base / "session"  # where the IRs came from, with its quality record
    session.mkdir()
    (session / "measurement.json").write_text(json.dumps(_record(2)))
    settings = Settings(design=DesignSettings(sample_rates=(44100, 48000), iir=True), measure={})
    result = run_design(_synthetic_room(), FS, settings)
    write_design(result, out, extra={"measurements": [str(session / "pos1.wav")]})
    write_iir(design_iir(result), out)
    # the report is written once, by the command a user would type (checked below)
    run = subprocess.run(
        [sys.executable, "-m", "roomcorr", "report", str(out)],
        capture_output=True, text=True, timeout=300, env=_ENV,
    )
    assert run.returncode == 0, run.stderr
    return out, out / "report.html", run


CHANNEL_SECTIONS = ["room", "result", "filter", "time", "iir", "decay", "ringing"]


def test_every_section_and_figure_present(design_folder):
    out, path, _ = design_folder
    assert path == out / "report.html"
    page = path.read_text(encoding="utf-8")
    for sid in ["overview", "quality", "safety"] + CHANNEL_SECTIONS:
        assert f'<section id="{sid}">' in page, sid
    for s in CHANNEL_SECTIONS:  # one column per channel inside each per-channel section
        body = page.split(f'<section id="{s}">')[1].split("</section>")[0]
        assert f'<div class="channel" id="{s}-mono" data-channel="mono">' in body, s
    keys = re.findall(r'data-figure="([^"]+)"', page)
    # the quality figure comes from measurement.json beside the design's source IRs
    assert keys == [f"mono-{s}" for s in CHANNEL_SECTIONS] + ["quality"]
    pngs = sorted(p.name for p in (out / "report").glob("*.png"))
    assert pngs == sorted(f"{k}.png" for k in keys)
    for p in (out / "report").glob("*.png"):
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the decay table, the safety table (one row per rate) and the cautions
    assert "T30 (s)" in page and "worst-case gain (dB)" in page
    assert "<th>Q</th>" in page  # the biquad table
    assert page.count("<td>mono</td>") == 2
    assert "protect your hearing" in page


def test_page_is_self_contained(design_folder):
    _, path, _ = design_folder
    page = path.read_text(encoding="utf-8")
    srcs = re.findall(r'src="([^"]+)"', page)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert "http://" not in page and "https://" not in page
    assert "<link" not in page and "<script" not in page


def test_report_files_are_in_the_manifest(design_folder):
    from roomcorr.deliver.export import read_manifest, sha256_of

    out, _, _ = design_folder
    files = {e["path"]: e for e in read_manifest(out)["files"]}
    assert files["report.html"]["kind"] == "report"
    assert files["report.html"]["sha256"] == sha256_of(out / "report.html")
    assert files["report/mono-decay.png"]["kind"] == "report-figure"


def test_summary_sentences_head_the_page(design_folder):
    from roomcorr.deliver.export import load_design_curves, read_manifest

    out, path, _ = design_folder
    page = path.read_text(encoding="utf-8")
    caps = read_manifest(out)["settings"]["design"]["max_boost_db"]
    first = summary.summary_sentences(load_design_curves(out), caps)[0]
    import html

    assert page.index(html.escape(first)) < page.index('id="room-mono"')


def test_measurement_folder_report_with_quality(tmp_path):
    from roomcorr.audio_io import write_wav

    irs = _synthetic_room(n_pos=2, dur_s=0.6)
    for p in range(irs.shape[0]):
        write_wav(tmp_path / f"pos{p + 1}.wav", irs[p], FS)
    record = _record(irs.shape[0])
    (tmp_path / "measurement.json").write_text(json.dumps(record))
    page = rh.write_report(tmp_path, dpi=50).read_text(encoding="utf-8")
    keys = re.findall(r'data-figure="([^"]+)"', page)
    assert keys == ["mono-room", "mono-decay", "mono-ringing", "quality"]
    assert "measurements only" in page
    assert 'id="safety"' not in page  # no filters, no filter levels
    assert "pos2 out1: clipping (lower the level)" in page
    assert "<td>pos1 out1</td><td>52</td><td>-38.5</td><td>1 of 2</td>" in page


def test_not_a_report_folder(tmp_path):
    from roomcorr.errors import InputFileError

    with pytest.raises(InputFileError, match="neither a design folder"):
        rh.write_report(tmp_path)


# ----------------------------------------------------------------------------- real browser


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        p = shutil.which(name)
        if p:
            return p
    return None


def test_renders_in_headless_chromium(design_folder, tmp_path):
    exe = _chromium()
    if exe is None:
        if os.environ.get("CI") == "true":
            pytest.fail("chromium is not installed (the CI script must install it)")
        pytest.skip("chromium not installed")
    _, path, _ = design_folder
    shot = tmp_path / "shot.png"
    cmd = [
        exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}",
        "--window-size=1200,3000", path.resolve().as_uri(),
    ]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.is_file(), "chromium wrote no screenshot"
    from matplotlib.image import imread

    img = imread(shot)[..., :3]
    assert img.shape[0] >= 1000 and img.shape[1] >= 1000
    # not blank: many pixels differ from the page background, and colours vary
    background = np.median(img.reshape(-1, 3), axis=0)
    differs = np.any(np.abs(img - background) > 0.1, axis=-1)
    assert differs.mean() > 0.05
    assert img.std() > 0.05


def _stereo_room(n_pos=2, dur_s=0.6):
    """Two loudspeakers of the invented room: the second one's modes and wall sit elsewhere."""
    left = _synthetic_room(n_pos, dur_s, seed=5)
    right = np.roll(_synthetic_room(n_pos, dur_s, seed=6), 7, axis=-1)
    right[..., :7] = 0.0
    return np.concatenate([left, 0.8 * right], axis=1)


@pytest.fixture(scope="module")
def stereo_folder(tmp_path_factory):
    from roomcorr.deliver.export import write_design
    from roomcorr.deliver.export_iir import write_iir
    from roomcorr.design.realise.iir_fit import design_iir
    from roomcorr.pipeline import run_design
    from roomcorr.settings import DesignSettings, Settings

    out = tmp_path_factory.mktemp("stereo") / "out"
    settings = Settings(design=DesignSettings(sample_rates=(48000,), iir=True), measure={})
    result = run_design(_stereo_room(), FS, settings)
    write_design(result, out)
    write_iir(design_iir(result), out, fir=result)
    run = subprocess.run(
        [sys.executable, "-m", "roomcorr", "report", str(out)],
        capture_output=True, text=True, timeout=300, env=_ENV,
    )
    assert run.returncode == 0, run.stderr
    return out


#: Injected into a copy of the page only (the report itself carries no script): reads the
#: layout the browser computed and leaves it in the DOM for --dump-dom.
_MEASURE_JS = """<script>
window.addEventListener('load', function () {
  var figs = [].slice.call(document.querySelectorAll('figure img')).map(function (i) {
    var r = i.getBoundingClientRect();
    return {key: i.parentNode.getAttribute('data-figure'), width: r.width,
            natural: i.naturalWidth, top: r.top + window.scrollY, left: r.left};
  });
  var pre = document.createElement('pre');
  pre.id = 'layout';
  pre.textContent = JSON.stringify({height: document.documentElement.scrollHeight, figs: figs});
  document.body.appendChild(pre);
});
</script>"""


def _browser_layout(page: Path, tmp_path: Path, width_px: int) -> dict:
    exe = _chromium()
    if exe is None:
        if os.environ.get("CI") == "true":
            pytest.fail("chromium is not installed (the CI script must install it)")
        pytest.skip("chromium not installed")
    probe = tmp_path / "probe.html"
    probe.write_text(page.read_text(encoding="utf-8").replace("</body>", _MEASURE_JS + "</body>"),
                     encoding="utf-8")
    cmd = [
        exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}", f"--window-size={width_px},1000",
        "--virtual-time-budget=10000", "--dump-dom", probe.resolve().as_uri(),
    ]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=False)
    m = re.search(r'<pre id="layout">(.*?)</pre>', r.stdout, re.S)
    assert m, "chromium did not report the layout"
    import html as _html

    return json.loads(_html.unescape(m.group(1)))


def test_two_channels_side_by_side_with_readable_legends(stereo_folder, tmp_path):
    from roomcorr.report.figures import LEGEND_PT

    layout = _browser_layout(stereo_folder / "report.html", tmp_path, 1400)
    figs = {f["key"]: f for f in layout["figs"]}
    for s in CHANNEL_SECTIONS:
        left, right = figs[f"left-{s}"], figs[f"right-{s}"]
        # side by side: the right channel's figure sits to the right, on the same row band
        assert right["left"] > left["left"] + left["width"] - 1, s
        assert abs(right["top"] - left["top"]) < 0.6 * right["width"], s
    # legend text as the reader sees it: points at 90 dpi, scaled like the image on screen
    # (1 pt = 1/72 inch, the definition of the point)
    px = [LEGEND_PT * 90 / 72 * f["width"] / f["natural"] for f in layout["figs"]]
    assert min(px) >= 10.0, px
    # a two-channel page at 1400 px is far shorter than one channel after the other
    # (about 12,000 px before; every section now takes one row of channels). The page has
    # since gained sections that are not per channel (the sentences channel by channel,
    # the files and how to load them), about 1,000 px of text: hence 10,000, not 9,000.
    assert layout["height"] < 10000, layout["height"]
    # on a narrow window the columns stack instead of shrinking the figures
    narrow = _browser_layout(stereo_folder / "report.html", tmp_path, 700)
    nf = {f["key"]: f for f in narrow["figs"]}
    assert nf["right-room"]["top"] > nf["left-room"]["top"] + 100


# ----------------------------------------------------------------------------- axis limits


def test_level_axis_shows_deep_dips():
    from roomcorr.report import figures as fg

    f = log_grid()
    avg = _bump(f, 100.0, -60.0, 0.02)  # a 60 dB notch: the axis must reach below it
    fig = fg.plot_responses(f, avg[None, :], avg, np.zeros_like(f), (30.0, 16000.0), 4.0, "t")
    lo, hi = fig.axes[0].get_ylim()
    assert lo < np.min(avg) and hi > 0


def test_filter_axes_follow_the_data():
    from roomcorr.report import figures as fg

    f = log_grid()
    gain = _bump(f, 60.0, -35.0, 0.05)
    gd = 120.0 * np.exp(-0.5 * (np.log2(f / 60.0) / 0.05) ** 2) - 50.0 * (f < 30)
    fig = fg.plot_filter(f, gain, np.zeros_like(f), gd, gain, np.zeros_like(f),
                         (30.0, 16000.0), 0.0, 48000, "t")
    g_lo, _ = fig.axes[0].get_ylim()
    d_lo, d_hi = fig.axes[2].get_ylim()
    assert g_lo < -35.0
    assert d_hi > 120.0 and d_lo < -50.0
    # with caps: an absurd value does not squash the rest
    gd[np.searchsorted(f, 1000.0)] = 1e6
    fig = fg.plot_filter(f, gain, np.zeros_like(f), gd, gain, np.zeros_like(f),
                         (30.0, 16000.0), 0.0, 48000, "t")
    assert fig.axes[2].get_ylim()[1] == fg.GROUP_DELAY_AXIS_MS[1]


# ----------------------------------------------------------------------------- command line


def test_cli_report_command(design_folder, tmp_path):
    out, _, run = design_folder
    assert "corrected between" in run.stdout
    assert run.stdout.strip().splitlines()[-1] == f"report: {out / 'report.html'}"
    bad = subprocess.run(
        [sys.executable, "-m", "roomcorr", "report", str(tmp_path / "missing")],
        capture_output=True, text=True, timeout=300, env=_ENV,
    )
    assert bad.returncode == 2
    assert len(bad.stderr.strip().splitlines()) == 1 and "no such folder" in bad.stderr


def test_predicted_result_is_closer_to_the_target(design_folder):
    # what the report's prediction must show for a working design: inside the band the
    # corrected power average deviates less from the (pre-gain lowered) target than before
    from roomcorr.deliver.export import load_design_curves

    out, _, _ = design_folder
    cur = load_design_curves(out)
    ch = cur["channels"][0]
    f = cur["freq_hz"]
    pred, _ = predicted_responses(
        cur["irs"][:, 0], cur["fs_in"], cur["firs"][48000][0], f, ch["measured_db"]
    )
    after = 10 * np.log10(np.mean(10 ** (pred / 10), axis=0))
    m = (f >= ch["band_hz"][0]) & (f <= ch["band_hz"][1])
    rms_before = np.sqrt(np.mean((ch["average_db"] - ch["target_db"])[m] ** 2))
    rms_after = np.sqrt(np.mean((after - ch["target_db"] - cur["pre_gain_db"])[m] ** 2))
    assert rms_after < 0.7 * rms_before


def test_measurement_through_filters_section(tmp_path):
    """A measurement made with ``measure --through`` gets a section comparing it with the
    design's prediction, naming where the two differ by more than the limit."""
    import json as _json
    import shutil as _shutil

    from roomcorr.report.html import write_report

    folder = tmp_path / "through-run"
    folder.mkdir()
    demo = sorted((Path(__file__).resolve().parents[1] / "measurements_demo").glob("*.wav"))[:2]
    for f in demo:
        _shutil.copy(f, folder / f.name)
    freq = np.geomspace(40.0, 16000.0, 120)
    measured = np.zeros((2, 2, freq.size))
    predicted = np.zeros_like(measured)
    measured[1, 0, (freq > 90) & (freq < 140)] = 2.5  # position 2, first channel: 2.5 dB off
    check = {
        "positions": [1, 2],
        "limit_db": 1.0,
        "smoothing_oct": 1 / 6,
        "freq_hz": freq.tolist(),
        "measured_db": measured.tolist(),
        "predicted_db": predicted.tolist(),
        "over_limit_hz": [[[], []], [[[92.0, 138.0]], []]],
    }
    (folder / "measurement.json").write_text(_json.dumps({"through": {"check": check}}))
    page = write_report(folder, dpi=40).read_text(encoding="utf-8")
    assert "Measured through the design" in page  # the section's title
    assert "Position 2: more than 1 dB apart 92 Hz to 138 Hz." in page
    assert "Position 1: more than 1 dB apart nowhere." in page
    assert "1 of 4 loudspeaker positions differ" in page
    assert (folder / "report" / "left-through.png").is_file()
    assert (folder / "report" / "right-through.png").is_file()
