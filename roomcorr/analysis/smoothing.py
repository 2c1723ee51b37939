"""Fractional-octave smoothing of power spectra, with fixed or variable width.

All smoothing here is a boxcar window defined on the logarithmic frequency
axis: the smoothed value at frequency f is the mean of the power over
``[f * 2 ** (-w / 2), f * 2 ** (w / 2)]``, weighted uniformly in log
frequency (w is the total width in octaves). The input is read as piecewise
constant: each bin (or grid point) holds its power over its own cell, the cell
edges lying halfway between neighbouring points (halfway in hertz for FFT
bins, halfway on the log axis for log-grid points). The window mean is then an
exact integral, computed from cumulative sums of ``power * cell width`` and
a fractional share of the two cells the window edges fall in. That is the
limit, for an infinitely fine intermediate grid, of "resample onto a uniform
log grid, moving average, resample back" (Tylka et al. method 2), without
the resampling error; it costs O(N log N) on FFT bins (two sorted look-ups,
two cumulative sums) and O(N) on a log grid, never an N-by-N matrix, and the
width may change from point to point.

Cumulative sums lose precision when a small window sum is taken as the
difference of two large totals (a response 120 dB down near Nyquist behind a
loud bass). Each window sum therefore uses whichever of the forward or
backward running total is smaller there, so the error is relative to the
energy on the quieter side of the window rather than to the whole spectrum.

Edges: a window that would reach past the first or last cell is shrunk
symmetrically about its centre (it stays centred on the log axis), so
smoothing fades out towards the ends of the data instead of being biased by
padding.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

#: Variable-width rule (see :func:`variable_width_oct`): width in octaves in
#: the bass, up to ``VW_NARROW_HZ``.
VW_NARROW_OCT = 1.0 / 48.0
#: Width in octaves from ``VW_WIDE_HZ`` up.
VW_WIDE_OCT = 1.0 / 8.0
#: End of the narrow region and start of the transition, Hz.
VW_NARROW_HZ = 100.0
#: End of the transition and start of the wide region, Hz.
VW_WIDE_HZ = 1000.0


def _window_mean(
    values: np.ndarray,
    edges: np.ndarray,
    centres: np.ndarray,
    half: np.ndarray,
    unit_cells: bool = False,
) -> np.ndarray:
    """Mean of piecewise-constant ``values`` over windows ``centres -/+ half``.

    Parameters
    ----------
    values : ndarray, shape (..., n)
        Value of each cell.
    edges : ndarray, shape (n + 1,)
        Strictly increasing cell edges (any unit, typically octaves).
    centres, half : ndarray, shape (m,)
        Window centres and half-widths in the unit of ``edges``; every window
        must lie within ``[edges[0], edges[-1]]``. A zero half-width returns
        the value of the cell holding the centre.
    unit_cells : bool
        True when ``edges`` is ``arange(n + 1) - 0.5``: the cells holding the
        window ends are then found by rounding (O(m)) instead of a search.

    Returns
    -------
    mean : ndarray, shape (..., m)
    """
    n = values.shape[-1]
    lo = centres - half
    hi = centres + half
    if unit_cells:
        j_lo = np.clip(np.floor(lo + 0.5).astype(np.intp), 0, n - 1)
        j_hi = np.clip(np.ceil(hi + 0.5).astype(np.intp) - 1, 0, n - 1)
    else:
        j_lo = np.clip(np.searchsorted(edges, lo, side="right") - 1, 0, n - 1)
        j_hi = np.clip(np.searchsorted(edges, hi, side="left") - 1, 0, n - 1)
    j_hi = np.maximum(j_hi, j_lo)  # zero width exactly on an edge
    weighted = values * np.diff(edges)
    zero = np.zeros(values.shape[:-1] + (1,))
    fwd = np.concatenate([zero, np.cumsum(weighted, axis=-1)], axis=-1)  # sum of cells < k
    bwd = np.concatenate([np.cumsum(weighted[..., ::-1], axis=-1)[..., ::-1], zero], axis=-1)
    # Full cells strictly between the two edge cells, from whichever running
    # total is smaller (less cancellation); empty when j_hi <= j_lo + 1.
    inner_from_fwd = fwd[..., j_hi] - fwd[..., j_lo + 1]
    inner_from_bwd = bwd[..., j_lo + 1] - bwd[..., j_hi]
    use_fwd = np.abs(fwd[..., j_hi]) <= np.abs(bwd[..., j_lo + 1])
    inner = np.where(use_fwd, inner_from_fwd, inner_from_bwd)
    same = j_hi == j_lo
    inner = np.where(same, 0.0, inner)
    v_lo = values[..., j_lo]
    v_hi = values[..., j_hi]
    part_lo = np.where(same, 0.0, v_lo * (edges[j_lo + 1] - lo))
    part_hi = np.where(same, v_hi * (hi - lo), v_hi * (hi - edges[j_hi]))
    width = hi - lo
    safe = np.where(width > 0, width, 1.0)
    mean = (part_lo + inner + part_hi) / safe
    return np.where(width > 0, mean, v_hi)


def _as_values(values: np.ndarray, name: str) -> np.ndarray:
    v = np.asarray(values, dtype=float)
    if v.ndim < 1 or v.shape[-1] < 2:
        raise ValueError(f"{name} needs at least two points along its last axis")
    if not np.all(np.isfinite(v)):
        raise ValueError(f"{name} contains NaN or infinite values")
    return v


def _bin_cells_oct(freq_hz: np.ndarray, n_bins: int) -> tuple[np.ndarray, np.ndarray]:
    """Positive-frequency mask and log2 cell edges of bins at ``freq_hz``."""
    f = np.asarray(freq_hz, dtype=float)
    if f.shape != (n_bins,):
        raise ValueError(f"freq_hz has shape {f.shape}, expected ({n_bins},)")
    if not np.all(np.isfinite(f)) or f[0] < 0 or np.any(np.diff(f) <= 0):
        raise ValueError("freq_hz must be finite, non-negative and strictly increasing")
    pos = f > 0
    fp = f[pos]
    if fp.size < 2:
        raise ValueError("need at least two bins above 0 Hz")
    mid = 0.5 * (f[:-1] + f[1:])
    if pos[0]:  # no DC bin: mirror the first spacing, geometrically if it would reach 0 Hz
        first = fp[0] - 0.5 * (fp[1] - fp[0])
        if first <= 0:
            first = fp[0] * fp[0] / (0.5 * (fp[0] + fp[1]))
        lower = np.concatenate([[first], mid])
    else:
        lower = mid
    upper_last = fp[-1] + 0.5 * (fp[-1] - fp[-2])
    edges_hz = np.concatenate([lower[-fp.size :], [upper_last]])
    return pos, np.log2(edges_hz)


def _half_widths(width_oct: float | np.ndarray, n: int, name: str = "width_oct") -> np.ndarray:
    w = np.broadcast_to(np.asarray(width_oct, dtype=float), (n,))
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ValueError(f"{name} must be finite and non-negative")
    return 0.5 * w


def smooth_fractional_octave(
    power: np.ndarray, fraction: float, freq_hz: np.ndarray | None = None
) -> np.ndarray:
    """Smooth a power spectrum on linear (rfft) bins over 1/``fraction`` octave.

    Each output bin at frequency f is the mean power over
    ``[f * 2 ** (-1 / (2 fraction)), f * 2 ** (1 / (2 fraction))]``, weighted
    uniformly in log frequency, with each input bin holding its power over
    its own cell (edges halfway between bins). See the module notes for the
    method, the precision safeguard and the edge rule.

    Parameters
    ----------
    power : ndarray, shape (..., n_bins)
        Power spectrum ``|H|**2`` (non-negative), e.g. from ``np.fft.rfft``.
        Smoothing power rather than magnitude or dB keeps the energy
        meaning of the average.
    fraction : float
        Width denominator: 3 smooths over a third of an octave, 6 over a sixth.
    freq_hz : ndarray, shape (n_bins,), optional
        Bin frequencies, strictly increasing, non-negative. The default is
        ``0, 1, 2, ...`` (rfft bins; the result does not depend on the
        frequency unit, only on ratios).

    Returns
    -------
    smoothed : ndarray, shape (..., n_bins)
        Same shape. A bin at 0 Hz is returned unchanged (a window on a log
        axis cannot be centred on 0 Hz). Windows are shrunk symmetrically
        near the ends: at the top within ``1 / (2 fraction)`` octave of the
        last bin (for rfft bins, above about ``2 ** (-1 / (2 fraction))``
        times Nyquist; the last bin keeps roughly its own value), and at the
        bottom only where a window would reach below half the first bin
        spacing.

    Notes
    -----
    Compared with ``pyfar.dsp.smooth_fractional_octave`` (Tylka et al. method
    2, boxcar window), the results agree within 0.1 dB when the definitions
    are made to match (checked in ``tests/test_smoothing.py``): pyfar is given
    the power itself as its spectrum (its magnitude modes average magnitude,
    not power), ours is given pyfar's actual width (pyfar rounds the window to
    an odd number of log-spaced samples and reports the width it used) and
    ``freq_hz = k + 1`` (pyfar places bin k at log position k + 1). Where they
    still differ:

    - Near DC: pyfar's log axis puts bin k at k + 1, so windows on the
      lowest bins are shifted and widened; with true frequencies (the
      default here) the two agree within 0.1 dB only from about a hundred
      bins up for octave smoothing (fewer for narrower windows).
    - At the top: pyfar pads with the last value ("nearest"), we shrink the
      window; they differ within half a window width of Nyquist.
    - Where a window spans only a few bins: pyfar reads a cubic spline
      through the bins (it can overshoot around sharp peaks and lines), we
      read each bin as constant over its cell.
    - pyfar samples its log grid at n_bins points, coarser than the bins at
      high frequencies, so an isolated line can be missed or over-counted;
      here the integral over each window is exact, so the energy on the log
      axis is preserved.

    References
    ----------
    .. [1] J. G. Tylka, B. B. Boren, E. Y. Choueiri, "A generalized method for
       fractional-octave smoothing of transfer functions that preserves
       log-frequency symmetry", J. Audio Eng. Soc. 65(3), 239-245, 2017.
    .. [2] P. D. Hatziantoniou, J. N. Mourjopoulos, "Generalized
       fractional-octave smoothing of audio and acoustic responses",
       J. Audio Eng. Soc. 48(4), 259-280, 2000.
    """
    if not fraction > 0:
        raise ValueError(f"fraction must be positive, not {fraction!r}")
    p = _as_values(power, "power")
    n = p.shape[-1]
    f = np.arange(n, dtype=float) if freq_hz is None else freq_hz
    pos, edges = _bin_cells_oct(f, n)
    centres = np.log2(np.asarray(f, dtype=float)[pos])
    half = np.full(centres.size, 0.5 / float(fraction))
    half = np.minimum(half, np.minimum(centres - edges[0], edges[-1] - centres))
    out = p.copy()
    out[..., pos] = _window_mean(p[..., pos], edges, centres, half)
    return out


def smooth_bins_to_grid(
    power: np.ndarray,
    freq_hz: np.ndarray,
    grid_hz: np.ndarray,
    width_oct: float | np.ndarray,
) -> np.ndarray:
    """Smooth a power spectrum on linear bins and read it at log-grid frequencies.

    The same window mean as :func:`smooth_fractional_octave`, evaluated
    directly at ``grid_hz`` with a width per grid point, so a fine FFT
    spectrum goes onto a coarse log grid without point-sampling (which would
    skip most high-frequency bins) and without an intermediate full-length
    smoothed spectrum.

    Parameters
    ----------
    power : ndarray, shape (..., n_bins)
        Non-negative power spectrum.
    freq_hz : ndarray, shape (n_bins,)
        Bin frequencies, strictly increasing, non-negative; a 0 Hz bin is ignored.
    grid_hz : ndarray, shape (n_freqs,)
        Frequencies to read at, e.g. :func:`roomcorr.grid.log_grid`. Points
        below the first positive bin or above the last bin are held at the
        values there (as :func:`roomcorr.grid.interp_log` does).
    width_oct : float or ndarray, shape (n_freqs,)
        Total window width in octaves at each grid point, e.g.
        :func:`variable_width_oct`.

    Returns
    -------
    smoothed : ndarray, shape (..., n_freqs)

    References
    ----------
    .. [1] J. G. Tylka, B. B. Boren, E. Y. Choueiri, J. Audio Eng. Soc. 65(3), 2017.
    """
    p = _as_values(power, "power")
    n = p.shape[-1]
    pos, edges = _bin_cells_oct(freq_hz, n)
    fp = np.asarray(freq_hz, dtype=float)[pos]
    g = np.asarray(grid_hz, dtype=float)
    if g.ndim != 1 or not np.all(np.isfinite(g)):
        raise ValueError("grid_hz must be a finite 1-D array")
    centres = np.log2(np.clip(g, fp[0], fp[-1]))
    half = _half_widths(width_oct, g.size)
    half = np.minimum(half, np.minimum(centres - edges[0], edges[-1] - centres))
    return _window_mean(p[..., pos], edges, centres, half)


def smooth_log_grid(
    values: np.ndarray, points_per_octave: float, width_oct: float | np.ndarray
) -> np.ndarray:
    """Smooth values (power) on a uniform log-frequency grid, fixed or variable width.

    The point i holds its value over the cell ``[i - 1/2, i + 1/2]`` (in grid
    steps); the output at i is the mean over ``i -/+ width_oct[i] *
    points_per_octave / 2`` steps, partial cells counted by their overlap.
    For a width of an odd whole number of steps this is exactly a moving
    average of that many points.

    Parameters
    ----------
    values : ndarray, shape (..., n_freqs)
        Power (or any quantity to average linearly) on a grid whose points
        are ``2 ** (1 / points_per_octave)`` apart, e.g.
        :func:`roomcorr.grid.log_grid`.
    points_per_octave : float
        Grid resolution (:func:`roomcorr.grid.points_per_octave_of`).
    width_oct : float or ndarray, shape (n_freqs,)
        Total window width in octaves, one value or one per point (variable
        width, e.g. :func:`variable_width_oct`).

    Returns
    -------
    smoothed : ndarray, shape (..., n_freqs)
        Edges: the window is shrunk symmetrically so it never reaches past
        the first or last cell; the first and last points keep their values
        and the smoothing grows to full width over half a window from each
        end. Cost O(n_freqs) per row (cumulative sums).

    References
    ----------
    .. [1] J. G. Tylka, B. B. Boren, E. Y. Choueiri, J. Audio Eng. Soc. 65(3), 2017.
    """
    if not points_per_octave > 0:
        raise ValueError(f"points_per_octave must be positive, not {points_per_octave!r}")
    v = _as_values(values, "values")
    n = v.shape[-1]
    centres = np.arange(n, dtype=float)
    edges = np.arange(n + 1, dtype=float) - 0.5
    half = _half_widths(width_oct, n) * float(points_per_octave)
    half = np.minimum(half, np.minimum(centres + 0.5, n - 0.5 - centres))
    if v.size >= MATRIX_MIN_ROWS * n:  # many rows: one matrix product, the same weights
        return v @ _log_grid_matrix(n, half.tobytes())
    return _window_mean(v, edges, centres, half, unit_cells=True)


#: From this many rows on, :func:`smooth_log_grid` applies its weights as one matrix
#: product (BLAS) instead of running sums per row; the weights are the same.
MATRIX_MIN_ROWS = 64


@lru_cache(maxsize=32)
def _log_grid_matrix(n: int, half_bytes: bytes) -> np.ndarray:
    """(n, n) weights of :func:`smooth_log_grid` (column j: output point j), built by
    smoothing the identity with :func:`_window_mean`, so both paths agree exactly."""
    half = np.frombuffer(half_bytes, dtype=float)
    m = _window_mean(
        np.eye(n), np.arange(n + 1, dtype=float) - 0.5, np.arange(n, dtype=float), half, True
    )
    m.setflags(write=False)
    return m


def variable_width_oct(freq_hz: np.ndarray) -> np.ndarray:
    """Smoothing width in octaves, narrow in the bass and wider higher up.

    ``VW_NARROW_OCT`` (1/48 octave) up to ``VW_NARROW_HZ`` (100 Hz),
    ``VW_WIDE_OCT`` (1/8 octave) from ``VW_WIDE_HZ`` (1 kHz) up, and between
    them a raised-cosine transition in log frequency, interpolating the
    logarithm of the width (so the width grows by a constant ratio per
    octave in the middle of the transition and the curve has no kinks).

    Why these values: below about 100 Hz a domestic room is modal, and the
    peaks worth correcting are single resonances. 1/48 octave is a 1.4 %
    band (0.7 Hz at 50 Hz), which resolves resonances with Q up to about 70,
    more than room modes usually reach, while still taking the edge off FFT
    noise. Higher up the response changes within centimetres of microphone
    movement and fine detail is not worth correcting, so the width opens to
    1/8 octave, which still keeps features a few tenths of an octave wide.
    The top is held a little narrower than 1/6 octave because the design
    checks compare the corrected response, smoothed at 1/6 octave, against
    the target: a correction designed at the same width as the evaluation is
    smoothed twice and loses up to 2 dB on features a sixth of an octave wide
    (seen on the demo room), while 1/8 octave keeps that loss below 1 dB.

    Parameters
    ----------
    freq_hz : array_like, shape (n_freqs,)
        Frequencies; values at or below 0 Hz get the narrow width.

    Returns
    -------
    width_oct : ndarray, shape (n_freqs,)
        Total window width in octaves, between 1/48 and 1/8.
    """
    f = np.asarray(freq_hz, dtype=float)
    lf = np.log2(np.maximum(f, np.finfo(float).tiny))
    t = (lf - np.log2(VW_NARROW_HZ)) / (np.log2(VW_WIDE_HZ) - np.log2(VW_NARROW_HZ))
    t = np.clip(t, 0.0, 1.0)
    s = 0.5 - 0.5 * np.cos(np.pi * t)
    return VW_NARROW_OCT * (VW_WIDE_OCT / VW_NARROW_OCT) ** s
