"""Second-order sections: Audio EQ Cookbook formulas, responses, stability and rounding checks.

A section is described by its parameters (type, centre or shelf frequency,
gain, Q) in analogue-prototype terms. Coefficients for a sample rate are
computed from those parameters with the cookbook formulas (bilinear transform,
frequency pre-warped so the digital section matches the analogue one exactly
at ``f0``). Normalised coefficients use ``a0 = 1`` and are stored per section
in the order ``b0, b1, b2, a1, a2``.

Conventions (cookbook)
----------------------
``A = 10 ** (gain_db / 40)``, ``w0 = 2 pi f0 / fs``, ``alpha = sin(w0) / (2 Q)``.

* peaking: ``f0`` is the centre, where the gain equals ``gain_db``; unity at DC
  and Nyquist. ``Q`` is the cookbook Q (band edges at the midpoint gain,
  ``gain_db / 2``, in the analogue prototype).
* lowshelf / highshelf: ``f0`` is the midpoint, where the gain is ``gain_db / 2``;
  the shelf reaches ``gain_db`` at DC (low) or Nyquist (high). ``Q = 1/sqrt(2)``
  is shelf slope ``S = 1``, the steepest shelf without overshoot; roomcorr keeps
  shelf Q at or below that, so a shelf's response always lies between 0 dB and
  its gain.

Stability margin
----------------
Every section's poles must satisfy ``|p| <= 1 - POLE_MARGIN`` with
``POLE_MARGIN = 1e-6`` after rounding to 32-bit float. Float32 spacing just
below 1 is about 6e-8, so the margin is about 16 float32 steps: a pole that
passes cannot be pushed onto the unit circle by one more rounding.

References
----------
R. Bristow-Johnson, "Audio EQ Cookbook", W3C Audio Working Group Note, 2021.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.signal import sosfilt

from roomcorr.errors import SafetyError

KINDS: tuple[str, ...] = ("peaking", "lowshelf", "highshelf")
#: Q of a shelf with slope S = 1 (cookbook): 1/Q = sqrt((A + 1/A)(1/S - 1) + 2) = sqrt(2).
SHELF_MAX_Q = 1.0 / np.sqrt(2.0)
POLE_MARGIN = 1e-6
FLOAT32_TOL_DB = 0.1


@dataclass(frozen=True)
class Section:
    """Parameters of one second-order section (analogue-prototype terms).

    Attributes
    ----------
    kind : str
        ``"peaking"``, ``"lowshelf"`` or ``"highshelf"``.
    f0_hz : float
        Centre (peaking) or midpoint (shelf) frequency in Hz.
    gain_db : float
        Gain at ``f0`` (peaking) or shelf plateau gain (shelves) in dB.
    q : float
        Cookbook Q.
    """

    kind: str
    f0_hz: float
    gain_db: float
    q: float

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise ValueError(f"unknown section kind {self.kind!r}; use one of {KINDS}")


#: Sections of one kind whose frequencies lie closer than this (octaves) do one job:
#: :func:`tidy_sections` merges them (a 1/24 octave is finer than the fit grid's
#: resolution of a Q-12 section, whose bandwidth is about 1/8 octave).
MERGE_OCT = 1.0 / 24.0
#: Sections weaker than this (dB) are dropped by :func:`tidy_sections`.
MIN_GAIN_DB = 0.1


def tidy_sections(
    sections: Sequence[Section],
    gain_range_db: tuple[float, float] = (-np.inf, np.inf),
    merge_oct: float = MERGE_OCT,
    min_gain_db: float = MIN_GAIN_DB,
    fs_max: float | None = None,
    sens_limit_db: float | None = None,
) -> list[Section]:
    """Merge sections of one kind on (nearly) the same frequency and drop near-zero ones.

    Two sections of the same kind whose frequencies are within ``merge_oct``
    become one: gains add (in dB, as the cascade multiplies them; exact at the
    common frequency when the frequencies agree), and the frequency and the Q
    are the |gain|-weighted means of theirs in octaves (log2). With ``fs_max``
    and ``sens_limit_db``, a merge is made only when the merged section stays
    robust to float32 rounding at ``fs_max``
    (:func:`float32_sensitivity_db` at most ``sens_limit_db``): a deep, narrow
    cut low in frequency that one float32 section cannot hold is split over two
    on purpose, and stays split.
    The merged gain is clipped to ``gain_range_db``. Then every section with
    ``|gain_db| < min_gain_db`` is dropped. Frequency order is kept.

    Parameters
    ----------
    sections : sequence of Section
    gain_range_db : (float, float)
    merge_oct, min_gain_db : float

    Returns
    -------
    list of Section
    """
    out: list[Section] = []
    for s in sorted(sections, key=lambda t: (t.kind, t.f0_hz)):
        prev = out[-1] if out else None
        if (
            prev is not None
            and prev.kind == s.kind
            and abs(np.log2(s.f0_hz / prev.f0_hz)) < merge_oct
        ):
            wa, wb = abs(prev.gain_db), abs(s.gain_db)
            w = wa + wb
            lf = (
                (wa * np.log2(prev.f0_hz) + wb * np.log2(s.f0_hz)) / w
                if w > 0 else np.log2(prev.f0_hz)
            )
            gain = float(np.clip(prev.gain_db + s.gain_db, *gain_range_db))
            lq = (
                (wa * np.log2(prev.q) + wb * np.log2(s.q)) / w if w > 0 else np.log2(prev.q)
            )
            q = float(np.clip(2.0**lq, min(prev.q, s.q), max(prev.q, s.q)))  # no rounding out
            merged = Section(s.kind, float(2.0**lf), gain, q)
            if fs_max is not None and sens_limit_db is not None and float32_sensitivity_db(
                np.array([0]), np.array([merged.f0_hz]), np.array([gain]), np.array([q]), fs_max
            )[0] > sens_limit_db:
                out.append(s)  # a deliberate split (float32), not a redundant section
                continue
            out[-1] = merged
        else:
            out.append(s)
    return sorted((s for s in out if abs(s.gain_db) >= min_gain_db), key=lambda t: t.f0_hz)


def is_tidy(sections: Sequence[Section], fs_max: float | None = None,
            sens_limit_db: float | None = None) -> bool:
    """True when :func:`tidy_sections` (same arguments) has nothing to merge or drop."""
    return len(tidy_sections(sections, fs_max=fs_max, sens_limit_db=sens_limit_db)) == len(
        sections
    )


def _arrays(sections: Sequence[Section]) -> tuple[np.ndarray, ...]:
    kind = np.array([KINDS.index(s.kind) for s in sections], dtype=int)
    f0 = np.array([s.f0_hz for s in sections], dtype=float)
    gain = np.array([s.gain_db for s in sections], dtype=float)
    q = np.array([s.q for s in sections], dtype=float)
    return kind, f0, gain, q


def coefficients_from_arrays(
    kind: np.ndarray, f0_hz: np.ndarray, gain_db: np.ndarray, q: np.ndarray, fs: float
) -> np.ndarray:
    """Cookbook coefficients for many sections at once.

    Parameters
    ----------
    kind : ndarray of int, shape (n_sections,)
        Index into :data:`KINDS`.
    f0_hz, gain_db, q : ndarray, shape (n_sections,)
    fs : float
        Sample rate in Hz; every ``f0_hz`` must be below ``fs / 2``.

    Returns
    -------
    coeffs : ndarray, shape (n_sections, 5)
        Normalised ``b0, b1, b2, a1, a2`` (a0 = 1).

    References
    ----------
    R. Bristow-Johnson, "Audio EQ Cookbook", W3C Audio Working Group Note, 2021.
    """
    kind = np.asarray(kind)
    f0_hz = np.asarray(f0_hz, dtype=float)
    if np.any(f0_hz <= 0) or np.any(f0_hz >= fs / 2):
        raise ValueError(f"section frequencies must lie in (0, fs/2) = (0, {fs / 2}) Hz")
    a = 10.0 ** (np.asarray(gain_db, dtype=float) / 40.0)
    w0 = 2.0 * np.pi * f0_hz / fs
    cw = np.cos(w0)
    alpha = np.sin(w0) / (2.0 * np.asarray(q, dtype=float))
    sa = 2.0 * np.sqrt(a) * alpha
    out = np.empty((len(f0_hz), 6))
    pk = kind == 0
    out[pk] = np.stack(
        [1 + alpha * a, -2 * cw, 1 - alpha * a, 1 + alpha / a, -2 * cw, 1 - alpha / a], axis=1
    )[pk]
    ls = kind == 1
    out[ls] = np.stack(
        [
            a * ((a + 1) - (a - 1) * cw + sa),
            2 * a * ((a - 1) - (a + 1) * cw),
            a * ((a + 1) - (a - 1) * cw - sa),
            (a + 1) + (a - 1) * cw + sa,
            -2 * ((a - 1) + (a + 1) * cw),
            (a + 1) + (a - 1) * cw - sa,
        ],
        axis=1,
    )[ls]
    hs = kind == 2
    out[hs] = np.stack(
        [
            a * ((a + 1) + (a - 1) * cw + sa),
            -2 * a * ((a - 1) + (a + 1) * cw),
            a * ((a + 1) + (a - 1) * cw - sa),
            (a + 1) - (a - 1) * cw + sa,
            2 * ((a - 1) - (a + 1) * cw),
            (a + 1) - (a - 1) * cw - sa,
        ],
        axis=1,
    )[hs]
    a0 = out[:, 3:4]
    return np.concatenate([out[:, 0:3] / a0, out[:, 4:6] / a0], axis=1)


def coefficients(sections: Sequence[Section], fs: float) -> np.ndarray:
    """Normalised cookbook coefficients of a cascade at sample rate ``fs``.

    Returns
    -------
    coeffs : ndarray, shape (n_sections, 5)
        ``b0, b1, b2, a1, a2`` per section, in cascade order.
    """
    if len(sections) == 0:
        return np.zeros((0, 5))
    return coefficients_from_arrays(*_arrays(sections), fs)


def to_sos(coeffs: np.ndarray) -> np.ndarray:
    """Convert ``(n, 5)`` normalised coefficients to scipy's ``(n, 6)`` sos layout."""
    coeffs = np.atleast_2d(coeffs)
    return np.concatenate([coeffs[:, :3], np.ones((len(coeffs), 1)), coeffs[:, 3:]], axis=1)


