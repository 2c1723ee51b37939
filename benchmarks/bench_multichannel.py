"""Design time for several loudspeakers: 3 channels x 5 positions x 3 rates, with the
subwoofer crossover search; and the quality of the subwoofer integration.

Ratios are against the same design in the same run without the system part
(no subwoofer, no alignment): what the alignment, the crossover search and the
crossover filtering cost on top of correcting the channels one by one. The
room is the invented rear-corner room of the tests (tests/speaker_rooms.py).

Quality: in nine invented rooms (the three of tests/test_align.py and six
more), the summed mains + subwoofer response from fc/2 to 2 fc, 1/6-octave RMS
deviation from its own mean averaged over positions and mains (the figure of
issue 11, evaluated independently with scipy and pyfar as in the test), after
integration and against the same filters with no delay and normal polarity,
at the five measured positions and at held-out seats the design never saw:
three seats 0.5 m behind and four between the measured ones. The same designs
without the shared cut of the sum are evaluated in the same run. "floor" is
what a filter common to all seats, of unlimited resolution and boost and
fitted to the measured seats, would leave, over the baseline (design's own
figures on the search grid): a ratio no common filter can go below.
Run: ``python benchmarks/bench_multichannel.py`` (about two minutes).
"""

from __future__ import annotations

import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from unittest import mock  # noqa: E402

import numpy as np  # noqa: E402
from _util import best_of  # noqa: E402
from speaker_rooms import (  # noqa: E402
    SUB_ROOMS,
    Room,
    held_out_behind,
    held_out_between,
    seat_centre,
    seats,
    simulate,
    sub_room,
    summed_figures,
)

import roomcorr.design.system.align as align_mod  # noqa: E402
from roomcorr.design.system.align import plan_system  # noqa: E402
from roomcorr.design.system.crossover import region_mask  # noqa: E402
from roomcorr.pipeline import run_design  # noqa: E402
from roomcorr.settings import Settings, design_from_dict  # noqa: E402

FS = 48000

#: More invented rooms for the quality table: dimensions (m), subwoofer place (m), its
#: own processing delay (s).
MORE_SUB_ROOMS = {
    "small-front": ((4.3, 3.5, 2.4), (0.3, 3.2, 0.3), 0.0),
    "wide-sidewall": ((5.8, 4.6, 2.7), (2.9, 0.3, 0.3), 0.004),
    "long-backwall": ((7.0, 4.2, 2.8), (6.7, 2.1, 0.3), 0.006),
    "mid-frontwall": ((5.0, 3.9, 2.5), (0.3, 1.95, 0.3), 0.010),
    "big-rear": ((6.6, 5.1, 2.9), (6.3, 0.3, 0.3), 0.002),
    "narrow-front": ((6.0, 3.3, 2.5), (0.3, 0.3, 0.3), 0.012),
}


def _figures(irs, r) -> tuple[float, float, float]:
    """After, baseline (no delay, normal polarity) and centre dip of a design at ``irs``."""
    plan = r.system
    fc = plan.integration.crossover_hz
    route = 10 ** (plan.sub_route_gain_db / 20)
    h = r.firs[FS]
    after, dips = summed_figures(irs, h, None, None, route, fc)
    base, _ = summed_figures(irs, h, plan.delay_samples[FS], plan.polarity, route, fc)
    return after, base, float(dips[0])


def _floor_ratio(integ) -> float:
    """Deviation a common filter of unlimited resolution fitted to the measured seats
    would leave, over the baseline's (design's own smoothed sums on the search grid)."""
    m = region_mask(integ.freq_hz, integ.crossover_hz)

    def rel(x):
        x = x.reshape(-1, x.shape[-1])[:, m]
        return x - x.mean(axis=1, keepdims=True)

    after, base = rel(integ.summed_after_db), rel(integ.summed_baseline_db)
    left = after - after.mean(axis=0, keepdims=True)
    dev = np.sqrt(np.mean(left**2, axis=1)).mean()
    return float(dev / np.sqrt(np.mean(base**2, axis=1)).mean())


def quality() -> None:
    """The subwoofer figure per room, measured and held-out seats, with and without the
    shared cut of the sum."""
    names = ["left", "right", "sub"]
    settings = Settings(
        design=design_from_dict({"channel_names": names, "subwoofer": "sub", "sample_rates": [FS]})
    )
    print("\nsubwoofer figure: RMS deviation of the sum fc/2..2fc (dB), after / no delay = ratio")
    print(
        f"{'room':14} {'fc':>4} {'sub ms':>6} {'pol':>3} | {'measured':^17} | {'behind':^17} |"
        f" {'between':^17} | floor | dip | without shared cut: meas behind between"
    )
    rows = []
    for name, (dims, sub_m, lat) in {**SUB_ROOMS, **MORE_SUB_ROOMS}.items():
        centre = seat_centre(dims)
        irs = simulate(sub_room(dims, sub_m, lat, seats(centre, 5)))
        behind = simulate(sub_room(dims, sub_m, lat, held_out_behind(centre)))
        between = simulate(sub_room(dims, sub_m, lat, held_out_between(centre)))
        r = run_design(irs, FS, settings)
        with mock.patch.object(align_mod, "shared_cut_fir", lambda *a: None):
            r0 = run_design(irs, FS, settings)
        figs = [_figures(x, r) for x in (irs, behind, between)]
        figs0 = [_figures(x, r0) for x in (irs, behind, between)]
        plan = r.system
        cells = " | ".join(f"{a:.2f}/{b:.2f}={a / b:.2f}" for a, b, _ in figs)
        print(
            f"{name:14} {plan.integration.crossover_hz:4.0f} {plan.delay_s[2] * 1e3:6.2f} "
            f"{plan.polarity[2]:+3d} | {cells} | {_floor_ratio(plan.integration):5.2f} | "
            f"{figs[0][2]:3.1f} | {figs0[0][0]:.2f} {figs0[1][0]:.2f} {figs0[2][0]:.2f}",
            flush=True,
        )
        rows.append([f[0] for f in figs] + [f[0] / f[1] for f in figs] + [f[0] for f in figs0])
    x = np.array(rows).mean(axis=0)
    print(
        f"{'mean':14} deviation measured {x[0]:.2f} behind {x[1]:.2f} between {x[2]:.2f} dB; "
        f"ratio {x[3]:.2f} / {x[4]:.2f} / {x[5]:.2f}; without the shared cut {x[6]:.2f} / "
        f"{x[7]:.2f} / {x[8]:.2f} dB"
    )


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
    quality()


if __name__ == "__main__":
    main()
