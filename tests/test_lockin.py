"""Tests of the spatial lock-in against analytic waves, a real-space reference filter and its dask path."""

import math

import dask.array as da
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage

import domains
from domains import InputError, amplitude, choose_sigma, local_wavevector, lockin, phase, trusted_mask

N = 256


def wave(q_px, amplitude_=1.0, phi=0.0, shape=(N, N)):
    """A0 cos(q . r + phi) with x = col, y = row, q in rad/px (pixel size 1 nm)."""
    rows, cols = np.mgrid[: shape[0], : shape[1]].astype(float)
    return amplitude_ * np.cos(q_px[0] * cols + q_px[1] * rows + phi)


def inner(shape, margin):
    """Pixels at least `margin` pixels from every edge."""
    keep = np.zeros(shape, bool)
    keep[margin : shape[0] - margin, margin : shape[1] - margin] = True
    return keep


def real_space_reference(image, q, sigma_px, pixel_size):
    """G * [I cos(q.r)] - i G * [I sin(q.r)] with scipy's Gaussian filter (zero outside the frame)."""
    dy, dx = pixel_size
    rows, cols = np.mgrid[: image.shape[0], : image.shape[1]].astype(float)
    arg = q[0] * cols * dx + q[1] * rows * dy
    filt = lambda f: ndimage.gaussian_filter(f, sigma_px, mode="constant", truncate=8)  # noqa: E731
    return filt(image * np.cos(arg)) - 1j * filt(image * np.sin(arg))


# --- docs/methods.md §1 check values --------------------------------------------------------------------


def test_methods_check_values():
    q = 2 * np.pi * np.array([20, 7]) / N
    a = lockin(wave(q, 1.7, 0.9), q, sigma_nm=8, pixel_size_nm=1, boundary="periodic")
    # docs/methods.md §1 [derived]: 2|A| = A0 = 1.7 and arg A = phi = 0.9 to 1e-9 on a periodic image.
    assert_allclose(amplitude(a), 1.7, rtol=0, atol=1e-9)
    assert_allclose(phase(a), 0.9, rtol=0, atol=1e-9)


def test_detuned_wave_and_local_wavevector():
    q_ref = 2 * np.pi * np.array([20, 7]) / N
    q_true = q_ref + np.array([2 * np.pi * 1.5 / N, 0.0])  # 1.5 bins off: not periodic in the frame
    a = lockin(wave(q_true, 1.7, 0.9), q_ref, sigma_nm=8, pixel_size_nm=1)
    deep = inner(a.shape, 48)  # >= 6 sigma from the edges: the normalised filter is the full Gaussian there
    expected = 1.7 * math.exp(-(8**2) * (2 * np.pi * 1.5 / N) ** 2 / 2)
    assert_allclose(expected, 1.62784, atol=5e-6)  # docs/methods.md §1 check value [derived]
    # derived: 2|A| = A0 exp(-sigma^2 dq^2 / 2); Gaussian mass beyond 6 sigma is 1.5e-8.
    assert_allclose(amplitude(a)[deep], expected, rtol=1e-6)
    k = local_wavevector(a, q_ref, pixel_size_nm=1)
    # derived: q_ref + grad(phi) = q_true; central differences return sin(dq)/1 for dq, a bias of
    # dq^3 / 6 = 8.3e-6 rad/px at dq = 0.0368 rad/px.
    assert_allclose(k[0][deep], q_true[0], rtol=0, atol=1e-5)
    assert_allclose(k[1][deep], q_true[1], rtol=0, atol=1e-5)


# --- real-space reference, several q, noise -----------------------------------------------------


@pytest.mark.parametrize("pixel_size", [1.0, (0.05, 0.04)])
def test_matches_real_space_gaussian_filter(pixel_size):
    rng = np.random.default_rng(11)
    shape = (128, 96)
    dy, dx = domains.pixel_size_pair(pixel_size)
    q = np.array([[2 * np.pi * 13 / (96 * dx), 2 * np.pi * 5 / (128 * dy)], [-0.3 / dx, 0.9 / dy], [0.7 / dx, -0.2 / dy]])
    rows, cols = np.mgrid[:128, :96].astype(float)
    image = sum((1 + j) * np.cos(qj[0] * cols * dx + qj[1] * rows * dy + j) for j, qj in enumerate(q))
    image += rng.normal(scale=0.5, size=shape)
    sigma_nm = 3 * max(dy, dx)
    a = lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size)
    assert a.shape == (3,) + shape
    sigma_px = (sigma_nm / dy, sigma_nm / dx)
    # Away from the edges (>= 6 sigma, Gaussian tail 1.5e-8) the normalised filter and scipy's
    # constant-mode filter are both the full convolution (reference library: scipy.ndimage).
    deep = np.zeros(shape, bool)
    my, mx = math.ceil(6 * sigma_px[0]), math.ceil(6 * sigma_px[1])
    deep[my:-my, mx:-mx] = True
    for j, qj in enumerate(q):
        ref = real_space_reference(image, qj, sigma_px, (dy, dx))
        assert_allclose(a[j][deep], ref[deep], rtol=0, atol=1e-6)


