"""Invented rooms with several loudspeakers at known places, for the system tests.

A physical model built from the demo room's parts (``roomcorr.demo``):
the modal sum of a rectangular room below 300 Hz, direct sound and image
sources up to second order above it, joined by a 4th-order Linkwitz-Riley
split, each loudspeaker's own response in front. Main loudspeakers are small
two-way boxes (4th-order high-pass near 50 Hz); a subwoofer is a closed box
with a 2nd-order high-pass near 24 Hz and its own 4th-order low-pass near
160 Hz. No diffuse tail (not needed below 300 Hz or for onsets); seeded white
noise 90 dB below the peak. Every room, loudspeaker and seat here is made up.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pyfar as pf
from scipy.signal import fftconvolve

from roomcorr.demo import (
    _image_sources,
    _linkwitz_riley4,
    _modal_response,
    _mode_grid,
    _speaker_response,
    _wall_shelf,
)

C_M_S = 343.2  # ISO 9613-1 at 20 °C
SPLIT_HZ = 300.0
PRE_DELAY_S = 0.005

MAIN = {
    "hp_hz": 50.0,
    "hp_q": (0.54, 1.31),
    "bump": (2300.0, 1.0, 1.4),
    "lp_hz": 17000.0,
    "tilt_hz": (200.0, 6000.0),
    "tilt_db": -1.5,
    "gain_db": 0.0,
}


def sub_response(freq_hz: np.ndarray, gain_db: float = 0.0) -> np.ndarray:
    """Closed-box subwoofer: 2nd-order high-pass 24 Hz (Q 0.7), 4th-order low-pass 160 Hz."""
    s = 2j * np.pi * freq_hz
    wh, wl = 2 * np.pi * 24.0, 2 * np.pi * 160.0
    r = s**2 / (s**2 + s * wh / 0.7 + wh**2)
    for q in (0.54, 1.31):
        r = r * wl**2 / (s**2 + s * wl / q + wl**2)
    return 10 ** (gain_db / 20) * r


@dataclass
class Room:
    dims_m: tuple[float, float, float] = (5.2, 4.1, 2.6)
    t60_s: float = 0.4
    wall_alpha: tuple[float, ...] = (0.25, 0.3, 0.2, 0.2, 0.3, 0.2)
    speakers_m: list[tuple[float, float, float]] = field(default_factory=list)
    kinds: list[str] = field(default_factory=list)  # "main" or "sub"
    gains_db: list[float] = field(default_factory=list)
    mics_m: list[tuple[float, float, float]] = field(default_factory=list)
    free_field: bool = False
    latency_s: list[float] | None = None  # extra delay inside each loudspeaker (its own DSP)


def simulate(room: Room, fs: int = 48000, length_s: float = 0.6, seed: int = 1) -> np.ndarray:
    """Impulse responses, shape (n_mics, n_speakers, n_samples); one time origin."""
    c = C_M_S
    n = int(round(length_s * fs))
    f = np.fft.rfftfreq(n, 1 / fs)
    dims = np.asarray(room.dims_m)
    mics = np.asarray(room.mics_m, dtype=float)
    delta = 3 * np.log(10) / room.t60_s
    n_low = int(np.searchsorted(f, 8 * SPLIT_HZ)) + 1
    taper = np.clip((8 * SPLIT_HZ - f[:n_low]) / (4 * SPLIT_HZ), 0, 1)
    taper = np.sin(0.5 * np.pi * taper) ** 2
    labels, mode_hz = _mode_grid(dims, c, 2 * SPLIT_HZ)
    lp, hp = _linkwitz_riley4(f, SPLIT_HZ)
    wall = _wall_shelf(f)
    beta = np.sqrt(1 - np.asarray(room.wall_alpha))
    pre = np.exp(-2j * np.pi * f * PRE_DELAY_S)
    spectra = np.zeros((len(mics), len(room.speakers_m), f.size), dtype=complex)
    for k, (pos, kind, g) in enumerate(
        zip(room.speakers_m, room.kinds, room.gains_db, strict=True)
    ):
        src = np.asarray(pos, dtype=float)
        spk = sub_response(f, g) if kind == "sub" else _speaker_response(f, {**MAIN, "gain_db": g})
        images = [(src, (0,) * 6)] if room.free_field else _image_sources(src, dims)
        modal = np.zeros((len(mics), f.size), dtype=complex)
        if not room.free_field:
            modal[:, :n_low] = taper * _modal_response(
                f[:n_low], src, mics, dims, labels, mode_hz, delta, c
            )
        for p, mic in enumerate(mics):
            early = np.zeros(f.size, dtype=complex)
            for img, counts in images:
                r = float(np.linalg.norm(img - mic))
                gain = float(np.prod(beta ** np.asarray(counts))) / (4 * np.pi * r)
                early += gain * wall ** sum(counts) * np.exp(-2j * np.pi * f * r / c)
            full = early if room.free_field else lp * modal[p] + hp * early
            lat = 0.0 if room.latency_s is None else room.latency_s[k]
            spectra[p, k] = 4 * np.pi * pre * spk * full * np.exp(-2j * np.pi * f * lat)
    aa = np.clip((0.5 * fs - f) / (0.08 * fs), 0, 1)
    irs = np.fft.irfft(spectra * np.sin(0.5 * np.pi * aa) ** 2, n=n, axis=-1)
    irs *= 0.5 / np.max(np.abs(irs))
    rng = np.random.default_rng(seed)
    return irs + 10 ** (-96 / 20) * rng.standard_normal(irs.shape)


def direct_delays_s(room: Room) -> np.ndarray:
    """Emission-to-arrival time of every direct sound, shape (n_mics, n_speakers)."""
    m = np.asarray(room.mics_m, dtype=float)[:, None, :]
    s = np.asarray(room.speakers_m, dtype=float)[None, :, :]
    return np.linalg.norm(m - s, axis=-1) / C_M_S


def seats(centre: tuple[float, float, float], n: int, spacing_m: float = 0.3) -> list:
    """``n`` microphone positions around a seat: centre first, then a cross."""
    x, y, z = centre
    ring = [
        (x, y - spacing_m, z),
        (x, y + spacing_m, z),
        (x + spacing_m, y, z + 0.05),
        (x - spacing_m, y, z - 0.05),
        (x + spacing_m, y - spacing_m, z),
        (x + spacing_m, y + spacing_m, z),
    ]
    return [centre, *ring[: n - 1]]


# ----------------------------------------------------------------------------- subwoofer rooms

#: Rooms with two mains at the front and a subwoofer: dimensions (m), the
#: subwoofer's place (m) and its own processing delay (s).
SUB_ROOMS = {
    # rear corner, subwoofer with 8 ms of its own processing delay
    "rear-corner": ((5.2, 4.1, 2.6), (4.9, 0.3, 0.3), 0.008),
    # front corner, no extra delay: the subwoofer already arrives nearly in time
    "front-corner": ((5.2, 4.1, 2.6), (0.3, 0.3, 0.3), 0.0),
    # larger room, far corner
    "far-corner": ((6.1, 4.6, 2.5), (5.8, 4.3, 0.3), 0.008),
}


def sub_room(dims, sub_m, latency_s, mics) -> Room:
    """Two mains 1.7 m apart on the front wall's axis and a subwoofer at ``sub_m``."""
    ly = dims[1]
    return Room(
        dims_m=dims,
        speakers_m=[(0.5, ly / 2 - 0.85, 1.0), (0.5, ly / 2 + 0.85, 1.0), sub_m],
        kinds=["main", "main", "sub"],
        gains_db=[0.0, -1.0, 3.0],
        mics_m=mics,
        latency_s=[0.0, 0.0, latency_s],
    )


