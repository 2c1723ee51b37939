"""Tests for roomcorr.physics: modes, the modal Green's function, image sources, loudspeaker."""

from __future__ import annotations

import itertools

import numpy as np
import pyroomacoustics as pra
import pytest
from scipy import signal

from roomcorr.analysis.smoothing import smooth_bins_to_grid
from roomcorr.physics import (
    early_spectrum,
    first_order_reflections,
    highpass_response,
    image_lattice,
    image_order_for,
    image_sources,
    lattice_spectra,
    lattice_weights,
    modal_response,
    mode_grid,
    room_mode_frequencies,
)

C = 343.0


def test_rayleigh_mode_frequencies_brute_force():
    # Rayleigh, The Theory of Sound II §267; Kuttruff, Room Acoustics ch. 3, eq. 3.19:
    # f = c/2 sqrt((nx/Lx)^2 + (ny/Ly)^2 + (nz/Lz)^2), enumerated by brute force here.
    dims = (5.2, 6.3, 2.6)
    expected = []
    for n in itertools.product(range(12), repeat=3):
        f = 0.5 * C * np.sqrt(sum((ni / li) ** 2 for ni, li in zip(n, dims, strict=True)))
        if 0 < f <= 200.0:
            expected.append((f, n))
    expected.sort()
    labels, freq_hz = mode_grid(dims, C, 200.0)
    assert len(labels) == len(expected)
    np.testing.assert_allclose(freq_hz, [f for f, _ in expected], rtol=1e-12)
    # A hand value: the first length mode of a 6.3 m room is c / (2 L) = 27.22 Hz.
    modes = dict(room_mode_frequencies(dims, C, 60.0))
    assert modes[(0, 1, 0)] == pytest.approx(343.0 / 12.6)
    assert modes[(1, 1, 0)] == pytest.approx(171.5 * np.hypot(1 / 5.2, 1 / 6.3))


def test_modal_sum_of_plane_modes_is_the_closed_form_duct():
    # Kuttruff, Room Acoustics ch. 3: the eigenfunction expansion of the rigid-walled
    # room's Green's function, G = Σ ψψ / (N (k_n² − k²)). Exciting only the modes with
    # n_y = n_z = 0 (a source spread over the cross-section) leaves a 1-D rigid duct, whose
    # Green's function is known in closed form (textbook, e.g. Morse and Ingard, Theoretical
    # Acoustics, ch. 9): G = −cos(k x<) cos(k (L − x>)) / (S k sin kL).
    dims = np.array([4.0, 3.0, 2.5])
    length, area = dims[0], dims[1] * dims[2]
    n = np.arange(0, 40001)
    labels = np.stack([n, 0 * n, 0 * n], axis=1)
    mode_hz = n * C / (2.0 * length)
    freq = np.array([23.0, 61.0, 97.5, 150.3])  # away from the resonances
    src = np.array([0.7, 1.0, 1.0])
    mic = np.array([[3.1, 2.0, 0.5], [0.2, 0.3, 2.0]])
    ours = modal_response(freq, src, mic, dims, labels, mode_hz, 0.0, C)
    k = 2 * np.pi * freq / C
    for row, x in zip(ours, mic[:, 0], strict=True):
        lo, hi = min(x, src[0]), max(x, src[0])
        closed = -np.cos(k * lo) * np.cos(k * (length - hi)) / (area * k * np.sin(k * length))
        np.testing.assert_allclose(row.real, closed, rtol=2e-3, atol=1e-7)
        assert np.max(np.abs(row.imag)) == 0.0


def test_modal_response_peaks_at_rayleigh_frequency():
    # Kuttruff ch. 3: a lightly damped mode peaks at its eigenfrequency with half-power
    # bandwidth δ/π (δ = 3 ln 10 / T60); one axial mode alone, source and receiver at antinodes.
    dims = np.array([5.0, 4.0, 3.0])
    labels = np.array([[1, 0, 0]])
    mode_hz = np.array([C / 10.0])
    delta = 3 * np.log(10) / 0.5
    freq = np.linspace(20, 50, 30001)
    g = modal_response(freq, np.zeros(3), np.zeros((1, 3)), dims, labels, mode_hz, delta, C)[0]
    mag = np.abs(g)
    # the peak of |1/(ω_n² − ω² + 2jδω)| sits at sqrt(ω_n² − 2δ²)
    f_peak = np.sqrt((2 * np.pi * mode_hz[0]) ** 2 - 2 * delta**2) / (2 * np.pi)
    assert freq[np.argmax(mag)] == pytest.approx(f_peak, abs=2e-3)
    above = freq[mag >= mag.max() / np.sqrt(2)]
    assert above[-1] - above[0] == pytest.approx(delta / np.pi, rel=0.02)


