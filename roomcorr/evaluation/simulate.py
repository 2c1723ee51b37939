"""Impulse responses of the invented evaluation rooms (``scenarios.json``).

Why this simulator
------------------
The rooms are synthesised with the same physical model as the demo room
(:mod:`roomcorr.demo`, built from :mod:`roomcorr.physics`): the modal
expansion of a rectangular room's Green's function below a crossover, image
sources up to second order and a diffuse tail above it, and an analytic
loudspeaker. It is used here rather than a long image-source simulation because

* below a few hundred hertz, where every figure of merit but one lives, the
  modal sum is the room's exact steady-state response (Kuttruff, ch. 3),
  while an image-source model needs reflection orders in the tens (tens of
  thousands of images per response) to converge there;
* it costs about a second per room, so the corpus is regenerated on demand
  instead of being committed as WAV files;
* it needs no package beyond numpy.

Three changes from the demo: the modal and image-source parts are joined by
a power-complementary crossover (:func:`power_complementary`), so the
average level does not dip by 3 dB around the crossover; a room may include
the zero-order (pressure-chamber) mode with a leak frequency (``leak_hz``),
which lifts the response below the lowest axial mode as a closed, small room
does; and each room has its own damping (Sabine from the wall absorption).

Deterministic: the diffuse tails and the measurement noise are seeded from
the room's name.

References
----------
.. [1] H. Kuttruff, *Room Acoustics*, 5th ed., Spon Press, 2009, ch. 3 and 4.
.. [2] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
"""

from __future__ import annotations

import json
import zlib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from roomcorr.audio_io import write_wav
from roomcorr.physics import (
    early_spectrum,
    image_sources,
    modal_response,
    mode_grid,
    sabine_t60_s,
    speaker_response,
    wall_shelf,
)

#: Speed of sound in the evaluation rooms, m/s (air at about 20 °C).
C_SOUND_M_S = 343.0
#: Sample rate of the evaluation responses, Hz.
EVAL_FS = 48000
#: Crossover between the modal and the image-source parts, Hz.
CROSSOVER_HZ = 300.0
#: Silence before the emission (made-up interface latency), s.
PRE_DELAY_S = 0.005
#: Measurement noise below the largest peak of a room's set, dB; and that peak, dBFS.
NOISE_FLOOR_DB = -80.0
PEAK_DBFS = -6.0


@dataclass
class EvaluationRoom:
    """One simulated room: measured and held-out impulse responses and the truth.

    Attributes
    ----------
    name : str
    fs : int
    measured : ndarray, shape (n_measured, n_channels, n_samples)
        Responses at the seats given to the design; index 0 is the centre seat.
    held_out : ndarray, shape (n_held_out, n_channels, n_samples)
        Responses at the seats the design never sees.
    corner_hz : ndarray, shape (n_channels,)
        Each loudspeaker's true high-pass corner.
    t60_s : float
        Sabine reverberation time.
    scenario : dict
        The room's entry of ``scenarios.json``.
    """

    name: str
    fs: int
    measured: np.ndarray
    held_out: np.ndarray
    corner_hz: np.ndarray
    t60_s: float
    scenario: dict[str, Any]


def load_scenarios(path: str | Path | None = None) -> list[dict[str, Any]]:
    """Read the room scenarios (the bundled ``scenarios.json`` by default)."""
    if path is None:
        text = resources.files("roomcorr.evaluation").joinpath("scenarios.json").read_text()
    else:
        text = Path(path).read_text()
    return list(json.loads(text)["rooms"])


def scenario_names() -> list[str]:
    """Names of the bundled evaluation rooms, in file order."""
    return [s["name"] for s in load_scenarios()]


def power_complementary(freq_hz: np.ndarray, fc_hz: float) -> tuple[np.ndarray, np.ndarray]:
    """Zero-phase crossover whose two halves' powers sum to one.

    The modal part and the image-source part are different, mutually
    incoherent estimates of the same field, so they must be joined so that
    their powers add to the field's: a crossover whose amplitudes sum to one
    (such as the Linkwitz-Riley pair of the demo room) loses 3 dB on average
    at the crossover frequency. Slopes of a 4th-order Butterworth power
    response, ``|L|^2 = 1 / (1 + (f/fc)^8)``, ``|H|^2 = 1 - |L|^2``.

    Returns
    -------
    lp, hp : ndarray, shape (n_freqs,), real
    """
    lp2 = 1.0 / (1.0 + (np.asarray(freq_hz, dtype=float) / fc_hz) ** 8)
    return np.sqrt(lp2), np.sqrt(1.0 - lp2)


