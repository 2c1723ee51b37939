"""Tests for roomcorr.placement: layout file, causes, the calibrated model, predict, advise."""

from __future__ import annotations

import numpy as np
import pyroomacoustics as pra
import pytest
import soundfile as sf
from scipy.signal import butter, resample_poly, sosfilt

from roomcorr.cli import main
from roomcorr.errors import SettingsError
from roomcorr.physics import image_order_for
from roomcorr.placement import causes
from roomcorr.placement.layout import (
    Layout,
    layout_from_dict,
    layout_text,
    read_layout,
    write_layout,
)
from roomcorr.placement.model import calibrate, measured_levels_db

C = 343.0

GOOD = {
    "room": {"size_m": [5.2, 6.3, 2.6]},
    "loudspeakers": {"left": [1.4, 0.95, 1.0], "right": [3.8, 0.95, 1.0]},
    "seat": {"position": [2.6, 3.6, 1.1]},
    "measured": [{"position": [2.6, 3.6, 1.1]}, {"position": [2.35, 3.6, 1.1]}],
}


def _with(path: str, value):
    import copy

    data = copy.deepcopy(GOOD)
    keys = path.split(".")
    t = data
    for k in keys[:-1]:
        t = t[k]
    t[keys[-1]] = value
    return data


def test_layout_round_trip(tmp_path):
    layout = layout_from_dict(GOOD)
    assert layout.names == ["left", "right"]
    path = write_layout(tmp_path / "layout.toml", layout)
    assert read_layout(path) == layout
    assert "[[measured]]" in layout_text(layout)


@pytest.mark.parametrize(
    ("path", "value", "words"),
    [
        ("loudspeakers.left", [1.4, -0.1, 1.0], "outside the room"),
        ("loudspeakers.left", [5.3, 1.0, 1.0], "outside the room"),
        ("seat.position", [2.6, 3.6, 2.7], "outside the room"),
        ("loudspeakers.right", [2.7, 3.5, 1.0], "listening area"),  # on the listener's head
        ("room.size_m", [5.2, float("nan"), 2.6], "finite"),
        ("room.size_m", [5.2, 6.3], "three numbers"),
        ("room.size_m", [0.5, 6.3, 2.6], "between"),
        ("loudspeakers.left", [1.4, 0.95], "three numbers"),
    ],
)
def test_layout_refusals(path, value, words):
    with pytest.raises(SettingsError, match=words):
        layout_from_dict(_with(path, value), "layout.toml")


def test_layout_refuses_unknown_keys_and_missing_tables():
    with pytest.raises(SettingsError, match="unknown key 'speakers'"):
        layout_from_dict({**GOOD, "speakers": {}})
    with pytest.raises(SettingsError, match=r"missing table \[seat\]"):
        layout_from_dict({k: v for k, v in GOOD.items() if k != "seat"})


def test_cli_layout_set_and_show(tmp_path, capsys):
    f = str(tmp_path / "l.toml")
    assert main(["layout", "set", "--file", f, "--size", "5.2,6.3,2.6", "--speaker",
                 "left=1.4,0.95,1", "--speaker", "right=3.8,0.95,1", "--seat", "2.6,3.6,1.1"]) == 0
    assert main(["layout", "show", "--file", f, "--json"]) == 0
    out = capsys.readouterr().out
    assert '"left"' in out and "3.6" in out
    # a later set keeps what it does not change
    assert main(["layout", "set", "--file", f, "--seat", "2.6,3.2,1.1"]) == 0
    assert read_layout(f).loudspeakers["right"] == (3.8, 0.95, 1.0)
    assert main(["layout", "set", "--file", f, "--seat", "2.6,9,1.1"]) == 2
    assert "outside the room" in capsys.readouterr().err


def test_quarter_wave_dip_is_blamed_on_the_right_surface():
    # Common practice: a loudspeaker d from the front wall, heard far along the wall's normal,
    # has its first boundary notch at c / (4d).
    d = 0.6
    speaker = np.array([3.0, d, 1.2])
    seat = np.array([3.0, 7.0, 1.2])
    size = np.array([6.0, 9.0, 2.4])
    r = causes.explain({"kind": "dip", "freq_hz": C / (4 * d), "size_db": 8.0},
                       speaker, seat, size, reflections_s=[2 * d / C])
    assert r["cause"] == "boundary" and r["surface"] == "front wall"
    assert r["distance_m"] == pytest.approx(d)
    assert r["evidence"]["reflection_measured_ms"] is not None


