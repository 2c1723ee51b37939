"""Several subwoofers (issue 20): evenness over the listening area at seats the design never
saw, on rooms simulated with pyroomacoustics, and the design time.

Rooms: the five invented rooms of ``tests/pra_rooms.py`` (two to four subwoofers, two
mains, pyroomacoustics' image-source method at high order; independent of roomcorr's own
room model) and three more (``EXTRA_ROOMS``: smaller and larger, drier and more
reverberant, subwoofers placed without symmetry). Measured: five positions over a
listening area 1.6 m wide and 0.6 m deep (its corners and centre). Held out: four seats
between them and six 0.4 m in front of and behind the centre row (``held_out_seats``).

Designs compared, each by ``roomcorr.pipeline.run_design`` from the five measured
positions only:

* **chosen**: ``--subwoofer`` naming every subwoofer (each its own delay, level, polarity
  and shaped feed, the default latency budget);
* **no-cuts**: the same without the subwoofers' own filters (``own_filters=False``: delay,
  level and polarity only);
* **equal**: every subwoofer fed equally, no delay, no own filter (the search replaced
  by equal feed; common correction, crossover and alignment as usual);
* **oracle**: the same free parameters chosen knowing the held-out seats (the design's
  search on those seats over its own band and over 25-100 Hz, and on all fifteen seats),
  the best of those, chosen, no-cuts and equal at the held-out seats: how far these
  parameters can go there, an upper bound of the true optimum;
* **single**: each subwoofer alone with the mains (issue 11's design); "picked" is the one
  whose own spread at the measured positions is least (what the design would choose on its
  own), "best" the one best at the held-out seats (known only to the benchmark).

Figures, evaluated independently of roomcorr (scipy's FFT convolution of the delivered
48 kHz filters with the held-out impulse responses through the manifest's routes, pyfar's
1/6-octave smoothing):

* spread: standard deviation over the held-out seats of the 1/6-octave level, averaged
  over 25 to 100 Hz (log grid); per channel (left, right alone) and both mains driven
  with the same signal (mono bass);
* ripple: RMS deviation of each held-out seat's level from its own mean over 25 to
  100 Hz, averaged over seats.

Design time: 4 outputs (two mains, two subwoofers) x 5 positions x 3 rates against the
two-channel design and the single-subwoofer design, in the same run: each design in a new
process as ``roomcorr design`` runs it (``design_once.py``; imports and loading not timed),
then in this process after earlier designs, with and without the memory they freed handed
back first (``timing``'s notes say why the last view misleads); the three designs in turn,
five times, each one's best and median; processor time includes the prediction's child
process.

Run: ``python benchmarks/bench_subwoofers.py [timing] [quality]`` (quality: a quarter of an
hour on a shared machine).
"""

from __future__ import annotations

import contextlib
import ctypes
import ctypes.util
import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from unittest import mock

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np  # noqa: E402
import pyfar as pf  # noqa: E402
from design_once import timed_design  # noqa: E402
from pra_rooms import (  # noqa: E402
    MULTI_SUB_ROOMS,
    held_out_seats,
    mains_m,
    simulate_pra,
    sofa_positions,
)
from scipy.signal import fftconvolve  # noqa: E402

import roomcorr.design.system.feeds as feeds_mod  # noqa: E402
import roomcorr.design.system.subwoofers as sw  # noqa: E402
import roomcorr.pipeline as pipeline_mod  # noqa: E402
from roomcorr.analysis.dtft import dtft  # noqa: E402
from roomcorr.analysis.plausibility import impulse_response_problems  # noqa: E402
from roomcorr.design.realise.safety import forget_peak_gains  # noqa: E402
from roomcorr.design.system.subwoofers import (  # noqa: E402
    listening_cases,
    plan_subwoofers,
    spread_grid_hz,
)
from roomcorr.pipeline import run_design  # noqa: E402
from roomcorr.settings import Settings, design_from_dict  # noqa: E402

FS = 48000
BAND_HZ = (25.0, 100.0)