def test_crop_phase_differs_by_q_dot_r0():
    rng = np.random.default_rng(5)
    q = 2 * np.pi * np.array([0.11, -0.07])
    image = wave(q, 1.0, 0.3, (160, 160)) + rng.normal(scale=0.3, size=(160, 160))
    full = lockin(image, q, sigma_nm=4, pixel_size_nm=0.5)
    r0 = (37, 21)  # (row, col) of the crop origin
    crop = lockin(image[r0[0] :, r0[1] :], q, sigma_nm=4, pixel_size_nm=0.5)
    # derived: A_crop(r') = exp(i q . r0) A_full(r' + r0), r0 = (x0, y0) = (21, 37) * 0.5 nm.
    shift = np.exp(1j * (q[0] * r0[1] * 0.5 + q[1] * r0[0] * 0.5))
    sub = full[r0[0] :, r0[1] :]
    deep = inner(crop.shape, 48)  # 6 sigma (8 px each) from the crop's and the frame's edges
    assert_allclose(crop[deep], shift * sub[deep], rtol=0, atol=1e-9)


# --- dask path --------------------------------------------------------------------------------


CHUNKS = ((50, 70, 36, 100), (33, 90, 133))


@pytest.mark.parametrize("with_mask", [False, True])
def test_dask_equals_memory(with_mask):
    rng = np.random.default_rng(7)
    q = 2 * np.pi * np.array([[20, 7], [-5, 30], [11, -13]]) / N
    image = (sum(wave(qj, 1.0 + j, j) for j, qj in enumerate(q)) + rng.normal(scale=0.5, size=(N, N))).astype(np.float32)
    mask = None
    if with_mask:
        rows, cols = np.mgrid[:N, :N]
        # Straddles chunk borders; radius 6 px = 3 sigma keeps some weight at its centre (exp(-4.5) = 0.011).
        mask = (rows - 120) ** 2 + (cols - 88) ** 2 < 6**2
        mask[200:203, :] = True
    memory = lockin(image, q, sigma_nm=2.0, pixel_size_nm=1.0, mask=mask)
    lazy = lockin(da.from_array(image, chunks=CHUNKS), q, sigma_nm=2.0, pixel_size_nm=1.0, mask=mask)
    assert isinstance(lazy, da.Array)
    result = lazy.compute()
    # docs/README.md: chunked and in-memory results agree to float32 precision. A normalised convolution
    # divides by the filtered weight w = G * valid, so a rounding error of 1e-6 of the numerator
    # becomes 1e-6 / w of the result (derived; w from scipy.ndimage, the reference library).
    scale = np.nanmax(np.abs(memory))
    valid = np.ones((N, N)) if mask is None else (~mask).astype(float)
    w = ndimage.gaussian_filter(valid, 2.0, mode="constant", truncate=8)
    assert np.array_equal(np.isnan(result), np.isnan(memory))
    finite = np.isfinite(memory).all(axis=0)
    assert_allclose(result[:, finite], memory[:, finite], rtol=0, atol=1e-6 * scale / w[finite].min())
    assert np.all(np.abs(result - memory)[:, finite] <= 1e-6 * scale / w[finite])


def test_dask_keeps_float32_dtype():
    image = np.zeros((64, 64), np.float32)
    lazy = lockin(da.from_array(image, chunks=32), [0.5, 0.0], sigma_nm=2.0, pixel_size_nm=1.0)
    memory = lockin(image, [0.5, 0.0], sigma_nm=2.0, pixel_size_nm=1.0)
    assert lazy.dtype == memory.dtype  # STYLE.md: float32 in, complex64 out (scikit-image practice)


def test_wide_mask_gives_nan_without_warning():
    image = wave(2 * np.pi * np.array([20, 7]) / N, shape=(64, 64))
    mask = np.zeros((64, 64), bool)
    mask[20:44, 20:44] = True  # 12 px = 6 sigma to its centre: no weight left there
    a = lockin(image, 2 * np.pi * np.array([20, 7]) / N, sigma_nm=2.0, pixel_size_nm=1.0, mask=mask)
    assert np.isnan(a[32, 32])  # documented: NaN where almost no valid neighbours (no warning, which pytest raises)


