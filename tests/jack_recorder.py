"""Test-only JACK client that records what is played to it (run as a separate process).

Usage: ``python tests/jack_recorder.py NAME N_CHANNELS OUT.npy``. Registers input ports
``in_1..in_N``; PortAudio lists the client as a device named NAME that can play
N channels. Prints ``READY`` once active; on stdin closing, writes everything
received as an array (N, n_samples) to OUT.npy and exits.
"""

from __future__ import annotations

import sys

import jack
import numpy as np


def main(name: str, n: int, out: str) -> None:
    client = jack.Client(name, no_start_server=True)
    ins = [client.inports.register(f"in_{i + 1}") for i in range(n)]
    got: list[np.ndarray] = []

    @client.set_process_callback
    def process(frames: int) -> None:
        got.append(np.array([p.get_array() for p in ins], dtype=np.float32))

    with client:
        print("READY", flush=True)
        sys.stdin.read()
    data = np.concatenate(got, axis=1) if got else np.zeros((n, 0), dtype=np.float32)
    np.save(out, data)


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]), sys.argv[3])
