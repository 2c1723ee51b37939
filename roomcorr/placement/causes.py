"""A physical cause, in plain words, for each significant peak and each withheld dip.

Pure functions (no I/O). The candidates, tried in this order for a dip and
scored by how well their frequency agrees:

* **boundary interference**: a loudspeaker ``d`` from a surface meets its mirror
  image; on the surface's normal far away the path differs by ``2d`` and the
  first notch is at ``c / (4d)``, the next ones at odd multiples (common
  practice; the image source of Allen and Berkley 1979). At the seat the path
  difference is that of the image, ``Δ``, and the notches fall at
  ``(2k + 1) c / (2Δ)``. The cause is *confirmed* when the measured impulse
  response holds a reflection at the delay ``Δ / c`` after the direct sound;
* **room mode**: a mode of the rectangular room (Rayleigh's formula) within
  1/12 octave of a peak, strongly excited by the loudspeaker and heard at the
  seat; for a dip, a strong mode whose pressure at the seat is near a node;
* **cancellation between positions**: the dip is much deeper at some measured
  positions than at others (a local interference that moves with the seat);
* **unknown**.

References
----------
.. [1] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
.. [2] H. Kuttruff, *Room Acoustics*, 5th ed., 2009, ch. 3 (Rayleigh's mode frequencies).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy.signal import butter, find_peaks, sosfiltfilt

from roomcorr.physics import C_SOUND_M_S, first_order_reflections, mode_grid

#: Surfaces in the layout's coordinates, in the order of the image counts.
SURFACES = ("left wall", "right wall", "front wall", "back wall", "floor", "ceiling")
#: Axis names of the layout for the modes.
DIMENSIONS = ("width", "length", "height")
#: A peak must stand this far above the band's median, dB.
PEAK_MIN_DB = 4.0
#: A withheld dip counts from this much withheld boost, dB.
DIP_MIN_DB = 3.0
#: Frequency agreement accepted for a boundary notch (relative) and a mode (octaves).
BOUNDARY_TOL = 0.12
MODE_TOL_OCT = 1.0 / 12.0
#: A reflection confirms a boundary notch if found within this of the expected delay, s.
DELAY_TOL_S = 0.0004
#: Only surfaces this close to the loudspeaker make a boundary notch of their own (farther
#: ones are part of the room's modes), m (common practice).
NEAR_SURFACE_M = 1.5
#: Highest odd multiple of c/(4d) looked at.
MAX_ODD_MULTIPLE = 3
#: Modes named as a cause: at most this many half-waves in all (low-order modes stand alone;
#: above them the modes overlap).
MAX_MODE_ORDER = 4
#: At most this many peaks and this many dips per channel (the largest).
MAX_PER_KIND = 4
#: Spread between positions (dB) above which a dip counts as a local cancellation.
SPREAD_DB = 6.0
#: Highest frequency of a cause, Hz (the modal range).
TOP_HZ = 300.0


def features(
    freq_hz: np.ndarray,
    average_db: np.ndarray,
    withheld_db: np.ndarray,
    band_hz: tuple[float, float],
) -> list[dict]:
    """Significant peaks and withheld dips of one channel in its correction band.

    Returns
    -------
    list of dict
        ``kind`` (``"peak"`` or ``"dip"``), ``freq_hz``, ``size_db`` (height above
        the band's median, or the boost withheld), sorted by frequency.
    """
    f = np.asarray(freq_hz, float)
    band = (f >= band_hz[0]) & (f <= min(band_hz[1], TOP_HZ))
    if band.sum() < 5:
        return []
    idx = np.flatnonzero(band)
    level = np.asarray(average_db, float)[idx]
    rel = level - np.median(level)
    peaks, dips = [], []
    for p in find_peaks(rel, prominence=PEAK_MIN_DB / 2)[0]:
        if rel[p] >= PEAK_MIN_DB:
            peaks.append({"kind": "peak", "freq_hz": float(f[idx[p]]), "size_db": float(rel[p])})
    w = np.asarray(withheld_db, float)[idx]
    for p in find_peaks(np.concatenate([[0.0], w, [0.0]]), prominence=1.0)[0]:
        if w[p - 1] >= DIP_MIN_DB:
            dips.append({"kind": "dip", "freq_hz": float(f[idx[p - 1]]),
                         "size_db": float(w[p - 1])})
    keep = [sorted(x, key=lambda x: -x["size_db"])[:MAX_PER_KIND] for x in (peaks, dips)]
    return sorted(keep[0] + keep[1], key=lambda x: x["freq_hz"])


def reflection_delays_s(ir: np.ndarray, fs: int, max_delay_s: float = 0.015) -> list[float]:
    """Delays after the direct sound of the strong early reflections in one impulse response.

    The response is band-passed to 500 Hz - 4 kHz (where reflections are short),
    its envelope (magnitude) searched for peaks within 20 dB of the direct sound's.
    """
    top = min(4000.0, 0.45 * fs)
    sos = butter(4, (500.0, top), "bandpass", fs=fs, output="sos")
    x = np.abs(sosfiltfilt(sos, np.asarray(ir, float)))
    d = int(np.argmax(x))
    seg = x[d: d + int(max_delay_s * fs)]
    if seg.size < 3:
        return []
    peaks, _ = find_peaks(seg, height=seg[0] * 0.1, distance=max(1, int(0.0003 * fs)))
    return [float(p / fs) for p in peaks if p / fs > 0.0003]


def _mode_shape(labels: np.ndarray, dims: np.ndarray, pos: np.ndarray) -> np.ndarray:
    return np.prod(np.cos(np.pi * labels / dims * pos), axis=1)


def _ordinal(n: int) -> str:
    return {1: "1st", 2: "2nd", 3: "3rd"}.get(n, f"{n}th")


def _mode_words(label: Sequence[int]) -> str:
    parts = [f"{_ordinal(int(n))} {DIMENSIONS[a]}" for a, n in enumerate(label) if n]
    if len(parts) == 1:
        return f"the {parts[0]} mode"
    return "the mode " + " x ".join(f"({p})" for p in parts)


def explain(
    feature: dict,
    speaker_m: np.ndarray | None = None,
    seat_m: np.ndarray | None = None,
    size_m: np.ndarray | None = None,
    reflections_s: Sequence[float] = (),
    spread_db: float = 0.0,
    c: float = C_SOUND_M_S,
) -> dict:
    """The most likely cause of one peak or dip, with its evidence.

    Parameters
    ----------
    feature : dict
        From :func:`features`.
    speaker_m, seat_m, size_m : ndarray (3,), optional
        The layout (layout coordinates); without it only the measurement speaks.
    reflections_s : sequence of float
        Delays of the reflections found in the measured response (:func:`reflection_delays_s`).
    spread_db : float
        Spread between the measured positions at the feature's frequency, dB.
    c : float

    Returns
    -------
    dict
        ``cause`` (``"boundary"``, ``"mode"``, ``"positions"``, ``"unknown"``),
        ``text`` (plain words) and ``evidence`` (numbers), plus the feature's keys.
    """
    f0 = float(feature["freq_hz"])
    out = dict(feature)
    have_layout = speaker_m is not None and seat_m is not None and size_m is not None
    refl = [float(r) for r in reflections_s]
    if feature["kind"] == "dip" and have_layout:
        best = None
        for r in first_order_reflections(np.asarray(speaker_m), np.asarray(seat_m),
                                         np.asarray(size_m), c):
            d = r["distance_m"]
            if d > NEAR_SURFACE_M:
                continue
            delta_path = c * r["delay_after_direct_s"]  # image path minus direct path
            for k in range((MAX_ODD_MULTIPLE + 1) // 2):
                f_seat = (2 * k + 1) * c / (2.0 * delta_path) if delta_path > 0 else np.inf
                err = abs(f0 / f_seat - 1.0)
                if err <= BOUNDARY_TOL and (best is None or err < best[0]):
                    best = (err, r, k, f_seat)
        if best is not None:
            err, r, k, f_seat = best
            d = r["distance_m"]
            expected = r["delay_after_direct_s"]
            found = [x for x in refl if abs(x - expected) <= DELAY_TOL_S]
            surface = SURFACES[r["wall"]]
            out.update(
                cause="boundary",
                surface=surface,
                distance_m=round(d, 3),
                evidence={
                    "quarter_wave_hz": round(c / (4 * d), 1),
                    "notch_at_seat_hz": round(f_seat, 1),
                    "odd_multiple": 2 * k + 1,
                    "agreement_pct": round(100 * err, 1),
                    "reflection_expected_ms": round(1000 * expected, 2),
                    "reflection_measured_ms": round(1000 * found[0], 2) if found else None,
                },
            )
            conf = (f"; the measured response shows its reflection {1000 * found[0]:.1f} ms "
                    "after the direct sound") if found else (
                    "; its reflection was not found in the measured response")
            mult = "" if k == 0 else f" ({2 * k + 1} x c/(4d))"
            out["text"] = (
                f"{f0:.0f} Hz dip: boundary interference from the {surface}, {d:.2f} m "
                f"from the loudspeaker: its reflection cancels the direct sound near "
                f"{f_seat:.0f} Hz{mult}{conf}. Moving the loudspeaker nearer to or further "
                "from that surface moves the dip; boosting cannot fill it."
            )
            return out
    if have_layout and f0 <= TOP_HZ:
        dims = np.asarray(size_m, float)
        labels, mode_hz = mode_grid(dims, c, f0 * 2 ** MODE_TOL_OCT)
        near = (np.abs(np.log2(mode_hz / f0)) <= MODE_TOL_OCT) & (
            labels.sum(axis=1) <= MAX_MODE_ORDER)
        if near.any():
            lab, fm = labels[near], mode_hz[near]
            src = _mode_shape(lab, dims, np.asarray(speaker_m, float))
            seat = _mode_shape(lab, dims, np.asarray(seat_m, float))
            n_axes = (lab != 0).sum(axis=1)
            if feature["kind"] == "peak":
                score = np.abs(src * seat) / n_axes
            else:  # excited by the loudspeaker, but the seat near its node
                score = np.abs(src) * (1.0 - np.abs(seat)) / n_axes
            i = int(np.argmax(score))
            if score[i] > 0.15:
                words = _mode_words(lab[i])
                dim_words = ", ".join(f"{DIMENSIONS[a]} {dims[a]:.2f} m"
                                      for a in range(3) if lab[i][a])
                agree = 100 * (f0 / fm[i] - 1.0)
                out.update(
                    cause="mode",
                    mode=[int(v) for v in lab[i]],
                    evidence={
                        "rayleigh_hz": round(float(fm[i]), 1),
                        "agreement_pct": round(float(agree), 1),
                        "dimensions": dim_words,
                        "at_seat": round(float(seat[i]), 2),
                        "at_loudspeaker": round(float(src[i]), 2),
                    },
                )
                if feature["kind"] == "peak":
                    out["text"] = (
                        f"{f0:.0f} Hz peak: {words} of the room ({dim_words}), "
                        f"{fm[i]:.0f} Hz by Rayleigh's formula (measured {agree:+.0f} %), "
                        "strongly excited by the loudspeaker and heard at the seat."
                    )
                else:
                    out["text"] = (
                        f"{f0:.0f} Hz dip: the seat sits near a null of {words} "
                        f"({fm[i]:.0f} Hz by Rayleigh's formula, {dim_words}); moving the seat "
                        "along that dimension changes it, boosting cannot."
                    )
                return out
    if feature["kind"] == "dip" and spread_db >= SPREAD_DB:
        out.update(cause="positions", evidence={"spread_db": round(float(spread_db), 1)})
        out["text"] = (
            f"{f0:.0f} Hz dip: cancellation that differs between the measured positions "
            f"(they disagree by {spread_db:.0f} dB there); it moves with the seat."
        )
        return out
    if feature["kind"] == "dip" and not have_layout and refl:
        # Without a layout: a strong early reflection of delay t puts a notch at 1/(2t).
        for t in refl:
            if c * t / 2.0 > NEAR_SURFACE_M:
                continue
            for k in range((MAX_ODD_MULTIPLE + 1) // 2):
                f_n = (2 * k + 1) / (2.0 * t)
                if abs(f0 / f_n - 1.0) <= BOUNDARY_TOL:
                    d = c * t / 2.0
                    out.update(cause="boundary", surface=None, distance_m=round(d, 3),
                               evidence={"reflection_measured_ms": round(1000 * t, 2),
                                         "notch_hz": round(f_n, 1), "odd_multiple": 2 * k + 1})
                    out["text"] = (
                        f"{f0:.0f} Hz dip: a reflection {1000 * t:.1f} ms after the direct "
                        f"sound (a surface about {d:.2f} m from the loudspeaker) cancels it "
                        "there; a room layout would name the surface."
                    )
                    return out
    out.update(cause="unknown", evidence={})
    what = "peak" if feature["kind"] == "peak" else "dip"
    hint = "" if have_layout else " (give the room's layout to look for room modes and walls)"
    out["text"] = f"{f0:.0f} Hz {what}: cause unknown{hint}."
    return out