# --- edges ------------------------------------------------------------------------------------


def test_normalized_edge_keeps_amplitude():
    q = 2 * np.pi * np.array([20, 7]) / N
    sigma = 8.0
    image = wave(q, 1.7, 0.9)
    a = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1)
    cols = slice(48, N - 48)  # away from the side edges
    # derived: the normalised average of the constant term 1/2 A0 exp(i phi) is exact at the edge; the
    # conjugate term at 2q is cut by exp(-(2 q_x sigma)^2 / 2) = 4e-14 along the top edge.
    assert_allclose(amplitude(a)[0, cols], 1.7, rtol=1e-9)
    # derived: at the corner the conjugate term escapes only through two half-Gaussians,
    # |half transform| <= sqrt(2/pi) / (2 q sigma) each: product < 0.03.
    assert abs(amplitude(a)[0, 0] - 1.7) < 1.7 * 0.03
    # Contrast, plain zero padding (docs/methods.md §1: halves at an edge, quarters at a corner). On the pixel grid
    # the kept mass at the top row is sum_{n>=0} g(n) = (1 + g(0)) / 2, g(0) = 1 / (sqrt(2 pi) sigma) [derived].
    zero = real_space_reference(image, q, sigma, (1.0, 1.0))
    kept = (1 + 1 / (math.sqrt(2 * math.pi) * sigma)) / 2
    assert_allclose(2 * np.abs(zero[0, cols]), 1.7 * kept, rtol=1e-6)
    assert_allclose(2 * np.abs(zero[0, 0]), 1.7 * kept**2, rtol=0.03)  # same conjugate leakage as above


# --- noise ------------------------------------------------------------------------------------


def test_phase_noise_matches_analytic():
    rng = np.random.default_rng(2024)
    q = 2 * np.pi * np.array([20, 7]) / N
    a0, s, sigma = 1.0, 0.5, 4.0  # amplitude SNR A0/s = 2 per pixel
    samples = []
    for _ in range(2):
        image = wave(q, a0, 0.9) + rng.normal(scale=s, size=(N, N))
        a = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1, boundary="periodic")
        # Pixels 4 sigma apart: their filtered noise correlates by exp(-16 / 4) = 0.018, i.e. independent.
        samples.append(np.angle(a[::16, ::16] * np.exp(-0.9j)).ravel())
    samples = np.concatenate(samples)
    # derived: each quadrature of A has variance s^2 / 2 * sum G^2, sum G^2 = 1 / (4 pi sigma^2), so
    # std(phi) = s sqrt(1 / (8 pi sigma^2)) / (A0 / 2) = 0.0499 rad.
    expected = s * math.sqrt(1 / (8 * math.pi * sigma**2)) / (a0 / 2)
    measured = np.std(samples)
    # 512 samples: the std estimate scatters by 1 / sqrt(2 * 512) = 3 %; the brief's 1.5x bound, both ways.
    assert expected / 1.5 < measured < 1.5 * expected
    assert abs(measured / expected - 1) < 0.15  # 5 standard errors of the estimate (derived)


# --- masks ------------------------------------------------------------------------------------


def test_mask_does_not_bias():
    q = 2 * np.pi * np.array([20, 7]) / N
    sigma = 6.0
    image = wave(q, 1.7, 0.9, (160, 160))
    mask = np.zeros((160, 160), bool)
    mask[60:90, 50:75] = True
    dirty = image.copy()
    dirty[mask] = 1e3  # garbage under the mask
    dirty[100, 120] = np.nan  # a NaN counts as masked
    a = lockin(dirty, q, sigma_nm=sigma, pixel_size_nm=1, mask=mask)
    trusted = trusted_mask((160, 160), sigma_nm=sigma, pixel_size_nm=1, mask=mask | np.isnan(dirty))
    # derived: the constant term is exact after normalisation; the conjugate term leaks at most the
    # Gaussian mass m cut away, relative to the kept mass: a trusted pixel is >= 2.5 sigma from the mask and
    # from the frame edge, two half-planes at most, m <= 2 Phi(-2.5) = 0.0124, bound m / (1 - m).
    m = 2 * 0.5 * math.erfc(2.5 / math.sqrt(2))
    bound = m / (1 - m)
    assert_allclose(amplitude(a)[trusted], 1.7, rtol=bound)
    assert np.max(np.abs(phase(a)[trusted] - 0.9)) < bound
    unmasked = lockin(np.nan_to_num(dirty), q, sigma_nm=sigma, pixel_size_nm=1)
    assert np.max(np.abs(amplitude(unmasked)[trusted] - 1.7)) > 1.0  # contrast: the garbage would show


