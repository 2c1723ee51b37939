"""What to move: the room layout, causes of peaks and dips, prediction and suggestions.

The command line (``roomcorr layout``, ``predict``, ``advise``) and the design
(causes in the manifest) call these; the physics is in :mod:`roomcorr.placement`
and :mod:`roomcorr.physics`.
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.audio_io import read_ir_set, write_wav
from roomcorr.checked import read_json
from roomcorr.deliver.atomic import (
    atomic_write_bytes,
    atomic_write_text,
    is_link_or_outside,
    sha256_of,
)
from roomcorr.errors import RoomcorrError, SettingsError
from roomcorr.evaluation.metrics import peak_db, ripple_db
from roomcorr.pipeline import analyse, design_curves, resolve_target
from roomcorr.placement import causes as causes_mod
from roomcorr.placement.layout import (
    Layout,
    Position,
    layout_from_dict,
    read_layout,
    room_layout_path,
    write_layout,
)
from roomcorr.placement.model import (
    FIT_BAND_HZ,
    VALID_TO_HZ,
    RoomModel,
    anchor_db,
    calibrate,
    fit_grid,
    predicted_ir,
)
from roomcorr.report.figures import plan_figure, png_bytes
from roomcorr.settings import Settings

#: Sample rate of the predicted impulse responses, Hz.
PREDICT_FS = 48000
#: Tape error used to report how sensitive a prediction is to the layout, m.
TAPE_ERROR_M = 0.03
#: Cautions printed with every prediction and suggestion.
PLACEMENT_CAUTIONS = (
    "Predictions are from a simplified model of the room: move things in small steps, keep "
    "cables and stands safe (nothing to trip over, nothing that can tip), and re-measure "
    "before trusting the result.",
)


# --------------------------------------------------------------------------- layout


def room_layout_file(room: rooms.Room) -> Path:
    """The room's ``layout.toml``; refused when it is a link or leads out of the room (the
    room's containment rule, as for its other files)."""
    path = room_layout_path(room.root)
    if path.is_symlink() or (path.exists() and is_link_or_outside(path, room.root)):
        raise SettingsError(
            f"{path}: a link or a file outside the room folder; not read (replace it with the "
            "layout itself, e.g. roomcorr layout set)"
        )
    return path


def find_layout(layout_file: str | None = None, room_dir: str | None = None) -> Layout | None:
    """The layout named, else the room's (``layout.toml``), else ``None``."""
    if layout_file:
        return read_layout(layout_file)
    room = rooms.open_room(room_dir) if room_dir else rooms.find_room()
    if room is None:
        return None
    path = room_layout_file(room)
    return read_layout(path) if path.is_file() else None


def need_layout(layout_file: str | None = None, room_dir: str | None = None) -> Layout:
    """As :func:`find_layout`, refusing when there is none."""
    layout = find_layout(layout_file, room_dir)
    if layout is None:
        raise SettingsError(
            "no room layout: give --layout FILE, or enter one in the room folder with "
            "'roomcorr layout set --size W,L,H --speaker NAME=x,y,z ... --seat x,y,z'"
        )
    return layout


def set_layout(
    size_m: Position | None = None,
    speakers: list[tuple[str, Position]] | None = None,
    seat: Position | None = None,
    measured: list[Position] | None = None,
    layout_file: str | None = None,
    room_dir: str | None = None,
    room: rooms.Room | None = None,
) -> tuple[Path, Layout]:
    """Create or update a layout file (the room's ``layout.toml`` unless a file is named).

    Values not given are kept from the existing file; a new file needs the size,
    at least one loudspeaker and the seat. Inside a room the file is read, checked
    and written under the room lock (the command line and the app's plan view alike).

    Returns
    -------
    (Path, Layout)
    """
    if layout_file:
        return _set_layout_at(Path(layout_file), size_m, speakers, seat, measured)
    if room is None:
        room = rooms.open_room(room_dir) if room_dir else rooms.find_room()
    if room is None:
        raise SettingsError(
            "layout: give --file FILE, or run it inside a room folder (see roomcorr init)"
        )
    with rooms.room_lock(room, "layout"):
        return _set_layout_at(room_layout_file(room), size_m, speakers, seat, measured)