def sofa_irs(room) -> np.ndarray:
    """A room of :data:`MULTI_SUB_ROOMS` form simulated at its 15 seats, shape (15, 2 +
    n_subs, n_samples): the five measured positions first, then the ten held-out seats."""
    dims, t60, subs_m, lat = room
    mics = sofa_positions(dims) + held_out_seats(dims)
    kinds = ["main"] * 2 + ["sub"] * len(subs_m)
    return simulate_pra(dims, mains_m(dims) + subs_m, kinds, mics, t60, [0, 0, *lat])


def _levels_db(signals: np.ndarray) -> np.ndarray:
    """1/6-octave level (pyfar) on a log grid over BAND_HZ, shape (n_signals, 49)."""
    sm, _ = pf.dsp.smooth_fractional_octave(pf.Signal(signals, FS), 6)
    f = sm.frequencies
    fl = np.geomspace(*BAND_HZ, 49)
    return np.array([np.interp(fl, f, 20 * np.log10(np.abs(x) + 1e-30)) for x in sm.freq])


def _figures(irs_held: np.ndarray, r, n_mains: int = 2) -> dict[str, tuple[float, float]]:
    """Spread and ripple at held-out seats, per channel and both, for design ``r``."""
    plan = r.system
    h = r.firs[FS]
    route = 10 ** (plan.sub_route_gain_db / 20)
    subs = plan.sub_indices
    out = {}
    n = irs_held.shape[-1] + h.shape[1] - 1
    for label, feeds in (("left", [0]), ("right", [1]), ("both", [0, 1])):
        sums = np.zeros((irs_held.shape[0], n))
        for p in range(irs_held.shape[0]):
            for m in feeds:
                sums[p] += fftconvolve(irs_held[p, m], h[m])
                for s in subs:
                    sums[p] += route * fftconvolve(irs_held[p, s], h[s])
        lev = _levels_db(sums)
        spread = float(lev.std(axis=0).mean())
        ripple = float(np.sqrt(((lev - lev.mean(axis=1, keepdims=True)) ** 2).mean(axis=1)).mean())
        out[label] = (spread, ripple)
    return out


def _equal_feed(
    resp, freq_hz, names, channels, weights=None, predict=True, base=None, fs=FS, base_scale=None,
    **_,
):
    """plan_subwoofers with every subwoofer fed equally, no delay, no own filter (the
    baseline): the plan without own filters, its delays, levels and polarities reset."""
    p = _without_own_filters(
        resp, freq_hz, names, channels, weights, base=base, fs=fs, base_scale=base_scale
    )
    n = len(names)
    p.delay_s, p.gain_db, p.polarity = np.zeros(n), np.zeros(n), [1] * n
    p.cuts, p.filter = [[] for _ in range(n)], ["none"] * n
    p.turned_down = [False] * n
    return p


def _without_own_filters(
    resp, freq_hz, names, channels, weights=None, predict=True, base=None, fs=FS, base_scale=None,
    **_,
):
    """plan_subwoofers with delay, level and polarity only (no own filters)."""
    return plan_subwoofers(
        resp,
        freq_hz,
        names,
        channels,
        weights,
        predict=False,
        base=base,
        fs=fs,
        own_filters=False,
        base_scale=base_scale,
    )