def section_responses(coeffs: np.ndarray, freq_hz: np.ndarray, fs: float) -> np.ndarray:
    """Complex response of each section.

    Parameters
    ----------
    coeffs : ndarray, shape (n_sections, 5)
    freq_hz : ndarray, shape (n_freqs,)
    fs : float

    Returns
    -------
    h : ndarray, complex, shape (n_sections, n_freqs)
    """
    coeffs = np.atleast_2d(np.asarray(coeffs, dtype=float))
    z1 = np.exp(-2j * np.pi * np.asarray(freq_hz, dtype=float) / fs)[None, :]
    z2 = z1 * z1
    num = coeffs[:, 0:1] + coeffs[:, 1:2] * z1 + coeffs[:, 2:3] * z2
    den = 1.0 + coeffs[:, 3:4] * z1 + coeffs[:, 4:5] * z2
    return num / den


def cascade_response_db(coeffs: np.ndarray, freq_hz: np.ndarray, fs: float) -> np.ndarray:
    """Magnitude in dB of the cascade, shape (n_freqs,)."""
    freq_hz = np.asarray(freq_hz, dtype=float)
    if len(coeffs) == 0:
        return np.zeros(freq_hz.shape)
    h = section_responses(coeffs, freq_hz, fs)
    return np.sum(20.0 * np.log10(np.maximum(np.abs(h), 1e-300)), axis=0)


