"""Simulated two-way loudspeakers in simulated rooms, for the mixed-phase tests and benchmark.

An invented physical model, kept small: every scenario is made up.

* **Loudspeaker**: a woofer and a tweeter, each a point source at its own
  position (vertically stacked, optionally with the tweeter's acoustic centre
  a little in front), fed through a Linkwitz-Riley crossover of order 4 (its
  sum is a 2nd-order all-pass) or 8 (a 4th-order all-pass). The woofer has a
  2nd-order Butterworth high-pass (a sealed box); the tweeter a gentle
  2nd-order roll-off near 20 kHz. Both drivers radiate as ``e^{-jkr} / (4 pi r)``.
* **Room**: a rectangular room by the image-source method of Allen & Berkley
  up to order 3, frequency-independent pressure reflection coefficients per
  wall, plus a seeded exponentially decaying diffuse tail after 8 ms. Every
  image source repeats both drivers, so a reflection carries the crossover.
* **Seats**: measured microphone positions around the listening seat and
  held-out seats 25 to 45 cm from the seat centre, never among the measured
  ones.

The *direct sound* of a seat (both drivers' direct paths only, no
reflections) is returned separately: it is what the figures judge.

References
----------
.. [1] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
.. [2] S. H. Linkwitz, "Active crossover networks for noncoincident drivers",
       JAES 24(1), 1976 (Linkwitz-Riley: Butterworth squared; the low-pass and
       high-pass sum to an all-pass).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import numpy as np

C_M_S = 343.2  # ISO 9613-1 at 20 degrees C


@dataclass(frozen=True)
class Speaker:
    """An invented two-way loudspeaker."""

    crossover_hz: float = 1200.0
    lr_order: int = 8  # 4: 2nd-order all-pass sum, 8: 4th-order all-pass sum
    position_m: tuple[float, float, float] = (0.6, 1.2, 1.0)  # woofer acoustic centre
    tweeter_above_m: float = 0.14
    tweeter_ahead_m: float = 0.0
    woofer_hp_hz: float = 35.0


@dataclass(frozen=True)
class Room:
    """An invented rectangular room."""

    dims_m: tuple[float, float, float] = (5.4, 4.1, 2.6)
    reflection: tuple[float, ...] = (0.75, 0.7, 0.8, 0.8, 0.7, 0.85)  # x0, xL, y0, yL, z0, zL
    max_order: int = 3
    tail_t60_s: float = 0.35
    seed: int = 12


@dataclass
class Scenario:
    """Impulse responses of one speaker in one room at measured and held-out seats."""

    fs: int
    measured: np.ndarray  # (n_measured, n_samples)
    held_out: np.ndarray  # (n_held_out, n_samples)
    direct_measured: np.ndarray  # (n_measured, n_samples), direct paths only
    direct_held_out: np.ndarray  # (n_held_out, n_samples)
    measured_m: np.ndarray
    held_out_m: np.ndarray
    info: dict = field(default_factory=dict)


def linkwitz_riley(freq_hz: np.ndarray, fc_hz: float, order: int) -> tuple[np.ndarray, np.ndarray]:
    """Low-pass and high-pass of a Linkwitz-Riley crossover (Butterworth squared), analog."""
    from scipy.signal import butter, freqs

    n = order // 2
    w = 2 * np.pi * np.asarray(freq_hz, dtype=float)
    b, a = butter(n, 2 * np.pi * fc_hz, "low", analog=True)
    _, lp = freqs(b, a, w)
    b, a = butter(n, 2 * np.pi * fc_hz, "high", analog=True)
    _, hp = freqs(b, a, w)
    return lp**2, hp**2 * (-1) ** (n % 2)  # odd n: invert the high-pass so the sum is an all-pass


def _second_order(freq_hz: np.ndarray, f0_hz: float, q: float, kind: str) -> np.ndarray:
    s = 2j * np.pi * freq_hz / (2 * np.pi * f0_hz)
    d = s**2 + s / q + 1
    return (s**2 if kind == "high" else 1.0) / d


def _images(src: np.ndarray, dims: np.ndarray, beta: np.ndarray, max_order: int):
    """Image positions and pressure gains (Allen & Berkley), up to ``max_order`` reflections."""
    out = []
    rng = range(-((max_order + 1) // 2), (max_order + 1) // 2 + 1)
    for p in itertools.product((0, 1), repeat=3):
        for m in itertools.product(rng, repeat=3):
            gain, order = 1.0, 0
            for a in range(3):
                n_lo, n_hi = abs(m[a] - p[a]), abs(m[a])
                gain *= beta[2 * a] ** n_lo * beta[2 * a + 1] ** n_hi
                order += n_lo + n_hi
            if order > max_order:
                continue
            pos = np.array([(1 - 2 * p[a]) * src[a] + 2 * m[a] * dims[a] for a in range(3)])
            out.append((pos, gain, order))
    return out


def seat_positions(
    seat_m: tuple[float, float, float], n_measured: int = 4, n_held_out: int = 4, seed: int = 3
) -> tuple[np.ndarray, np.ndarray]:
    """Measured positions within 15 cm of the seat and held-out seats 25-45 cm from it."""
    rng = np.random.default_rng(seed)
    seat = np.asarray(seat_m, dtype=float)
    measured = [seat]
    for k in range(1, n_measured):
        ang = 2 * np.pi * k / max(1, n_measured - 1)
        measured.append(seat + np.array([0.12 * np.sin(ang), 0.15 * np.cos(ang), 0.03 * (k % 2)]))
    held = []
    for k in range(n_held_out):
        ang = 2 * np.pi * (k + 0.5) / n_held_out + rng.uniform(-0.3, 0.3)
        r = 0.25 + 0.20 * k / max(1, n_held_out - 1)
        held.append(seat + np.array([r * np.sin(ang), r * np.cos(ang), rng.uniform(-0.08, 0.08)]))
    return np.array(measured), np.array(held)


def simulate(
    speaker: Speaker,
    room: Room,
    seat_m: tuple[float, float, float] = (3.4, 2.0, 1.07),
    fs: int = 48000,
    length_s: float = 0.4,
    pre_delay_s: float = 0.003,
    n_measured: int = 4,
    n_held_out: int = 4,
) -> Scenario:
    """Synthesise measured and held-out impulse responses (deterministic)."""
    n = int(round(length_s * fs))
    f = np.fft.rfftfreq(n, 1 / fs)
    lp, hp = linkwitz_riley(f, speaker.crossover_hz, speaker.lr_order)
    woofer = lp * _second_order(f, speaker.woofer_hp_hz, 1 / np.sqrt(2), "high")
    tweeter = hp * _second_order(f, 20000.0, 0.6, "low")
    # a smooth zero-phase fade to Nyquist (the anti-alias filter of an invented interface)
    aa = np.clip((0.5 * fs - f) / (0.06 * fs), 0.0, 1.0)
    aa = np.sin(0.5 * np.pi * aa) ** 2
    dims = np.asarray(room.dims_m)
    beta = np.asarray(room.reflection)
    w_pos = np.asarray(speaker.position_m, dtype=float)
    t_pos = w_pos + np.array([speaker.tweeter_ahead_m, 0.0, speaker.tweeter_above_m])
    drivers = [(w_pos, woofer), (t_pos, tweeter)]
    measured_m, held_m = seat_positions(seat_m, n_measured, n_held_out)
    pre = np.exp(-2j * np.pi * f * pre_delay_s)
    rng = np.random.default_rng(room.seed)
    t = np.arange(n) / fs

    def responses(mics: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        full = np.zeros((len(mics), f.size), complex)
        direct = np.zeros((len(mics), f.size), complex)
        for src, resp in drivers:
            for pos, gain, order in _images(src, dims, beta, room.max_order):
                for i, mic in enumerate(mics):
                    r = float(np.linalg.norm(pos - mic))
                    term = gain * resp * np.exp(-2j * np.pi * f * r / C_M_S) / (4 * np.pi * r)
                    full[i] += term
                    if order == 0:
                        direct[i] += term
        for i, mic in enumerate(mics):
            r0 = float(np.linalg.norm(w_pos - mic))
            t0 = r0 / C_M_S + 0.008
            env = np.exp(-3 * np.log(10) * np.maximum(t - t0, 0) / room.tail_t60_s)
            env *= np.clip((t - t0) / 0.01, 0, 1)
            tail = rng.standard_normal(n) * env * 0.004 / np.sqrt(fs / 48000)
            full[i] += np.fft.rfft(tail) * woofer  # the tail carries the speaker's bass too
        spec = lambda x: np.fft.irfft(x * pre * aa, n)  # noqa: E731
        return spec(full), spec(direct)

    meas, dmeas = responses(measured_m)
    held, dheld = responses(held_m)
    scale = 0.5 / float(np.max(np.abs(meas)))
    noise = 10 ** (-85 / 20) * 0.5
    meas = meas * scale + noise * rng.standard_normal(meas.shape)
    held = held * scale + noise * rng.standard_normal(held.shape)
    return Scenario(
        fs=fs,
        measured=meas,
        held_out=held,
        direct_measured=dmeas * scale,
        direct_held_out=dheld * scale,
        measured_m=measured_m,
        held_out_m=held_m,
        info={"speaker": speaker, "room": room, "seat_m": seat_m},
    )


def group_delay_s(
    h: np.ndarray, fs: int, freq_hz: np.ndarray, window_s: tuple[float, float] = (0.004, 0.016)
) -> np.ndarray:
    """Group delay of the first milliseconds of ``h`` around its main peak, in seconds.

    The response is windowed from ``window_s[0]`` before to ``window_s[1]``
    after its largest sample (a half-Hann fade over the last quarter), and the
    group delay ``-dphi/domega`` is taken from the phase difference of
    neighbouring bins of a 2**16-point FFT, then smoothed over 1/12 octave
    (common practice for display) and read at ``freq_hz``. The result is
    relative to the main peak.
    """
    h = np.asarray(h, dtype=float)
    p = int(np.argmax(np.abs(h)))
    a = max(0, p - int(round(window_s[0] * fs)))
    b = min(h.size, p + int(round(window_s[1] * fs)))
    seg = h[a:b].copy()
    n_tail = max(1, (b - p) // 4)
    seg[-n_tail:] *= 0.5 * (1 + np.cos(np.pi * np.arange(1, n_tail + 1) / (n_tail + 1)))
    n_fft = 1 << 16
    spec = np.fft.rfft(seg, n_fft)
    dphi = np.angle(spec[1:] * np.conj(spec[:-1]))
    gd = -dphi / (2 * np.pi * fs / n_fft) - (p - a) / fs
    f_mid = (np.arange(gd.size) + 0.5) * fs / n_fft
    out = np.empty(len(freq_hz))
    for i, f0 in enumerate(freq_hz):
        sel = (f_mid >= f0 * 2 ** (-1 / 24)) & (f_mid <= f0 * 2 ** (1 / 24))
        wts = np.abs(spec[1:][sel]) ** 2
        out[i] = np.sum(gd[sel] * wts) / np.sum(wts)
    return out
