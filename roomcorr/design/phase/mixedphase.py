"""Mixed-phase correction filters: the minimum-phase design times an inverse all-pass.

A minimum-phase filter corrects only what is minimum phase. A loudspeaker's
crossover adds an all-pass part (its excess phase, see
:mod:`roomcorr.design.phase.excess_phase`); its inverse is anticausal and becomes
realisable only with a delay. This module takes the finished minimum-phase
filter ``h_min`` of a channel and multiplies its spectrum by the inverse of
the excess phase the loudspeaker shows at every measured position::

    H_mixed(ω) = H_min(ω) · exp(j φ_c(ω)) · exp(-j ω D),   φ_c(ω) = ∫_0^ω τ_e(ω') dω'

where ``τ_e`` is the excess group delay to remove (relative to its median in
the treble, so the treble and the main peak stay at the latency ``D``) and
``D`` is the latency budget in samples. ``|H_mixed| = |H_min|``: only the
phase changes, so the curve, the boost cap and the ceiling are the
minimum-phase design's (and the safety step runs on the final filters as
before). The filter is ``D`` samples longer than ``h_min``, so none of it is
lost. A real filter's phase at Nyquist is a multiple of π; the estimate's
integral is not, and the missing part is added above the estimated range
(:func:`closing_group_delay`).

The magnitude correction itself, being minimum phase, has a group delay of
its own, which adds to the direct sound's (room-driven cuts a sixth of an
octave wide and narrower: through the minimum-phase design the direct sound's
group delay varies by ±0.6 to ±0.86 ms from 300 Hz to 10 kHz in the
benchmark's simulated rooms). With ``own_from_hz`` (the design uses
``OWN_FLAT_FROM_HZ`` = 300 Hz) that is taken out too: the group delay
removed becomes ``τ_e + w(f)·(τ_own(f) − τ_own,ref)``, where ``τ_own`` is the minimum-phase
filter's group delay read the way the direct sound's is judged
(:func:`windowed_group_delay_s`: 4 ms before to 16 ms after the main peak,
``|H|²``-weighted over 1/12 octave), ``w`` rises from 0 an octave below
``own_from_hz`` to 1 at it (sin² on log frequency: the blend is smooth in
group delay), and the bass below keeps its minimum phase (the room owns it).
The filter times the loudspeaker's all-pass part then aims at the phase
``−ω·const`` there (the loudspeaker's own minimum-phase part, such as its
bass roll-off, stays: about 0.09 ms at 300 Hz for a 35 Hz high-pass). A
window mixes neighbouring frequencies, so the realised filter's windowed group
delay is read once more and the remainder removed (``OWN_REFINE_ROUNDS``).
Flattening narrow features needs energy before the main peak (a group-delay
feature Δf wide spreads over about 1/Δf on both sides); the pre-ringing limit
below bounds it, and if the magnitude then strays beyond tolerance the
flattening is weakened first (:func:`within_tolerance`), the loudspeaker's
excess phase last.

Realising it: the product is transformed back on an FFT long enough that
nothing wraps into the filter, the main peak is placed at (or before) ``D``,
anything more than ``D`` before it is dropped (it would lie before time
zero), and the far pre-ringing is tapered: energy more than
``PRE_RING_S`` before the main peak is held at or below
``PRE_RING_LIMIT_DB`` relative to the filter's total energy (a rising
half-Hann over the first ``PRE_RING_FADE_FRACTION`` of that region from time
zero, then a scale-down if still needed; pre-echo is
masked only briefly, see REFERENCES.md). A few rounds of restoring
``|H_min|`` and re-applying these time limits keep the magnitude within
``MAGNITUDE_TOLERANCE_DB`` of ``|H_min|``; the limits are applied last, so
they always hold. Should the magnitude still differ by more, the correction
is weakened step by step (:func:`within_tolerance`), down to none.

References
----------
.. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
       3rd ed., Pearson, 2010, ch. 5.6 (minimum-phase/all-pass
       decomposition, the inverse of an all-pass) and ch. 7 (windowing).
.. [2] R. W. Gerchberg and W. O. Saxton, "A practical algorithm for the
       determination of phase from image and diffraction plane pictures",
       Optik 35, 1972 (alternating projections between a magnitude and a
       time-domain constraint).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from roomcorr.design.phase.excess_phase import (
    REFERENCE_BAND_HZ,
    ExcessPhaseEstimate,
    direct_sound_segment,
    estimate_excess_phase,
    excess_gd_on_bins,
)
from roomcorr.errors import SettingsError

#: Energy more than this long before the main peak counts as far pre-ringing, s.
PRE_RING_S = 0.002
#: Far pre-ringing may hold at most this much of the filter's energy, dB.
PRE_RING_LIMIT_DB = -40.0
#: The scale-down aims this far inside the limit, dB.
PRE_RING_MARGIN_DB = 0.5
#: The far region fades in (rising half-Hann) over this fraction of its length, from time zero.
PRE_RING_FADE_FRACTION = 0.25
#: Rounds of magnitude restoration.
RESTORE_ROUNDS = 3
#: Magnitude of the mixed filter against the minimum-phase one (20 Hz - 20 kHz), dB.
MAGNITUDE_TOLERANCE_DB = 0.1
#: Fractions of the excess group delay tried, in turn, to keep the magnitude in tolerance.
CORRECTION_STRENGTHS = (1.0, 0.75, 0.5, 0.25, 0.0)
#: The filter's own group delay is flattened fully from this frequency up, Hz ...
OWN_FLAT_FROM_HZ = 300.0
#: ... fading in (sin² on a log-frequency scale) over this many octaves below it.
OWN_FLAT_FADE_OCT = 1.0
#: Rounds of correcting the flattening by what the realised filter still shows.
OWN_REFINE_ROUNDS = 1
#: The direct sound's group delay is judged on this window around its main peak: s before, s after.
GD_WINDOW_S = (0.004, 0.016)
#: ... and smoothed (power-weighted) over this width, octaves.
GD_WIDTH_OCT = 1.0 / 12.0
LATENCY_CAUTION = (
    "Sound through mixed-phase filters is late by the latency: delay the picture of a video "
    "by the same amount (lip-sync), and keep minimum-phase filters for live monitoring, "
    "playing along or anything else where the delay is heard."
)


@dataclass
class MixedPhaseStats:
    """Figures of one mixed-phase filter (before the common pre-gain)."""

    channel: int
    fs: int
    latency_samples: int
    peak_index: int
    pre_ringing_db: float
    magnitude_error_db: float
    strength: float = 1.0
    flat_strength: float = 0.0


@dataclass
class MixedPhaseDesign:
    """What the mixed-phase step produced for a design.

    Attributes
    ----------
    latency_ms : float
        The latency budget asked for.
    latency_samples : dict of int to int
        The delay in samples at each output rate (``round(latency_ms · fs / 1000)``).
    estimates : list of ExcessPhaseEstimate
        One per channel.
    min_phase_firs : dict of int to ndarray, shape (n_channels, n_taps)
        The minimum-phase filters the mixed ones were made from (before pre-gain).
    stats : list of MixedPhaseStats
    views : list of dict
        Per channel: the direct sound before and after (see :func:`direct_sound_views`).
    """

    latency_ms: float
    latency_samples: dict[int, int]
    estimates: list[ExcessPhaseEstimate]
    min_phase_firs: dict[int, np.ndarray]
    stats: list[MixedPhaseStats] = field(default_factory=list)
    views: list[dict[str, np.ndarray]] = field(default_factory=list)

    def latency_ms_at(self, fs: int) -> float:
        """The exact latency at rate ``fs`` in ms (whole samples)."""
        return 1000.0 * self.latency_samples[fs] / fs


def latency_samples(latency_ms: float, fs: int) -> int:
    """The latency in whole samples at ``fs``."""
    return int(round(latency_ms * fs / 1000.0))


def correction_phase(bins_hz: np.ndarray, excess_gd_s: np.ndarray) -> np.ndarray:
    """Phase (rad) of the inverse all-pass: the running integral of the excess group delay.

    Parameters
    ----------
    bins_hz : ndarray, shape (n_bins,)
        Equally spaced frequencies from 0 Hz (rfft bins).
    excess_gd_s : ndarray, shape (n_bins,)
        Excess group delay to remove at those bins, s.

    Returns
    -------
    phase : ndarray, shape (n_bins,)
        ``φ_c(ω) = ∫_0^ω τ_e dω'`` (trapezoid rule); its group delay
        ``-dφ_c/dω`` is ``-τ_e``.
    """
    omega = 2 * np.pi * np.asarray(bins_hz, dtype=float)
    tau = np.asarray(excess_gd_s, dtype=float)
    steps = 0.5 * (tau[1:] + tau[:-1]) * np.diff(omega)
    return np.concatenate([[0.0], np.cumsum(steps)])


def closing_group_delay(bins_hz: np.ndarray, end_phase: float, top_hz: float) -> np.ndarray:
    """Extra group delay above ``top_hz`` that brings the phase at Nyquist to a multiple of π.

    A real filter's phase at Nyquist is a multiple of π. An estimated excess
    group delay integrates to any phase; left so, the whole treble would be
    turned by a constant angle, and a constant phase turn is a Hilbert
    transform, whose kernel decays only as 1/n on both sides of the peak
    (long pre-ringing, a large worst-case gain). The missing phase (at most
    π/2) is added as a sin²-shaped group-delay bump between ``top_hz`` (at
    most 0.45 fs) and Nyquist, where the loudspeaker's phase was not corrected.

    Parameters
    ----------
    bins_hz : ndarray, shape (n_bins,)
        rfft bins from 0 Hz to Nyquist.
    end_phase : float
        Phase of the correction at Nyquist before closing, rad.
    top_hz : float

    Returns
    -------
    ndarray, shape (n_bins,)
        Group delay to add (s); zero at and below ``top_hz``.
    """
    nyq = float(bins_hz[-1])
    f_top = min(float(top_hz), 0.45 * 2 * nyq)
    missing = np.pi * np.round(end_phase / np.pi) - end_phase
    x = np.clip((bins_hz - f_top) / (nyq - f_top), 0.0, 1.0)
    bump = np.sin(np.pi * x) ** 2
    area = float(correction_phase(bins_hz, bump)[-1])
    return np.zeros_like(bins_hz) if area <= 0 else bump * (missing / area)


def pre_ringing_db(h: np.ndarray, fs: int, peak_index: int | None = None) -> float:
    """Energy more than ``PRE_RING_S`` before the main peak, relative to the total, dB.

    Parameters
    ----------
    h : ndarray, shape (n_taps,)
    fs : int
    peak_index : int, optional
        Main peak; the largest ``|h|`` if omitted.

    Returns
    -------
    float
        ``10 log10(Σ_{n < peak - PRE_RING_S fs} h² / Σ h²)``; ``-inf`` when there is none.
    """
    h = np.asarray(h, dtype=float)
    p = int(np.argmax(np.abs(h))) if peak_index is None else int(peak_index)
    edge = p - int(round(PRE_RING_S * fs))
    total = float(np.sum(h**2))
    far = float(np.sum(h[: max(edge, 0)] ** 2))
    if total <= 0 or far <= 0:
        return float("-inf")
    return 10.0 * np.log10(far / total)


def _limit_time(y: np.ndarray, fs: int, n_taps: int, latency: int) -> tuple[np.ndarray, int]:
    """Cut to ``n_taps``, put the peak at or before ``latency``, taper the far pre-ringing.

    No fade at the end is needed: the minimum-phase filter's own tail fade
    ends there (the output is ``latency`` samples longer than it).

    ``y`` is a long (FFT-length) response whose intended time zero is sample
    0; samples in its second half are wrapped anticausal parts and dropped.
    """
    h = np.array(y[:n_taps], dtype=float)
    p = int(np.argmax(np.abs(h)))
    if p > latency:  # keep the main peak within the budget
        h = np.concatenate([h[p - latency :], np.zeros(p - latency)])
        p = latency
    edge = p - int(round(PRE_RING_S * fs))
    if edge > 0:
        n_fade = max(1, int(round(PRE_RING_FADE_FRACTION * edge)))
        k = np.arange(n_fade)
        h[:n_fade] *= 0.5 * (1 - np.cos(np.pi * (k + 1) / (n_fade + 1)))
        total = float(np.sum(h**2))
        far = float(np.sum(h[:edge] ** 2))
        limit = 10 ** ((PRE_RING_LIMIT_DB - PRE_RING_MARGIN_DB) / 10)
        if total > 0 and far > limit * total:
            # scale the far part by g so that g² far = limit (total - far + g² far)
            near = total - far
            g2 = limit * near / (far * (1 - limit))
            h[:edge] *= np.sqrt(g2)
    return h, p


def windowed_group_delay_s(h: np.ndarray, fs: int, freq_hz: np.ndarray) -> np.ndarray:
    """Group delay of the first milliseconds of ``h`` around its main peak, s.

    The definition of the direct sound's group delay used throughout (the
    benchmark's figure reads it the same way): ``GD_WINDOW_S[0]`` before to
    ``GD_WINDOW_S[1]`` after the largest sample, a half-Hann fade over the last
    quarter of the part after the peak; ``-dφ/dω`` from the phase step between
    neighbouring bins of an FFT of at least 2**16 points, ``|H|²``-weighted
    over ``GD_WIDTH_OCT`` (:func:`smoothed_group_delay_s`), relative to the
    main peak. A window of 20 ms holds six periods of 300 Hz.

    Parameters
    ----------
    h : ndarray, shape (n_taps,)
    fs : int
    freq_hz : ndarray, shape (n_freqs,)

    Returns
    -------
    ndarray, shape (n_freqs,)
    """
    h = np.asarray(h, dtype=float)
    p = int(np.argmax(np.abs(h)))
    a = max(0, p - int(round(GD_WINDOW_S[0] * fs)))
    b = min(h.size, p + int(round(GD_WINDOW_S[1] * fs)))
    seg = h[a:b].copy()
    n_tail = max(1, (b - p) // 4)
    k = np.arange(1, n_tail + 1)
    seg[seg.size - n_tail :] *= 0.5 * (1 + np.cos(np.pi * k / (n_tail + 1)))
    gd = smoothed_group_delay_s(seg, fs, freq_hz, GD_WIDTH_OCT, min_fft=1 << 16)
    return gd - (p - a) / fs


def own_flat_weight(freq_hz: np.ndarray, from_hz: float) -> np.ndarray:
    """How much of the filter's own group delay is flattened: 0 below ``from_hz``
    ``/ 2**OWN_FLAT_FADE_OCT``, 1 from ``from_hz`` up, sin² on log frequency between."""
    x = np.log2(np.maximum(np.asarray(freq_hz, dtype=float), 1e-9) / from_hz)
    x = np.clip(1.0 + x / OWN_FLAT_FADE_OCT, 0.0, 1.0)
    return np.sin(0.5 * np.pi * x) ** 2


def own_group_delay_to_remove(
    h_min: np.ndarray, fs: int, freq_hz: np.ndarray, from_hz: float, top_hz: float
) -> np.ndarray:
    """The minimum-phase filter's own group delay, to be removed above ``from_hz``.

    Its windowed group delay (:func:`windowed_group_delay_s`) relative to its
    median from ``REFERENCE_BAND_HZ[0]`` to ``top_hz``, times
    :func:`own_flat_weight`, held at its ``top_hz`` value above.

    Returns
    -------
    ndarray, shape (n_freqs,)
        Group delay (s) on ``freq_hz``.
    """
    freq_hz = np.asarray(freq_hz, dtype=float)
    top = min(float(top_hz), 0.45 * fs)
    gd = windowed_group_delay_s(h_min, fs, np.minimum(freq_hz, top))
    ref_band = (freq_hz >= REFERENCE_BAND_HZ[0]) & (freq_hz <= top)
    ref = float(np.median(gd[ref_band])) if np.any(ref_band) else 0.0
    return own_flat_weight(freq_hz, from_hz) * (gd - ref)


def magnitude_error_db(h: np.ndarray, h_ref: np.ndarray, fs: int) -> float:
    """Largest ``|20 log10 |H| / |H_ref||`` from 20 Hz to 20 kHz (or Nyquist), dB.

    Evaluated on the bins of an FFT four times the longer filter's length.
    """
    return _magnitude_check(h_ref, max(len(h), len(h_ref)), fs)(h)


def _magnitude_check(h_ref: np.ndarray, n: int, fs: int) -> Callable[[np.ndarray], float]:
    """:func:`magnitude_error_db` against ``h_ref`` for filters of at most ``n`` taps,
    with ``|H_ref|`` computed once."""
    n_fft = 1 << int(np.ceil(np.log2(4 * max(n, len(h_ref)))))
    f = np.fft.rfftfreq(n_fft, 1.0 / fs)
    sel = (f >= 20.0) & (f <= min(20000.0, 0.5 * fs))
    tiny = np.finfo(float).tiny
    b = np.maximum(np.abs(np.fft.rfft(h_ref, n_fft))[sel], tiny)

    def error_db(h: np.ndarray) -> float:
        a = np.maximum(np.abs(np.fft.rfft(h, n_fft))[sel], tiny)
        return float(np.max(np.abs(20 * np.log10(a / b))))

    return error_db


def mixed_phase_fir(
    h_min: np.ndarray,
    fs: int,
    est_freq_hz: np.ndarray,
    excess_gd_s: np.ndarray,
    latency: int,
    rounds: int = RESTORE_ROUNDS,
    top_hz: float = 16000.0,
    own_from_hz: float | None = None,
    strength: float = 1.0,
) -> tuple[np.ndarray, int]:
    """Turn a minimum-phase filter into a mixed-phase one that removes an excess group delay.

    Parameters
    ----------
    h_min : ndarray, shape (n_taps,)
        The minimum-phase correction filter at ``fs``.
    fs : int
    est_freq_hz, excess_gd_s : ndarray, shape (n_freqs,)
        Excess group delay to remove (s) on a log grid, held at both ends.
    latency : int
        Latency budget in samples; the main peak lands at or before it.
    rounds : int
        Magnitude restorations (0: none).
    top_hz : float
        Top of the estimated range; the phase is closed above it
        (:func:`closing_group_delay`).
    own_from_hz : float, optional
        Also remove ``h_min``'s own group delay from this frequency up
        (:func:`own_group_delay_to_remove`), so that the filter adds a flat
        group delay there; ``None`` leaves it (the phase part is then the
        inverse all-pass alone).
    strength : float
        Fraction of the whole group delay to remove (0: a pure delay).

    Returns
    -------
    h : ndarray, shape (n_taps + latency,)
        ``h_min`` delayed by ``latency`` and turned by the inverse all-pass,
        so its whole length is kept: the main peak at or before
        ``latency``, nothing before time zero, far pre-ringing at most
        ``PRE_RING_LIMIT_DB``.
    peak_index : int

    References
    ----------
    .. [1] Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed., ch. 5.6.
    .. [2] Gerchberg & Saxton, Optik 35, 1972.
    """
    h_min = np.asarray(h_min, dtype=float)
    latency = int(latency)
    if not 0 <= latency < h_min.size:
        raise ValueError(f"latency {latency} samples must lie in [0, {h_min.size})")
    excess = np.asarray(excess_gd_s, dtype=float)
    if own_from_hz is None:
        return _realise(h_min, fs, est_freq_hz, strength * excess, latency, rounds, top_hz)
    own, h, p = flattening_group_delay(
        h_min, fs, est_freq_hz, excess, latency, own_from_hz, top_hz, rounds
    )
    if strength != 1.0:
        h, p = _realise(h_min, fs, est_freq_hz, strength * (excess + own), latency, rounds, top_hz)
    return h, p


def _realise(
    h_min: np.ndarray,
    fs: int,
    est_freq_hz: np.ndarray,
    remove_gd_s: np.ndarray,
    latency: int,
    rounds: int,
    top_hz: float,
) -> tuple[np.ndarray, int]:
    """``h_min`` delayed by ``latency`` with ``remove_gd_s`` taken out of its group delay,
    under the time limits, its magnitude restored ``rounds`` times."""
    n_taps = h_min.size
    n_out = n_taps + latency
    # room for the output, the anticausal part beyond the latency (dropped) and margin
    n_fft = 1 << int(np.ceil(np.log2(n_out + 2 * latency + n_taps // 4)))
    bins_hz = np.fft.rfftfreq(n_fft, 1.0 / fs)
    tau = excess_gd_on_bins(est_freq_hz, remove_gd_s, bins_hz)
    tau = tau + closing_group_delay(bins_hz, correction_phase(bins_hz, tau)[-1], top_hz)
    phase = correction_phase(bins_hz, tau) - 2 * np.pi * bins_hz * latency / fs
    target = np.fft.rfft(h_min, n_fft)
    mag = np.abs(target)
    y = np.fft.irfft(target * np.exp(1j * phase), n_fft)
    h, p = _limit_time(y, fs, n_out, latency)
    for _ in range(rounds):
        spec = np.fft.rfft(h, n_fft)
        a = np.abs(spec)
        unit = np.where(a > 0, spec / np.where(a > 0, a, 1.0), np.exp(1j * phase))
        y = np.fft.irfft(mag * unit, n_fft)
        h, p = _limit_time(y, fs, n_out, latency)
    return h, p


def flattening_group_delay(
    h_min: np.ndarray,
    fs: int,
    est_freq_hz: np.ndarray,
    excess_gd_s: np.ndarray,
    latency: int,
    from_hz: float,
    top_hz: float,
    rounds: int = RESTORE_ROUNDS,
) -> tuple[np.ndarray, np.ndarray, int]:
    """The filter's own group delay to remove so that the realised filter's is flat.

    Starts from :func:`own_group_delay_to_remove` and corrects it
    ``OWN_REFINE_ROUNDS`` times by what the realised filter (time limits and
    all) still shows: its windowed group delay (:func:`windowed_group_delay_s`)
    against the wanted one, ``-excess_gd_s`` plus a constant, weighted by
    :func:`own_flat_weight`. The windowed group delay of a filter with
    narrow features is not its smoothed group delay minus what is removed
    (the window mixes neighbouring frequencies), hence the correction.

    Returns
    -------
    own_gd_s : ndarray, shape (n_freqs,)
        Group delay to remove on top of ``excess_gd_s``, s.
    h : ndarray, shape (n_taps + latency,)
        The filter realised with ``excess_gd_s + own_gd_s`` removed.
    peak_index : int
    """
    freq_hz = np.asarray(est_freq_hz, dtype=float)
    top = min(float(top_hz), 0.45 * fs)
    weight = own_flat_weight(freq_hz, from_hz)
    ref_band = (freq_hz >= REFERENCE_BAND_HZ[0]) & (freq_hz <= top)
    own = own_group_delay_to_remove(h_min, fs, freq_hz, from_hz, top_hz)
    for _ in range(OWN_REFINE_ROUNDS):
        # only its group delay is read here: no magnitude restoration needed
        h, _ = _realise(h_min, fs, freq_hz, excess_gd_s + own, latency, 0, top_hz)
        left = windowed_group_delay_s(h, fs, np.minimum(freq_hz, top)) + excess_gd_s
        if np.any(ref_band):
            left = left - float(np.median(left[ref_band]))
        own = own + weight * left
    h, p = _realise(h_min, fs, freq_hz, excess_gd_s + own, latency, rounds, top_hz)
    return own, h, p


def within_tolerance(
    h_min: np.ndarray,
    fs: int,
    est_freq_hz: np.ndarray,
    excess_gd_s: np.ndarray,
    latency: int,
    top_hz: float,
    own_from_hz: float | None = None,
) -> tuple[np.ndarray, int, float, float, float]:
    """:func:`mixed_phase_fir`, weakened until the magnitude stays within tolerance.

    If the time limits (latency, pre-ringing) cost more than
    ``MAGNITUDE_TOLERANCE_DB`` of magnitude, the flattening of the filter's own
    group delay (with ``own_from_hz``) is scaled by each of
    ``CORRECTION_STRENGTHS`` in turn, and then, without it, the excess group
    delay; at strength 0 for both the result is the minimum-phase filter
    delayed by the latency, which always fits.

    Returns
    -------
    h : ndarray, shape (n_taps + latency,)
    peak_index : int
    strength : float
        The fraction of the excess group delay that was removed.
    flat_strength : float
        The fraction of the filter's own group delay that was removed above
        ``own_from_hz`` (0 without it).
    magnitude_error_db : float
        Largest magnitude difference to ``h_min``, 20 Hz - 20 kHz.
    """
    excess = np.asarray(excess_gd_s, dtype=float)
    error_db = _magnitude_check(h_min, h_min.size + int(latency), fs)
    if own_from_hz is not None:
        own, h, p = flattening_group_delay(
            h_min, fs, est_freq_hz, excess, latency, own_from_hz, top_hz
        )
        for flat in CORRECTION_STRENGTHS[:-1]:
            if flat != 1.0:
                h, p = _realise(
                    h_min, fs, est_freq_hz, excess + flat * own, latency, RESTORE_ROUNDS, top_hz
                )
            err = error_db(h)
            if err <= MAGNITUDE_TOLERANCE_DB:
                return h, p, 1.0, float(flat), err
    for strength in CORRECTION_STRENGTHS:
        h, p = _realise(h_min, fs, est_freq_hz, strength * excess, latency, RESTORE_ROUNDS, top_hz)
        err = error_db(h)
        if err <= MAGNITUDE_TOLERANCE_DB:
            break
    return h, p, float(strength), 0.0, err


def apply_mixed_phase(
    irs: np.ndarray,
    fs: int,
    arrival_s: np.ndarray,
    freq_hz: np.ndarray,
    firs: dict[int, np.ndarray],
    latency_ms: float,
    weights: np.ndarray | None = None,
) -> tuple[dict[int, np.ndarray], MixedPhaseDesign]:
    """Replace every minimum-phase filter by its mixed-phase counterpart.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
    fs : int
        Rate of ``irs``.
    arrival_s : ndarray, shape (n_positions, n_channels)
        Direct-sound arrivals, s.
    freq_hz : ndarray, shape (n_freqs,)
        Log-frequency grid.
    firs : dict of int to ndarray, shape (n_channels, n_taps)
        Minimum-phase filters per rate (before safety).
    latency_ms : float
    weights : ndarray, shape (n_positions,), optional

    Returns
    -------
    firs_mixed : dict of int to ndarray, shape (n_channels, n_taps + latency samples)
    design : MixedPhaseDesign
    """
    n_pos, n_ch, _ = irs.shape
    estimates = [
        estimate_excess_phase(irs[:, c], fs, freq_hz, arrival_s[:, c] * fs, weights)
        for c in range(n_ch)
    ]
    lat = {rate: latency_samples(latency_ms, rate) for rate in firs}
    for rate, hs in firs.items():
        if 2 * lat[rate] >= hs.shape[-1]:
            raise SettingsError(
                f"design.latency_ms = {latency_ms:g}: {lat[rate]} samples at {rate} Hz is more "
                f"than half the {hs.shape[-1]}-tap filter; lower --latency-ms or raise --taps"
            )
    out: dict[int, np.ndarray] = {}
    stats: list[MixedPhaseStats] = []
    for rate, hs in firs.items():
        rows = []
        for c in range(n_ch):
            est = estimates[c]
            h, p, strength, flat, err = within_tolerance(
                hs[c], rate, freq_hz, est.excess_gd_s, lat[rate], est.band_hz[1], OWN_FLAT_FROM_HZ
            )
            rows.append(h)
            stats.append(
                MixedPhaseStats(
                    channel=c,
                    fs=rate,
                    latency_samples=lat[rate],
                    peak_index=p,
                    pre_ringing_db=pre_ringing_db(h, rate, p),
                    magnitude_error_db=err,
                    strength=strength,
                    flat_strength=flat,
                )
            )
        out[rate] = np.stack(rows)
    design = MixedPhaseDesign(
        latency_ms=float(latency_ms),
        latency_samples=lat,
        estimates=estimates,
        min_phase_firs={k: v.copy() for k, v in firs.items()},
        stats=stats,
    )
    design.views = [
        direct_sound_views(irs[:, c], fs, arrival_s[:, c] * fs, firs, out, c) for c in range(n_ch)
    ]
    return out, design


def smoothed_group_delay_s(
    x: np.ndarray,
    fs: int,
    freq_hz: np.ndarray,
    width_oct: float = 1.0 / 12.0,
    min_fft: int = 1 << 14,
) -> np.ndarray:
    """Group delay of ``x`` in seconds at ``freq_hz``, power-weighted over ``width_oct``.

    From the phase step between neighbouring bins of an FFT at least four times
    the length of ``x`` (and ``min_fft``); each value is the ``|X|²``-weighted mean of
    the bins within ``width_oct`` around the frequency, so bins where ``x`` has
    little energy (and an unreliable phase) count little.
    """
    x = np.asarray(x, dtype=float)
    n_fft = max(int(min_fft), 1 << int(np.ceil(np.log2(4 * x.size))))
    spec = np.fft.rfft(x, n_fft)
    gd = -np.angle(spec[1:] * np.conj(spec[:-1])) / (2 * np.pi * fs / n_fft)
    w = np.abs(spec[1:] * spec[:-1])
    f_mid = (np.arange(gd.size) + 0.5) * fs / n_fft
    c_gd = np.concatenate([[0.0], np.cumsum(gd * w)])
    c_w = np.concatenate([[0.0], np.cumsum(w)])
    half = 2.0 ** (width_oct / 2)
    lo = np.searchsorted(f_mid, np.asarray(freq_hz) / half)
    hi = np.maximum(np.searchsorted(f_mid, np.asarray(freq_hz) * half, side="right"), lo + 1)
    wsum = c_w[hi] - c_w[lo]
    return np.where(wsum > 0, (c_gd[hi] - c_gd[lo]) / np.where(wsum > 0, wsum, 1.0), 0.0)


def direct_sound_views(
    irs: np.ndarray,
    fs: int,
    onsets: np.ndarray,
    firs_min: dict[int, np.ndarray],
    firs_mixed: dict[int, np.ndarray],
    channel: int,
) -> dict[str, np.ndarray]:
    """The measured direct sound before and after both designs, for the report.

    The direct sound of every position (cut as in
    :func:`roomcorr.design.phase.excess_phase.direct_sound_segment`) is filtered
    with the minimum-phase and the mixed-phase filter at the measurement rate
    (if that rate was designed; else the views are empty). Group delays add
    under convolution, so the filtered direct sound's group delay is the
    segment's plus the whole filter's (no truncation of the filter).

    Returns
    -------
    dict
        ``gd_freq_hz`` (n_f,), ``gd_s`` (3, n_f): mean group delay over
        positions of the uncorrected, minimum-phase and mixed-phase direct
        sound, each relative to its median over 1-10 kHz (1/12-octave
        smoothing); ``step_t_s`` (n_t,), ``step`` (3, n_t): step responses
        of the first position's direct sound, time relative to each one's
        main peak, normalised to their value 6 ms after it; ``ring_t_s``
        (n_r,) and ``ring_db`` (n_r,): the mixed filter's energy arriving
        before each time, relative to its total (time relative to its main
        peak).
    """

    if fs not in firs_min:
        return {}
    h_min, h_mix = firs_min[fs][channel], firs_mixed[fs][channel]
    gd_f = np.geomspace(200.0, min(16000.0, 0.4 * fs), 160)
    mid = (gd_f >= 1000) & (gd_f <= 10000)
    filter_gd = [np.zeros(gd_f.size)] + [
        smoothed_group_delay_s(h, fs, gd_f) for h in (h_min, h_mix)
    ]
    gds = np.zeros((3, gd_f.size))
    steps = []
    t_step = np.arange(-int(0.003 * fs), int(0.006 * fs)) / fs
    n_keep = int(0.05 * fs)
    for p in range(irs.shape[0]):
        start, stop = direct_sound_segment(irs[p], fs, float(onsets[p]))
        seg = irs[p, start:stop]
        seg_gd = smoothed_group_delay_s(seg, fs, gd_f)
        for k, h in enumerate((None, h_min, h_mix)):
            g = seg_gd + filter_gd[k]
            gds[k] += (g - np.median(g[mid])) / irs.shape[0]
            if p == 0:
                y = seg if h is None else np.convolve(seg, h[:n_keep])
                s = np.cumsum(y)
                pk = int(np.argmax(np.abs(y)))
                idx = np.clip(pk + np.round(t_step * fs).astype(int), 0, len(s) - 1)
                final = s[min(len(s) - 1, pk + int(0.006 * fs))]
                steps.append(s[idx] / (final if abs(final) > 0 else 1.0))
    p_mix = int(np.argmax(np.abs(h_mix)))
    energy = np.cumsum(h_mix**2)
    total = energy[-1] if energy[-1] > 0 else 1.0
    n_r = min(p_mix + 1, len(h_mix))
    ring = 10 * np.log10(np.maximum(energy[:n_r] / total, 1e-30))
    return {
        "gd_freq_hz": gd_f,
        "gd_s": gds,
        "step_t_s": t_step,
        "step": np.stack(steps),
        "ring_t_s": (np.arange(n_r) - p_mix) / fs,
        "ring_db": ring,
    }


def latency_record(design: MixedPhaseDesign | None) -> dict[str, Any]:
    """The manifest's ``latency`` entry: phase, latency in ms and samples per rate, caution.

    ``design`` is ``None`` for a minimum-phase design (no added latency).
    """
    if design is None:
        return {"phase": "minimum", "latency_ms": 0.0, "samples": {}}
    worst = {}
    for s in design.stats:
        worst[s.fs] = max(worst.get(s.fs, -np.inf), s.pre_ringing_db)
    return {
        "phase": "mixed",
        "latency_ms": design.latency_ms,
        "samples": {str(fs): n for fs, n in sorted(design.latency_samples.items())},
        "exact_ms": {str(fs): design.latency_ms_at(fs) for fs in sorted(design.latency_samples)},
        "pre_ringing_limit_db": PRE_RING_LIMIT_DB,
        "pre_ringing_window_ms": 1000.0 * PRE_RING_S,
        "worst_pre_ringing_db": {
            str(fs): (round(v, 2) if np.isfinite(v) else None) for fs, v in sorted(worst.items())
        },
        "correction_strength": {
            str(fs): [s.strength for s in design.stats if s.fs == fs]
            for fs in sorted(design.latency_samples)
        },
        "flattening_strength": {
            str(fs): [s.flat_strength for s in design.stats if s.fs == fs]
            for fs in sorted(design.latency_samples)
        },
        "magnitude_difference_db": {
            str(fs): round(max(s.magnitude_error_db for s in design.stats if s.fs == fs), 4)
            for fs in sorted(design.latency_samples)
        },
        "caution": LATENCY_CAUTION,
    }


def to_arrays(design: MixedPhaseDesign) -> dict[str, np.ndarray]:
    """Flat ``mixed_*`` arrays of a design for ``design.npz`` (read back by :func:`from_arrays`)."""
    out: dict[str, np.ndarray] = {
        "mixed_latency_ms": np.array(design.latency_ms),
        "mixed_rates": np.array(sorted(design.latency_samples), dtype=np.int64),
        "mixed_latency_samples": np.array(
            [design.latency_samples[r] for r in sorted(design.latency_samples)], dtype=np.int64
        ),
    }
    for c, est in enumerate(design.estimates):
        out[f"mixed_ch{c}_excess_gd_s"] = est.excess_gd_s
        out[f"mixed_ch{c}_raw_gd_s"] = est.raw_gd_s
        out[f"mixed_ch{c}_coherence"] = est.coherence
        out[f"mixed_ch{c}_weight"] = est.weight
        out[f"mixed_ch{c}_band_hz"] = np.array(est.band_hz)
    for c, view in enumerate(design.views):
        for key, value in view.items():
            out[f"mixed_ch{c}_view_{key}"] = value
    for rate, h in design.min_phase_firs.items():
        out[f"mixed_minfir_{rate}"] = h
    return out


def from_arrays(raw: dict[str, np.ndarray]) -> dict[str, Any] | None:
    """The mixed-phase part of ``design.npz`` as a dict, or ``None`` for a minimum-phase design.

    Keys: ``latency_ms``, ``latency_samples`` (rate -> samples), ``min_phase_firs``
    (rate -> (n_channels, n_taps)) and ``channels``: one dict per channel with
    the keys written by :func:`to_arrays` (``excess_gd_s``, ``coherence``,
    ``weight``, ``band_hz``, and ``view_*`` for the direct-sound views).
    """
    if "mixed_latency_ms" not in raw:
        return None
    rates = [int(r) for r in raw["mixed_rates"]]
    channels: dict[int, dict[str, Any]] = {}
    for key, value in raw.items():
        if key.startswith("mixed_ch"):
            head, _, name = key[len("mixed_ch") :].partition("_")
            channels.setdefault(int(head), {})[name] = value
    return {
        "latency_ms": float(raw["mixed_latency_ms"]),
        "latency_samples": dict(
            zip(rates, (int(n) for n in raw["mixed_latency_samples"]), strict=True)
        ),
        "min_phase_firs": {
            int(k[len("mixed_minfir_") :]): v
            for k, v in raw.items()
            if k.startswith("mixed_minfir_")
        },
        "channels": [channels[c] for c in sorted(channels)],
    }


def latency_sentence(latency_ms: float, samples: dict[int, int]) -> str:
    """One line stating the latency exactly, per rate, with the caution."""
    per_rate = ", ".join(
        f"{n} samples at {fs} Hz ({1000.0 * n / fs:.3f} ms)" for fs, n in sorted(samples.items())
    )
    return (
        f"Mixed phase: every FIR filter delays the sound by {latency_ms:g} ms ({per_rate}); "
        "biquad sets stay minimum phase, without that delay. " + LATENCY_CAUTION
    )