def test_trusted_mask_margins():
    sigma, pixel = 2.0, 0.5  # sigma = 4 px, 2.5 sigma = 10 px
    mask = np.zeros((80, 80), bool)
    mask[40, 40] = True
    t = trusted_mask((80, 80), sigma_nm=sigma, pixel_size_nm=pixel, mask=mask)
    rows, cols = np.mgrid[:80, :80]
    to_mask = np.hypot(rows - 40, cols - 40) * pixel
    to_edge = (np.minimum.reduce([rows, cols, 79 - rows, 79 - cols]) + 0.5) * pixel  # edge: half a pixel out
    distance = np.minimum(to_mask, to_edge)
    # docs/methods.md §1 (2-3 sigma, common practice): nothing closer than 2.5 sigma is trusted; everything
    # more than 2.5 sigma + 1 pixel away is.
    assert not np.any(t & (distance < 2.5 * sigma))
    assert np.all(t[distance >= 2.5 * sigma + pixel])


# --- choose_sigma -----------------------------------------------------------------------------


def test_choose_sigma_leakage():
    q1 = 2 * np.pi * np.array([40, 0]) / N
    q2 = 2 * np.pi * np.array([40, 12]) / N  # the nearest neighbour of q1, 12 bins away
    sigma, dk = choose_sigma([q1, q2], leakage=0.01)
    # docs/methods.md §1 [derived]: sigma dk = sqrt(2 ln 100) = 3.035 for 1 % leakage.
    assert_allclose(sigma * dk, math.sqrt(2 * math.log(100)), rtol=1e-12)
    assert_allclose(round(sigma * dk, 2), 3.03, atol=0.005)
    assert_allclose(dk, 2 * np.pi * 12 / N, rtol=1e-12)
    a = lockin(wave(q1) + wave(q2), q1, sigma_nm=sigma, pixel_size_nm=1, boundary="periodic")
    # Measured: the neighbour appears as a ripple of relative size exp(-sigma^2 dk^2 / 2) = 1 % (derived);
    # the other peaks (-q1, -q2) are >= 80 bins away and add < 1e-30.
    ripple = np.max(np.abs(2 * a - 1))
    assert ripple <= 0.01 * (1 + 1e-9)
    assert_allclose(ripple, 0.01, rtol=1e-6)


# --- bad arguments ----------------------------------------------------------------------------


def test_bad_arguments():
    image = np.zeros((64, 64))
    with pytest.raises(InputError, match="Nyquist"):
        lockin(image, [4.0, 0.0], sigma_nm=2, pixel_size_nm=1)  # pi rad/px is the limit
    with pytest.raises(InputError, match="sigma_nm must be positive"):
        lockin(image, [1.0, 0.0], sigma_nm=0, pixel_size_nm=1)
    with pytest.raises(InputError, match="sigma_nm must be positive"):
        lockin(image, [1.0, 0.0], sigma_nm=-1, pixel_size_nm=1)
    with pytest.raises(InputError, match="larger than half the image"):
        lockin(image, [1.0, 0.0], sigma_nm=33, pixel_size_nm=1)
    with pytest.raises(InputError, match="2 x 2|2-D"):
        lockin(np.zeros((0, 5)), [1.0, 0.0], sigma_nm=1, pixel_size_nm=1)
    with pytest.raises(InputError, match="2-D"):
        lockin(np.zeros(64), [1.0, 0.0], sigma_nm=1, pixel_size_nm=1)
    with pytest.raises(InputError, match="mask shape"):
        lockin(image, [1.0, 0.0], sigma_nm=2, pixel_size_nm=1, mask=np.zeros((64, 63), bool))
    with pytest.raises(InputError, match="boundary"):
        lockin(image, [1.0, 0.0], sigma_nm=2, pixel_size_nm=1, boundary="mirror")
    with pytest.raises(InputError, match="periodic"):
        lockin(da.zeros((64, 64), chunks=32), [1.0, 0.0], sigma_nm=2, pixel_size_nm=1, boundary="periodic")
    with pytest.raises(InputError, match="leakage"):
        choose_sigma([[1.0, 0.0]], leakage=1.5)
    assert issubclass(InputError, ValueError)  # docs/README.md: bad input is a ValueError


