"""The application layer's Explore data: the report's numbers, and ISO 3382-1 on analytic decays.

``decay_view`` serves what the report's decay and ringing sections compute
(the same functions); here it is checked against those sections' own values
and, independently, against impulse responses whose decay time is known
exactly (a pure exponential envelope).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from roomcorr import cli, rooms
from roomcorr.analysis.decay import low_frequency_decay_map, octave_band_centres, ringing_modes
from roomcorr.app import decay_view
from roomcorr.deliver.export import load_design_curves
from roomcorr.errors import InputFileError
from roomcorr.report.context import channel_of, report_context
from roomcorr.report.reverberation import _decay_table, _position_decay

REPO = Path(__file__).resolve().parents[1]
FS = 48000


@pytest.fixture(scope="module")
def demo_room(tmp_path_factory) -> rooms.Room:
    """The demo measurement and one CLI design at the measurement's rate."""
    room = rooms.init_room(tmp_path_factory.mktemp("explore") / "den")
    rooms.add_measurement(room, sorted((REPO / "measurements_demo").glob("*.wav")))
    assert cli.main(["design", "--room", str(room.root), "--rates", "48000"]) == 0
    return room


def _design_id(room: rooms.Room) -> str:
    return rooms.list_runs(room, "design", include_incomplete=False)[-1].run_id


def _report_channels(room: rooms.Room, run_id: str):
    """The report's per-channel data for a design run (the same objects its sections use)."""
    curves = load_design_curves(room.designs_dir / run_id)
    ctx = report_context(curves)
    return [channel_of(curves, ch, ctx) for ch in curves["channels"]], ctx


def test_decay_view_serves_the_reports_decay_and_ringing_numbers(demo_room):
    # Same engine: the report's decay section (_position_decay: the mean over positions)
    # and its ringing section (maps of the first position, measured and corrected).
    run_id = _design_id(demo_room)
    view = decay_view(demo_room, "design", run_id)
    chans, ctx = _report_channels(demo_room, run_id)
    assert [c["name"] for c in view["channels"]] == [x.name for x in chans]
    for ch, x in zip(view["channels"], chans, strict=True):
        bands = _position_decay(x, ctx)
        assert ch["bands"]["label"] == [b.label for b in bands]
        for key in ("edt", "t20", "t30"):
            expect = [getattr(b, f"{key}_s") for b in bands]
            np.testing.assert_allclose(ch["combined"][f"{key}_s"], expect, atol=5e-5)
            assert ch["combined"]["valid"][key] == [b.valid[key] for b in bands]
        # the report's table text (two decimals, * for a range too close to the noise)
        table = _decay_table(bands)[1:]
        for k, row in enumerate(table):
            cells = [
                ("n/a" if v is None else f"{v:.2f}" + ("" if ok else " *"))
                for v, ok in (
                    (ch["combined"][f"{key}_s"][k], ch["combined"]["valid"][key][k])
                    for key in ("edt", "t20", "t30")
                )
            ]
            assert cells == row[1:4]
        measured = low_frequency_decay_map(x.pos_irs[0], ctx.fs)
        ring = ch["ringing"]["measured"]
        np.testing.assert_allclose(ring["level_db"], measured.level_db, atol=0.051)
        np.testing.assert_allclose(ring["freq_hz"], measured.freq_hz, atol=1e-3)
        modes = ringing_modes(measured)
        assert [m["freq_hz"] for m in ring["modes"]] == pytest.approx(
            [f for f, _ in modes], abs=0.01
        )
        assert [m["decay_s"] for m in ring["modes"]] == pytest.approx(
            [d for _, d in modes], abs=1e-3
        )
        corrected = low_frequency_decay_map(x.corrected[0], ctx.fs)
        np.testing.assert_allclose(
            ch["ringing"]["corrected"]["level_db"], corrected.level_db, atol=0.051
        )


def test_measurement_decay_view_is_the_designs_for_the_same_responses(demo_room):
    # The design stores the measurement's responses: both views give the same decay times.
    meas = rooms.latest_measurement(demo_room).name
    a = decay_view(demo_room, "measurement", meas, fraction=3, position=1)
    b = decay_view(demo_room, "design", _design_id(demo_room), fraction=3, position=1)
    assert a["positions"] == b["positions"] == ["pos1", "pos2", "pos3", "pos4"]
    for ca, cb in zip(a["channels"], b["channels"], strict=True):
        assert len(ca["bands"]["label"]) == 22  # third-octave bands 63 Hz to 8 kHz
        np.testing.assert_allclose(ca["combined"]["t30_s"], cb["combined"]["t30_s"], atol=2e-3)
        assert len(ca["per_position"]) == 4 and len(ca["curves"]) == 22
        assert "corrected" not in ca["ringing"] and "corrected" in cb["ringing"]


