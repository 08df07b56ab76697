"""Tests of domains.level: polynomial backgrounds, per-line offsets, NaN masking and levelling of scans."""

from __future__ import annotations

import warnings

import dask.array as da
import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

import domains.level as level_module
from domains import InputError, Scan
from domains.level import level, line_offsets, nan_to_mask, polynomial_background, subtract_background

ROWS, COLS = np.mgrid[0:48, 0:64].astype(float)
PLANE = 0.7 + 0.013 * COLS - 0.021 * ROWS
QUADRIC = PLANE + 3e-4 * COLS**2 - 2e-4 * COLS * ROWS + 5e-4 * ROWS**2


def _offsets(n=48, seed=0):
    return np.random.default_rng(seed).normal(0.0, 0.3, n)


def _plane_fit_residual(image, order=1):
    """Reference least squares with numpy.linalg.lstsq on raw monomials (independent of the module)."""
    terms = [(d - j, j) for d in range(order + 1) for j in range(d + 1)]
    design = np.stack([(COLS**i * ROWS**j).ravel() for i, j in terms], axis=1)
    coefficients, *_ = np.linalg.lstsq(design, image.ravel(), rcond=None)
    return image - (design @ coefficients).reshape(image.shape)


# --------------------------------------------------------------------------- backgrounds


def test_plane_removed_exactly():
    # derived: least squares reproduces a background that lies in the model space exactly
    assert_allclose(polynomial_background(PLANE), PLANE, rtol=0, atol=1e-12)
    assert_allclose(subtract_background(PLANE), 0.0, rtol=0, atol=1e-12)


def test_second_order_removed_exactly():
    # derived: as above, for an exactly representable quadric
    assert_allclose(subtract_background(QUADRIC, order=2), 0.0, rtol=0, atol=1e-12)
    # derived: a plane cannot represent the quadric, so order 1 leaves a residual
    assert np.abs(subtract_background(QUADRIC, order=1)).max() > 1e-2


def test_order_zero_is_the_mean():
    image = np.random.default_rng(1).normal(size=(10, 12))
    assert_allclose(polynomial_background(image, order=0), image.mean(), rtol=0, atol=1e-12)  # derived: LS constant


def test_fit_matches_reference_least_squares_on_noisy_image():
    noisy = QUADRIC + np.random.default_rng(2).normal(0, 0.1, QUADRIC.shape)
    # reference: numpy.linalg.lstsq on unscaled monomials; the fitted surface does not depend on scaling
    assert_allclose(subtract_background(noisy, order=2), _plane_fit_residual(noisy, 2), rtol=0, atol=1e-10)


def test_masked_bump_does_not_bias_the_fit():
    mask = (ROWS - 20) ** 2 + (COLS - 30) ** 2 < 10.0**2
    bump = np.where(mask, 5.0 * np.exp(-((ROWS - 20) ** 2 + (COLS - 30) ** 2) / (2 * 4.0**2)), 0.0)
    image = PLANE + bump
    assert_allclose(polynomial_background(image, mask=mask), PLANE, rtol=0, atol=1e-12)  # derived: the rest is exact
    assert np.abs(polynomial_background(image) - PLANE).max() > 0.01  # derived: unmasked, the bump biases it


def test_nan_pixels_left_out_of_the_fit():
    image = PLANE.copy()
    image[3, 4] = np.nan
    image[10, :] = np.inf
    background = polynomial_background(image)
    assert_allclose(background, PLANE, rtol=0, atol=1e-12)  # derived: finite pixels are exact
    assert np.isnan(subtract_background(image)[3, 4])  # NaN stays NaN


