"""Tests for roomcorr.demo: the invented demo room and its bundled measurements."""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import find_peaks

from roomcorr import demo
from roomcorr.errors import OutputError

DEMO_DIR = Path(__file__).resolve().parent.parent / "measurements_demo"
LSB_24 = 2.0**-23


@pytest.fixture(scope="module")
def room():
    return demo.synthesize_demo_room()


def _schroeder_t(ir: np.ndarray, fs: int, lo_db: float, hi_db: float) -> float:
    """Reverberation time from Schroeder backward integration (Schroeder, JASA 37, 1965),
    fitted between lo_db and hi_db on the decay curve and extrapolated to 60 dB (ISO 3382-1)."""
    energy = np.cumsum(ir[::-1] ** 2)[::-1]
    edc_db = 10.0 * np.log10(energy / energy[0])
    t = np.arange(ir.size) / fs
    sel = (edc_db <= lo_db) & (edc_db >= hi_db)
    slope_db_s = np.polyfit(t[sel], edc_db[sel], 1)[0]
    return -60.0 / slope_db_s


# ---------------------------------------------------------------- Rayleigh's formula


def test_axial_modes_analytic_case():
    # Rayleigh: f = n c / (2 L); L = 3.43 m with c = 343 m/s gives exactly 50 Hz per order.
    modes = demo.axial_mode_frequencies((3.43, 1.715, 6.86), c=343.0, n_max=2)
    got = {label: f for label, f in modes}
    assert got[(1, 0, 0)] == pytest.approx(50.0)
    assert got[(2, 0, 0)] == pytest.approx(100.0)
    assert got[(0, 1, 0)] == pytest.approx(100.0)
    assert got[(0, 2, 0)] == pytest.approx(200.0)
    assert got[(0, 0, 1)] == pytest.approx(25.0)
    assert len(modes) == 6
    assert [f for _, f in modes] == sorted(f for _, f in modes)


def test_room_modes_match_brute_force_rayleigh():
    # Rayleigh (Kuttruff, Room Acoustics, sec. 3.3):
    # f = c/2 sqrt((nx/Lx)^2 + (ny/Ly)^2 + (nz/Lz)^2), evaluated here by a plain triple
    # loop, independent of the vectorised code.
    dims = (4.7, 3.9, 2.5)
    c = 343.0
    expected = {}
    for nx, ny, nz in itertools.product(range(8), repeat=3):
        f = 0.5 * c * math.sqrt((nx / dims[0]) ** 2 + (ny / dims[1]) ** 2 + (nz / dims[2]) ** 2)
        if 0 < f <= 250.0:
            expected[(nx, ny, nz)] = f
    got = demo.room_mode_frequencies(dims, c, 250.0)
    assert {label for label, _ in got} == set(expected)
    for label, f in got:
        assert f == pytest.approx(expected[label], rel=1e-12)
    # The tangential mode (1, 1, 0) of a cube of side 3.43 m: 50 * sqrt(2) Hz.
    cube = dict(demo.room_mode_frequencies((3.43, 3.43, 3.43), 343.0, 100.0))
    assert cube[(1, 1, 0)] == pytest.approx(50.0 * math.sqrt(2.0))
    assert cube[(1, 1, 1)] == pytest.approx(50.0 * math.sqrt(3.0))


def test_mode_count_matches_asymptotic_formula(room):
    # Kuttruff, Room Acoustics, eq. (3.31) (from memory):
    # N(f) = 4 pi V f^3 / (3 c^3) + pi S f^2 / (4 c^2) + L f / (8 c), L = sum of all edges.
    _, _, meta = room
    lx, ly, lz = meta["room_dims_m"]
    c, f = meta["c_m_s"], 300.0
    volume = lx * ly * lz
    surface = 2.0 * (lx * ly + lx * lz + ly * lz)
    edges = 4.0 * (lx + ly + lz)
    n_formula = (
        4.0 * math.pi * volume * f**3 / (3.0 * c**3)
        + math.pi * surface * f**2 / (4.0 * c**2)
        + edges * f / (8.0 * c)
    )
    assert len(meta["modes"]) == pytest.approx(n_formula, rel=0.05)
    kinds = {m["kind"] for m in meta["modes"]}
    assert kinds == {"axial", "tangential", "oblique"}


