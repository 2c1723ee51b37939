"""Plain-language sentences about a design: what was corrected, what was left alone and why.

Pure functions on the curves of a design (the mapping returned by
:func:`roomcorr.deliver.export.load_design_curves`, or :func:`curves_from_result` for a
:class:`roomcorr.pipeline.DesignResult` in memory). The report prints them at
the top of the page and the command line can print the same sentences.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from roomcorr.analysis.smoothing import smooth_log_grid
from roomcorr.deliver.figures import fmt_db
from roomcorr.design.curve import correction as rule
from roomcorr.design.curve.area import area_fields_of
from roomcorr.design.phase.mixedphase import from_arrays, latency_sentence, to_arrays
from roomcorr.grid import points_per_octave_of

#: Smallest change worth a sentence, dB.
NOTABLE_DB = 2.0
#: Refused boost below this is not mentioned, dB.
WITHHELD_NOTABLE_DB = 2.0


def fmt_hz(f: float) -> str:
    """``87 Hz``, ``120 Hz``, ``1.2 kHz``, ``15 kHz``."""
    if f < 1000:
        return f"{f:.0f} Hz"
    if f < 10000:
        return f"{f / 1000:.1f} kHz"
    return f"{f / 1000:.0f} kHz"


def curves_from_result(result: Any) -> dict[str, Any]:
    """The curves of a :class:`~roomcorr.pipeline.DesignResult` in the layout of
    :func:`roomcorr.deliver.export.load_design_curves` (so the report treats both alike)."""
    channels = []
    for c in result.channels:
        channels.append(
            {
                "index": c.index,
                "name": c.name,
                "arrival_s": c.arrival_s,
                "measured_db": c.measured_db,
                "average_db": c.average_db,
                "spread_db": c.spread_db,
                "target_db": c.target_db,
                "raw_correction_db": c.raw_correction_db,
                "correction_db": c.correction_db,
                "boost_withheld_db": c.boost_withheld_db,
                "band_hz": tuple(c.band_hz),
                **area_fields_of(c),
            }
        )
    return {
        "freq_hz": result.freq_hz,
        "fs_in": int(result.fs_in),
        "pre_gain_db": float(result.pre_gain_db),
        "irs": result.irs,
        "firs": dict(result.firs),
        "channels": channels,
        "mixed_phase": _mixed_phase_of(result),
    }


def _mixed_phase_of(result: Any) -> dict[str, Any] | None:
    """The mixed-phase part of a result in the layout ``load_design_curves`` gives."""

    mp = getattr(result, "mixed_phase", None)
    return None if mp is None else from_arrays(to_arrays(mp))


def _runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Start and stop (exclusive) of every run of True in a boolean array."""
    m = np.concatenate([[False], np.asarray(mask, bool), [False]])
    d = np.diff(m.astype(int))
    return list(zip(np.nonzero(d == 1)[0], np.nonzero(d == -1)[0], strict=True))


def withheld_regions(
    freq_hz: np.ndarray, ch: dict[str, Any], max_boost_db: float | None = None
) -> list[dict[str, Any]]:
    """Regions where boost was wanted but refused, strongest first.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    ch : dict
        One channel's curves (``raw_correction_db``, ``correction_db``,
        ``boost_withheld_db``, ``spread_db``, ``band_hz``).
    max_boost_db : float, optional
        The boost cap, to tell a capped boost from a refused one.

    Returns
    -------
    list of dict
        ``freq_hz`` (where most was refused), ``lo_hz``, ``hi_hz``, ``depth_db``
        (how far below the target the measurement sits there), ``applied_db``,
        ``withheld_db`` and ``reason``: ``"cap"``, ``"spread"`` or ``"cancellation"``
        (whichever of the correction rule's limits, see :mod:`roomcorr.design.curve.correction`,
        held the boost back most: boost cap, position disagreement, or dip depth below
        the wide envelope).
    """

    w = np.asarray(ch["boost_withheld_db"])
    avg = np.asarray(ch["average_db"], dtype=float)
    # the correction rule's own dip measure: depth below the wide power envelope
    envelope = 10 * np.log10(np.maximum(
        smooth_log_grid(10 ** (avg / 10), points_per_octave_of(freq_hz), rule.ENVELOPE_OCT),
        1e-30))
    dip = np.maximum(envelope - avg, 0.0)

    def _allow(x: float, free: float, refuse: float) -> float:
        return float(np.clip((refuse - x) / (refuse - free), 0.0, 1.0))

    out = []
    for a, b in _runs(w > WITHHELD_NOTABLE_DB):
        i = a + int(np.argmax(w[a:b]))
        applied = float(ch["correction_db"][i])
        depth = float(ch["raw_correction_db"][i])
        spread = float(ch["spread_db"][i])
        by_dip = _allow(float(dip[i]), rule.DIP_FREE_DB, rule.DIP_REFUSE_DB)
        by_spread = _allow(spread, rule.SPREAD_FREE_DB, rule.SPREAD_REFUSE_DB)
        if max_boost_db is not None and applied >= max_boost_db - 0.3:
            reason = "cap"
        elif by_spread < by_dip:
            reason = "spread"
        else:
            reason = "cancellation"
        out.append(
            {
                "freq_hz": float(freq_hz[i]),
                "lo_hz": float(freq_hz[a]),
                "hi_hz": float(freq_hz[b - 1]),
                "depth_db": depth,
                "applied_db": applied,
                "withheld_db": float(w[i]),
                "spread_db": spread,
                "reason": reason,
            }
        )
    out.sort(key=lambda r: -r["withheld_db"])
    return out


