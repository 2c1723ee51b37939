"""The figures a design reports, each with one definition, and how dB figures are written.

Every number about a design that a user reads (in the command line's summary,
the report, ``roomcorr history`` and the browser app) comes from the
``figures`` block of its ``manifest.json``, which :func:`design_figures`
computes once, when the design is written, from the per-filter safety figures
of :func:`roomcorr.design.realise.safety.apply_safety`:

``pre_gain_db``
    The common pre-gain (never positive) that brings the highest filter down
    to the ceiling (:func:`roomcorr.design.realise.safety.common_pre_gain_db`).
``largest_boost_db``
    The largest gain of any exported filter before the common pre-gain,
    anywhere from DC to Nyquist, level trims of the alignment included, never
    below 0: what the boost cap limits and the safety gate checks. (Not the
    largest value of the correction curve: that is the aim, before the
    filter's length, the alignment trims and the fit under the cap.)
``peak_gain_db``
    The largest gain of any exported filter with the pre-gain, DC to Nyquist:
    what the ceiling limits.
``worst_case_gain_db``
    ``20 log10 sum |h|`` of the worst filter: the most any input waveform can grow.
``latency_ms``
    How late sound leaves the FIR filters (0 for minimum phase).
``pre_ringing_db``
    Mixed phase only: the worst energy a filter lets out before its main
    peak, dB re the peak (:func:`roomcorr.design.phase.mixedphase.pre_ringing_db`).

Per channel the same figures are kept as the largest over that channel's
sample rates. :func:`fmt_db` writes every dB figure (never ``-0.0``).
"""

from __future__ import annotations

import math
from typing import Any

#: The figures of the ``figures`` block that are dB values, in the order they are shown.
DB_FIGURES = ("pre_gain_db", "largest_boost_db", "peak_gain_db", "worst_case_gain_db")

#: Digits kept in the manifest (a thousandth of a dB).
STORED_DIGITS = 3


def fmt_db(value: float | None, digits: int = 1, signed: bool = False, unit: bool = True) -> str:
    """Write a dB figure: rounded to ``digits``, never ``-0.0`` (a value that rounds to zero
    is written as zero), ``+`` in front of positive values when ``signed``.

    Parameters
    ----------
    value : float or None
        ``None`` (or a value that is not finite) is written as ``-``.
    digits : int
    signed : bool
    unit : bool
        Append `` dB``.

    Returns
    -------
    str
    """
    if value is None or not math.isfinite(float(value)):
        return "-"
    v = round(float(value), digits)
    if v == 0.0:
        v = 0.0  # -0.0 == 0.0: drop the sign of a negative zero
    text = f"{v:+.{digits}f}" if signed else f"{v:.{digits}f}"
    return text + (" dB" if unit else "")


def _finite(v: Any) -> float | None:
    if isinstance(v, bool) or not isinstance(v, int | float) or not math.isfinite(v):
        return None
    return float(v)


def is_filter_entry(e: dict[str, Any]) -> bool:
    """True for the manifest entry of a filter's own WAV file, which carries its safety figures.

    Entries of kind ``"fir"`` with a ``format`` (the multichannel WAV, raw float and text
    copies of the same filters, :mod:`roomcorr.deliver.system`) carry none.
    """
    return e.get("kind") == "fir" and "format" not in e


def _r(v: float) -> float:
    out = round(float(v), STORED_DIGITS)
    return 0.0 if out == 0.0 else out


