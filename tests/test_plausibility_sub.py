"""A subwoofer's own response is accepted as an impulse response; reversed files,
noise and music are still refused (issue 20, roomcorr.analysis.plausibility)."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from pra_rooms import MULTI_SUB_ROOMS, simulate_pra, sofa_positions
from scipy.signal import butter, sosfilt

from roomcorr.analysis.plausibility import impulse_response_problems

FS = 48000
C_M_S = 343.2  # ISO 9613-1 at 20 °C


def analytic_corner_sub(fs: int = FS, dur_s: float = 0.6, t60_s: float = 0.5) -> np.ndarray:
    """A subwoofer in a corner of a rigid-walled rectangular room, analytically.

    Modal expansion of the room's impulse response (Kuttruff, Room Acoustics, ch. 3):
    h(t) = sum_n p_n(src) p_n(mic) / (omega_n Lambda_n) exp(-delta t) sin(omega_n t),
    mode shapes p_n = cos(nx pi x / Lx) cos(ny pi y / Ly) cos(nz pi z / Lz), norm
    Lambda_n = V / prod(1 + [n_i = 0]) (the 1/2 of a cosine squared averaged), decay
    delta = 3 ln 10 / T60 for every mode; the sum starts at the direct sound's arrival
    r / c (causal) and is low-passed by the subwoofer's 4th-order Butterworth at 80 Hz
    (scipy), 2nd-order high-pass at 20 Hz (a closed box; no DC in a room response).
    """
    dims = np.array([5.0, 4.0, 2.5])
    src = np.array([0.2, 0.2, 0.2])
    mic = np.array([3.0, 2.3, 1.1])
    t_arr = float(np.linalg.norm(src - mic)) / C_M_S
    n = int(dur_s * fs)
    t = np.arange(n) / fs
    tt = np.clip(t - t_arr, 0.0, None)
    on = t >= t_arr
    delta = 3 * np.log(10) / t60_s
    h = np.zeros(n)
    for idx in itertools.product(range(8), range(7), range(5)):
        k = np.pi * np.array(idx) / dims
        w = C_M_S * float(np.linalg.norm(k))
        if w == 0 or w > 2 * np.pi * 400:
            continue
        shape = np.prod(np.cos(k * src)) * np.prod(np.cos(k * mic))
        norm = np.prod(dims) / np.prod([2.0 if i else 1.0 for i in idx])
        h += on * shape / (w * norm) * np.exp(-delta * tt) * np.sin(w * tt)
    sos = np.vstack(
        [butter(4, 80.0, fs=fs, output="sos"), butter(2, 20.0, "highpass", fs=fs, output="sos")]
    )
    h = sosfilt(sos, h)
    h *= 0.5 / np.max(np.abs(h))
    return h + 1e-5 * np.random.default_rng(3).standard_normal(n)


def test_analytic_corner_subwoofer_is_accepted_and_its_reversal_refused():
    h = analytic_corner_sub()
    onset_s = np.flatnonzero(np.abs(h) > 1e-3)[0] / FS
    # the modes peak well after the direct sound (what the old 30 ms rule refused)
    assert np.argmax(np.abs(h)) / FS - onset_s > 0.01
    assert impulse_response_problems(h, FS) == []
    for pad in (FS // 20, FS // 4):
        rev = np.concatenate([h[::-1], np.zeros(pad)])
        assert any("time-reversed" in p for p in impulse_response_problems(rev, FS)), pad


@pytest.fixture(scope="module")
def pra_subs():
    """Every subwoofer of every benchmark room at the five sofa positions (pyroomacoustics)."""
    out = {}
    for name, (dims, t60, subs, lat) in MULTI_SUB_ROOMS.items():
        out[name] = simulate_pra(
            dims, subs, ["sub"] * len(subs), sofa_positions(dims), t60, lat, length_s=0.6
        )
    return out


def test_every_benchmark_subwoofer_is_accepted(pra_subs):
    # rooms from independent code (pyroomacoustics' image-source method, Allen & Berkley 1979)
    for name, irs in pra_subs.items():
        for p, c in itertools.product(range(irs.shape[0]), range(irs.shape[1])):
            assert impulse_response_problems(irs[p, c], FS) == [], (name, p, c)


def test_every_benchmark_subwoofer_reversed_is_refused(pra_subs):
    for name, irs in pra_subs.items():
        for p, c in itertools.product(range(irs.shape[0]), range(irs.shape[1])):
            for pad in (FS // 20, FS // 4):
                rev = np.concatenate([irs[p, c, ::-1], np.zeros(pad)])
                assert impulse_response_problems(rev, FS) != [], (name, p, c, pad)


def _music(seed: int, dur_s: float = 2.0) -> np.ndarray:
    """Invented music: a bass line, chords and a kick drum on the beat (120 bpm)."""
    rng = np.random.default_rng(seed)
    n = int(dur_s * FS)
    t = np.arange(n) / FS
    x = np.zeros(n)
    beat = int(0.5 * FS)
    for b in range(0, n, beat):
        seg = t[: min(beat, n - b)]
        f0 = 55.0 * 2 ** (rng.integers(0, 12) / 12)
        env = np.exp(-seg / 0.25)
        x[b : b + seg.size] += 0.4 * env * np.sin(2 * np.pi * f0 * seg)  # bass note
        for k in (4, 5, 7):  # a chord two octaves up
            x[b : b + seg.size] += 0.1 * env * np.sin(2 * np.pi * 2 * f0 * 2 ** (k / 12) * seg)
        kick = np.exp(-seg / 0.05) * np.sin(2 * np.pi * (50 + 100 * np.exp(-seg / 0.02)) * seg)
        x[b : b + seg.size] += 0.5 * kick
    x += 0.02 * rng.standard_normal(n)  # cymbals, hiss
    return 0.5 * x / np.max(np.abs(x))


@pytest.mark.parametrize("seed", range(4))
def test_noise_and_music_are_still_refused(seed):
    # white noise: about 13 dB peak over its median (extreme value of Gaussian noise)
    noise = 0.1 * np.random.default_rng(seed).standard_normal(FS)
    assert impulse_response_problems(noise, FS) != []
    # low-passed noise (a subwoofer playing noise) as well
    lp = sosfilt(butter(4, 80.0, fs=FS, output="sos"), noise)
    assert impulse_response_problems(lp, FS) != []
    assert impulse_response_problems(_music(seed), FS) != []
