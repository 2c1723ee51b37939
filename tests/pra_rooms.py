"""Invented rooms simulated with pyroomacoustics (independent of roomcorr's own model).

Image-source method (Allen & Berkley, JASA 65(4), 1979) as implemented by
pyroomacoustics' ``ShoeBox``, at 48 kHz and high reflection order (the order
Sabine's formula asks for the chosen T60, ``pyroomacoustics.inverse_sabine``),
frequency-independent wall absorption and no air absorption: below a few
hundred hertz this gives the rectangular room's modes from independent code.
Each loudspeaker's own response is applied with scipy filters: a main is a
small two-way box (4th-order Butterworth high-pass at 50 Hz), a subwoofer a
closed box (2nd-order high-pass at 25 Hz, 4th-order Butterworth low-pass at
120 Hz, its amplifier's own processing delay). Seeded white noise 96 dB below
the peak. pyroomacoustics' own 10 Hz high-pass (run forwards and backwards,
so not causal) is switched off during the call: the loudspeakers' causal
high-passes remove the image method's DC offset instead. Every room,
loudspeaker and seat here is made up.
"""

from __future__ import annotations

import numpy as np
import pyroomacoustics as pra
from scipy.signal import butter, sosfilt

FS = 48000


def speaker_filter(kind: str, fs: int = FS) -> np.ndarray:
    """Second-order sections of a loudspeaker's own response (``main`` or ``sub``)."""
    if kind == "sub":
        hp = butter(2, 25.0, "highpass", fs=fs, output="sos")
        lp = butter(4, 120.0, fs=fs, output="sos")
        return np.vstack([hp, lp])
    return butter(4, 50.0, "highpass", fs=fs, output="sos")


def simulate_pra(
    dims_m,
    speakers_m,
    kinds,
    mics_m,
    t60_s: float = 0.45,
    latency_s=None,
    gains_db=None,
    fs: int = FS,
    length_s: float = 0.7,
    seed: int = 1,
    max_order: int = 60,
) -> np.ndarray:
    """Impulse responses, shape (n_mics, n_speakers, n_samples), one time origin."""
    e_abs, order = pra.inverse_sabine(t60_s, list(dims_m))
    room = pra.ShoeBox(
        list(dims_m),
        fs=fs,
        materials=pra.Material(e_abs),
        max_order=min(order, max_order),
        air_absorption=False,
    )
    for s in speakers_m:
        room.add_source(list(s))
    room.add_microphone_array(np.asarray(mics_m, dtype=float).T)
    hpf = pra.constants.get("rir_hpf_enable")
    pra.constants.set("rir_hpf_enable", False)
    try:
        room.compute_rir()
    finally:
        pra.constants.set("rir_hpf_enable", hpf)
    n = int(round(length_s * fs))
    lead = pra.constants.get("frac_delay_length") // 2  # pyroomacoustics' own global delay
    out = np.zeros((len(mics_m), len(speakers_m), n))
    for m in range(len(mics_m)):
        for k, kind in enumerate(kinds):
            h = np.asarray(room.rir[m][k])[lead:]
            lat = 0 if latency_s is None else int(round(latency_s[k] * fs))
            g = 1.0 if gains_db is None else 10 ** (gains_db[k] / 20)
            x = np.zeros(n)
            h = h[: n - lat]
            x[lat : lat + h.size] = g * h
            out[m, k] = sosfilt(speaker_filter(kind, fs), x)
    out *= 0.5 / np.max(np.abs(out))
    rng = np.random.default_rng(seed)
    return out + 10 ** (-96 / 20) * rng.standard_normal(out.shape)


#: Invented rooms with two mains at the front and two to four subwoofers: dimensions (m),
#: T60 (s), subwoofer places (m), their own processing delays (s).
MULTI_SUB_ROOMS = {
    "two-front-back": ((5.2, 4.1, 2.6), 0.45, [(0.3, 2.05, 0.3), (4.9, 2.05, 0.3)], [0.0, 0.004]),
    "two-corners": ((6.0, 4.4, 2.5), 0.5, [(0.3, 0.3, 0.3), (5.7, 4.1, 0.3)], [0.002, 0.006]),
    "three-mixed": (
        (5.6, 4.8, 2.7),
        0.4,
        [(0.3, 0.3, 0.3), (0.3, 4.5, 0.3), (5.3, 2.4, 0.3)],
        [0.0, 0.0, 0.008],
    ),
    "four-midwalls": (
        (6.4, 4.6, 2.6),
        0.5,
        [(0.3, 2.3, 0.3), (6.1, 2.3, 0.3), (3.2, 0.3, 0.3), (3.2, 4.3, 0.3)],
        [0.0, 0.005, 0.003, 0.003],
    ),
    "four-corners": (
        (5.0, 3.8, 2.4),
        0.35,
        [(0.3, 0.3, 0.3), (0.3, 3.5, 0.3), (4.7, 0.3, 0.3), (4.7, 3.5, 0.3)],
        [0.0, 0.0, 0.006, 0.006],
    ),
}


def mains_m(dims_m) -> list:
    """Two mains 1.8 m apart on the front wall's axis, 0.5 m out, 1 m up."""
    ly = dims_m[1]
    return [(0.5, ly / 2 - 0.9, 1.0), (0.5, ly / 2 + 0.9, 1.0)]


def sofa_positions(dims_m, width_m: float = 1.6, depth_m: float = 0.6) -> list:
    """Five measured positions over a listening area ``width_m`` wide and ``depth_m`` deep,
    60 % back in the room, ear height about 1.1 m: its four corners and its centre."""
    x = dims_m[0] * 0.6
    yc = dims_m[1] / 2
    hw, hd = width_m / 2, depth_m / 2
    pts = [(x, yc), (x - hd, yc - hw), (x - hd, yc + hw), (x + hd, yc - hw), (x + hd, yc + hw)]
    return [(float(a), float(b), 1.1 + 0.02 * i) for i, (a, b) in enumerate(pts)]


def held_out_seats(dims_m, width_m: float = 1.6, depth_m: float = 0.6) -> list:
    """Seats the design never sees: four between the measured ones (half-way from the
    centre to each corner) and six 0.4 m in front of and behind the centre row (at the
    left edge, the middle and the right edge; 0.1 m beyond the measured rows)."""
    x = dims_m[0] * 0.6
    yc = dims_m[1] / 2
    hw, hd = width_m / 2, depth_m / 2
    between = [(x + sx * hd / 2, yc + sy * hw / 2, 1.12) for sx in (-1, 1) for sy in (-1, 1)]
    rows = [(x + dx, yc + dy, 1.08) for dx in (-0.4, 0.4) for dy in (-hw, 0.0, hw)]
    return [(float(a), float(b), float(c)) for a, b, c in between + rows]
