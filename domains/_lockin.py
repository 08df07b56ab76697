"""Spatial lock-in: demodulate an image at wavevectors q to get local amplitude, phase and wavevector."""

from __future__ import annotations

import math

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

from ._checks import positive, within_nyquist
from ._errors import InputError
from ._scan import _is_dask, pixel_size_pair

#: Gaussian support, in units of sigma, kept by the chunked path (overlap) and by the
#: zero padding of the in-memory path. The 2-D Gaussian mass beyond 6 sigma is
#: exp(-18) = 1.5e-8, below float32 precision, so chunked and in-memory results agree.
TRUNCATE = 6.0

BOUNDARIES = ("normalized", "periodic")


def _as_q_array(q) -> tuple[np.ndarray, bool]:
    q = np.asarray(q, dtype=float)
    single = q.ndim == 1
    q = np.atleast_2d(q)
    if q.ndim != 2 or q.shape[1] != 2:
        raise InputError(f"q must be one (qx, qy) pair or an array of shape (k, 2) in rad/nm, got shape {q.shape}")
    if not np.all(np.isfinite(q)):
        raise InputError(f"q must be finite, got {q.tolist()}")
    return q, single


def _check_q_sigma(q, sigma_nm, pixel_size, shape):
    within_nyquist(q, pixel_size)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    dy, dx = pixel_size
    height, width = shape[-2] * dy, shape[-1] * dx
    if sigma_nm > max(height, width) / 2:
        raise InputError(
            f"sigma_nm = {sigma_nm:g} nm is larger than half the image ({height:g} x {width:g} nm): "
            "the lock-in would average over the whole frame"
        )
    return sigma_nm


def _gaussian_transfer(shape, sigma_px, shift_px=(0.0, 0.0)):
    """exp(-sigma^2 |k - k0|^2 / 2) on the FFT grid, k in rad/px, k - k0 wrapped to [-pi, pi)."""
    ky = 2 * np.pi * np.fft.fftfreq(shape[0])[:, None] - shift_px[0]
    kx = 2 * np.pi * np.fft.fftfreq(shape[1])[None, :] - shift_px[1]
    ky = (ky + np.pi) % (2 * np.pi) - np.pi
    kx = (kx + np.pi) % (2 * np.pi) - np.pi
    return np.exp(-0.5 * (sigma_px[0] ** 2 * ky**2 + sigma_px[1] ** 2 * kx**2))


def _reference_wave(q, shape, pixel_size, offset=(0, 0)):
    """exp(-i (qx x + qy y)) with x = col * dx, y = row * dy in global pixel coordinates."""
    dy, dx = pixel_size
    rows = (offset[0] + np.arange(shape[0]))[:, None] * dy
    cols = (offset[1] + np.arange(shape[1]))[None, :] * dx
    return np.exp(-1j * (q[0] * cols + q[1] * rows))


def _demodulate_block(image, weights, q, sigma_px, pixel_size, offset, boundary, pad):
    """Lock-in of one in-memory block; the forward transform is shared by all q.

    The filter exp(-sigma^2|k - q|^2/2) applied to the image, followed by the
    reference wave, equals a Gaussian filter applied to image * reference
    (METHODS §1, Fourier form). With boundary="normalized" the block is zero padded
    by `pad` pixels (linear, not circular, convolution) and divided by the
    equally filtered weights (normalised convolution).
    """
    dy, dx = pixel_size
    ny, nx = image.shape
    out = np.empty((len(q), ny, nx), dtype=np.complex128)
    if boundary == "periodic":
        spectrum = sfft.fft2(image, workers=-1)
        for j, qj in enumerate(q):
            shift = (qj[1] * dy, qj[0] * dx)
            filtered = sfft.ifft2(spectrum * _gaussian_transfer((ny, nx), sigma_px, shift), workers=-1)
            out[j] = filtered * _reference_wave(qj, (ny, nx), pixel_size, offset)
        return out
    # At least `pad` zeros on each side (linear, not circular, convolution), rounded up to a
    # size the FFT handles fast.
    padded_shape = (sfft.next_fast_len(ny + 2 * pad[0]), sfft.next_fast_len(nx + 2 * pad[1]))
    core = (slice(pad[0], pad[0] + ny), slice(pad[1], pad[1] + nx))
    work = np.zeros(padded_shape)
    work[core] = np.where(weights > 0, image, 0.0) * weights
    spectrum = sfft.fft2(work, workers=-1)
    work[:] = 0.0
    work[core] = weights
    norm = sfft.ifft2(sfft.fft2(work, workers=-1) * _gaussian_transfer(padded_shape, sigma_px), workers=-1).real[core]
    # Below this the normalised convolution has almost nothing to average: report NaN.
    inverse = np.full(norm.shape, np.nan)
    np.divide(1.0, norm, out=inverse, where=norm > 1e-3)
    for j, qj in enumerate(q):
        shift = (qj[1] * dy, qj[0] * dx)
        filtered = sfft.ifft2(spectrum * _gaussian_transfer(padded_shape, sigma_px, shift), workers=-1)[core]
        out[j] = filtered * _reference_wave(qj, (ny, nx), pixel_size, offset) * inverse
    return out