def test_image_sources_match_pyroomacoustics():
    # Allen and Berkley 1979 image method; pyroomacoustics' ShoeBox implements it independently.
    dims = np.array([5.2, 6.3, 2.6])
    src = np.array([1.4, 0.95, 1.0])
    mic = np.array([2.6, 3.6, 1.1])
    ours = sorted(float(np.linalg.norm(p - mic)) for p, _ in image_sources(src, dims, 2))
    room = pra.ShoeBox(dims, fs=16000, max_order=2)
    room.add_source(src)
    room.add_microphone(mic)
    room.image_source_model()
    theirs = sorted(np.linalg.norm(room.sources[0].images - mic[:, None], axis=0))
    assert len(ours) == 25 == len(theirs)  # 1 + 6 + 18 images of order <= 2
    np.testing.assert_allclose(ours, theirs, rtol=1e-6)  # pyroomacoustics works in float32


def test_first_order_reflection_delays():
    # Allen and Berkley 1979: the floor's image sits at (x, y, −z); its path is the
    # distance from there, the delay after the direct sound (path − direct) / c.
    dims = np.array([5.2, 6.3, 2.6])
    src = np.array([1.4, 0.95, 1.0])
    mic = np.array([2.6, 3.6, 1.1])
    refl = first_order_reflections(src, mic, dims, C)
    direct = np.linalg.norm(src - mic)
    floor = np.linalg.norm(np.array([1.4, 0.95, -1.0]) - mic)
    assert refl[4]["delay_after_direct_s"] == pytest.approx((floor - direct) / C)
    front = np.linalg.norm(np.array([1.4, -0.95, 1.0]) - mic)
    assert refl[2]["distance_m"] == pytest.approx(0.95)
    assert refl[2]["path_m"] == pytest.approx(front)
    assert refl[3]["distance_m"] == pytest.approx(6.3 - 0.95)


def test_quarter_wave_boundary_notch():
    # Common practice: a source d in front of a rigid wall, heard far away on the wall's
    # normal, meets its mirror image delayed by 2d / c: the first notch is at c / (4d),
    # the next ones at odd multiples.
    d = 0.6
    src = np.array([d, 50.0, 50.0])
    mic = np.array([d + 40.0, 50.0, 50.0])
    images = [(src, (0,) * 6), (np.array([-d, 50.0, 50.0]), (1, 0, 0, 0, 0, 0))]
    freq = np.linspace(20.0, 800.0, 78001)
    p = np.abs(early_spectrum(freq, images, mic, np.ones(6), np.ones(freq.size), C))
    minima = freq[signal.argrelmin(p)[0]]
    np.testing.assert_allclose(minima[:3], C / (4 * d) * np.array([1, 3, 5]), rtol=2e-3)


def test_highpass_matches_scipy_butterworth():
    # scipy.signal.butter (analog): a 4th-order Butterworth high-pass is two 2nd-order
    # sections with Q = 0.5412 and 1.3066.
    freq = np.geomspace(5, 500, 200)
    b, a = signal.butter(4, 2 * np.pi * 50.0, "high", analog=True)
    _, theirs = signal.freqs(b, a, 2 * np.pi * freq)
    q = 1 / (2 * np.cos(np.pi / 8)), 1 / (2 * np.cos(3 * np.pi / 8))
    np.testing.assert_allclose(highpass_response(freq, 50.0, q), theirs, rtol=1e-9)


def test_fit_model_level_is_the_smoothed_image_sum():
    # The fit's room level must be the public lattice_spectra smoothed at 1/12 octave exactly.
    from roomcorr.placement import model as m

    size = np.array([4.1, 5.3, 2.5])
    spk = np.array([[1.0, 0.6, 0.9]])
    mics = np.array([[2.0, 3.1, 1.1], [2.3, 3.0, 1.2]])
    beta = np.sqrt(1 - np.array([0.1, 0.2, 0.15, 0.3, 0.25, 0.1]))
    grid = m.fit_grid()
    ours = m._room_db(size, spk, mics, beta, 12, 343.0, grid)
    lat = image_lattice(12)
    freq, h = lattice_spectra(spk[0], mics, size, lat, lattice_weights(lat[2], beta), 343.0,
                              m.MODEL_STEP_HZ, m._f_top())
    ref = 10 * np.log10(smooth_bins_to_grid(np.abs(h[:, 1:]) ** 2, freq[1:], grid,
                                            m.FIT_SMOOTH_OCT))
    np.testing.assert_allclose(ours[0], ref, atol=1e-9)