def test_bad_dimensions_rejected():
    with pytest.raises(ValueError):
        demo.room_mode_frequencies((4.0, 3.0), 343.0, 100.0)
    with pytest.raises(ValueError):
        demo.axial_mode_frequencies((4.0, 0.0, 2.5))


# ---------------------------------------------------------------- the synthesised room


def test_shape_level_and_noise_floor(room):
    irs, fs, meta = room
    assert fs == 48000
    assert irs.shape == (4, 2, int(round(demo.IR_LENGTH_S * fs)))
    assert irs.shape[-1] / fs < 1.0
    peak = np.max(np.abs(irs))
    assert 20 * np.log10(peak) == pytest.approx(-6.0, abs=0.1)
    # Noise floor: the last 50 ms hold only measurement noise (the tail has decayed
    # by more than 100 dB by then), about 80 dB below the peak.
    last = irs[..., -int(0.05 * fs):]
    floor_db = 20 * np.log10(np.sqrt(np.mean(last**2)) / peak)
    assert floor_db == pytest.approx(-80.0, abs=2.0)
    assert meta["noise_floor_db"] == -80.0


def test_pre_delay_and_direct_sound_delay(room):
    # The direct sound travels distance / c; before the emission instant (pre-delay)
    # there is nothing but measurement noise.
    irs, fs, meta = room
    c = meta["c_m_s"]
    pre = meta["pre_delay_s"]
    assert 0.002 <= pre <= 0.01
    peak = np.max(np.abs(irs))
    n_pre = int(pre * fs)
    assert 20 * np.log10(np.max(np.abs(irs[..., :n_pre])) / peak) < -65.0
    for p, mic in enumerate(meta["mic_positions_m"]):
        for ch, spk in enumerate(meta["speaker_positions_m"]):
            r = math.dist(mic, spk)
            assert meta["direct_delay_s"][p, ch] == pytest.approx(r / c)
            h = irs[p, ch]
            onset = np.argmax(np.abs(h) > 0.25 * np.max(np.abs(h))) / fs
            # The loudspeaker's high-pass and tweeter add well under a millisecond.
            assert pre + r / c - 0.0002 <= onset <= pre + r / c + 0.001


def test_left_and_right_differ_slightly(room):
    irs, fs, _ = room
    spec = np.abs(np.fft.rfft(irs, axis=-1)) ** 2
    freq = np.fft.rfftfreq(irs.shape[-1], 1.0 / fs)
    band = (freq > 500) & (freq < 5000)
    level_db = 10 * np.log10(spec[..., band].mean(axis=(0, 2)))
    assert abs(level_db[0] - level_db[1]) < 1.5
    assert not np.allclose(irs[:, 0], irs[:, 1])


def test_strongest_bass_peaks_sit_on_axial_modes(room):
    # Rayleigh / Kuttruff, Room Acoustics: axial modes f = n c / (2 L), c = 343 m/s at 20 °C.
    # The loudspeakers stand near the front wall, where every length mode (n, 0, 0) has an
    # antinode, so the most prominent peaks of the position-averaged power response between
    # 20 and 150 Hz must lie within a few percent of axial modes.
    irs, fs, meta = room
    freq = np.fft.rfftfreq(irs.shape[-1], 1.0 / fs)
    power = np.mean(np.abs(np.fft.rfft(irs, axis=-1)) ** 2, axis=(0, 1))
    band = (freq >= 20) & (freq <= 150)
    f_band, p_db = freq[band], 10 * np.log10(power[band])
    idx, props = find_peaks(p_db, prominence=1.0)
    top = f_band[idx[np.argsort(props["prominences"])[::-1][:3]]]
    axial = np.array([f for _, f in demo.axial_mode_frequencies(meta["room_dims_m"], 343.0, 6)])
    for f_peak in top:
        assert np.min(np.abs(axial / f_peak - 1.0)) < 0.03, (f_peak, axial)
    # The two most prominent are the 2nd and 3rd length modes, 2c/(2Lx) and 3c/(2Lx).
    lx = meta["room_dims_m"][0]
    assert top[0] == pytest.approx(2 * 343.0 / (2 * lx), rel=0.03)
    assert top[1] == pytest.approx(3 * 343.0 / (2 * lx), rel=0.03)