def _oracle_plans(
    irs_meas: np.ndarray, irs_held: np.ndarray, sub_idx: list[int], crossover_range_hz=(50.0, 150.0)
) -> dict[str, object]:
    """plan_subwoofers stand-ins that choose the same free parameters (delays, levels,
    polarities, own cuts) with knowledge of the held-out seats: the design's own search and
    cost (both mains through the crossover at the range's middle) on the held-out seats
    over the design's band (20 Hz to twice the crossover) and over the figure's band
    (25 to 100 Hz, with 1/12 octave beyond for the 1/6-octave box), and on the measured
    and held-out seats together. The oracle figure is the best of these, the design's own
    choice, its choice without own cuts and equal feed (all inside the same parameters),
    each judged through the whole design at the held-out seats: an upper bound of what
    these parameters can reach there (the true optimum is at most that)."""
    lo, hi = crossover_range_hz
    grid = spread_grid_hz(2.0 * float(np.sqrt(lo * hi)))
    mains = [c for c in range(irs_held.shape[1]) if c not in sub_idx]

    def heard_at(irs):
        return listening_cases(
            dtft(irs[:, sub_idx], grid, FS),
            dtft(irs[:, mains], grid, FS),
            grid,
            float(np.sqrt(lo * hi)),
            FS,
        )

    held_resp, held_base, scales = heard_at(irs_held)
    all_resp, all_base, _ = heard_at(np.concatenate([irs_meas, irs_held]))
    figure_band = (grid >= BAND_HZ[0] / 2 ** (1 / 12)) & (grid <= BAND_HZ[1] * 2 ** (1 / 12))
    whole = np.ones(grid.size, dtype=bool)

    def stand_in(resp_p, base_p, band):
        def plan(resp, freq_hz, names, channels, weights=None, predict=True, base=None, fs=FS, **_):
            assert np.allclose(freq_hz, grid)
            return plan_subwoofers(
                resp_p[..., band],
                grid[band],
                names,
                channels,
                predict=False,
                base=base_p[..., band],
                fs=fs,
                base_scale=scales,
            )

        return plan

    return {
        "held": stand_in(held_resp, held_base, whole),
        "held 25-100 Hz": stand_in(held_resp, held_base, figure_band),
        "measured+held": stand_in(all_resp, all_base, whole),
    }


def _settings(names, subs, rates=(FS,)):
    return Settings(
        design=design_from_dict(
            {"channel_names": names, "subwoofer": ",".join(subs), "sample_rates": list(rates)}
        )
    )


#: Rooms added for this benchmark beyond tests/pra_rooms.py's five (invented before any
#: figure was seen; never used to choose a constant): smaller and larger, drier and more
#: reverberant, subwoofers in places without symmetry, where equal feed cancels little.
EXTRA_ROOMS = {
    "small-askew": ((4.2, 3.4, 2.4), 0.35, [(0.3, 0.3, 0.3), (2.6, 3.1, 0.3)], [0.0, 0.002]),
    "long-three": (
        (7.6, 4.2, 2.7),
        0.6,
        [(0.3, 3.9, 0.3), (5.0, 0.3, 0.3), (7.3, 2.9, 0.3)],
        [0.0, 0.003, 0.006],
    ),
    "large-four-scattered": (
        (8.0, 5.6, 3.0),
        0.5,
        [(0.3, 1.2, 0.3), (1.8, 5.3, 0.3), (7.7, 4.0, 0.3), (5.5, 0.3, 0.3)],
        [0.0, 0.002, 0.004, 0.001],
    ),
}

#: Development rooms (invented for settling the search's rules, never for the figures
#: above; the figures' rooms are never used to choose): ``python
#: benchmarks/bench_subwoofers.py dev`` compares variants of the search on them.
DEV_ROOMS = {
    "dev-narrow-two": ((4.6, 3.6, 2.5), 0.4, [(0.3, 0.3, 0.3), (4.3, 1.2, 0.3)], [0.0, 0.003]),
    "dev-wide-three": (
        (6.8, 5.2, 2.8),
        0.55,
        [(0.3, 2.6, 0.3), (3.0, 4.9, 0.3), (6.5, 0.9, 0.3)],
        [0.001, 0.0, 0.005],
    ),
    "dev-square-four": (
        (5.4, 5.0, 2.5),
        0.45,
        [(0.3, 0.3, 0.3), (0.3, 4.7, 0.3), (5.1, 2.5, 0.3), (2.7, 4.7, 0.3)],
        [0.0, 0.002, 0.004, 0.0],
    ),
    "dev-deep-two": ((7.2, 4.0, 2.6), 0.5, [(0.3, 2.0, 0.3), (6.9, 3.7, 0.3)], [0.0, 0.007]),
}

LABELS = ("left", "right", "both")


def _trio(f, i=0):
    return "/".join(f"{f[c][i]:.2f}" for c in LABELS)