def test_peak_at_a_rayleigh_frequency_is_the_length_mode():
    # Rayleigh: the 2nd length mode of a 6.3 m room is 2 c / (2 L) = 54.4 Hz; the loudspeaker
    # near the front wall and a seat at a third of the length both sit near its antinodes.
    size = np.array([5.2, 6.3, 2.6])
    r = causes.explain({"kind": "peak", "freq_hz": 55.0, "size_db": 7.0},
                       np.array([1.4, 0.3, 1.3]), np.array([2.6, 0.2 * 6.3, 1.3]), size)
    assert r["cause"] == "mode" and r["mode"] == [0, 2, 0]
    assert r["evidence"]["rayleigh_hz"] == pytest.approx(C / 6.3, abs=0.1)
    assert "length" in r["text"]


def test_without_a_layout_a_reflection_delay_still_explains_a_dip():
    t = 0.0035  # a surface about 0.6 m away: notch at 1/(2t) = 143 Hz
    r = causes.explain({"kind": "dip", "freq_hz": 1 / (2 * t), "size_db": 6.0},
                       reflections_s=[t])
    assert r["cause"] == "boundary" and r["distance_m"] == pytest.approx(C * t / 2, rel=1e-3)
    r = causes.explain({"kind": "dip", "freq_hz": 90.0, "size_db": 6.0}, spread_db=12.0)
    assert r["cause"] == "positions"
    assert causes.explain({"kind": "peak", "freq_hz": 90.0, "size_db": 6.0})["cause"] == "unknown"


def test_reflection_delay_found_in_an_impulse_response():
    # Allen and Berkley image: a copy 3.5 ms later at half the level.
    fs = 48000
    ir = np.zeros(4800)
    ir[100] = 1.0
    ir[100 + int(0.0035 * fs)] = 0.5
    found = causes.reflection_delays_s(ir, fs)
    assert min(abs(np.array(found) - 0.0035)) < 0.0002


@pytest.fixture(scope="module")
def pra_room(tmp_path_factory):
    """A room simulated by pyroomacoustics (image sources, independent of our model)."""
    folder = tmp_path_factory.mktemp("pra")
    dims = [4.6, 5.8, 2.5]
    spk = [[1.2, 0.7, 1.0], [3.4, 0.7, 1.0]]
    seat = np.array([2.3, 3.3, 1.1])
    offsets = [[0, 0, 0], [-0.25, 0, 0], [0.25, 0, 0], [0, 0.3, 0.05]]
    mics = [seat + o for o in offsets]

    def simulate(speakers, mic_list):
        mats = {w: pra.Material(a) for w, a in zip(
            ["west", "east", "south", "north", "floor", "ceiling"],
            [0.15, 0.15, 0.2, 0.25, 0.25, 0.15], strict=True)}
        room = pra.ShoeBox(dims, fs=8000, materials=mats, max_order=40, air_absorption=False)
        for s in speakers:
            room.add_source(s)
        room.add_microphone_array(np.array(mic_list).T)
        hpf = pra.constants.get("rir_hpf_enable")
        pra.constants.set("rir_hpf_enable", False)  # its 10 Hz high-pass is not causal
        try:
            room.compute_rir()
        finally:
            pra.constants.set("rir_hpf_enable", hpf)
        n = min(len(r) for row in room.rir for r in row)
        irs = np.array([[room.rir[m][s][:n] for s in range(len(speakers))]
                        for m in range(len(mic_list))])
        irs = sosfilt(butter(4, 45, "high", fs=8000, output="sos"), irs, axis=-1)
        return resample_poly(irs, 6, 1, axis=-1)

    irs = simulate(spk, mics)
    scale = 0.5 / np.abs(irs).max()
    for i, ir in enumerate(irs):
        sf.write(folder / f"pos{i + 1}.wav", (scale * ir).T, 48000, subtype="FLOAT")
    layout = Layout((4.6, 5.8, 2.5), {"left": (1.22, 0.68, 1.0), "right": (3.38, 0.72, 1.0)},
                    (2.3, 3.3, 1.1), [tuple(float(v) for v in m) for m in mics])
    write_layout(folder / "layout.toml", layout)
    moved = [[1.2, 1.3, 1.0], [3.4, 1.3, 1.0]]
    after = simulate(moved, [seat])
    return folder, irs, after


def test_predict_after_a_move_beats_nothing_changed(pra_room, tmp_path, capsys):
    # The prediction is checked against pyroomacoustics (Allen and Berkley image sources),
    # not against our own model: both loudspeakers 0.6 m further from the front wall.
    folder, before, after = pra_room
    out = tmp_path / "pred.wav"
    code = main(["predict", *sorted(str(p) for p in folder.glob("pos*.wav")), "--layout",
                 str(folder / "layout.toml"), "--move", "left=1.22,1.28,1.0",
                 "--move", "right=3.38,1.32,1.0", "--out", str(out), "--json"])
    assert code == 0
    pred, fs = sf.read(out)
    assert fs == 48000 and pred.shape[1] == 2
    grid = np.geomspace(30, 250, 80)

    def levels(x, rate):
        return measured_levels_db(x, rate, grid)

    def err(a, b):
        d = a - b
        d = d - d.mean(axis=-1, keepdims=True)
        return float(np.sqrt(np.mean(d**2)))

    truth = levels(after[0], 48000)
    ours = err(levels(pred.T, 48000), truth)
    unchanged = err(levels(before[0], 48000), truth)
    assert ours < 0.5 * unchanged  # the figure for a move
    assert '"leave_one_out_error_db"' in capsys.readouterr().out


