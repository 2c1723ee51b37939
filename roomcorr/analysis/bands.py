"""Fractional-octave bands after IEC 61260-1:2014 (base-10 system).

Exact mid-band frequencies, band edges and the short nominal labels used in
octave and third-octave tables ("63", "1k", "12.5k").

The octave ratio is the base-10 one, ``G = 10 ** (3 / 10)`` (about 1.99526),
so third-octave mid-band frequencies are exactly ``1000 * 10 ** (x / 10)`` Hz
and a decade holds exactly ten third-octave bands.
"""

from __future__ import annotations

import math

import numpy as np

#: Octave frequency ratio of the base-10 system, IEC 61260-1:2014, 5.2.
G = 10.0 ** (3.0 / 10.0)
#: Reference frequency in Hz, IEC 61260-1:2014, 5.4.
F_REF_HZ = 1000.0

#: Mantissas of the nominal mid-band frequencies of third-octave bands (R10
#: preferred numbers, ISO 266 / IEC 61260-1 annex E). Octave-band nominal
#: values are every third one of these.
_R10 = (1.0, 1.25, 1.6, 2.0, 2.5, 3.15, 4.0, 5.0, 6.3, 8.0)

#: Bands that only touch the requested range within this many band indices
#: (rounding noise) do not count as overlapping it.
_TOUCH_TOL = 1e-9


def _check_fraction(fraction: int) -> int:
    if isinstance(fraction, bool) or int(fraction) != fraction or fraction < 1:
        raise ValueError(
            f"fraction must be a positive integer (1 = octave, 3 = third), not {fraction!r}"
        )
    return int(fraction)


def _offset(fraction: int) -> float:
    """Index offset of the mid-band exponent: 0 for odd b, 1/2 for even b."""
    return 0.0 if fraction % 2 else 0.5


def band_centres_hz(fraction: int, f_lo_hz: float = 20.0, f_hi_hz: float = 20000.0) -> np.ndarray:
    """Exact mid-band frequencies of the 1/``fraction``-octave bands covering a range.

    Odd bandwidth designators b use ``f_m = 1000 * G ** (x / b)``, even ones
    ``f_m = 1000 * G ** ((2 x + 1) / (2 b))`` (so that no band is centred on
    1 kHz for even b), with integer band index x and ``G = 10 ** (3 / 10)``.

    Every band that overlaps ``[f_lo_hz, f_hi_hz]`` is returned: the first is
    the band that contains ``f_lo_hz``, the last the one that contains
    ``f_hi_hz``. A band that only touches the range at an edge (to rounding)
    is left out. For example ``band_centres_hz(1, 63, 8000)`` gives the eight
    octave bands from nominal 63 Hz to nominal 8 kHz.

    Parameters
    ----------
    fraction : int
        Bandwidth designator b: 1 for octave, 3 for third-octave, 6, 12, 24...
    f_lo_hz, f_hi_hz : float
        Range to cover, ``0 < f_lo_hz <= f_hi_hz``.

    Returns
    -------
    centres_hz : ndarray, shape (n_bands,)
        Ascending exact mid-band frequencies.

    References
    ----------
    .. [1] IEC 61260-1:2014, Electroacoustics - Octave-band and
       fractional-octave-band filters - Part 1: Specifications, equations (1)-(3).
    """
    b = _check_fraction(fraction)
    if not (0 < f_lo_hz <= f_hi_hz) or not math.isfinite(f_hi_hz):
        raise ValueError(f"need 0 < f_lo_hz <= f_hi_hz, got {f_lo_hz!r}, {f_hi_hz!r}")
    off = _offset(b)
    # Band x spans exponents (x + off - 1/2)/b .. (x + off + 1/2)/b of G.
    u_lo = b * math.log10(f_lo_hz / F_REF_HZ) / 0.3
    u_hi = b * math.log10(f_hi_hz / F_REF_HZ) / 0.3
    x_min = math.floor(u_lo - off - 0.5 + _TOUCH_TOL) + 1
    x_max = math.ceil(u_hi - off + 0.5 - _TOUCH_TOL) - 1
    x = np.arange(x_min, x_max + 1, dtype=float)
    # G ** ((x + off) / b) written as a power of ten with a rational exponent,
    # so decade multiples come out exact (x = -10, b = 3 gives 100.0 Hz).
    return F_REF_HZ * 10.0 ** (3.0 * (x + off) / (10.0 * b))


def band_edges_hz(centres_hz: np.ndarray, fraction: int) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper band-edge frequencies of 1/``fraction``-octave bands.

    ``f_1 = f_m * G ** (-1 / (2 b))`` and ``f_2 = f_m * G ** (1 / (2 b))``, so
    ``f_2 / f_1 = G ** (1 / b)`` and ``f_m`` is the geometric mean of the edges.

    Parameters
    ----------
    centres_hz : array_like, shape (n_bands,)
        Exact mid-band frequencies (see :func:`band_centres_hz`).
    fraction : int
        Bandwidth designator b.

    Returns
    -------
    lo_hz, hi_hz : ndarray, shape (n_bands,)

    References
    ----------
    .. [1] IEC 61260-1:2014, equations (4) and (5).
    """
    b = _check_fraction(fraction)
    fm = np.asarray(centres_hz, dtype=float)
    half = G ** (1.0 / (2 * b))
    return fm / half, fm * half


def octave_centres_hz(f_lo_hz: float = 63.0, f_hi_hz: float = 8000.0) -> np.ndarray:
    """Exact octave mid-band frequencies from the band holding ``f_lo_hz`` to the one
    holding ``f_hi_hz`` (nominal values such as 63 and 8000 work as limits).

    Returns
    -------
    centres_hz : ndarray, shape (n_bands,)
    """
    return band_centres_hz(1, f_lo_hz, f_hi_hz)


def nominal_hz(centre_hz: float) -> float:
    """Nominal mid-band frequency of an octave or third-octave band.

    Parameters
    ----------
    centre_hz : float
        Exact (or nearly exact) octave or third-octave mid-band frequency.

    Returns
    -------
    float
        The R10 preferred number of that band, e.g. 31.5 for 31.62 Hz.

    Raises
    ------
    ValueError
        If ``centre_hz`` is not within a tenth of a third-octave band of a
        third-octave mid-band frequency (for instance a 1/6-octave centre
        that lies between two third-octave bands): nominal values are only
        defined for octave and third-octave bands.

    References
    ----------
    .. [1] IEC 61260-1:2014, annex E (nominal mid-band frequencies), and
       ISO 266 (preferred frequencies, R10 series).
    """
    f = float(centre_hz)
    if not (f > 0 and math.isfinite(f)):
        raise ValueError(f"centre_hz must be a positive frequency, not {centre_hz!r}")
    u = 10.0 * math.log10(f)  # third-octave index relative to 1 Hz
    k = round(u)
    if abs(u - k) > 0.1:
        raise ValueError(
            f"{f:g} Hz is not an octave or third-octave mid-band frequency; "
            "nominal values exist only for those bands"
        )
    decade, step = divmod(k, 10)
    return float(round(_R10[step] * 10.0**decade, 6))


def nominal_label(centre_hz: float) -> str:
    """Short nominal label of an octave or third-octave band: "31.5", "63", "1k", "12.5k".

    Parameters
    ----------
    centre_hz : float
        Exact mid-band frequency (see :func:`nominal_hz` for what is accepted).

    Returns
    -------
    str
        Hertz below 1 kHz, kilohertz with a "k" from 1 kHz up.
    """
    n = nominal_hz(centre_hz)
    if n >= 1000.0:
        return f"{n / 1000.0:g}k"
    return f"{n:g}"