@pytest.mark.parametrize(
    "dtype, expected",
    [(np.float32, np.float32), (np.float64, np.float64), (np.float16, np.float32), (np.int16, np.float64),
     (np.uint8, np.float64)],
)
def test_dtypes(dtype, expected):
    image = (10 + 2 * COLS // 8 + ROWS // 8).astype(dtype)
    assert polynomial_background(image).dtype == expected  # common practice, no source (float in, float out)
    assert subtract_background(image).dtype == expected
    assert line_offsets(image, warn=False)[0].dtype == expected


def test_float32_values():
    image = PLANE.astype(np.float32)
    # derived: float32 rounding of the input (~1e-7 relative) is the only error
    assert_allclose(subtract_background(image), 0.0, rtol=0, atol=2e-6)


def test_background_errors():
    with pytest.raises(InputError, match="order must be an integer"):
        polynomial_background(PLANE, order=1.5)
    with pytest.raises(InputError, match="order must be an integer"):
        polynomial_background(PLANE, order=-1)
    with pytest.raises(InputError, match="2-D"):
        polynomial_background(np.zeros(5))
    with pytest.raises(InputError, match="mask shape"):
        polynomial_background(PLANE, mask=np.zeros((3, 3), bool))
    only_row = np.ones(PLANE.shape, bool)
    only_row[5, :] = False
    with pytest.raises(InputError, match="do not determine"):  # derived: one row cannot fix the y slope
        polynomial_background(PLANE, mask=only_row)
    with pytest.raises(InputError, match="unmasked finite pixels"):
        polynomial_background(PLANE, mask=np.ones(PLANE.shape, bool))


# --------------------------------------------------------------------------- line offsets


@pytest.mark.parametrize("method", ["median", "mean"])
def test_line_offsets_found(method):
    offsets = _offsets()
    image = np.ones(PLANE.shape) * 2.0 + offsets[:, None]
    corrected, found = line_offsets(image, method=method, warn=False)
    # derived: every row is constant, so its statistic is 2 + offset; offsets are relative to the typical row
    reference = (np.median if method == "median" else np.mean)(offsets)
    assert_allclose(found, offsets - reference, rtol=0, atol=1e-12)
    assert_allclose(corrected, 2.0 + reference, rtol=0, atol=1e-12)


@pytest.mark.parametrize("method", ["median", "mean"])
def test_offsets_and_plane_removed_exactly(method):
    image = PLANE + _offsets()[:, None]
    scan = Scan(image, pixel_size_nm=0.05)
    flat = level(scan, order=1, lines=method, warn=False)
    # derived: per-row statistics absorb the offsets and the y slope; the plane fit removes the x slope
    assert_allclose(flat.data, 0.0, rtol=0, atol=1e-12)


def test_difference_removes_sparse_jumps_and_plane_exactly():
    offsets = np.zeros(48)
    offsets[12:] += 0.8  # a tip change
    offsets[30] -= 1.5  # one glitched line
    offsets[40:] -= 0.4
    image = PLANE + offsets[:, None]
    corrected, found = line_offsets(image, method="difference")
    # derived: the jumps are the only steps that differ from the y slope of the plane
    assert_allclose(found - found[0], offsets - offsets[0], rtol=0, atol=1e-12)
    assert_allclose(level(Scan(image, pixel_size_nm=0.1), lines="difference").data, 0.0, rtol=0, atol=1e-12)


def test_median_and_mean_warn_at_the_caller():
    with pytest.warns(UserWarning, match="slow-scan axis") as record:
        line_offsets(PLANE, method="median")
    assert record[0].filename == __file__  # stacklevel=2 points at the caller (common practice, no source)
    with pytest.warns(UserWarning, match="slow-scan axis") as record:
        level(Scan(PLANE, pixel_size_nm=0.1), lines="mean")
    assert record[0].filename == __file__
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        line_offsets(PLANE, method="mean", warn=False)
        line_offsets(PLANE, method="difference")


WAVELENGTH_PX = 16.0
WAVE_Y = np.cos(2 * np.pi * ROWS / WAVELENGTH_PX)


def test_row_mean_deletes_a_modulation_along_y():
    corrected, _ = line_offsets(WAVE_Y, method="mean", warn=False)
    # derived (docs/methods.md §7): every row of cos(2 pi y / lambda) is constant, so the row mean removes it entirely
    assert_allclose(corrected - corrected.mean(), 0.0, rtol=0, atol=1e-12)


def test_difference_keeps_a_modulation_along_y():
    corrected, found = line_offsets(WAVE_Y, method="difference")
    # derived: a smooth modulation has no outlying line-to-line step, so nothing is removed
    assert_allclose(found, 0.0, rtol=0, atol=1e-12)
    assert_allclose(corrected, WAVE_Y, rtol=0, atol=1e-12)


def test_difference_keeps_the_modulation_while_removing_jumps():
    offsets = np.zeros(48)
    offsets[17:] += 1.2
    offsets[33] += 2.0
    image = WAVE_Y + PLANE + offsets[:, None]
    flat = level(Scan(image, pixel_size_nm=0.1), order=1, lines="difference").data
    expected = _plane_fit_residual(WAVE_Y)
    # derived: the amplitude of the wave, by projection on cos(2 pi y / lambda), survives
    survival = np.sum(flat * WAVE_Y) / np.sum(expected * WAVE_Y)
    assert survival > 0.95
    # derived: each jump estimate is off by the curvature of the wave over the neighbouring
    # steps, of order (2 pi/16)**2 * 2 sin(pi/16) = 0.06 of its amplitude; bound 0.1 for three jumps
    # after the plane fit (tolerance: common practice, no source)
    assert np.abs(flat - expected).max() < 0.1
    mean_levelled = level(Scan(image, pixel_size_nm=0.1), order=1, lines="mean", warn=False).data
    assert np.abs(np.sum(mean_levelled * WAVE_Y)) < 1e-9  # derived (docs/methods.md §7): the row mean deletes it


def test_line_offsets_with_mask_and_empty_row():
    offsets = _offsets()
    image = 1.0 + offsets[:, None] + np.zeros(PLANE.shape)
    image[5, 10:20] = 50.0  # a bright feature, masked
    mask = np.zeros(PLANE.shape, bool)
    mask[5, 10:20] = True
    mask[7, :] = True  # a line with no trusted pixel keeps its level
    corrected, found = line_offsets(image, method="mean", mask=mask, warn=False)
    trusted_rows = np.ones(48, bool)
    trusted_rows[7] = False
    reference = offsets[trusted_rows].mean()
    assert_allclose(found[trusted_rows], offsets[trusted_rows] - reference, rtol=0, atol=1e-12)  # derived
    assert found[7] == 0.0


def test_line_offsets_errors():
    with pytest.raises(InputError, match="method must be one of"):
        line_offsets(PLANE, method="mode")
    with pytest.raises(InputError, match="jump_threshold"):
        line_offsets(PLANE, method="difference", jump_threshold=0)


# --------------------------------------------------------------------------- nan_to_mask


def test_nan_to_mask():
    image = np.array([[1.0, np.nan, 3.0], [np.inf, 5.0, 6.0]], dtype=np.float32)
    user = np.zeros((2, 3), bool)
    user[1, 2] = True
    filled, mask = nan_to_mask(image, user)
    assert filled.dtype == np.float32
    assert_allclose(filled, [[1, 3.75, 3], [3.75, 5, 6]], rtol=0, atol=1e-6)  # derived: mean of 1, 3, 5, 6
    assert_array_equal(mask, [[False, True, False], [True, False, True]])
    assert np.isnan(image[0, 1])  # input not modified
    with pytest.raises(InputError, match="no finite pixel"):
        nan_to_mask(np.full((3, 3), np.nan))
    assert nan_to_mask(np.ones((2, 2)))[1] is None


# --------------------------------------------------------------------------- level()


def test_level_keeps_the_input_and_carries_the_mask():
    # Rows constant apart from NaN: a row statistic over any subset of its columns is exact.
    image = 0.7 - 0.021 * ROWS + _offsets()[:, None]
    image[4, 4] = np.nan
    user = np.zeros(PLANE.shape, bool)
    user[10:12, 10:12] = True
    scan = Scan(image.copy(), pixel_size_nm=(0.05, 0.04), bias_V=0.2, mask=user.copy(), metadata={"k": 1})
    flat = level(scan, order=1, lines="median", warn=False)
    assert_array_equal(scan.data, image)  # the input is never modified
    assert_array_equal(scan.mask, user)
    expected_mask = user.copy()
    expected_mask[4, 4] = True
    assert_array_equal(flat.mask, expected_mask)  # derived: NaN joins the mask
    assert np.all(np.isfinite(flat.data))
    assert_allclose(flat.data[~expected_mask], 0.0, rtol=0, atol=1e-12)  # derived: offsets + plane only
    assert (flat.pixel_size_nm, flat.bias_V, flat.metadata) == ((0.05, 0.04), 0.2, {"k": 1})


def test_level_float32_kept():
    flat = level(Scan(PLANE.astype(np.float32), pixel_size_nm=0.1))
    assert flat.data.dtype == np.float32  # common practice, no source (float in, float out)
    assert_allclose(flat.data, 0.0, rtol=0, atol=2e-6)  # derived: float32 rounding only


def test_level_grid_slice_by_slice():
    grid = np.stack([PLANE, 2 * PLANE + 1, QUADRIC])
    grid[1, 3, 3] = np.nan
    scan = Scan(grid.copy(), pixel_size_nm=0.1, energies_V=[-0.1, 0.0, 0.1])
    flat = level(scan, order=2)
    assert_allclose(flat.data, 0.0, rtol=0, atol=1e-12)  # derived: each slice is an exact quadric
    assert flat.mask[3, 3] and flat.mask.sum() == 1
    assert np.isnan(scan.data[1, 3, 3])  # the input keeps its NaN


def test_level_lazy_matches_in_memory():
    image = PLANE + _offsets()[:, None] + np.random.default_rng(3).normal(0, 0.05, PLANE.shape)
    lazy = Scan(da.from_array(image, chunks=(13, 21)), pixel_size_nm=0.1)
    flat = level(lazy, order=1, lines="mean", warn=False)
    assert flat.is_lazy
    eager = level(Scan(image, pixel_size_nm=0.1), order=1, lines="mean", warn=False)
    # derived: with the whole image under FIT_MAX_PIXELS the lazy fit uses every pixel, as in memory
    assert_allclose(flat.data.compute(), eager.data, rtol=0, atol=1e-12)


def test_level_lazy_subsampled_fit(monkeypatch):
    monkeypatch.setattr(level_module, "FIT_MAX_PIXELS", 200)  # forces a strided subsample
    monkeypatch.setattr(level_module, "ROW_CHUNK_PIXELS", 500)  # splits the row chunks further
    for lines in ("median", "mean", "difference"):
        # "difference" removes sparse jumps only (documented), so it gets a sparse pattern
        offsets = _offsets() if lines != "difference" else np.where(np.arange(48) >= 20, 0.9, 0.0)
        lazy = Scan(da.from_array(PLANE + offsets[:, None], chunks=(16, 16)), pixel_size_nm=0.1)
        flat = level(lazy, order=1, lines=lines, warn=False)
        assert flat.is_lazy
        # derived: on offsets + plane, a row statistic over any fixed set of columns is the
        # row's offset plus the same constant for every row; the plane fit removes the rest
        assert_allclose(flat.data.compute(), 0.0, rtol=0, atol=1e-12)
    flat = level(Scan(da.from_array(PLANE, chunks=(16, 16)), pixel_size_nm=0.1), order=1)
    # derived: an exact plane is fixed by any non-degenerate subsample
    assert_allclose(flat.data.compute(), 0.0, rtol=0, atol=1e-12)


def test_level_lazy_nan_joins_the_mask():
    image = PLANE.copy()
    image[2, 2] = np.nan
    flat = level(Scan(da.from_array(image, chunks=16), pixel_size_nm=0.1))
    assert flat.is_lazy
    result = flat.data.compute()
    # documented (as in memory): a NaN pixel joins the mask and takes the mean trusted level, here the
    # plane's residual 0 (derived: an exact plane)
    assert_allclose(result, 0.0, rtol=0, atol=1e-12)
    expected = np.zeros(PLANE.shape, bool)
    expected[2, 2] = True
    assert_array_equal(flat.mask, expected)


def test_level_lazy_grid():
    grid = np.stack([PLANE, QUADRIC])
    flat = level(Scan(da.from_array(grid, chunks=(1, 16, 32)), pixel_size_nm=0.1, energies_V=[0, 1]), order=2)
    assert flat.is_lazy
    assert_allclose(flat.data.compute(), 0.0, rtol=0, atol=1e-12)  # derived: exact quadrics


def test_level_lazy_grid_matches_in_memory():
    rng = np.random.default_rng(4)
    grid = np.stack([PLANE, 2 * PLANE + 1, QUADRIC]) + _offsets()[None, :, None] + rng.normal(0, 0.05, (3, 48, 64))
    grid[1, 3, 3] = np.nan
    grid[2, 40, 7] = np.inf
    kwargs = dict(pixel_size_nm=0.1, energies_V=[-0.1, 0.0, 0.1])
    eager = level(Scan(grid, **kwargs), order=2, lines="median", warn=False)
    lazy = level(Scan(da.from_array(grid, chunks=(2, (5, 30, 13), (40, 24))), **kwargs), order=2, lines="median",
                 warn=False)
    assert lazy.is_lazy
    # derived: the same statistics of the same rows; float64 sums taken in another order differ by rounding
    assert_allclose(lazy.data.compute(), eager.data, rtol=0, atol=1e-12)
    assert_array_equal(lazy.mask, eager.mask)  # one mask for all slices: a pixel bad in any slice


def test_level_errors():
    scan = Scan(PLANE, pixel_size_nm=0.1, source="topo.npy")
    with pytest.raises(InputError, match="lines must be"):
        level(scan, lines="rows")
    with pytest.raises(InputError, match="order must be"):
        level(scan, order=9)
    with pytest.raises(InputError, match="topo.npy.*unmasked"):
        level(scan.with_data(PLANE, mask=np.ones(PLANE.shape, bool)))
    with pytest.raises(InputError, match="domains.Scan"):
        level(PLANE)


# --------------------------------------------------------------------------- real-data defects
#
# A CDW-like topograph built analytically: three cosines of amplitude A at 120 degrees
# (a hexagonal lattice), white noise, a tilt, and the defects under test at known places.

N_REAL = 256
PIXEL_NM = 0.05
A_NM = 0.02  # corrugation amplitude of each cosine
NOISE_NM = 0.01  # white noise per pixel
STEP_NM = 0.6  # 30 corrugation amplitudes
PERIOD_NM = 1.032  # 3a of a 3x3 CDW with a = 0.344 nm (docs/methods.md §5)
Q_NM = 4 * np.pi / (np.sqrt(3) * PERIOD_NM)  # docs/methods.md §4: peaks of a hexagonal pattern at 4 pi / (sqrt 3 lambda)
RR, CC = np.mgrid[0:N_REAL, 0:N_REAL].astype(float)


def _lattice(angle=0.26, amplitude=A_NM, shift_px=(0.0, 0.0), phase=0.0):
    z = np.zeros((N_REAL, N_REAL))
    for k in range(3):
        a = angle + 2 * np.pi * k / 3
        qx, qy = Q_NM * np.cos(a) * PIXEL_NM, Q_NM * np.sin(a) * PIXEL_NM  # rad per pixel
        z += amplitude * np.cos(qx * (CC - shift_px[1]) + qy * (RR - shift_px[0]) + phase * (k + 1))
    return z


def _staircase(width_px=1.0):
    """Two steps of STEP_NM: a straight edge and a gently curved one. Returns (height, level, distance to an edge)."""
    d1 = CC - (0.3 * N_REAL + 0.25 * RR)
    d2 = CC - (0.65 * N_REAL + 0.15 * RR + 0.0006 * (RR - N_REAL / 2) ** 2)
    height = STEP_NM * (0.5 * (1 + np.tanh(d1 / width_px)) + 0.5 * (1 + np.tanh(d2 / width_px)))
    levels = (d1 > 0).astype(int) + (d2 > 0).astype(int)
    # distance along a row scaled by the edge slope gives the perpendicular distance
    distance = np.minimum(np.abs(d1) / np.hypot(1, 0.25), np.abs(d2) / np.hypot(1, 0.15 + 0.0012 * np.abs(RR - 128)))
    return height, levels, distance


def _spectrum(image):
    """Hann-windowed power spectrum, numpy.fft as the reference (zero wavevector at the centre)."""
    w = np.hanning(N_REAL)
    f = np.fft.fftshift(np.fft.fft2((image - image.mean()) * w[:, None] * w[None, :]))
    return f.real**2 + f.imag**2


def _peak_to_strongest_other(image, angle=0.26):
    """Weakest lattice peak over the strongest spectral feature away from the peaks and from k = 0."""
    power = _spectrum(image)
    c = N_REAL // 2
    q_bins = Q_NM * PIXEL_NM * N_REAL / (2 * np.pi)
    others = power.copy()
    others[np.hypot(RR - c, CC - c) < 0.5 * q_bins] = 0.0  # the low-wavevector disk (background, tilt)
    weakest = np.inf
    for k in range(6):
        a = angle + np.pi * k / 3
        r, col = int(round(c + q_bins * np.sin(a))), int(round(c + q_bins * np.cos(a)))
        weakest = min(weakest, power[r - 1 : r + 2, col - 1 : col + 2].max())
        others[r - 3 : r + 4, col - 3 : col + 4] = 0.0
    return weakest / others.max()


def _clean(seed, angle=0.26):
    rng = np.random.default_rng(seed)
    noise = rng.normal(0.0, NOISE_NM, (N_REAL, N_REAL))
    return _lattice(angle) + noise, rng


TILT = 0.003 * CC - 0.002 * RR + 0.4


def test_terraces_found_with_their_heights_and_edges():
    truth, _ = _clean(0)
    height, levels, distance = _staircase()
    result = level(Scan(truth + height + TILT, pixel_size_nm=PIXEL_NM), return_result=True)
    assert result.terrace_count == 3  # derived: two edges crossing the frame make three terraces
    reference = np.argmax(np.bincount(levels.ravel()))  # the largest terrace is the reference
    expected = sorted(STEP_NM * (k - reference) for k in range(3))
    # derived: the mean of a cosine over a terrace W >= 60 px wide is at most 2A / (q W) (q = 0.36 rad/px), for three
    # cosines and two terraces 2 * 3 * 2 * 0.02 / (0.36 * 60) = 0.011 nm; noise adds 5 sigma / sqrt(N) < 0.001 nm
    assert_allclose(sorted(result.terrace_offsets_nm), expected, rtol=0, atol=0.012)
    labels = result.terrace_labels
    for k in range(3):
        inside = labels[(levels == k) & (distance > 10)]
        assert np.unique(inside).size == 1 and inside[0] > 0  # derived: one label per true terrace away from edges
    edges = result.edge_mask
    assert edges[distance < 1.0].all()  # derived: where the step is under way (|tanh| < 0.76) the band must cover it
    # derived: no pixel farther from an edge than the widest detector support (3 sigma of the 2 px Gaussian,
    # plus the 2 px half-span and the 1 px margin = 9 px) can be flagged
    assert not edges[distance > 9.5].any()
    assert_array_equal(result.scan.mask, edges)  # derived: no other defect in this scene
    away = (distance > 10) & ~result.scan.mask
    background = result.scan.data - truth
    # derived: what is left of the background is the least-squares error of plane + offsets, bounded by the
    # corrugation leakage (0.011 nm, above) and far below it in rms; it must stay below the noise
    assert np.std(background[away]) < NOISE_NM
    for k in range(3):
        part = background[away & (levels == k)]
        assert abs(part.mean() - background[away].mean()) < 0.012  # derived: as the offsets above
    assert result.scan.metadata["level"]["terrace_count"] == 3  # the findings travel with the scan


def test_terrace_edges_no_longer_bury_the_lattice_peaks():
    truth, _ = _clean(1)
    height, _, _ = _staircase()
    scan = Scan(truth + height + TILT, pixel_size_nm=PIXEL_NM)
    plane_only = level(scan, terraces=False).data
    result = level(scan)
    clean_ratio = _peak_to_strongest_other(level(Scan(truth + TILT, pixel_size_nm=PIXEL_NM)).data)
    # derived: the residual staircase of a plane fit (+-0.3 nm, 15 A) throws streaks stronger than the peaks:
    # the test scene is hard
    assert _peak_to_strongest_other(plane_only) < 1.0
    assert clean_ratio > 100  # derived: peaks (A/2)^2 far above the Hann side lobes of the other peaks
    ratio = _peak_to_strongest_other(result.data)
    assert ratio > 1.0  # the lattice peaks are again the strongest features (common practice, no source)
    # derived: masking the edge band multiplies the lattice by (1 - band), whose spectrum puts side lobes
    # around each peak; the truth with the same band blanked is the best any levelling can do
    blanked = np.where(result.mask, 0.0, truth)
    assert ratio > 0.5 * _peak_to_strongest_other(blanked)


GLITCH_ROWS = (0, 40, 41, 100, 180, 255)


def _glitched(seed):
    truth, rng = _clean(seed)
    image = truth + TILT
    image[0] = rng.normal(0.0, 0.2, N_REAL)  # garbage in the first line
    image[40] = rng.uniform(-0.5, 0.5, N_REAL)  # two garbage lines in a row
    image[41] = rng.uniform(-0.5, 0.5, N_REAL)
    image[100, rng.random(N_REAL) < 0.1] += 1.0  # a line with spikes on 10 % of its pixels
    image[180] += rng.normal(0.0, 0.1, N_REAL)  # a noisy line
    image[255, ::2] += 0.3  # the last line alternating
    return image, truth


@pytest.mark.parametrize("seed", [2, 3])
def test_glitched_lines_masked_exactly(seed):
    image, truth = _glitched(seed)
    result = level(Scan(image, pixel_size_nm=PIXEL_NM), return_result=True)
    assert result.glitch_rows == GLITCH_ROWS  # derived: exactly the lines built glitched
    expected = np.zeros(image.shape, bool)
    expected[list(GLITCH_ROWS)] = True
    assert_array_equal(result.scan.mask, expected)  # derived: whole lines, nothing else
    assert result.terrace_count == 1 and result.tip_change_rows == ()  # derived: none built in
    out = result.scan.data
    # derived: an isolated glitched line is replaced by the mean of its neighbours
    assert_allclose(out[100], 0.5 * (out[99] + out[101]), rtol=0, atol=1e-12)
    # derived: the levelled trusted pixels are the truth up to a fitted plane (error << noise)
    trusted = ~expected
    assert np.std((out - truth)[trusted]) < 0.1 * NOISE_NM


def test_glitches_and_terraces_together():
    image, truth = _glitched(4)
    height, levels, distance = _staircase()
    result = level(Scan(image + height, pixel_size_nm=PIXEL_NM), return_result=True)
    assert result.glitch_rows == GLITCH_ROWS  # derived: as above, the steps add no glitch
    assert result.terrace_count == 3  # derived: glitched lines do not split or join terraces
    reference = np.argmax(np.bincount(levels.ravel()))
    # derived: as in test_terraces_found_with_their_heights_and_edges
    assert_allclose(sorted(result.terrace_offsets_nm), sorted(STEP_NM * (k - reference) for k in range(3)),
                    rtol=0, atol=0.012)


def test_explicit_glitch_rows():
    truth, _ = _clean(5)
    result = level(Scan(truth, pixel_size_nm=PIXEL_NM), glitches=[7, 3], return_result=True)
    assert result.glitch_rows == (3, 7)
    assert_array_equal(np.flatnonzero(result.scan.mask.all(axis=1)), [3, 7])  # derived: the rows asked for
    assert result.scan.mask.sum() == 2 * N_REAL


TIP_ROW = 150


def _tip_changed(seed, offset_nm=0.3, contrast=0.6, shift_px=3.0, glitch=False):
    truth, rng = _clean(seed)
    after = _lattice(amplitude=contrast * A_NM, shift_px=(0.0, shift_px)) + rng.normal(0.0, NOISE_NM, truth.shape)
    truth[TIP_ROW:] = after[TIP_ROW:]
    image = truth + TILT
    image[TIP_ROW:] += offset_nm
    if glitch:
        image[TIP_ROW - 1] = rng.uniform(-0.5, 0.5, N_REAL)  # the line during which the tip changed
    return image, truth


@pytest.mark.parametrize("glitch", [False, True])
def test_tip_change_found_and_its_offset_removed(glitch):
    image, truth = _tip_changed(6, glitch=glitch)
    result = level(Scan(image, pixel_size_nm=PIXEL_NM), return_result=True)
    assert len(result.tip_change_rows) == 1  # derived: one tip change built in
    assert abs(result.tip_change_rows[0] - TIP_ROW) <= 1  # the brief's tolerance: within one line
    # derived: the line-to-line median measures the jump plus the median of the corrugation difference of two
    # lines, which lies within the corrugation's range (three cosines: +-3A)
    assert abs(result.tip_change_offsets_nm[0] - 0.3) < 3 * A_NM
    assert result.tip_change_contrast[0] < 1.0  # derived: the corrugation (and the line roughness) fell
    assert result.glitch_rows == ((TIP_ROW - 1,) if glitch else ())  # derived: one line built glitched
    out = result.scan.data - truth
    trusted = ~result.scan.mask
    above = out[TIP_ROW - 40 : TIP_ROW][trusted[TIP_ROW - 40 : TIP_ROW]].mean()
    below = out[TIP_ROW : TIP_ROW + 40][trusted[TIP_ROW : TIP_ROW + 40]].mean()
    assert abs(below - above) < 3 * A_NM  # derived: as the offset estimate above; the 0.3 nm jump is gone
    assert "Tip change at row" in result.note


def test_contrast_only_tip_change():
    rng = np.random.default_rng(7)
    truth = _lattice() + rng.normal(0.0, 0.003, (N_REAL, N_REAL))
    truth[TIP_ROW:] = (_lattice(amplitude=0.3 * A_NM) + rng.normal(0.0, 0.003, truth.shape))[TIP_ROW:]
    result = level(Scan(truth + TILT, pixel_size_nm=PIXEL_NM), return_result=True)
    assert len(result.tip_change_rows) == 1 and abs(result.tip_change_rows[0] - TIP_ROW) <= 1  # derived, as above
    # derived: the line roughness (along-line differences) scales with the corrugation where it dominates the
    # noise: 0.3 of it, diluted by the noise to well below the detection ratio 1 / 1.25
    assert result.tip_change_contrast[0] < 0.8


@pytest.mark.parametrize("seed", range(20))
def test_auto_finds_nothing_on_a_clean_image(seed):
    rng = np.random.default_rng(100 + seed)
    angle, phase = rng.uniform(0, 2 * np.pi, 2)
    lines = np.cumsum(rng.normal(0, 0.003, N_REAL)) + rng.normal(0, 0.004, N_REAL)  # 1/f-like and white line noise
    image = _lattice(angle, phase=phase) + rng.normal(0, NOISE_NM, (N_REAL, N_REAL)) + lines[:, None] + TILT
    scan = Scan(image, pixel_size_nm=PIXEL_NM, metadata={"k": 1})
    result = level(scan, return_result=True)
    assert not result.found_anything  # the brief: no false alarm in 20 noise realisations
    plain = level(scan, terraces=False, glitches=False, tip_changes=False)
    assert_array_equal(result.scan.data, plain.data)  # derived: nothing found, nothing changed
    assert result.scan.mask is None and result.scan.metadata == {"k": 1}


@pytest.mark.parametrize("seed", [0, 1])
def test_auto_finds_nothing_on_the_synthetic_cdw_scene(seed):
    from domains.synth import cdw_scene

    scene = cdw_scene(shape=(256, 256), rng=seed).topography  # domains, walls, line offsets, noise; no defect
    assert not level(scene, return_result=True).found_anything  # derived: none built in


def test_defect_finders_errors():
    scan = Scan(PLANE, pixel_size_nm=0.1, source="topo.npy")
    with pytest.raises(InputError, match="terraces must be"):
        level(scan, terraces="yes")
    with pytest.raises(InputError, match="tip_changes must be"):
        level(scan, tip_changes=1)
    with pytest.raises(InputError, match="glitches must be"):
        level(scan, glitches=[48])
    grid = Scan(np.stack([PLANE, PLANE]), pixel_size_nm=0.1, energies_V=[0, 1], source="grid.npy")
    with pytest.raises(InputError, match="grid.npy: terraces can only be found in a 2-D scan"):
        level(grid, terraces=True)
    lazy = level(Scan(da.from_array(PLANE, chunks=16), pixel_size_nm=0.1), terraces=True, return_result=True)
    assert lazy.scan.is_lazy and not lazy.found_anything  # derived: a plane has no step


def test_terraces_through_masked_and_missing_pixels():
    truth, _ = _clean(8)
    height, levels, distance = _staircase()
    image = truth + height + TILT
    image[:, 200] = np.nan  # a dead column crossing the curved step edge
    image[50:60, 100:180] = np.nan  # a hole across the straight one
    user = np.zeros(image.shape, bool)
    user[150:190, 20:120] = True  # a user-masked bright feature
    image[user] = 5.0
    result = level(Scan(image, pixel_size_nm=PIXEL_NM, mask=user), return_result=True)
    assert result.terrace_count == 3  # derived: masked pixels neither join nor split terraces
    reference = np.argmax(np.bincount(levels.ravel()))
    # derived: as in test_terraces_found_with_their_heights_and_edges
    assert_allclose(sorted(result.terrace_offsets_nm), sorted(STEP_NM * (k - reference) for k in range(3)),
                    rtol=0, atol=0.012)
    assert result.scan.mask[user].all() and result.scan.mask[:, 200].all()  # the mask travels with the data
    assert np.isfinite(result.scan.data).all()


def test_a_step_edge_almost_along_the_lines_is_no_glitch():
    truth, _ = _clean(9)
    # the edge descends 5 lines across the frame: every line it crosses changes on 20 % of its pixels
    image = truth + STEP_NM * (RR > 120 + 0.02 * CC) + TILT
    result = level(Scan(image, pixel_size_nm=PIXEL_NM), return_result=True)
    # derived: a pixel on either side of the edge differs from one neighbouring line only, never sticks out of both
    assert result.glitch_rows == ()
    assert result.terrace_count == 2  # derived: one edge across the frame
    assert abs(abs(result.terrace_offsets_nm[1]) - STEP_NM) < 0.012  # derived: as for the two-step staircase
    # derived: an edge exactly along a line cannot be told from a tip change (documented): it is reported as one
    flat = level(Scan(truth + STEP_NM * (RR >= 121) + TILT, pixel_size_nm=PIXEL_NM), return_result=True)
    assert flat.tip_change_rows == (121,) and abs(flat.tip_change_offsets_nm[0] - STEP_NM) < 3 * A_NM


def test_terrace_offsets_under_strong_line_noise():
    rng = np.random.default_rng(10)
    height, levels, _ = _staircase()
    # the line level drifts slowly (1/f-like: a wave over the frame) and randomly from line to line
    lines = 0.2 * np.sin(3 * np.pi * np.arange(N_REAL) / N_REAL) + np.cumsum(rng.normal(0.0, 0.01, N_REAL))
    image = _lattice() + rng.normal(0.0, NOISE_NM, (N_REAL, N_REAL)) + height + lines[:, None]
    scan = Scan(image, pixel_size_nm=PIXEL_NM)
    reference = np.argmax(np.bincount(levels.ravel()))
    expected = sorted(STEP_NM * (k - reference) for k in range(3))
    result = level(scan, lines="hann", warn=False, return_result=True)
    assert result.tip_change_rows == () and result.glitch_rows == ()  # derived: dense line noise is neither
    # derived: with the line offsets of the step-free image removed before the terrace fit, only the corrugation
    # leakage bound of test_terraces_found_with_their_heights_and_edges remains
    assert_allclose(sorted(result.terrace_offsets_nm), expected, rtol=0, atol=0.012)
    # derived: left in (lines=None), the line noise averaged over the lines each terrace covers biases the offsets
    # by more than that: the scene is a real test of the line correction
    unlined = level(scan, return_result=True)
    assert np.max(np.abs(np.subtract(sorted(unlined.terrace_offsets_nm), expected))) > 0.012


def test_an_island_joins_the_terrace_at_its_level():
    truth, _ = _clean(11)
    island = (RR - 128) ** 2 + (CC - 110) ** 2 < 30.0**2  # a one-layer island on the lower terrace
    image = truth + STEP_NM * (island | (CC > 200)) + TILT
    result = level(Scan(image, pixel_size_nm=PIXEL_NM), return_result=True)
    # derived: the island and the right-hand terrace lie at one height, so "auto" joins them: two levels
    assert result.terrace_count == 2
    assert abs(abs(result.terrace_offsets_nm[1]) - STEP_NM) < 0.012  # derived: as for the staircase
    labels = result.terrace_labels
    assert labels[128, 110] == labels[128, 230] != labels[20, 20]  # derived: same level, same label
    forced = level(Scan(image, pixel_size_nm=PIXEL_NM), terraces=True, return_result=True)
    assert forced.terrace_count == 3  # derived: True keeps every enclosed region apart


# --------------------------------------------------------------------------- lazy (dask) levelling
#
# A dask image is levelled chunk by chunk: per-row statistics, strided fits, an overview for the
# terraces. Up to OVERVIEW_PIXELS the overview is the image itself, so every finding must be the
# in-memory one and every pixel equal to float32 precision. The chunks are irregular and split the
# rows across column chunks (the levelling rechunks to whole rows), so chunk borders cut through
# glitched lines, tip changes and step edges.

IRREGULAR = ((7, 33, 1, 60, 99, 56), (100, 3, 153))


def _assert_lazy_equals_eager(image, mask=None, chunks=IRREGULAR, dtype=None, **kwargs):
    image = image.astype(dtype) if dtype is not None else image
    eager = level(Scan(image, pixel_size_nm=PIXEL_NM, mask=mask), return_result=True, **kwargs)
    lazy = level(Scan(da.from_array(image, chunks=chunks), pixel_size_nm=PIXEL_NM, mask=mask), return_result=True,
                 **kwargs)
    assert lazy.scan.is_lazy
    data = lazy.scan.data.compute()
    assert data.dtype == eager.scan.data.dtype  # float in, float out (common practice, no source)
    # derived: float32 precision of the levelled values (the fits sum in another order, in float64)
    tol = 4 * np.finfo(np.float32).eps * float(np.nanmax(np.abs(image[np.isfinite(image)])))
    assert_allclose(data, eager.scan.data, rtol=0, atol=tol)
    # derived: the same per-row statistics decide the same rows, terraces and masks
    assert lazy.glitch_rows == eager.glitch_rows
    assert lazy.tip_change_rows == eager.tip_change_rows
    assert lazy.terrace_count == eager.terrace_count
    assert_allclose(lazy.terrace_offsets_nm, eager.terrace_offsets_nm, rtol=0, atol=tol)
    assert_allclose(lazy.tip_change_offsets_nm, eager.tip_change_offsets_nm, rtol=0, atol=tol)
    assert_allclose(lazy.tip_change_contrast, eager.tip_change_contrast, rtol=1e-9, atol=0)
    if eager.scan.mask is None:
        assert lazy.scan.mask is None
    else:
        assert_array_equal(lazy.scan.mask, eager.scan.mask)
    if eager.terrace_labels is None:
        assert lazy.terrace_labels is None
    else:
        assert_array_equal(lazy.terrace_labels.compute(), eager.terrace_labels)
        assert_array_equal(lazy.edge_mask.compute(), eager.edge_mask)
    assert lazy.note == eager.note
    return eager, lazy


@pytest.mark.parametrize("dtype", [None, np.float32])
def test_lazy_glitched_lines_as_in_memory(dtype):
    image, _ = _glitched(2)
    eager, _ = _assert_lazy_equals_eager(image, dtype=dtype)
    assert eager.glitch_rows == GLITCH_ROWS  # the scene is a real test (derived: lines built glitched)


def test_lazy_terraces_and_glitches_as_in_memory():
    image, _ = _glitched(4)
    height, _, _ = _staircase()
    eager, _ = _assert_lazy_equals_eager(image + height)
    assert eager.terrace_count == 3 and eager.glitch_rows == GLITCH_ROWS  # derived: as built


def test_lazy_terraces_through_masked_and_missing_pixels_as_in_memory():
    truth, _ = _clean(8)
    height, _, _ = _staircase()
    image = truth + height + TILT
    image[:, 200] = np.nan
    image[50:60, 100:180] = np.nan
    image[3, 17] = np.inf
    user = np.zeros(image.shape, bool)
    user[150:190, 20:120] = True
    image[user] = 5.0
    eager, _ = _assert_lazy_equals_eager(image, mask=user)
    assert eager.terrace_count == 3  # derived: as in test_terraces_through_masked_and_missing_pixels


@pytest.mark.parametrize("lines", ["hann", "difference"])
def test_lazy_tip_change_as_in_memory(lines):
    image, _ = _tip_changed(6, glitch=True)
    eager, _ = _assert_lazy_equals_eager(image, lines=lines, warn=False)
    assert len(eager.tip_change_rows) == 1 and eager.glitch_rows == (TIP_ROW - 1,)  # derived: as built


@pytest.mark.parametrize("lines", ["median", "mean"])
def test_lazy_terraces_under_line_noise_as_in_memory(lines):
    rng = np.random.default_rng(10)
    height, _, _ = _staircase()
    noise_lines = 0.2 * np.sin(3 * np.pi * np.arange(N_REAL) / N_REAL) + np.cumsum(rng.normal(0.0, 0.01, N_REAL))
    image = _lattice() + rng.normal(0.0, NOISE_NM, (N_REAL, N_REAL)) + height + noise_lines[:, None]
    eager, _ = _assert_lazy_equals_eager(image, lines=lines, warn=False)
    assert eager.terrace_count == 3  # derived: two edges across the frame


def test_lazy_nothing_found_as_in_memory():
    truth, _ = _clean(12)
    eager, lazy = _assert_lazy_equals_eager(truth + TILT + _offsets(N_REAL)[:, None] * 0.1, lines="difference",
                                            order=2)
    assert not eager.found_anything and lazy.scan.mask is None  # derived: a clean scene


def test_lazy_terraces_on_an_overview(monkeypatch):
    # An image larger than the overview: the terraces are found on 4 x 4 block means.
    monkeypatch.setattr(level_module, "OVERVIEW_PIXELS", N_REAL * N_REAL // 16)
    truth, _ = _clean(0)
    height, levels, distance = _staircase()
    result = level(Scan(da.from_array(truth + height + TILT, chunks=IRREGULAR), pixel_size_nm=PIXEL_NM),
                   return_result=True)
    assert result.terrace_count == 3  # derived: two edges crossing the frame make three terraces
    reference = np.argmax(np.bincount(levels.ravel()))
    # derived: as in test_terraces_found_with_their_heights_and_edges (a wider band only drops pixels near edges)
    assert_allclose(sorted(result.terrace_offsets_nm), sorted(STEP_NM * (k - reference) for k in range(3)),
                    rtol=0, atol=0.012)
    edges = result.edge_mask.compute()
    assert edges[distance < 1.0].all()  # derived: the band covers every pixel where the step is under way
    labels = result.terrace_labels.compute()
    for k in range(3):
        inside = labels[(levels == k) & (distance > 40)]  # derived: 9 px of support per overview pixel of 4 px
        assert np.unique(inside).size == 1 and inside[0] > 0


def test_lazy_levelling_never_holds_the_image(monkeypatch):
    # With every budget below the image size, no task of the levelling returns a float array
    # as large as the image: statistics are per row, fits strided, terraces on an overview.
    from dask.callbacks import Callback

    monkeypatch.setattr(level_module, "OVERVIEW_PIXELS", N_REAL * N_REAL // 16)
    monkeypatch.setattr(level_module, "FIT_MAX_PIXELS", N_REAL * N_REAL // 16)
    for budget in ("_TERRACE_FIT_PIXELS", "_MERGE_SAMPLE_PIXELS", "ROW_CHUNK_PIXELS"):
        monkeypatch.setattr(level_module, budget, N_REAL * N_REAL // 16)
    image, _ = _glitched(4)
    height, _, _ = _staircase()
    largest = []

    class Largest(Callback):
        def _posttask(self, key, result, dsk, state, worker_id):
            if isinstance(result, np.ndarray) and result.dtype.kind == "f":
                largest.append(result.size)

    # inline_array: the source array is no task of its own (a file read would be chunk by chunk)
    source = da.from_array(image + height, chunks=IRREGULAR, inline_array=True)
    with Largest():
        result = level(Scan(source, pixel_size_nm=PIXEL_NM), return_result=True)
    assert result.terrace_count == 3 and result.glitch_rows == GLITCH_ROWS  # derived: as built
    assert largest and max(largest) < image.size // 4  # the brief: never the full array
