"""Test-only JACK client that plays an invented room (run as a separate process).

Usage: ``python tests/jack_room.py CONFIG.json``. The client registers input
ports ``in_1..in_N`` (one per loudspeaker, plus one loopback cable input when
``loopback`` is true) and output ports ``out_1`` (the microphone) and
``out_2`` (the loopback return). PortAudio lists the client as a device of its
own name, so a measurement opened on it is wired from the first frame.

Microphone = sum over loudspeakers of ``ir_j * (x_j + a2_j x_j**2)`` times
``gain``, plus seeded Gaussian noise of ``noise_rms`` and ``dc``, clipped to
+-1 like a converter. Loopback return = loopback input, unchanged.
Prints ``READY`` once active; exits when stdin closes or on SIGTERM.

Two-device effects (optional keys):

``drift_ppm``
    The microphone's converter runs this much fast against the output's: the
    microphone signal is resampled so that ``1 + drift`` samples come out for
    every sample played. Kaiser-windowed sinc interpolation, 64 taps, cut-off
    0.9 of Nyquist, weights from a table of 512 fractional positions with linear
    interpolation between rows (a textbook fractional-delay interpolator,
    independent of roomcorr's own resampling).
``mic``
    false: no output ports at all, so the client is a device that can only play
    (with ``speakers: []`` it is one that can only record).
``tone``
    ``[frequency_hz, amplitude]``: a steady sine added at the microphone, as an
    acoustic calibrator seated on it.
``latency_ms``
    ``[lo, hi]``: every time a stream connects to a loudspeaker input, the path
    to the microphone gets a new extra latency drawn uniformly from this range
    (seeded), as when the audio system's latency changes between runs.

With either key the microphone path has a fixed 1024-sample processing delay
besides.
"""

from __future__ import annotations

import json
import signal
import sys
import threading

import jack
import numpy as np
from scipy.signal import fftconvolve


def main(config_path: str) -> None:
    cfg = json.loads(open(config_path, encoding="utf-8").read())
    client = jack.Client(cfg["name"], no_start_server=True)
    speakers = cfg["speakers"]
    ins = [client.inports.register(f"in_{i + 1}") for i in range(len(speakers))]
    lb_in = client.inports.register(f"in_{len(speakers) + 1}") if cfg.get("loopback") else None
    if cfg.get("mic", True):
        mic = client.outports.register("out_1")
        lb_out = client.outports.register("out_2")
    else:  # a device that can only play (no microphone side)
        mic = lb_out = None
    irs = [None if s.get("ir") is None else np.asarray(s["ir"], dtype=float) for s in speakers]
    a2 = [float(s.get("a2", 0.0)) for s in speakers]
    m = max([len(h) for h in irs if h is not None] + [1])
    acc = np.zeros(m + 8192)
    rng = np.random.default_rng(int(cfg.get("seed", 0)))
    gain = float(cfg.get("gain", 1.0))
    noise_rms = float(cfg.get("noise_rms", 1e-4))
    dc = float(cfg.get("dc", 0.0))
    drift = float(cfg.get("drift_ppm", 0.0)) * 1e-6
    lat_range = cfg.get("latency_ms")
    resampled = drift != 0.0 or lat_range is not None
    lat_rng = np.random.default_rng(int(cfg.get("seed", 0)) + 1000)
    state = {"latency": 0.0, "k": 0, "n": 0, "draws": [], "tone": 0}
    tone = cfg.get("tone")  # [frequency_hz, amplitude]
    hist_len = 1 << 18
    hist = np.zeros(hist_len)  # microphone signal before the converter, ring buffer
    half = 32
    delay = 1024
    taps = np.arange(-half + 1, half + 1)  # 64 taps
    window_beta = 8.0
    cutoff = 0.9
    n_phases = 512
    # table[r, j]: weight of tap j for a read point r / n_phases past the base sample
    dist = taps[None, :] - (np.arange(n_phases + 1) / n_phases)[:, None]
    kaiser = np.i0(window_beta * np.sqrt(np.clip(1.0 - (dist / half) ** 2, 0.0, None)))
    table = cutoff * np.sinc(cutoff * dist) * kaiser / np.i0(window_beta)

    def new_latency(*_args) -> None:
        lo, hi = lat_range
        value = float(lat_rng.uniform(lo, hi)) * 1e-3 * client.samplerate
        state["latency"] = value
        state["draws"].append(value)

    if lat_range is not None:

        @client.set_port_connect_callback
        def on_connect(a, b, connect: bool) -> None:
            if connect and any(p.name.startswith(f"{cfg['name']}:in_") for p in (a, b)):
                new_latency()

    def converter(y: np.ndarray) -> np.ndarray:
        """Append y (played-rate samples) and read the microphone's samples."""
        frames = len(y)
        n0 = state["n"]
        idx = (n0 + np.arange(frames)) % hist_len
        hist[idx] = y
        state["n"] = n0 + frames
        k = state["k"] + np.arange(frames)
        state["k"] += frames
        t = k / (1.0 + drift) - delay - state["latency"]
        base = np.floor(t)
        phase = (t - base) * n_phases  # table row (fractional), rows differ by 1/n_phases
        row = np.minimum(phase.astype(np.int64), n_phases - 1)
        mix = (phase - row)[:, None]
        w = (1.0 - mix) * table[row] + mix * table[row + 1]  # (frames, 64)
        pos = base[:, None] + taps[None, :]
        vals = np.where(pos >= 0, hist[pos.astype(np.int64) % hist_len], 0.0)
        return np.sum(w * vals, axis=1)

    @client.set_process_callback
    def process(frames: int) -> None:
        nonlocal acc
        if len(acc) < m + frames:
            acc = np.concatenate([acc, np.zeros(m + frames)])
        for port, h, a in zip(ins, irs, a2, strict=True):
            x = port.get_array().astype(float)
            if h is None:
                continue
            x = x + a * x * x
            acc[: frames + len(h) - 1] += fftconvolve(x, h)
        y = gain * acc[:frames]
        if resampled:
            y = converter(y)
        if tone is not None:  # an acoustic calibrator on the microphone
            t = (state["tone"] + np.arange(frames)) / client.samplerate
            y = y + tone[1] * np.sin(2 * np.pi * tone[0] * t)
            state["tone"] += frames
        y = y + noise_rms * rng.standard_normal(frames) + dc
        acc[:-frames] = acc[frames:].copy()
        acc[-frames:] = 0.0
        if mic is None:
            return
        mic.get_array()[:] = np.clip(y, -1.0, 1.0)
        lb_out.get_array()[:] = lb_in.get_array() if lb_in is not None else 0.0

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    with client:
        print("READY", flush=True)
        threading.Thread(target=lambda: (sys.stdin.read(), stop.set()), daemon=True).start()
        stop.wait()


if __name__ == "__main__":
    main(sys.argv[1])