def seat_centre(dims) -> tuple[float, float, float]:
    """The measured seat: 60 % of the way back, on the room's axis, ear height 1.1 m."""
    return (dims[0] * 0.6, dims[1] / 2, 1.1)


def held_out_behind(centre) -> list:
    """Held-out seats: a second row 0.5 m behind the measured seat (3 seats, 0.4 m apart)."""
    return seats((centre[0] + 0.5, centre[1], centre[2]), 3, 0.4)


def held_out_between(centre, offset_m: float = 0.18) -> list:
    """Held-out seats inside the measured area, on the diagonals between its positions."""
    x, y, z = centre
    d = offset_m
    return [
        (x + d, y + d, z),
        (x - d, y - d, z + 0.03),
        (x + d, y - d, z - 0.03),
        (x - d, y + d, z),
    ]


def summed_figures(irs, firs, delays, polarity, route_gain, fc, fs: int = 48000):
    """Summed response of each main plus the subwoofer through its route, evaluated with
    scipy's fftconvolve and pyfar's 1/6-octave smoothing: mean over positions and mains
    of the RMS deviation from its own mean in fc/2..2fc, and the deepest dip per position.
    ``delays`` (samples) are taken off and ``polarity`` undone first when given: the
    baseline with no delay and normal polarity. Channels 0 and 1 are the mains, 2 the
    subwoofer."""
    h = firs.copy()
    if delays is not None:
        for c, n in enumerate(delays):
            h[c] = np.r_[h[c, n:], np.zeros(n)] * polarity[c]
    n_pos = irs.shape[0]
    sums = []
    for p in range(n_pos):
        sub = route_gain * fftconvolve(irs[p, 2], h[2])
        for m in (0, 1):
            sums.append(fftconvolve(irs[p, m], h[m]) + sub)
    sig = pf.Signal(np.array(sums), fs)
    sm, _ = pf.dsp.smooth_fractional_octave(sig, 6)
    f = sm.frequencies
    band = (f >= fc / 2) & (f <= 2 * fc)
    # equal weight per octave: sample the smoothed curve on a log grid
    fl = np.geomspace(fc / 2, 2 * fc, 97)
    db = np.array([np.interp(fl, f[band], 20 * np.log10(np.abs(x[band]))) for x in sm.freq])
    dev = np.sqrt(np.mean((db - db.mean(axis=1, keepdims=True)) ** 2, axis=1))
    dip = db.mean(axis=1) - db.min(axis=1)
    return float(dev.mean()), dip.reshape(n_pos, 2).max(axis=1)
