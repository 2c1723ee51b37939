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
    mic = client.outports.register("out_1")
    lb_out = client.outports.register("out_2")
    irs = [None if s.get("ir") is None else np.asarray(s["ir"], dtype=float) for s in speakers]
    a2 = [float(s.get("a2", 0.0)) for s in speakers]
    m = max([len(h) for h in irs if h is not None] + [1])
    acc = np.zeros(m + 8192)
    rng = np.random.default_rng(int(cfg.get("seed", 0)))
    gain = float(cfg.get("gain", 1.0))
    noise_rms = float(cfg.get("noise_rms", 1e-4))
    dc = float(cfg.get("dc", 0.0))

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
        y = gain * acc[:frames] + noise_rms * rng.standard_normal(frames) + dc
        mic.get_array()[:] = np.clip(y, -1.0, 1.0)
        acc[:-frames] = acc[frames:].copy()
        acc[-frames:] = 0.0
        lb_out.get_array()[:] = lb_in.get_array() if lb_in is not None else 0.0

    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    with client:
        print("READY", flush=True)
        threading.Thread(target=lambda: (sys.stdin.read(), stop.set()), daemon=True).start()
        stop.wait()


if __name__ == "__main__":
    main(sys.argv[1])