def analog_responses_from_arrays(
    kind: np.ndarray, f0_hz: np.ndarray, gain_db: np.ndarray, q: np.ndarray, freq_hz: np.ndarray
) -> np.ndarray:
    """Magnitude in dB of each analogue prototype section, shape (n_sections, n_freqs).

    Prototypes (cookbook, s normalised to ``f0``):
    peaking ``(s^2 + s A/Q + 1) / (s^2 + s/(A Q) + 1)``;
    lowshelf ``A (s^2 + s sqrt(A)/Q + A) / (A s^2 + s sqrt(A)/Q + 1)``;
    highshelf ``A (A s^2 + s sqrt(A)/Q + 1) / (s^2 + s sqrt(A)/Q + A)``.

    References
    ----------
    R. Bristow-Johnson, "Audio EQ Cookbook", W3C Audio Working Group Note, 2021.
    """
    a = 10.0 ** (np.asarray(gain_db, dtype=float)[:, None] / 40.0)
    q = np.asarray(q, dtype=float)[:, None]
    kind = np.asarray(kind)[:, None]
    s = 1j * np.asarray(freq_hz, dtype=float)[None, :] / np.asarray(f0_hz, dtype=float)[:, None]
    s2 = s * s
    sq = np.sqrt(a) / q * s
    num = np.where(kind == 0, s2 + s * a / q + 1, np.where(kind == 1, a * (s2 + sq + a),
                                                           a * (a * s2 + sq + 1)))
    den = np.where(kind == 0, s2 + s / (a * q) + 1, np.where(kind == 1, a * s2 + sq + 1,
                                                             s2 + sq + a))
    return 20.0 * np.log10(np.abs(num / den))


