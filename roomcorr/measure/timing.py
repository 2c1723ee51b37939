"""Acoustic timing reference and clock drift, from the recording itself.

Without a loopback cable the recording's time origin is unknown: it holds the
latency of the audio system and, with two devices (a USB microphone and a
separate output), the offset between two streams started one after the
other, and the two devices' clocks run at slightly different rates. Every
capture therefore carries two short **markers** played through one chosen
loudspeaker (the *reference*): one before the sweeps and one after them.

* The markers' distance in the recording, against their distance as played,
  gives the rate mismatch (drift) of the two clocks; the recording is
  resampled to the playback's rate before deconvolution.
* The first marker's arrival fixes a time origin that is the same for every
  capture at one microphone position: the reference loudspeaker's arrival is
  put ``lead_s`` after it, so arrival-time differences between loudspeakers
  are true even when the latency changes from one capture to the next.

A marker is a short descending exponential sweep: its matched response is a
sharp peak, while the (ascending) measurement sweeps passing through the same
filter spread out in time, so a marker is not mistaken for a sweep.

Layout of one capture (all lengths in samples at ``fs``)::

    noise | marker A, gap | repeats x (sweep, tail) | marker B, gap

All functions are pure (arrays in, arrays out).

References
----------
.. [1] O. Kirkeby, P. A. Nelson, H. Hamada, F. Orduna-Bustamante, "Fast
   deconvolution of multichannel systems using regularization", IEEE Trans.
   Speech Audio Proc. 6(2), 1998 (the regularised inverse of the marker).
.. [2] C. H. Knapp, G. C. Carter, "The generalized correlation method for
   estimation of time delay", IEEE Trans. ASSP 24(4), 1976 (delay from the
   phase of the cross-spectrum).
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

import numpy as np
import scipy.fft
import scipy.ndimage
import scipy.signal

from roomcorr.measure.sweep import Sweep, _fade_window, band_taper

#: Default marker: 0.15 s descending exponential sweep over 150 Hz .. 16 kHz.
MARKER_S = 0.15
MARKER_F_LO_HZ = 150.0
MARKER_F_HI_HZ = 16000.0
#: Reference loudspeaker's arrival in the saved impulse responses (common origin).
LEAD_S = 0.010
#: Drift above this needs --force (common practice: consumer crystals are within
#: about +-50 ppm of nominal, so two devices rarely differ by more than ~100 ppm).
MAX_DRIFT_PPM = 500.0


@dataclass(frozen=True)
class Marker:
    """A timing marker at one sample rate (a short descending exponential sweep)."""

    fs: int
    duration_s: float = MARKER_S
    f_lo_hz: float = MARKER_F_LO_HZ
    f_hi_hz: float = MARKER_F_HI_HZ
    level_dbfs: float = -20.0

    @property
    def n_samples(self) -> int:
        return int(round(self.duration_s * self.fs))

    @property
    def band_hz(self) -> tuple[float, float]:
        """Band actually swept (the top is held below 0.4 fs)."""
        return self.f_lo_hz, min(self.f_hi_hz, 0.4 * self.fs)

    def signal(self) -> np.ndarray:
        """The marker, shape (n_samples,), peak ``10**(level_dbfs/20)``.

        ``x(t) = sin(2 pi f2 L (1 - exp(-t/L)))`` with ``L = T / ln(f2/f1)``: the
        instantaneous frequency falls from ``f2`` to ``f1`` exponentially.
        """
        lo, hi = self.band_hz
        n = self.n_samples
        t = np.arange(n) / self.fs
        rate = self.duration_s / np.log(hi / lo)
        x = np.sin(2 * np.pi * hi * rate * (1.0 - np.exp(-t / rate)))
        x *= _fade_window(n, self.fs, 0.005, 0.005)
        return 10 ** (self.level_dbfs / 20) * x

    def to_dict(self) -> dict:
        return {
            "fs": self.fs,
            "duration_s": self.duration_s,
            "f_lo_hz": self.f_lo_hz,
            "f_hi_hz": self.f_hi_hz,
            "level_dbfs": self.level_dbfs,
        }

    @classmethod
    def from_dict(cls, d: dict) -> Marker:
        return cls(
            int(d["fs"]),
            float(d["duration_s"]),
            float(d["f_lo_hz"]),
            float(d["f_hi_hz"]),
            float(d["level_dbfs"]),
        )


@dataclass(frozen=True)
class Plan:
    """Sample positions of one capture's parts, as played.

    Attributes
    ----------
    n_noise : int
        Noise-only samples at the start.
    marker_starts : tuple[int, int] or ()
        First sample of markers A and B (empty without a timing reference).
    sweep_starts : list[int]
        First sample of each sweep repeat.
    n_total : int
        Length of the played signal.
    """

    n_noise: int
    marker_starts: tuple[int, ...]
    sweep_starts: list[int]
    n_total: int


def capture_plan(
    sweep: Sweep, noise_s: float, tail_s: float, repeats: int, marker: Marker | None
) -> Plan:
    """Where noise, markers and sweeps sit in one capture (module docstring)."""
    fs = sweep.fs
    n_noise = int(round(noise_s * fs))
    n_tail = int(round(tail_s * fs))
    period = sweep.n_samples + n_tail
    if marker is None:
        starts = [n_noise + r * period for r in range(repeats)]
        return Plan(n_noise, (), starts, n_noise + repeats * period)
    block = marker.n_samples + n_tail
    starts = [n_noise + block + r * period for r in range(repeats)]
    b = starts[-1] + period
    return Plan(n_noise, (n_noise, b), starts, b + block)


def capture_tracks(
    sweep: Sweep, noise_s: float, tail_s: float, repeats: int, marker: Marker | None
) -> tuple[np.ndarray, np.ndarray | None]:
    """The sweep track and the marker track of one capture.

    Returns
    -------
    sweeps : ndarray, shape (n_total,)
        For the loudspeaker being measured.
    markers : ndarray, shape (n_total,) or None
        For the reference loudspeaker (added to ``sweeps`` when it is the same one).
    """
    plan = capture_plan(sweep, noise_s, tail_s, repeats, marker)
    sw = np.zeros(plan.n_total)
    x = sweep.signal()
    for s in plan.sweep_starts:
        sw[s : s + len(x)] = x
    if marker is None:
        return sw, None
    mk = np.zeros(plan.n_total)
    m = marker.signal()
    for s in plan.marker_starts:
        mk[s : s + len(m)] = m
    return sw, mk


def marker_response(recording: np.ndarray, marker: Marker) -> np.ndarray:
    """Regularised deconvolution of ``recording`` by the marker (linear, not circular).

    Parameters
    ----------
    recording : ndarray, shape (n,)

    Returns
    -------
    ndarray, shape (n,)
        Index ``i``: the marker starting at recording sample ``i``.
    """
    x = marker.signal()
    n = len(recording)
    n_fft = scipy.fft.next_fast_len(n + len(x), real=True)
    spec = scipy.fft.rfft(x, n_fft)
    f = np.fft.rfftfreq(n_fft, 1.0 / marker.fs)
    lo, hi = marker.band_hz
    taper = band_taper(f, lo, hi, marker.fs)
    power = np.abs(spec) ** 2
    p_ref = float(np.median(power[(f >= lo) & (f <= hi)]))
    inv = np.conj(spec) / (power + p_ref * (1e-6 + 1e-2 * (1.0 - taper))) * taper
    return scipy.fft.irfft(scipy.fft.rfft(recording, n_fft) * inv, n_fft)[:n]


def refine_peak(h: np.ndarray, i: int, half: int = 64, factor: int = 64) -> float:
    """Sub-sample position of the magnitude peak of ``h`` near index ``i``.

    The ``2 half`` samples around ``i`` (Tukey window, flat in the middle half so
    the peak is not pulled aside) are band-limited-interpolated by ``factor``
    (``scipy.signal.resample``, i.e. Fourier interpolation) and the maximum of the
    magnitude is refined with a parabola through three points.
    """
    lo = max(0, i - half)
    seg = np.asarray(h[lo : i + half], dtype=float)
    if len(seg) < 8:
        return float(i)
    win = scipy.signal.windows.tukey(len(seg), 0.5)
    up = np.abs(scipy.signal.resample(seg * win, len(seg) * factor))
    k = int(np.argmax(up))
    frac = 0.0
    if 0 < k < len(up) - 1:
        a, b, c = up[k - 1 : k + 2]
        den = a - 2 * b + c
        if den != 0:
            frac = 0.5 * (a - c) / den
    return lo + (k + frac) / factor


def relative_delay(a: np.ndarray, b: np.ndarray, fs: int, f_lo_hz: float, f_hi_hz: float) -> float:
    """Delay of ``b`` relative to ``a`` in samples (less than a few samples), from phase.

    The cross-spectrum ``B conj(A)`` of two recordings of the same sound through
    the same path has the phase ``-2 pi f tau``; ``tau`` is its weighted
    least-squares slope over ``[f_lo_hz, f_hi_hz]`` (weights ``|B conj(A)|``),
    the phase-transform idea of Knapp & Carter (1976).

    Parameters
    ----------
    a, b : ndarray, shape (n,)
    """
    n = len(a)
    n_fft = scipy.fft.next_fast_len(2 * n, real=True)
    cross = scipy.fft.rfft(b, n_fft) * np.conj(scipy.fft.rfft(a, n_fft))
    f = np.fft.rfftfreq(n_fft, 1.0 / fs)
    sel = (f >= f_lo_hz) & (f <= f_hi_hz)
    w = np.abs(cross[sel])
    phase = np.unwrap(np.angle(cross[sel]))
    omega = 2 * np.pi * f[sel] / fs
    # phase = -omega tau + c, weighted least squares
    A = np.vstack([-omega, np.ones_like(omega)]).T * w[:, None]
    tau, _ = np.linalg.lstsq(A, phase * w, rcond=None)[0]
    return float(tau)


@dataclass
class Timing:
    """Where the markers landed in a recording, and the clocks' rate mismatch.

    Attributes
    ----------
    found : bool
        False when the markers could not be found (reference loudspeaker silent).
    marker_snr_db : float
        Marker A's peak over the robust noise level of its response.
    drift_ppm : float
        ``(recording rate / playback rate - 1) 1e6``: positive when the
        microphone's clock runs fast against the output's.
    offset_samples : float
        After drift correction: recording index of the played sample 0 plus the
        reference loudspeaker's path (latency + stream offset + its sound travel).
    """

    found: bool
    marker_snr_db: float
    drift_ppm: float
    offset_samples: float


def locate_markers(
    recording: np.ndarray,
    plan: Plan,
    marker: Marker,
    min_snr_db: float = 20.0,
    min_sharpness: float = 6.0,
) -> Timing:
    """Find markers A and B; estimate drift from their distance (module docstring).

    Parameters
    ----------
    recording : ndarray, shape (n,)
        Microphone recording, any start.
    plan : Plan
        :func:`capture_plan` output (with markers).
    min_snr_db, min_sharpness : float
        Below either, the markers count as not found (Gaussian noise alone reaches
        a sharpness of about 4 to 5: the extreme value over the RMS).
    """
    fs = marker.fs
    h = marker_response(recording, marker)
    mag = np.abs(h)
    d_nom = plan.marker_starts[1] - plan.marker_starts[0]
    # A marker's response is a sharp peak; a measurement sweep seen through the
    # marker's inverse is spread out in time. Sharpness = magnitude over the RMS of
    # the surrounding 10 ms; only magnitudes above 2 % of the largest count.
    local = (
        np.sqrt(np.maximum(scipy.ndimage.uniform_filter1d(mag**2, int(0.01 * fs) | 1), 0.0)) + 1e-30
    )
    sharp = np.where(mag >= 0.02 * mag.max(), mag / local, 0.0)
    i_max = int(np.argmax(sharp))
    noise = 1.4826 * float(np.median(mag)) + 1e-30
    snr = float(20 * np.log10(max(mag[i_max], 1e-30) / noise))
    tol = int(d_nom * 3 * MAX_DRIFT_PPM * 1e-6) + 32

    def near(centre: int) -> int | None:
        lo, hi = max(0, centre - tol), min(len(mag), centre + tol + 1)
        if hi - lo < 3:
            return None
        j = lo + int(np.argmax(sharp[lo:hi]))
        return j if mag[j] >= 0.3 * mag[i_max] and sharp[j] >= min_sharpness else None

    b = near(i_max + d_nom)
    a = i_max if b is not None else near(i_max - d_nom)
    if b is None and a is not None:
        a, b = a, i_max
    if a is None or b is None or snr < min_snr_db or sharp[i_max] < min_sharpness:
        return Timing(False, snr, 0.0, float(plan.marker_starts[0]))
    # drift: delay of the recording around B against the one around A
    n_win = marker.n_samples + int(0.05 * fs)
    pre = 64
    a0 = max(0, a - pre)
    b0 = max(0, b - pre)
    seg_a = recording[a0 : a0 + n_win]
    seg_b = recording[b0 : b0 + n_win]
    lo, hi = marker.band_hz
    if len(seg_a) == len(seg_b) == n_win:
        dist = (b0 - a0) + relative_delay(seg_a, seg_b, fs, lo, hi)
    else:  # too near the end: fall back to the interpolated peaks
        dist = refine_peak(h, b) - refine_peak(h, a)
    drift_ppm = (dist / d_nom - 1.0) * 1e6
    offset = refine_peak(h, a) / (1.0 + drift_ppm * 1e-6) - plan.marker_starts[0]
    return Timing(True, snr, float(drift_ppm), float(offset))


def marker_offset(recording: np.ndarray, plan: Plan, marker: Marker, approx: float) -> float:
    """Precise offset of marker A in a recording already corrected for drift.

    A marker recorded with a drifting clock is itself stretched, which pulls its
    matched-filter peak by a fraction of a sample; after the correction it is not.

    Parameters
    ----------
    approx : float
        Offset from :func:`locate_markers` (within a few samples).
    """
    fs = marker.fs
    centre = int(round(approx)) + plan.marker_starts[0]
    lo = max(0, centre - int(0.05 * fs))
    hi = min(len(recording), centre + marker.n_samples + int(0.1 * fs))
    h = marker_response(recording[lo:hi], marker)
    j = centre - lo
    k0, k1 = max(0, j - 8), min(len(h), j + 9)
    i = k0 + int(np.argmax(np.abs(h[k0:k1])))
    return float(lo + refine_peak(h, i) - plan.marker_starts[0])


def correct_drift(x: np.ndarray, drift_ppm: float) -> np.ndarray:
    """Resample a recording made with a clock ``drift_ppm`` fast back to the nominal rate.

    Uses ``scipy.signal.resample_poly`` with the ratio ``1 / (1 + drift)``
    approximated by a fraction of denominator at most 40000 (an error far
    below 0.01 ppm for drifts under 1000 ppm).

    Parameters
    ----------
    x : ndarray, shape (..., n)

    Returns
    -------
    ndarray, shape (..., round(n / (1 + drift)))
    """
    if abs(drift_ppm) < 1e-3:
        return np.asarray(x, dtype=float)
    ratio = Fraction(1.0 / (1.0 + drift_ppm * 1e-6)).limit_denominator(40000)
    y = scipy.signal.resample_poly(
        np.asarray(x, dtype=float), ratio.numerator, ratio.denominator, axis=-1
    )
    return y


def shift_to_origin(x: np.ndarray, start: int) -> tuple[np.ndarray, int]:
    """``x[start:]`` along the last axis, zero-padded in front when ``start`` < 0.

    Returns the shifted array and the number of padded samples.
    """
    if start >= 0:
        return x[..., start:], 0
    pad = np.zeros(x.shape[:-1] + (-start,))
    return np.concatenate([pad, x], axis=-1), -start


# --------------------------------------------------------------------------- timing basis
#: What the arrival times of a measurement run are measured from.
BASIS_KINDS = ("loopback", "single device", "acoustic reference", "unknown")


def timing_basis(record: dict | None) -> dict:
    """The timing basis of a measurement run, from its ``measurement.json`` record.

    ``kind`` is ``"loopback"`` (the sound leaving the output, from a loopback
    cable: an absolute origin), ``"single device"`` (one full-duplex stream
    without markers: the sweep start as sent, which holds the device's own fixed
    latency), ``"acoustic reference"`` (the reference loudspeaker's arrival is put
    ``lead_s`` after the origin: arrivals are relative to that loudspeaker) or
    ``"unknown"`` (impulse responses from elsewhere, or a record that says
    nothing). Records written before the basis was stored are read from their
    ``loopback``, ``timing_reference`` and per-position ``time_origin`` keys.

    Returns
    -------
    dict
        ``kind``, ``reference_output`` (1-based output of the reference loudspeaker,
        or None), ``reference_channel`` (its 0-based channel in the impulse
        responses, None when it was not measured or is unknown), ``device``
        (``input|output`` names for a single device, else None) and ``label``
        (a few plain words for people).
    """
    rec = record if isinstance(record, dict) else {}
    stored = rec.get("timing_basis")
    if isinstance(stored, dict) and stored.get("kind") in BASIS_KINDS:
        kind = str(stored["kind"])
        ref = stored.get("reference_output")
        ref = int(ref) if isinstance(ref, int) and not isinstance(ref, bool) and ref > 0 else None
        device = stored.get("device") if isinstance(stored.get("device"), str) else None
    else:
        origins = {
            p.get("time_origin")
            for p in rec.get("positions", []) or []
            if isinstance(p, dict) and p.get("file")
        }
        tref = rec.get("timing_reference")
        ref = None
        if rec.get("loopback") is True or origins == {"loopback"}:
            kind = "loopback"
        elif origins == {"reference"} or (origins <= {"reference"} and isinstance(tref, dict)):
            kind = "acoustic reference"
            out = tref.get("output") if isinstance(tref, dict) else None
            ref = out if isinstance(out, int) and not isinstance(out, bool) else None
        elif origins == {"stream"}:
            kind = "single device"
        else:
            kind = "unknown"
        device = None
        if kind == "single device":
            dev = rec.get("devices") if isinstance(rec.get("devices"), dict) else {}
            device = f"{dev.get('input')}|{dev.get('output')}"
    outputs = (
        (rec.get("settings") or {}).get("outputs")
        if isinstance(rec.get("settings"), dict)
        else None
    )
    channel = None
    if kind == "acoustic reference" and ref is not None and isinstance(outputs, list):
        channel = outputs.index(ref) if ref in outputs else None
    return {
        "kind": kind,
        "reference_output": ref if kind == "acoustic reference" else None,
        "reference_channel": channel,
        "device": device if kind == "single device" else None,
        "label": basis_label(kind, ref, channel, _names(rec)),
    }


def _names(rec: dict) -> list[str] | None:
    names = (
        (rec.get("settings") or {}).get("names") if isinstance(rec.get("settings"), dict) else None
    )
    return [str(n) for n in names] if isinstance(names, list) else None


def basis_label(
    kind: str, reference_output: int | None, channel: int | None, names: list[str] | None
) -> str:
    """Plain words for a timing basis (``history``, ``compare``, the report, the app)."""
    if kind == "acoustic reference":
        who = f"output {reference_output}" if reference_output else "a loudspeaker"
        if names and channel is not None and channel < len(names):
            who = f"{names[channel]} (output {reference_output})"
        return f"acoustic reference: {who}"
    if kind == "loopback":
        return "loopback cable (absolute)"
    if kind == "single device":
        return "single device (its fixed latency)"
    return "unknown (impulse responses from elsewhere)"


def common_origin(basis_a: dict, basis_b: dict) -> dict:
    """Whether the arrivals of two runs share an origin, and which.

    Returns
    -------
    dict
        ``origin``: ``"absolute"`` (both loopback, or both the same single device:
        distance changes are true), ``"reference"`` (both on the acoustic reference
        of the same loudspeaker, ``reference_channel`` set: distances are relative
        to it) or ``"unknown"`` (anything else: one unknown offset per run);
        ``reason`` in plain words.
    """
    ka, kb = basis_a.get("kind"), basis_b.get("kind")
    if ka == kb == "loopback":
        return {
            "origin": "absolute",
            "reference_channel": None,
            "reason": "both runs timed by a loopback cable",
        }
    if ka == kb == "single device" and basis_a.get("device") == basis_b.get("device"):
        return {
            "origin": "absolute",
            "reference_channel": None,
            "reason": "both runs on the same single device (same fixed latency)",
        }
    if (
        ka == kb == "acoustic reference"
        and basis_a.get("reference_output") == basis_b.get("reference_output")
        and basis_a.get("reference_channel") == basis_b.get("reference_channel")
        and basis_a.get("reference_channel") is not None
    ):
        return {
            "origin": "reference",
            "reference_channel": basis_a["reference_channel"],
            "reason": f"both runs timed by the {basis_b.get('label', 'acoustic reference')}: "
            "arrivals are relative to that loudspeaker, whose own move they cannot show",
        }
    return {
        "origin": "unknown",
        "reference_channel": None,
        "reason": f"the runs' timing bases differ or are unknown ({basis_a.get('label')}; "
        f"{basis_b.get('label')}): arrivals share no known origin",
    }