def lockin(image, q, *, sigma_nm, pixel_size_nm, mask=None, boundary="normalized"):
    """Spatial lock-in: the complex local Fourier component A(r) of an image at q.

    A(r) = G_sigma * [I(r) exp(-i q.r)], with G_sigma a unit-sum Gaussian of
    width ``sigma_nm``. For I = A0 cos(q.r + phi), 2|A| = A0 and arg A = phi.

    Parameters
    ----------
    image : (row, col) array_like or dask array
        The image. A dask array gives a lazy dask result computed chunk by chunk.
    q : (2,) or (k, 2) array_like
        Wavevector(s) (qx, qy) in rad/nm, x along columns and y along rows.
    sigma_nm : float
        Width of the Gaussian low-pass filter in nm; the spatial resolution of
        the amplitude and phase maps is about ``sigma_nm``.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col).
    mask : (row, col) array of bool, optional
        True where pixels are untrusted; they are left out of the average
        (normalised convolution) and filled from their neighbours.
    boundary : {"normalized", "periodic"}
        "normalized" (default): zero outside the frame and the mask, divided by
        the filtered weight, so a straight edge does not halve the amplitude.
        "periodic": the frame is taken as periodic (exact for an image holding
        whole periods, and the Fourier form of METHODS §1).

    Returns
    -------
    A : complex ndarray or dask array
        Shaped like the image for a single q, else (k, row, col). The phase
        reference is pixel (0, 0) of the input array. Pixels with almost no
        valid neighbours are NaN.

    Raises
    ------
    InputError
        If q lies beyond the Nyquist limit, sigma is not positive or larger
        than half the frame, or the image is not 2-D.

    See Also
    --------
    amplitude, phase, local_wavevector, trusted_mask, choose_sigma

    References
    ----------
    .. [1] M. J. Lawler et al., "Intra-unit-cell electronic nematicity of the
       high-Tc copper-oxide pseudogap states", Nature 466, 347 (2010).
       doi:10.1038/nature09169
    .. [2] J. A. Slezak et al., "Imaging the impact on cuprate superconductivity
       of varying the interatomic distances within individual crystal unit
       cells", PNAS 105, 3203 (2008). doi:10.1073/pnas.0706795105

    Examples
    --------
    >>> import numpy as np
    >>> n, dx = 128, 0.1
    >>> y, x = np.mgrid[:n, :n] * dx
    >>> q = 2 * np.pi * np.array([16, 5]) / (n * dx)
    >>> image = 1.7 * np.cos(q[0] * x + q[1] * y + 0.9)
    >>> a = lockin(image, q, sigma_nm=1.0, pixel_size_nm=dx, boundary="periodic")
    >>> bool(np.allclose(2 * np.abs(a), 1.7) and np.allclose(np.angle(a), 0.9))
    True
    """
    if boundary not in BOUNDARIES:
        raise InputError(f"boundary must be one of {BOUNDARIES}, got {boundary!r}")
    lazy = _is_dask(image)
    if not lazy:
        image = np.asarray(image)
    if image.ndim != 2:
        raise InputError(f"lockin needs a 2-D image (row, col), got shape {tuple(image.shape)}")
    if min(image.shape) < 2:
        raise InputError(f"lockin needs an image of at least 2 x 2 pixels, got shape {tuple(image.shape)}")
    pixel_size = pixel_size_pair(pixel_size_nm)
    q, single = _as_q_array(q)
    sigma_nm = _check_q_sigma(q, sigma_nm, pixel_size, image.shape)
    sigma_px = (sigma_nm / pixel_size[0], sigma_nm / pixel_size[1])
    pad = (int(math.ceil(TRUNCATE * sigma_px[0])), int(math.ceil(TRUNCATE * sigma_px[1])))
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != tuple(image.shape):
            raise InputError(f"mask shape {mask.shape} differs from the image shape {tuple(image.shape)}")
    if lazy:
        result = _lockin_dask(image, q, sigma_px, pixel_size, mask, boundary, pad)
        if image.dtype == np.float32:
            result = result.astype(np.complex64)
    else:
        if np.iscomplexobj(image) or image.dtype.kind not in "biuf":
            raise InputError(f"lockin needs a real image, got dtype {image.dtype}")
        valid = np.isfinite(image)
        if mask is not None:
            valid &= ~mask
        if boundary == "periodic" and not valid.all():
            raise InputError("boundary='periodic' needs a complete image with no masked or NaN pixels")
        result = _demodulate_block(
            image.astype(float), valid.astype(float), q, sigma_px, pixel_size, (0, 0), boundary, pad
        )
        if image.dtype == np.float32:
            result = result.astype(np.complex64)
    return result[0] if single else result


