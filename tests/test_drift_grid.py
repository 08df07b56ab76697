"""The drift step's two grids: the field measured on the decimated grid and its spline against full resolution,
and the block-by-block resampling against the whole frame."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage
from skimage.restoration import unwrap_phase

import domains
from domains.drift import _trusted, correct_channels, correct_drift, displacement_field, straighten_rows

N = 256
PIX = 0.025  # nm per pixel; 16-pixel Bragg period, as in tests/test_drift.py
SIGMA_PX = 10.0
SIGMA = SIGMA_PX * PIX
ROWS, COLS = np.mgrid[:N, :N].astype(float)
CYCLES = np.array([[16, 0], [-8, 14], [-8, -14]])
Q_PX = 2 * np.pi * CYCLES / N
Q_NM = Q_PX / PIX
STEP = 5  # lossless_step(10 px) = floor(pi * 10 / 5.26) (domains/_lockin.py), below N / 16

# The drift: a slow sine, and two components as fast as the lock-in can follow (|k| sigma = 2 and 1.5),
# where the spline's error is largest (derived in correct_drift's docstring). (amplitude px, k rad/px).
# The truth is analytic, so the spline's error bound below is too.
SLOW = (1.2, 2 * np.pi / N)
FAST_X = (0.5, 2.0 / SIGMA_PX)  # in u_x, varying along the rows (y)
FAST_Y = (0.4, 1.5 / SIGMA_PX)  # in u_y, varying along the columns (x)


def drift_u(rows, cols):
    """The imposed field (px), analytic."""
    ux = SLOW[0] * np.sin(SLOW[1] * rows) + FAST_X[0] * np.sin(FAST_X[1] * rows + 0.3)
    uy = FAST_Y[0] * np.sin(FAST_Y[1] * cols + 1.1)
    return np.array([ux, uy])


def lattice(u_px):
    return sum(np.cos(qx * (COLS + u_px[0]) + qy * (ROWS + u_px[1])) for qx, qy in Q_PX)


def full_resolution_field(image):
    """The field at every pixel the direct way (lock-in at every pixel, unwrap, least squares, zero mean
    over the trusted pixels), as Lawler et al. (2010) describe it, in px."""
    a = domains.lockin(image, Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX)
    theta = np.stack([unwrap_phase(np.angle(c)) for c in a])
    trusted = domains.trusted_mask((N, N), sigma_nm=SIGMA, pixel_size_nm=PIX)
    theta -= np.array([t[trusted].mean() for t in theta])[:, None, None]
    return np.einsum("ik,k...->i...", np.linalg.pinv(Q_NM), theta) / PIX, trusted


def spline_bound(amplitude, k):
    """Hall & Meyer, J. Approx. Theory 16, 105 (1976): |f - spline| <= (5/384) h^4 max|f''''| for a cubic
    spline through samples h apart. A sine a sin(k y) of the true field is measured as
    a exp(-(k sigma)^2 / 2) (Gaussian lock-in, docs/methods.md §2), whose fourth derivative is k^4 times it."""
    return 5 / 384 * (k * STEP) ** 4 * amplitude * np.exp(-0.5 * (k * SIGMA_PX) ** 2)


@pytest.fixture(scope="module")
def scene():
    u = drift_u(ROWS, COLS)
    return u, lattice(u)


def test_decimated_field_matches_full_resolution(scene):
    _, image = scene
    field = displacement_field(image, Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX) / PIX
    reference, trusted = full_resolution_field(image)
    # derived: the decimated lock-in equals the full one at the samples (domains.lockin, step), so the two
    # fields differ by the spline's error alone, bounded per component and axis (spline_bound), plus the
    # float32 lock-in of the decimated path: phase precision ~1e-6 rad, i.e. 1e-6 / |Q| = 2.5e-6 px.
    bound = spline_bound(*SLOW) + spline_bound(*FAST_X) + spline_bound(*FAST_Y) + 1e-5
    error = np.max(np.abs(field - reference)[:, trusted])
    assert error < bound
    # The bound has teeth: the same samples joined by straight lines (scipy.ndimage, order 1) miss it by far.
    samples = field[:, ::STEP, ::STEP]
    linear = np.stack([ndimage.map_coordinates(c, [ROWS / STEP, COLS / STEP], order=1, mode="nearest")
                       for c in samples])
    assert np.max(np.abs(linear - reference)[:, trusted]) > 3 * bound
    # (Against G_sigma * u itself both miss by ~0.03 px here: a drift this fast, two lattice periods, moves
    # the first sideband of one Bragg peak to 10 cycles from the next, where the lock-in still sees it.
    # tests/test_drift.py checks the smoothed truth on the slow drift of docs/methods.md §2.)


def test_result_keeps_the_grid(scene):
    _, image = scene
    result = correct_drift(image, Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX, tol_rad=0.03)
    assert result.step == STEP  # derived: lossless_step of sigma, N / 16 = 16 is no cap here
    assert result.u_coarse_nm.shape == (2, -(-N // STEP), -(-N // STEP))  # derived: rows 0, s, 2s, ...
    # derived: the spline passes through its samples (interpolation), to float64 rounding.
    assert_allclose(result.u_nm[:, ::STEP, ::STEP], result.u_coarse_nm, rtol=0, atol=1e-12)
    assert result.u_nm.dtype == np.float64 and result.residual_phase_rad.dtype == np.float32
    assert result.residual_phase_rad.shape == (3, N, N)
    # The statistics are those of the full-resolution residual over the trusted pixels (derived: same field).
    stats = np.abs(result.residual_phase_rad[:, result.trusted])
    assert_allclose(stats.max(axis=1), result.residual_max_rad, rtol=1e-5)
    assert_allclose(np.sqrt(np.mean(stats.astype(float) ** 2, axis=1)), result.residual_rms_rad, rtol=1e-5)
    # The interpolated residual against a lock-in of the corrected image at every pixel: the spline's
    # relative error of the lock-in (spline_bound: at most 3.7e-3 per axis of a component, docs of
    # correct_drift) times its variation over the trusted region, which is the residual itself (< 0.03 rad,
    # docs/methods.md §2): below 2 * 3.7e-3 * 0.03 = 2.2e-4 rad.
    a = domains.lockin(np.nan_to_num(result.corrected), Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX, mask=result.mask)
    full = np.angle(a * np.exp(-1j * result.target_phase_rad)[:, None, None])
    assert np.max(np.abs(full - result.residual_phase_rad)[:, result.trusted]) < 2.2e-4
    assert np.max(result.residual_max_rad) < 0.03  # docs/methods.md §2 tolerance


class RecordingRows:
    """An array that records which rows are read (as a reader of a file larger than memory would)."""

    def __init__(self, data):
        self.data, self.shape, self.dtype, self.reads = data, data.shape, data.dtype, []

    def __getitem__(self, key):
        rows = key[-2]
        self.reads.append((rows.start, rows.stop))
        return self.data[key]


def test_blocks_equal_whole_frame(scene, tmp_path):
    _, image = scene
    result = correct_drift(image, Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX, tol_rad=0.03)
    conductance = 0.5 + 0.7 * image
    conductance[100, 60] = np.nan  # a glitch: NaN next to it, nowhere else
    stack = np.stack([image, conductance]).astype(np.float32)
    whole = correct_channels(stack, result)
    # Blocks small and irregular against the spline support and the 24 prefilter rows (dask-image practice).
    edges = [0, 1, 2, 37, 38, 100, 101, 177, 250, 256]
    overlap = result.overlap_rows()
    source = RecordingRows(stack)
    blocks = []
    for start, stop in zip(edges[:-1], edges[1:]):
        source.reads.clear()
        blocks.append(straighten_rows(source, result, start, stop))
        # Only the rows the block needs are read: the largest displacement plus the spline's reach.
        assert min(r[0] for r in source.reads) >= max(0, start - overlap)
        assert max(r[1] for r in source.reads) <= min(N, stop + overlap)
    joined = np.concatenate(blocks, axis=1)
    assert joined.dtype == np.float32  # float32 kept (common practice, scikit-image style)
    # derived: where the block was cut, the prefilter differs by |sqrt 3 - 2|^24 = 2e-14 of the spline
    # coefficients (Unser, IEEE Signal Process. Mag. 16, 22 (1999)): equal to float32 precision.
    assert_allclose(joined, whole, rtol=0, atol=4 * np.finfo(np.float32).eps * np.nanmax(np.abs(stack)),
                    equal_nan=True)
    assert np.array_equal(np.isnan(joined), np.isnan(whole))
    assert np.isnan(whole[1]).sum() < np.isnan(whole[0]).sum() + 20  # the glitch spoils only its neighbours
    # The topograph through the blocks is the drift result's own correction (float64 path).
    assert_allclose(straighten_rows(image, result, 40, 90), result.corrected[40:90], rtol=0, atol=1e-12,
                    equal_nan=True)  # derived: same arithmetic up to the 2e-14 above
    # A memory-mapped file is only sliced (larger-than-memory use).
    path = tmp_path / "frame.dat"
    mapped = np.memmap(path, dtype=np.float32, mode="w+", shape=stack.shape)
    mapped[:] = stack
    mapped.flush()
    reopened = np.memmap(path, dtype=np.float32, mode="r", shape=stack.shape)
    assert_allclose(straighten_rows(reopened, result, 120, 140), whole[:, 120:140], rtol=0, atol=1e-6,
                    equal_nan=True)  # derived: the same numbers read from disk
    with pytest.raises(domains.InputError, match="start"):
        straighten_rows(image, result, 10, 5)
    with pytest.raises(domains.InputError, match="frame"):
        straighten_rows(image[:100], result, 0, 10)


@pytest.mark.parametrize("seed", [0, 1])
def test_trusted_equals_trusted_mask(seed):
    rng = np.random.default_rng(seed)
    bad = np.zeros((300, 220), bool)
    bad[:3] = True  # an edge band, as the pixels whose source left the frame
    bad[:, -2:] = True
    bad[rng.integers(0, 300, 6), rng.integers(0, 220, 6)] = True  # isolated pixels
    bad[150:160, 40:200] = True  # a masked patch
    bad[250] = True  # a masked scan line
    pixel = (0.03, 0.02)  # non-square pixels
    fast = _trusted(bad, bad.shape, 0.3, pixel)
    # Reference: the project's trusted_mask, a scipy.ndimage.distance_transform_edt over the whole frame.
    assert np.array_equal(fast, domains.trusted_mask(bad.shape, sigma_nm=0.3, pixel_size_nm=pixel, mask=bad))
    assert fast.any() and not fast.all()  # derived: the margin is 45 px of 300 rows, the test has teeth
    assert np.array_equal(_trusted(None, bad.shape, 0.3, pixel),
                          domains.trusted_mask(bad.shape, sigma_nm=0.3, pixel_size_nm=pixel))
