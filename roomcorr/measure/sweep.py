"""Synchronised exponential sine sweep and its analytic inverse spectrum.

The sweep is built so that its k-th harmonic is an exact copy of the sweep
advanced by ``L ln k``; deconvolution then places each harmonic's impulse
response at lag ``-L ln k`` with synchronised phase.

References
----------
.. [1] A. Novak, L. Simon, P. Lotton, "Synchronized swept-sine: theory,
   application, and implementation", J. Audio Eng. Soc. 63(10), 2015
   (equations 32, 33 and 43).
.. [2] A. Farina, "Simultaneous measurement of impulse response and distortion
   with a swept-sine technique", AES 108th Convention, Paris, 2000.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np


@dataclass(frozen=True)
class Sweep:
    """A synchronised sweep at one sample rate.

    Attributes
    ----------
    fs : int
        Sample rate in Hz.
    f_start_hz, f_end_hz : float
        Start and (nominal) end frequency of the sweep.
    rate_s : float
        ``L`` of [1]_: time for the instantaneous frequency to grow by a factor e.
    duration_s : float
        Sweep length ``T = L ln(f_end/f_start)`` (after synchronisation).
    level_dbfs : float
        Peak level of the sweep in dBFS.
    fade_in_s, fade_out_s : float
        Raised-cosine fade lengths (inside ``duration_s``).
    """

    fs: int
    f_start_hz: float
    f_end_hz: float
    rate_s: float
    duration_s: float
    level_dbfs: float
    fade_in_s: float
    fade_out_s: float

    @property
    def n_samples(self) -> int:
        """Number of samples of the sweep itself (no silence)."""
        return int(round(self.duration_s * self.fs))

    @property
    def amplitude(self) -> float:
        """Linear peak amplitude (full scale = 1)."""
        return float(10.0 ** (self.level_dbfs / 20.0))

    def harmonic_lag_s(self, order: int) -> float:
        """Lag of the ``order``-th harmonic impulse response: ``-L ln k`` (Farina 2000)."""
        return -self.rate_s * float(np.log(order))

    def signal(self) -> np.ndarray:
        """Return the faded sweep, shape (n_samples,), float64, peak ``amplitude``.

        ``x(t) = A sin(2 pi f1 L exp(t/L))``, eq. (32) of [1]_; since ``f1 L`` is an
        integer the phase at ``t = 0`` is a multiple of 2 pi and ``x(0) = 0``.
        """
        t = np.arange(self.n_samples) / self.fs
        x = np.sin(2.0 * np.pi * self.f_start_hz * self.rate_s * np.exp(t / self.rate_s))
        x *= _fade_window(self.n_samples, self.fs, self.fade_in_s, self.fade_out_s)
        return self.amplitude * x

    def inverse_spectrum(self, n_fft: int, taper_octaves: float = 0.5) -> np.ndarray:
        """Analytic inverse of the sweep spectrum on the ``rfft`` bins of length ``n_fft``.

        ``X~(f) = 2 sqrt(f/L) exp(-j 2 pi f L (1 - ln(f/f1)) + j pi/4)``, eq. (43) of [1]_,
        divided by ``fs * amplitude`` so that ``irfft(rfft(x, n) * X~)`` is a unit
        impulse at lag 0 for the sweep itself. Outside ``[f_start_hz, f_end_hz]``
        the inverse is faded to zero over ``taper_octaves`` (raised cosine in log
        frequency) so that out-of-band noise is not amplified.

        Returns
        -------
        ndarray, shape (n_fft // 2 + 1,), complex
        """
        f = np.fft.rfftfreq(n_fft, 1.0 / self.fs)
        f_safe = np.maximum(f, 1e-9)
        L = self.rate_s
        inv = (
            2.0
            * np.sqrt(f_safe / L)
            * np.exp(
                -2j * np.pi * f_safe * L * (1.0 - np.log(f_safe / self.f_start_hz)) + 1j * np.pi / 4
            )
        )
        inv *= band_taper(f, self.f_start_hz, self.f_end_hz, self.fs, taper_octaves)
        return inv / (self.fs * self.amplitude)

    def to_dict(self) -> dict:
        """Plain dictionary (JSON-ready) describing the sweep."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict) -> Sweep:
        """Rebuild a sweep from :meth:`to_dict` output."""
        names = cls.__dataclass_fields__.keys()
        return cls(**{k: data[k] for k in names})


def synchronized_sweep(
    fs: int,
    f_start_hz: float = 20.0,
    f_end_hz: float = 20000.0,
    duration_s: float = 5.0,
    level_dbfs: float = -20.0,
    fade_in_s: float = 0.05,
    fade_out_s: float = 0.005,
) -> Sweep:
    """Design a synchronised sweep close to the requested duration.

    ``L = round(f1 T^ / ln(f2/f1)) / f1`` and ``T = L ln(f2/f1)`` (eq. 33 of
    Novak et al. 2015), so the actual duration differs slightly from
    ``duration_s``.

    Parameters
    ----------
    fs : int
        Sample rate in Hz.
    f_start_hz, f_end_hz : float
        Frequency band; ``0 < f_start_hz < f_end_hz < fs / 2``.
    duration_s : float
        Requested sweep length in seconds.
    level_dbfs : float
        Peak level in dBFS.
    fade_in_s, fade_out_s : float
        Raised-cosine fade lengths.

    Returns
    -------
    Sweep

    References
    ----------
    A. Novak, L. Simon, P. Lotton, J. Audio Eng. Soc. 63(10), 2015.
    """
    if not 0 < f_start_hz < f_end_hz < fs / 2:
        raise ValueError("need 0 < f_start_hz < f_end_hz < fs/2")
    ratio = np.log(f_end_hz / f_start_hz)
    k = max(1, int(round(f_start_hz * duration_s / ratio)))
    rate_s = k / f_start_hz
    return Sweep(
        fs=int(fs),
        f_start_hz=float(f_start_hz),
        f_end_hz=float(f_end_hz),
        rate_s=float(rate_s),
        duration_s=float(rate_s * ratio),
        level_dbfs=float(level_dbfs),
        fade_in_s=float(fade_in_s),
        fade_out_s=float(fade_out_s),
    )


def band_taper(
    freq_hz: np.ndarray, f_lo_hz: float, f_hi_hz: float, fs: float, octaves: float = 0.5
) -> np.ndarray:
    """Weight 1 inside ``[f_lo_hz, f_hi_hz]``, raised-cosine fade in log frequency outside.

    The fade above ``f_hi_hz`` ends at ``min(f_hi_hz * 2**octaves, fs/2)``.

    Returns
    -------
    ndarray, same shape as ``freq_hz``
    """
    f = np.maximum(np.asarray(freq_hz, dtype=float), 1e-9)
    w = np.ones_like(f)
    lo_end = f_lo_hz * 2.0 ** (-octaves)
    x = np.clip(np.log2(f / lo_end) / np.log2(f_lo_hz / lo_end), 0.0, 1.0)
    w *= 0.5 - 0.5 * np.cos(np.pi * x)
    hi_end = min(f_hi_hz * 2.0**octaves, fs / 2.0)
    if hi_end > f_hi_hz:
        y = np.clip(np.log2(f / f_hi_hz) / np.log2(hi_end / f_hi_hz), 0.0, 1.0)
        w *= 0.5 + 0.5 * np.cos(np.pi * y)
    else:
        w[f > f_hi_hz] = 0.0
    return w


def _fade_window(n: int, fs: float, fade_in_s: float, fade_out_s: float) -> np.ndarray:
    w = np.ones(n)
    n_in = min(n // 2, int(round(fade_in_s * fs)))
    n_out = min(n // 2, int(round(fade_out_s * fs)))
    if n_in > 0:
        w[:n_in] = 0.5 - 0.5 * np.cos(np.pi * np.arange(n_in) / n_in)
    if n_out > 0:
        w[n - n_out :] = 0.5 + 0.5 * np.cos(np.pi * (np.arange(n_out) + 1) / n_out)
    return w


def playback_signal(sweep: Sweep, noise_s: float, tail_s: float, repeats: int) -> np.ndarray:
    """Silence (noise-only recording), then ``repeats`` x (sweep + silent tail).

    Returns
    -------
    ndarray, shape (n_total,)
    """
    n_noise = int(round(noise_s * sweep.fs))
    n_tail = int(round(tail_s * sweep.fs))
    one = np.concatenate([sweep.signal(), np.zeros(n_tail)])
    return np.concatenate([np.zeros(n_noise)] + [one] * repeats)


def sweep_starts(sweep: Sweep, noise_s: float, tail_s: float, repeats: int) -> list[int]:
    """Sample index of each sweep start in :func:`playback_signal`."""
    n_noise = int(round(noise_s * sweep.fs))
    period = sweep.n_samples + int(round(tail_s * sweep.fs))
    return [n_noise + r * period for r in range(repeats)]
