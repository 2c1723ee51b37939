"""Design time for several loudspeakers: 3 channels x 5 positions x 3 rates, with the
subwoofer crossover search.

Ratios are against the same design in the same run without the system part
(no subwoofer, no alignment): what the alignment, the crossover search and the
crossover filtering cost on top of correcting the channels one by one. The
room is the invented rear-corner room of the tests (tests/speaker_rooms.py).
Run: ``python benchmarks/bench_multichannel.py``.
"""

from __future__ import annotations

import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _util import best_of  # noqa: E402
from speaker_rooms import Room, seats, simulate  # noqa: E402

from roomcorr.design.align import plan_system  # noqa: E402
from roomcorr.pipeline import run_design  # noqa: E402
from roomcorr.settings import Settings, design_from_dict  # noqa: E402

FS = 48000


def main() -> None:
    room = Room(
        dims_m=(5.2, 4.1, 2.6),
        speakers_m=[(0.5, 1.2, 1.0), (0.5, 2.9, 1.0), (4.9, 0.3, 0.3)],
        kinds=["main", "main", "sub"],
        gains_db=[0.0, -1.0, 3.0],
        mics_m=seats((3.1, 2.05, 1.1), 5),
        latency_s=[0.0, 0.0, 0.008],
    )
    irs = simulate(room, fs=FS, length_s=0.6)
    names = ["left", "right", "sub"]
    rates = [44100, 48000, 96000]
    with_sub = Settings(
        design=design_from_dict({"channel_names": names, "subwoofer": "sub", "sample_rates": rates})
    )
    plain = Settings(
        design=design_from_dict({"channel_names": names, "sample_rates": rates, "align": False})
    )
    t_sub = best_of(lambda: run_design(irs, FS, with_sub), repeat=3)
    t_plain = best_of(lambda: run_design(irs, FS, plain), repeat=3)
    r = run_design(irs, FS, with_sub)
    integ = r.system.integration

    # the plan alone (delays, trims, responses on the search grid, search)
    from roomcorr.pipeline import resolve_target

    shape = resolve_target(r.freq_hz, "flat")
    raw = {fs: h for fs, h in r.firs.items()}
    t_plan = best_of(
        lambda: plan_system(irs, FS, r.freq_hz, r.channels, shape, raw, with_sub.design),
        repeat=3,
    )
    print("benchmark (3 channels x 5 positions x 3 rates)      ours      reference   ratio")
    print(
        f"design with subwoofer search                    {t_sub:7.2f} s   {t_plain:7.2f} s"
        f"   {t_sub / t_plain:5.2f}x  (reference: same design, channels one by one)"
    )
    print(
        f"plan alone (alignment + search)                 {t_plan:7.2f} s   {t_plain:7.2f} s"
        f"   {t_plan / t_plain:5.2f}x"
    )
    print(
        f"search size: {integ.n_frequencies} crossover frequencies x {integ.n_delays} delays "
        f"x 2 polarities = {integ.n_candidates} candidates, each at 5 positions x 2 mains on "
        f"{integ.freq_hz.size} frequencies; chose {integ.crossover_hz:.0f} Hz"
    )


if __name__ == "__main__":
    main()