def analog_db_and_jacobian(
    kind: np.ndarray, f0_hz: np.ndarray, gain_db: np.ndarray, q: np.ndarray, freq_hz: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Analogue section magnitudes and their derivatives (for least-squares fitting).

    Returns
    -------
    h_db : ndarray, shape (n_sections, n_freqs)
        As :func:`analog_responses_from_arrays`.
    jac : ndarray, shape (n_sections, 3, n_freqs)
        Derivatives of ``h_db`` with respect to ``log2(f0_hz)``, ``gain_db`` and
        ``log2(q)``, from ``d ln|H| = Re(dN/N - dD/D)``.
    """
    ln2 = np.log(2.0)
    a = 10.0 ** (np.asarray(gain_db, dtype=float)[:, None] / 40.0)
    da = a * np.log(10.0) / 40.0
    q = np.asarray(q, dtype=float)[:, None]
    kind = np.asarray(kind)[:, None]
    s = 1j * np.asarray(freq_hz, dtype=float)[None, :] / np.asarray(f0_hz, dtype=float)[:, None]
    s2 = s * s
    ra = np.sqrt(a)
    ds = -s * ln2  # ds / dlog2(f0)
    pk, ls = kind == 0, kind == 1
    # numerator n (without the leading A of the shelves) and denominator d
    n = np.where(pk, s2 + s * a / q + 1, np.where(ls, s2 + ra / q * s + a, a * s2 + ra / q * s + 1))
    d = np.where(pk, s2 + s / (a * q) + 1, np.where(ls, a * s2 + ra / q * s + 1,
                                                    s2 + ra / q * s + a))
    dn_ds = np.where(pk, 2 * s + a / q, np.where(ls, 2 * s + ra / q, 2 * a * s + ra / q))
    dd_ds = np.where(pk, 2 * s + 1 / (a * q), np.where(ls, 2 * a * s + ra / q, 2 * s + ra / q))
    dn_da = np.where(pk, s / q, np.where(ls, s / (2 * ra * q) + 1, s2 + s / (2 * ra * q)))
    dd_da = np.where(pk, -s / (a * a * q), np.where(ls, s2 + s / (2 * ra * q),
                                                    s / (2 * ra * q) + 1))
    lead = np.where(pk, 0.0, 1.0 / a)  # d ln(A) / dA for the shelves' leading factor
    dn_dlq = np.where(pk, -s * a / q, -s * ra / q) * ln2
    dd_dlq = np.where(pk, -s / (a * q), -s * ra / q) * ln2
    k = 20.0 / np.log(10.0)
    h_db = k * np.log(np.abs(np.where(pk, 1.0, a) * n / d))
    j_f = k * np.real(dn_ds * ds / n - dd_ds * ds / d)
    j_g = k * np.real(dn_da / n - dd_da / d + lead) * da
    j_q = k * np.real(dn_dlq / n - dd_dlq / d)
    return h_db, np.stack([j_f, j_g, j_q], axis=1)


def analog_response_db(sections: Sequence[Section], freq_hz: np.ndarray) -> np.ndarray:
    """Magnitude in dB of the analogue prototype cascade, shape (n_freqs,)."""
    freq_hz = np.asarray(freq_hz, dtype=float)
    if len(sections) == 0:
        return np.zeros(freq_hz.shape)
    return analog_responses_from_arrays(*_arrays(sections), freq_hz).sum(axis=0)


def pole_radii(coeffs: np.ndarray) -> np.ndarray:
    """Largest pole radius of each section, shape (n_sections,).

    Poles are the roots of ``z^2 + a1 z + a2``.
    """
    coeffs = np.atleast_2d(np.asarray(coeffs, dtype=float))
    a1 = coeffs[:, 3].astype(complex)
    a2 = coeffs[:, 4].astype(complex)
    disc = np.sqrt(a1 * a1 - 4 * a2)
    return np.maximum(np.abs((-a1 + disc) / 2), np.abs((-a1 - disc) / 2))


def check_stability(coeffs: np.ndarray, margin: float = POLE_MARGIN, what: str = "cascade") -> None:
    """Raise :class:`SafetyError` unless every pole satisfies ``|p| <= 1 - margin``.

    A cascade of sections is stable exactly when each section is.
    """
    r = pole_radii(coeffs)
    if len(r) and (not np.all(np.isfinite(coeffs)) or np.max(r) > 1.0 - margin):
        k = int(np.argmax(r))
        raise SafetyError(
            f"{what}: section {k + 1} has a pole at radius {r[k]:.9f}, beyond the stability "
            f"limit 1 - {margin:g}; narrow the frequency or Q range of the IIR settings"
        )


def float32_sensitivity_db(
    kind: np.ndarray, f0_hz: np.ndarray, gain_db: np.ndarray, q: np.ndarray, fs: float
) -> np.ndarray:
    """Estimated response change in dB from rounding each section to float32.

    Rounding ``a1`` (about 2 at low ``f0 / fs``) to float32 moves the pole
    angle by up to ``ulp / (2 sin w0)``, i.e. the resonance by about
    ``1.2e-7 fs^2 / (8 pi^2 f0)`` Hz; times the steepest slope of the section
    (about ``|gain| Q / f0`` dB per Hz) this gives the estimate
    ``|gain| Q 1.2e-7 fs^2 / (8 pi^2 f0^2)``. Our own derivation; it matched
    measured rounding errors within a factor of about 1.5 for peaking sections
    from 20 Hz to 100 Hz at 44.1 to 96 kHz. Used only to steer the fit away from
    fragile sections; :func:`check_float32` is the proof.

    Returns
    -------
    sens_db : ndarray, shape (n_sections,)
    """
    del kind
    return (
        np.abs(gain_db) * np.maximum(q, SHELF_MAX_Q) * 1.2e-7 * fs**2
        / (8 * np.pi**2 * np.asarray(f0_hz, dtype=float) ** 2)
    )


def quantise_float32(coeffs: np.ndarray, freq_hz: np.ndarray, fs: float) -> np.ndarray:
    """Float32-representable coefficients closest in response to ``coeffs``.

    Each section is first rounded to nearest; if that changes its magnitude by
    more than 0.005 dB somewhere in ``freq_hz``, all ``3 ** 5`` combinations of
    the neighbouring float32 values (one step down, nearest, one step up) are
    tried and the one with the smallest largest change is kept.

    Parameters
    ----------
    coeffs : ndarray, shape (n_sections, 5)
    freq_hz : ndarray, shape (n_freqs,)
    fs : float

    Returns
    -------
    rounded : ndarray, float64 holding float32-exact values, shape (n_sections, 5)
    """

    coeffs = np.atleast_2d(np.asarray(coeffs, dtype=float))
    out = coeffs.astype(np.float32).astype(float)
    for i, c in enumerate(coeffs):
        ref = cascade_response_db(c[None], freq_hz, fs)
        if np.max(np.abs(cascade_response_db(out[i : i + 1], freq_hz, fs) - ref)) <= 0.005:
            continue
        c32 = c.astype(np.float32)
        cands = [
            np.array(
                [np.nextafter(v, np.float32(-np.inf)), v, np.nextafter(v, np.float32(np.inf))],
                dtype=np.float32,
            ).astype(float)
            for v in c32
        ]
        grid = np.array(list(itertools.product(*cands)))
        h = section_responses(grid, freq_hz, fs)
        err = np.max(np.abs(20 * np.log10(np.maximum(np.abs(h), 1e-300)) - ref), axis=1)
        out[i] = grid[int(np.argmin(err))]
    return out


def check_float32(
    coeffs: np.ndarray,
    freq_hz: np.ndarray,
    fs: float,
    tol_db: float = FLOAT32_TOL_DB,
    margin: float = POLE_MARGIN,
    what: str = "cascade",
    rounded: np.ndarray | None = None,
) -> float:
    """Prove that rounding the coefficients to float32 keeps the cascade safe.

    Checks the float64 and the float32-rounded coefficients for stability with
    ``margin`` and that the rounded cascade's magnitude differs from the exact
    one by less than ``tol_db`` at every frequency in ``freq_hz``.

    Parameters
    ----------
    coeffs : ndarray, shape (n_sections, 5)
        Exact (float64) design coefficients.
    freq_hz : ndarray, shape (n_freqs,)
        Check frequencies (below ``fs / 2``).
    fs : float
    tol_db : float
        Largest allowed change in dB.
    rounded : ndarray, shape (n_sections, 5), optional
        The float32 coefficients actually exported (for example from
        :func:`quantise_float32`). Default: round to nearest. Must be
        float32-exact.

    Returns
    -------
    deviation_db : float
        Largest absolute change of the cascade magnitude.

    Raises
    ------
    SafetyError
        If either check fails.
    """
    coeffs = np.atleast_2d(np.asarray(coeffs, dtype=float))
    if len(coeffs) == 0:
        return 0.0
    if rounded is None:
        rounded = coeffs.astype(np.float32).astype(float)
    rounded = np.atleast_2d(np.asarray(rounded, dtype=float))
    if not np.array_equal(rounded, rounded.astype(np.float32).astype(float)):
        raise ValueError("rounded coefficients are not float32-exact")
    check_stability(coeffs, margin, what)
    check_stability(rounded, margin, what + " (float32)")
    dev = np.abs(
        cascade_response_db(rounded, freq_hz, fs) - cascade_response_db(coeffs, freq_hz, fs)
    )
    worst = float(np.max(dev)) if dev.size else 0.0
    if not worst < tol_db:
        f = float(np.asarray(freq_hz)[int(np.argmax(dev))])
        raise SafetyError(
            f"{what}: rounding coefficients to 32-bit float changes the response by "
            f"{worst:.3f} dB at {f:.1f} Hz (limit {tol_db} dB); raise the lowest IIR frequency "
            f"or lower the IIR Q range"
        )
    return worst


def check_frequencies(fs: float, f_lo_hz: float = 10.0, points_per_octave: int = 48) -> np.ndarray:
    """Dense log-spaced check frequencies from ``f_lo_hz`` to just below ``fs / 2``."""
    f_hi = 0.4999 * fs
    n = int(np.ceil(np.log2(f_hi / f_lo_hz) * points_per_octave)) + 1
    return np.geomspace(f_lo_hz, f_hi, n)


def worst_case_gain_db(coeffs: np.ndarray, max_len: int = 1 << 20) -> float:
    """Worst-case gain ``20 log10 sum |h|`` of the cascade's impulse response.

    The response is computed (``scipy.signal.sosfilt``) until the slowest pole
    has decayed by 1e-10, at most ``max_len`` samples.
    """

    coeffs = np.atleast_2d(np.asarray(coeffs, dtype=float))
    if len(coeffs) == 0:
        return 0.0
    r = float(np.max(pole_radii(coeffs)))
    n = max_len if r >= 1 else int(min(max_len, max(64, np.log(1e-10) / np.log(max(r, 1e-3)))))
    x = np.zeros(n)
    x[0] = 1.0
    h = sosfilt(to_sos(coeffs), x)
    return float(20.0 * np.log10(np.sum(np.abs(h))))


def cascade_peak_db(coeffs: np.ndarray, fs: float, f_lo_hz: float = 10.0) -> float:
    """Largest magnitude in dB of the cascade from ``f_lo_hz`` to Nyquist (never below 0 dB
    for an empty cascade).

    Evaluates a 1/96-octave grid plus DC and Nyquist, then refines around the
    five highest local maxima on a grid 100 times finer, so narrow peaks are
    not missed between grid points.
    """
    coeffs = np.atleast_2d(np.asarray(coeffs, dtype=float))
    if len(coeffs) == 0:
        return 0.0
    f = np.concatenate([[1e-3], check_frequencies(fs, f_lo_hz, 96), [0.5 * fs * (1 - 1e-9)]])
    h = cascade_response_db(coeffs, f, fs)
    is_max = np.r_[h[0] >= h[1], (h[1:-1] >= h[:-2]) & (h[1:-1] >= h[2:]), h[-1] >= h[-2]]
    cand = np.flatnonzero(is_max)
    cand = cand[np.argsort(-h[cand])][:5]
    best = float(np.max(h))
    for i in cand:
        lo, hi = f[max(i - 1, 0)], f[min(i + 1, len(f) - 1)]
        fine = np.linspace(lo, hi, 201)
        best = max(best, float(np.max(cascade_response_db(coeffs, fine, fs))))
    return best