def _lockin_dask(image, q, sigma_px, pixel_size, mask, boundary, pad):
    import dask.array as da
    from dask.array.overlap import ensure_minimum_chunksize, overlap

    if boundary == "periodic":
        raise InputError("boundary='periodic' is not available for dask arrays; use 'normalized'")
    # Every chunk must be at least as large as the overlap it lends its neighbours.
    chunks = tuple(ensure_minimum_chunksize(p, c) if len(c) > 1 else c for p, c in zip(pad, image.chunks))
    image = image.astype(float).rechunk(chunks)
    valid = da.isfinite(image)
    if mask is not None:
        valid = valid & ~da.from_array(mask, chunks=chunks)
    depth = {0: pad[0], 1: pad[1]}
    # boundary="none": no margin beyond the frame, so the outer edge is treated as in memory.
    image_ov = overlap(image, depth=depth, boundary="none")
    weights_ov = overlap(valid.astype(float), depth=depth, boundary="none")
    starts = [np.cumsum((0,) + c[:-1]) for c in chunks]

    def block(img, w, block_info=None):
        # A block's origin in the whole frame: its chunk start less the margin taken from above/left.
        loc = block_info[0]["chunk-location"]
        top = starts[0][loc[0]] - (pad[0] if loc[0] > 0 else 0)
        left = starts[1][loc[1]] - (pad[1] if loc[1] > 0 else 0)
        return _demodulate_block(img, w, q, sigma_px, pixel_size, (top, left), "normalized", pad)

    out = da.map_blocks(
        block, image_ov, weights_ov, new_axis=0,
        chunks=((len(q),),) + image_ov.chunks, dtype=np.complex128,
    )

    def trim(blk, block_info=None):
        loc, num = block_info[0]["chunk-location"], block_info[0]["num-chunks"]
        r0 = pad[0] if loc[1] > 0 else 0
        c0 = pad[1] if loc[2] > 0 else 0
        r1 = blk.shape[1] - (pad[0] if loc[1] < num[1] - 1 else 0)
        c1 = blk.shape[2] - (pad[1] if loc[2] < num[2] - 1 else 0)
        return blk[:, r0:r1, c0:c1]

    return out.map_blocks(trim, chunks=((len(q),),) + chunks, dtype=np.complex128)


def amplitude(a):
    """Modulation amplitude 2|A| of a lock-in field (same units as the image).

    Parameters
    ----------
    a : complex array
        Output of :func:`lockin`.

    Returns
    -------
    ndarray
        2|A|, so that I = A0 cos(q.r + phi) gives A0.

    Examples
    --------
    >>> round(float(amplitude(np.array(0.85 * np.exp(0.9j)))), 12)
    1.7
    """
    return 2 * abs(a)


def phase(a):
    """Local phase arg A in radians, in (-pi, pi], referenced to pixel (0, 0).

    Parameters
    ----------
    a : complex array
        Output of :func:`lockin`.

    Returns
    -------
    ndarray
        The wrapped phase.

    Examples
    --------
    >>> round(float(phase(np.array(0.85 * np.exp(0.9j)))), 12)
    0.9
    """
    if _is_dask(a):
        import dask.array as da

        return da.angle(a)
    return np.angle(a)