def _exponential_room(tmp_path: Path, t60_s: float, noise_db: float) -> rooms.Room:
    """A room whose two positions decay as pure exponentials with T = ``t60_s`` in every band.

    One cosine at each octave mid-band frequency (random phases, seeded), all under
    the envelope 10 ** (-3 t / T) (60 dB in T seconds), plus white noise ``noise_db``
    below the peak.
    """
    rng = np.random.default_rng(11)
    t = np.arange(int(1.6 * FS)) / FS
    files = []
    for p in range(2):
        x = sum(
            np.cos(2 * np.pi * fc * t + rng.uniform(0, 2 * np.pi)) for fc in octave_band_centres()
        )
        x = x * 10.0 ** (-3.0 * t / t60_s)
        x = 0.9 * x / np.max(np.abs(x)) + 10.0 ** (noise_db / 20) * rng.standard_normal(t.size)
        path = tmp_path / f"seat{p}.wav"
        sf.write(path, x.astype(np.float32), FS, subtype="FLOAT")
        files.append(path)
    room = rooms.init_room(tmp_path / "room")
    rooms.add_measurement(room, files)
    return room


@pytest.mark.parametrize(("fraction", "t60"), [(1, 0.5), (3, 0.5), (1, 0.3), (3, 0.3)])
def test_a_pure_exponential_decay_gives_edt_t20_t30_equal_to_t(tmp_path, fraction, t60):
    # Analytic case (ISO 3382-1 with Schroeder 1965): the backward integral of
    # exp(-2 d t) is exp(-2 d t) / (2 d), the same exponential, so EDT = T20 = T30 = T.
    # What remains is the band filter's own start-up and ringing: T20 and T30 within 1 %
    # (measured: under 0.6 %), EDT within 5 %, the just-noticeable difference of
    # reverberation times in ISO 3382-1 Annex A (from memory), in every band not flagged
    # as filter-limited (bandwidth x T < 16, Jacobsen 1987, from memory).
    room = _exponential_room(tmp_path, t60, noise_db=-120.0)
    view = decay_view(room, "measurement", rooms.latest_measurement(room).name, fraction)
    ch = view["channels"][0]
    centres = np.array(ch["bands"]["centre_hz"])
    to_octave = np.abs(np.log2(centres[:, None] / octave_band_centres()[None, :]))
    on_mode = np.min(to_octave, axis=1) < 0.01
    assert on_mode.sum() == 8  # the eight octave centres (63 Hz to 8 kHz) are bands either way
    half = (10.0**0.3) ** (0.5 / fraction)  # IEC 61260-1 band edges at G ** (+-1 / (2 b))
    width = centres * (half - 1.0 / half)
    for rows in [ch["combined"], *ch["per_position"]]:
        for key, rtol in (("t20", 0.01), ("t30", 0.01), ("edt", 0.05)):
            vals = np.array(rows[f"{key}_s"], dtype=float)
            limited = np.array(rows["filter_limited"][key])
            np.testing.assert_array_equal(limited, width * vals < 16.0)
            ok = on_mode & ~limited
            assert ok.sum() >= 5
            np.testing.assert_allclose(vals[ok], t60, rtol=rtol, err_msg=key)
        assert all(all(np.array(v)[on_mode]) for v in rows["valid"].values())
    if (fraction, t60) == (3, 0.3):  # 63 Hz third-octave: B T about 4, flagged, and off by > 10 %
        t20 = ch["combined"]["t20_s"][0]
        assert ch["combined"]["filter_limited"]["t20"][0] and abs(t20 / t60 - 1) > 0.1
    curve = ch["curves"][int(np.flatnonzero(on_mode)[4])]  # 1 kHz
    slope = np.polyfit(curve["time_s"], curve["edc_db"], 1)[0]
    assert -60.0 / slope == pytest.approx(t60, rel=0.01)


def test_ranges_too_close_to_the_noise_are_marked(tmp_path):
    # ISO 3382-1 (from memory): the noise floor must lie 10 dB below the end of the
    # evaluation range. White noise 50 dB below the peak leaves the high octaves
    # (more noise power per band) with less than 45 dB: T30 marked there, T20 not.
    room = _exponential_room(tmp_path, 0.5, noise_db=-50.0)
    view = decay_view(room, "measurement", rooms.latest_measurement(room).name)
    assert view["ranges_db"]["t30"] == [-5.0, -35.0] and view["noise_margin_db"] == 10.0
    for rows in view["channels"][0]["per_position"]:
        dyn = np.array(rows["dynamic_range_db"])
        assert rows["valid"]["t30"] == [bool(d >= 45.0) for d in dyn]
        assert all(rows["valid"]["t20"])
    combined = view["channels"][0]["combined"]["valid"]["t30"]
    assert combined[0] and not combined[-1]  # 63 Hz valid, 8 kHz marked
    # marked, not hidden: the values are still there, and near T
    np.testing.assert_allclose(view["channels"][0]["combined"]["t30_s"], 0.5, rtol=0.03)


def test_one_channel_is_the_same_as_in_the_whole_view(demo_room):
    run_id = _design_id(demo_room)
    whole = decay_view(demo_room, "design", run_id)
    one = decay_view(demo_room, "design", run_id, channel=1)
    assert one["channels"][0] == {"name": whole["channels"][0]["name"]}
    assert one["channels"][1] == whole["channels"][1]


def test_decay_view_refusals(demo_room):
    meas = rooms.latest_measurement(demo_room).name
    for kind, run_id, kw in (
        ("measurement", meas, {"fraction": 2}),
        ("measurement", meas, {"position": 4}),
        ("measurement", meas, {"channel": 2}),
        ("measurement", "..", {}),
        ("measurement", "no-such-run", {}),
        ("design", meas, {}),
        ("report", meas, {}),
    ):
        with pytest.raises(InputFileError):
            decay_view(demo_room, kind, run_id, **kw)
