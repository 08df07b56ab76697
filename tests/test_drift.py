"""Tests of the Lawler–Fujita drift correction on synthetic lattices with analytically known distortion."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage
from skimage.registration import phase_cross_correlation

import domains
from domains.drift import (
    DriftResult,
    apply_displacement,
    correct_channels,
    correct_drift,
    displacement_field,
)

N = 256
PIX = 0.025  # nm per pixel; the invented lattice has a 16-pixel (0.4 nm) Bragg period
ROWS, COLS = np.mgrid[:N, :N].astype(float)
# docs/methods.md §2: integer-bin, approximately hexagonal Bragg vectors, in cycles per frame.
CYCLES = np.array([[16, 0], [-8, 14], [-8, -14]])
Q_PX = 2 * np.pi * CYCLES / N  # rad/px
Q_NM = Q_PX / PIX  # rad/nm


def lattice(u_px=None, phases=(0.0, 0.0, 0.0), weights=(1.0, 1.0, 1.0), q_px=Q_PX):
    """T(r) = sum_j w_j cos(Q_j . (r + u(r)) + phi_j), built analytically (u in px)."""
    ux, uy = (0.0, 0.0) if u_px is None else u_px
    return sum(
        w * np.cos(qx * (COLS + ux) + qy * (ROWS + uy) + p) for (qx, qy), p, w in zip(q_px, phases, weights)
    )


def methods_u(rows, cols):
    """docs/methods.md §2 imposed field, in px: (1.2 sin(2 pi y/N) + 0.01 x, 0.8 cos(2 pi x/N))."""
    return np.array([1.2 * np.sin(2 * np.pi * rows / N) + 0.01 * cols, 0.8 * np.cos(2 * np.pi * cols / N)])


def inverse_map(field, iterations=60):
    """The exact correcting field: U(r) = u(r - U(r)), so that T(r - U(r)) = f(r) (derived), by fixed point."""
    U = field(ROWS, COLS)
    for _ in range(iterations):
        U = field(ROWS - U[1], COLS - U[0])
    return U


def interior(result, margin_sigma=3.0):
    """At least 3 sigma from the frame edge and from the NaN border of the correction (docs/methods.md §1: 2-3 sigma)."""
    return domains.trusted_mask(
        (N, N), sigma_nm=result.sigma_nm, pixel_size_nm=PIX, mask=result.mask, margin_sigma=margin_sigma
    )


@pytest.fixture(scope="module")
def methods_scene():
    u = methods_u(ROWS, COLS)
    image = lattice(u)
    result = correct_drift(image, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, translation="lattice")
    return u, image, result


def test_first_pass_is_smoothed_truth(methods_scene):
    u, image, _ = methods_scene
    field = displacement_field(image, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, translation="lattice") / PIX
    trusted = domains.trusted_mask((N, N), sigma_nm=10 * PIX, pixel_size_nm=PIX)
    smoothed = np.stack([ndimage.gaussian_filter(c, 10, mode="nearest", truncate=6) for c in u])
    # docs/methods.md §2 [derived]: one pass recovers G_sigma * u_true; interior error < 0.04 px.
    assert np.max(np.abs(field - smoothed)[:, trusted]) < 0.04
    # "remove" differs from "lattice" only by the rigid translation (the mean of u over the trusted region).
    removed = displacement_field(image, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX) / PIX
    mean = np.array([c[trusted].mean() for c in field])
    assert_allclose(removed[:, trusted], (field - mean[:, None, None])[:, trusted], atol=1e-9)  # derived: same phases


def test_methods_check_value(methods_scene):
    _, _, result = methods_scene
    assert isinstance(result, DriftResult)
    truth = inverse_map(methods_u)
    region = interior(result)
    assert region.sum() > 0.5 * N * N
    # docs/methods.md §2 check [derived]: interior u error < 0.04 px against the exact inverse map U = u(r - U).
    assert np.max(np.abs(result.u_nm / PIX - truth)[:, region]) < 0.04
    # docs/methods.md §2 check [derived]: residual |theta| < 0.03 rad after correction (trusted region).
    assert np.max(result.residual_max_rad) < 0.03
    assert result.converged and 1 <= result.iterations <= 5
    # derived: the corrected image is the ideal lattice; a 0.04 px error moves it by at most sum_j |Q_j| * 0.04.
    bound = np.sum(np.hypot(*Q_PX.T)) * 0.04
    assert np.max(np.abs(result.corrected - lattice())[region]) < bound


def test_rigid_shift_matches_cross_correlation():
    shift_px = np.array([0.37, -0.23])  # (x, y)
    image = lattice(shift_px[:, None, None] * np.ones((2, N, N)))
    field = displacement_field(image, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, translation="lattice") / PIX
    trusted = domains.trusted_mask((N, N), sigma_nm=10 * PIX, pixel_size_nm=PIX)
    recovered = np.array([c[trusted].mean() for c in field])
    # derived: T(r) = f(r + s) gives u = s exactly (plain sum of cosines, phases zero at the origin).
    assert_allclose(recovered, shift_px, atol=1e-3)
    # Reference library: scikit-image returns the shift that registers `moving` on `reference`; a content
    # moved by -s (our T = f(r + s)) gives +s as (row, col). The lattice is periodic, so compare
    # modulo a lattice vector: wrap(Q_j . (u - s_skimage)) / |Q_j| must be small.
    rc, _, _ = phase_cross_correlation(lattice(), image, upsample_factor=100)
    diff = recovered - np.array([rc[1], rc[0]])
    wrapped = (Q_PX @ diff + np.pi) % (2 * np.pi) - np.pi
    assert np.max(np.abs(wrapped) / np.hypot(*Q_PX.T)) < 0.05
    # With translation="remove" a rigid shift is no distortion at all (derived). Checked >= 4 sigma from
    # the edges (edge leakage < 5 * 3e-5 rad); what remains is the leakage of the two neighbouring peaks
    # at |dk| = |Q| (docs/methods.md §1): 2 exp(-(sigma |Q|)^2 / 2) = 7.8e-4 rad, i.e. 2.0e-3 px.
    removed = displacement_field(image, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX) / PIX
    deep = domains.trusted_mask((N, N), sigma_nm=10 * PIX, pixel_size_nm=PIX, margin_sigma=4)
    assert np.max(np.abs(removed[:, deep])) < 2.5e-3


def large_u(rows, cols):
    """A field whose Bragg phases pass pi: a 0.04/0.03 px/px ramp plus slow sines (px)."""
    return np.array(
        [0.04 * (cols - N / 2) + 4 * np.sin(2 * np.pi * rows / N), 0.03 * (rows - N / 2) + 2 * np.cos(2 * np.pi * cols / N)]
    )


def test_large_displacement_is_unwrapped():
    u = large_u(ROWS, COLS)
    # The test only means something if some Bragg phase Q_j . u leaves (-pi, pi].
    assert max(np.max(np.abs(np.einsum("i,i...->...", qj, u))) for qj in Q_PX) > np.pi
    result = correct_drift(lattice(u), Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, translation="lattice")
    truth = inverse_map(large_u)
    error = np.max(np.abs(result.u_nm / PIX - truth)[:, interior(result)])
    # derived: the first pass misses at most (1 - exp(-sigma^2 k^2 / 2)) * 4 px = 0.12 px of the 4 px sine
    # (k = 2 pi / N); a tear by a wrong unwrap would be >= a / sqrt(3) = 10.7 px (a = 18.5 px here).
    assert error < 0.15
    assert np.max(result.residual_max_rad) < 0.03  # docs/methods.md §2 tolerance, derived


def test_same_field_straightens_second_channel(methods_scene):
    u, _, result = methods_scene
    phases, weights = (0.4, -1.1, 0.7), (1.0, 0.6, 0.8)
    conductance = 0.5 + lattice(u, phases, weights)
    truth = 0.5 + lattice(None, phases, weights)
    out = correct_channels({"conductance": conductance}, result, pixel_size_nm=PIX)["conductance"]
    region = interior(result)
    # derived: a displacement error of 0.04 px (docs/methods.md §2) changes the map by at most |grad g| * 0.04.
    gradient = np.sum(np.asarray(weights) * np.hypot(*Q_PX.T))
    assert np.max(np.abs(out - truth)[region]) < gradient * 0.04
    # derived: its lock-in phases become flat (the distorted map spreads by |Q| * |u| ~ 0.5 rad).
    a_before = domains.lockin(conductance, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX)
    a_after = domains.lockin(np.nan_to_num(out), Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, mask=result.mask)
    for j, p in enumerate(phases):
        before = np.angle(a_before[j][region] * np.exp(-1j * p))
        after = np.angle(a_after[j][region] * np.exp(-1j * p))
        assert np.max(np.abs(before)) > 0.3
        assert np.max(np.abs(after)) < 0.03  # docs/methods.md §2 residual tolerance


def test_channels_stack_dict_scan_agree(methods_scene):
    u, image, result = methods_scene
    second = 2.0 * image + 1.0
    stack = correct_channels(np.stack([image, second]), result)
    # derived: resampling is linear and the spline exact for a constant, so 2 T + 1 -> 2 T' + 1.
    assert_allclose(stack[1], 2.0 * result.corrected + 1.0, rtol=1e-12, atol=1e-12, equal_nan=True)
    assert_allclose(stack[0], result.corrected, rtol=0, atol=1e-12, equal_nan=True)
    scan = domains.Scan(np.stack([image, second]), pixel_size_nm=PIX, channel="conductance", energies_V=[-0.1, 0.1])
    moved = correct_channels(scan, result)
    assert_allclose(moved.data, stack, atol=1e-12, equal_nan=True)
    assert np.array_equal(moved.mask, result.outside)
    with pytest.raises(domains.InputError, match="pixel_size_nm"):
        correct_channels(image, result, pixel_size_nm=2 * PIX)
    with pytest.raises(domains.InputError, match="frame"):
        correct_channels({"small": image[:100]}, result)


def test_phase_sum_consistency():
    u = methods_u(ROWS, COLS)
    image = lattice(u)
    clean = correct_drift(image, Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, max_iter=1)
    # derived: Q1 + Q2 + Q3 = 0, so theta_1 + theta_2 + theta_3 = 0 whatever u is (Lawler et al. 2010 model).
    assert clean.phase_sum_rms_rad < 0.01
    assert abs(clean.phase_sum_mean_rad) < 0.01
    wrong = Q_NM.copy()
    wrong[2] = 2 * np.pi * np.array([-8, -13]) / N / PIX  # one bin off
    bad = correct_drift(image, wrong, sigma_nm=10 * PIX, pixel_size_nm=PIX, max_iter=1)
    # derived: a one-bin error adds the ramp 2 pi y / N to the sum, about 0.8 of a cycle over the trusted
    # region: a near-uniform wrapped phase with RMS ~ pi / sqrt(3) * 0.8 = 1.4 rad.
    assert bad.phase_sum_rms_rad > 1.0
    square = correct_drift(image, Q_NM[:2], sigma_nm=10 * PIX, pixel_size_nm=PIX, max_iter=1)
    assert square.phase_sum_rms_rad is None  # no closed triple, no check


def test_snap_to_pixels_and_note():
    off = Q_NM * 1.01  # 1 % off the integer bins: 16.16 and 14.14 cycles per frame
    result = correct_drift(lattice(), off, sigma_nm=10 * PIX, pixel_size_nm=PIX, max_iter=1, snap_to_pixels=True)
    assert_allclose(result.bragg_q_rad_per_nm, Q_NM, rtol=1e-12)  # derived: nearest integer bins
    assert result.snapped_to_pixels and "rounded to integer FFT bins" in result.note
    plain = correct_drift(lattice(), Q_NM, sigma_nm=10 * PIX, pixel_size_nm=PIX, max_iter=1)
    assert not plain.snapped_to_pixels and "used as given" in plain.note


def test_apply_displacement_matches_scipy_shift():
    rng = np.random.default_rng(3)
    image = ndimage.gaussian_filter(rng.normal(size=(64, 80)), 2.0)
    u = np.empty((2, 64, 80))
    u[0], u[1] = 0.3 * 0.05, -1.7 * 0.05  # (ux, uy) in nm at 0.05 nm per pixel
    out, outside = apply_displacement(image, u, pixel_size_nm=0.05)
    # Reference library: scipy.ndimage.shift(image, s)[o] = image[o - s], i.e. T(r - u) with s = (uy, ux) px.
    ref = ndimage.shift(image, (-1.7, 0.3), order=3, mode="nearest")
    assert_allclose(out[~outside], ref[~outside], atol=1e-12)
    # derived: source rows r + 1.7 > 63 for the last two rows, source col c - 0.3 < 0 for the first column.
    expected = np.zeros((64, 80), bool)
    expected[-2:] = True
    expected[:, 0] = True
    assert np.array_equal(outside, expected) and np.all(np.isnan(out[outside]))


def test_apply_displacement_stack_dtype_nan_dask():
    import dask.array as da

    rng = np.random.default_rng(4)
    stack = rng.normal(size=(3, 40, 50)).astype(np.float32)
    stack[1, 20, 25] = np.nan
    u = 0.1 * rng.normal(size=(2, 40, 50))
    out, outside = apply_displacement(stack, u, pixel_size_nm=1.0)
    assert out.dtype == np.float32  # dtype kept (common practice, scikit-image style)
    for k in range(3):
        plane, _ = apply_displacement(stack[k].astype(float), u, pixel_size_nm=1.0)
        assert_allclose(out[k], plane, rtol=1e-6, atol=1e-6, equal_nan=True)  # derived: same u per plane
    # derived: a NaN reaches only output points whose spline support touches it, not the whole plane.
    assert np.isnan(out[1, 20, 25]) and np.isfinite(out[1, 5, 5]) and np.all(np.isfinite(out[0][~outside]))
    lazy, lazy_outside = apply_displacement(da.from_array(stack, chunks=(1, 20, 25)), u, pixel_size_nm=1.0)
    assert_allclose(lazy.compute(), out, rtol=0, atol=0, equal_nan=True)  # derived: same arithmetic
    assert np.array_equal(lazy_outside, outside)


def test_bad_arguments():
    image = lattice()
    with pytest.raises(domains.InputError, match="bragg_q"):
        displacement_field(image, [[1.0, 0.0], [2.0, 0.0]], sigma_nm=0.25, pixel_size_nm=PIX)
    with pytest.raises(domains.InputError, match="bragg_q"):
        displacement_field(image, [[1.0, 0.0]], sigma_nm=0.25, pixel_size_nm=PIX)
    with pytest.raises(domains.InputError, match="translation"):
        displacement_field(image, Q_NM, sigma_nm=0.25, pixel_size_nm=PIX, translation="keep")
    with pytest.raises(domains.InputError, match="image"):
        displacement_field(image[0], Q_NM, sigma_nm=0.25, pixel_size_nm=PIX)
    with pytest.raises(domains.InputError, match="u must have shape"):
        apply_displacement(image, np.zeros((2, 10, 10)), pixel_size_nm=PIX)
    with pytest.raises(domains.InputError, match="order"):
        apply_displacement(image, np.zeros((2, N, N)), pixel_size_nm=PIX, order=7)
    with pytest.raises(domains.InputError, match="max_iter"):
        correct_drift(image, Q_NM, sigma_nm=0.25, pixel_size_nm=PIX, max_iter=0)
    with pytest.raises(domains.InputError, match="tol_rad"):
        correct_drift(image, Q_NM, sigma_nm=0.25, pixel_size_nm=PIX, tol_rad=-1)
    with pytest.raises(domains.InputError, match="mask"):
        correct_drift(image, Q_NM, sigma_nm=0.25, pixel_size_nm=PIX, mask=np.zeros((3, 3), bool))
    with pytest.raises(domains.InputError, match="drift"):
        correct_channels(image, {"u_nm": 0})