def phase_gradient(a, *, pixel_size_nm):
    """Gradient of the phase of A without unwrapping, (d/dx, d/dy) in rad/nm.

    Uses grad(phi) = Im(conj(A) grad A) / |A|^2, which is blind to the 2 pi jumps
    of the wrapped phase (METHODS §3).

    Parameters
    ----------
    a : complex ndarray, (row, col) or (k, row, col)
        Lock-in field.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.

    Returns
    -------
    ndarray
        Shape (2, ...) holding (dphi/dx, dphi/dy), x along columns.

    Examples
    --------
    >>> y, x = np.mgrid[:32, :32] * 0.1
    >>> g = phase_gradient(np.exp(1j * (0.3 * x - 0.2 * y)), pixel_size_nm=0.1)
    >>> bool(np.allclose(g[0], 0.3, atol=1e-3) and np.allclose(g[1], -0.2, atol=1e-3))
    True
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    a = np.asarray(a)
    unit = np.where(np.abs(a) > 0, a / np.where(np.abs(a) > 0, np.abs(a), 1), 0)
    grow = np.gradient(unit, dy, axis=-2)
    gcol = np.gradient(unit, dx, axis=-1)
    return np.stack([np.imag(np.conj(unit) * gcol), np.imag(np.conj(unit) * grow)])


def local_wavevector(a, q, *, pixel_size_nm):
    """Local wavevector q + grad(phi) in rad/nm.

    Parameters
    ----------
    a : complex ndarray, (row, col) or (k, row, col)
        Lock-in field at the reference wavevector(s) ``q``.
    q : (2,) or (k, 2) array_like
        The reference wavevector(s) used for ``a``.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.

    Returns
    -------
    ndarray
        Shape (2, row, col) for one q or (2, k, row, col): (qx, qy) maps.

    Examples
    --------
    >>> y, x = np.mgrid[:32, :32] * 0.1
    >>> k = local_wavevector(np.exp(0.3j * x), [5.0, 0.0], pixel_size_nm=0.1)
    >>> bool(np.allclose(k[0], 5.3, atol=1e-3))
    True
    """
    q, single = _as_q_array(q)
    grad = phase_gradient(a, pixel_size_nm=pixel_size_nm)
    if single:
        return grad + q[0][:, None, None]
    return grad + q.T[:, :, None, None]


def trusted_mask(shape, *, sigma_nm, pixel_size_nm, mask=None, margin_sigma=2.5):
    """Where a lock-in result is reliable: at least ``margin_sigma``·sigma from the frame edge and any masked pixel.

    Parameters
    ----------
    shape : tuple of int
        Image shape (row, col).
    sigma_nm : float
        The lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    margin_sigma : float
        Distance, in units of sigma, that a pixel must keep from the edge and
        from masked pixels (METHODS §1 recommends 2 to 3).

    Returns
    -------
    ndarray of bool
        True where the result can be trusted.

    Examples
    --------
    >>> t = trusted_mask((64, 64), sigma_nm=1.0, pixel_size_nm=0.25)
    >>> bool(t[32, 32]), bool(t[2, 32])
    (True, False)
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    valid = np.ones(tuple(shape)[-2:], dtype=bool) if mask is None else ~np.asarray(mask, dtype=bool)
    padded = np.pad(valid, 1, constant_values=False)
    distance = ndimage.distance_transform_edt(padded, sampling=(dy, dx))[1:-1, 1:-1]
    # The edge sits half a pixel outside the outermost row or column.
    return distance - 0.5 * min(dy, dx) >= margin_sigma * float(sigma_nm)


def choose_sigma(q, *, leakage=0.01, include_dc=True):
    """Lock-in width that keeps every other Fourier peak's leakage below ``leakage``.

    A peak at distance dk leaks in with weight exp(-sigma^2 dk^2 / 2), so
    sigma = sqrt(2 ln(1/leakage)) / dk_min (METHODS §1: sigma dk >= 3.03 for 1 %).
    The peaks considered are +q, -q of every given wavevector and, with
    ``include_dc``, the origin.

    Parameters
    ----------
    q : (k, 2) array_like
        Wavevectors of the peaks in the image, rad/nm.
    leakage : float
        Largest allowed leakage of a neighbouring peak, 0 < leakage < 1.
    include_dc : bool
        Count the DC term (the image mean and background) as a neighbour.

    Returns
    -------
    sigma_nm : float
        The width in nm; the maps' spatial resolution is about this.
    nearest_rad_per_nm : float
        The smallest peak separation dk that set it.

    Examples
    --------
    >>> sigma, dk = choose_sigma([[1.0, 0.0]])
    >>> round(sigma * dk, 2)
    3.03
    """
    q, _ = _as_q_array(q)
    if not 0 < leakage < 1:
        raise InputError(f"leakage must lie between 0 and 1, got {leakage}")
    peaks = np.concatenate([q, -q] + ([np.zeros((1, 2))] if include_dc else []))
    nearest = np.inf
    for qj in q:
        d = np.hypot(*(peaks - qj).T)
        d = d[d > 1e-12]
        if d.size:
            nearest = min(nearest, float(d.min()))
    if not np.isfinite(nearest):
        raise InputError("choose_sigma needs at least one nonzero wavevector")
    return math.sqrt(2 * math.log(1 / leakage)) / nearest, nearest