# --- kernel: dtypes, textbook agreement with masks, decimated grid --------------------------------


def textbook_normalised(image, valid, q, sigma_px):
    """G * [w I exp(-i q.r)] / G * w with scipy's constant-mode Gaussian filter (the textbook script)."""
    w = valid.astype(float)
    filt = lambda f: ndimage.gaussian_filter(f, sigma_px, mode="constant", truncate=8)  # noqa: E731
    rows, cols = np.mgrid[: image.shape[0], : image.shape[1]].astype(float)
    arg = q[0] * cols + q[1] * rows
    data = np.where(valid, image, 0.0)
    return (filt(data * np.cos(arg)) - 1j * filt(data * np.sin(arg))) / filt(w), filt(w)


@pytest.mark.parametrize(
    "dtype, expected", [(np.float32, np.complex64), (np.float64, np.complex128), (np.int16, np.complex128)]
)
@pytest.mark.parametrize("step", [None, 3])
def test_dtype_in_out(dtype, expected, step):
    image = (100 * wave(2 * np.pi * np.array([9, 4]) / 64, shape=(64, 64))).astype(dtype)
    q = [2 * np.pi * 9 / 64, 2 * np.pi * 4 / 64]
    mask = np.zeros((64, 64), bool)
    mask[10:14, 30:33] = True
    for m in (None, mask):
        a = lockin(image, q, sigma_nm=3.0, pixel_size_nm=1.0, mask=m, step=step)
        # common practice, no source (scikit-image keeps float32 as float32): float32 in, complex64 out.
        assert a.dtype == expected
        lazy = lockin(da.from_array(image, chunks=(20, 45)), q, sigma_nm=3.0, pixel_size_nm=1.0, mask=m, step=step)
        assert lazy.dtype == expected and lazy.compute().dtype == expected


@pytest.mark.parametrize("sigma", [4.0, 1.2])
@pytest.mark.parametrize("dtype, rtol", [(np.float64, 1e-9), (np.float32, 2e-5)])
def test_masked_edges_match_textbook_normalised_convolution(dtype, rtol, sigma):
    rng = np.random.default_rng(3)
    shape = (150, 130)
    q = 2 * np.pi * np.array([0.137, -0.061])
    image = wave(q, 1.7, 0.9, shape) + 0.3 * wave(2 * np.pi * np.array([0.05, 0.21]), 1.0, 0.2, shape)
    image += rng.normal(scale=0.4, size=shape)
    mask = np.zeros(shape, bool)
    mask[40:70, 90:101] = True
    mask[120, :] = True
    image[mask] = 50.0  # garbage under the mask
    a = lockin(image.astype(dtype), q, sigma_nm=sigma, pixel_size_nm=1.0, mask=mask)
    ref, w = textbook_normalised(image, ~mask, q, sigma)
    # Reference library scipy.ndimage: the normalised convolution everywhere, edges and mask rims
    # included (zero padding of 6 sigma: the wrapped tail is 1e-9 of the weight). float64: rounding;
    # float32: a rounding of ~1e-6 of the largest term divided by the weight w (derived). At sigma = 1.2 px the
    # kernel is still scipy's sampled Gaussian: the periodic transfer is its spectrum (Poisson summation), whose
    # sum 1 + 2 exp(-2 pi^2 sigma^2) = 1 + 1e-12 cancels in the normalisation (derived).
    ok = w > 0.05
    scale = np.abs(image).max()
    assert_allclose(a[ok], ref[ok], rtol=0, atol=rtol * scale / w[ok].min())
    # derived: the lock-in is linear in I; the second call with the same mask reuses the stored normaliser.
    again = lockin((-2 * image).astype(dtype), q, sigma_nm=sigma, pixel_size_nm=1.0, mask=mask)
    assert_allclose(again[ok], -2 * a[ok], rtol=0, atol=2 * rtol * scale / w[ok].min())


def test_textbook_real_space_float32_within_1e3_away_from_edges():
    rng = np.random.default_rng(8)
    n, sigma = 192, 8.0
    q = 2 * np.pi * np.array([[0.11, 0.03], [-0.04, 0.1], [0.07, -0.09]])
    image = sum((1 + j) * wave(qj, 1.0, j, (n, n)) for j, qj in enumerate(q)) + rng.normal(scale=0.5, size=(n, n))
    a = lockin(image.astype(np.float32), q, sigma_nm=sigma, pixel_size_nm=1.0)
    assert a.dtype == np.complex64
    deep = inner((n, n), 48)
    for j, qj in enumerate(q):
        ref = real_space_reference(image, qj, sigma, (1.0, 1.0))
        # The brief's bar (amplitude within 1e-3 of the scipy.ndimage textbook lock-in away from the edges,
        # >= 6 sigma); float32 rounding is ~1e-6 of the image scale (derived).
        assert np.max(np.abs(2 * np.abs(a[j][deep]) - 2 * np.abs(ref[deep]))) < 1e-3
        assert_allclose(a[j][deep], ref[deep], rtol=0, atol=1e-5 * np.abs(image).max())