def test_decay_matches_t60(room):
    # Schroeder backward integration (Schroeder, JASA 37, 1965); T20 and T30 ranges per
    # ISO 3382-1 (-5..-25 dB and -5..-35 dB, from memory). The model's T60 must come back
    # within 15 % for every loudspeaker and position.
    irs, fs, meta = room
    for ir in irs.reshape(-1, irs.shape[-1]):
        assert _schroeder_t(ir, fs, -5.0, -25.0) == pytest.approx(meta["t60_s"], rel=0.15)
        assert _schroeder_t(ir, fs, -5.0, -35.0) == pytest.approx(meta["t60_s"], rel=0.15)
    assert 0.35 <= meta["t60_s"] <= 0.5


def test_schroeder_frequency_and_sabine(room):
    # Schroeder, JASA 1996: f_c = 2000 sqrt(T60 / V); check value V = 40 m^3, T60 = 0.4 s -> 200 Hz.
    assert demo.schroeder_frequency_hz(0.4, 40.0) == pytest.approx(200.0)
    _, _, meta = room
    lx, ly, lz = meta["room_dims_m"]
    assert meta["volume_m3"] == pytest.approx(lx * ly * lz)
    expected = 2000.0 * math.sqrt(meta["t60_s"] / (lx * ly * lz))
    assert meta["schroeder_frequency_hz"] == pytest.approx(expected)
    # Sabine: T60 = 0.161 V / A. One wall of 10 m^2 at alpha 1 in a 1 x 1 x 1 m box,
    # others alpha 0, gives A = 1 m^2 -> 0.161 s.
    assert demo.sabine_t60_s((1.0, 1.0, 1.0), (1, 0, 0, 0, 0, 0)) == pytest.approx(0.161)
    # The wall absorption of the demo room is consistent with its T60.
    assert meta["sabine_t60_s"] == pytest.approx(meta["t60_s"], rel=0.05)


def test_boundary_dip_frequency_metadata(room):
    # Boundary interference: first cancellation near c / (4 d) (common practice).
    _, _, meta = room
    for spk, f_dip in zip(meta["speaker_positions_m"], meta["boundary_dip_hz"], strict=True):
        assert f_dip == pytest.approx(meta["c_m_s"] / (4.0 * spk[0]))
        assert 120.0 < f_dip < 300.0


def test_synthesis_is_deterministic_and_seeded(room):
    irs, _, _ = room
    again, _, _ = demo.synthesize_demo_room()
    np.testing.assert_array_equal(irs, again)
    other, _, _ = demo.synthesize_demo_room(seed=demo.DEFAULT_SEED + 1)
    assert not np.array_equal(irs, other)
    # A different seed changes only the diffuse tail and the noise, not the direct sound:
    # the first 1.5 ms after arrival (before the tail fades in) stay the same.
    _, fs, meta = room
    for p, ch in itertools.product(range(irs.shape[0]), range(irs.shape[1])):
        start = int((meta["pre_delay_s"] + meta["direct_delay_s"][p, ch]) * fs)
        a = irs[p, ch, start:start + int(0.0015 * fs)]
        b = other[p, ch, start:start + int(0.0015 * fs)]
        b = b * np.max(np.abs(irs)) / np.max(np.abs(other))
        assert np.sqrt(np.mean((a - b) ** 2)) < 0.01 * np.sqrt(np.mean(a**2))
    assert np.max(np.abs(irs - other)) > 1e-3


# ---------------------------------------------------------------- files


