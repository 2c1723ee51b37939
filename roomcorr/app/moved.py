"""After a move: which layout each run was measured with, and whether the change the
room model predicted is the change that was measured.

A measurement run keeps a copy of the room's ``layout.toml`` as it was when the run
started (:func:`roomcorr.rooms.new_run`; the copy is listed with its SHA-256 like
every file of the run). ``roomcorr compare`` reads both runs' copies: when the
loudspeakers or the seat moved between them, the model is calibrated on the earlier
run and its layout, and the change it predicts at the later seat is set beside the
measured one (:func:`roomcorr.placement.change.predicted_change`). When ``advise``
made suggestions from the earlier layout (its ``advice.json`` in the room folder),
the result says which suggestion the move was.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from roomcorr import rooms
from roomcorr.app.placement import PLACEMENT_CAUTIONS, model_summary, read_advice
from roomcorr.deliver.atomic import is_link_or_outside, sha256_of
from roomcorr.errors import RoomcorrError, SettingsError
from roomcorr.placement.change import layout_moves, matching_suggestion, predicted_change
from roomcorr.placement.layout import Layout, read_layout
from roomcorr.placement.model import calibrate


def run_layout(
    room: rooms.Room | None, folder: Path, override: str | None = None, label: str = ""
) -> tuple[Layout | None, str | None, str]:
    """The layout a measurement was made with.

    Parameters
    ----------
    room : Room, optional
    folder : Path
        The measurement's folder (or one of its files: its folder is used).
    override : str, optional
        A layout file given on the command line instead (``--layout-before/-after``).
    label : str
        The run as the user knows it, for the messages.

    Returns
    -------
    (Layout or None, SHA-256 of its file or None, where it came from or why there is none)
    """
    if override:
        return read_layout(override), sha256_of(Path(override)), f"{override}"
    d = folder if folder.is_dir() else folder.parent
    path = d / rooms.LAYOUT_FILE
    if not path.exists() and not path.is_symlink():
        return None, None, (
            f"{label or d}: no layout recorded with this measurement (layout.toml was not in "
            "the room folder when it was measured); give the layout it was measured with"
        )
    if is_link_or_outside(path, d):
        raise SettingsError(f"{path}: a link or outside the measurement's folder; not read")
    if room is not None:
        rooms.verified(room, d, [path])  # changed since the run finished: damaged run
    return read_layout(path), sha256_of(path), f"{label or d}/{rooms.LAYOUT_FILE}"


def _suggestion(room: rooms.Room | None, sha_before: str | None, after: Layout
                ) -> dict[str, Any] | None:
    """Which of advise's suggestions the later layout follows, if advise ran on the
    earlier layout (None: no advice was made from it)."""
    advice = read_advice(room) if room is not None else None
    if advice is None or sha_before is None or advice.get("layout_sha256") != sha_before:
        return None
    found = matching_suggestion(advice["suggestions"], after)
    n = len(advice["suggestions"])
    if found is None:
        return {"index": None, "of": n, "made_utc": advice.get("made_utc"),
                "text": f"the move was none of the {n} suggestions advise made from the "
                        "earlier layout"}
    return {"index": found + 1, "of": n, "made_utc": advice.get("made_utc"),
            "text": f"this was advise's suggestion {found + 1} of {n} "
                    f"({advice.get('made_utc')}): {advice['suggestions'][found]['text']}"}


def change_after_move(
    room: rooms.Room | None,
    before: Path,
    irs_before: np.ndarray,
    fs_before: int,
    after: Path,
    irs_after: np.ndarray,
    fs_after: int,
    labels: tuple[str, str] = ("", ""),
    layout_before: str | None = None,
    layout_after: str | None = None,
) -> dict[str, Any]:
    """The predicted change at the seat beside the measured one, or why there is none.

    Returns
    -------
    dict
        ``available`` (bool); without it ``reason`` (plain words). With it the result
        of :func:`roomcorr.placement.change.predicted_change`, ``moves``
        (:func:`~roomcorr.placement.change.layout_moves`), ``layouts`` (where each came
        from), ``model`` (:func:`roomcorr.app.placement.model_summary`), ``suggestion``
        (which of advise's suggestions it was, or None) and ``cautions``.
    """
    try:
        la, sha_a, src_a = run_layout(room, before, layout_before, labels[0])
        lb, _sha_b, src_b = run_layout(room, after, layout_after, labels[1])
    except RoomcorrError as exc:
        return {"available": False, "reason": " ".join(str(exc).split())}
    if la is None or lb is None:
        return {"available": False, "reason": src_a if la is None else src_b}
    moves = layout_moves(la, lb)
    if not moves["changed"]:
        return {"available": False, "moves": moves,
                "reason": "the layout is the same in both runs: nothing was moved, so there "
                          "is no predicted change to set beside the measured one"}
    if moves["names_differ"] or moves["size_changed"]:
        return {"available": False, "moves": moves,
                "reason": "the layouts differ in their loudspeakers or the room's size, not "
                          "only in where things stand: no prediction to compare"}
    names = la.names
    if irs_before.shape[1] != len(names):
        return {"available": False, "moves": moves,
                "reason": f"{src_a}: {len(names)} loudspeakers for {irs_before.shape[1]} "
                          "channels in the earlier measurement"}
    try:
        model = calibrate(irs_before, fs_before, la.size_m,
                          np.asarray(list(la.loudspeakers.values())),
                          np.asarray(la.measured).reshape(-1, 3), names, leave_one_out=False)
        res = predicted_change(model, irs_before, fs_before, la, irs_after, fs_after, lb)
    except RoomcorrError as exc:
        return {"available": False, "moves": moves,
                "reason": f"{src_a}: " + " ".join(str(exc).split())}
    return {
        "available": True,
        **res,
        "moves": moves,
        "layouts": {"before": src_a, "after": src_b},
        "model": model_summary(model),
        "suggestion": _suggestion(room, sha_a, lb),
        "cautions": list(PLACEMENT_CAUTIONS),
    }
