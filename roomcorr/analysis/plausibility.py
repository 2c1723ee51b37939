"""Does an array look like a room impulse response at all?

``design`` must not turn DC, noise, a tone or a time-reversed file into a
boosting filter. An impulse response measured in a room has three features
that none of these share, and each is checked here on every position and
channel:

1. **A clear arrival.** The main peak stands well above the noise, by the
   same figure and limit that ``measure`` gates a recording with
   (:func:`roomcorr.measure.quality.arrival_snr_db`,
   ``MeasureSettings.min_arrival_db``). The noise level is the robust one of
   that function, taken over the quieter of the part before the arrival and
   the last fifth of the file. White noise gives about 13 dB (the
   extreme-value ratio of Gaussian noise), a tone or DC about 0 dB.
2. **Something after it.** At least :data:`MIN_AFTER_PEAK_S` follow the main
   peak; a peak at the very end leaves no room response to correct.
3. **Energy that decays after it and does not build up before it.** The last
   fifth of the span after the arrival holds at least :data:`MIN_DECAY_DB`
   less energy than the first fifth; and the energy before the main peak,
   from the onset of the direct sound (:func:`roomcorr.analysis.onset.find_onset`,
   at least :data:`BUILDUP_WINDOW_S` before the peak), holds no more than
   :data:`BUILDUP_RATIO` times the energy of everything after the peak, both
   counted above the noise (the peak itself, :data:`PEAK_GUARD_S` either
   side, left out). Reflections and reverberation follow the direct sound in
   a room, while reversed in time they come first and nothing follows.

   The build-up is counted from the direct sound's onset and weighed against
   the whole decay, not against a window of the same length, because a
   low-frequency source builds up: a subwoofer in a corner or against a wall
   arrives with its direct sound, and the room's modes, each growing over
   a few of its periods, reach their largest sum 20 to 50 ms later (a mode of
   Q = pi f T60 / (3 ln 10) rises with time constant T60 / (3 ln 10) = 65 ms for
   T60 = 0.45 s; Kuttruff, Room Acoustics, ch. 3). What follows that peak still
   lasts the reverberation time, so the whole decay outweighs the short
   build-up; reversed, the decay comes before the peak and only the short
   build-up follows, and the file is refused, a subwoofer's as well as a
   full-range loudspeaker's (tests/test_plausibility_sub.py, on rooms simulated
   with pyroomacoustics).
4. **A quick rise and a slow fall.** From the first moment within 20 dB of
   the main peak (the onset of :func:`roomcorr.analysis.onset.find_onset`)
   to the peak takes at most :data:`RISE_OVER_FALL` times as long as from the
   peak to the last moment within 20 dB of it (the same function on the file
   reversed), or less than :data:`MIN_RISE_S`. A room's energy rises within the
   build-up of its modes and falls over its reverberation time; a reversed
   low-frequency response whose decay is short beside its build-up (a
   subwoofer whose modes peak late and die fast in a damped room) can pass
   check 3, never this one.

All functions are pure (arrays in, text out).
"""

from __future__ import annotations

import numpy as np

from roomcorr.analysis.onset import find_onset
from roomcorr.measure.quality import arrival_snr_db
from roomcorr.measure.settings import MeasureSettings

#: Main peak over the noise, dB: the arrival gate of ``measure`` (same default).
MIN_ARRIVAL_DB = MeasureSettings.min_arrival_db
#: Time that must follow the main peak, s (half the shortest response accepted).
MIN_AFTER_PEAK_S = 0.05
#: Energy drop from the first to the last fifth after the arrival, dB. Noise, a
#: tone or DC stay within a fraction of a dB; a room response truncated at 0.1 s
#: in a room with a 2 s decay still drops more than this (about 5 dB from its
#: decay alone, plus the direct sound).
MIN_DECAY_DB = 3.0
#: Shortest span before the main peak counted as build-up, s (the direct sound's
#: onset may lie closer to the peak) ...
BUILDUP_WINDOW_S = 0.03
#: ... leaving out this much on either side of the peak itself, s. Refused when the
#: energy before (above the noise) exceeds all the energy after by this factor (3 dB) ...
PEAK_GUARD_S = 0.001
BUILDUP_RATIO = 2.0
#: ... and stands this many times (10 dB) above the noise energy of the same window.
BUILDUP_OVER_NOISE = 10.0
#: Rise to the main peak (from 20 dB below it) may last at most this many times the
#: fall from it (to 20 dB below it) ...
RISE_OVER_FALL = 2.0
#: ... unless it is shorter than this, s (a full-range response rises within a sample
#: or two; this leaves a subwoofer's direct sound and first reflections alone).
MIN_RISE_S = 0.01


def _energy(x: np.ndarray) -> float:
    return float(np.sum(np.square(x)))