def test_bundled_files_equal_model_output(room):
    irs, fs, _ = room
    names = demo.demo_file_names()
    assert names == ["pos1.wav", "pos2.wav", "pos3.wav", "pos4.wav"]
    for name, ir in zip(names, irs, strict=True):
        info = sf.info(str(DEMO_DIR / name))
        assert (info.samplerate, info.channels, info.subtype) == (fs, 2, demo.WAV_SUBTYPE)
        data, fs_file = sf.read(str(DEMO_DIR / name), dtype="float64", always_2d=True)
        assert fs_file == fs
        # 24-bit quantisation: at most one step of 2^-23 (plus rounding) from the model.
        np.testing.assert_allclose(data.T, ir, rtol=0, atol=1.01 * LSB_24)


def test_write_is_byte_identical_to_bundled_files(tmp_path):
    paths = demo.write_demo_measurements(tmp_path / "new")
    assert [p.name for p in paths] == demo.demo_file_names()
    for path in paths:
        assert path.read_bytes() == (DEMO_DIR / path.name).read_bytes()
    assert not list((tmp_path / "new").glob(".roomcorr-tmp-*"))


def test_main_writes_folder_and_reports_unwritable(tmp_path, capsys):
    assert demo.main([str(tmp_path / "out")]) == 0
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == demo.demo_file_names()
    assert "pos4.wav" in capsys.readouterr().out
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    assert demo.main([str(blocker / "sub")]) == 2
    assert "cannot create demo folder" in capsys.readouterr().err
    with pytest.raises(OutputError):
        demo.write_demo_measurements(blocker / "sub")


def test_deep_dip_near_108_hz_for_the_null_rule(room):
    # A property of the model that the demo relies on (not an outside reference): a deep
    # modal null in the position average, so the design's rule against boosting nulls shows.
    irs, fs, _ = room
    freq = np.fft.rfftfreq(irs.shape[-1], 1.0 / fs)
    power = np.mean(np.abs(np.fft.rfft(irs, axis=-1)) ** 2, axis=(0, 1))
    ref = power[(freq > 300) & (freq < 2000)].mean()
    dip = power[(freq > 100) & (freq < 118)].min()
    assert 10 * np.log10(dip / ref) < -10.0


def test_crossover_and_speaker_models_against_analytic_forms():
    from scipy.signal import butter, freqs

    freq = np.geomspace(5.0, 20000.0, 400)
    # Linkwitz-Riley 4th order: low-pass and high-pass sum to an all-pass (|sum| = 1)
    # and each is -6.02 dB at the crossover (Linkwitz, JAES 24(1), 1976).
    lp, hp = demo._linkwitz_riley4(freq, 300.0)
    np.testing.assert_allclose(np.abs(lp + hp), 1.0, atol=1e-12)
    lp_c, hp_c = demo._linkwitz_riley4(np.array([300.0]), 300.0)
    assert 20 * np.log10(abs(lp_c[0])) == pytest.approx(-6.02, abs=0.01)
    assert 20 * np.log10(abs(hp_c[0])) == pytest.approx(-6.02, abs=0.01)
    # The speaker's high-pass sections use the 4th-order Butterworth Qs (0.541, 1.307),
    # rounded; compare with scipy's analog Butterworth high-pass at 50 Hz.
    params = dict(demo._SPEAKERS[0], bump=(2300.0, 0.0, 1.0), lp_hz=1e9, tilt_db=0.0)
    ours = demo._speaker_response(freq, params)
    b, a = butter(4, 2 * np.pi * 50.0, btype="high", analog=True)
    _, ref = freqs(b, a, worN=2 * np.pi * freq)
    np.testing.assert_allclose(20 * np.log10(np.abs(ours)), 20 * np.log10(np.abs(ref)), atol=0.1)


def test_other_sample_rate_keeps_timing(room):
    # Same room at 44.1 kHz: the direct sound still arrives at pre-delay + distance / c.
    _, _, meta = room
    irs, fs, _ = demo.synthesize_demo_room(fs=44100)
    assert irs.shape == (4, 2, int(round(demo.IR_LENGTH_S * 44100)))
    arrival = meta["pre_delay_s"] + meta["direct_delay_s"][0, 0]
    assert np.argmax(np.abs(irs[0, 0])) / fs == pytest.approx(arrival, abs=0.0005)
    with pytest.raises(ValueError):
        demo.synthesize_demo_room(fs=4000)