def design_figures(
    fir_entries: list[dict[str, Any]], pre_gain_db: float, latency: dict[str, Any] | None = None
) -> dict[str, Any]:
    """The ``figures`` block of a manifest from its FIR file entries (the one computation).

    Parameters
    ----------
    fir_entries : list of dict
        Manifest ``files`` entries of kind ``"fir"``: ``channel_name``,
        ``peak_gain_db``, ``worst_case_gain_db``, ``max_boost_db`` (the
        per-filter figures of the safety gate). Other entries are ignored.
    pre_gain_db : float
    latency : dict, optional
        The manifest's ``latency`` record
        (:func:`roomcorr.design.phase.mixedphase.latency_record`): ``latency_ms`` and,
        for mixed phase, ``worst_pre_ringing_db`` per rate.

    Returns
    -------
    dict
        ``pre_gain_db``, ``largest_boost_db``, ``peak_gain_db``,
        ``worst_case_gain_db``, ``latency_ms``, ``pre_ringing_db`` (the worst
        measured pre-ringing of a mixed-phase design, dB re the main peak; None
        for minimum phase) and ``channels``: a list of
        ``{"name", "largest_boost_db", "peak_gain_db", "worst_case_gain_db"}``
        in file order, each the largest over that channel's rates.

    Raises
    ------
    ValueError
        When a figure is missing or not a finite number.
    """
    per: dict[str, dict[str, float]] = {}
    keys = {"largest_boost_db": "max_boost_db", "peak_gain_db": "peak_gain_db",
            "worst_case_gain_db": "worst_case_gain_db"}
    for e in fir_entries:
        if not is_filter_entry(e):
            continue
        name = str(e.get("channel_name", e.get("channel", "")))
        ch = per.setdefault(name, {})
        for out_key, in_key in keys.items():
            v = _finite(e.get(in_key))
            if v is None:
                raise ValueError(f"{e.get('path', name)}: '{in_key}' is not a finite number")
            if out_key == "largest_boost_db":
                v = max(v, 0.0)
            ch[out_key] = max(ch.get(out_key, -math.inf), v)
    latency = latency if isinstance(latency, dict) else {}
    pre = _finite(pre_gain_db)
    lat = _finite(latency.get("latency_ms", 0.0))
    worst = latency.get("worst_pre_ringing_db")
    found = worst.values() if isinstance(worst, dict) else []
    rings = [v for v in found if _finite(v) is not None]
    if pre is None or lat is None:
        raise ValueError("pre-gain or latency is not a finite number")
    channels = [{"name": n, **{k: _r(v) for k, v in f.items()}} for n, f in per.items()]
    out: dict[str, Any] = {"pre_gain_db": _r(pre)}
    for k in keys:
        out[k] = max((c[k] for c in channels), default=None)
    out["latency_ms"] = _r(lat)
    out["pre_ringing_db"] = _r(max(rings)) if rings else None
    out["channels"] = channels
    return out


def filter_rows(fir_entries: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The per-filter figures of the FIR entries (one per channel and rate), as stored.

    Returns
    -------
    list of dict
        ``name``, ``sample_rate``, ``taps``, ``largest_boost_db`` (the entry's
        ``max_boost_db``, never below 0), ``peak_gain_db``, ``worst_case_gain_db``.
    """
    rows = []
    for e in fir_entries:
        if not is_filter_entry(e):
            continue
        rows.append({
            "name": str(e.get("channel_name", e.get("channel", ""))),
            "sample_rate": e.get("sample_rate"),
            "taps": e.get("taps"),
            "largest_boost_db": max(float(e["max_boost_db"]), 0.0),
            "peak_gain_db": float(e["peak_gain_db"]),
            "worst_case_gain_db": float(e["worst_case_gain_db"]),
        })
    return rows


def figures_of_manifest(manifest: dict[str, Any]) -> dict[str, Any]:
    """The ``figures`` block of a manifest, checked; computed from its FIR entries by
    :func:`design_figures` for designs written before the block existed.

    The result also holds ``filters``: :func:`filter_rows` of the manifest's FIR
    entries (read, not stored twice), for tables with one row per filter file.

    Raises
    ------
    ValueError
        When the block (or, without one, a FIR entry) holds a value that is not a
        finite number.
    """
    block = manifest.get("figures")
    entries = [e for e in manifest.get("files", []) if isinstance(e, dict)]
    try:
        rows = filter_rows(entries)
    except (KeyError, TypeError, ValueError):
        raise ValueError("a FIR entry lacks its peak gain, worst-case gain or boost") from None
    if block is None:
        block = design_figures(entries, manifest.get("pre_gain_db", 0.0), manifest.get("latency"))
        return {**block, "filters": rows}
    if not isinstance(block, dict):
        raise ValueError("'figures' is not an object")
    for k in (*DB_FIGURES, "latency_ms", "pre_ringing_db"):
        if block.get(k) is not None and _finite(block[k]) is None:
            raise ValueError(f"figures: '{k}' is not a finite number")
    chans = block.get("channels", [])
    if not isinstance(chans, list) or not all(isinstance(c, dict) for c in chans):
        raise ValueError("figures: 'channels' is not a list of objects")
    for c in chans:
        for k in DB_FIGURES[1:]:
            if _finite(c.get(k)) is None:
                raise ValueError(f"figures: channel '{k}' is not a finite number")
    return {**block, "filters": rows}