def test_predict_refuses_too_few_positions(pra_room, tmp_path, capsys):
    folder, _, _ = pra_room
    lay = read_layout(folder / "layout.toml")
    short = Layout(lay.size_m, lay.loudspeakers, lay.seat, lay.measured[:2])
    write_layout(tmp_path / "l.toml", short)
    code = main(["predict", str(folder / "pos1.wav"), str(folder / "pos2.wav"), "--layout",
                 str(tmp_path / "l.toml"), "--out", str(tmp_path / "x.wav")])
    assert code == 2
    assert "at least 3 measured positions" in capsys.readouterr().err
    code = main(["predict", str(folder / "pos1.wav"), "--layout", str(folder / "layout.toml"),
                 "--out", str(tmp_path / "x.wav")])
    assert code == 2
    assert "one position per file" in capsys.readouterr().err


def test_design_stores_causes_in_the_manifest(pra_room, tmp_path, capsys):
    # The loudspeakers stand 0.68-0.72 m from the front wall: c / (4d) = 119-126 Hz (common
    # practice). Every withheld dip and peak gets a cause; a boundary one names its surface.
    import json

    folder, _, _ = pra_room
    out = tmp_path / "design"
    code = main(["design", *sorted(str(p) for p in folder.glob("pos*.wav")), "--layout",
                 str(folder / "layout.toml"), "--out", str(out)])
    assert code == 0
    manifest = json.loads((out / "manifest.json").read_text())
    entries = manifest["causes"]
    assert [e["channel"] for e in entries] == ["left", "right"]
    found = [c for e in entries for c in e["causes"]]
    assert found and all(c["cause"] in {"boundary", "mode", "positions", "unknown"}
                         for c in found)
    for c in found:
        if c["cause"] == "boundary":
            assert c["surface"] in causes.SURFACES
            assert c["distance_m"] <= causes.NEAR_SURFACE_M
    assert "Causes (peaks and dips" in capsys.readouterr().out
    # the report reads them from the manifest
    assert main(["report", str(out)]) == 0
    html = next(out.rglob("*.html")).read_text()
    assert "Why the peaks and dips are there" in html
    assert found[0]["text"].split(":")[0] in html