def test_image_lattice_matches_pyroomacoustics_images_and_strengths():
    # Allen and Berkley 1979 (eq. 10 and the product of reflection coefficients per
    # image); pyroomacoustics' ShoeBox computes both independently (images and
    # 'damping', the product of the walls' reflection factors sqrt(1 − α)).
    dims = np.array([4.4, 5.6, 2.5])
    src = np.array([1.2, 0.6, 1.0])
    alpha = [0.2, 0.25, 0.15, 0.3, 0.35, 0.1]  # west, east, south, north, floor, ceiling
    walls = ["west", "east", "south", "north", "floor", "ceiling"]
    room = pra.ShoeBox(dims, fs=8000, max_order=4,
                       materials={w: pra.Material(a) for w, a in zip(walls, alpha, strict=True)})
    room.add_source(src)
    room.add_microphone([2.0, 3.0, 1.1])
    room.image_source_model()
    theirs = sorted(zip(np.round(room.sources[0].images.T, 4).tolist(),
                        np.round(room.sources[0].damping[0], 6).tolist(), strict=True))
    sign, shift, counts = image_lattice(4)
    pos = sign * src + shift * dims
    w = lattice_weights(counts, np.sqrt(1 - np.array(alpha)))
    ours = sorted(zip(np.round(pos, 4).tolist(), np.round(w, 6).tolist(), strict=True))
    assert len(ours) == len(theirs) == 129  # images with |q|_1 <= 4 in three dimensions
    for (p_o, w_o), (p_t, w_t) in zip(ours, theirs, strict=True):
        np.testing.assert_allclose(p_o, p_t, atol=2e-4)  # pyroomacoustics works in float32
        assert w_o == pytest.approx(w_t, abs=2e-6)


def test_lattice_spectra_is_the_direct_image_sum():
    # Allen and Berkley 1979: H(f) = Σ β-products e^{−j2πfr/c} / (4πr), summed here image by
    # image; the fast histogram-and-Taylor evaluation must agree to 1e-3 (its stated bound).
    dims = np.array([5.2, 6.3, 2.6])
    src = np.array([1.4, 0.95, 1.0])
    mics = np.array([[2.63, 3.6, 1.1], [0.4, 5.9, 2.2]])
    beta = np.sqrt(1 - np.array([0.15, 0.15, 0.2, 0.25, 0.25, 0.15]))
    lat = image_lattice(10)
    w = lattice_weights(lat[2], beta)
    freq, h = lattice_spectra(src, mics, dims, lat, w, C, 0.5, 330.0)
    pos = lat[0] * src + lat[1] * dims
    for row, mic in zip(h, mics, strict=True):
        r = np.linalg.norm(pos - mic, axis=1)
        direct = np.exp(-2j * np.pi * freq[:, None] * r[None] / C) @ (w / (4 * np.pi * r))
        assert np.max(np.abs(row - direct)) <= 1e-3 * np.max(np.abs(direct))
    # The derivatives for the fit (two Taylor terms: error up to (π/8)²/2 = 8 % of a term at
    # f_max), against finite differences of the sum: ln β of one wall, the source's x and y.
    _, h0, dh_w, dh_s = lattice_spectra(src, mics, dims, lat, w, C, 0.5, 330.0,
                                        wall_derivatives=True, source_derivatives=True)
    b2 = beta.copy()
    b2[3] *= np.exp(1e-6)
    _, h1 = lattice_spectra(src, mics, dims, lat, lattice_weights(lat[2], b2), C, 0.5, 330.0)
    fd = (h1 - h0) / 1e-6
    assert np.max(np.abs(fd - dh_w[3])) <= 0.03 * np.abs(fd).max()
    for axis in (0, 1):
        s2 = src.copy()
        s2[axis] += 1e-6
        fd = (lattice_spectra(s2, mics, dims, lat, w, C, 0.5, 330.0)[1] - h0) / 1e-6
        assert np.max(np.abs(fd - dh_s[axis])) <= 0.03 * np.abs(fd).max()