def _ir_length_s(t60_s: float) -> float:
    # Long enough for the modal decay to fall 90 dB (1.5 T60), so the sampled
    # spectrum does not alias in time; at least 0.75 s.
    return max(0.75, 1.5 * t60_s + 0.1)


def simulate_room(scenario: dict[str, Any], fs: int = EVAL_FS) -> EvaluationRoom:
    """Synthesise every seat of one scenario.

    Parameters
    ----------
    scenario : dict
        One entry of ``scenarios.json``.
    fs : int
        Sample rate in Hz.

    Returns
    -------
    EvaluationRoom
    """
    c = C_SOUND_M_S
    dims = np.asarray(scenario["dims_m"], dtype=float)
    alpha = np.asarray(scenario["wall_alpha"], dtype=float)
    t60 = sabine_t60_s(tuple(dims), tuple(alpha))
    delta = 3.0 * np.log(10.0) / t60
    volume = float(np.prod(dims))
    seat = np.asarray(scenario["seat_m"], dtype=float)
    offsets = [np.asarray(o, dtype=float) for o in scenario["measured"] + scenario["held_out"]]
    mics = np.stack([seat + o for o in offsets])
    if np.any(mics <= 0) or np.any(mics >= dims):
        raise ValueError(f"{scenario['name']}: a seat lies outside the room")
    n_samples = int(round(_ir_length_s(t60) * fs))
    freq_hz = np.fft.rfftfreq(n_samples, 1.0 / fs)
    t = np.arange(n_samples) / fs
    rng = np.random.default_rng(zlib.crc32(scenario["name"].encode()))

    n_low = int(np.searchsorted(freq_hz, 8.0 * CROSSOVER_HZ)) + 1
    f_low = freq_hz[:n_low]
    taper = np.clip((8.0 * CROSSOVER_HZ - f_low) / (4.0 * CROSSOVER_HZ), 0.0, 1.0)
    taper = np.sin(0.5 * np.pi * taper) ** 2
    labels, mode_hz = mode_grid(dims, c, 2.0 * CROSSOVER_HZ)
    if scenario.get("leak_hz"):
        # The pressure-chamber (0, 0, 0) mode, at the leak frequency.
        labels = np.vstack([np.zeros((1, 3), dtype=labels.dtype), labels])
        mode_hz = np.concatenate([[float(scenario["leak_hz"])], mode_hz])
    lp, hp = power_complementary(freq_hz, CROSSOVER_HZ)
    wall = wall_shelf(freq_hz)
    beta = np.sqrt(1.0 - alpha)
    pre = np.exp(-2j * np.pi * freq_hz * PRE_DELAY_S)
    tail_sigma = np.sqrt(c / (4.0 * np.pi * volume * fs)) * np.exp(-delta * t)

    speakers = scenario["speakers"]
    spectra = np.zeros((mics.shape[0], len(speakers), freq_hz.size), dtype=complex)
    for ch, spk in enumerate(speakers):
        src = np.asarray(spk["pos_m"], dtype=float)
        modal = np.zeros((mics.shape[0], freq_hz.size), dtype=complex)
        modal[:, :n_low] = taper * modal_response(
            f_low, src, mics, dims, labels, mode_hz, delta, c
        )
        images = image_sources(src, dims)
        speaker = speaker_response(freq_hz, spk)
        for m, mic in enumerate(mics):
            early = early_spectrum(freq_hz, images, mic, beta, wall, c)
            t0 = float(np.linalg.norm(src - mic)) / c
            fade = np.sin(0.5 * np.pi * np.clip((t - t0 - 0.002) / 0.020, 0.0, 1.0)) ** 2
            tail = rng.standard_normal(n_samples) * tail_sigma * fade
            room = lp * modal[m] + hp * (early + np.fft.rfft(tail) * wall**3)
            spectra[m, ch] = 4.0 * np.pi * pre * speaker * room
    aa = np.clip((0.5 * fs - freq_hz) / (0.08 * fs), 0.0, 1.0)
    spectra *= np.sin(0.5 * np.pi * aa) ** 2
    irs = np.fft.irfft(spectra, n=n_samples, axis=-1)
    irs *= 10.0 ** (PEAK_DBFS / 20.0) / float(np.max(np.abs(irs)))
    irs += 10.0 ** ((PEAK_DBFS + NOISE_FLOOR_DB) / 20.0) * rng.standard_normal(irs.shape)
    n_meas = len(scenario["measured"])
    return EvaluationRoom(
        name=scenario["name"],
        fs=fs,
        measured=irs[:n_meas],
        held_out=irs[n_meas:],
        corner_hz=np.array([float(s["hp_hz"]) for s in speakers]),
        t60_s=float(t60),
        scenario=scenario,
    )