def test_advise_keeps_to_the_limits(pra_room, tmp_path, capsys):
    import json

    folder, _, _ = pra_room
    files = sorted(str(p) for p in folder.glob("pos*.wav"))
    code = main(["advise", *files, "--layout", str(folder / "layout.toml"), "--max-move", "0.4",
                 "--seat-range", "0.3", "--wall-min", "0.3", "--json",
                 "--plot", str(tmp_path / "plan.png")])
    assert code == 0
    res = json.loads(capsys.readouterr().out)
    assert (tmp_path / "plan.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    lay = read_layout(folder / "layout.toml")
    size = np.array(lay.size_m)
    assert res["cautions"] and res["plan"]["size_m"] == list(lay.size_m)
    assert len(res["plan"]["map"]["ripple_db"]) == len(res["plan"]["map"]["y_m"])
    for s in res["suggestions"]:
        old = np.array(list(lay.loudspeakers.values()))
        new = np.array(list(s["speakers_m"].values()))
        d = new - old
        assert np.all(np.linalg.norm(d, axis=1) <= 0.4 + 1e-6)
        assert np.allclose(d[0, 1], d[1, 1]) and np.isclose(d[0, 0], -d[1, 0])  # mirrored pair
        moved_any = np.abs(d).sum(axis=1) > 1e-9
        gap = np.minimum(new[:, :2], size[:2] - new[:, :2])
        assert np.all(gap[moved_any] >= 0.3 - 1e-6)
        seat = np.array(s["seat_m"])
        assert np.isclose(seat[0], lay.seat[0]) and abs(seat[1] - lay.seat[1]) <= 0.3 + 1e-6
        # never worse than the current placement on either figure (the search's own rule)
        assert s["boom_db"] <= 1.03 * res["current"]["boom_db"] + 1e-6
        assert s["ripple_db"] <= 1.03 * res["current"]["ripple_db"] + 1e-6


def test_advise_refuses_bad_limits(capsys):
    assert main(["advise", "--max-move", "7"]) == 2
    assert "--max-move 7" in capsys.readouterr().err


def test_predict_inside_a_room_folder(pra_room, tmp_path, capsys):
    # The room's latest measurement and layout.toml; the WAV lands in the room folder.
    from roomcorr import rooms

    folder, _, _ = pra_room
    room = rooms.init_room(tmp_path / "room")
    rooms.add_measurement(room, sorted(str(p) for p in folder.glob("pos*.wav")))
    lay = read_layout(folder / "layout.toml")
    args = ["layout", "set", "--room", str(room.root), "--size", ",".join(map(str, lay.size_m)),
            "--seat", ",".join(map(str, lay.seat))]
    for name, p in lay.loudspeakers.items():
        args += ["--speaker", f"{name}=" + ",".join(map(str, p))]
    for p in lay.measured:
        args += ["--measured", ",".join(map(str, p))]
    assert main(args) == 0
    assert (room.root / "layout.toml").is_file()
    assert main(["predict", "--room", str(room.root), "--seat", "2.3,3.0,1.1"]) == 0
    out = capsys.readouterr().out
    assert "valid up to 250 Hz" in out and "left out of the fit" in out
    data, fs = sf.read(room.root / "predicted.wav")
    assert fs == 48000 and data.shape[1] == 2 and np.all(np.isfinite(data))


def test_layout_show_without_a_layout_says_how(tmp_path, capsys, monkeypatch):
    from roomcorr import rooms

    room = rooms.init_room(tmp_path / "room")
    monkeypatch.chdir(room.root)
    assert main(["layout", "show"]) == 2
    assert "roomcorr layout set" in capsys.readouterr().err
    assert main(["layout", "set", "--seat", "1,1,1"]) == 2
    assert "needs --size" in capsys.readouterr().err


def test_calibration_recovers_known_walls_corner_and_position():
    # A synthetic case from independent code: pyroomacoustics' ShoeBox (Allen and Berkley
    # image method) with a known absorption per surface, a known 4th-order Butterworth
    # high-pass as the loudspeaker (scipy), and a loudspeaker taped 4 cm / 3 cm off.
    # The fit must find the walls, the corner and the position again. pyroomacoustics sums
    # the images to the order the model uses for these walls, so that the check is of the
    # fit, not of where either sum stops (that costs up to 0.03 in α: docs, room model).
    dims = [4.8, 5.9, 2.6]
    alpha = [0.12, 0.18, 0.25, 0.3, 0.2, 0.1]  # left, right, front, back, floor, ceiling
    spk = np.array([[1.3, 0.8, 1.0]])
    seat = np.array([2.4, 3.5, 1.1])
    mics = np.array([seat + o for o in ([0, 0, 0], [-0.3, 0.1, 0], [0.3, -0.1, 0.05],
                                        [0.1, 0.35, 0], [-0.1, -0.3, 0.05])])
    walls = ["west", "east", "south", "north", "floor", "ceiling"]
    order = image_order_for(np.sqrt(1 - np.array(alpha)), np.array(dims))
    room = pra.ShoeBox(dims, fs=8000, max_order=order, air_absorption=False,
                       materials={w: pra.Material(a) for w, a in zip(walls, alpha, strict=True)})
    room.add_source(spk[0])
    room.add_microphone_array(mics.T)
    hpf = pra.constants.get("rir_hpf_enable")
    pra.constants.set("rir_hpf_enable", False)  # its own 10 Hz high-pass is not causal
    try:
        room.compute_rir()
    finally:
        pra.constants.set("rir_hpf_enable", hpf)
    n = min(len(r[0]) for r in room.rir)
    irs = np.array([[r[0][:n]] for r in room.rir])
    irs = sosfilt(butter(4, 48.0, "high", fs=8000, output="sos"), irs, axis=-1)
    irs = resample_poly(irs, 6, 1, axis=-1)
    taped = spk + np.array([[0.04, -0.03, 0.0]])
    model = calibrate(irs, 48000, tuple(dims), taped, mics, ["left"], leave_one_out=False)
    fitted_alpha = 1 - model.beta**2
    assert abs(model.image_order - order) <= 2
    # each pair of opposite surfaces acts together on its axial modes: their mean is well
    # determined, the split between the two less so from five positions close together
    np.testing.assert_allclose(fitted_alpha.reshape(3, 2).mean(axis=1),
                               np.reshape(alpha, (3, 2)).mean(axis=1), atol=0.025)
    np.testing.assert_allclose(fitted_alpha, alpha, atol=0.05)
    assert model.corner_hz[0] == pytest.approx(48.0, rel=0.05)
    assert np.linalg.norm(model.speakers_m[0, :2] - spk[0, :2]) < 0.015
    assert model.fit_error_db < 1.0
