"""Levelling: polynomial background, per-line offsets, terrace steps, glitched lines, tip changes and NaN masking.

Rows are scan lines (the fast-scan axis runs along a row, x); the slow-scan axis
is y. A mask marks untrusted pixels (True); masked and non-finite pixels never
enter a fit, but every pixel is corrected. :func:`level` also finds what real
topographs carry besides the corrugation (terrace steps many corrugations high,
glitched scan lines, tip changes), removes what can be removed, masks the rest
and says what it found (:class:`LevelResult`).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._errors import InputError
from ._scan import Scan, _is_dask

#: Largest number of pixels a background fit reads from a lazy (dask) image; a
#: larger image is fitted on a regular strided subsample (every s-th row and column).
FIT_MAX_PIXELS = 2**22

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
    blocks = ((values[i : i + _BLOCK_PIXELS], rows[i : i + _BLOCK_PIXELS], cols[i : i + _BLOCK_PIXELS])
              for i in range(0, values.size, _BLOCK_PIXELS))
    return _fit_blocks(blocks, shape, order)


def _fit_blocks(blocks, shape, order):
    """:func:`_fit` over an iterable of (values, rows, cols) blocks."""
    return _solve_r(*_r_update(np.zeros((0, len(_terms(order)) + 1)), blocks, shape, order), order)


def _r_update(r_aug, blocks, shape, order):
    """R of the QR factorisation of [design | values], updated with each (values, rows, cols) block.

    Its last column is Q^T b, so Q itself is never formed; R factors of disjoint sets of
    pixels stacked and factorised again give the R of their union (partial fits combine exactly).
    Returns (R, number of pixels).
    """
    terms = _terms(order)
    p = len(terms)
    total = 0
    for values, rows, cols in blocks:
        if values.size == 0:
            continue
        total += values.size
        u = _scaled(cols, shape[1])
        v = _scaled(rows, shape[0])
        design = np.stack([u**i * v**j for i, j in terms] + [values.astype(float)], axis=1)
        r_aug = np.linalg.qr(np.vstack([r_aug, design]), mode="r")[: p + 1]
    return r_aug, total


def _solve_r(r_aug, total, order):
    """The polynomial's coefficients from the R factor of :func:`_r_update`, or an InputError."""
    terms = _terms(order)
    p = len(terms)
    r_factor, rhs = r_aug[:p, :p], r_aug[:p, p]
    if total < len(terms):
        raise InputError(
            f"only {total} unmasked finite pixels; a polynomial of order {order} needs at least {len(terms)}"
        )
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