def _db_ratio(a: float, b: float) -> float:
    return float(10 * np.log10(max(a, 1e-300) / max(b, 1e-300)))


def impulse_response_problems(ir: np.ndarray, fs: int) -> list[str]:
    """What makes ``ir`` unlike a room impulse response (empty if nothing does).

    Parameters
    ----------
    ir : ndarray, shape (n_samples,)
        Finite samples (checked before: NaN, silence and length).
    fs : int
        Sample rate in Hz.

    Returns
    -------
    list of str
        One short phrase per failed check, in the order of the module
        docstring, e.g. ``"the main peak stands only 12.8 dB above the noise
        (25 dB needed): noise, a tone or DC?"``.
    """
    h = np.asarray(ir, dtype=float)
    n = h.size
    problems: list[str] = []
    peak = int(np.argmax(np.abs(h)))
    onset = min(int(find_onset(h, fs)), peak)

    # 1. a clear arrival: the quieter of the lead-in and the last fifth is the noise
    regions = [slice(int(0.8 * n), n)]
    lead_end = onset - int(0.001 * fs)
    if lead_end >= int(0.005 * fs):
        regions.append(slice(0, lead_end))
    snrs = [arrival_snr_db(h, n, r) for r in regions]
    snr = max(snrs)
    quiet = regions[int(np.argmax(snrs))]
    noise_rms = 1.4826 * float(np.median(np.abs(h[quiet])))  # as arrival_snr_db estimates it
    if not snr >= MIN_ARRIVAL_DB:
        problems.append(
            f"the main peak stands only {snr:.1f} dB above the noise "
            f"({MIN_ARRIVAL_DB:g} dB needed): noise, a tone or DC?"
        )

    # 2. something after the peak
    after_s = (n - 1 - peak) / fs
    if after_s < MIN_AFTER_PEAK_S:
        problems.append(
            f"the main peak lies at the very end ({after_s * 1000:.0f} ms before it; "
            f"{MIN_AFTER_PEAK_S * 1000:.0f} ms needed): a truncated or reversed file?"
        )
        return problems

    # 3a. energy decays after the arrival
    span = n - onset
    fifth = max(1, span // 5)
    drop = _db_ratio(_energy(h[onset : onset + fifth]), _energy(h[n - fifth :]))
    if not drop >= MIN_DECAY_DB:
        problems.append(
            f"the energy does not decay after the arrival (last fifth only {drop:.1f} dB "
            f"below the first; {MIN_DECAY_DB:g} dB needed): a steady signal?"
        )
    # 3b. and does not build up before the peak more than it decays after it (the peak
    # itself left out): the build-up from the direct sound's onset against everything
    # after the peak; energies are counted above the noise, so a clean impulse over plain
    # noise (a loopback) passes, and a subwoofer whose modes peak well after its direct
    # sound passes too (module docstring)
    w = max(2, int(BUILDUP_WINDOW_S * fs))
    g = max(1, int(PEAK_GUARD_S * fs))
    start = max(0, min(onset - g, peak - w))
    seg_before = h[start : max(start, peak - g)]
    seg_after = h[peak + g :]
    noise_before = seg_before.size * noise_rms**2
    before = _energy(seg_before) - noise_before
    after = max(_energy(seg_after) - seg_after.size * noise_rms**2, 0.0)
    if before > BUILDUP_RATIO * after and before > BUILDUP_OVER_NOISE * noise_before:
        problems.append(
            f"the energy builds up towards the main peak "
            f"({_db_ratio(before, after):+.1f} dB in the "
            f"{seg_before.size / fs * 1000:.0f} ms from the arrival to the peak against "
            "all that follows it): a time-reversed response?"
        )
    # 4. a quick rise and a slow fall, both within 20 dB of the peak
    rise_s = (peak - onset) / fs
    fall_s = (n - 1 - find_onset(h[::-1], fs) - peak) / fs
    if rise_s >= MIN_RISE_S and rise_s > RISE_OVER_FALL * fall_s:
        problems.append(
            f"the response rises for {rise_s * 1000:.0f} ms to its main peak and falls "
            f"from it within {fall_s * 1000:.0f} ms (to 20 dB below it): a time-reversed "
            "response?"
        )
    return problems


def implausible_responses(irs: np.ndarray, fs: int) -> list[tuple[int, int, list[str]]]:
    """Every position and channel of a measurement set that fails a check.

    Parameters
    ----------
    irs : ndarray, shape (n_positions, n_channels, n_samples)
    fs : int

    Returns
    -------
    list of (position, channel, problems)
        Zero-based indices; empty when every response looks like one.
    """
    out = []
    for p in range(irs.shape[0]):
        for c in range(irs.shape[1]):
            probs = impulse_response_problems(irs[p, c], fs)
            if probs:
                out.append((p, c, probs))
    return out