def _pra_levels(dims, alpha, src, mics, order, grid):
    room = pra.ShoeBox(dims, fs=8000, max_order=order, materials=pra.Material(alpha),
                       air_absorption=False)
    room.add_source(src)
    room.add_microphone_array(np.asarray(mics, float).T)
    hpf = pra.constants.get("rir_hpf_enable")
    pra.constants.set("rir_hpf_enable", False)  # its non-causal 10 Hz high-pass
    try:
        room.compute_rir()
    finally:
        pra.constants.set("rir_hpf_enable", hpf)
    out = []
    for rir in room.rir:
        spec = np.fft.rfft(rir[0], 1 << 16)
        bins = np.fft.rfftfreq(1 << 16, 1 / 8000)
        out.append(10 * np.log10(smooth_bins_to_grid(np.abs(spec[1:]) ** 2, bins[1:], grid,
                                                     1 / 6)))
    return np.array(out), pra.constants.get("c")


@pytest.mark.parametrize(("alpha", "tol_db"), [(0.04, 0.05), (0.35, 0.05)])
def test_lattice_level_matches_pyroomacoustics(alpha, tol_db):
    # pyroomacoustics' ShoeBox (Allen and Berkley image method, independent code, time
    # domain with fractional delays) at the same order: a rigid-ish and an absorbing room;
    # 1/6-octave level, 30-250 Hz, RMS difference with the level offset removed.
    dims = [4.2, 5.1, 2.5]
    src = [1.1, 0.8, 1.0]
    mics = [[2.2, 3.3, 1.1], [3.6, 4.4, 1.6]]
    grid = np.geomspace(30, 250, 60)
    order = 24
    theirs, c = _pra_levels(dims, alpha, src, mics, order, grid)
    lat = image_lattice(order)
    w = lattice_weights(lat[2], np.full(6, np.sqrt(1 - alpha)))
    freq, h = lattice_spectra(np.array(src), np.array(mics), np.array(dims), lat, w, c, 0.125,
                              300.0)
    ours = 10 * np.log10(smooth_bins_to_grid(np.abs(h[:, 1:]) ** 2, freq[1:], grid, 1 / 6))
    d = ours - theirs
    d -= d.mean(axis=1, keepdims=True)
    assert np.sqrt(np.mean(d**2)) < tol_db


def test_lattice_peaks_at_rayleigh_frequencies():
    # Rayleigh, Theory of Sound II §267 / Kuttruff ch. 3: in a rigid-ish room (β = 0.97)
    # the image sum resonates at f = c/2 sqrt(Σ (n_i/L_i)²). Source and receiver near
    # opposite corners (every mode excited); every mode below 70 Hz that stands at least
    # 4 % apart from its neighbours must show as a peak within 1 % of Rayleigh's frequency.
    dims = np.array([5.2, 6.3, 2.6])
    beta = np.full(6, 0.97)
    order = image_order_for(beta, dims)
    assert 40 <= order <= 60  # 0.97^n / (n 2.6 m) < 1e-3 (the images' floor)
    lat = image_lattice(order)
    src = np.array([0.3, 0.3, 0.3])
    mic = np.array([[4.8, 5.9, 2.2]])
    freq, h = lattice_spectra(src, mic, dims, lat, lattice_weights(lat[2], beta), C, 0.05,
                              80.0)
    mag = np.abs(h[0])
    _, mode_hz = mode_grid(dims, C, 75.0)
    alone = [f for f in mode_hz if f < 70.0 and np.all(
        (np.abs(mode_hz / f - 1) > 0.04) | (mode_hz == f))]
    assert len(alone) >= 4
    for f0 in alone:
        near = (freq > f0 * 0.98) & (freq < f0 * 1.02)
        f_peak = freq[near][np.argmax(mag[near])]
        assert f_peak == pytest.approx(f0, rel=0.01), (f0, f_peak)


def test_lattice_spectra_in_chunks_of_receivers_is_the_same_sum(monkeypatch):
    # Memory bound: many receivers are summed a few at a time; the sum must not change
    # (a consistency check of the split; the sum itself is checked against the
    # image-by-image formula of Allen and Berkley above).
    import roomcorr.physics.images as images

    dims = np.array([3.8, 4.8, 2.4])
    mics = np.random.default_rng(1).random((11, 3)) * dims
    lat = image_lattice(8)
    w = lattice_weights(lat[2], np.full(6, 0.9))
    src = np.array([0.95, 0.75, 1.0])
    whole = lattice_spectra(src, mics, dims, lat, w, C, 0.5, 200.0, True, True)
    monkeypatch.setattr(images, "_MAX_ELEMENTS", lat[0].shape[0] * 3)
    split = lattice_spectra(src, mics, dims, lat, w, C, 0.5, 200.0, True, True)
    for a, b in zip(whole, split, strict=True):
        np.testing.assert_array_equal(a, b)
