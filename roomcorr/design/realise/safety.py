"""Safety rules applied to every filter before export.

* One common pre-gain for all channels and rates, so the channel balance
  stays: chosen so that no filter's peak gain exceeds the ceiling (0 dB
  unless the user explicitly allows gain). Peak gain is evaluated over the
  whole band the filter passes, from DC to Nyquist (:data:`PEAK_BAND`), not
  only over the audible band: gain at 15 Hz costs driver excursion and gain
  at 22 kHz can clip a DAC as surely as gain at 1 kHz. If every filter
  already sits below the ceiling, no make-up gain is added.
* Worst-case gain, 20 log10 sum |h|, is reported for every filter: the
  largest output a full-scale input of any waveform could produce.
* Short filters are fitted under the boost cap before the check
  (:func:`fit_under_cap`): the realised response of every synthesised filter
  is measured from DC to Nyquist, the correction curve is lowered wherever it
  rises above the cap, and the filters are synthesised again. The check
  below stays the final proof.
* A filter whose boost (gain above the pre-gain, anywhere from DC to
  Nyquist) exceeds the boost cap by more than ``BOOST_TOLERANCE_DB`` is
  refused.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from roomcorr.design.realise.fir import (
    cap_excess_db,
    own_length,
    peak_gain_db,
    worst_case_gain_db,
)
from roomcorr.errors import SafetyError
from roomcorr.sidejob import thread_map

#: Allowed excess of a synthesised filter over the boost cap (FIR ripple), dB.
BOOST_TOLERANCE_DB = 0.3
#: Allowed excess over the ceiling after the pre-gain (rounding), dB.
CEILING_TOLERANCE_DB = 0.01

#: :func:`fit_under_cap` aims this far under the boost cap, dB (room for the
#: refined peak search, which finds maxima between FFT bins).
CAP_MARGIN_DB = 0.05
#: At most this many re-syntheses in :func:`fit_under_cap`.
CAP_FIT_ROUNDS = 10

#: Where peak gain and boost are evaluated (stated in the manifest and the report).
PEAK_BAND = "DC to Nyquist"

CAUTIONS = (
    "Caution: start playback quietly and raise the volume slowly; protect your hearing.",
    "Boosted bass costs driver excursion and amplifier headroom: respect your loudspeakers' "
    "limits and follow local regulations on noise exposure.",
)


@dataclass
class FilterStats:
    """Safety figures of one exported filter."""

    channel: int
    fs: int
    n_taps: int
    peak_gain_db: float
    worst_case_gain_db: float
    max_boost_db: float


#: Peak gains already measured, by rate and the filter's exact bytes (see
#: :func:`full_band_peak_gain_db`); at most :data:`PEAK_MEMO_SIZE` of them.
_PEAK_MEMO: OrderedDict[tuple[float, int, bytes], float] = OrderedDict()
PEAK_MEMO_SIZE = 256


def full_band_peak_gain_db(h: np.ndarray, fs: float) -> float:
    """Largest gain in dB of FIR ``h`` anywhere from DC to Nyquist (:data:`PEAK_BAND`).

    :func:`roomcorr.design.realise.fir.peak_gain_db` over ``0 .. fs/2``: every bin of
    a zero-padded FFT (at least 8x the filter length), DC and Nyquist included,
    refined around the highest maxima by a chirp-z zoom.

    Zeros before the first and after the last non-zero tap are left out first
    (a delay: the magnitude is the same), and a filter whose taps are
    byte-for-byte one measured before is not measured again (the same numbers
    give the same peak; the key is a BLAKE2b digest of the taps), so a design
    that checks the same filters in several places pays once.
    """
    x, key = _peak_key(h, fs)
    with _MEMO_LOCK:
        if key in _PEAK_MEMO:
            _PEAK_MEMO.move_to_end(key)
            return _PEAK_MEMO[key]
    peak = peak_gain_db(x, fs, 0.0, fs / 2.0)
    _remember(key, peak)
    return peak


def full_band_peak_gains_db(firs: dict[int, np.ndarray]) -> dict[tuple[int, int], float]:
    """:func:`full_band_peak_gain_db` of every filter, ``{(fs, channel): dB}``, measured
    side by side (:func:`roomcorr.sidejob.thread_map`: scipy's FFTs release the
    interpreter lock), the longest first."""
    jobs = [(fs, ch) for fs, h in firs.items() for ch in range(h.shape[0])]
    peaks = thread_map(
        lambda job: full_band_peak_gain_db(firs[job[0]][job[1]], job[0]),
        jobs,
        cost=lambda job: own_length(firs[job[0]][job[1]]),
    )
    return dict(zip(jobs, peaks, strict=True))

_MEMO_LOCK = threading.Lock()


def forget_peak_gains() -> None:
    """Empty the memo of :func:`full_band_peak_gain_db` (benchmarks time a cold design)."""
    with _MEMO_LOCK:
        _PEAK_MEMO.clear()


def _peak_key(h: np.ndarray, fs: float) -> tuple[np.ndarray, tuple[float, int, bytes]]:
    """``h`` without its leading and trailing zeros, and its key in the memo."""
    x = np.ascontiguousarray(h, dtype=np.float64)
    nz = np.flatnonzero(x)
    if nz.size:
        x = x[nz[0] : nz[-1] + 1]
    return x, (float(fs), x.size, hashlib.blake2b(x.tobytes(), digest_size=16).digest())


def remember_peak_gain_db(h: np.ndarray, fs: float, peak_db: float) -> None:
    """Record the peak gain of ``h`` for :func:`full_band_peak_gain_db`.

    Used for a filter scaled by a known gain ``g`` after its peak ``P`` was
    measured: its peak is ``P + 20 log10 g`` (the scaling rounds each tap by
    at most half an ulp, about 1e-15 dB).
    """
    _remember(_peak_key(h, fs)[1], peak_db)


def _remember(key: tuple[float, int, bytes], peak_db: float) -> None:
    with _MEMO_LOCK:
        _PEAK_MEMO[key] = float(peak_db)
        _PEAK_MEMO.move_to_end(key)
        if len(_PEAK_MEMO) > PEAK_MEMO_SIZE:
            _PEAK_MEMO.popitem(last=False)


def fit_under_cap(
    build: Callable[[list[np.ndarray]], dict[int, np.ndarray]],
    curves_db: list[np.ndarray],
    grid_hz: np.ndarray,
    max_boost_db: float,
    rounds: int = CAP_FIT_ROUNDS,
    owner: list[int] | None = None,
) -> tuple[dict[int, np.ndarray], list[np.ndarray], int]:
    """Filters whose realised gain stays at or under the boost cap, from DC to Nyquist.

    A correction curve that never exceeds the cap can still give a filter
    that does: truncating and fading a short minimum-phase filter smooths
    the curve's corners into ripple, and a mixed-phase or aligned filter adds
    its own. So the filters are built, their realised response is measured
    (:func:`roomcorr.design.realise.fir.cap_excess_db`, every bin from DC to Nyquist,
    aiming :data:`CAP_MARGIN_DB` under the cap), every channel's curve is
    lowered by its excess (over about two bins of the filter length either
    side, the width of a truncation ripple, at every rate at once) and the
    filters are built again, until no filter rises above the cap or
    ``rounds`` re-syntheses are spent (then :func:`apply_safety` refuses, as
    before). Where the filters already stay under the cap nothing changes.

    Parameters
    ----------
    build : callable
        Maps one correction curve per channel (dB on ``grid_hz``) to the
        filters per rate, ``{fs: ndarray (n_rows, n_taps)}``, before the
        common pre-gain.
    curves_db : list of ndarray, shape (n_freqs,)
        The correction curves, one per channel, in filter-row order.
    grid_hz : ndarray, shape (n_freqs,)
    max_boost_db : float
        The boost cap.
    rounds : int
    owner : list of int, optional
        The curve each filter row is built from, when that is not one row per curve
        in order (several outputs from one curve: each subwoofer's row from the
        subwoofers' common curve); a curve is lowered by the largest excess of its rows.

    Returns
    -------
    firs : dict of int to ndarray
        The last filters built.
    curves_db : list of ndarray
        The curves they were built from (lowered where needed).
    n_rounds : int
        How many re-syntheses were needed (0: the first filters were under the cap).

    References
    ----------
    .. [1] A. V. Oppenheim and R. W. Schafer, Discrete-Time Signal Processing,
           3rd ed., ch. 7 (ripple of a truncated, windowed impulse response).
    """
    curves = [np.array(c, dtype=np.float64) for c in curves_db]
    limit = max_boost_db - CAP_MARGIN_DB
    for n_round in range(rounds + 1):
        firs = build(curves)
        lower = [np.zeros_like(c) for c in curves]
        over = False
        peaks = full_band_peak_gains_db(firs)
        for fs, h in firs.items():
            for ch in range(h.shape[0]):
                if peaks[(fs, ch)] <= max_boost_db:
                    continue
                over = True
                width_hz = 2.0 * fs / own_length(h[ch])
                c = ch if owner is None else owner[ch]
                lower[c] = np.maximum(lower[c], cap_excess_db(h[ch], fs, grid_hz, limit, width_hz))
        if not over or n_round == rounds:
            return firs, curves, n_round
        curves = [c - d for c, d in zip(curves, lower, strict=True)]
    raise AssertionError("unreachable")  # the loop returns on its last round


def common_pre_gain_db(peaks_db: list[float], ceiling_db: float) -> float:
    """Pre-gain (dB, never positive) that brings the highest peak down to the ceiling.

    Returns 0 when every peak is already at or below the ceiling: no make-up
    gain is ever added.
    """
    return min(0.0, ceiling_db - max(peaks_db))


def apply_safety(
    firs: dict[int, np.ndarray], ceiling_db: float, max_boost_db: float
) -> tuple[dict[int, np.ndarray], float, list[FilterStats]]:
    """Apply a common pre-gain, verify the limits and collect the figures.

    Parameters
    ----------
    firs : dict of int to ndarray, shape (n_channels, n_taps)
        Filters per sample rate, before pre-gain.
    ceiling_db, max_boost_db : float

    Returns
    -------
    firs_out, pre_gain_db, stats

    Raises
    ------
    SafetyError
        If a filter would break the boost cap or the ceiling.
    """
    if not (np.isfinite(ceiling_db) and np.isfinite(max_boost_db)):
        raise SafetyError(  # settings are checked before this; never trust NaN here either
            f"ceiling {ceiling_db} dB / boost cap {max_boost_db} dB: not finite numbers"
        )
    peaks = full_band_peak_gains_db(firs)
    pre = common_pre_gain_db(list(peaks.values()), ceiling_db)
    scale = 10 ** (pre / 20)
    out: dict[int, np.ndarray] = {}
    stats: list[FilterStats] = []
    for fs, h in firs.items():
        hs = h * scale
        out[fs] = hs
        for ch in range(h.shape[0]):
            peak = peaks[(fs, ch)] + pre
            if scale != 1.0:  # unscaled, the taps and their peak are remembered already
                remember_peak_gain_db(hs[ch], fs, peak)
            boost = peaks[(fs, ch)]
            if not boost <= max_boost_db + BOOST_TOLERANCE_DB:  # NaN fails too
                raise SafetyError(
                    f"channel {ch + 1} at {fs} Hz would boost {boost:.1f} dB, above the "
                    f"{max_boost_db:g} dB cap; nothing was written"
                )
            if not peak <= ceiling_db + CEILING_TOLERANCE_DB:
                raise SafetyError(
                    f"channel {ch + 1} at {fs} Hz peaks at {peak:+.2f} dB, above the "
                    f"{ceiling_db:+g} dB ceiling; nothing was written"
                )
            stats.append(
                FilterStats(
                    channel=ch,
                    fs=fs,
                    n_taps=int(h.shape[1]),
                    peak_gain_db=float(peak),
                    worst_case_gain_db=float(worst_case_gain_db(hs[ch])),
                    max_boost_db=float(max(boost, 0.0)),
                )
            )
    return out, pre, stats
