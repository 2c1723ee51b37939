"""The loudspeaker's excess phase, estimated from the direct sound at several positions.

A response splits into a minimum-phase part and an all-pass part,
``H = H_min · A``. ``H_min`` is the real-cepstrum minimum-phase counterpart of
``|H|`` (:func:`roomcorr.design.phase.minphase.minimum_phase_spectrum`), and the
excess phase is the measured phase minus that of ``H_min``: the phase of
``A = H / H_min``. A loudspeaker's crossover puts an all-pass into ``A``
(its drivers arrive smeared in time), which no minimum-phase filter touches.

What is estimated here, and where:

1. **Direct sound only.** Each position's response is cut to its direct
   sound, from just before the arrival (:func:`roomcorr.analysis.onset.find_onset`)
   to just before the first strong reflection (the first sample, at least
   ``MIN_DIRECT_S`` after the main peak, within ``REFLECTION_DB`` of it),
   with a half-Hann fade-out. Reflections differ from seat to seat; the
   loudspeaker's own phase does not.
2. **Excess phase per position**: ``E_p = X_p / X_p,min`` of that segment, and
   its group delay ``-dφ/dω`` from the phase step between neighbouring FFT
   bins (no unwrapping needed).
3. **Alignment.** Every position has its own distance, so each ``E_p`` is
   advanced by its own median excess group delay between ``ALIGN_BAND_HZ``.
4. **Agreement.** The aligned ``E_p`` are averaged as complex numbers and
   smoothed over ``SMOOTHING_OCT``; the magnitude of that mean is the phase
   coherence across positions (1 when every position has the same excess
   phase, near 0 when they scatter). Where it falls below ``COHERENCE_FREE``
   the estimate is trusted less, and below ``COHERENCE_REFUSE`` not at all.
   The group delay of the mean is smoothed further over at least
   ``GD_SMOOTHING_CYCLES`` / window (finer detail is the window's ripple).
5. **Frequency range.** In the bass the room, not the loudspeaker, owns the
   phase, and a direct-sound window of a few milliseconds cannot resolve it:
   below ``max(BASS_LIMIT_HZ, RESOLUTION_CYCLES / window)`` nothing is
   estimated. At the top the range ends at ``TOP_LIMIT_HZ`` (or 0.4 fs).
   Outside the range, and where the positions disagree, the excess group
   delay is held at the nearest trusted value, so the correction acts there
   as a pure delay: it leaves the phase alone and adds no group-delay step.

The result is an excess group delay on the log-frequency grid, relative to
its median in the treble (so the main peak stays where it is), ready for
:mod:`roomcorr.design.phase.mixedphase`.

References
----------
.. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
       3rd ed., Pearson, 2010, ch. 5.6 (minimum-phase and all-pass
       decomposition) and ch. 13 (real cepstrum, minimum-phase counterpart).
.. [2] S. H. Linkwitz, "Active crossover networks for noncoincident drivers",
       JAES 24(1), 1976 (a crossover's sum is an all-pass).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from roomcorr.analysis.onset import find_onset
from roomcorr.design.phase.minphase import minimum_phase_spectrum
from roomcorr.grid import interp_log

#: Samples before the onset kept in the direct-sound window, in seconds.
PRE_ONSET_S = 0.0003
#: A reflection is a sample within this many dB of the direct sound's peak ...
REFLECTION_DB = -18.0
#: ... found no earlier than this after the peak (the direct sound's own smear), s.
MIN_DIRECT_S = 0.001
#: Longest direct-sound window after the peak, s.
MAX_DIRECT_S = 0.008
#: Fade-out at the end of the window: this fraction of its length, at most FADE_MAX_S.
FADE_FRACTION = 0.3
FADE_MAX_S = 0.0005
#: The window must hold this many periods of the lowest frequency estimated.
RESOLUTION_CYCLES = 1.0
#: Below this the room owns the phase (common practice: the modal region).
BASS_LIMIT_HZ = 250.0
#: Highest frequency estimated (and 0.4 fs at most).
TOP_LIMIT_HZ = 16000.0
#: The weight rises from 0 to 1 over this many octaves above the bass limit.
BASS_FADE_OCT = 0.5
#: Band whose median excess group delay aligns the positions, Hz.
ALIGN_BAND_HZ = (1000.0, 12000.0)
#: Width of the complex smoothing of the combined excess phase, octaves.
SMOOTHING_OCT = 1.0 / 6.0
#: Coherence at or above which the estimate is fully trusted, and below which not at all.
COHERENCE_FREE = 0.85
COHERENCE_REFUSE = 0.6
#: The excess group delay is measured from its median in this band (to the top), Hz.
REFERENCE_BAND_HZ = (4000.0, 16000.0)
#: The group delay is smoothed over at least this many times 1 / (window length), Hz.
GD_SMOOTHING_CYCLES = 0.3
#: FFT length of the estimate: at least this many seconds of bins.
FFT_SECONDS = 0.16


@dataclass
class ExcessPhaseEstimate:
    """The excess phase of one loudspeaker channel, combined over positions.

    Attributes
    ----------
    freq_hz : ndarray, shape (n_freqs,)
        The log-frequency grid.
    excess_gd_s : ndarray, shape (n_freqs,)
        Excess group delay to correct, s, relative to its median from
        ``REFERENCE_BAND_HZ[0]`` to the top of the range, held constant
        outside the trusted range and across gaps.
    raw_gd_s : ndarray, shape (n_freqs,)
        The combined estimate before holding and weighting (same reference).
    position_gd_s : ndarray, shape (n_positions, n_freqs)
        Each aligned position's excess group delay (same reference).
    coherence : ndarray, shape (n_freqs,)
        Phase coherence across positions, 0 to 1 (1 for a single position).
    weight : ndarray, shape (n_freqs,)
        How much of the estimate is used, 0 to 1.
    band_hz : tuple of float
        Frequency range where the estimate is used.
    window_s : ndarray, shape (n_positions,)
        Length of each position's direct-sound window after its peak, s.
    """

    freq_hz: np.ndarray
    excess_gd_s: np.ndarray
    raw_gd_s: np.ndarray
    position_gd_s: np.ndarray
    coherence: np.ndarray
    weight: np.ndarray
    band_hz: tuple[float, float]
    window_s: np.ndarray


def direct_sound_segment(ir: np.ndarray, fs: int, onset: float | None = None) -> tuple[int, int]:
    """Return the start and stop sample of the direct sound (before the first reflection).

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
    fs : int
    onset : float, optional
        Arrival in samples; found with :func:`~roomcorr.analysis.onset.find_onset` if omitted.

    Returns
    -------
    start, stop : int
        ``ir[start:stop]`` is the direct sound; ``stop`` lies just before the
        first sample after ``MIN_DIRECT_S`` that comes within ``REFLECTION_DB``
        of the peak, and at most ``MAX_DIRECT_S`` after the peak.
    """
    x = np.abs(np.asarray(ir, dtype=float))
    if onset is None:
        onset = find_onset(x, fs)
    i0 = min(max(int(onset), 0), x.size - 1)
    start = max(0, i0 - int(round(PRE_ONSET_S * fs)))
    peak_i = i0 + int(np.argmax(x[i0 : i0 + max(2, int(0.001 * fs))]))
    thr = x[peak_i] * 10 ** (REFLECTION_DB / 20)
    lo = peak_i + max(1, int(round(MIN_DIRECT_S * fs)))
    hi = min(x.size, peak_i + int(round(MAX_DIRECT_S * fs)))
    later = np.flatnonzero(x[lo:hi] >= thr)
    stop = lo + int(later[0]) if later.size else hi
    return start, max(stop, start + 2)


def _fade_out(n: int, fs: int) -> np.ndarray:
    w = np.ones(n)
    n_fade = max(1, min(int(round(FADE_FRACTION * n)), int(round(FADE_MAX_S * fs))))
    k = np.arange(1, n_fade + 1)
    w[n - n_fade :] = 0.5 * (1 + np.cos(np.pi * k / (n_fade + 1)))
    return w


def excess_spectrum(segment: np.ndarray, n_fft: int) -> tuple[np.ndarray, np.ndarray]:
    """Excess-phase spectrum ``X / X_min`` of a short response, and ``|X|``.

    Parameters
    ----------
    segment : ndarray, shape (n,)
    n_fft : int
        At least ``8 n`` keeps the cepstral aliasing of the minimum-phase
        counterpart small.

    Returns
    -------
    excess : complex ndarray, shape (n_fft // 2 + 1,)
        Unit magnitude (1 where ``|X|`` is 0).
    magnitude : ndarray, shape (n_fft // 2 + 1,)

    References
    ----------
    .. [1] Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed.,
           ch. 5.6 and 13.
    """
    spec = np.fft.rfft(segment, n_fft)
    mag = np.abs(spec)
    if not np.any(mag > 0):
        return np.ones_like(spec), mag
    smin = minimum_phase_spectrum(mag, n_fft)
    ratio = spec / np.where(np.abs(smin) > 0, smin, 1.0)
    r = np.abs(ratio)
    return np.where(r > 0, ratio / np.where(r > 0, r, 1.0), 1.0), mag


def _box_smooth_log(
    values: np.ndarray, freq_hz: np.ndarray, width_oct: float, min_width_hz: float = 0.0
) -> np.ndarray:
    """Mean of ``values`` (on linear FFT bins ``freq_hz``) over ``width_oct`` around each
    bin, and over at least ``min_width_hz``."""
    csum = np.concatenate([[0], np.cumsum(values)])
    half = 2.0 ** (width_oct / 2)
    lo_hz = np.minimum(freq_hz / half, freq_hz - 0.5 * min_width_hz)
    hi_hz = np.maximum(freq_hz * half, freq_hz + 0.5 * min_width_hz)
    lo = np.searchsorted(freq_hz, lo_hz, side="left")
    hi = np.searchsorted(freq_hz, hi_hz, side="right")
    hi = np.maximum(hi, lo + 1)
    return (csum[hi] - csum[lo]) / (hi - lo)


def _gd_from_phase_steps(spec: np.ndarray, d_omega: float) -> np.ndarray:
    """Group delay at the bins from the phase step to each neighbour (central difference)."""
    step = np.angle(spec[1:] * np.conj(spec[:-1])) / d_omega
    gd = np.empty(spec.shape[-1])
    gd[1:-1] = -0.5 * (step[:-1] + step[1:])
    gd[0], gd[-1] = -step[0], -step[-1]
    return gd


def estimate_excess_phase(
    irs: np.ndarray,
    fs: int,
    freq_hz: np.ndarray,
    onsets: np.ndarray | None = None,
    weights: np.ndarray | None = None,
) -> ExcessPhaseEstimate:
    """Estimate the excess group delay a loudspeaker shows at every measured position.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_samples)
        One channel's impulse responses.
    fs : int
    freq_hz : ndarray, shape (n_freqs,)
        Log-frequency grid of the result.
    onsets : ndarray, shape (n_positions,), optional
        Arrival of the direct sound in samples.
    weights : ndarray, shape (n_positions,), optional
        Position weights (as for the power average); equal if omitted.

    Returns
    -------
    ExcessPhaseEstimate

    References
    ----------
    .. [1] Oppenheim & Schafer, Discrete-Time Signal Processing, 3rd ed.,
           ch. 5.6 and 13.
    """
    irs = np.atleast_2d(np.asarray(irs, dtype=float))
    n_pos = irs.shape[0]
    freq_hz = np.asarray(freq_hz, dtype=float)
    w_pos = np.ones(n_pos) if weights is None else np.asarray(weights, dtype=float)
    if not np.sum(w_pos) > 0:
        w_pos = np.ones(n_pos)
    n_fft = 1 << int(np.ceil(np.log2(FFT_SECONDS * fs)))
    bins_hz = np.fft.rfftfreq(n_fft, 1.0 / fs)
    omega = 2 * np.pi * bins_hz
    d_omega = 2 * np.pi * fs / n_fft
    top = min(TOP_LIMIT_HZ, 0.4 * fs)
    align = (bins_hz >= ALIGN_BAND_HZ[0]) & (bins_hz <= min(ALIGN_BAND_HZ[1], top))

    aligned = np.empty((n_pos, bins_hz.size), dtype=complex)
    window_s = np.empty(n_pos)
    for p in range(n_pos):
        onset = None if onsets is None else float(onsets[p])
        start, stop = direct_sound_segment(irs[p], fs, onset)
        seg = irs[p, start:stop] * _fade_out(stop - start, fs)
        peak = start + int(np.argmax(np.abs(seg)))
        window_s[p] = (stop - peak) / fs
        exc, _ = excess_spectrum(seg, n_fft)
        gd = _gd_from_phase_steps(exc, d_omega)
        ref = float(np.median(gd[align])) if np.any(align) else 0.0
        aligned[p] = exc * np.exp(1j * omega * ref)

    wsum = float(np.sum(w_pos))
    mean = np.tensordot(w_pos / wsum, aligned, axes=1)
    mean_s = _box_smooth_log(mean.real, bins_hz, SMOOTHING_OCT) + 1j * _box_smooth_log(
        mean.imag, bins_hz, SMOOTHING_OCT
    )
    coherence_bins = np.clip(np.abs(mean_s), 0.0, 1.0) if n_pos > 1 else np.ones(bins_hz.size)
    # group delay smoothed over at least the window's resolution (1 / its length):
    # finer detail is ripple of the truncation, not the loudspeaker
    res_hz = GD_SMOOTHING_CYCLES / max(float(np.min(window_s)), 1.0 / fs)
    gd_bins = _box_smooth_log(_gd_from_phase_steps(mean_s, d_omega), bins_hz, 0.0, res_hz)
    pos_gd_bins = np.stack(
        [_box_smooth_log(_gd_from_phase_steps(a, d_omega), bins_hz, SMOOTHING_OCT) for a in aligned]
    )

    def on_grid(v: np.ndarray) -> np.ndarray:
        return np.interp(freq_hz, bins_hz, v)

    raw = on_grid(gd_bins)
    pos_gd = np.stack([on_grid(v) for v in pos_gd_bins])
    coherence = on_grid(coherence_bins)
    lo = max(BASS_LIMIT_HZ, RESOLUTION_CYCLES / max(float(np.min(window_s)), 1.0 / fs))
    lo = min(lo, top / 2)
    band_w = np.clip(np.log2(np.maximum(freq_hz, 1e-9) / lo) / BASS_FADE_OCT, 0.0, 1.0)
    band_w = np.where(freq_hz <= top, band_w, 0.0)
    band_w = np.sin(0.5 * np.pi * band_w) ** 2
    coh_w = np.clip((coherence - COHERENCE_REFUSE) / (COHERENCE_FREE - COHERENCE_REFUSE), 0, 1)
    weight = band_w * coh_w
    excess = hold_untrusted(freq_hz, raw, weight)
    in_ref = (freq_hz >= REFERENCE_BAND_HZ[0]) & (freq_hz <= top)
    ref_top = float(np.median(excess[in_ref])) if np.any(in_ref) else 0.0
    return ExcessPhaseEstimate(
        freq_hz=freq_hz,
        excess_gd_s=excess - ref_top,
        raw_gd_s=raw - ref_top,
        position_gd_s=pos_gd - ref_top,
        coherence=coherence,
        weight=weight,
        band_hz=(float(lo), float(top)),
        window_s=window_s,
    )


def hold_untrusted(freq_hz: np.ndarray, gd_s: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Blend ``gd_s`` towards its trusted neighbours where ``weight`` is below 1.

    Points with weight 1 keep their value; the rest are a weighted mix of
    their own value and a value interpolated (linearly in log frequency)
    between the nearest fully trusted points, held constant beyond the
    outermost ones. With no trusted point at all the result is zero.

    Parameters
    ----------
    freq_hz, gd_s, weight : ndarray, shape (n_freqs,)

    Returns
    -------
    ndarray, shape (n_freqs,)
    """
    trusted = weight >= 0.999
    if not np.any(trusted):
        return np.zeros_like(gd_s)
    logf = np.log2(np.maximum(freq_hz, 1e-9))
    filled = np.interp(logf, logf[trusted], gd_s[trusted])
    return weight * gd_s + (1 - weight) * filled


def excess_gd_on_bins(
    est_freq_hz: np.ndarray, excess_gd_s: np.ndarray, bins_hz: np.ndarray
) -> np.ndarray:
    """The excess group delay interpolated onto FFT bins (held at both ends)."""
    return interp_log(bins_hz, est_freq_hz, excess_gd_s)


def position_onsets(irs: np.ndarray, fs: int) -> np.ndarray:
    """Direct-sound arrival of every position, samples; ``irs`` shape (n_positions, n_samples)."""
    return np.array([find_onset(x, fs) for x in np.atleast_2d(irs)])