def _a(n: float) -> str:
    """Article for a spoken number: "an 8 dB", "an 11 dB", "a 14 dB"."""
    k = int(round(n))
    return "an" if str(k).startswith("8") or k in (11, 18) else "a"


def _withheld_sentence(r: dict[str, Any], max_boost_db: float | None) -> str:
    depth = r["depth_db"]
    f = fmt_hz(r["freq_hz"])
    kept = (
        "so it was left"
        if r["applied_db"] < 0.5
        else f"so only {r['applied_db']:.1f} dB of boost was applied there"
    )
    if r["reason"] == "cap":
        cap = f"{max_boost_db:.1f} dB" if max_boost_db is not None else "the cap"
        return (
            f"{_a(depth)} {depth:.0f} dB dip at {f} would need more boost than the cap allows; "
            f"it was lifted by {cap} only."
        )
    if r["reason"] == "spread":
        return (
            f"{_a(depth)} {depth:.0f} dB dip at {f} differs from seat to seat by "
            f"{r['spread_db']:.0f} dB; "
            f"a boost would help one position and overload another, {kept}."
        )
    return (
        f"{_a(depth)} {depth:.0f} dB dip at {f} is a cancellation; boosting it would waste "
        f"{depth:.0f} dB of headroom, {kept}."
    )


def channel_sentences(
    freq_hz: np.ndarray, ch: dict[str, Any], max_boost_db: float | None = None
) -> list[str]:
    """Sentences about one channel, each starting with its name.

    Parameters
    ----------
    freq_hz : ndarray, shape (n_freqs,)
    ch : dict
        One channel's curves (see :func:`curves_from_result`).
    max_boost_db : float, optional
        The boost cap in force.

    Returns
    -------
    list of str
    """
    f = np.asarray(freq_hz, dtype=float)
    name = str(ch["name"]).capitalize()
    lo, hi = ch["band_hz"]
    corr = np.asarray(ch["correction_db"])
    inside = (f >= lo) & (f <= hi)
    out = [f"{name}: corrected between {fmt_hz(lo)} and {fmt_hz(hi)}."]

    cuts = []
    for a, b in _runs(inside & (corr < -NOTABLE_DB)):
        i = a + int(np.argmin(corr[a:b]))
        cuts.append((float(corr[i]), float(f[i])))
    cuts.sort()
    if cuts:
        parts = [f"{-g:.1f} dB at {fmt_hz(fq)}" for g, fq in cuts[:3]]
        out.append(
            f"{name}: room peaks were cut ({', '.join(parts)}); cutting is safe and "
            "holds when the listener moves."
        )
    boosts = []
    for a, b in _runs(inside & (corr > NOTABLE_DB / 2)):
        i = a + int(np.argmax(corr[a:b]))
        boosts.append((float(corr[i]), float(f[i])))
    boosts.sort(reverse=True)
    if boosts:
        parts = [f"{g:.1f} dB at {fmt_hz(fq)}" for g, fq in boosts[:3]]
        out.append(f"{name}: shallow dips were filled ({', '.join(parts)}).")
    if not cuts and not boosts:
        out.append(f"{name}: the response already followed the target; little was changed.")

    for r in withheld_regions(f, ch, max_boost_db)[:3]:
        out.append(f"{name}: " + _withheld_sentence(r, max_boost_db))

    spread = np.asarray(ch["spread_db"])
    wide = [
        (a, b)
        for a, b in _runs(inside & (spread > 3.0))
        if np.log2(f[b - 1] / f[a]) >= 1.0 / 3.0
    ]
    if wide:
        a, b = max(wide, key=lambda r: r[1] - r[0])
        out.append(
            f"{name}: between {fmt_hz(f[a])} and {fmt_hz(f[b - 1])} the positions disagree by "
            "more than 3 dB, so the correction there follows their average and stays gentle."
        )
    out.extend(area_sentences(ch, name))
    out.append(
        f"{name}: below {fmt_hz(lo)} and above {fmt_hz(hi)}, outside the correction band, "
        "nothing was changed: lifting a loudspeaker's own roll-off would only cost excursion "
        "and headroom."
    )
    return out


