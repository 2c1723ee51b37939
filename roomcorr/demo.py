"""Physical model of roomcorr's invented demo room and its bundled measurements.

The demo room is made up: a rectangular listening room of 5.55 m x 4.15 m x
2.65 m (61 m³), moderately damped (T60 = 0.42 s at all frequencies), with a
stereo pair of small two-way loudspeakers close to the front wall and four
microphone positions around one seat. Nothing here describes a real room,
product or place.

Coordinates (metres) have their origin in the front-left lower corner as seen
from the seat: ``x`` runs from the front wall (behind the loudspeakers) to the
back wall, ``y`` from the left wall to the right wall, ``z`` from the floor up.

Model
-----
Every impulse response is synthesised in the frequency domain on the bins of
one real FFT of the output length and has four parts:

1. **Modes** (below the crossover, 300 Hz). The modal expansion of the room's
   Green's function, ``G = c² Σ ψ(r) ψ(r0) / (N (ω_n² − ω² + 2jδω))`` with
   ``ψ = cos(n_x π x / L_x) cos(n_y π y / L_y) cos(n_z π z / L_z)``, the norm
   ``N = V ε_x ε_y ε_z`` (ε = 1 for n = 0, else 1/2) and Rayleigh's mode
   frequencies ``f_n = c/2 sqrt((n_x/L_x)² + (n_y/L_y)² + (n_z/L_z)²)``.
   Every mode decays with ``δ = 3 ln 10 / T60``. Modes up to twice the
   crossover are summed. The zero-order (pressure-chamber) mode is left out,
   as real rooms leak.
2. **Image sources** (above the crossover): the direct sound and all first-
   and second-order images of the rectangular room, ``e^{−jωr/c} / (4πr)``,
   each reflection scaled by ``sqrt(1 − α)`` of its wall and by a gentle
   high-frequency shelf (walls and furnishings absorb more treble).
3. **Diffuse tail** (above the crossover): seeded Gaussian noise whose
   energy envelope is that of a diffuse field, ``c / (4πV) e^{−t 6 ln 10/T60}``
   per second (the same scaling as ``1 / (4πr)`` for the direct sound),
   faded in after the direct sound.
4. **Loudspeaker**: a 4th-order high-pass near 50 Hz, a slight downward tilt,
   a small crossover bump near 2.3 kHz and a 2nd-order treble roll-off near
   17 kHz, slightly different for the left and right speaker.

Modes and the high-frequency parts are joined by a 4th-order Linkwitz-Riley
crossover, whose low-pass and high-pass sum to an all-pass, so neither part is
double-counted. A pre-delay of 5 ms (a made-up audio interface latency) comes
before the direct sound, which arrives after ``distance / c``. Measurement
noise (seeded, white) sits 80 dB below the largest peak of the set, and the
whole set is scaled so that peak is at −6 dBFS.

What the model produces at the seat: strong peaks at the 2nd and 3rd length
modes (62 Hz, 93 Hz; the loudspeakers sit near the front wall, where every
length mode has an antinode) and a deep dip near 108 Hz (about −16 dB in the
position average, 16-35 dB at single positions), an anti-resonance where the
3rd length mode, past its peak, is cancelled by the height and oblique modes
just above 108 Hz. It is the demo's example of a null that boosting cannot
fix. The front-wall distances (0.42 m, 0.46 m) put the quarter-wave boundary
dip ``c / (4d)`` near 190-200 Hz (common practice), but the other walls fill
it in to about −2 dB in the average. Between emission
and arrival the responses hold low-frequency residue of the truncated modal
sum about 55 dB below the peak; before the emission only measurement noise.

All randomness is seeded, so the output is deterministic.

Regenerate the bundled measurements with::

    python -m roomcorr.demo measurements_demo

which writes ``pos1.wav`` ... ``pos4.wav`` (48 kHz, 24-bit PCM, channel 0 =
left speaker, channel 1 = right speaker), byte for byte the same on every run.

References
----------
.. [1] H. Kuttruff, *Room Acoustics*, 5th ed., Spon Press, 2009, ch. 3
       (modes of a rectangular room, modal damping ``δ = 6.91 / T``) and ch. 4
       (image sources, energy density of the diffuse field).
.. [2] J. B. Allen and D. A. Berkley, "Image method for efficiently simulating
       small-room acoustics", JASA 65(4), 1979.
.. [3] M. R. Schroeder, "The 'Schroeder frequency' revisited", JASA 99(5),
       1996 (``f_c = 2000 sqrt(T60 / V)``).
.. [4] M. R. Schroeder, "New method of measuring reverberation time", JASA
       37(3), 1965.
.. [5] S. H. Linkwitz, "Active crossover networks for noncoincident drivers",
       JAES 24(1), 1976 (the crossover whose two halves sum to an all-pass).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import soundfile as sf

from roomcorr.deliver.atomic import atomic_write_with
from roomcorr.errors import OutputError
from roomcorr.physics import (
    axial_mode_frequencies,
    early_spectrum,
    image_sources,
    linkwitz_riley4,
    modal_response,
    mode_grid,
    mode_kind,
    room_mode_frequencies,
    sabine_t60_s,
    schroeder_frequency_hz,
    speaker_response,
    wall_shelf,
)
from roomcorr.physics.modes import C_SOUND_M_S

#: Seed of the bundled measurements.
DEFAULT_SEED = 20261202

#: Sample rate of the bundled measurements, Hz.
DEFAULT_FS = 48000

#: WAV encoding of the bundled files. 24-bit PCM rather than float because
#: libsndfile stamps float WAVs with the time of writing (PEAK chunk), which
#: would make regenerated files differ byte for byte.
WAV_SUBTYPE = "PCM_24"

#: Length of each impulse response, s.
IR_LENGTH_S = 0.75

#: Silence before the emission instant (made-up interface latency), s.
PRE_DELAY_S = 0.005

#: Room dimensions (L_x, L_y, L_z), m.
ROOM_DIMS_M = (5.55, 4.15, 2.65)

#: Reverberation time of the room, s (frequency-independent in this model).
T60_S = 0.42

#: Crossover between the modal part and the image-source part, Hz.
CROSSOVER_HZ = 300.0

#: Loudspeaker acoustic centres (x, y, z), m: left, right.
SPEAKER_POSITIONS_M = ((0.42, 1.05, 1.00), (0.46, 3.08, 1.02))

#: Microphone positions (x, y, z), m: seat centre, 0.25 m left, 0.25 m right,
#: 0.3 m behind and a little higher.
MIC_POSITIONS_M = (
    (3.45, 2.08, 1.10),
    (3.45, 1.83, 1.10),
    (3.45, 2.33, 1.10),
    (3.75, 2.08, 1.18),
)

#: Energy absorption coefficients: (x=0 front, x=L back, y=0 left, y=L right,
#: z=0 floor, z=L ceiling). Their Sabine area gives about T60_S.
_WALL_ALPHA = (0.22, 0.30, 0.18, 0.20, 0.32, 0.20)

#: Per-speaker parameters: high-pass corner, Q of its two sections, crossover
#: bump (f, gain dB, Q), treble roll-off corner, tilt (total drop in dB spread
#: over the two corner frequencies), sensitivity in dB.
_SPEAKERS = (
    {"hp_hz": 50.0, "hp_q": (0.54, 1.31), "bump": (2300.0, 1.5, 1.4), "lp_hz": 17000.0,
     "tilt_hz": (200.0, 6000.0), "tilt_db": -1.5, "gain_db": 0.0},
    {"hp_hz": 52.0, "hp_q": (0.56, 1.25), "bump": (2400.0, 1.0, 1.2), "lp_hz": 16500.0,
     "tilt_hz": (220.0, 6500.0), "tilt_db": -1.8, "gain_db": -0.4},
)

#: Earlier private names of the model's parts, now public in :mod:`roomcorr.physics`
#: (kept for modules and tests written against them).
_mode_grid = mode_grid
_modal_response = modal_response
_image_sources = image_sources
_speaker_response = speaker_response
_linkwitz_riley4 = linkwitz_riley4
_wall_shelf = wall_shelf
_mode_kind = mode_kind

__all__ = [
    "C_SOUND_M_S",
    "axial_mode_frequencies",
    "demo_file_names",
    "early_spectrum",
    "room_mode_frequencies",
    "sabine_t60_s",
    "schroeder_frequency_hz",
    "synthesize_demo_room",
    "write_demo_measurements",
]

_NOISE_FLOOR_DB = -80.0
_PEAK_DBFS = -6.0


# --------------------------------------------------------------------------- public API


def synthesize_demo_room(
    fs: int = DEFAULT_FS, seed: int = DEFAULT_SEED
) -> tuple[np.ndarray, int, dict]:
    """Synthesise the impulse responses of the invented demo room.

    Parameters
    ----------
    fs : int
        Sample rate in Hz.
    seed : int
        Seed of the diffuse tails and the measurement noise.

    Returns
    -------
    irs : np.ndarray
        Impulse responses, shape (n_positions=4, n_channels=2, n_samples), float64;
        channel 0 is the left speaker, channel 1 the right.
    fs : int
        Sample rate in Hz.
    metadata : dict
        ``room_dims_m``, ``volume_m3``, ``t60_s``, ``sabine_t60_s``, ``c_m_s``,
        ``schroeder_frequency_hz``, ``speaker_positions_m``, ``mic_positions_m``,
        ``direct_delay_s`` (n_positions, n_channels; emission to arrival),
        ``pre_delay_s``, ``crossover_hz``, ``boundary_dip_hz`` (per speaker,
        c / 4d for the front wall), ``modes`` (list of dicts with ``n``,
        ``freq_hz``, ``kind`` up to 300 Hz), ``seed``, ``fs``.

    References
    ----------
    .. [1] H. Kuttruff, *Room Acoustics*, 5th ed., 2009.
    .. [2] J. B. Allen and D. A. Berkley, JASA 65(4), 1979.
    """
    if fs < 8000:
        raise ValueError("fs must be at least 8000 Hz")
    c = C_SOUND_M_S
    dims = np.asarray(ROOM_DIMS_M)
    volume = float(np.prod(dims))
    n_samples = int(round(IR_LENGTH_S * fs))
    freq_hz = np.fft.rfftfreq(n_samples, 1.0 / fs)
    t = np.arange(n_samples) / fs
    rng = np.random.default_rng(seed)
    mics = np.asarray(MIC_POSITIONS_M)
    delta = 3.0 * np.log(10.0) / T60_S

    # Modal part: only bins where the crossover low-pass still matters, tapered
    # smoothly to zero between 4x and 8x the crossover (a hard cut would ring).
    n_low = int(np.searchsorted(freq_hz, 8.0 * CROSSOVER_HZ)) + 1
    f_low = freq_hz[:n_low]
    taper = np.clip((8.0 * CROSSOVER_HZ - f_low) / (4.0 * CROSSOVER_HZ), 0.0, 1.0)
    taper = np.sin(0.5 * np.pi * taper) ** 2
    labels, mode_hz = mode_grid(dims, c, 2.0 * CROSSOVER_HZ)
    lp, hp = linkwitz_riley4(freq_hz, CROSSOVER_HZ)
    wall = wall_shelf(freq_hz)
    beta = np.sqrt(1.0 - np.asarray(_WALL_ALPHA))
    pre = np.exp(-2j * np.pi * freq_hz * PRE_DELAY_S)
    # Diffuse-field energy per second for a 1/(4 pi r) source (Kuttruff, ch. 4).
    tail_sigma = np.sqrt(c / (4.0 * np.pi * volume * fs)) * np.exp(-delta * t)

    spectra = np.zeros((mics.shape[0], len(SPEAKER_POSITIONS_M), freq_hz.size), dtype=complex)
    direct_delay = np.zeros((mics.shape[0], len(SPEAKER_POSITIONS_M)))
    for ch, (src_pos, spk) in enumerate(zip(SPEAKER_POSITIONS_M, _SPEAKERS, strict=True)):
        src = np.asarray(src_pos)
        modal = np.zeros((mics.shape[0], freq_hz.size), dtype=complex)
        modal[:, :n_low] = taper * modal_response(
            f_low, src, mics, dims, labels, mode_hz, delta, c
        )
        images = image_sources(src, dims)
        speaker = speaker_response(freq_hz, spk)
        for pos, mic in enumerate(mics):
            early = early_spectrum(freq_hz, images, mic, beta, wall, c)
            r_direct = float(np.linalg.norm(src - mic))
            direct_delay[pos, ch] = r_direct / c
            t0 = r_direct / c
            fade = np.clip((t - t0 - 0.002) / 0.020, 0.0, 1.0)
            fade = np.sin(0.5 * np.pi * fade) ** 2
            tail = rng.standard_normal(n_samples) * tail_sigma * fade
            high = early + np.fft.rfft(tail) * wall**3
            room = lp * modal[pos] + hp * high
            spectra[pos, ch] = 4.0 * np.pi * pre * speaker * room  # 1 at 1 m free field

    # Anti-alias filter of the (imaginary) interface: a smooth zero-phase fade from
    # 0.42 fs to fs/2. It also keeps the sinc tails of the fractional-delay images
    # from wrapping round into the pre-delay.
    aa = np.clip((0.5 * fs - freq_hz) / (0.08 * fs), 0.0, 1.0)
    spectra *= np.sin(0.5 * np.pi * aa) ** 2
    irs = np.fft.irfft(spectra, n=n_samples, axis=-1)
    peak = float(np.max(np.abs(irs)))
    irs *= 10.0 ** (_PEAK_DBFS / 20.0) / peak
    noise_rms = 10.0 ** ((_PEAK_DBFS + _NOISE_FLOOR_DB) / 20.0)
    irs += noise_rms * rng.standard_normal(irs.shape)

    metadata = {
        "description": "Invented rectangular listening room (physical model, roomcorr.demo)",
        "room_dims_m": tuple(float(d) for d in dims),
        "volume_m3": volume,
        "t60_s": T60_S,
        "sabine_t60_s": sabine_t60_s(ROOM_DIMS_M, _WALL_ALPHA),
        "c_m_s": c,
        "schroeder_frequency_hz": schroeder_frequency_hz(T60_S, volume),
        "speaker_positions_m": SPEAKER_POSITIONS_M,
        "speaker_names": ("left", "right"),
        "mic_positions_m": MIC_POSITIONS_M,
        "direct_delay_s": direct_delay,
        "pre_delay_s": PRE_DELAY_S,
        "crossover_hz": CROSSOVER_HZ,
        "boundary_dip_hz": tuple(c / (4.0 * p[0]) for p in SPEAKER_POSITIONS_M),
        "noise_floor_db": _NOISE_FLOOR_DB,
        "peak_dbfs": _PEAK_DBFS,
        "modes": [
            {"n": label, "freq_hz": f, "kind": mode_kind(label)}
            for label, f in room_mode_frequencies(ROOM_DIMS_M, c, 300.0)
        ],
        "seed": seed,
        "fs": fs,
    }
    return irs, fs, metadata


def demo_file_names(n_positions: int = len(MIC_POSITIONS_M)) -> list[str]:
    """Return the file names of the bundled measurements, ``pos1.wav`` ... ."""
    return [f"pos{i + 1}.wav" for i in range(n_positions)]


def write_demo_measurements(
    folder: str | Path, fs: int = DEFAULT_FS, seed: int = DEFAULT_SEED
) -> list[Path]:
    """Synthesise the demo room and write one 24-bit WAV per microphone position.

    Parameters
    ----------
    folder : path-like
        Destination folder; created if missing.
    fs : int
        Sample rate in Hz.
    seed : int
        Seed passed to :func:`synthesize_demo_room`.

    Returns
    -------
    list of Path
        ``folder/pos1.wav`` ... ``folder/pos4.wav``; each file has 2 channels
        (0 left speaker, 1 right speaker).

    Raises
    ------
    OutputError
        If the folder cannot be created or a file cannot be written.
    """

    out = Path(folder)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(
            f"cannot create demo folder {out}: {exc}; choose a writable folder"
        ) from exc
    irs, fs, _ = synthesize_demo_room(fs=fs, seed=seed)
    paths = []
    for name, ir in zip(demo_file_names(irs.shape[0]), irs, strict=True):
        path = out / name
        data = np.ascontiguousarray(ir.T)

        def _writer(tmp: Path, data: np.ndarray = data) -> None:
            sf.write(str(tmp), data, fs, subtype=WAV_SUBTYPE, format="WAV")

        try:
            atomic_write_with(path, _writer)
        except OSError as exc:
            raise OutputError(f"cannot write {path}: {exc}; check the folder is writable") from exc
        paths.append(path)
    return paths


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m roomcorr.demo OUT_DIR``: regenerate the demo measurements."""
    parser = argparse.ArgumentParser(
        prog="python -m roomcorr.demo",
        description="Write the invented demo room's impulse responses (pos1.wav ... pos4.wav).",
    )
    parser.add_argument("out_dir", help="folder to write the WAV files into (created if missing)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    args = parser.parse_args(argv)
    try:
        paths = write_demo_measurements(args.out_dir, seed=args.seed)
    except OutputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    for path in paths:
        print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