def quality() -> None:
    rows = []
    refused = accepted = 0
    print(
        "spread at held-out seats (dB, std of the 1/6-octave level, mean 25-100 Hz), "
        "left/right/both:\n"
        "  chosen = delay, level, polarity and shaped feed; no-cuts = the same without own "
        "filters;\n  oracle = the best of plans chosen knowing the held-out seats, the "
        "design's own, no-cuts and equal, judged at those seats; "
        "equal = all fed equally, no delay;\n  picked = the single subwoofer the design "
        "would pick, best = the best single one at the held-out seats"
    )
    rooms = {**MULTI_SUB_ROOMS, **EXTRA_ROOMS}
    for name, (dims, t60, subs_m, lat) in rooms.items():
        n_sub = len(subs_m)
        irs = sofa_irs((dims, t60, subs_m, lat))
        meas, held = irs[:5], irs[5:]
        for p in range(irs.shape[0]):
            for s in range(2, 2 + n_sub):
                if impulse_response_problems(irs[p, s], FS):
                    refused += 1
                else:
                    accepted += 1
        sub_names = [f"sub{k + 1}" for k in range(n_sub)]
        names = ["left", "right", *sub_names]
        settings = _settings(names, sub_names)
        chosen = run_design(meas, FS, settings)
        variants = {}
        oracles = _oracle_plans(meas, held, list(range(2, 2 + n_sub)))
        for label, stand_in in (
            ("equal", _equal_feed),
            ("no-cuts", _without_own_filters),
            *oracles.items(),
        ):
            with mock.patch.object(pipeline_mod, "plan_subwoofers", stand_in):
                variants[label] = _figures(held, run_design(meas, FS, settings))
        f_ch, f_eq = _figures(held, chosen), variants["equal"]
        candidates = {
            "design's own": f_ch,
            "no-cuts": variants["no-cuts"],
            "equal": f_eq,
            **{k: variants[k] for k in oracles},
        }
        won = min(candidates, key=lambda k: sum(candidates[k][c][0] for c in LABELS))
        variants["oracle"] = candidates[won]
        singles = []
        for k in range(n_sub):
            sel = [0, 1, 2 + k]
            r1 = run_design(
                meas[:, sel], FS, _settings(["left", "right", sub_names[k]], [sub_names[k]])
            )
            singles.append(_figures(held[:, sel], r1))
        arr = chosen.system.subwoofers
        picked = int(np.argmin(arr.spread_single_db))
        best = int(np.argmin([s["both"][0] for s in singles]))
        f_pk, f_bs = singles[picked], singles[best]

        def ratio(f, g):
            return [f[c][0] / g[c][0] for c in LABELS]

        r_eq, r_pk = ratio(f_ch, f_eq), ratio(f_ch, f_pk)
        r_nc, r_or = ratio(variants["no-cuts"], f_eq), ratio(variants["oracle"], f_eq)
        print(
            f"{name:20} {n_sub} subs | chosen {_trio(f_ch)} | no-cuts {_trio(variants['no-cuts'])}"
            f" | oracle {_trio(variants['oracle'])} | equal {_trio(f_eq)} | picked "
            f"{_trio(f_pk)} (sub{picked + 1}) | best {_trio(f_bs)} (sub{best + 1})",
            flush=True,
        )
        print(
            f"{'':20}        ratio to equal: chosen "
            + "/".join(f"{x:.2f}" for x in r_eq)
            + "  no-cuts "
            + "/".join(f"{x:.2f}" for x in r_nc)
            + "  oracle "
            + "/".join(f"{x:.2f}" for x in r_or)
            + f" ({won})"
            + " | chosen/picked "
            + "/".join(f"{x:.2f}" for x in r_pk)
            + f" | ripple (both) chosen {f_ch['both'][1]:.2f} vs picked {f_pk['both'][1]:.2f} dB",
            flush=True,
        )
        print(
            f"{'':20}        delays {np.round(arr.delay_s * 1e3, 1).tolist()} ms, levels "
            f"{arr.gain_db.tolist()} dB, polarity {arr.polarity}, own filters {arr.filter}; "
            f"predicted {arr.loo_after_db:.2f} instead of {arr.loo_equal_db:.2f} dB",
            flush=True,
        )
        rows.append(
            (
                name in MULTI_SUB_ROOMS,
                r_eq + r_pk + r_nc + r_or + [f_ch["both"][1], f_pk["both"][1]],
            )
        )
    for label, keep in (("the five rooms of tests/pra_rooms.py", True), ("all rooms", None)):
        x = np.array([r for first, r in rows if keep is None or first == keep])
        print(
            f"mean over {label} ({x.shape[0]}): ratio to equal feed chosen "
            + "/".join(f"{v:.2f}" for v in x[:, 0:3].mean(axis=0))
            + f" (worst {x[:, 0:3].max():.2f}), no-cuts "
            + "/".join(f"{v:.2f}" for v in x[:, 6:9].mean(axis=0))
            + ", oracle "
            + "/".join(f"{v:.2f}" for v in x[:, 9:12].mean(axis=0))
            + f" (worst {x[:, 9:12].max():.2f}); chosen/picked single "
            + "/".join(f"{v:.2f}" for v in x[:, 3:6].mean(axis=0))
            + f" (worst {x[:, 3:6].max():.2f}); ripple {x[:, 12].mean():.2f} vs single "
            f"{x[:, 13].mean():.2f} dB"
        )
    print(f"subwoofer responses accepted without --force: {accepted} of {accepted + refused}")