_FOUND_BY = {
    "stated": "the limit you stated",
    "measured": "where the measured response rolls off",
    "assumed": "an assumed limit, since a room hides a loudspeaker's own roll-off; "
    "state yours with --speaker-low-hz",
}


def area_sentences(ch: dict[str, Any], name: str) -> list[str]:
    """Plain words on the bass limit and the leave-one-position-out prediction of a channel.

    Parameters
    ----------
    ch : dict
        One channel's curves; uses ``speaker_low_hz``, ``speaker_low_found_by``,
        ``cv_band_hz``, ``cv_uncorrected_db``, ``cv_predicted_db``,
        ``cv_positions`` and ``cv_flagged`` when present (designs made before
        they existed have none, and get no sentence).
    name : str
        Channel name as it starts each sentence.

    Returns
    -------
    list of str
    """
    out = []
    if ch.get("speaker_low_hz") is not None:
        low = float(np.asarray(ch["speaker_low_hz"]))
        how = str(np.asarray(ch.get("speaker_low_found_by", "assumed")))
        out.append(
            f"{name}: below {fmt_hz(low)} the filter never raises the bass above its midrange "
            f"level ({_FOUND_BY.get(how, how)}), so the woofer is not driven harder where it "
            "has least to give."
        )
    if ch.get("cv_predicted_db") is not None:
        before = float(np.asarray(ch["cv_uncorrected_db"]))
        after = float(np.asarray(ch["cv_predicted_db"]))
        band = np.asarray(ch["cv_band_hz"], dtype=float)
        n = int(np.asarray(ch.get("cv_positions", 0)))
        out.append(
            f"{name}: at seats you did not measure, expect the bass ({fmt_hz(band[0])} to "
            f"{fmt_hz(band[1])}) to vary by about {after:.1f} dB instead of {before:.1f} dB "
            f"(predicted by designing without each of the {n} positions in turn and checking "
            "the one left out)."
        )
        flagged = np.asarray(ch.get("cv_flagged", np.zeros((0, 3))), dtype=float).reshape(-1, 3)
        for pos, freq, depth in flagged:
            out.append(
                f"{name}: position {int(pos)} sits in a cancellation near {fmt_hz(freq)} "
                f"({depth:.0f} dB below the other positions); the correction does not follow it."
            )
    return out


def summary_sentences(
    curves: dict[str, Any],
    max_boost_db: float | None = None,
    figures: dict[str, Any] | None = None,
    latency: bool = True,
) -> list[str]:
    """All sentences of a design, channel by channel, then the level.

    Parameters
    ----------
    curves : dict
        Layout of :func:`roomcorr.deliver.export.load_design_curves`.
    max_boost_db : float, optional
        The boost cap in force (from the design settings).
    figures : dict, optional
        The manifest's figures block (:func:`roomcorr.deliver.figures.figures_of_manifest`);
        its pre-gain, largest boost, peak gain and worst-case gain are stated as stored.
    latency : bool, optional
        State a mixed-phase design's latency and its caution (the report leaves it to
        its overview, so that it stands once).

    Returns
    -------
    list of str
    """
    f = np.asarray(curves["freq_hz"])
    out: list[str] = []
    for ch in curves["channels"]:
        out.extend(channel_sentences(f, ch, max_boost_db))
    pg = float((figures or {}).get("pre_gain_db", curves.get("pre_gain_db", 0.0)))
    if fmt_db(pg) != fmt_db(0.0):
        out.append(
            f"All filters are lowered by {fmt_db(-pg)} (pre-gain) so that no frequency "
            "leaves a filter louder than it went in."
        )
    else:
        out.append("No pre-gain was needed: no filter rises above the gain ceiling.")
    if figures is not None and figures.get("largest_boost_db") is not None:
        out.append(
            f"Largest boost {fmt_db(figures['largest_boost_db'])} (the filters' largest gain "
            f"before the pre-gain), peak gain {fmt_db(figures['peak_gain_db'], 2, True)}, "
            f"worst-case gain {fmt_db(figures['worst_case_gain_db'], 2, True)}."
        )
    mp = curves.get("mixed_phase")
    if mp and latency:
        out.append(latency_sentence(mp["latency_ms"], mp["latency_samples"]))
    return out
