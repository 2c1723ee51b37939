"""The several-loudspeaker part of a design folder: extra formats, routes, trims.

Called from :func:`roomcorr.deliver.export.write_design` after the per-channel WAVs;
adds files (extra formats) and manifest fields (``routes``, ``outputs``,
``system``).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from roomcorr.deliver.figures import fmt_db
from roomcorr.deliver.formats import MULTI_NAME, filter_files
from roomcorr.deliver.routes import build_routes, output_trims
from roomcorr.errors import OutputError

if TYPE_CHECKING:
    from roomcorr.pipeline import DesignResult


def write_extra_formats(result: DesignResult, out: Path, sha256_of: Any) -> list[dict[str, Any]]:
    """Write the filters in the formats chosen besides the per-channel WAV.

    ``out`` is the folder the design is being built in (the caller swaps it
    into place as a whole, or removes it).

    Returns
    -------
    list of dict
        Manifest entries (``kind`` ``fir``, ``format``, ``sample_rate``,
        channel or channel list, ``sha256``).
    """
    names = [c.name for c in result.channels]
    formats = result.settings.design.formats
    if "multiwav" in formats and MULTI_NAME in names:
        raise OutputError(
            f"--names: a channel called {MULTI_NAME!r} collides with the multichannel file; "
            "rename it"
        )
    entries: list[dict[str, Any]] = []
    for rel, fmt, fs, ch, write in filter_files(result.firs, names, formats):
        path = out / rel
        write(path)
        entry: dict[str, Any] = {"path": rel, "kind": "fir", "format": fmt, "sample_rate": fs}
        if ch is None:
            entry["channels"] = names
        else:
            entry.update(channel=ch, channel_name=names[ch])
        entry["taps"] = int(result.firs[fs].shape[1])
        entry["sha256"] = sha256_of(path)
        entries.append(entry)
    return entries


def system_summary(result: DesignResult) -> dict[str, Any]:
    """The ``system`` manifest object: what alignment and integration chose."""
    plan = result.system
    if plan is None:
        return {}
    doc: dict[str, Any] = {
        "aligned_in_filters": plan.baked,
        "temperature_c": plan.temperature_c,
        "speed_of_sound_m_s": round(plan.c_m_s, 2),
        "level_bands_hz": [list(b) for b in plan.level_band_hz],
        "sub_route_gain_db": round(plan.sub_route_gain_db, 3),
    }
    integ = plan.integration
    if integ is not None:
        doc["crossover"] = {
            "type": "Linkwitz-Riley",
            "frequency_hz": round(integ.crossover_hz, 2),
            "slope_db_per_octave": integ.slope_db_oct,
            "subwoofer_delay_ms": round(float(plan.delay_s[plan.sub_index]) * 1000.0, 4),
            "subwoofer_polarity": integ.sub_polarity,
            "summed_rms_deviation_db": round(integ.rms_dev_db, 2),
            "summed_rms_deviation_no_delay_db": round(integ.baseline_rms_dev_db, 2),
            "centre_seat_deepest_dip_db": round(integ.centre_dip_db, 2),
            "candidates_searched": integ.n_candidates,
            "shared_cut_deepest_db": round(_deepest_cut_db(integ), 2),
        }
    arr = plan.subwoofers
    if arr is not None:
        doc["subwoofers"] = subwoofer_fields(arr)
    return doc


def subwoofer_fields(arr: Any) -> dict[str, Any]:
    """Manifest figures of several subwoofers (``system.subwoofers``): per subwoofer its
    delay, level, polarity and own filter (in words; as its cuts: centre Hz, gain dB,
    Q of each peaking cut; or as its shaped feed: gain dB and phase degrees at each
    node, realised ``feed_latency_ms`` late) inside the array, the seat-to-seat spread (dB,
    1/6 octave, averaged over the band) at the measured positions fed equally with no
    delay, alone and as chosen, and the leave-one-position-out prediction."""

    def r2(x: Any) -> float | None:
        return None if x is None else round(float(x), 2)

    return {
        "band_hz": [round(arr.band_hz[0], 1), round(arr.band_hz[1], 1)],
        "spread_equal_db": r2(arr.spread_equal_db),
        "spread_after_db": r2(arr.spread_after_db),
        "predicted_spread_equal_db": r2(arr.loo_equal_db),
        "predicted_spread_after_db": r2(arr.loo_after_db),
        "candidates_searched": int(arr.n_evaluations),
        "feed_latency_ms": round(float(arr.feed_latency_s) * 1000.0, 3),
        "crossover_for_spread_hz": None
        if arr.crossover_hz is None
        else round(float(arr.crossover_hz), 1),
        "each": [
            {
                "name": name,
                "output": int(arr.channels[k]),
                "delay_ms": round(float(arr.delay_s[k]) * 1000.0, 3),
                "level_db": round(float(arr.gain_db[k]), 2),
                "polarity": int(arr.polarity[k]),
                "filter": arr.filter[k],
                "cuts": [
                    {"freq_hz": round(float(f0), 2), "gain_db": float(g), "q": float(q)}
                    for f0, g, q in (arr.cuts[k] if arr.cuts else [])
                ],
                "feed": []
                if arr.feed is None
                else [
                    {
                        "freq_hz": round(float(f0), 2),
                        "gain_db": round(float(20.0 * np.log10(max(abs(g), 1e-6))), 2),
                        "phase_deg": round(float(np.degrees(np.angle(g))), 1),
                    }
                    for f0, g in zip(arr.feed_nodes_hz, arr.feed[k], strict=True)
                ],
                "spread_alone_db": r2(arr.spread_single_db[k]),
                "turned_down": bool(arr.turned_down[k]),
            }
            for k, name in enumerate(arr.names)
        ],
    }


def subwoofer_sentences(sw: dict[str, Any], route_gain_db: float) -> list[str]:
    """Plain-language lines on several subwoofers (the manifest's ``system.subwoofers``)."""
    lo, hi = sw["band_hz"]
    lines = [
        f"Subwoofers chosen together for even bass over the listening area ({lo:.0f} to "
        f"{hi:.0f} Hz, 1/6 octave, both mains and the subwoofers playing): the measured "
        "positions differ by "
        f"{sw['spread_after_db']:.1f} dB (standard deviation, averaged over frequency) "
        f"against {sw['spread_equal_db']:.1f} dB with all subwoofers fed equally, no delay."
    ]
    if sw.get("predicted_spread_after_db") is not None:
        lines.append(
            "At seats you did not measure, expect the bass to vary by about "
            f"{sw['predicted_spread_after_db']:.1f} dB instead of "
            f"{sw['predicted_spread_equal_db']:.1f} dB (leave-one-position-out: each "
            "position predicted from a choice made without it)."
            + (
                " With shaped feeds this leans pessimistic: each position is predicted from "
                "feeds fitted to the others, often beyond them (on simulated rooms the "
                "unmeasured seats between and beside the measured ones came out better)."
                if sw.get("feed_latency_ms")
                else ""
            )
        )
    if sw.get("crossover_for_spread_hz"):
        lines.append(
            f"The crossover frequency, {sw['crossover_for_spread_hz']:.0f} Hz, is the one in "
            "the crossover range at which the subwoofers, so fed, leave the measured positions "
            "most alike (a lower one hands more of the bass to the mains); the delay and "
            "polarity to the mains were then chosen for the smoothest sum, as above."
        )
    if sw.get("feed_latency_ms"):
        lines.append(
            "Each subwoofer's own filter is a shaped feed: a smooth level and phase over "
            "frequency, that may act up to "
            f"{sw['feed_latency_ms']:g} ms early, so its filter is that much late and the "
            "mains wait with it (the latency budget, design.latency_ms)."
        )
    for e in sw["each"]:
        pol = "normal" if e["polarity"] > 0 else "inverted"
        lines.append(
            f"  {e['name']:>10}: delay {e['delay_ms']:6.2f} ms, level {e['level_db']:+.1f} dB, "
            f"polarity {pol}, own filter {e['filter']}; alone it would leave "
            f"{e['spread_alone_db']:.1f} dB"
        )
        if e["turned_down"]:
            how = (
                "switched off"
                if e["level_db"] <= -59
                else f"turned down by {-e['level_db']:.0f} dB"
            )
            lines.append(
                f"  {e['name']} makes the seats differ more where it stands: {how} "
                "(try another place for it)."
            )
    lines.append(
        "Bass management: each main input feeds every subwoofer output at "
        f"{route_gain_db:+.2f} dB (1 / number of mains), so the same bass on every main "
        "(mono bass) reaches the subwoofers at the level of one main alone and cannot "
        "overload them; bass that differs between the mains adds up to at most that level "
        "too. No subwoofer is ever raised: levels are cuts from the loudest one, and a "
        "subwoofer's own filter only cuts."
    )
    return lines


def _deepest_cut_db(integ: Any) -> float:
    """Depth (dB, >= 0) of the cut shared by every output, 0 without one."""
    cut = integ.shared_cut_db
    return 0.0 if cut is None else float(max(0.0, -np.min(cut)))


def system_curves(result: DesignResult) -> dict[str, Any]:
    """Arrays for ``design.npz`` (keys prefixed ``sys_``): summed responses around the crossover.

    ``sys_freq_hz`` (n_freqs,), ``sys_summed_measured_db``,
    ``sys_summed_baseline_db`` and ``sys_summed_after_db`` (n_mains,
    n_positions, n_freqs), ``sys_crossover_hz`` and ``sys_shared_cut_db``
    (n_freqs,; zeros without a cut) (with a subwoofer), and
    ``sys_fields_json``, the manifest's ``outputs`` and ``system`` (for the
    report). Empty for a single loudspeaker.
    """
    plan = result.system
    if plan is None:
        return {}
    fields = {k: v for k, v in manifest_fields(result).items() if k != "routes"}
    out: dict[str, Any] = {"sys_fields_json": np.array(json.dumps(fields))}
    integ = plan.integration
    if integ is None:
        return out
    return out | {
        "sys_freq_hz": integ.freq_hz,
        "sys_summed_measured_db": plan.summed_measured_db,
        "sys_summed_baseline_db": integ.summed_baseline_db,
        "sys_summed_after_db": integ.summed_after_db,
        "sys_crossover_hz": np.array(integ.crossover_hz),
        "sys_shared_cut_db": (
            np.zeros(integ.freq_hz.size) if integ.shared_cut_db is None else integ.shared_cut_db
        ),
    }


def manifest_fields(result: DesignResult) -> dict[str, Any]:
    """Manifest fields for routes, per-output trims and the system choices."""
    names = [c.name for c in result.channels]
    fields: dict[str, Any] = {"routes": build_routes(names, sorted(result.firs), result.system)}
    if result.system is not None:
        fields["outputs"] = output_trims(result.system)
        fields["system"] = system_summary(result)
    return fields


def _samples_text(samples: dict[str, int]) -> str:
    parts = [f"{n} at {int(fs) / 1000:g} kHz" for fs, n in samples.items()]
    return "samples: " + ", ".join(parts)


def system_sentences(fields: dict[str, Any]) -> list[str]:
    """Plain-language lines on alignment and subwoofer integration.

    Parameters
    ----------
    fields : dict
        The manifest's ``outputs`` and ``system`` (:func:`manifest_fields`).
    """
    outputs = fields.get("outputs") or []
    system = fields.get("system") or {}
    if not outputs:
        return []
    where = (
        "inside the filters"
        if system.get("aligned_in_filters")
        else "NOT in the filters: set them as trims on the playback device"
    )
    c = system.get("speed_of_sound_m_s")
    lines = [
        f"Alignment ({where}); distances at {system.get('temperature_c', 20):g} °C, "
        f"c = {c} m/s (ISO 9613-1):"
    ]
    for o in outputs:
        pol = "" if o["polarity"] > 0 else ", polarity inverted"
        lines.append(
            f"  {o['name']:>6}: delay {o['delay_ms']:6.3f} ms ({_samples_text(o['delay_samples'])})"
            f" = {o['distance_m']:.3f} m, level trim {fmt_db(o['gain_db'], 2, True)}{pol}"
        )
    xo = system.get("crossover")
    if xo:
        pol = "normal" if xo["subwoofer_polarity"] > 0 else "inverted"
        f = xo["frequency_hz"]
        main_ms = [o["delay_ms"] for o in outputs if o["role"] != "sub"]
        span = (
            f"{min(main_ms):.2f}"
            if max(main_ms) - min(main_ms) < 0.005
            else (f"{min(main_ms):.2f} to {max(main_ms):.2f}")
        )
        lines.append(
            f"Subwoofer: crossover {f:.0f} Hz, Linkwitz-Riley {xo['slope_db_per_octave']} "
            "dB/octave (12, 24 and 48 dB/octave are offered); subwoofer delay "
            f"{xo['subwoofer_delay_ms']:.2f} ms (mains {span} ms), polarity {pol}. "
            "Chosen because the summed "
            f"response from {f / 2:.0f} to {2 * f:.0f} Hz is then smoothest and loudest over "
            f"all positions: {xo['summed_rms_deviation_db']:.1f} dB RMS deviation from its "
            f"mean (1/6 octave, averaged over positions and mains) against "
            f"{xo['summed_rms_deviation_no_delay_db']:.1f} dB with the same crossover but no "
            f"delay and normal polarity; deepest dip at the first position "
            f"{xo['centre_seat_deepest_dip_db']:.1f} dB. "
            f"{xo['candidates_searched']} candidates searched."
        )
        depth = xo.get("shared_cut_deepest_db", 0.0)
        if depth > 0.05:
            lines.append(
                f"Peaks that nearly every position shows in the sum around the crossover are "
                f"cut by up to {depth:.1f} dB, the same in every output (so the sum keeps the "
                "phase relation chosen above; only a cut, never a boost)."
            )
        if system.get("subwoofers"):
            lines.extend(
                subwoofer_sentences(system["subwoofers"], system.get("sub_route_gain_db", 0))
            )
            return lines
        lines.append(
            "Each main input also feeds the subwoofer output at "
            f"{fmt_db(system.get('sub_route_gain_db', 0), 2, True)} (routes in manifest.json). "
            "Respect the subwoofer's excursion limits and start quietly."
        )
    return lines