def evaluation_room(name: str, fs: int = EVAL_FS) -> EvaluationRoom:
    """Synthesise the bundled room called ``name``."""
    for s in load_scenarios():
        if s["name"] == name:
            return simulate_room(s, fs)
    raise KeyError(f"no evaluation room called {name!r}; known: {', '.join(scenario_names())}")


def write_measured_wavs(room: EvaluationRoom, folder: str | Path) -> list[Path]:
    """Write the measured seats as ``pos1.wav`` ... (32-bit float) for ``roomcorr design``.

    Returns
    -------
    list of Path
    """

    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    return [write_wav(out / f"pos{i + 1}.wav", ir, room.fs) for i, ir in enumerate(room.measured)]


#: Seed of the perturbed copies of the rooms (:func:`perturbed_scenarios`).
PERTURB_SEED = 20261202
#: Ranges of the perturbation: dimension factor, wall-absorption factor, loudspeaker
#: corner (Hz), and how far the listening position moves (m, per horizontal axis).
PERTURB_DIMS = (0.8, 1.25)
PERTURB_ALPHA = (0.6, 1.5)
PERTURB_CORNER_HZ = (35.0, 80.0)
PERTURB_SEAT_M = 0.3


def perturb_scenario(scenario: dict[str, Any], rng: np.random.Generator, tag: str) -> dict:
    """A seeded variation of one room, for checking a design on rooms it was not tuned on.

    Every dimension is scaled by its own factor from :data:`PERTURB_DIMS`
    (loudspeakers and the listening position keep their relative places),
    every wall's absorption by a factor from :data:`PERTURB_ALPHA` (kept
    within 0.03 to 0.6), the listening position moves by up to
    :data:`PERTURB_SEAT_M` along each horizontal axis, and each
    loudspeaker's high-pass corner is drawn anew from
    :data:`PERTURB_CORNER_HZ` (the pair keeps its small mismatch and its Q).
    Seat offsets are kept, so held-out seats stay 25 to 45 cm from the centre.

    Returns
    -------
    dict
        A scenario like the entries of ``scenarios.json``, named ``<name>-<tag>``.
    """
    s = json.loads(json.dumps(scenario))
    old = np.asarray(s["dims_m"], dtype=float)
    dims = old * rng.uniform(*PERTURB_DIMS, size=3)
    scale = dims / old
    s["dims_m"] = [round(float(x), 3) for x in dims]
    alpha = np.asarray(s["wall_alpha"], dtype=float) * rng.uniform(*PERTURB_ALPHA, size=6)
    s["wall_alpha"] = [round(float(x), 3) for x in np.clip(alpha, 0.03, 0.6)]
    corner = float(rng.uniform(*PERTURB_CORNER_HZ))
    first = float(s["speakers"][0]["hp_hz"])
    for spk in s["speakers"]:
        spk["pos_m"] = [round(float(x), 3) for x in np.asarray(spk["pos_m"]) * scale]
        spk["hp_hz"] = round(corner * float(spk["hp_hz"]) / first, 2)
    seat = np.asarray(s["seat_m"], dtype=float) * scale
    seat[:2] += rng.uniform(-PERTURB_SEAT_M, PERTURB_SEAT_M, size=2)
    offsets = np.asarray(s["measured"] + s["held_out"], dtype=float)
    margin = 0.15
    lo = margin - offsets.min(axis=0)
    hi = dims - margin - offsets.max(axis=0)
    s["seat_m"] = [round(float(x), 3) for x in np.clip(seat, lo, hi)]
    s["name"] = f"{s['name']}-{tag}"
    return s


def perturbed_scenarios(per_room: int = 2, seed: int = PERTURB_SEED) -> list[dict[str, Any]]:
    """``per_room`` seeded perturbed copies of every bundled room (:func:`perturb_scenario`)."""
    rng = np.random.default_rng(seed)
    return [
        perturb_scenario(s, rng, f"p{k + 1}") for s in load_scenarios() for k in range(per_room)
    ]