def _number(value: str) -> bool | int | float:
    if value in ("True", "False"):
        return value == "True"
    return int(value) if value.isdigit() else float(value)


def dev() -> None:
    """Variants of the search on the development rooms: chosen / equal feed at the
    held-out seats, per variant of a module constant (``NAME=value`` arguments)."""
    variants = [a for a in sys.argv[2:] if "=" in a] or ["CUT_COST_DB_PER_DB=0.0"]
    totals: dict[str, list[float]] = {v: [] for v in variants}
    times: dict[str, list[float]] = {v: [] for v in variants}
    for name, (dims, t60, subs_m, lat) in DEV_ROOMS.items():
        n_sub = len(subs_m)
        irs = sofa_irs((dims, t60, subs_m, lat))
        meas, held = irs[:5], irs[5:]
        sub_names = [f"sub{k + 1}" for k in range(n_sub)]
        settings = _settings(["left", "right", *sub_names], sub_names)
        with mock.patch.object(pipeline_mod, "plan_subwoofers", _equal_feed):
            f_eq = _figures(held, run_design(meas, FS, settings))
        for v in variants:
            with contextlib.ExitStack() as stack:  # "NAME=value[,NAME=value...]"
                for part in v.split(","):
                    key, value = part.split("=")
                    module = feeds_mod if key.startswith("feeds.") else sw
                    stack.enter_context(
                        mock.patch.object(module, key.removeprefix("feeds."), _number(value))
                    )
                t = time.perf_counter()
                f = _figures(held, run_design(meas, FS, settings))
                times[v].append(time.perf_counter() - t)
            r = [f[c][0] / f_eq[c][0] for c in LABELS]
            totals[v].append(float(np.mean(r)))
            print(f"{name:18} {v:28} chosen/equal " + "/".join(f"{x:.2f}" for x in r), flush=True)
    for v, x in totals.items():
        print(f"mean {v:28} {np.mean(x):.3f}  design {np.mean(times[v]):.2f} s")


#: Runs of each design in the timing benchmark (in turn; each one's best and median are
#: reported).
REPEAT = 5

#: The three designs timed: label, channels of the simulated room used, design settings.
TIMED = (
    (
        "two mains + two subwoofers (4 outputs)",
        4,
        {"channel_names": ["left", "right", "sub1", "sub2"], "subwoofer": "sub1,sub2"},
    ),
    (
        "two mains + one subwoofer (issue 11)  ",
        3,
        {"channel_names": ["left", "right", "sub1"], "subwoofer": "sub1"},
    ),
    ("two mains alone (reference)           ", 2, {"channel_names": ["left", "right"]}),
)


def _fresh_run(npy: Path, spec: dict) -> tuple[float, float, int]:
    """(wall clock, processor time, minor page faults) of one design in a new process
    (``design_once.py``: imports and loading not timed)."""
    script = Path(__file__).with_name("design_once.py")
    path = os.pathsep.join(p for p in (str(REPO), os.environ.get("PYTHONPATH", "")) if p)
    out = subprocess.run(
        [sys.executable, str(script), str(npy), json.dumps(spec)],
        check=True,
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONPATH": path},
    )
    r = json.loads(out.stdout.strip().splitlines()[-1])
    return r["wall_s"], r["cpu_s"], r["minor_faults"]