def _set_layout_at(
    path: Path,
    size_m: Position | None,
    speakers: list[tuple[str, Position]] | None,
    seat: Position | None,
    measured: list[Position] | None,
) -> tuple[Path, Layout]:
    data: dict[str, Any] = read_layout(path).to_dict() if path.is_file() else {}
    if size_m is not None:
        data["room"] = {"size_m": list(size_m)}
    if speakers:
        data["loudspeakers"] = {name: list(p) for name, p in speakers}
    if seat is not None:
        data["seat"] = {"position": list(seat)}
    if measured is not None:
        data["measured"] = [{"position": list(p)} for p in measured]
    for key, opt in (("room", "--size"), ("loudspeakers", "--speaker"), ("seat", "--seat")):
        if key not in data:
            raise SettingsError(f"layout: a new layout needs {opt}")
    layout = layout_from_dict(data, str(path))
    write_layout(path, layout)
    return path, layout


# --------------------------------------------------------------------------- causes


def _speaker_for(layout: Layout, name: str, index: int) -> np.ndarray | None:
    if name in layout.loudspeakers:
        return np.asarray(layout.loudspeakers[name])
    names = layout.names
    return np.asarray(layout.loudspeakers[names[index]]) if index < len(names) else None


def causes_for_design(result: Any, layout: Layout | None = None) -> list[dict[str, Any]]:
    """A cause for every significant peak and withheld dip of every channel of a design.

    Parameters
    ----------
    result : DesignResult
    layout : Layout, optional

    Returns
    -------
    list of dict
        One per channel: ``channel`` (name) and ``causes`` (list from
        :func:`roomcorr.placement.causes.explain`), JSON-ready.
    """
    out = []
    freq = np.asarray(result.freq_hz)
    for ch in result.channels:
        feats = causes_mod.features(freq, ch.average_db, ch.boost_withheld_db, ch.band_hz)
        speaker = None if layout is None else _speaker_for(layout, ch.name, ch.index)
        refl = causes_mod.reflection_delays_s(result.irs[0, ch.index], result.fs_in)
        items = []
        for feat in feats:
            i = int(np.argmin(np.abs(freq - feat["freq_hz"])))
            col = np.asarray(ch.measured_db)[:, i]
            spread = float(col.max() - col.min()) if col.size > 1 else 0.0
            items.append(
                causes_mod.explain(
                    feat,
                    speaker_m=speaker,
                    seat_m=None if layout is None else np.asarray(layout.seat),
                    size_m=None if layout is None else np.asarray(layout.size_m),
                    reflections_s=refl,
                    spread_db=spread,
                )
            )
        out.append({"channel": ch.name, "causes": items})
    return out


def format_causes(entries: list[dict[str, Any]]) -> list[str]:
    """Plain lines for the summary (one per cause)."""
    lines = []
    for entry in entries:
        for item in entry.get("causes", []):
            lines.append(f"  {entry['channel']}: {item['text']}")
    return lines


# --------------------------------------------------------------------------- prediction


def _measurement_paths(ir_paths: list[str] | None, room_dir: str | None) -> list[str]:
    if ir_paths:
        return [str(p) for p in ir_paths]
    room = rooms.open_room(room_dir) if room_dir else rooms.find_room()
    if room is None:
        raise SettingsError("name the impulse-response files, or run it inside a room folder")
    meas = rooms.latest_measurement(room)
    files = rooms.measurement_files(meas)
    rooms.verified(room, meas, use=files)
    return [str(p) for p in files]


def calibrated_model(
    ir_paths: list[str] | None, layout: Layout, room_dir: str | None = None,
    leave_one_out: bool = True,
) -> tuple[RoomModel, np.ndarray, int]:
    """Read the measurement and fit the room model to it (``placement.model.calibrate``)."""
    paths = _measurement_paths(ir_paths, room_dir)
    irs, fs, _files = read_ir_set(paths, require_impulse=True)
    if not layout.measured:
        raise SettingsError(
            "layout: no [[measured]] positions; add one per measured file, in file order "
            "(roomcorr layout set --measured x,y,z ...)"
        )
    model = calibrate(
        irs, fs, layout.size_m, np.asarray(list(layout.loudspeakers.values())),
        np.asarray(layout.measured), layout.names, leave_one_out=leave_one_out,
    )
    return model, irs, fs


def moved_layout(layout: Layout, moves: dict[str, Position], seat: Position | None) -> Layout:
    """The layout with loudspeakers moved and the seat elsewhere, checked like a file."""
    data = layout.to_dict()
    for name, pos in moves.items():
        if name not in layout.loudspeakers:
            raise SettingsError(
                f"--move {name}: no loudspeaker of that name (layout has {', '.join(layout.names)})"
            )
        data["loudspeakers"][name] = list(pos)
    if seat is not None:
        data["seat"] = {"position": list(seat)}
    return layout_from_dict(data, "--move/--seat")


