"""Correction quality on the simulated evaluation rooms, at measured and held-out seats.

For every room of ``roomcorr/evaluation/scenarios.json`` the measured seats
are designed through the same code path as ``roomcorr design`` (WAV files,
default settings, flat target), and the 48 kHz filters are applied to every
seat. Printed as ratios corrected / uncorrected (ripple, peak), as dB
changes (broadband) and as dB (bass drive, pre-ringing, peak gain), for
roomcorr and for a naive regularised inversion of the centre seat
(pyfar.dsp.regularized_spectrum_inversion, then pyfar.dsp.minimum_phase).
Definitions in ``roomcorr/evaluation/metrics.py``.

With ``--perturbed`` the rooms are the seeded perturbed copies of
:func:`roomcorr.evaluation.simulate.perturbed_scenarios` (two per room: other
dimensions, absorption, loudspeaker corners and listening position), which
the design was never tuned on.

Run: ``python benchmarks/bench_quality.py [ROOM ...] [--no-naive] [--perturbed]``.
"""

from __future__ import annotations

import sys

import numpy as np

from roomcorr.evaluation.score import RoomScore, naive_inversion_firs, score_filters, score_roomcorr
from roomcorr.evaluation.simulate import (
    evaluation_room,
    perturbed_scenarios,
    scenario_names,
    simulate_room,
)


def _db0(x: float) -> str:
    return "none" if x == float("-inf") else f"{x:.0f}"


def _row(s: RoomScore) -> list[str]:
    return [
        s.room,
        f"{s.ratio('ripple_db', 'measured'):.2f}",
        f"{s.ratio('ripple_db', 'held_out'):.2f}",
        f"{s.worst_seat_ratio('ripple_db', 'held_out'):.2f}",
        f"{s.ratio('peak_db', 'measured'):.2f}",
        f"{s.ratio('peak_db', 'held_out'):.2f}",
        f"{s.delta('broadband_db', 'measured'):+.2f}",
        f"{s.delta('broadband_db', 'held_out'):+.2f}",
        f"{np.max(s.bass_drive_db):+.1f}",
        _db0(np.max(s.pre_ringing_db)),
        f"{np.max(s.peak_gain_db):+.2f}",
    ]


HEADER = [
    "room", "rip.meas", "rip.held", "rip.worst", "peak.meas", "peak.held",
    "bb.meas", "bb.held", "drive", "pre-ring", "peak-gain",
]  # fmt: skip


def _means(scores: list[RoomScore]) -> list[str]:
    def m(fig: str, seats: str) -> float:
        return float(np.mean([s.ratio(fig, seats) for s in scores]))

    return [
        "MEAN/worst",
        f"{m('ripple_db', 'measured'):.2f}",
        f"{m('ripple_db', 'held_out'):.2f}",
        f"{max(s.worst_seat_ratio('ripple_db', 'held_out') for s in scores):.2f}",
        f"{m('peak_db', 'measured'):.2f}",
        f"{m('peak_db', 'held_out'):.2f}",
        f"{max(s.delta('broadband_db', 'measured') for s in scores):+.2f}",
        f"{max(s.delta('broadband_db', 'held_out') for s in scores):+.2f}",
        f"{max(np.max(s.bass_drive_db) for s in scores):+.1f}",
        _db0(max(np.max(s.pre_ringing_db) for s in scores)),
        f"{max(np.max(s.peak_gain_db) for s in scores):+.2f}",
    ]


def _table(title: str, scores: list[RoomScore]) -> None:
    rows = [_row(s) for s in scores] + [_means(scores)]
    widths = [max(len(r[i]) for r in [HEADER, *rows]) for i in range(len(HEADER))]
    print(title)
    print("| " + " | ".join(h.ljust(w) for h, w in zip(HEADER, widths, strict=True)) + " |")
    print("|" + "|".join("-" * (w + 2) for w in widths) + "|")
    for r in rows:
        print("| " + " | ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) + " |")
    print()


def main(argv: list[str]) -> None:
    names = [a for a in argv if not a.startswith("--")]
    if "--perturbed" in argv:
        rooms = [s for s in perturbed_scenarios() if not names or s["name"] in names]
        make = simulate_room
    else:
        rooms, make = names or scenario_names(), evaluation_room
    ours, naive = [], []
    for which in rooms:
        room = make(which)
        name = room.name
        s = score_roomcorr(room)
        ours.append(s)
        bands = ", ".join(f"{lo:.0f}-{hi:.0f} Hz" for lo, hi in s.info["band_hz"])
        lows = ", ".join(f"{hz:.0f} Hz ({how})" for hz, how in s.info.get("speaker_low", []))
        pred = ", ".join(
            f"predicted {a:.1f} -> {b:.1f} dB, held-out seats {c:.1f} -> {d:.1f} dB"
            for (a, b), (c, d) in zip(
                s.info.get("prediction", []), s.info.get("held_out_variation", []), strict=True
            )
        )
        print(f"{name}: band {bands}; bass limit {lows}; bass variation {pred}", file=sys.stderr)
        if "--no-naive" not in argv:
            naive.append(score_filters(room, naive_inversion_firs(room)))
    print(
        "Ratios corrected/uncorrected (rip = ripple, peak), broadband change in dB "
        "(largest over channels), bass drive dB, pre-ringing dB re peak, peak gain dB. "
        "Last row: mean over rooms of the ratios; largest over rooms for rip.worst, bb, "
        "drive, pre-ring and peak gain."
    )
    print(
        "Goals: rip.meas <= 0.60, rip.held <= 0.78 (none > 0.85, worst seat <= 1.05), "
        "peak.held <= 0.85 (none > 1.0), bb <= +0.10, drive <= +1.0, pre-ring <= -60, "
        "peak gain <= 0.\n"
    )
    _table("roomcorr design (default settings, flat target)", ours)
    if naive:
        _table("naive regularised inversion of the centre seat (pyfar)", naive)


if __name__ == "__main__":
    main(sys.argv[1:])
