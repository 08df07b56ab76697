"""Levelling: polynomial background removal, per-line offset removal and NaN masking of images and scans.

Rows are scan lines (the fast-scan axis runs along a row, x); the slow-scan axis
is y. A mask marks untrusted pixels (True); masked and non-finite pixels never
enter a fit, but every pixel is corrected.
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from ._errors import InputError
from ._scan import Scan, _is_dask

#: Largest number of pixels a background fit reads from a lazy (dask) image; a
#: larger image is fitted on a regular strided subsample (every s-th row and column).
FIT_MAX_PIXELS = 2**22

#: Largest number of pixels the line statistics ("median", "difference") read from
#: a lazy image; a wider image is sampled at every s-th column (all rows are kept).
LINES_MAX_PIXELS = 2**24

LINE_METHODS = ("median", "mean", "hann", "difference")

_MAX_ORDER = 8
# Rows per block when the least-squares fit is accumulated, so the design matrix
# never holds more than about this many pixels at once.
_BLOCK_PIXELS = 2**16


def _float_dtype(dtype) -> np.dtype:
    dtype = np.dtype(dtype)
    if dtype == np.float16:
        return np.dtype(np.float32)
    if dtype.kind == "f":
        return dtype
    return np.dtype(np.float64)


def _check_image(image, name="image"):
    if not _is_dask(image):
        image = np.asarray(image)
    if image.ndim != 2:
        raise InputError(f"{name} must be a 2-D array (row, col), got shape {tuple(image.shape)}")
    if image.dtype.kind not in "biuf":
        raise InputError(f"{name} must hold real numbers, got dtype {image.dtype}")
    if min(image.shape) < 1:
        raise InputError(f"{name} is empty, shape {tuple(image.shape)}")
    return image


def _check_mask(mask, shape):
    if mask is None:
        return None
    if _is_dask(mask):
        mask = mask.compute()
    mask = np.asarray(mask)
    if mask.shape != tuple(shape):
        raise InputError(f"mask shape {mask.shape} differs from the image shape {tuple(shape)}")
    return mask.astype(bool)


def _check_order(order):
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or not 0 <= order <= _MAX_ORDER:
        raise InputError(f"order must be an integer from 0 to {_MAX_ORDER}, got {order!r}")
    return int(order)


def _terms(order):
    """Exponents (i, j) of the monomials u**i * v**j with i + j <= order."""
    return [(degree - j, j) for degree in range(order + 1) for j in range(degree + 1)]


def _scaled(index, n):
    """Pixel index -> coordinate in [-1, 1]; centring and scaling keep the fit well conditioned."""
    half = (n - 1) / 2
    return (np.asarray(index, dtype=float) - half) / (half if half > 0 else 1.0)


def _fit(values, rows, cols, shape, order):
    """Least-squares coefficients of the polynomial over the given pixels.

    The design matrix is reduced block by block (R of a QR factorisation is
    updated with each new block), so memory stays bounded and accuracy is that of
    a QR solve, not of the normal equations.
    """
    terms = _terms(order)
    if values.size < len(terms):
        raise InputError(
            f"only {values.size} unmasked finite pixels; a polynomial of order {order} needs at least {len(terms)}"
        )
    r_factor = np.zeros((0, len(terms)))
    rhs = np.zeros(0)
    for start in range(0, values.size, _BLOCK_PIXELS):
        stop = start + _BLOCK_PIXELS
        u = _scaled(cols[start:stop], shape[1])
        v = _scaled(rows[start:stop], shape[0])
        design = np.stack([u**i * v**j for i, j in terms], axis=1)
        q, r_factor = np.linalg.qr(np.vstack([r_factor, design]))
        rhs = q.T @ np.concatenate([rhs, values[start:stop].astype(float)])
    singular = np.linalg.svd(r_factor, compute_uv=False)
    if singular[-1] <= 1e-10 * singular[0]:
        raise InputError(
            f"the unmasked pixels do not determine a polynomial of order {order} "
            "(too few rows or columns left unmasked); lower the order or the mask"
        )
    return np.linalg.solve(r_factor, rhs)


def _evaluate(coefficients, order, shape, row0=0, col0=0, block_shape=None):
    """The polynomial on a block of the global pixel grid (float64)."""
    nrows, ncols = block_shape if block_shape is not None else shape
    u = _scaled(np.arange(col0, col0 + ncols), shape[1])
    v = _scaled(np.arange(row0, row0 + nrows), shape[0])
    out = np.zeros((nrows, ncols))
    for c, (i, j) in zip(coefficients, _terms(order)):
        out += c * np.outer(v**j, u**i)
    return out


def _subsample_step(shape, budget):
    return max(1, math.ceil(math.sqrt(shape[0] * shape[1] / budget)))


def _fit_coefficients(image, mask, order):
    """Fit on all pixels of a numpy image, or on a strided subsample of a dask image."""
    shape = image.shape
    if _is_dask(image):
        step = _subsample_step(shape, FIT_MAX_PIXELS)
        sample = np.asarray(image[::step, ::step].compute(), dtype=float)
        sample_mask = mask[::step, ::step] if mask is not None else None
    else:
        step, sample, sample_mask = 1, np.asarray(image, dtype=float), mask
    good = np.isfinite(sample)
    if sample_mask is not None:
        good &= ~sample_mask
    rows, cols = np.nonzero(good)
    return _fit(sample[good], rows * step, cols * step, shape, order)


def _background_from(coefficients, order, image, dtype):
    shape = image.shape
    if _is_dask(image):
        def block(x, block_info=None):
            (r0, r1), (c0, c1) = block_info[0]["array-location"]
            return _evaluate(coefficients, order, shape, r0, c0, (r1 - r0, c1 - c0)).astype(dtype)

        return image.map_blocks(block, dtype=dtype, meta=np.empty((0, 0), dtype=dtype))
    return _evaluate(coefficients, order, shape).astype(dtype)


def polynomial_background(image, *, order=1, mask=None):
    """Least-squares polynomial background of an image (a plane for ``order=1``).

    Parameters
    ----------
    image : (row, col) array_like or dask array
        The image. NaN and inf pixels are left out of the fit.
    order : int
        Total degree of the polynomial in x and y (0 = a constant, 1 = a plane,
        2 = a quadric, ... up to 8).
    mask : (row, col) array_like of bool, optional
        True where a pixel is untrusted; left out of the fit.

    Returns
    -------
    background : ndarray or dask array
        The fitted polynomial on every pixel, float32 for float16/float32 input,
        otherwise float64. A dask input gives a lazy dask background.

    Raises
    ------
    InputError
        If the image is not 2-D and real, the order is not an integer 0..8, the
        mask shape differs, or too few pixels are left to determine the fit.

    Notes
    -----
    The background is sum c_ij u**i v**j over i + j <= order, with u and v the
    column and row indices centred and scaled to [-1, 1] (which keeps the least-
    squares problem well conditioned; the fitted surface does not depend on it).
    For a dask image the coefficients are fitted on a strided subsample (every
    s-th row and column, at most :data:`FIT_MAX_PIXELS` pixels), read now; the
    background itself is evaluated lazily, chunk by chunk.

    Examples
    --------
    >>> import numpy as np
    >>> rows, cols = np.mgrid[0:32, 0:48]
    >>> plane = 0.3 + 0.01 * cols - 0.02 * rows
    >>> bool(np.allclose(polynomial_background(plane), plane, rtol=0, atol=1e-12))
    True
    """
    image = _check_image(image)
    order = _check_order(order)
    mask = _check_mask(mask, image.shape)
    dtype = _float_dtype(image.dtype)
    coefficients = _fit_coefficients(image, mask, order)
    return _background_from(coefficients, order, image, dtype)


def subtract_background(image, *, order=1, mask=None):
    """The image minus its least-squares polynomial background.

    Parameters
    ----------
    image : (row, col) array_like or dask array
        The image.
    order : int
        Total degree of the polynomial (see :func:`polynomial_background`).
    mask : (row, col) array_like of bool, optional
        True where a pixel is untrusted; left out of the fit but corrected too.

    Returns
    -------
    ndarray or dask array
        ``image - background`` (float32 for float16/float32 input, else float64);
        NaN pixels stay NaN. The input is not modified.

    Raises
    ------
    InputError
        As :func:`polynomial_background`.

    Examples
    --------
    >>> import numpy as np
    >>> rows, cols = np.mgrid[0:16, 0:16]
    >>> image = (1.0 + 0.1 * cols + 0.05 * rows).astype(np.float32)
    >>> levelled = subtract_background(image)
    >>> levelled.dtype, bool(np.abs(levelled).max() < 1e-5)
    (dtype('float32'), True)
    """
    image = _check_image(image)
    background = polynomial_background(image, order=order, mask=mask)
    return image.astype(background.dtype) - background


def _warn_slow_axis(method, stacklevel):
    warnings.warn(
        f"line offsets by the per-line {method} also delete every modulation along the slow-scan axis "
        "(a wave cos(2*pi*y/lambda) with no x dependence becomes 0); use method='difference' "
        "or warn=False if that is intended",
        UserWarning,
        stacklevel=stacklevel + 1,
    )


def _masked_float(image, mask):
    """A float64 copy (numpy or dask) with masked and non-finite pixels set to NaN."""
    if _is_dask(image):
        import dask.array as da

        x = image.astype(float)
        x = da.where(da.isfinite(x), x, np.nan)
        if mask is not None:
            x = da.where(da.from_array(mask, chunks=x.chunks), np.nan, x)
        return x
    x = np.array(image, dtype=float)
    x[~np.isfinite(x)] = np.nan
    if mask is not None:
        x[mask] = np.nan
    return x


def _row_statistic(x, method):
    """Per-row median or mean over the finite pixels; NaN for a row with none."""
    out = np.full(x.shape[0], np.nan)
    has = np.isfinite(x).any(axis=1)
    if method == "median":
        out[has] = np.nanmedian(x[has], axis=1)
    else:
        out[has] = np.nanmean(x[has], axis=1)
    return out


def _neighbour_median(d):
    """Median of the steps two before and two after each step (NaN where none)."""
    m = d.size
    padded = np.full(m + 4, np.nan)
    padded[2:-2] = d
    neighbours = np.stack([padded[0:m], padded[1 : m + 1], padded[3 : m + 3], padded[4 : m + 4]])
    local = np.full(m, np.nan)
    some = np.isfinite(neighbours).any(axis=0)
    local[some] = np.nanmedian(neighbours[:, some], axis=0)
    return local


def _difference_offsets(x, threshold):
    """Offsets built only from line-to-line jumps that stand out from the typical step."""
    nrows = x.shape[0]
    steps = x[1:] - x[:-1]  # NaN where either line is untrusted
    d = _row_statistic(steps, "median")
    offsets = np.zeros(nrows)
    known = np.isfinite(d)
    if not known.any():
        return offsets
    m = d.size
    d = np.where(known, d, np.median(d[known]))
    # The typical step at a line is the median of the two neighbouring steps on each
    # side: it follows a smooth modulation (and a tilt) along y.
    local = _neighbour_median(d)
    local = np.where(np.isfinite(local), local, d)
    excess = d - local
    # Two steps from either end the neighbours sit on one side only, so their median
    # lags a sloped modulation; there a jump must also stand out among all steps.
    edge = np.zeros(m, bool)
    edge[:2] = edge[-2:] = True
    reference = known & ~edge if (known & ~edge).any() else known
    scale = 1.4826 * np.median(np.abs(excess[reference]))  # robust sigma (MAD) of the excess
    spread = np.abs(d - np.median(d[known]))
    edge_ok = spread > threshold * 1.4826 * np.median(spread[known])
    # Below this a difference is rounding, not a jump (noise-free synthetic data).
    floor = 1e-9 * np.max(np.abs(d))
    flagged = np.zeros(m, bool)
    work = d.copy()
    for _ in range(m):
        candidate = (np.abs(excess) > max(threshold * scale, floor)) & known & (~edge | edge_ok) & ~flagged
        if not candidate.any():
            break
        # Take the largest jump first and replace it (and earlier ones) by the typical
        # step there, so jumps no longer skew the medians of their neighbours; a few
        # passes let adjacent jumps (a glitched line) settle.
        flagged[int(np.argmax(np.where(candidate, np.abs(excess), -1.0)))] = True
        for _ in range(3):
            local = _neighbour_median(work)
            local = np.where(np.isfinite(local), local, work)
            work = np.where(flagged, local, d)
        excess = np.where(flagged, 0.0, d - local)
    jumps = np.where(flagged, d - work, 0.0)
    offsets[1:] = np.cumsum(jumps)
    return offsets


def _line_offsets(image, method, mask, jump_threshold):
    """Offsets of every row (numpy), without warnings; numpy or dask image."""
    lazy = _is_dask(image)
    x = _masked_float(image, mask)
    if lazy:
        if method == "mean":
            import dask.array as da

            with warnings.catch_warnings():
                # a fully masked row gives NaN ("mean of empty slice"), handled below
                warnings.simplefilter("ignore", RuntimeWarning)
                stat = da.nanmean(x, axis=1).compute()  # exact: a streaming reduction
        else:
            step = max(1, math.ceil(image.shape[0] * image.shape[1] / LINES_MAX_PIXELS))
            sample = x[:, ::step].compute()
            stat = None
    else:
        sample = x
        stat = None
    if method == "hann":
        # A Hann-weighted mean along the line: exact for a constant offset, and blind (below
        # 1e-3, Harris 1978) to any modulation more than about 3 frequency bins off the qy axis.
        weights = np.hanning(image.shape[1] + 2)[1:-1]
        if lazy:
            import dask.array as da

            num = (da.nan_to_num(x) * weights).sum(axis=1).compute()
            den = (~da.isnan(x) * weights).sum(axis=1).compute()
        else:
            num = (np.nan_to_num(x) * weights).sum(axis=1)
            den = (~np.isnan(x) * weights).sum(axis=1)
        stat = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
        finite = np.isfinite(stat)
        offsets = np.where(finite, stat - (np.mean(stat[finite]) if finite.any() else 0.0), 0.0)
    elif method in ("median", "mean"):
        if stat is None:
            stat = _row_statistic(sample, method)
        finite = np.isfinite(stat)
        reference = (np.median if method == "median" else np.mean)(stat[finite]) if finite.any() else 0.0
        # A row with no trusted pixel keeps its level (offset 0).
        offsets = np.where(finite, stat - reference, 0.0)
    else:
        offsets = _difference_offsets(sample, jump_threshold)
        offsets -= np.median(offsets)
    return offsets


def line_offsets(image, *, method="median", mask=None, warn=True, jump_threshold=5.0):
    """Remove a constant offset from every scan line (row).

    Parameters
    ----------
    image : (row, col) array_like or dask array
        The image; rows are scan lines (the fast-scan axis is x).
    method : {"median", "mean", "hann", "difference"}
        How a line's offset is found (see Notes).
    mask : (row, col) array_like of bool, optional
        True where a pixel is untrusted; left out of the statistics, corrected too.
    warn : bool
        Warn (``UserWarning``) that "median", "mean" and "hann" delete modulations along y.
    jump_threshold : float
        For "difference": a line-to-line step counts as an offset jump when it
        differs from the typical step by more than this many robust standard
        deviations of the steps.

    Returns
    -------
    corrected : ndarray or dask array
        ``image - offsets[:, None]`` (float32 kept, otherwise float64); lazy for a
        dask image.
    offsets : ndarray
        The offset removed from each row. Offsets are relative to the typical line
        (their median, or mean for "mean", is 0), so the overall level is kept.

    Raises
    ------
    InputError
        For an image that is not 2-D and real, an unknown method, a mask of the
        wrong shape or a non-positive ``jump_threshold``.

    Warns
    -----
    UserWarning
        For "median" and "mean" unless ``warn=False``.

    Notes
    -----
    "median" and "mean" set every line to the same median (mean) level. This
    removes any line-to-line offset pattern, but also any image content that is
    constant along a line: a modulation cos(2 pi y / lambda) along the slow-scan
    axis is deleted entirely (METHODS §7), and a wave with a small x component
    is weakened. "median" is robust to bright features; "mean" is exact for
    additive offsets on an unmasked image.

    "hann" takes a Hann-weighted mean of each line: still exact for an additive
    offset, but a modulation whose wavevector lies more than about three
    frequency bins (2 pi / width) off the qy axis leaks into it by less than
    1e-3 (Hann side lobes: Harris, Proc. IEEE 66, 51 (1978)), so periodic order
    at a slant survives; content within a bin or two of the qy axis is deleted
    as with "mean".

    "difference" takes the median over the columns of the difference between
    adjacent lines (the step), which cancels any feature that spans both lines.
    Since a per-line offset cannot be told apart from content that is constant
    along a line, it then keeps only *jumps*: steps that differ from the typical
    step there (the median of the two neighbouring steps on each side) by more
    than ``jump_threshold`` robust standard deviations (1.4826 x the median
    absolute deviation) of all such differences: tip changes, glitched lines.
    Within two lines of the top and bottom edges, where the neighbours lie on one
    side only, a jump must also stand out by as much among all steps. A
    modulation along y changes smoothly from line to line and survives; a tilt
    along y is left for the background fit. The price:
    dense small line noise (every line with its own random offset of the order
    of the line-to-line variation of the image) is not removed; use "median"
    for that. The method breaks down if more than about half of the steps are
    jumps.

    For a dask image the statistics "median" and "difference" use every s-th
    column (at most :data:`LINES_MAX_PIXELS` pixels are read); "mean" is exact.

    Examples
    --------
    >>> import numpy as np
    >>> offsets = np.array([0.0, 1.0, -2.0, 0.5])
    >>> image = np.ones((4, 6)) + offsets[:, None]
    >>> corrected, found = line_offsets(image, warn=False)
    >>> bool(np.allclose(corrected, corrected[0, 0])), bool(np.allclose(found - found.mean(), offsets - offsets.mean()))
    (True, True)
    """
    image = _check_image(image)
    if method not in LINE_METHODS:
        raise InputError(f"method must be one of {', '.join(LINE_METHODS)}, got {method!r}")
    try:
        jump_threshold = float(jump_threshold)
    except (TypeError, ValueError):
        raise InputError(f"jump_threshold must be a number, got {jump_threshold!r}") from None
    if not jump_threshold > 0 or not math.isfinite(jump_threshold):
        raise InputError(f"jump_threshold must be positive, got {jump_threshold!r}")
    mask = _check_mask(mask, image.shape)
    if warn and method in ("median", "mean", "hann"):
        _warn_slow_axis(method, stacklevel=2)
    offsets = _line_offsets(image, method, mask, jump_threshold)
    dtype = _float_dtype(image.dtype)
    if _is_dask(image):
        import dask.array as da

        column = da.from_array(offsets.astype(dtype)[:, None], chunks=(image.chunks[0], 1))
        return image.astype(dtype) - column, offsets
    return np.asarray(image, dtype=dtype) - offsets.astype(dtype)[:, None], offsets


def nan_to_mask(image, mask=None):
    """Replace NaN and inf pixels by the mean of the finite pixels and add them to the mask.

    Parameters
    ----------
    image : (row, col) or (energy, row, col) array_like
        An image or a grid (a pixel is masked if it is non-finite in any slice;
        each slice is filled with the mean of its own finite pixels).
    mask : (row, col) array_like of bool, optional
        An existing mask (True = untrusted) to combine with.

    Returns
    -------
    filled : ndarray
        A copy (float32 kept, integers -> float64) with no NaN or inf.
    mask : ndarray of bool or None
        The combined mask, or None if there was no mask and every pixel is finite.

    Raises
    ------
    InputError
        If the array is not 2-D or 3-D and real, the mask shape differs, or an
        image (slice) has no finite pixel.

    Examples
    --------
    >>> import numpy as np
    >>> filled, mask = nan_to_mask(np.array([[1.0, np.nan], [3.0, np.inf]]))
    >>> filled.tolist(), mask.tolist()
    ([[1.0, 2.0], [3.0, 2.0]], [[False, True], [False, True]])
    """
    if _is_dask(image):
        image = image.compute()
    image = np.asarray(image)
    if image.ndim not in (2, 3) or image.dtype.kind not in "biuf":
        raise InputError(f"image must be a real 2-D image or 3-D grid, got shape {image.shape}, dtype {image.dtype}")
    mask = _check_mask(mask, image.shape[-2:])
    filled = np.array(image, dtype=_float_dtype(image.dtype))
    bad = ~np.isfinite(filled)
    if not bad.any():
        return filled, mask
    slices = filled.reshape((-1,) + filled.shape[-2:])
    bad_slices = bad.reshape(slices.shape)
    for plane, plane_bad in zip(slices, bad_slices):
        if plane_bad.all():
            raise InputError("image has no finite pixel (every pixel is NaN or inf)")
        plane[plane_bad] = plane[~plane_bad].mean(dtype=float)
    bad_image = bad.any(axis=0) if image.ndim == 3 else bad
    return filled, bad_image if mask is None else (mask | bad_image)


def _level_image(image, mask, order, lines, jump_threshold):
    """Level one 2-D image (numpy or dask) without warnings; returns (levelled, mask)."""
    if _is_dask(image):
        out = image.astype(_float_dtype(image.dtype))
        if lines is not None:
            offsets = _line_offsets(out, lines, mask, jump_threshold)
            out = out - offsets.astype(out.dtype)[:, None]
        if order is not None:
            coefficients = _fit_coefficients(out, mask, order)
            out = out - _background_from(coefficients, order, out, out.dtype)
        return out, mask  # non-finite pixels stay NaN: later steps treat them as masked
    filled, combined = nan_to_mask(image, mask)
    nonfinite = ~np.isfinite(np.asarray(image, dtype=float)) if np.asarray(image).dtype.kind == "f" else None
    out = filled
    if lines is not None:
        offsets = _line_offsets(out, lines, combined, jump_threshold)
        out = out - offsets.astype(out.dtype)[:, None]
    if order is not None:
        coefficients = _fit_coefficients(out, combined, order)
        out = out - _evaluate(coefficients, order, out.shape).astype(out.dtype)
    if nonfinite is not None and nonfinite.any():
        # A filled pixel carries no measurement; give it the mean trusted level.
        out[nonfinite] = out[~combined].mean(dtype=float) if (~combined).any() else 0.0
    return out, combined


def level(scan, *, order=1, lines=None, warn=True, jump_threshold=5.0):
    """Level a scan: per-line offsets (optional), then a polynomial background; returns a new Scan.

    Parameters
    ----------
    scan : Scan
        A 2-D image or a 3-D grid (each energy slice is levelled on its own),
        in memory or lazy.
    order : int or None
        Order of the polynomial background (1 = plane); None for none.
    lines : {None, "median", "mean", "difference"}
        Per-line offset removal before the background fit (see :func:`line_offsets`).
    warn : bool
        Warn that "median" and "mean" delete modulations along the slow-scan axis.
    jump_threshold : float
        Passed to :func:`line_offsets` for ``lines="difference"``.

    Returns
    -------
    Scan
        A new scan with float data (float32 kept, otherwise float64). For an
        in-memory scan, NaN and inf pixels join the mask and are set to the mean of
        the trusted levelled pixels. A lazy scan stays lazy: its background is
        fitted on a strided subsample (see :func:`polynomial_background`), read now,
        its NaN pixels stay NaN (later steps treat them as masked) and its mask is
        carried unchanged. The input scan is not modified.

    Raises
    ------
    InputError
        For an invalid ``order``, ``lines`` or ``jump_threshold``, or too few
        trusted pixels for the fit.

    Warns
    -----
    UserWarning
        For ``lines="median"`` or ``"mean"`` unless ``warn=False``.

    Examples
    --------
    >>> import numpy as np
    >>> from domains import Scan
    >>> rows, cols = np.mgrid[0:32, 0:32]
    >>> offsets = np.random.default_rng(0).normal(0, 0.1, 32)
    >>> scan = Scan(0.01 * cols + 0.02 * rows + offsets[:, None], pixel_size_nm=0.05)
    >>> flat = level(scan, order=1, lines="median", warn=False)
    >>> bool(np.abs(flat.data).max() < 1e-12)
    True
    """
    if not isinstance(scan, Scan):
        raise InputError(f"scan must be a domains.Scan, got {type(scan).__name__}")
    if order is not None:
        order = _check_order(order)
    if lines is not None and lines not in LINE_METHODS:
        raise InputError(f"lines must be None or one of {', '.join(LINE_METHODS)}, got {lines!r}")
    try:
        jump_threshold = float(jump_threshold)
    except (TypeError, ValueError):
        raise InputError(f"jump_threshold must be a number, got {jump_threshold!r}") from None
    if not jump_threshold > 0 or not math.isfinite(jump_threshold):
        raise InputError(f"jump_threshold must be positive, got {jump_threshold!r}")
    if warn and lines in ("median", "mean", "hann"):
        _warn_slow_axis(lines, stacklevel=2)
    where = scan.source
    try:
        if not scan.is_grid:
            data, mask = _level_image(scan.data, scan.mask, order, lines, jump_threshold)
        elif scan.is_lazy:
            import dask.array as da

            data = da.stack([_level_image(plane, scan.mask, order, lines, jump_threshold)[0] for plane in scan.data])
            mask = scan.mask
        else:
            # One mask for the whole grid: a pixel bad in any slice is bad in all.
            _, mask = nan_to_mask(scan.data, scan.mask)
            data = np.stack([_level_image(plane, mask, order, lines, jump_threshold)[0] for plane in scan.data])
    except InputError as err:
        raise InputError(f"{where}: {err}") from None
    return scan.with_data(data, mask=mask)