def sensitivity_db(model: RoomModel, speakers_m: np.ndarray, seat_m: np.ndarray) -> float:
    """How much the predicted level at the seat changes (RMS dB, 30-250 Hz) when every
    loudspeaker and the seat are off by :data:`TAPE_ERROR_M` along one horizontal axis
    (the largest of the four directions)."""
    g = fit_grid()
    band = (g >= 30.0) & (g <= VALID_TO_HZ)
    base = model.levels_db(speakers_m, seat_m[None, :], g)[:, 0]
    worst = 0.0
    for axis in (0, 1):
        for sign in (-1.0, 1.0):
            shift = np.zeros(3)
            shift[axis] = sign * TAPE_ERROR_M
            alt = model.levels_db(speakers_m + shift, (seat_m - shift)[None, :], g)[:, 0]
            d = (alt - base)[:, band]
            worst = max(worst, float(np.sqrt(np.mean(d**2))))
    return worst


def model_summary(model: RoomModel) -> dict[str, Any]:
    """The fit's figures as plain data."""
    return {
        "fit_error_db": round(model.fit_error_db, 2),
        "leave_one_out_error_db": None if model.loo_error_db is None
        else round(model.loo_error_db, 2),
        "per_position_error_db": [round(x, 2) for x in model.per_position_error_db],
        "fit_band_hz": list(FIT_BAND_HZ),
        "valid_to_hz": VALID_TO_HZ,
        "damping_per_axis_1_s": [round(float(x), 2) for x in model.damping_per_axis],
        "t60_s": round(model.t60_s(), 2),
        "corner_hz": [round(float(x), 1) for x in model.corner_hz],
        "position_offsets_m": [[round(float(v), 3) for v in p] for p in model.offsets_m],
        # energy absorption α = 1 − β² of each surface (left, right, front, back, floor,
        # ceiling) and the reflection order of the image sum
        "wall_absorption": [round(float(1.0 - b**2), 3) for b in model.beta],
        "image_order": int(model.image_order),
    }


def predict_command(
    ir_paths: list[str] | None,
    out: str | None,
    layout_file: str | None = None,
    moves: dict[str, Position] | None = None,
    seat: Position | None = None,
    room_dir: str | None = None,
) -> dict[str, Any]:
    """What ``roomcorr predict`` does: fit the model, predict, write a WAV.

    Returns
    -------
    dict
        ``out`` (path written), ``channels`` (names), the model's figures
        (:func:`model_summary`), ``sensitivity_db`` and ``layout`` (the one predicted for).
    """
    layout = need_layout(layout_file, room_dir)
    target = moved_layout(layout, moves or {}, seat)
    model, meas, fs = calibrated_model(ir_paths, layout, room_dir)
    offsets = model.offsets_m
    spk = np.asarray(list(target.loudspeakers.values())) + offsets
    seat_m = np.asarray(target.seat)
    # half of what the model misses at the nearest measured position stays in the prediction
    corr, anchor = anchor_db(model, meas, fs, np.asarray(layout.measured), seat_m)
    irs = predicted_ir(model, spk, seat_m, PREDICT_FS, correction_db=corr)
    if out is None:
        room = rooms.open_room(room_dir) if room_dir else rooms.find_room()
        if room is None:
            raise SettingsError("predict: give --out FILE.wav")
        out = str(room.root / "predicted.wav")
    path = write_wav(out, irs, PREDICT_FS)
    return {
        "out": str(path),
        "fs": PREDICT_FS,
        "channels": target.names,
        "model": model_summary(model),
        "sensitivity_db": round(sensitivity_db(model, spk, seat_m), 2),
        "anchor_position": anchor + 1,
        "tape_error_m": TAPE_ERROR_M,
        "layout": target.to_dict(),
    }


