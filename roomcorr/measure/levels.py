"""Input levels in dBFS and, with the microphone's sensitivity, in dB SPL.

Conventions
-----------
* dBFS of a signal is its RMS relative to the RMS of a full-scale sine
  (AES17): a full-scale sine reads 0 dBFS, its RMS being ``1/sqrt(2)``.
* The microphone sensitivity ``sensitivity_dbfs`` is the level in dBFS that a
  tone of 94 dB SPL (1 Pa RMS re 20 uPa) gives at the input, as read with an
  acoustic calibrator (IEC 60942: 94 or 114 dB SPL at 1 kHz). Then
  ``L_SPL = L_dBFS - sensitivity_dbfs + 94``.
* Levels here are unweighted (Z) and the short-term level uses 125 ms
  blocks, close to the "fast" time weighting of sound level meters (IEC 61672-1,
  from memory).

All functions are pure except :func:`sensitivity_from_file`, which reads a
calibration file's header.

References
----------
.. [1] AES17-2020, "AES standard method for digital audio engineering:
   measurement of digital audio equipment" (dBFS of a full-scale sine, from memory).
.. [2] IEC 60942:2017, Electroacoustics: sound calibrators.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from roomcorr.errors import InputFileError

#: dB SPL of 1 Pa RMS (20 log10(1 / 20e-6)).
PA_DB_SPL = 93.9794
#: Level of the usual acoustic calibrator, dB SPL (nominal 94 dB; IEC 60942).
CALIBRATOR_DB_SPL = 94.0
_SINE_RMS_DB = 20 * np.log10(np.sqrt(0.5))  # -3.0103 dB


def rms_dbfs(x: np.ndarray) -> float:
    """RMS level of ``x`` (shape (n,)) in dBFS (AES17: full-scale sine = 0 dBFS)."""
    ms = float(np.mean(np.asarray(x, dtype=float) ** 2)) if np.size(x) else 0.0
    return float(10 * np.log10(max(ms, 1e-30)) - _SINE_RMS_DB)


def short_term_max_dbfs(x: np.ndarray, fs: int, block_s: float = 0.125) -> float:
    """Highest RMS level over consecutive ``block_s`` blocks, dBFS (AES17)."""
    n = max(1, int(round(block_s * fs)))
    x = np.asarray(x, dtype=float)
    m = len(x) // n
    if m == 0:
        return rms_dbfs(x)
    ms = np.mean(x[: m * n].reshape(m, n) ** 2, axis=1)
    return float(10 * np.log10(max(float(ms.max()), 1e-30)) - _SINE_RMS_DB)


def octave_levels_dbfs(x: np.ndarray, fs: int, centres_hz: np.ndarray) -> dict[float, float]:
    """Level per octave band in dBFS (AES17), from the periodogram of ``x``.

    Band edges ``f_m * 10**(+-0.15)`` (IEC 61260-1 base-10 octaves); the
    periodogram (Hann window, power-corrected) is summed over each band, so by
    Parseval the bands add up to :func:`rms_dbfs` of the whole signal.

    Returns
    -------
    dict
        ``{centre_hz: level_dbfs}``.
    """
    x = np.asarray(x, dtype=float)
    n = len(x)
    w = np.hanning(n)
    spec = np.abs(np.fft.rfft(x * w)) ** 2 / np.sum(w**2) / n
    spec[1:-1] *= 2.0  # one-sided
    f = np.fft.rfftfreq(n, 1.0 / fs)
    out = {}
    for fc in centres_hz:
        sel = (f >= fc * 10**-0.15) & (f < fc * 10**0.15)
        p = float(spec[sel].sum())
        out[float(fc)] = float(10 * np.log10(max(p, 1e-30)) - _SINE_RMS_DB)
    return out


#: Nominal labels of the base-10 octave mid-bands (IEC 61260-1 annex; exact 1000 * 10**(0.3 x)).
NOMINAL_OCTAVES_HZ = (
    16.0,
    31.5,
    63.0,
    125.0,
    250.0,
    500.0,
    1000.0,
    2000.0,
    4000.0,
    8000.0,
    16000.0,
)


def nominal_label(centre_hz: float) -> str:
    """The nominal label ("125", "31.5") of an exact octave mid-band frequency."""
    near = min(NOMINAL_OCTAVES_HZ, key=lambda f: abs(np.log(f / centre_hz)))
    return f"{near:g}"


def to_spl(level_dbfs: float, sensitivity_dbfs: float) -> float:
    """dB SPL of a level in dBFS for a microphone of ``sensitivity_dbfs`` (dBFS at 94 dB SPL)."""
    return float(level_dbfs - sensitivity_dbfs + CALIBRATOR_DB_SPL)


def sensitivity_from_calibrator(
    x: np.ndarray, fs: int, calibrator_db_spl: float = 94.0, tone_hz: float = 1000.0
) -> tuple[float, float]:
    """Microphone sensitivity from a recording of an acoustic calibrator.

    The tone's level is taken from a third-octave band around ``tone_hz``
    (so background noise outside the band does not count); the result is the
    dBFS that 94 dB SPL would read.

    Returns
    -------
    sensitivity_dbfs : float
    tone_fraction : float
        Share of the recording's power in that band (near 1 for a clean tone).
    """
    x = np.asarray(x, dtype=float) - float(np.mean(x))
    n = len(x)
    w = np.hanning(n)
    spec = np.abs(np.fft.rfft(x * w)) ** 2
    f = np.fft.rfftfreq(n, 1.0 / fs)
    sel = (f >= tone_hz * 2 ** (-1 / 6)) & (f < tone_hz * 2 ** (1 / 6))
    total = float(spec[1:].sum()) + 1e-30
    frac = float(spec[sel].sum()) / total
    tone_dbfs = rms_dbfs(x) + 10 * np.log10(max(frac, 1e-30))
    return float(tone_dbfs - (calibrator_db_spl - CALIBRATOR_DB_SPL)), frac


def sensitivity_from_file(path: str) -> float:
    """The ``# sensitivity_dbfs = X`` line of a microphone calibration file's header.

    Header lines start with ``#``; the key is matched without regard to case.
    Raises :class:`~roomcorr.errors.InputFileError` naming the file when there is
    none or it is not a number.
    """


    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8", errors="replace")
    except OSError as exc:
        raise InputFileError(f"{p}: cannot read the calibration file ({exc})") from exc
    pat = re.compile(r"^\s*#\s*sensitivity_dbfs\s*[=:]\s*(\S+)", re.IGNORECASE)
    for line in text.splitlines():
        if not line.lstrip().startswith("#"):
            if line.strip():
                break  # header ends at the first data line
            continue
        m = pat.match(line)
        if m:
            try:
                value = float(m.group(1))
            except ValueError:
                break
            if not np.isfinite(value):
                break
            return value
    raise InputFileError(
        f"{p}: no '# sensitivity_dbfs = X' line in the header; give --mic-sensitivity or "
        "run 'roomcorr calibrate-mic'"
    )
