"""Invented rooms for the "after a move" tests: two loudspeakers and a seat in a shoebox
room, one loudspeaker moved between two runs, measured on the acoustic-reference basis.

The room is the model of ``tests/speaker_rooms.py`` (modal sum below 300 Hz, image sources
up to second order above it, Allen & Berkley 1979), the same geometry as the JACK move
test (tests/test_move_jack.py). :func:`acoustic_reference_runs` applies what
``roomcorr measure`` does with the acoustic timing reference: the reference loudspeaker's
arrival is put 10 ms after the origin in every run (roomcorr.measure.timing.LEAD_S),
so latency and drift vanish and the reference's own move becomes invisible in arrivals.
Everything here is made up.
"""

from __future__ import annotations

import numpy as np
from speaker_rooms import C_M_S, Room, simulate

FS = 48000
DIMS_M = (5.2, 4.1, 2.6)
LEFT_M = (1.1, 0.7, 1.0)
RIGHT_M = (3.3, 0.8, 1.0)
SEAT_M = (2.3, 3.0, 1.1)
LEAD_S = 0.010


def moved(pos, seat, distance_m: float, angle_deg: float = 0.0) -> tuple:
    """``pos`` moved horizontally by ``distance_m`` along the seat-to-loudspeaker line
    turned by ``angle_deg`` (0: straight away from the seat; negative distance: closer)."""
    p = np.asarray(pos, dtype=float)
    v = p[:2] - np.asarray(seat, dtype=float)[:2]
    v /= np.linalg.norm(v)
    a = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    q = p.copy()
    q[:2] += distance_m * (rot @ v)
    return tuple(q)


def distance_change_m(before, after, seat=SEAT_M) -> float:
    s = np.asarray(seat, dtype=float)
    return float(np.linalg.norm(np.asarray(after) - s) - np.linalg.norm(np.asarray(before) - s))


def room_irs(speakers, seat=SEAT_M, seed: int = 1, length_s: float = 0.2) -> np.ndarray:
    """(n_speakers, n_samples) at one seat, one absolute origin, noise 96 dB down."""
    room = Room(
        dims_m=DIMS_M,
        speakers_m=list(speakers),
        kinds=["main"] * len(speakers),
        gains_db=[0.0] * len(speakers),
        mics_m=[seat],
    )
    return simulate(room, fs=FS, length_s=length_s, seed=seed)[0]


def _shift(x: np.ndarray, delay_s: float) -> np.ndarray:
    n = x.shape[-1]
    n_fft = 2 * n
    f = np.fft.rfftfreq(n_fft, 1 / FS)
    y = np.fft.irfft(np.fft.rfft(x, n_fft) * np.exp(-2j * np.pi * f * delay_s), n_fft)
    return y[..., :n]


def acoustic_reference_runs(before, after, reference: int = 0, seed: int = 0, noise_db=-70.0):
    """Two runs (each (1, n_speakers, n_samples)) as the acoustic timing reference leaves
    them: shifted so the reference loudspeaker's direct sound sits at LEAD_S, with seeded
    noise ``noise_db`` below the largest peak added to each run."""
    rng = np.random.default_rng(seed)
    out = []
    for k, spk in enumerate((before, after)):
        h = room_irs(spk, seed=seed * 2 + k + 1)
        d_ref = np.linalg.norm(np.asarray(spk[reference]) - np.asarray(SEAT_M)) / C_M_S
        h = _shift(h, LEAD_S - (d_ref + 0.005))  # simulate() puts a 5 ms pre-delay first
        h = h + 10 ** (noise_db / 20) * np.max(np.abs(h)) * rng.standard_normal(h.shape)
        out.append(h[None])
    return out


def record_through_path(
    irs: np.ndarray,
    layout: dict,
    output: int,
    latency_s: float,
    drift_ppm: float,
    rng: np.random.Generator,
    noise_rms: float = 1e-5,
) -> np.ndarray:
    """What the microphone of a two-device set-up records while ``output`` is measured.

    The played rows (:func:`roomcorr.measure.session.capture_signal`: the sweeps on
    ``output``, the markers on the reference) pass through the loudspeakers' room
    responses ``irs`` (n_speakers, n_samples; output k is ``irs[k - 1]``), then an
    extra latency and a microphone clock ``drift_ppm`` fast. The drift is applied by
    Fourier resampling (``scipy.signal.resample``) and the latency by an FFT phase
    shift: neither is roomcorr's own resampler (which uses ``resample_poly``).
    """
    from scipy.signal import fftconvolve, resample

    from roomcorr.measure.session import capture_signal

    rows, outs = capture_signal(layout, output)
    n = rows.shape[1] + irs.shape[1] - 1
    y = np.zeros(n)
    for row, out in zip(rows, outs, strict=True):
        y += fftconvolve(row, irs[out - 1])[:n]
    pad = int(0.1 * FS)
    y = _shift(np.concatenate([y, np.zeros(pad)]), latency_s)
    y = resample(y, int(round(len(y) * (1 + drift_ppm * 1e-6))))
    return y + noise_rms * rng.standard_normal(len(y))


def measure_offline(speakers, seed: int, reference_output: int = 1) -> np.ndarray:
    """One run of ``roomcorr measure`` with two devices and the acoustic reference, offline:
    per loudspeaker a recording through :func:`record_through_path` (own latency 0 to 50
    ms, drift -150 to +80 ppm, both seeded), analysed by
    :func:`roomcorr.measure.session.analyse_recording`. Returns (1, n_speakers, n_ir)."""
    from roomcorr.measure.session import analyse_recording, sweep_layout
    from roomcorr.measure.settings import MeasureSettings

    ms = MeasureSettings(
        outputs=tuple(range(1, len(speakers) + 1)),
        reference=reference_output,
        sweep_s=1.0,
        noise_s=0.2,
        tail_s=0.35,
        ir_s=0.2,
        repeats=1,
        two_streams=True,
    )
    layout = sweep_layout(ms)
    rng = np.random.default_rng(seed)
    irs = 0.5 * room_irs(speakers, seed=seed + 7, length_s=0.3)
    drift = float(rng.uniform(-150.0, 80.0))
    out = []
    for k in range(1, len(speakers) + 1):
        rec = record_through_path(irs, layout, k, float(rng.uniform(0.0, 0.05)), drift, rng)
        ir, _, _ = analyse_recording(rec, None, layout)
        out.append(ir)
    return np.array(out)[None]