def format_prediction(res: dict[str, Any]) -> list[str]:
    """Plain lines for ``roomcorr predict``."""
    m = res["model"]
    loo = m["leave_one_out_error_db"]
    return [
        f"predicted impulse responses written to {res['out']} ({res['fs']} Hz, channels "
        f"{', '.join(res['channels'])}), valid up to {m['valid_to_hz']:.0f} Hz",
        f"  model fit: {m['fit_error_db']:.1f} dB RMS at the measured positions"
        + (f", {loo:.1f} dB at a position left out of the fit" if loo is not None else ""),
        f"  room: T60 about {m['t60_s']:.2f} s at low frequencies; loudspeaker corners "
        + ", ".join(f"{c:.0f} Hz" for c in m["corner_hz"]),
        "  walls absorb (left, right, front, back, floor, ceiling): "
        + ", ".join(f"{a:.2f}" for a in m["wall_absorption"]),
        f"  tape errors of {100 * res['tape_error_m']:.0f} cm change the prediction by up to "
        f"{res['sensitivity_db']:.1f} dB RMS",
        *PLACEMENT_CAUTIONS,
    ]


# --------------------------------------------------------------------------- suggestions

#: Head-width grid around the seat on which candidates are judged (x and y offsets), m.
LISTENING_GRID_M = (-0.2, 0.0, 0.2)
#: Steps of each search axis (odd, so the current place is one of them).
SEARCH_STEPS = 5
#: A suggestion may make neither figure worse than this factor of the current one.
WORSE_LIMIT = 1.03
#: Points of the bass map over the room (across, along).
MAP_POINTS = (13, 15)


def _grid_points(seat: np.ndarray) -> np.ndarray:
    pts = [seat + np.array([dx, dy, 0.0]) for dx in LISTENING_GRID_M for dy in LISTENING_GRID_M]
    return np.asarray(pts)


def _candidates(
    layout: Layout, max_move_m: float, seat_range_m: float, wall_min_m: float, symmetric: bool
) -> list[dict[str, Any]]:
    """Loudspeaker and seat positions within the limits (the current placement first)."""
    size = np.asarray(layout.size_m)
    spk = np.asarray(list(layout.loudspeakers.values()))
    steps = np.linspace(-max_move_m, max_move_m, SEARCH_STEPS)
    seat_steps = np.linspace(-seat_range_m, seat_range_m, SEARCH_STEPS) if seat_range_m > 0 \
        else np.zeros(1)
    centre_x = 0.5 * size[0]
    moves: list[np.ndarray] = []
    if symmetric:
        for dy in steps:
            for dx in steps[1::2] if SEARCH_STEPS > 2 else [0.0]:
                d = np.zeros_like(spk)
                d[:, 1] = dy
                # mirrored across the room's centre line: outwards for dx > 0
                d[:, 0] = np.where(spk[:, 0] < centre_x, -dx, dx)
                moves.append(d)
            d = np.zeros_like(spk)
            d[:, 1] = dy
            moves.append(d)
    else:
        for dys in itertools.product(steps, repeat=min(len(spk), 3)):
            d = np.zeros_like(spk)
            d[: len(dys), 1] = dys
            moves.append(d)
    out, seen = [], set()
    for d in moves:
        for ds in seat_steps:
            new_spk = spk + d
            seat = np.asarray(layout.seat) + np.array([0.0, ds, 0.0])
            key = (tuple(np.round(new_spk.ravel(), 3)), round(float(ds), 3))
            if key in seen:
                continue
            seen.add(key)
            if np.any(np.linalg.norm(d, axis=1) > max_move_m + 1e-9):
                continue
            near_wall = np.minimum(new_spk[:, :2], size[:2] - new_spk[:, :2])
            if np.any(near_wall < wall_min_m - 1e-9) and np.any(d != 0):
                continue
            grid = _grid_points(seat)
            if np.any(grid[:, :2] <= 0.05) or np.any(grid[:, :2] >= size[:2] - 0.05):
                continue
            gap = np.linalg.norm(new_spk[:, None, :2] - seat[None, None, :2], axis=-1)
            if np.any(gap < 0.6):
                continue
            out.append({"speakers_m": new_spk, "seat_m": seat, "moves_m": d,
                        "seat_move_m": float(ds)})
    out.sort(key=lambda c: float(np.abs(c["moves_m"]).sum() + abs(c["seat_move_m"])))
    return out


def _levels_on(freq: np.ndarray, model: RoomModel, spk: np.ndarray, mics: np.ndarray
               ) -> np.ndarray:
    """Model levels (n_spk, n_mics, n_freqs) on the design grid (held flat outside the fit band)."""
    g = fit_grid()
    lv = model.levels_db(spk, mics, g)
    return np.stack([[np.interp(np.log(freq), np.log(g), row) for row in s] for s in lv])


def _blend(freq: np.ndarray) -> np.ndarray:
    """Weight of the model's change: 1 up to the valid limit, fading out by the fit band's top."""
    lo, hi = VALID_TO_HZ, FIT_BAND_HZ[1]
    w = np.clip((hi - freq) / (hi - lo), 0.0, 1.0)
    return np.sin(0.5 * np.pi * w) ** 2