def _subtract_polynomial(out, coefficients, order):
    """Subtract the polynomial from ``out`` in place, a block of rows at a time (no full-size background)."""
    nrows = max(1, _BLOCK_PIXELS // max(out.shape[1], 1))
    for r0 in range(0, out.shape[0], nrows):
        r1 = min(out.shape[0], r0 + nrows)
        out[r0:r1] -= _evaluate(coefficients, order, out.shape, r0, 0, (r1 - r0, out.shape[1])).astype(out.dtype)
    return out


def _subsample_step(shape, budget):
    return max(1, math.ceil(math.sqrt(shape[0] * shape[1] / budget)))


def _fit_coefficients(image, mask, order):
    """Fit on all pixels of a numpy image, or on a strided subsample of a dask image."""
    shape = image.shape
    if _is_dask(image):
        # Every step-th row and column of the global grid; each chunk reduces its own pixels to
        # an R factor (a few numbers), and the factors combine exactly.
        import dask

        step = _subsample_step(shape, FIT_MAX_PIXELS)
        blocks = image.to_delayed()
        masks = _aligned_mask(mask, image).to_delayed() if mask is not None else None
        starts = [np.cumsum((0,) + tuple(c[:-1])) for c in image.chunks]
        parts = [dask.delayed(_chunk_r_factor)(blocks[i, j], masks[i, j] if masks is not None else None,
                                               int(starts[0][i]), int(starts[1][j]), step, shape, order)
                 for i in range(blocks.shape[0]) for j in range(blocks.shape[1])]
        parts = dask.compute(*parts)
        r_aug = np.linalg.qr(np.vstack([np.zeros((0, len(_terms(order)) + 1))] + [r for r, _ in parts]),
                             mode="r")[: len(_terms(order)) + 1]
        return _solve_r(r_aug, sum(t for _, t in parts), order)
    else:
        # Row blocks of about _BLOCK_PIXELS pixels: no full-size float64 copy or index arrays.
        image = np.asarray(image)
        nrows = max(1, _BLOCK_PIXELS // max(shape[1], 1))

        def blocks():
            for r0 in range(0, shape[0], nrows):
                part = np.asarray(image[r0 : r0 + nrows], dtype=float)
                good = np.isfinite(part)
                if mask is not None:
                    good &= ~mask[r0 : r0 + nrows]
                rows, cols = np.nonzero(good)
                yield part[good], rows + r0, cols

        return _fit_blocks(blocks(), shape, order)


def _chunk_r_factor(block, mask, r0, c0, step, shape, order):
    """R factor (and pixel count) of one chunk's pixels on the global every-step-th grid."""
    rs, cs = (-r0) % step, (-c0) % step
    part = np.asarray(block[rs::step, cs::step], dtype=float)
    good = np.isfinite(part)
    if mask is not None:
        good &= ~np.asarray(mask[rs::step, cs::step], dtype=bool)
    rows, cols = np.nonzero(good)
    values = part[good]
    rows = rows * step + r0 + rs
    cols = cols * step + c0 + cs
    pieces = ((values[i : i + _BLOCK_PIXELS], rows[i : i + _BLOCK_PIXELS], cols[i : i + _BLOCK_PIXELS])
              for i in range(0, values.size, _BLOCK_PIXELS))
    return _r_update(np.zeros((0, len(_terms(order)) + 1)), pieces, shape, order)


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
    s-th row and column of the global grid, at most :data:`FIT_MAX_PIXELS`
    pixels), read now: each chunk reduces its pixels to the R factor of a QR
    factorisation, and the factors combine exactly, so no sample is gathered.
    The background itself is evaluated lazily, chunk by chunk.

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
    """A float64 copy (numpy) with masked and non-finite pixels set to NaN."""
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
        part = x[has]
        # np.median is several times faster than np.nanmedian when there is no NaN
        out[has] = np.nanmedian(part, axis=1) if np.isnan(part).any() else np.median(part, axis=1)
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


def _line_steps(x):
    """The median step between neighbouring lines (NaN where either is untrusted), a block of
    lines at a time so that no full-size difference image is held."""
    nrows = x.shape[0]
    d = np.full(max(nrows - 1, 0), np.nan)
    block = max(1, _BLOCK_PIXELS * 4 // max(x.shape[1], 1))
    for r0 in range(0, nrows - 1, block):
        r1 = min(nrows - 1, r0 + block)
        d[r0:r1] = _row_statistic(x[r0 + 1 : r1 + 1] - x[r0:r1], "median")
    return d


def _offsets_from_steps(d, nrows, threshold):
    """Offsets built only from line-to-line jumps that stand out from the typical step.

    ``d`` holds the steps between neighbouring lines (:func:`_line_steps`, length ``nrows - 1``).
    """
    d = np.asarray(d, dtype=float)
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
    """Offsets of every row (numpy), without warnings; numpy or dask image (read chunk by chunk of whole rows)."""
    nrows = image.shape[0]
    if _is_dask(image):
        steps, stat = _line_offsets_lazy(image, method, mask, jump_threshold)
    else:
        x = _masked_float(image, mask)
        steps = _line_steps(x) if method == "difference" else None
        if method == "hann":
            # A Hann-weighted mean along the line: exact for a constant offset, and blind (below
            # 1e-3, Harris 1978) to any modulation more than about 3 frequency bins off the qy axis.
            weights = np.hanning(image.shape[1] + 2)[1:-1]
            stat = np.stack([(np.nan_to_num(x) * weights).sum(axis=1), (~np.isnan(x) * weights).sum(axis=1)], axis=1)
        elif method in ("median", "mean"):
            stat = _row_statistic(x, method)[:, None]
        else:
            stat = None
    if method == "hann":
        num, den = stat[:, 0], stat[:, 1]
        stat = np.where(den > 0, num / np.where(den > 0, den, 1.0), np.nan)
        finite = np.isfinite(stat)
        offsets = np.where(finite, stat - (np.mean(stat[finite]) if finite.any() else 0.0), 0.0)
    elif method in ("median", "mean"):
        stat = stat[:, 0]
        finite = np.isfinite(stat)
        reference = (np.median if method == "median" else np.mean)(stat[finite]) if finite.any() else 0.0
        # A row with no trusted pixel keeps its level (offset 0).
        offsets = np.where(finite, stat - reference, 0.0)
    else:
        offsets = _offsets_from_steps(steps, nrows, jump_threshold)
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
    axis is deleted entirely (docs/methods.md §7), and a wave with a small x component
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

    A dask image is read chunk by chunk of whole rows (a chunk that splits rows
    is rechunked first); every statistic is that of the in-memory image, and the
    corrected image stays lazy.

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
        out, combined, _ = _level_lazy(image, mask, order, lines, jump_threshold)
        return out, combined
    filled, combined = nan_to_mask(image, mask)
    nonfinite = ~np.isfinite(np.asarray(image)) if np.asarray(image).dtype.kind == "f" else None
    out = filled
    if lines is not None:
        offsets = _line_offsets(out, lines, combined, jump_threshold)
        out = out - offsets.astype(out.dtype)[:, None]
    if order is not None:
        coefficients = _fit_coefficients(out, combined, order)
        out = _subtract_polynomial(out, coefficients, order)  # out is a fresh array (nan_to_mask copies)
    if nonfinite is not None and nonfinite.any():
        # A filled pixel carries no measurement; give it the mean trusted level.
        out[nonfinite] = out[~combined].mean(dtype=float) if (~combined).any() else 0.0
    return out, combined


# --------------------------------------------------------------------------- real-data defects
#
# Terrace steps, glitched scan lines and tip changes, found on 2-D images. Every statistic
# below is a per-row or per-pixel robust one (medians and median absolute deviations), with
# fixed small kernels, so the cost grows with the pixel count and no kernel grows with the
# image; a lazy image feeds the same functions chunk by chunk (see "lazy levelling" below).

#: Robust standard deviations of the smoothed gradient above which a pixel is on a step edge.
EDGE_THRESHOLD = 8.0
#: Pixels added on each side of a detected step edge to the masked band.
EDGE_MARGIN_PX = 1
#: In ``terraces="auto"`` two terraces are kept apart only if their offsets differ by more
#: than this many robust standard deviations of the levelled image (the corrugation).
STEP_SIGNIFICANCE = 5.0
#: A scan line is glitched when its difference to both neighbouring lines is this many
#: times rougher than the typical line-to-line difference nearby.
GLITCH_RATIO = 3.0
#: A roughness change point must pass this two-sample t statistic ...
TIP_T_MIN = 10.0
#: ... and change the row roughness by at least this factor.
TIP_MIN_RATIO = 1.25

_EDGE_SCALES_PX = (1.0, 2.0)  # smoothing before the gradient: sharp and tip-blurred edges (fixed kernels)
_WINDOW_ROWS = 8  # steps on each side of an end line for its typical line-to-line roughness
# Rows on each side, and rank from the top, of the running order statistic that gives the typical
# value of a glitch statistic (:func:`_local_typical`).
_TYPICAL_ROWS = 64
_TYPICAL_RANK = 6
_SPIKE_SIGMAS = 8.0  # a pixel deviating this much (robust sigmas) from its neighbour line is a spike
_MIN_SPIKE_FRACTION = 0.02  # a spiky line has at least this fraction of its columns spiked
_MIN_TERRACE_PIXELS = 64
_MIN_TERRACE_FRACTION = 0.002
_MIN_SEGMENT_ROWS = 8  # shortest run of rows on either side of a roughness change point
_MAX_TIP_CHANGES = 8
# The terrace offsets are fitted on at most this many pixels (a strided subsample): 2**20
# pixels fix an offset to noise / 1000, and the cost stays flat above 1024^2.
_TERRACE_FIT_PIXELS = 2**20
# The scale that decides whether two terraces are one comes from a strided subsample: a quarter
# million pixels are plenty for a robust spread.
_MERGE_SAMPLE_PIXELS = 2**18


@dataclass(frozen=True, eq=False)
class LevelResult:
    """What :func:`level` found and removed, with the levelled scan.

    Attributes
    ----------
    scan : Scan
        The levelled scan (mask extended by step edges and glitched lines).
    terrace_count : int
        Number of terraces told apart (1 when no step was found).
    terrace_offsets_nm : tuple of float
        Height of each terrace relative to the largest one (the first entry, 0),
        removed from the image; in the data's units (nm for a topograph).
    terrace_labels : ndarray of int32 or None
        Terrace number (1, 2, ...; 1 is the largest) of every pixel, 0 on the
        masked step-edge band; None when there is one terrace. A dask array for
        a lazy scan.
    edge_mask : ndarray of bool or None
        The masked band along the step edges (True = on an edge); None when none.
        A dask array for a lazy scan.
    glitch_rows : tuple of int
        Scan lines (rows) masked as glitched.
    tip_change_rows : tuple of int
        First row after each tip change (the rows from there on were scanned
        with the changed tip).
    tip_change_offsets_nm : tuple of float
        The offset jump removed at each tip change (0 where only the contrast
        changed), in the data's units.
    tip_change_contrast : tuple of float
        Ratio of the row roughness below to above each tip change.
    note : str
        One human-readable sentence per finding ("" when nothing was found).
    """

    scan: Scan
    terrace_count: int = 1
    terrace_offsets_nm: tuple = (0.0,)
    terrace_labels: Any = None
    edge_mask: Any = None
    glitch_rows: tuple = ()
    tip_change_rows: tuple = ()
    tip_change_offsets_nm: tuple = ()
    tip_change_contrast: tuple = ()
    note: str = ""

    @property
    def found_anything(self) -> bool:
        """True if a terrace step, a glitched line or a tip change was found."""
        return self.terrace_count > 1 or bool(self.glitch_rows) or bool(self.tip_change_rows)

    def to_summary(self) -> dict:
        """The findings as plain JSON-safe numbers and lists (no arrays).

        Examples
        --------
        >>> import numpy as np
        >>> from domains import Scan
        >>> LevelResult(Scan(np.zeros((4, 4)), pixel_size_nm=0.1)).to_summary()["terrace_count"]
        1
        """
        return {
            "terrace_count": int(self.terrace_count),
            "terrace_offsets_nm": [float(v) for v in self.terrace_offsets_nm],
            "edge_fraction": float(self.edge_mask.mean()) if self.edge_mask is not None else 0.0,
            "glitch_rows": [int(r) for r in self.glitch_rows],
            "tip_change_rows": [int(r) for r in self.tip_change_rows],
            "tip_change_offsets_nm": [float(v) for v in self.tip_change_offsets_nm],
            "tip_change_contrast": [float(v) for v in self.tip_change_contrast],
            "note": self.note,
        }


def _floor(x):
    """Below this a robust spread is rounding, not signal (noise-free or float32 synthetic data)."""
    if not np.isfinite(x).any():
        return 1e-300
    span = float(np.nanmax(x)) - float(np.nanmin(x))
    return max(span * 64 * np.finfo(np.float64).eps, span * 1e-9, 1e-300)


#: Row medians of the finders read at most about this many columns (every s-th): a median of
#: 512 samples is within 0.06 robust sigmas of the full one, at a quarter of the cost at 2048.
_MEDIAN_COLUMNS = 512


def _row_median(a, sampled=False):
    """Median of each row over its finite entries (NaN for a row with none), without warnings.

    With ``sampled``, every s-th column only, s chosen to read about :data:`_MEDIAN_COLUMNS`.
    """
    if sampled and a.shape[1] >= 2 * _MEDIAN_COLUMNS:
        a = a[:, :: a.shape[1] // _MEDIAN_COLUMNS]
    out = np.full(a.shape[0], np.nan)
    has = np.isfinite(a).any(axis=1)
    if has.any():
        part = a[has]
        if np.isnan(part).any():
            out[has] = np.nanmedian(part, axis=1)
        else:
            out[has] = np.median(part, axis=1)
    return out


def _local_typical(values, half=_TYPICAL_ROWS, rank=_TYPICAL_RANK):
    """Running ``rank``-th largest value over ``2 * half + 1`` entries (mirrored at the ends); NaN entries
    take the global median.

    The typical value of a line statistic for the glitch finder. On a noise-dominated
    image every line has about the same value and this is close to the running median;
    on an image with structure along the slow-scan axis (a lattice, a CDW, a moiré) the
    statistic varies from line to line with the structure itself (a line through a row
    of atoms sticks out of both neighbours, the line between does not), and the lines
    that the structure makes roughest recur within every period shorter than ``half``:
    a clean line is then never rougher than the ``rank``-th roughest line near it, while
    up to ``rank - 1`` glitched lines within the window are still seen.
    """
    from scipy.ndimage import rank_filter

    v = np.asarray(values, dtype=float)
    finite = np.isfinite(v)
    if not finite.any():
        return v
    v = np.where(finite, v, np.median(v[finite]))
    return rank_filter(v, rank=-min(rank, v.size), size=2 * half + 1, mode="mirror")


def _row_mean(a):
    """Mean of each row over its finite entries (NaN for a row with none), without warnings."""
    finite = np.isfinite(a)
    count = finite.sum(axis=1)
    total = np.where(finite, a, 0.0).sum(axis=1)
    return np.where(count > 0, total / np.maximum(count, 1), np.nan)


def _sticking_out(centre, above, below):
    """How far each pixel of a line sticks out of both neighbouring lines the same way.

    With u = centre - above and d = centre - below (each minus its median over the
    line, so that line offsets cancel), a pixel sticks out by min(|u|, |d|) when u
    and d have one sign, and by 0 otherwise. A step edge crossing between two lines,
    or a ramp through them, changes the pixel against one neighbour only, or with
    opposite signs, and does not stick out; garbage and spikes do.
    """
    u = centre - above
    u -= _row_median(u, sampled=True)[:, None]
    d = centre - below
    d -= _row_median(d, sampled=True)[:, None]
    out = np.minimum(np.abs(u), np.abs(d))
    out[(u > 0) != (d > 0)] = 0.0
    out[~(np.isfinite(u) & np.isfinite(d))] = np.nan
    return out, 1.4826 * _row_median(np.abs(d), sampled=True)


def _glitch_rows(x, floor):
    """Lines that stick out of both neighbouring lines: garbage, or a line of spikes.

    ``x`` holds NaN on masked pixels. A line is glitched when the mean over the line
    of :func:`_sticking_out` exceeds :data:`GLITCH_RATIO` times its typical value
    (:func:`_local_typical`: the 6th largest within 64 lines), or when more than 2 % of its
    pixels (and at least 4) stick out by 8 typical robust standard deviations of the
    line-to-line differences, and 3 times as many as typical. The first and last lines,
    with one neighbour each, are compared with their neighbour alone (and with the 6th
    largest one-sided step among the next 16). Lines found are left out of the typical
    values and the search repeated (:func:`_glitch_rounds`).
    """
    n, m = x.shape
    if n < 3 or m < 8:
        return np.zeros(n, bool)
    mean = np.full(n, np.nan)
    spread = np.full(n, np.nan)  # robust spread of the line-to-line differences, the scale of a spike
    out = np.full((n, m), np.nan, np.float32)
    block = max(1, 2**20 // m)  # rows per block: bounded float64 temporaries
    for start in range(1, n - 1, block):
        stop = min(n - 1, start + block)
        s, spread[start:stop] = _sticking_out(x[start:stop], x[start - 1 : stop - 1], x[start + 1 : stop + 1])
        mean[start:stop] = _row_mean(s)
        out[start:stop] = s
    (mean[0], out[0], _), (mean[-1], out[-1], _) = _glitch_ends(lambda r: x[r], n)

    def counts(spike_at):
        return np.sum(out > spike_at[:, None].astype(np.float32), axis=1).astype(float)

    return _glitch_rounds(mean, spread, lambda r: x[r], counts, m, floor)


#: Rounds of :func:`_glitch_rounds` at most.
_GLITCH_ROUNDS = 4


def _glitch_rounds(mean, spread, row, counts, m, floor):
    """Glitched lines, found in rounds: the typical values of each round leave out the lines found so far.

    ``mean`` and ``spread`` are the per-line sticking-out and difference spread (the end
    lines' means from :func:`_glitch_ends`), ``row(r)`` gives line r (only the
    :data:`_END_ROWS` lines at either end are asked for) and ``counts(spike_at)`` the
    per-line spike counts. A glitched line is left out of the typical values (with the
    line above it, whose difference to it is garbage), so that several glitched lines
    within the window of :func:`_local_typical` do not raise it for one another.
    """
    n = mean.size
    glitch = np.zeros(n, bool)
    for _ in range(_GLITCH_ROUNDS):
        above = np.zeros(n, bool)
        above[:-1] = glitch[1:]
        (_, _, top), (_, _, bottom) = _glitch_ends(row, n, glitch)
        typical, spike_at = _glitch_thresholds(np.where(glitch, np.nan, mean),
                                               np.where(glitch | above, np.nan, spread), (top, bottom), floor)
        count = counts(spike_at)
        found = glitch | _glitch_verdict(mean, typical, count, m, floor, _end_counts(row, n, spike_at, glitch),
                                         np.where(glitch, np.nan, count))
        if (found == glitch).all():
            break
        glitch = found
    return glitch


#: Rows at each end of an image that :func:`_glitch_ends` reads.
_END_ROWS = 2 * _WINDOW_ROWS + 2


def _glitch_ends(row, n, exclude=None):
    """The first and last lines, with one neighbour each: (mean, sticking-out values, typical value) of each.

    ``row(r)`` returns line r of the image (NaN on masked pixels); only the
    :data:`_END_ROWS` lines at either end are asked for.
    """
    ends = []
    for r, other in ((0, 1), (n - 1, n - 2)):
        d = row(r) - row(other)
        d = np.abs(d - np.nanmedian(d)) if np.isfinite(d).any() else d
        mean = np.nanmean(d) if np.isfinite(d).any() else np.nan
        typical_step = sorted(np.nanmean(v) for v in _near_end_steps(row, n, r, exclude))
        ends.append((mean, d, typical_step[-min(_TYPICAL_RANK, len(typical_step))] if typical_step else np.nan))
    return ends


def _near_end_steps(row, n, r, exclude=None):
    """|d - median(d)| of the one-sided steps between the lines near end line ``r`` (0 or n - 1),
    leaving out steps to a line in ``exclude`` (bool per line)."""
    near = range(1, min(n - 1, 2 * _WINDOW_ROWS + 1)) if r == 0 else range(max(0, n - 2 * _WINDOW_ROWS - 2), n - 2)
    if exclude is not None:
        near = [k for k in near if not (exclude[k] or exclude[k + 1])]
    steps = (row(k + 1) - row(k) for k in near)
    return [np.abs(v - np.nanmedian(v)) for v in steps if np.isfinite(v).any()]


def _end_counts(row, n, spike_at, exclude=None):
    """Typical spike counts of the first and last lines: the :data:`_TYPICAL_RANK`-th largest count of
    one-sided steps above ``spike_at`` among the lines near each end (an end line has one neighbour,
    so its count is compared with one-sided counts, not with the two-sided ones inside)."""
    out = []
    for r in (0, n - 1):
        counts = sorted(float(np.sum(v > spike_at[r])) for v in _near_end_steps(row, n, r, exclude))
        out.append(counts[-min(_TYPICAL_RANK, len(counts))] if counts else np.nan)
    return out


def _glitch_thresholds(mean, spread, one_sided, floor):
    """The typical sticking-out of each line (:func:`_local_typical`) and the height above which a pixel is a spike."""
    typical = _local_typical(np.concatenate([[np.nan], mean[1:-1], [np.nan]]))
    typical[0], typical[-1] = one_sided
    typical = np.where(np.isfinite(typical), typical, floor)
    typical = np.maximum(typical, floor)
    spike_at = np.maximum(_SPIKE_SIGMAS * _local_typical(spread), floor)
    return typical, spike_at


def _glitch_verdict(mean, typical, count, m, floor, end_counts=None, others=None):
    """Glitched lines from their mean sticking-out and their count of spikes (see :func:`_glitch_rows`).

    ``end_counts``: typical counts of the first and last lines (:func:`_end_counts`);
    ``others``: the counts the typical count is taken from (default ``count``)."""
    others = count if others is None else others
    typical_count = _local_typical(np.concatenate([[np.nan], others[1:-1], [np.nan]]))
    if end_counts is not None:
        typical_count[0] = end_counts[0] if np.isfinite(end_counts[0]) else typical_count[0]
        typical_count[-1] = end_counts[1] if np.isfinite(end_counts[1]) else typical_count[-1]
    min_spikes = max(4.0, _MIN_SPIKE_FRACTION * m)
    rough = np.where(np.isfinite(mean), mean > GLITCH_RATIO * typical + floor, False)
    spiky = count > np.maximum(GLITCH_RATIO * typical_count, typical_count + min_spikes)
    return rough | spiky


def _change_points(values, sigma, t_min, min_size, min_jump):
    """Binary segmentation of a sequence into runs of constant mean (two-sample t test)."""
    found = []

    def split(lo, hi):
        seg = values[lo:hi]
        n = seg.size
        if n < 2 * min_size or len(found) >= _MAX_TIP_CHANGES:
            return
        k = np.arange(min_size, n - min_size + 1)
        cs = np.cumsum(seg)
        left = cs[k - 1] / k
        right = (cs[-1] - cs[k - 1]) / (n - k)
        t = np.abs(left - right) / (sigma * np.sqrt(1.0 / k + 1.0 / (n - k)))
        best = int(np.argmax(t))
        at = int(k[best])
        w = min(2 * min_size, at, n - at)
        jump = np.median(seg[at : at + w]) - np.median(seg[at - w : at])
        if t[best] < t_min or abs(jump) < min_jump:
            return
        found.append((lo + at, float(jump)))
        split(lo, lo + at)
        split(lo + at, hi)

    split(0, values.size)
    return sorted(found)


def _tip_changes(x, valid_rows, jump_threshold, floor):
    """Tip changes: persistent offset jumps and abrupt changes of the row roughness.

    Returns (offsets per row to subtract, [(row, offset_jump, contrast_ratio), ...]).
    """
    n, m = x.shape
    rows = np.flatnonzero(valid_rows)
    if rows.size < 2 * _MIN_SEGMENT_ROWS or m < 8:
        return np.zeros(n), []
    xc = x if rows.size == n else x[rows]  # a view when no line is masked
    rough = np.empty(rows.size)
    block = max(1, 2**20 // m)
    for start in range(0, rows.size, block):
        rough[start : start + block] = _row_roughness(xc[start : start + block])
    return _tip_changes_from(rough, _line_steps(xc), valid_rows, m, jump_threshold, floor)


def _row_roughness(x):
    """Roughness of each line along the fast axis: the robust spread of its pixel-to-pixel differences.

    Blind to offsets, to step edges crossing the line and to slow noise.
    """
    d = np.diff(x, axis=1)
    d -= _row_median(d, sampled=True)[:, None]
    return 1.4826 * _row_median(np.abs(d), sampled=True)


def _tip_changes_from(rough, line_steps, valid_rows, m, jump_threshold, floor):
    """:func:`_tip_changes` from the roughness of the trusted lines and the steps between consecutive ones."""
    n = valid_rows.size
    offsets = np.zeros(n)
    rows = np.flatnonzero(valid_rows)
    if rows.size < 2 * _MIN_SEGMENT_ROWS or m < 8:
        return offsets, []
    # 1. Roughness of each line along the fast axis (:func:`_row_roughness`).
    rough = np.asarray(rough, dtype=float)
    rough = np.where(np.isfinite(rough), np.maximum(rough, floor), floor)
    log_rough = np.log(rough)

    def contrast(at):
        w = min(2 * _MIN_SEGMENT_ROWS, at, rows.size - at)
        return math.exp(np.median(log_rough[at : at + w]) - np.median(log_rough[at - w : at])) if w > 0 else 1.0

    # 2. Offset jumps between consecutive trusted lines (glitched lines left out, so a
    #    jump across a glitched line is still seen), kept only where the new level persists.
    steps = _offsets_from_steps(line_steps, rows.size, jump_threshold)
    jumps = np.diff(steps)
    events = {}
    persistent = np.zeros(rows.size)
    w = 3
    for j in np.flatnonzero(jumps != 0):
        before = np.median(steps[max(0, j + 1 - w) : j + 1])
        after = np.median(steps[j + 1 : j + 1 + w])
        if abs(after - before) > 0.5 * abs(jumps[j]) and j + 1 + w <= rows.size:
            persistent[j + 1 :] += jumps[j]
            events[int(rows[j + 1])] = [float(jumps[j]), contrast(j + 1)]
    # 3. Abrupt changes of the roughness (contrast), with or without an offset jump.
    sigma = 1.4826 * np.median(np.abs(np.diff(log_rough))) / math.sqrt(2)
    if sigma > 0:
        for at, _ in _change_points(log_rough, sigma, TIP_T_MIN, _MIN_SEGMENT_ROWS, math.log(TIP_MIN_RATIO)):
            row = int(rows[at])
            if not any(abs(r - row) <= 2 for r in events):
                events[row] = [0.0, contrast(at)]
    offsets[rows] = persistent
    # A masked line takes the level of the trusted line above it.
    if rows.size < n:
        index = np.maximum.accumulate(np.where(valid_rows, np.arange(n), 0))
        offsets = offsets[index]
        offsets[: rows[0]] = persistent[0]
    return offsets, sorted((r, j, c) for r, (j, c) in events.items())


def _edge_z2(smooth, half):
    """Squared normalised edge strength: differences over 2 * half pixels along and across the lines."""
    h = half
    gx = smooth[h:-h, 2 * h :] - smooth[h:-h, : -2 * h]
    gx -= _row_median(gx, sampled=True).astype(np.float32)[:, None]
    gy = smooth[2 * h :, h:-h] - smooth[: -2 * h, h:-h]
    gy -= _row_median(gy, sampled=True).astype(np.float32)[:, None]
    sub = (slice(None, None, 2), slice(None, None, 2))
    sx = np.float32(1.4826) * np.median(np.abs(gx[sub]))
    sy = np.float32(1.4826) * np.median(np.abs(gy[sub]))
    return gx, gy, sx, sy


def _edge_strength_mask(x, mask):
    """Pixels on a step edge: the smoothed gradient far above its robust spread, at two scales.

    Line offsets and a tilt cancel: the row-to-row difference has its median over the
    row removed, and so has the along-row difference. A periodic corrugation gives a
    bounded gradient (a few robust standard deviations at most), white noise a
    Gaussian one; a step many corrugations high stands far above both. The fine
    scale finds sharp edges, the coarse one edges blurred by the tip over several
    pixels; pixels above half the threshold join an edge they touch (hysteresis).
    """
    from scipy.ndimage import gaussian_filter, label

    n, m = x.shape
    floor = np.float32(max(_floor(x), 1e-30))
    work = x if x.dtype == np.float32 else np.array(x, dtype=np.float32)  # callers hand over a float32 copy
    if mask is not None and mask.any() and (~mask).any():
        # Each untrusted pixel takes the value of the nearest trusted one: no artificial edge
        # around a masked spot, and a step edge runs on through a masked line or column.
        from scipy.ndimage import distance_transform_edt

        nearest = distance_transform_edt(mask, return_distances=False, return_indices=True)
        work[mask] = work[nearest[0][mask], nearest[1][mask]]
        del nearest
    high = np.zeros((n, m), bool)
    low = np.zeros((n, m), bool)
    for sigma in _EDGE_SCALES_PX:
        half = int(math.ceil(sigma))
        if min(n, m) <= 2 * half + 2:
            continue
        smooth = gaussian_filter(work, sigma, truncate=3.0)
        gx, gy, sx, sy = _edge_z2(smooth, half)
        del smooth
        gx /= max(sx, floor)
        gy /= max(sy, floor)
        np.square(gx, out=gx)
        np.square(gy, out=gy)
        gx += gy
        del gy
        high[half:-half, half:-half] |= gx > np.float32(EDGE_THRESHOLD**2)
        if sigma == _EDGE_SCALES_PX[0]:
            # Hysteresis on the fine scale only: the coarse one would widen the band.
            low[half:-half, half:-half] |= gx > np.float32((EDGE_THRESHOLD / 2) ** 2)
        del gx
    del work
    if not high.any():
        return high
    pieces, count = label(low | high, structure=np.ones((3, 3), bool))
    seeded = np.zeros(count + 1, bool)
    seeded[pieces[high]] = True
    seeded[0] = False
    return seeded[pieces]


def _disk(radius):
    r = int(radius)
    yy, xx = np.mgrid[-r : r + 1, -r : r + 1]
    return yy**2 + xx**2 <= r * r + r  # a digital disk


def _terrace_labels(x, mask):
    """Terrace labels (1 = largest, 0 = step-edge band) and the band, or (None, None) for one terrace."""
    from scipy.ndimage import binary_dilation, label

    edge = _edge_strength_mask(x, mask)
    if not edge.any():
        return None, None
    band = binary_dilation(edge, structure=_disk(EDGE_MARGIN_PX)) if EDGE_MARGIN_PX > 0 else edge
    del edge
    labels, count = label(~band)
    if count < 2:
        return None, None
    sizes = np.bincount(labels.ravel(), minlength=count + 1)
    sizes[0] = 0
    min_size = max(_MIN_TERRACE_PIXELS, _MIN_TERRACE_FRACTION * labels.size)
    keep = np.flatnonzero(sizes >= min_size)
    if keep.size < 2:
        return None, None
    order = keep[np.argsort(-sizes[keep], kind="stable")]
    remap = np.zeros(count + 1, np.int32)
    remap[order] = np.arange(1, order.size + 1, dtype=np.int32)
    labels = remap[labels]
    return labels, labels == 0


def _fit_terraces(values, rows, cols, terrace, shape, order, n_terraces):
    """Least squares: one polynomial for the whole image plus a free offset per terrace (terrace 1 fixed at 0)."""
    terms = _terms(order)
    p = len(terms) + n_terraces - 1
    if values.size < p:
        raise InputError(f"only {values.size} trusted pixels on the terraces; the fit needs at least {p}")
    r_aug = np.zeros((0, p + 1))  # as in _fit_blocks: R of [design | values]
    for start in range(0, values.size, _BLOCK_PIXELS):
        stop = start + _BLOCK_PIXELS
        u = _scaled(cols[start:stop], shape[1])
        v = _scaled(rows[start:stop], shape[0])
        t = terrace[start:stop]
        columns = [u**i * v**j for i, j in terms] + [(t == k).astype(float) for k in range(2, n_terraces + 1)]
        columns.append(values[start:stop].astype(float))
        r_aug = np.linalg.qr(np.vstack([r_aug, np.stack(columns, axis=1)]), mode="r")[: p + 1]
    r_factor, rhs = r_aug[:p, :p], r_aug[:p, p]
    singular = np.linalg.svd(r_factor, compute_uv=False)
    if singular[-1] <= 1e-10 * singular[0]:
        raise InputError("the terraces and the polynomial background are not separable; lower the order")
    solution = np.linalg.solve(r_factor, rhs)
    return solution[: len(terms)], np.concatenate([[0.0], solution[len(terms) :]])


def _drop_untrusted_terraces(labels, mask):
    """Terraces with too few trusted pixels (all inside a masked area) join the band; renumber the rest."""
    return _keep_trusted_terraces(labels, np.bincount(labels[~mask], minlength=int(labels.max()) + 1))


def _keep_trusted_terraces(labels, trusted):
    """:func:`_drop_untrusted_terraces` given the count of trusted pixels of each label."""
    keep = np.asarray(trusted) >= _MIN_TERRACE_PIXELS
    keep[0] = False
    if keep.sum() < 2:
        return None, None
    if keep[1:].all():
        return labels, labels == 0
    remap = np.zeros(keep.size, np.int32)
    remap[np.flatnonzero(keep)] = np.arange(1, keep.sum() + 1, dtype=np.int32)  # area order is kept
    labels = remap[labels]
    return labels, labels == 0


def _terrace_sample(x, mask, labels, budget):
    """A strided subsample of at most ``budget`` pixels: the step, the image there, the terrace labels
    there, the usable pixels (on a terrace, finite, not masked) and their (row, col) in the subsample.

    ``x`` may be a dask array (its subsample is read now) and ``labels`` an :class:`_Overview`.
    """
    step = _subsample_step(x.shape, budget)
    sub = (slice(None, None, step), slice(None, None, step))
    xs = np.asarray(x[sub].compute() if _is_dask(x) else x[sub])
    lab = labels[sub]
    good = (lab > 0) & np.isfinite(xs)
    if mask is not None:
        good &= ~mask[sub]
    rows, cols = np.nonzero(good)
    return step, xs, lab, good, rows, cols


def _terrace_fit(x, mask, labels, order):
    """Fit polynomial + offsets on the trusted terrace pixels (strided subsample above _TERRACE_FIT_PIXELS)."""
    step, xs, lab, good, rows, cols = _terrace_sample(x, mask, labels, _TERRACE_FIT_PIXELS)
    n_terraces = int(labels.max())
    present = np.bincount(lab[good], minlength=n_terraces + 1)
    if np.any(present[1:] == 0):
        raise InputError("a terrace has no trusted pixel left for the fit")
    poly, offsets = _fit_terraces(xs[good], rows * step, cols * step, lab[good], x.shape, max(order, 0),
                                  n_terraces)
    return poly, offsets


def _merge_terraces(x, mask, labels, offsets, poly, order, significance, floor=None):
    """Join terraces whose offsets differ by less than ``significance`` robust sigmas of the levelled image.

    The robust sigma is that of the residual with each line's median removed: the
    corrugation and the noise, not the line offsets. ``floor`` is :func:`_floor` of
    ``x`` (computed here when not given).
    """
    step, xs, lab, good, rows, cols = _terrace_sample(x, mask, labels, _MERGE_SAMPLE_PIXELS)
    background = np.zeros(rows.size)
    for c, (i, j) in zip(poly, _terms(order)):
        background += c * _scaled(cols * step, x.shape[1]) ** i * _scaled(rows * step, x.shape[0]) ** j
    residual = np.full(lab.shape, np.nan)
    residual[good] = xs[good] - background - offsets[lab[good] - 1]
    # Each line's median removed: line noise is no corrugation and must not hide a step.
    residual -= _row_median(residual)[:, None]
    residual = residual[good]
    scale = 1.4826 * np.median(np.abs(residual)) if residual.size else 0.0
    tol = max(significance * scale, _floor(x) if floor is None else floor)
    sorted_ids = np.argsort(offsets)
    group = np.zeros(offsets.size, int)
    g = 0
    for a, b in zip(sorted_ids[:-1], sorted_ids[1:]):
        if offsets[b] - offsets[a] > tol:
            g += 1
        group[b] = g
    group[sorted_ids[0]] = 0
    return group


def _interpolate_rows(out, bad_rows):
    """Replace each bad row by the linear interpolation of the nearest good rows above and below."""
    n = out.shape[0]
    good = np.flatnonzero(~bad_rows)
    if good.size == 0:
        return
    for r in np.flatnonzero(bad_rows):
        above = good[good < r]
        below = good[good > r]
        if above.size and below.size:
            a, b = above[-1], below[0]
            w = (r - a) / (b - a)
            out[r] = (1 - w) * out[a] + w * out[b]
        else:
            out[r] = out[above[-1]] if above.size else out[below[0]]


def _check_mode(value, name):
    if value is True or value is False or (isinstance(value, str) and value == "auto"):
        return value
    raise InputError(f"{name} must be 'auto', True or False, got {value!r}")


def _check_glitches(glitches, nrows):
    if glitches is True or glitches is False or (isinstance(glitches, str) and glitches == "auto"):
        return glitches
    try:
        rows = np.asarray(glitches)
    except Exception:  # noqa: BLE001 - any unusable object is bad input
        rows = None
    if rows is None or rows.ndim != 1 or rows.dtype.kind not in "iu" or np.any(rows < 0) or np.any(rows >= nrows):
        raise InputError(
            f"glitches must be 'auto', True, False or a list of row indices from 0 to {nrows - 1}, got {glitches!r}"
        )
    return tuple(sorted({int(r) for r in rows}))


def _level_with_findings(image, mask, order, lines, jump_threshold, terraces, glitches, tip_changes):
    """Level one in-memory 2-D image, finding glitched lines, tip changes and terraces first.

    Returns (levelled, mask, findings dict). With nothing found the result is exactly
    the plain levelling of :func:`_level_image`.
    """
    filled, combined = nan_to_mask(image, mask)
    nonfinite = ~np.isfinite(np.asarray(image)) if np.asarray(image).dtype.kind == "f" else None
    n, m = filled.shape
    x = np.array(filled, dtype=float)
    if combined is not None:
        x[combined] = np.nan
    floor = _floor(x)
    findings = {"glitch_rows": (), "tips": [], "labels": None, "band": None, "offsets": (0.0,)}

    # 1. Glitched lines (explicit rows, or detected).
    if isinstance(glitches, tuple):
        glitch = np.zeros(n, bool)
        glitch[list(glitches)] = True
    elif glitches:
        glitch = _glitch_rows(x, floor)
    else:
        glitch = np.zeros(n, bool)
    if glitch.any():
        x[glitch] = np.nan
    valid_rows = np.isfinite(x).any(axis=1)

    # 2. Tip changes: remove the persistent offset jumps.
    tip_offsets = np.zeros(n)
    if tip_changes:
        tip_offsets, tips = _tip_changes(x, valid_rows, jump_threshold, floor)
        findings["tips"] = tips
        if tips:
            x -= tip_offsets[:, None]

    # 3. Terraces, on the image with glitched lines filled from their neighbours.
    labels = band = None
    fit_order = max(order, 1) if order is not None else 1  # the offsets need at least a plane beside them
    work_mask = combined.copy() if combined is not None else np.zeros((n, m), bool)
    work_mask |= glitch[:, None]
    if terraces:
        detect = x.astype(np.float32)  # the edge finder works in float32 and may overwrite it
        _interpolate_rows(detect, ~valid_rows)
        others = work_mask & ~glitch[:, None]
        detect[~np.isfinite(detect)] = 0.0
        labels, band = _terrace_labels(detect, others if others.any() else None)
        del detect
        if labels is not None:
            labels, band = _drop_untrusted_terraces(labels, work_mask)
        if labels is not None:
            poly, offsets = _terrace_fit(x, work_mask, labels, fit_order)
            if terraces == "auto":
                group = _merge_terraces(x, work_mask, labels, offsets, poly, fit_order, STEP_SIGNIFICANCE)
                if group.max() < 1:
                    labels = band = None
                elif np.unique(group).size < offsets.size:
                    # Terraces at one level become one terrace (numbered by total area).
                    sizes = np.bincount(labels.ravel(), minlength=offsets.size + 1)[1:]
                    totals = np.bincount(group, weights=sizes)
                    rank = np.empty(totals.size, np.int32)
                    rank[np.argsort(-totals, kind="stable")] = np.arange(1, totals.size + 1, dtype=np.int32)
                    remap = np.concatenate([[0], rank[group]]).astype(np.int32)
                    labels = remap[labels]
                    poly, offsets = _terrace_fit(x, work_mask, labels, fit_order)
        if labels is not None and lines is not None:
            # Terraces cover different lines, so line offsets bias their offsets: remove the
            # line offsets of the step-free image, then fit the terraces again.
            step_free = x - offsets[np.maximum(labels, 1) - 1]
            step_free[band] = np.nan
            line_fit = _line_offsets(step_free, lines, work_mask | band, jump_threshold)
            del step_free
            x -= line_fit[:, None]
            poly, offsets = _terrace_fit(x, work_mask, labels, fit_order)
            tip_offsets = tip_offsets + line_fit
        if labels is not None:
            x -= offsets[np.maximum(labels, 1) - 1]
            x[band] = np.nan
            findings.update(labels=labels, band=band, offsets=tuple(float(v) for v in offsets))

    findings["glitch_rows"] = tuple(int(r) for r in np.flatnonzero(glitch))
    if labels is None and not glitch.any() and not findings["tips"]:
        out, combined = _level_image(image, mask, order, lines, jump_threshold)
        return out, combined, findings

    # 4. Line offsets and the polynomial background on the step-free image.
    full_mask = work_mask | band if band is not None else work_mask
    corrected = filled.astype(float) - tip_offsets[:, None]
    if labels is not None:
        corrected -= np.asarray(findings["offsets"])[np.maximum(labels, 1) - 1]
    out = corrected.astype(filled.dtype)
    del corrected
    if lines is not None:
        line_mask = full_mask | ~np.isfinite(out)
        out = out - _line_offsets(out, lines, line_mask, jump_threshold).astype(out.dtype)[:, None]
    if order is not None:
        coefficients = _fit_coefficients(out, full_mask, order)
        out = _subtract_polynomial(out, coefficients, order)  # out is a fresh array (nan_to_mask copies)
    # Untrusted pixels: glitched lines interpolated from their neighbours (keeps the
    # corrugation for a spectrum); the step-edge band and non-finite pixels get the mean level.
    _interpolate_rows(out, glitch)
    fill = out[~full_mask].mean(dtype=float) if (~full_mask).any() else 0.0
    if band is not None:
        out[band] = fill
    if nonfinite is not None and nonfinite.any():
        out[nonfinite & ~glitch[:, None]] = fill
    return out, full_mask, findings


# --------------------------------------------------------------------------- lazy (dask) levelling
#
# A dask image is levelled without ever being held whole. Every statistic is a per-row one,
# computed chunk by chunk of whole rows (with one row of each neighbouring chunk where a line
# is compared with the next), or comes from a strided subsample; the terrace finder works on
# an overview of block means. What the finders and fits decide is a few per-row vectors,
# polynomial coefficients and an overview label image: they are applied chunk by chunk.
# An image no larger than the overview is its own overview, and is then levelled exactly as
# in memory (up to the order of floating-point sums).

#: Largest number of pixels in one chunk of whole rows while a lazy image is levelled
#: (each worker thread holds a few float64 copies of a chunk).
ROW_CHUNK_PIXELS = 2**20
#: The terrace finder of a lazy image works on an overview of block means of at most this
#: many pixels; the step-edge band is then masked in blocks of the overview's pixels.
OVERVIEW_PIXELS = 2**22


def _full_rows(x, align=1):
    """``x`` rechunked, if needed, so that every chunk holds whole rows.

    A chunk keeps its rows unless it would exceed :data:`ROW_CHUNK_PIXELS`, when it is split
    evenly; with ``align`` > 1 every chunk border falls on a multiple of ``align`` rows.
    """
    n, m = x.shape
    limit = max(1, ROW_CHUNK_PIXELS // max(m, 1))
    if align > 1:
        limit = max(align, limit // align * align)
        rows = [limit] * (n // limit) + ([n % limit] if n % limit else [])
    else:
        rows = []
        for size in x.chunks[0]:
            pieces = -(-size // limit)
            rows.extend(size // pieces + (1 if i < size % pieces else 0) for i in range(pieces))
    rows = tuple(int(r) for r in rows)
    if x.numblocks[1] == 1 and rows == tuple(x.chunks[0]):
        return x
    return x.rechunk((rows, (m,)))


def _aligned_mask(mask, like):
    """A mask (numpy or dask, or None) as a dask array chunked like ``like``."""
    if mask is None:
        return None
    import dask.array as da

    if _is_dask(mask):
        return mask.astype(bool).rechunk(like.chunks)
    return da.from_array(np.asarray(mask, dtype=bool), chunks=like.chunks)


def _run_chunk(img, mask=None, *, fn, p, block_info=None):
    (r0, _), (c0, _) = block_info[0]["array-location"]
    return fn(img, mask, r0, c0, p)


def _map_chunks(func, img, mask, p, dtype):
    """``func(img_chunk, mask_chunk, row0, col0, p)`` on every chunk: a lazy array like ``img``.

    ``p`` holds plain numbers and numpy arrays; dask puts a large one into the graph once.
    """
    import dask.array as da

    arrays = [img] if mask is None else [img, mask]
    dtype = np.dtype(dtype)
    return da.map_blocks(_run_chunk, *arrays, fn=func, p=p, dtype=dtype, meta=np.empty((0, 0), dtype))


def _run_rows(img, mask=None, *, fn, p, halo, starts, nb, block_info=None):
    i = block_info[0]["chunk-location"][0]
    top = halo if i > 0 else 0
    bottom = halo if i < nb - 1 else 0
    return np.asarray(fn(img, mask, top, bottom, starts[i], p), dtype=float)


def _row_pass(func, img, mask, p, ncols, halo=0):
    """Per-row statistics of a lazy image of whole-row chunks, read chunk by chunk (numpy, shape (rows, ncols)).

    ``func(chunk, mask_chunk, top, bottom, row0, p)`` returns the statistics of the chunk's own
    rows; with ``halo`` the chunk carries ``top`` rows of the chunk above and ``bottom`` rows of
    the one below (none at the image's edges), and ``row0`` is the global index of its first own row.
    """
    import dask.array as da

    arrays = [img] if mask is None else [img, mask]
    nb = img.numblocks[0]
    starts = tuple(int(v) for v in np.cumsum((0,) + tuple(img.chunks[0][:-1])))
    halo = halo if nb > 1 else 0
    if halo:
        arrays = [da.overlap.overlap(a, depth={0: halo, 1: 0}, boundary="none") for a in arrays]
    out = da.map_blocks(_run_rows, *arrays, fn=func, p=p, halo=halo, starts=starts, nb=nb,
                        chunks=(img.chunks[0], (ncols,)), dtype=float, meta=np.empty((0, 0)))
    return out.compute()


def _gather(x, batch=8):
    """A lazy array of whole-row chunks read into one numpy array, a few chunks at a time.

    ``x.compute()`` would hold every chunk and their concatenation at once (twice the result).
    """
    import dask

    out = np.empty(x.shape, x.dtype)
    bounds = np.cumsum((0,) + tuple(x.chunks[0]))
    for start in range(0, x.numblocks[0], batch):
        stop = min(start + batch, x.numblocks[0])
        parts = dask.compute(*[x.blocks[i] for i in range(start, stop)])
        for i, part in zip(range(start, stop), parts):
            out[bounds[i] : bounds[i + 1]] = part
    return out


def _filled(img, p):
    """A chunk as ``nan_to_mask`` fills it: the float dtype, non-finite pixels at the image's finite mean."""
    vals = np.array(img, dtype=p["dtype"])
    finite = np.isfinite(vals)
    if not finite.all():
        vals[~finite] = p["fill_in"]
    return vals, finite


def _terrace_chunk(p, r0, c0, shape):
    """Terrace labels of a chunk, read off the overview (each overview pixel covers f x f pixels)."""
    labels, f = p["terr"][0], p["terr"][1]
    return labels[np.ix_(np.arange(r0, r0 + shape[0]) // f, np.arange(c0, c0 + shape[1]) // f)]


def _labels_chunk(img, mask, r0, c0, p):
    return _terrace_chunk(p, r0, c0, img.shape).astype(np.int32)


def _x_chunk(img, mask, r0, c0, p):
    """The float64 working image of the finders (NaN where untrusted), as far as ``p`` has got."""
    vals, finite = _filled(img, p)
    x = vals.astype(float)
    x[~finite if mask is None else (~finite | mask)] = np.nan
    rows = slice(r0, r0 + x.shape[0])
    if p.get("glitch") is not None:
        x[p["glitch"][rows]] = np.nan
    if p.get("shift") is not None:
        x -= p["shift"][rows, None]
    if p.get("terr") is not None:
        lab = _terrace_chunk(p, r0, c0, x.shape)
        x -= p["terr"][2][np.maximum(lab, 1) - 1]
        x[lab == 0] = np.nan
    return x


def _out_chunk(img, mask, r0, c0, p):
    """The levelled chunk, as far as ``p`` has got (``as_x``: float64 with NaN where untrusted)."""
    vals, finite = _filled(img, p)
    dtype = p["dtype"]
    rows = slice(r0, r0 + vals.shape[0])
    lab = _terrace_chunk(p, r0, c0, vals.shape) if p.get("terr") is not None else None
    if p.get("shift") is not None or lab is not None:
        corrected = vals.astype(float)
        if p.get("shift") is not None:
            corrected -= p["shift"][rows, None]
        if lab is not None:
            corrected -= p["terr"][2][np.maximum(lab, 1) - 1]
        out = corrected.astype(dtype)
    else:
        out = vals
    if p.get("line") is not None:
        out = out - p["line"][rows].astype(dtype)[:, None]
    if p.get("coef") is not None:
        out -= _evaluate(p["coef"], p["order"], p["shape"], r0, c0, out.shape).astype(dtype)
    glitch = p["glitch"][rows] if p.get("glitch") is not None else None
    if p.get("as_x"):
        x = out.astype(float)
        untrusted = ~finite if mask is None else (~finite | mask)
        if glitch is not None:
            untrusted[glitch] = True
        if lab is not None:
            untrusted |= lab == 0
        x[untrusted | ~np.isfinite(x)] = np.nan
        return x
    if p.get("interp") is not None:
        index, values = p["interp"]
        inside = (index >= r0) & (index < rows.stop)
        out[index[inside] - r0] = values[inside]
    if p.get("fill") is not None:
        target = ~finite
        if glitch is not None:
            target[glitch] = False
        if lab is not None:
            target |= lab == 0
        out[target] = p["fill"]
    return out


def _mask_chunk(img, mask, r0, c0, p):
    """The mask of the levelled chunk: untrusted input, glitched lines and the step-edge band."""
    out = ~np.isfinite(np.asarray(img, dtype=p["dtype"]))
    if mask is not None:
        out |= mask
    if p.get("glitch") is not None:
        out[p["glitch"][r0 : r0 + out.shape[0]]] = True
    if p.get("terr") is not None:
        out |= _terrace_chunk(p, r0, c0, out.shape) == 0
    return out


def _first_pass(img, mask, top, bottom, row0, p):
    """Per-row numbers of one chunk: non-finite count, trusted count, finite sum, min, max and, for the
    finders, the sticking-out mean and spread, the roughness and the step to the next line."""
    vals, finite = _filled(img, {"dtype": p["dtype"], "fill_in": 0.0})
    x = vals.astype(float)
    x[~finite if mask is None else (~finite | mask)] = np.nan
    k = x.shape[0] - top - bottom
    own = slice(top, top + k)
    out = np.full((k, 9), np.nan)
    out[:, 0] = (~finite[own]).sum(axis=1)
    xo = x[own]
    trusted = np.isfinite(xo)
    out[:, 1] = trusted.sum(axis=1)
    out[:, 2] = np.where(finite[own], vals[own], 0).astype(float).sum(axis=1)
    has = out[:, 1] > 0
    if has.any():
        out[has, 3] = np.nanmin(xo[has], axis=1)
        out[has, 4] = np.nanmax(xo[has], axis=1)
    if not p["finders"]:
        return out
    n = p["n"]
    g = row0 + np.arange(k)
    inner = np.flatnonzero((g >= 1) & (g <= n - 2))
    if inner.size:
        a, b = top + inner[0], top + inner[-1] + 1  # local rows with a neighbour on each side in x
        s, spread = _sticking_out(x[a:b], x[a - 1 : b - 1], x[a + 1 : b + 1])
        out[inner, 5] = _row_mean(s)
        out[inner, 6] = spread
    if x.shape[1] >= 2:
        out[:, 7] = _row_roughness(xo)
    nxt = np.flatnonzero(top + np.arange(k) + 1 < x.shape[0])
    if nxt.size:
        local = top + nxt
        out[nxt, 8] = _row_statistic(x[local + 1] - x[local], "median")
    return out


def _spike_pass(img, mask, top, bottom, row0, p):
    """Per-row count of pixels sticking out by more than the spike height (inner lines; 0 at the image's ends)."""
    x = _x_chunk(img, mask, row0 - top, 0, {"dtype": p["dtype"], "fill_in": 0.0})
    k = x.shape[0] - top - bottom
    out = np.zeros((k, 1))
    g = row0 + np.arange(k)
    inner = np.flatnonzero((g >= 1) & (g <= p["n"] - 2))
    if inner.size:
        a, b = top + inner[0], top + inner[-1] + 1
        s, _ = _sticking_out(x[a:b], x[a - 1 : b - 1], x[a + 1 : b + 1])
        s = s.astype(np.float32)
        out[inner, 0] = np.sum(s > p["spike_at"][g[inner]].astype(np.float32)[:, None], axis=1)
    return out


def _line_pass(img, mask, top, bottom, row0, p):
    """Per-row statistic of :func:`_line_offsets` for one chunk (``difference``: the step to the next line)."""
    x = _masked_float(img, mask)
    k = x.shape[0] - top - bottom
    own = x[top : top + k]
    method = p["method"]
    if method == "difference":
        out = np.full((k, 1), np.nan)
        nxt = np.flatnonzero(top + np.arange(k) + 1 < x.shape[0])
        if nxt.size:
            local = top + nxt
            out[nxt, 0] = _row_statistic(x[local + 1] - x[local], "median")
        return out
    if method == "hann":
        weights = np.hanning(x.shape[1] + 2)[1:-1]
        num = (np.nan_to_num(own) * weights).sum(axis=1)
        den = (~np.isnan(own) * weights).sum(axis=1)
        return np.stack([num, den], axis=1)
    return _row_statistic(own, method)[:, None]


def _row_numbers(x, rows, dtype=float):
    """Rows ``rows`` of a lazy image, read now (numpy)."""
    rows = np.asarray(rows, dtype=int)
    if rows.size == 0:
        return np.zeros((0, x.shape[1]), dtype)
    return np.asarray(x[rows].compute())


def _floor_of(lo, hi):
    """:func:`_floor` from per-row minima and maxima (NaN for a row with no finite pixel)."""
    lo, hi = np.asarray(lo, float), np.asarray(hi, float)
    finite = np.isfinite(lo) & np.isfinite(hi)
    if not finite.any():
        return 1e-300
    span = float(np.max(hi[finite])) - float(np.min(lo[finite]))
    return max(span * 64 * np.finfo(np.float64).eps, span * 1e-9, 1e-300)


def _overview(x, f, glitch):
    """Block means (f x f) of the lazy working image, with the trusted count of each block and its glitch rows."""
    n, m = x.shape
    if f == 1:
        values = np.asarray(x.compute())
        counts = np.isfinite(values).astype(float)
        return np.where(counts > 0, values, np.nan), counts, glitch.copy()
    import dask

    x = _full_rows(x, align=f)
    mo = -(-m // f)

    def means(block, which):
        rows = -(-block.shape[0] // f)
        padded = np.full((rows * f, mo * f), np.nan)
        padded[: block.shape[0], :m] = block
        cells = padded.reshape(rows, f, mo, f)
        finite = np.isfinite(cells)
        if which == "count":
            return finite.sum(axis=(1, 3)).astype(float)
        return np.where(finite, cells, 0.0).sum(axis=(1, 3))

    chunks = (tuple(-(-c // f) for c in x.chunks[0]), (mo,))
    sums, counts = dask.compute(
        x.map_blocks(means, "sum", chunks=chunks, dtype=float, meta=np.empty((0, 0))),
        x.map_blocks(means, "count", chunks=chunks, dtype=float, meta=np.empty((0, 0))),
    )
    rows = -(-n // f)
    padded = np.zeros(rows * f, bool)
    padded[:n] = glitch
    padded[n:] = True
    glitch_ov = padded.reshape(rows, f).all(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan), counts, glitch_ov


def _cell_areas(shape, f):
    """Number of image pixels each overview pixel covers."""
    n, m = shape
    rows = np.minimum(f, n - f * np.arange(-(-n // f)))
    cols = np.minimum(f, m - f * np.arange(-(-m // f)))
    return np.outer(rows, cols).astype(float)


class _Overview:
    """Terrace labels on the overview grid, read as if on the image grid (strided slices only)."""

    def __init__(self, labels, factor, shape):
        self.labels, self.factor, self.shape = labels, factor, tuple(shape)

    def __getitem__(self, key):
        rows = np.arange(self.shape[0])[key[0]] // self.factor
        cols = np.arange(self.shape[1])[key[1]] // self.factor
        return self.labels[np.ix_(rows, cols)]

    def max(self):
        return self.labels.max()


def _line_offsets_lazy(image, method, mask, jump_threshold):
    """Row statistics of :func:`_line_offsets` for a lazy image, chunk by chunk of whole rows."""
    img = _full_rows(image)
    msk = _aligned_mask(mask, img)
    if method == "difference":
        d = _row_pass(_line_pass, img, msk, {"method": method}, 1, halo=1)[:-1, 0]
        return d, None
    stat = _row_pass(_line_pass, img, msk, {"method": method}, 2 if method == "hann" else 1)
    return None, stat


def _level_lazy(image, mask, order, lines, jump_threshold, terraces=False, glitches=False, tip_changes=False):
    """:func:`_level_with_findings` for a dask image: (levelled dask image, mask (numpy or None), findings).

    With nothing found the mask is that of :func:`_level_image` (None when every pixel is
    trusted); the findings' terrace labels and edge band are lazy.
    """
    import dask.array as da

    dtype = _float_dtype(image.dtype)
    n, m = image.shape
    img = _full_rows(image)
    user = _aligned_mask(mask, img)
    findings = {"glitch_rows": (), "tips": [], "labels": None, "band": None, "offsets": (0.0,)}
    want_glitches = glitches is True or glitches == "auto"
    finders = want_glitches or bool(tip_changes)

    # 1. One read: per-row counts, sums, extremes and what the glitch and tip finders need.
    stats = _row_pass(_first_pass, img, user, {"dtype": dtype, "n": n, "finders": finders}, 9,
                      halo=1 if finders else 0)
    nonfinite_count = float(stats[:, 0].sum())
    if nonfinite_count >= n * m:
        raise InputError("image has no finite pixel (every pixel is NaN or inf)")
    fill_in = float(stats[:, 2].sum() / (n * m - nonfinite_count)) if nonfinite_count else 0.0
    base = {"dtype": dtype, "fill_in": fill_in}
    has = stats[:, 1] > 0
    floor = _floor_of(stats[:, 3], stats[:, 4])

    # 2. Glitched lines, from the per-row numbers and a second read counting spikes.
    glitch = np.zeros(n, bool)
    if isinstance(glitches, tuple):
        glitch[list(glitches)] = True
    elif want_glitches and n >= 3 and m >= 8:
        x0 = _map_chunks(_x_chunk, img, user, base, float)
        ends = np.unique(np.r_[0:min(n, _END_ROWS), max(0, n - _END_ROWS):n])
        end_rows = dict(zip(ends.tolist(), _row_numbers(x0, ends)))
        mean, spread = stats[:, 5].copy(), stats[:, 6].copy()
        (mean[0], d0, _), (mean[-1], d1, _) = _glitch_ends(end_rows.__getitem__, n)

        def counts(spike_at):  # one more read of the image per round
            count = _row_pass(_spike_pass, img, user, {"dtype": dtype, "n": n, "spike_at": spike_at}, 1, halo=1)[:, 0]
            count[0] = np.sum(np.asarray(d0, np.float32) > np.float32(spike_at[0]))
            count[-1] = np.sum(np.asarray(d1, np.float32) > np.float32(spike_at[-1]))
            return count

        glitch = _glitch_rounds(mean, spread, end_rows.__getitem__, counts, m, floor)
    valid_rows = has & ~glitch

    # 3. Tip changes, from the roughness of the lines and the steps between consecutive trusted ones.
    tip_offsets = np.zeros(n)
    if tip_changes:
        rows = np.flatnonzero(valid_rows)
        if rows.size >= 2 * _MIN_SEGMENT_ROWS and m >= 8:
            steps = stats[rows[:-1], 8].copy()
            gaps = np.flatnonzero(rows[1:] != rows[:-1] + 1)  # trusted lines with glitched ones between them
            if gaps.size:
                x0 = _map_chunks(_x_chunk, img, user, base, float)
                upper = _row_numbers(x0, rows[gaps])
                lower = _row_numbers(x0, rows[gaps + 1])
                steps[gaps] = _row_statistic(lower - upper, "median")
            tip_offsets, findings["tips"] = _tip_changes_from(stats[rows, 7], steps, valid_rows, m,
                                                               jump_threshold, floor)
    p1 = {**base, "glitch": glitch if glitch.any() else None, "shift": tip_offsets if findings["tips"] else None}

    # 4. Terraces, on an overview of block means (the image itself when it is small enough).
    labels = offsets = None
    fit_order = max(order, 1) if order is not None else 1
    if terraces:
        f = _subsample_step((n, m), OVERVIEW_PIXELS)
        x1 = _map_chunks(_x_chunk, img, user, p1, float)
        means, counts, glitch_ov = _overview(x1, f, glitch)
        detect = means.astype(np.float32)
        _interpolate_rows(detect, ~(counts.sum(axis=1) > 0))
        others = (counts == 0) & ~glitch_ov[:, None]
        detect[~np.isfinite(detect)] = 0.0
        labels, _ = _terrace_labels(detect, others if others.any() else None)
        del detect
        if labels is not None:
            trusted = np.bincount(labels.ravel(), weights=counts.ravel(), minlength=int(labels.max()) + 1)
            labels, _ = _keep_trusted_terraces(labels, trusted)
        if labels is not None:
            poly, offsets = _terrace_fit(x1, None, _Overview(labels, f, (n, m)), fit_order)
            if terraces == "auto":
                shifted = tip_offsets if findings["tips"] else 0.0
                lo, hi = stats[:, 3] - shifted, stats[:, 4] - shifted
                floor1 = _floor_of(np.where(valid_rows, lo, np.nan), np.where(valid_rows, hi, np.nan))
                group = _merge_terraces(x1, None, _Overview(labels, f, (n, m)), offsets, poly, fit_order,
                                        STEP_SIGNIFICANCE, floor=floor1)
                if group.max() < 1:
                    labels = None
                elif np.unique(group).size < offsets.size:
                    # Terraces at one level become one terrace (numbered by total area).
                    sizes = np.bincount(labels.ravel(), weights=_cell_areas((n, m), f).ravel(),
                                        minlength=offsets.size + 1)[1:]
                    totals = np.bincount(group, weights=sizes)
                    rank = np.empty(totals.size, np.int32)
                    rank[np.argsort(-totals, kind="stable")] = np.arange(1, totals.size + 1, dtype=np.int32)
                    remap = np.concatenate([[0], rank[group]]).astype(np.int32)
                    labels = remap[labels]
                    poly, offsets = _terrace_fit(x1, None, _Overview(labels, f, (n, m)), fit_order)
        if labels is not None and lines is not None:
            # As in memory: the line offsets of the step-free image, then the terraces again.
            step_free = _map_chunks(_x_chunk, img, user, {**p1, "terr": (labels, f, offsets)}, float)
            line_fit = _line_offsets(step_free, lines, None, jump_threshold)
            tip_offsets = tip_offsets + line_fit
            x2 = _map_chunks(_x_chunk, img, user, {**p1, "shift": tip_offsets}, float)
            poly, offsets = _terrace_fit(x2, None, _Overview(labels, f, (n, m)), fit_order)
        if labels is not None:
            terr = (labels, f, np.asarray(offsets, dtype=float))
            grid = da.zeros((n, m), dtype=np.int8, chunks=img.chunks)  # no read: only the chunks' places
            lazy_labels = _map_chunks(_labels_chunk, grid, None, {"terr": terr}, np.int32)
            findings.update(labels=lazy_labels, band=lazy_labels == 0, offsets=tuple(float(v) for v in offsets))
    findings["glitch_rows"] = tuple(int(r) for r in np.flatnonzero(glitch))
    found = labels is not None or glitch.any() or bool(findings["tips"])

    # 5. Line offsets and the polynomial background of the step-free image, chunk by chunk.
    p = {**base, "glitch": glitch if glitch.any() else None,
         "shift": tip_offsets if np.any(tip_offsets) else None,
         "terr": (labels, f, np.asarray(offsets, dtype=float)) if labels is not None else None}
    if lines is not None:
        p["line"] = _line_offsets(_map_chunks(_out_chunk, img, user, {**p, "as_x": True}, float), lines, None,
                                  jump_threshold)
    if order is not None:
        p["coef"] = _fit_coefficients(_map_chunks(_out_chunk, img, user, {**p, "as_x": True}, float), None, order)
        p["order"], p["shape"] = order, (n, m)
    if glitch.any():
        # Glitched lines become the linear interpolation of the nearest trusted lines above and below.
        good = np.flatnonzero(~glitch)
        bad = np.flatnonzero(glitch)
        if good.size:
            pairs = [(good[good < r][-1] if (good < r).any() else None, good[good > r][0] if (good > r).any() else None)
                     for r in bad]
            need = np.unique([v for pair in pairs for v in pair if v is not None])
            got = dict(zip(need.tolist(), _row_numbers(_map_chunks(_out_chunk, img, user, p, dtype), need)))
            values = np.empty((bad.size, m), dtype)
            for k, (r, (a, b)) in enumerate(zip(bad, pairs)):
                if a is not None and b is not None:
                    w = (r - a) / (b - a)
                    values[k] = (1 - w) * got[a] + w * got[b]
                else:
                    values[k] = got[a] if a is not None else got[b]
            p["interp"] = (bad, values)
    if found or nonfinite_count:
        trusted = _map_chunks(_out_chunk, img, user, {**p, "as_x": True}, float)
        total, count = da.compute(da.nansum(trusted), da.isfinite(trusted).sum())
        p["fill"] = float(total) / float(count) if count else 0.0
    out = _map_chunks(_out_chunk, img, user, p, dtype)
    if found or nonfinite_count or mask is not None:
        full_mask = _gather(_map_chunks(_mask_chunk, img, user, p, bool))
    else:
        full_mask = None
    return out, full_mask, findings


def _level_grid_lazy(grid, mask, order, lines, jump_threshold):
    """Each energy slice of a lazy grid levelled on its own, with one mask for all (as in memory)."""
    import dask.array as da

    bad = np.asarray((~da.isfinite(grid)).any(axis=0).compute()) if grid.dtype.kind == "f" else None
    combined = mask
    if bad is not None and bad.any():
        combined = bad if mask is None else (np.asarray(mask, bool) | bad)
    planes = [_level_lazy(plane, combined, order, lines, jump_threshold)[0] for plane in grid]
    return da.stack(planes), combined


def _note(findings):
    parts = []
    offsets = findings["offsets"]
    if len(offsets) > 1:
        heights = ", ".join(f"{v:+.3f}" for v in offsets)
        parts.append(
            f"{len(offsets)} terraces found; their offsets relative to the largest ({heights} nm) were removed "
            f"and a band along the step edges ({100 * float(findings['band'].mean()):.1f} % of the pixels) was masked."
        )
    rows = findings["glitch_rows"]
    if rows:
        parts.append(f"{len(rows)} glitched scan line(s) masked and filled from their neighbours: rows "
                     f"{', '.join(str(r) for r in rows)}.")
    for row, jump, contrast in findings["tips"]:
        parts.append(
            f"Tip change at row {row}: offset jump {jump:+.3f} nm removed, contrast x{contrast:.2f} below; "
            "the image below may also be shifted laterally by a few pixels."
        )
    return " ".join(parts)


def level(scan, *, order=1, lines=None, warn=True, jump_threshold=5.0, terraces="auto", glitches="auto",
          tip_changes="auto", return_result=False):
    """Level a scan: glitched lines, tip changes, terrace steps, line offsets, then a polynomial background.

    Parameters
    ----------
    scan : Scan
        A 2-D image or a 3-D grid (each energy slice is levelled on its own),
        in memory or lazy.
    order : int or None
        Order of the polynomial background (1 = plane); None for none.
    lines : {None, "median", "mean", "hann", "difference"}
        Per-line offset removal before the background fit (see :func:`line_offsets`).
    warn : bool
        Warn that "median", "mean" and "hann" delete modulations along the slow-scan axis.
    jump_threshold : float
        Passed to :func:`line_offsets` for ``lines="difference"``; also the
        threshold (robust standard deviations) of the offset jumps that mark a tip change.
    terraces : {"auto", True, False}
        Find terraces separated by step edges and remove one free offset per
        terrace together with the polynomial background (topographs only).
        "auto" keeps two terraces apart only when their offsets differ by more
        than :data:`STEP_SIGNIFICANCE` robust standard deviations of the levelled
        image; True keeps every terrace the edges enclose.
    glitches : {"auto", True, False} or sequence of int
        Find and mask glitched scan lines ("auto" and True are the same), or
        mask the given rows.
    tip_changes : {"auto", True, False}
        Find tip changes (persistent offset jumps between lines, abrupt changes
        of the line roughness) and remove their offset jumps.
    return_result : bool
        Return a :class:`LevelResult` (levelled scan plus findings) instead of the scan.

    Returns
    -------
    Scan or LevelResult
        A new scan with float data (float32 kept, otherwise float64). For an
        in-memory scan, NaN and inf pixels join the mask and are set to the mean of
        the trusted levelled pixels. Glitched lines and the band along step edges
        join the mask: glitched lines are replaced by the linear interpolation of the
        nearest trusted lines above and below, the band by the mean trusted level,
        so that neither throws streaks across a spectrum. When anything was found,
        the scan's ``metadata["level"]`` holds :meth:`LevelResult.to_summary`.
        A lazy (dask) scan stays lazy and is never held whole: see Notes. The
        finders of terraces, glitches and tip changes run on 2-D images ("auto"
        skips them for grids). The input scan is not modified.

    Raises
    ------
    InputError
        For an invalid ``order``, ``lines``, ``jump_threshold``, ``terraces``,
        ``glitches`` or ``tip_changes``, a finder forced on (True) for a grid, or
        too few trusted pixels for the fit.

    Warns
    -----
    UserWarning
        For ``lines="median"``, ``"mean"`` or ``"hann"`` unless ``warn=False``.

    Notes
    -----
    In order, on an in-memory 2-D image:

    1. *Glitched lines.* Each pixel is compared with the lines above and below
       (each line-to-line difference minus its median over the line, so that
       line offsets cancel); it *sticks out* by the smaller of the two
       differences when both have one sign, else by 0. A line is glitched when
       its pixels stick out on average :data:`GLITCH_RATIO` times more than
       typical, or when more than 2 % of them (and 3 times the typical count)
       stick out by 8 typical robust standard deviations of the line
       differences. *Typical* is the 6th largest value within 64 lines, not the
       median: on a lattice, CDW or moiré the structure itself makes some lines
       stick out (a line through a row of atoms), and such lines recur within
       every period shorter than the window, while up to 5 glitched lines in it
       are still seen; lines found are left out of the typical values and the
       search repeated. A step edge or a tip change alters a pixel against one
       neighbouring line only, so neither counts; a single spike does not make
       a glitched line.
    2. *Tip changes.* The offset jumps of :func:`line_offsets` ("difference", on
       the trusted lines only, so a jump hidden under a glitched line is seen)
       that persist over the next lines are removed; a change point of the log
       line roughness (spread of the along-line differences), found by binary
       segmentation with a two-sample t statistic above :data:`TIP_T_MIN` and a
       ratio above :data:`TIP_MIN_RATIO`, marks a change of contrast. A lateral
       jump of the image at a tip change cannot be undone here; the row is reported.
    3. *Terraces.* The image, smoothed by a Gaussian of 1 and of 2 pixels, is
       differenced over 2 and 4 pixels along and across the lines; each
       difference has its median over the line removed (line offsets and tilts
       cancel) and is divided by its robust spread. Pixels where the summed
       squares exceed :data:`EDGE_THRESHOLD` squared at either scale seed a step
       edge, which grows over the fine-scale pixels above half the threshold
       (hysteresis), then by :data:`EDGE_MARGIN_PX`: that band is masked.
       Untrusted pixels take the value of their nearest trusted pixel for this. The connected regions left
       are terraces (regions smaller than 0.2 % of the image join the band). One
       polynomial (at least a plane) and a free offset per terrace are fitted by
       least squares on the trusted pixels (at most 2**20 of them, strided),
       and the offsets are subtracted. The tails of an edge blurred over more
       than the band bias the offsets by a few per cent of the step; terraces
       cover different lines, so strong line noise left in (``lines=None``)
       biases them by its mean difference between those lines.
       A step edge running parallel to the lines is indistinguishable from a tip
       change and is treated as one; an edge ending inside the frame (a screw
       dislocation) separates no terraces and is neither removed nor masked.
       A flat-topped feature enclosed by an edge and larger than 0.2 % of the
       frame (an island, but also an adsorbate cluster) counts as a terrace;
       smaller enclosed regions join the masked band when there are terraces,
       and are left alone when there are none.
    4. The line offsets (``lines``) and the polynomial background (``order``)
       are then removed from the step-free image as without any finding. The
       result, with the glitched lines interpolated and the edge band at the mean
       level, is step-free and fit for peak finding; its mask says which pixels
       carry no measurement.

    With nothing found the result is exactly that of the plain levelling.

    A lazy (dask) image is read chunk by chunk of whole rows (chunks that split
    rows are rechunked; at most :data:`ROW_CHUNK_PIXELS` pixels each), a few times
    over: once for per-row counts, extremes and the finders' per-row numbers (each
    chunk with one line of its neighbours), once more to count spikes, once per
    fit (strided subsamples of at most :data:`FIT_MAX_PIXELS` pixels) and once for
    the fill level. Glitched lines and tip changes are decided on these per-row
    numbers exactly as in memory. Terraces are found on an overview of block means
    of at most :data:`OVERVIEW_PIXELS` pixels, whose labels are read off per chunk;
    an image no larger than that is its own overview and is levelled as in memory
    (to float32 precision: only the order of floating-point sums differs). On a
    larger image the masked step-edge band follows the overview's blocks. The
    levelled data, the terrace labels and the edge band stay lazy; the mask is
    computed (a boolean image). Under a dask.distributed client the chunks are
    read and levelled on the workers.

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

    A staircase of two terraces 0.6 nm apart on a tilted plane:

    >>> rows, cols = np.mgrid[0:96, 0:96]
    >>> noise = np.random.default_rng(1).normal(0, 0.01, (96, 96))
    >>> steps = 0.6 * (cols > 40 + 0.3 * rows) + 0.002 * cols + noise
    >>> found = level(Scan(steps, pixel_size_nm=0.05), return_result=True)
    >>> found.terrace_count, round(abs(found.terrace_offsets_nm[1]), 2)
    (2, 0.6)
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
    terraces = _check_mode(terraces, "terraces")
    tip_changes = _check_mode(tip_changes, "tip_changes")
    glitches = _check_glitches(glitches, scan.shape[-2])
    if scan.is_grid:
        forced = [name for name, value in (("terraces", terraces), ("glitches", glitches),
                                           ("tip_changes", tip_changes)) if value is True or isinstance(value, tuple)]
        if forced:
            raise InputError(f"{scan.source}: {forced[0]} can only be found in a 2-D scan; "
                             f"this one is a grid (use {forced[0]}=False or 'auto')")
    if warn and lines in ("median", "mean", "hann"):
        _warn_slow_axis(lines, stacklevel=2)
    where = scan.source
    findings = None
    try:
        if not scan.is_grid:
            find = _level_lazy if scan.is_lazy else _level_with_findings
            data, mask, findings = find(
                scan.data, scan.mask, order, lines, jump_threshold,
                terraces=terraces if (scan.channel == "topography" or terraces is True) else False,
                glitches=glitches, tip_changes=tip_changes,
            )
        elif scan.is_lazy:
            data, mask = _level_grid_lazy(scan.data, scan.mask, order, lines, jump_threshold)
        else:
            # One mask for the whole grid: a pixel bad in any slice is bad in all.
            _, mask = nan_to_mask(scan.data, scan.mask)
            data = np.stack([_level_image(plane, mask, order, lines, jump_threshold)[0] for plane in scan.data])
    except InputError as err:
        raise InputError(f"{where}: {err}") from None
    if findings is None:
        levelled = scan.with_data(data, mask=mask)
        result = LevelResult(levelled, note="")
    else:
        tips = findings["tips"]
        result = LevelResult(
            scan=None, terrace_count=len(findings["offsets"]), terrace_offsets_nm=findings["offsets"],
            terrace_labels=findings["labels"], edge_mask=findings["band"], glitch_rows=findings["glitch_rows"],
            tip_change_rows=tuple(int(t[0]) for t in tips), tip_change_offsets_nm=tuple(float(t[1]) for t in tips),
            tip_change_contrast=tuple(float(t[2]) for t in tips), note=_note(findings),
        )
        metadata = dict(scan.metadata)
        if result.found_anything:
            metadata["level"] = result.to_summary()
        object.__setattr__(result, "scan", scan.with_data(data, mask=mask, metadata=metadata))
    return result if return_result else result.scan
