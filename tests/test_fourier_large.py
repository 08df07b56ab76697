"""Larger than memory: the averaged periodogram of tiles (Welch) and the lazy, decimated peak refinement.

Small images stand in for large ones: the tile size is forced with ``tile_px`` and the dask arrays
have small, irregular chunks, so that tiles straddle chunk borders and the chunked lock-in's overlaps
are really used. How much memory a 16384^2 image takes is measured by the benchmarks, not here.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from domains import InputError
from domains.fourier import Lattice, analyze_spectrum, find_peaks, power_spectrum

da = pytest.importorskip("dask.array")

N, DX = 384, 0.05
LAT = Lattice.from_params("hexagonal", 0.35, 7.0)
CHUNKS = ((100, 150, 134), (77, 200, 107))  # irregular, and not multiples of the tile or its stride


def _scene(seed):
    """Three Bragg cosines, a 3 x 3 modulation (G / 3), a tilted plane and white noise (truth analytic)."""
    y, x = np.mgrid[:N, :N] * DX
    rng = np.random.default_rng(seed)
    image = sum(np.cos(g[0] * x + g[1] * y + 0.3 * j) for j, g in enumerate(LAT.bragg))
    image = image + 0.4 * sum(np.cos((g[0] * x + g[1] * y) / 3 + 0.2) for g in LAT.bragg)
    return image + 0.3 * x - 0.1 * y + 2.0 * rng.standard_normal((N, N))


def test_tiled_peaks_on_irregular_dask_chunks_agree_with_the_in_memory_result():
    image = _scene(3)
    ref = find_peaks(image, pixel_size_nm=DX, refine="lockin")
    tiled = find_peaks(da.from_array(image, chunks=CHUNKS), pixel_size_nm=DX, tile_px=96)
    # Derived: the scene holds six peaks (three Bragg vectors and their thirds), nothing else.
    truth = np.concatenate([LAT.bragg, LAT.bragg / 3])
    assert len(tiled) == len(ref) == 6
    for p in tiled:
        # Refined on the full-resolution frame, not left at the tile's coarse bins.
        assert p.refined == "lockin"
        r = min(ref, key=lambda r: np.hypot(*(r.q - p.q)))
        # The same image measured two ways: within 3 combined standard errors (the noise is shared,
        # so the difference is if anything smaller than for independent measurements).
        assert np.hypot(*(p.q - r.q)) < 3 * math.hypot(p.q_err, r.q_err)
        # And the truth within 4 of its own errors (Gaussian errors; 4 sigma leaves room for 6 peaks).
        d = min(np.hypot(*(truth - p.q).T).min(), np.hypot(*(truth + p.q).T).min())
        assert d < 4 * p.q_err
        # Full-resolution precision: far below a tile bin (2 pi / (96 x 0.05 nm) = 1.3 rad/nm).
        assert p.q_err < 0.01 * 2 * np.pi / (96 * DX)


def test_tiled_spectrum_is_the_same_from_dask_chunks_and_from_an_array():
    image = _scene(4)
    p_np, qx_np, qy_np = power_spectrum(image, pixel_size_nm=DX, tile_px=96)
    p_da, qx_da, qy_da = power_spectrum(da.from_array(image, chunks=CHUNKS), pixel_size_nm=DX, tile_px=96)
    assert p_np.shape == (96, 96)
    # The same tiles summed in another order: equal to rounding (float64).
    assert_allclose(p_da, p_np, rtol=1e-10, atol=1e-12 * p_np.max())
    assert_allclose(qx_da, qx_np)
    # Axes on the tile's grid (reference library: numpy's FFT frequencies).
    assert_allclose(qx_np, 2 * np.pi * np.fft.fftshift(np.fft.fftfreq(96, DX)), atol=1e-12)


def test_tiled_spectrum_keeps_the_normalisation_of_a_cosine():
    # Derived: a cosine of amplitude A0 centred on a bin of every tile gives (A0/2)^2 in each
    # periodogram, hence in their average; a wavevector of whole periods per tile (8 and 5 per 96
    # px) also fits the 48-px stride, so every tile sees it on a bin.
    y, x = np.mgrid[:N, :N] * DX
    q = 2 * np.pi * np.array([8, 5]) / (96 * DX)
    power, qx, qy = power_spectrum(1.7 * np.cos(q[0] * x + q[1] * y), pixel_size_nm=DX, tile_px=96)
    row, col = np.unravel_index(np.argmax(power), power.shape)
    assert_allclose(np.abs([qx[col], qy[row]]), q, atol=1e-9)
    assert_allclose(power[row, col], (1.7 / 2) ** 2, rtol=1e-9)


def test_tiled_search_of_pure_noise_stays_at_the_false_alarm_rate():
    # Derived: false_alarm = 1 % per image with the Gamma statistics of the averaged periodogram;
    # 20 noise images give 0.2 false peaks on average, so 3 or more has probability 1e-3 (Poisson).
    found = 0
    for seed in range(20):
        noise = np.random.default_rng(100 + seed).standard_normal((256, 256))
        found += len(find_peaks(da.from_array(noise, chunks=(90, 110)), pixel_size_nm=0.1, tile_px=64,
                                refine=None))
    assert found <= 2


def test_a_tile_as_large_as_the_frame_is_the_whole_frame():
    image = _scene(5)
    whole = find_peaks(image, pixel_size_nm=DX)
    same = find_peaks(da.from_array(image, chunks=CHUNKS), pixel_size_nm=DX, tile_px=N)
    assert_allclose([p.q for p in same], [p.q for p in whole], rtol=0, atol=0)
    with pytest.raises(InputError, match="tile_px"):
        find_peaks(image, pixel_size_nm=DX, tile_px=8)


def test_analyze_spectrum_on_tiles_reads_the_same_lattice_and_order():
    image = _scene(6)
    ref = analyze_spectrum(image, pixel_size_nm=DX)
    tiled = analyze_spectrum(da.from_array(image, chunks=CHUNKS), pixel_size_nm=DX, tile_px=96)
    # Derived from the scene: a hexagonal lattice of 0.35 nm at 7 degrees with a 3 x 3 order.
    assert tiled.superlattice.order == ref.superlattice.order == "3x3"
    assert tiled.shape == (N, N)
    for res in (ref, tiled):
        assert abs(res.lattice.a_nm - 0.35) < 4 * res.lattice.a_err_nm
        assert abs(res.lattice.angle_deg - 7.0) < 4 * res.lattice.angle_err_deg