def test_methods_check_values_float32_and_decimated():
    q = 2 * np.pi * np.array([20, 7]) / N
    image = wave(q, 1.7, 0.9).astype(np.float32)
    for step in (None, 4):
        a = lockin(image, q, sigma_nm=8, pixel_size_nm=1, boundary="periodic", step=step)
        # docs/methods.md §1 [derived]: 2|A| = 1.7, arg A = 0.9; float32 image: rounding 1e-7 relative (6e-8 of 1.7,
        # a few ulps after the FFTs, derived).
        assert_allclose(amplitude(a), 1.7, rtol=2e-6)
        assert_allclose(phase(a), 0.9, rtol=0, atol=2e-6)
    q_true = q + np.array([2 * np.pi * 1.5 / N, 0.0])
    a = lockin(wave(q_true, 1.7, 0.9), q, sigma_nm=8, pixel_size_nm=1, step=4)
    assert a.shape == (64, 64)
    # docs/methods.md §1 check value [derived]: detuned by 2 pi 1.5 / 256 px^-1 -> 2|A| = 1.62784 (5 digits given),
    # at the sampled pixels >= 6 sigma from the edges.
    assert_allclose(amplitude(a)[12:-12, 12:-12], 1.62784, atol=5e-6)


@pytest.mark.parametrize(
    "shape, step, pixel, sigma, masked",
    [((200, 170), 4, 1.0, 8.0, False), ((201, 163), 3, 1.0, 6.0, True), ((130, 140), 5, (0.05, 0.04), 0.4, False),
     ((120, 120), 16, 1.0, 3.0, False), ((97, 101), 2, 1.0, 2.5, True)],
)
def test_decimated_equals_full_at_sampled_pixels(shape, step, pixel, sigma, masked):
    rng = np.random.default_rng(21)
    dy, dx = domains.pixel_size_pair(pixel)
    q = np.array([[0.9 / dx, 0.3 / dy], [-0.5 / dx, 1.3 / dy]])
    rows, cols = np.mgrid[: shape[0], : shape[1]].astype(float)
    image = sum(np.cos(qj[0] * cols * dx + qj[1] * rows * dy + j) for j, qj in enumerate(q))
    image += rng.normal(scale=0.5, size=shape)
    mask = None
    if masked:
        mask = np.hypot(rows - 60, cols - 50) < 7
    full = lockin(image, q, sigma_nm=sigma, pixel_size_nm=pixel, mask=mask)
    coarse = lockin(image, q, sigma_nm=sigma, pixel_size_nm=pixel, mask=mask, step=step)
    assert coarse.shape == (2, -(-shape[0] // step), -(-shape[1] // step))
    # derived (Poisson summation): sampling every step-th pixel folds the spectrum modulo P/step bins, so the
    # decimated result is the same filter at the sampled pixels, even for steps beyond lossless_step (16 px at
    # sigma = 3 px). The two use FFT grids of different lengths, so they differ by the Gaussian tail that
    # wraps round the zero padding of 6 sigma, erfc(6 / sqrt 2) / 2 = 1e-9 per edge, of the image scale and
    # divided by the weight w >= 0.25 at a corner; the transfer truncation (1e-16) and float64 rounding are
    # smaller (derived). Away from the edges only rounding is left.
    scale = np.abs(image).max()
    sampled = full[:, ::step, ::step]
    assert np.array_equal(np.isnan(coarse), np.isnan(sampled))
    tail = math.erfc(6 / math.sqrt(2))
    assert_allclose(coarse, sampled, rtol=0, atol=tail * scale / 0.25, equal_nan=True)
    my, mx = -(-6 * sigma / dy // step), -(-6 * sigma / dx // step)
    middle = (slice(None), slice(int(my), -int(my) or None), slice(int(mx), -int(mx) or None))
    assert_allclose(coarse[middle], sampled[middle], rtol=0, atol=1e-12 * scale, equal_nan=True)


@pytest.mark.parametrize("sigma", [2.0, 1.1])
@pytest.mark.parametrize("step", [None, 3])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_dask_equals_memory_irregular_chunks_and_step(step, dtype, sigma):
    rng = np.random.default_rng(17)
    shape = (181, 157)
    q = 2 * np.pi * np.array([[0.13, 0.05], [-0.07, 0.17]])
    image = (sum(wave(qj, 1.0 + j, j, shape) for j, qj in enumerate(q)) + rng.normal(scale=0.5, size=shape)).astype(dtype)
    image[100, 77] = np.nan  # NaN counts as masked, in every chunk
    chunks = ((41, 17, 60, 63), (29, 70, 11, 47))  # irregular, some smaller than the 12-px overlap
    # sigma = 1.1 px: the Gaussian transfer still holds exp(-(1.1 pi)^2 / 2) = 2.6e-3 at k = pi, so the kernel
    # must be the sampled Gaussian (periodic transfer), not one that depends on each chunk's FFT length.
    memory = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1.0, step=step)
    lazy = lockin(da.from_array(image, chunks=chunks), q, sigma_nm=sigma, pixel_size_nm=1.0, step=step)
    result = lazy.compute()
    assert result.shape == memory.shape and result.dtype == memory.dtype
    # docs/README.md: chunked and in-memory agree to float32 precision. float32: rounding of 1e-6 of the numerator;
    # float64: the Gaussian tail beyond the 6-sigma overlap and zero padding, erfc(6 / sqrt 2) / 2 = 1e-9 per
    # side; both divided by the weight w >= 0.2 left next to the NaN pixel (derived).
    rel = 2e-6 if dtype == np.float32 else 2 * math.erfc(6 / math.sqrt(2))
    tol = rel * np.nanmax(np.abs(image)) / 0.2
    assert np.array_equal(np.isnan(result), np.isnan(memory))
    assert_allclose(result, memory, rtol=0, atol=tol, equal_nan=True)


def test_lossless_step():
    # derived: s = floor(pi sigma / c) with c = sqrt(2 ln(1 / tolerance)); c = 5.257 at 1e-6.
    assert domains._lockin.lossless_step(8.0, 1.0) == math.floor(math.pi * 8 / math.sqrt(2 * math.log(1e6)))
    assert domains._lockin.lossless_step(8.0, 1.0) == 4  # about sigma / 2
    assert domains._lockin.lossless_step(0.8, (0.1, 0.2)) == 2  # the coarser axis (sigma = 4 px) sets it
    assert domains._lockin.lossless_step(1.0, 1.0) == 1
    # derived: at the lossless step the band of A (|k - q| <= c / sigma) fits in the 2 pi / s of the decimated
    # grid: a periodic field sampled every s pixels is brought back by zero padding its spectrum.
    n, sigma = 128, 8.0
    q = 2 * np.pi * np.array([20, 7]) / n
    rng = np.random.default_rng(4)
    image = wave(q, 1.0, 0.3, (n, n)) * (1 + 0.5 * wave(2 * np.pi * np.array([2, 1]) / n, shape=(n, n)))
    image += rng.normal(scale=0.3, size=(n, n))
    s = domains._lockin.lossless_step(sigma, 1.0)
    full = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1, boundary="periodic")
    coarse = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1, boundary="periodic", step=s)
    rows, cols = np.mgrid[:n, :n]
    # C = A exp(i q.r) has its spectrum within c / sigma of q (bins 20, 7); undo the sampling: put the decimated
    # spectrum back at the bins around q, zero elsewhere (band-limited interpolation, numpy.fft).
    c = coarse * np.exp(1j * (q[0] * cols[::s, ::s] + q[1] * rows[::s, ::s]))
    spec = np.fft.fft2(c) * s * s
    m = n // s
    up = np.zeros((n, n), complex)
    for ky in range(m):
        for kx in range(m):
            by = 7 + ((ky - 7 + m // 2) % m) - m // 2
            bx = 20 + ((kx - 20 + m // 2) % m) - m // 2
            up[by % n, bx % n] = spec[ky, kx]
    back = np.fft.ifft2(up) * np.exp(-1j * (q[0] * cols + q[1] * rows))
    # The aliased tail: transfer beyond pi / s = 0.785 rad/px from q, exp(-(sigma pi / s)^2 / 2) = 2.9e-9,
    # times sqrt(sum I^2) / N^2 ... bounded by the tolerance 1e-6 of lossless_step (derived).
    assert_allclose(back, full, rtol=0, atol=1e-6)


def test_bad_step():
    image = np.zeros((64, 64))
    for bad in (0, -2, 1.5, True, "4"):
        with pytest.raises(InputError, match="step"):
            lockin(image, [1.0, 0.0], sigma_nm=2, pixel_size_nm=1, step=bad)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_threaded_tiles_equal_full_resolution_and_analytic_wave(dtype, monkeypatch):
    # The threaded path (tiles of rows and of k_x bins shared among threads) on a small image: the threshold is
    # lowered so it runs here; with two threads at least, the tasks really interleave.
    monkeypatch.setattr(domains._lockin, "_THREADED_PIXELS", 0)
    monkeypatch.setattr(domains._lockin, "_threads", lambda: 3)
    monkeypatch.setattr(domains._lockin, "_TILE_ELEMENTS", 1 << 11)  # many small tiles and row blocks
    monkeypatch.setattr(domains._lockin, "_ROW_TILE", 1 << 12)
    shape, sigma, step = (203, 190), 6.0, 3
    q = 2 * np.pi * np.array([[0.15, 0.04], [-0.04, 0.17], [0.2, -0.22]])
    image = sum(wave(qj, 1.0 + j, 0.4 * j, shape) for j, qj in enumerate(q)).astype(dtype)
    full = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1.0)
    coarse = lockin(image, q, sigma_nm=sigma, pixel_size_nm=1.0, step=step)
    # derived (Poisson summation): the decimated result is the full one at the sampled pixels, up to the Gaussian
    # tail wrapping round the zero padding, erfc(6 / sqrt 2) / 2 = 1e-9 of the image scale per edge over the
    # corner weight 0.25, and rounding (float32: ~1e-6 of the scale after the FFTs, derived).
    scale = np.abs(image).max()
    rounding = 2e-6 if dtype == np.float32 else 1e-12
    assert_allclose(coarse, full[:, ::step, ::step], rtol=0, atol=(rounding + math.erfc(6 / math.sqrt(2))) * scale / 0.25)
    # docs/methods.md §1 [derived]: for I = sum_j A_j cos(q_j.r + phi_j), 2|A| = A_j and arg A = phi_j at q_j,
    # up to the leakage of the other waves and their mirror images, exp(-sigma^2 dk^2 / 2) = 4e-8 of an amplitude
    # <= 3 here (nearest dk = 0.975 rad/px), >= 6 sigma from the edges.
    m = -(-36 // step)
    tol = rounding * scale + 2 * 3 * math.exp(-((sigma * 0.975) ** 2) / 2)
    for j in range(len(q)):
        a = coarse[j, m:-m, m:-m]
        assert_allclose(amplitude(a), 1.0 + j, rtol=0, atol=tol)
        assert_allclose(phase(a), 0.4 * j, rtol=0, atol=tol / (1.0 + j))


@pytest.mark.parametrize("threaded", [False, True])
@pytest.mark.parametrize("step", [None, 4])
def test_nan_and_inf_pixels_count_as_masked(step, threaded, monkeypatch):
    # The kernel looks for NaN and inf in the row sums its real FFT gives (no pass of its own over the image);
    # lockin's docstring: NaN pixels count as masked. inf pixels too: a non-finite pixel has no value to average.
    if threaded:
        monkeypatch.setattr(domains._lockin, "_THREADED_PIXELS", 0)
        monkeypatch.setattr(domains._lockin, "_ROW_TILE", 1 << 12)
    rng = np.random.default_rng(5)
    shape = (150, 170)
    q = 2 * np.pi * np.array([[0.13, 0.05], [-0.07, 0.17]])
    image = sum(wave(qj, 1.0 + j, j, shape) for j, qj in enumerate(q)) + rng.normal(scale=0.3, size=shape)
    bad = np.zeros(shape, bool)
    bad[149, 3] = bad[70, 90] = bad[0, 169] = True  # the last row, the middle, the first row
    broken = image.copy()
    broken[149, 3], broken[70, 90], broken[0, 169] = np.nan, np.inf, -np.inf
    a = lockin(broken, q, sigma_nm=3.0, pixel_size_nm=1.0, step=step)
    expected = lockin(np.where(bad, 0.0, image), q, sigma_nm=3.0, pixel_size_nm=1.0, mask=bad, step=step)
    # Same arithmetic on the same finite pixels: equal to rounding (derived).
    assert np.isfinite(a).all()
    assert_allclose(a, expected, rtol=0, atol=1e-12 * np.abs(image).max())
    with pytest.raises(InputError, match="periodic"):
        lockin(broken, q, sigma_nm=3.0, pixel_size_nm=1.0, boundary="periodic", step=step)