def advise_command(
    ir_paths: list[str] | None,
    layout_file: str | None = None,
    room_dir: str | None = None,
    max_move_m: float = 0.5,
    seat_range_m: float = 0.5,
    wall_min_m: float = 0.2,
    symmetric: bool = True,
    top: int = 3,
    settings: Any = None,
    model: RoomModel | None = None,
) -> dict[str, Any]:
    """What ``roomcorr advise`` does: search placements, design each, rank by the result.

    Each candidate's response at the measured positions (moved with the seat) is
    the measured one plus the model's predicted change; the correction is designed
    from it by :func:`roomcorr.pipeline.design_curves` (the design's own code) and
    judged on a head-width grid around the seat (:data:`LISTENING_GRID_M`) by the
    quality benchmark's boom (:func:`roomcorr.evaluation.metrics.peak_db`) and
    ripple (:func:`~roomcorr.evaluation.metrics.ripple_db`) after correction.

    Returns
    -------
    dict
        ``current`` and ``suggestions`` (best first, at most ``top``), each with
        ``speakers_m`` (name -> [x, y, z]), ``seat_m``, ``boom_db``, ``ripple_db``,
        ``score`` (mean of the two ratios to the current placement) and ``text``;
        ``model`` (the fit's figures), ``plan`` (for drawing) and ``cautions``.
    """
    checks = (("--max-move", max_move_m, 0.0, 3.0), ("--seat-range", seat_range_m, 0.0, 3.0),
              ("--wall-min", wall_min_m, 0.0, 2.0))
    for what, val, lo, hi in checks:
        if not lo <= val <= hi:
            raise SettingsError(f"{what} {val:g}: expected {lo:g} to {hi:g} m")
    if not 1 <= top <= 20:
        raise SettingsError(f"--top {top}: expected 1 to 20")
    layout = need_layout(layout_file, room_dir)
    # inside a room, on its own measurement and layout: the advice is kept for the plan
    # view and for compare (which suggestion a later move followed)
    keep_in = None if ir_paths or layout_file else (
        rooms.open_room(room_dir) if room_dir else rooms.find_room())
    layout_sha = sha256_of(room_layout_file(keep_in)) if keep_in is not None else None
    if model is None:
        model, irs, fs = calibrated_model(ir_paths, layout, room_dir)
    else:
        irs, fs, _ = read_ir_set(_measurement_paths(ir_paths, room_dir), require_impulse=True)
    if settings is None:
        room = rooms.open_room(room_dir) if room_dir else rooms.find_room()
        settings = rooms.load_room_settings(room) if room is not None else Settings()
    analysis = analyse(irs, fs, settings, layout.names[: irs.shape[1]])
    freq = analysis.freq_hz
    target_shape = resolve_target(freq, settings.design.target)
    blend = _blend(freq)
    spk0 = np.asarray(list(layout.loudspeakers.values())) + model.offsets_m
    mics0 = np.asarray(layout.measured)
    seat0 = np.asarray(layout.seat)
    grid0 = _grid_points(seat0)
    base_design = _levels_on(freq, model, spk0, mics0)  # (spk, pos, f)
    # each grid point is anchored on the nearest measured position
    nearest = np.argmin(np.linalg.norm(grid0[:, None] - mics0[None], axis=-1), axis=1)
    band = (freq >= 20.0) & (freq <= 320.0)
    corner = model.corner_hz

    def judge(spk: np.ndarray, seat: np.ndarray) -> dict[str, Any]:
        shift = seat - seat0
        lv = _levels_on(freq, model, spk, np.vstack([mics0 + shift, grid0 + shift]))
        n_pos = mics0.shape[0]
        delta = (lv - np.concatenate([base_design, base_design[:, nearest]], axis=1)) * blend
        meas = np.transpose(analysis.measured_db, (1, 0, 2))  # (spk, pos, f)
        design_lv = meas + delta[:, :n_pos]
        grid_lv = meas[:, nearest] + delta[:, n_pos:]
        cand = type(analysis)(freq, fs, np.transpose(design_lv, (1, 0, 2)),
                              analysis.arrival_s, analysis.weights, analysis.names)
        chans = design_curves(cand, settings, target_shape)
        booms, ripples = [], []
        for s, ch in enumerate(chans):
            after = grid_lv[s] + ch.correction_db[None, :]
            booms.append(peak_db(after[:, band], freq[band], float(corner[s])))
            ripples.append(ripple_db(after[:, band], freq[band], float(corner[s])))
        return {"boom_db": float(np.mean(booms)), "ripple_db": float(np.mean(ripples)),
                "seat_db": grid_lv[:, len(LISTENING_GRID_M) ** 2 // 2]}

    cands = _candidates(layout, max_move_m, seat_range_m, wall_min_m, symmetric)
    current = judge(spk0, seat0)
    scored = []
    for cand in cands:
        res = judge(cand["speakers_m"] + model.offsets_m, cand["seat_m"])
        score = 0.5 * (res["boom_db"] / max(current["boom_db"], 1e-6)
                       + res["ripple_db"] / max(current["ripple_db"], 1e-6))
        worse = (res["boom_db"] > WORSE_LIMIT * current["boom_db"]
                 or res["ripple_db"] > WORSE_LIMIT * current["ripple_db"])
        scored.append((score, worse, cand, res))
    ranked = sorted((x for x in scored if not x[1] and np.any(
        (np.abs(x[2]["moves_m"]) > 1e-9)) | (abs(x[2]["seat_move_m"]) > 1e-9)),
        key=lambda x: x[0])
    names = layout.names
    dip = _deepest_dip(freq, analysis, settings, target_shape)
    suggestions = []
    for score, _w, cand, res in ranked[:top]:
        suggestions.append({
            "speakers_m": {n: [round(float(v), 3) for v in p]
                           for n, p in zip(names, cand["speakers_m"], strict=True)},
            "seat_m": [round(float(v), 3) for v in cand["seat_m"]],
            "boom_db": round(res["boom_db"], 2),
            "ripple_db": round(res["ripple_db"], 2),
            "score": round(float(score), 3),
            "text": _advice_text(cand, res, current, layout, dip, freq),
        })
    plan = {
        "size_m": list(layout.size_m),
        "current": {"speakers_m": {n: list(p) for n, p in layout.loudspeakers.items()},
                    "seat_m": list(layout.seat)},
        "suggested": None if not suggestions else {
            "speakers_m": suggestions[0]["speakers_m"], "seat_m": suggestions[0]["seat_m"]},
        "map": bass_map(model, np.asarray(list(suggestions[0]["speakers_m"].values()))
                        + model.offsets_m if suggestions else spk0, layout),
    }
    out = {
        "model": model_summary(model),
        "current": {"boom_db": round(current["boom_db"], 2),
                    "ripple_db": round(current["ripple_db"], 2)},
        "candidates": len(cands),
        "suggestions": suggestions,
        "plan": plan,
        "cautions": list(PLACEMENT_CAUTIONS),
    }
    if keep_in is not None and layout_sha is not None:
        meas = rooms.latest_measurement(keep_in).name
        out["stored"] = str(store_advice(keep_in, out, layout_sha, meas))
    return out


def _deepest_dip(freq: np.ndarray, analysis: Any, settings: Any, target_shape: np.ndarray
                 ) -> float | None:
    chans = design_curves(analysis, settings, target_shape)
    best, f0 = 0.0, None
    for ch in chans:
        w = np.asarray(ch.boost_withheld_db)
        i = int(np.argmax(np.where(freq <= 300.0, w, 0.0)))
        if w[i] > max(best, causes_mod.DIP_MIN_DB):
            best, f0 = float(w[i]), float(freq[i])
    return f0


def _advice_text(cand: dict, res: dict, current: dict, layout: Layout, dip_hz: float | None,
                 freq: np.ndarray) -> str:
    parts = []
    d = cand["moves_m"]
    dy = d[:, 1]
    if np.any(np.abs(dy) > 1e-9):
        if np.allclose(dy, dy[0]):
            way = "further from" if dy[0] > 0 else "closer to"
            who = "both loudspeakers" if len(dy) == 2 else "the loudspeakers"
            parts.append(f"move {who} {abs(dy[0]) * 100:.0f} cm {way} the front wall")
        else:
            for name, v in zip(layout.names, dy, strict=True):
                if abs(v) > 1e-9:
                    way = "further from" if v > 0 else "closer to"
                    parts.append(f"move {name} {abs(v) * 100:.0f} cm {way} the front wall")
    dx = d[:, 0]
    if np.any(np.abs(dx) > 1e-9):
        spread = np.sign(dx[np.argmax(np.abs(dx))]) * np.sign(
            np.asarray(list(layout.loudspeakers.values()))[np.argmax(np.abs(dx)), 0]
            - 0.5 * layout.size_m[0])
        way = "further apart" if spread > 0 else "closer together"
        parts.append(f"set them {abs(dx).max() * 100:.0f} cm each {way}")
    if abs(cand["seat_move_m"]) > 1e-9:
        way = "back" if cand["seat_move_m"] > 0 else "forward"
        parts.append(f"move the seat {abs(cand['seat_move_m']) * 100:.0f} cm {way}")
    what = " and ".join(parts) if parts else "keep everything where it is"
    # the figures as stored (rounded to 0.01 dB first), so the sentence and the numbers
    # printed beside it never disagree in the last digit
    fig = {k: round(float(v[k2]), 2) for k, v, k2 in (
        ("ripple", res, "ripple_db"), ("boom", res, "boom_db"),
        ("ripple0", current, "ripple_db"), ("boom0", current, "boom_db"))}
    tail = (f": the bass over the listening area varies by {fig['ripple']:.1f} dB instead "
            f"of {fig['ripple0']:.1f} dB after correction, boom {fig['boom']:.1f} dB "
            f"instead of {fig['boom0']:.1f} dB")
    if dip_hz is not None:
        i = int(np.argmin(np.abs(freq - dip_hz)))
        gain = float(np.mean(res["seat_db"][:, i] - current["seat_db"][:, i]))
        if gain > 1.0:
            tail = f": the {dip_hz:.0f} Hz dip fills by about {gain:.0f} dB and" + tail[1:]
    return what[0].upper() + what[1:] + tail


def bass_map(model: RoomModel, speakers_m: np.ndarray, layout: Layout) -> dict[str, Any]:
    """Predicted bass unevenness over the room at seat height: RMS deviation (dB) of the
    level from its own mean, 30-250 Hz, on a coarse grid (``x_m``, ``y_m``, ``ripple_db``)."""
    size = np.asarray(layout.size_m)
    nx, ny = MAP_POINTS
    xs = np.linspace(0.1 * size[0], 0.9 * size[0], nx)
    ys = np.linspace(0.1 * size[1], 0.9 * size[1], ny)
    pts = np.array([[x, y, layout.seat[2]] for y in ys for x in xs])
    g = fit_grid()
    band = (g >= 30.0) & (g <= VALID_TO_HZ)
    lv = model.levels_db(speakers_m, pts, g)[:, :, band]
    p = 10 * np.log10(np.mean(10 ** (lv / 10), axis=0))  # all loudspeakers' power
    dev = np.sqrt(np.mean((p - p.mean(axis=-1, keepdims=True)) ** 2, axis=-1))
    return {"x_m": [round(float(x), 3) for x in xs], "y_m": [round(float(y), 3) for y in ys],
            "ripple_db": [[round(float(v), 2) for v in dev[j * nx:(j + 1) * nx]]
                          for j in range(ny)]}


def format_advice(res: dict[str, Any]) -> list[str]:
    """Plain lines for ``roomcorr advise``."""
    m = res["model"]
    cur = res["current"]
    lines = [
        f"model fit: {m['fit_error_db']:.1f} dB RMS at the measured positions"
        + (f", {m['leave_one_out_error_db']:.1f} dB at a position left out"
           if m["leave_one_out_error_db"] is not None else ""),
        f"now, after correction: boom {cur['boom_db']:.1f} dB, bass varies by "
        f"{cur['ripple_db']:.1f} dB over the listening area ({res['candidates']} placements tried)",
    ]
    if not res["suggestions"]:
        lines.append("no placement within the limits predicts smoother bass; keep it as it is")
    for i, s in enumerate(res["suggestions"], 1):
        lines.append(f"{i}. {s['text']}")
        lines.append("   " + "; ".join(f"{n} at {', '.join(f'{v:.2f}' for v in p)}"
                                      for n, p in s["speakers_m"].items())
                     + f"; seat at {', '.join(f'{v:.2f}' for v in s['seat_m'])} (m)")
    if res.get("stored"):
        lines.append(f"suggestions kept in {res['stored']} (the app's Plan page draws them; "
                     "after a move, compare names the one you followed)")
    lines += res["cautions"]
    return lines


def write_plan(res: dict[str, Any], path: str | Path) -> Path:
    """Draw the plan of an :func:`advise_command` result as a PNG (atomically)."""
    if not str(path).lower().endswith(".png"):
        raise SettingsError(f"--plot {path}: the plan is a PNG; name a file ending in .png")
    return atomic_write_bytes(path, png_bytes(plan_figure(res["plan"])))


# --------------------------------------------------------------------------- stored advice

#: Where ``roomcorr advise`` keeps its last suggestions in a room folder (the app's plan
#: view draws them; ``compare`` names the suggestion a move followed).
ADVICE_FILE = "advice.json"
#: Largest advice file read, bytes (a few suggestions and a 13 x 15 map: a few kB).
MAX_ADVICE_BYTES = 256 * 1024


def store_advice(room: rooms.Room, res: dict[str, Any], layout_sha256: str,
                 measurement: str) -> Path:
    """Keep an :func:`advise_command` result in the room folder (atomically, under the lock),
    with the SHA-256 of the layout file and the measurement run it was made from."""
    data = {
        "made_utc": rooms.folder.iso_utc(rooms.folder.utc_now()),
        "measurement": measurement,
        "layout_sha256": layout_sha256,
        "current": res["current"],
        "suggestions": res["suggestions"],
        "plan": res["plan"],
        "model": res["model"],
    }
    path = room.root / ADVICE_FILE
    with rooms.room_lock(room, "advice"):
        if is_link_or_outside(path, room.root) and (path.exists() or path.is_symlink()):
            raise SettingsError(f"{path}: a link or outside the room folder; not written")
        return atomic_write_text(path, json.dumps(data, indent=1, allow_nan=False) + "\n")


def _triple_ok(v: Any) -> bool:
    return (isinstance(v, list) and len(v) == 3
            and all(isinstance(x, int | float) and not isinstance(x, bool)
                    and math.isfinite(x) for x in v))


def _advice_problem(data: Any) -> str | None:
    """Why a parsed ``advice.json`` is unusable (None when it is sound)."""
    if not isinstance(data, dict):
        return "expected a JSON object"
    if not isinstance(data.get("layout_sha256"), str) or not isinstance(data.get("made_utc"), str):
        return "'layout_sha256' or 'made_utc' missing"
    sugg = data.get("suggestions")
    if not isinstance(sugg, list) or len(sugg) > 20:
        return "'suggestions' is not a list of up to 20"
    for s in sugg:
        if not isinstance(s, dict) or not isinstance(s.get("text"), str):
            return "a suggestion without its text"
        spk = s.get("speakers_m")
        if not isinstance(spk, dict) or not spk or not all(_triple_ok(v) for v in spk.values()):
            return "a suggestion's 'speakers_m' is not a table of [x, y, z]"
        if not _triple_ok(s.get("seat_m")):
            return "a suggestion's 'seat_m' is not [x, y, z]"
    plan = data.get("plan")
    if not isinstance(plan, dict):
        return "'plan' is not a table"
    m = plan.get("map")
    if m is not None:
        ok = (isinstance(m, dict) and all(isinstance(m.get(k), list) for k in ("x_m", "y_m"))
              and isinstance(m.get("ripple_db"), list)
              and len(m["ripple_db"]) == len(m["y_m"]) <= 200 and len(m["x_m"]) <= 200)
        if not ok:
            return "'plan.map' is not a grid"
        cells = [m["x_m"], m["y_m"], *m["ripple_db"]]
        if not all(isinstance(row, list) and all(
                isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v)
                for v in row) for row in cells):
            return "'plan.map' holds something other than finite numbers"
        if any(len(row) != len(m["x_m"]) for row in m["ripple_db"]):
            return "'plan.map' rows differ in length"
    return None


def load_advice(room: rooms.Room) -> tuple[dict[str, Any] | None, str | None]:
    """(advice, problem): the room's stored advice, (None, None) when there is none, and
    (None, why) when it is damaged, a link or leads out of the room (never read then)."""
    path = room.root / ADVICE_FILE
    if not path.exists() and not path.is_symlink():
        return None, None
    if is_link_or_outside(path, room.root):
        return None, f"{path}: a link or outside the room folder; not read"
    try:
        data = read_json(path, ADVICE_FILE, SettingsError, MAX_ADVICE_BYTES)
    except RoomcorrError as exc:
        return None, " ".join(str(exc).split())
    problem = _advice_problem(data)
    if problem:
        return None, f"{path}: damaged ({problem}); run roomcorr advise again"
    return data, None


def read_advice(room: rooms.Room) -> dict[str, Any] | None:
    """The room's stored advice, or None (none, or damaged: :func:`load_advice` says why)."""
    return load_advice(room)[0]