def _malloc_trim() -> Callable[[], None] | None:
    """glibc's ``malloc_trim(0)`` (hands the memory freed by earlier designs back to the
    system), or ``None`` where there is no glibc."""
    try:
        trim = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6").malloc_trim
    except (OSError, AttributeError):
        return None
    return lambda: trim(0)


def _warm_run(
    irs: np.ndarray, spec: dict, trim: Callable[[], None] | None = None
) -> tuple[float, float, int]:
    """The same in this process, after earlier designs (memos and feed caches emptied;
    with ``trim``, the freed memory handed back to the system first)."""
    forget_peak_gains()  # every run measures its filters afresh
    feeds_mod.forget_cached()  # and realises its feeds afresh
    if trim is not None:
        trim()
    return timed_design(irs, spec)


def _print_runs(title: str, runs: list[list[tuple[float, float, int]]]) -> None:
    print(title)
    print(
        "                                        wall clock: best  ratio  median  ratio |"
        " processor  ratio | page faults"
    )
    best = [min(r[i][0] for r in runs) for i in range(len(TIMED))]
    med = [float(np.median([r[i][0] for r in runs])) for i in range(len(TIMED))]
    cpu = [min(r[i][1] for r in runs) for i in range(len(TIMED))]
    flt = [int(np.median([r[i][2] for r in runs])) for i in range(len(TIMED))]
    for i, (label, _, _) in enumerate(TIMED):
        print(
            f"{label}  {best[i]:6.2f} s {best[i] / best[-1]:5.2f}x  {med[i]:5.2f} s"
            f" {med[i] / med[-1]:5.2f}x | {cpu[i]:6.2f} s {cpu[i] / cpu[-1]:5.2f}x |"
            f" {flt[i]:8d}"
        )


def timing() -> None:
    """Design time of 4 outputs x 5 positions x 3 rates against the two-channel design.

    The figure is taken as a command-line design pays it: each design in a process of
    its own (``design_once.py``), the three in turn, :data:`REPEAT` times. Two more views
    in this process, after earlier designs: with the memory those freed handed back to
    the system first (glibc's ``malloc_trim``; the code warm, the memory cold, as in a
    new process), and the old way, nothing handed back. That last one misleads: the
    two-channel design then reuses the freed memory (a few dozen page faults per run)
    and never pays for fresh memory as ``roomcorr design`` does (tens of thousands); the
    several-subwoofer design cannot reuse it, since its side job's fork makes every page
    copy-on-write (``roomcorr/sidejob.py``).
    """
    dims, t60, subs_m, lat = MULTI_SUB_ROOMS["two-front-back"]
    kinds = ["main", "main", "sub", "sub"]
    irs = simulate_pra(dims, mains_m(dims) + subs_m, kinds, sofa_positions(dims), t60, [0, 0, *lat])
    rates = [44100, 48000, 96000]
    specs = [{**spec, "sample_rates": rates} for _, _, spec in TIMED]
    print(f"benchmark (5 positions x 3 rates, {os.cpu_count()} cores)")
    with tempfile.TemporaryDirectory() as tmp:
        files = []
        for _, n_ch, _ in TIMED:
            files.append(Path(tmp) / f"irs{n_ch}.npy")
            np.save(files[-1], irs[:, :n_ch])
        fresh = [
            [_fresh_run(f, s) for f, s in zip(files, specs, strict=True)] for _ in range(REPEAT)
        ]
    _print_runs("each design in a new process, as `roomcorr design` runs it:", fresh)
    views = [("one process, designs repeated (memory warm from earlier designs):", None)]
    trim = _malloc_trim()
    if trim is not None:
        views.insert(0, ("one process, the memory earlier designs freed handed back first:", trim))
    for title, how in views:
        runs = [
            [_warm_run(irs[:, :n_ch], s, how) for (_, n_ch, _), s in zip(TIMED, specs, strict=True)]
            for _ in range(REPEAT)
        ]
        _print_runs(title, runs)


if __name__ == "__main__":
    which = sys.argv[1:] or ["timing", "quality"]
    if "dev" in which:
        dev()
    if "timing" in which:
        timing()
    if "quality" in which:
        quality()
