"""Several subwoofers (issue 20): evenness over the listening area at seats the design never
saw, on rooms simulated with pyroomacoustics, and the design time.

Rooms: the five invented rooms of ``tests/pra_rooms.py`` (two to four subwoofers, two
mains, pyroomacoustics' image-source method at high order; independent of roomcorr's own
room model). Measured: five positions over a listening area 1.6 m wide and 0.6 m deep
(its corners and centre). Held out: four seats between them and six 0.4 m in front of and
behind the centre row (``held_out_seats``).

Designs compared, each by ``roomcorr.pipeline.run_design`` from the five measured
positions only:

* **chosen**: ``--subwoofer`` naming every subwoofer (each its own delay, level, polarity);
* **equal**: the same, with every subwoofer fed equally and no delay (the search replaced
  by equal feed; common correction, crossover and alignment as usual);
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

Run: ``python benchmarks/bench_subwoofers.py`` (a few minutes).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path
from unittest import mock

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))

import numpy as np  # noqa: E402
import pyfar as pf  # noqa: E402
from pra_rooms import (  # noqa: E402
    MULTI_SUB_ROOMS,
    held_out_seats,
    mains_m,
    simulate_pra,
    sofa_positions,
)
from scipy.signal import fftconvolve  # noqa: E402

import roomcorr.pipeline as pipeline_mod  # noqa: E402
from roomcorr.analysis.plausibility import impulse_response_problems  # noqa: E402
from roomcorr.design.system.subwoofers import plan_subwoofers  # noqa: E402
from roomcorr.pipeline import run_design  # noqa: E402
from roomcorr.settings import Settings, design_from_dict  # noqa: E402

FS = 48000
BAND_HZ = (25.0, 100.0)


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


def _equal_feed(resp, freq_hz, names, channels, weights=None, predict=True, base=None):
    """plan_subwoofers with every subwoofer fed equally, no delay (the baseline)."""
    p = plan_subwoofers(resp, freq_hz, names, channels, weights, predict=False, base=base)
    n = len(names)
    p.delay_s, p.gain_db, p.polarity = np.zeros(n), np.zeros(n), [1] * n
    p.turned_down = [False] * n
    return p


def _settings(names, subs, rates=(FS,)):
    return Settings(
        design=design_from_dict(
            {"channel_names": names, "subwoofer": ",".join(subs), "sample_rates": list(rates)}
        )
    )


def quality() -> None:
    rows = []
    refused = accepted = 0
    print(
        "room           subs | spread held-out (dB) left/right/both: chosen | equal | "
        "single picked | single best || ratio chosen/equal  chosen/picked || ripple "
        "chosen vs picked (both)"
    )
    for name, (dims, t60, subs_m, lat) in MULTI_SUB_ROOMS.items():
        n_sub = len(subs_m)
        mics = sofa_positions(dims) + held_out_seats(dims)
        kinds = ["main"] * 2 + ["sub"] * n_sub
        irs = simulate_pra(dims, mains_m(dims) + subs_m, kinds, mics, t60, [0, 0, *lat])
        meas, held = irs[:5], irs[5:]
        for p in range(irs.shape[0]):
            for s in range(2, 2 + n_sub):
                if impulse_response_problems(irs[p, s], FS):
                    refused += 1
                else:
                    accepted += 1
        sub_names = [f"sub{k + 1}" for k in range(n_sub)]
        names = ["left", "right", *sub_names]
        chosen = run_design(meas, FS, _settings(names, sub_names))
        with mock.patch.object(pipeline_mod, "plan_subwoofers", _equal_feed):
            equal = run_design(meas, FS, _settings(names, sub_names))
        f_ch, f_eq = _figures(held, chosen), _figures(held, equal)
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

        def trio(f):
            return "/".join(f"{f[c][0]:.2f}" for c in ("left", "right", "both"))

        r_eq = [f_ch[c][0] / f_eq[c][0] for c in ("left", "right", "both")]
        r_pk = [f_ch[c][0] / f_pk[c][0] for c in ("left", "right", "both")]
        print(
            f"{name:14} {n_sub:4d} | {trio(f_ch)} | {trio(f_eq)} | {trio(f_pk)} (sub{picked + 1})"
            f" | {trio(f_bs)} (sub{best + 1}) || "
            + "/".join(f"{x:.2f}" for x in r_eq)
            + "  "
            + "/".join(f"{x:.2f}" for x in r_pk)
            + f" || {f_ch['both'][1]:.2f} vs {f_pk['both'][1]:.2f} dB"
            + f"  [delays {np.round(arr.delay_s * 1e3, 1).tolist()} ms, levels "
            f"{arr.gain_db.tolist()} dB, polarity {arr.polarity}; predicted "
            f"{arr.loo_after_db:.2f} instead of {arr.loo_equal_db:.2f} dB]",
            flush=True,
        )
        rows.append(r_eq + r_pk + [f_ch["both"][1], f_pk["both"][1]])
    x = np.array(rows)
    print(
        f"mean ratio chosen/equal {x[:, 0].mean():.2f}/{x[:, 1].mean():.2f}/{x[:, 2].mean():.2f}"
        f" (worst {x[:, :3].max():.2f}); chosen/picked single {x[:, 3].mean():.2f}/"
        f"{x[:, 4].mean():.2f}/{x[:, 5].mean():.2f} (worst {x[:, 3:6].max():.2f}); ripple "
        f"{x[:, 6].mean():.2f} vs single {x[:, 7].mean():.2f} dB"
    )
    print(f"subwoofer responses accepted without --force: {accepted} of {accepted + refused}")


def timing() -> None:
    dims, t60, subs_m, lat = MULTI_SUB_ROOMS["two-front-back"]
    kinds = ["main", "main", "sub", "sub"]
    irs = simulate_pra(dims, mains_m(dims) + subs_m, kinds, sofa_positions(dims), t60, [0, 0, *lat])
    rates = (44100, 48000, 96000)
    four = _settings(["left", "right", "sub1", "sub2"], ["sub1", "sub2"], rates)
    three = _settings(["left", "right", "sub1"], ["sub1"], rates)
    two = Settings(
        design=design_from_dict({"channel_names": ["left", "right"], "sample_rates": list(rates)})
    )

    def best(fn, repeat=2):
        ts = []
        for _ in range(repeat):
            t = time.perf_counter()
            fn()
            ts.append(time.perf_counter() - t)
        return min(ts)

    t4 = best(lambda: run_design(irs, FS, four))
    t3 = best(lambda: run_design(irs[:, :3], FS, three))
    t2 = best(lambda: run_design(irs[:, :2], FS, two))
    print("benchmark (5 positions x 3 rates)                        time      ratio to two-channel")
    print(f"two mains + two subwoofers (4 outputs)              {t4:7.2f} s   {t4 / t2:5.2f}x")
    print(f"two mains + one subwoofer (issue 11)                {t3:7.2f} s   {t3 / t2:5.2f}x")
    print(f"two mains alone (reference)                         {t2:7.2f} s   1.00x")


if __name__ == "__main__":
    timing()
    quality()
