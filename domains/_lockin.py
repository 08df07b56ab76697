"""Spatial lock-in: demodulate an image at wavevectors q to get local amplitude, phase and wavevector.

The kernel works in Fourier space (docs/methods.md §1, Fourier form) and touches only the part of the
spectrum where the Gaussian transfer exp(-sigma^2 |k - q|^2 / 2) is not negligible:

1. one real FFT along the rows, shared by every q, then FFTs along the columns only for the
   frequency columns some q needs;
2. per q, the window of (2h+1) x (2h+1) bins around q (h from the truncation level ``eps``) is
   multiplied by the separable transfer t_y(k_y) t_x(k_x), each the 2 pi-periodic
   sum_m exp(-sigma^2 (k - q - 2 pi m)^2 / 2): the spectrum of the Gaussian sampled on the pixels,
   so the kernel does not depend on the FFT length (chunks, padding, decimation);
3. two inverse 1-D FFTs bring the window back to pixels, the second one in row blocks written
   straight into the output, multiplied by the separable factors exp(-i q.r) and, without a mask,
   the separable normaliser 1 / ((g * 1_rows)(y) (g * 1_cols)(x)).

Decimated output (``step`` = s): the spectrum window is folded modulo L = P/s bins (P the FFT
length) and inverse-transformed on L points, which gives the same truncated filter exactly at the
pixels 0, s, 2s, ... (Poisson summation: sampling every s-th pixel folds the spectrum modulo P/s).
There the per-q work runs on tiles that stay in cache (a few k_x bins at a time: gather, fold,
inverse FFT along k_y; then a few rows at a time: fold, inverse FFT along k_x, output factors).

On a large image (``_THREADED_PIXELS``) the row transforms and the tiles are shared among as many
threads as ``scipy.fft`` uses with ``workers=-1``: numpy's copies and arithmetic release the GIL,
so the work that is not an FFT no longer runs on one core while the FFTs use them all.
"""

from __future__ import annotations

import functools
import math
import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

from ._checks import positive, within_nyquist
from ._errors import InputError
from ._scan import _is_dask, pixel_size_pair

#: Gaussian support, in units of sigma, kept by the chunked path (overlap depth) and by the
#: zero padding of the in-memory path. The 1-D Gaussian mass beyond 6 sigma is
#: erfc(6 / sqrt 2) / 2 = 1e-9, below float32 precision, so chunked and in-memory results agree.
TRUNCATE = 6.0

#: The Gaussian transfer exp(-sigma^2 dk^2 / 2) is dropped where it is below this, per precision.
#: The error this makes in A is at most eps * sqrt(sum I^2) / (normaliser) (Parseval; see ``lockin``).
TRANSFER_EPS = {np.dtype(np.float32): 1e-10, np.dtype(np.float64): 1e-16}

#: Normalised convolution: below this filtered weight a pixel has almost nothing to average (NaN).
MIN_WEIGHT = 1e-3

BOUNDARIES = ("normalized", "periodic")

# Rows of the last inverse FFT handled at a time (keeps temporaries small next to the output).
_BLOCK_ELEMENTS = 1 << 22

# Elements handled at a time by the element-wise stages and the row transforms: a tile stays in
# the processor's cache between the steps that touch it (copy, transform, transposed write).
_TILE_ELEMENTS = 1 << 16
_ROW_TILE = 1 << 18

# Below this many pixels the work is done in the calling thread (threads cost more than they save).
_THREADED_PIXELS = 1 << 20

# Tasks per thread in each threaded stage: a thread that finishes early takes the next one.
_TASKS_PER_THREAD = 4

_POOL = None
_POOL_LOCK = threading.Lock()


class _NotFinite(Exception):
    """The image holds NaN or inf (found on the way, by the row sums the real FFT gives for free)."""


def _threads():
    """Threads for the element-wise stages: as many as ``scipy.fft`` uses with ``workers=-1``."""
    return os.cpu_count() or 1


def _forget_pool():
    global _POOL, _POOL_LOCK
    _POOL, _POOL_LOCK = None, threading.Lock()  # a forked child has none of the parent's threads


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_forget_pool)


def _parallel(fn, tasks, threaded=True):
    """Call ``fn`` on every task, on the module's threads when ``threaded`` (numpy's copies and
    arithmetic and the FFTs release the GIL, so the stages that are not FFTs use every core too)."""
    tasks = list(tasks)
    if not threaded or _threads() == 1 or len(tasks) < 2:
        for task in tasks:
            fn(task)
        return
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            _POOL = ThreadPoolExecutor(_threads(), thread_name_prefix="domains-lockin")
        pool = _POOL
    futures = [pool.submit(fn, task) for task in tasks]
    errors = [future.exception() for future in futures]  # waits for every task before raising
    for error in errors:
        if error is not None:
            raise error


def _spans(n, parts, unit=1):
    """Split range(n) into at most ``parts`` contiguous (start, stop) spans, borders on multiples of ``unit``."""
    per = -(-n // max(1, parts))
    size = max(unit, -(-per // unit) * unit)
    return [(a, min(n, a + size)) for a in range(0, n, size)]


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


def _check_step(step):
    if step is None:
        return 1
    if isinstance(step, (bool, np.bool_)) or not isinstance(step, (int, np.integer)) or step < 1:
        raise InputError(f"step must be a positive integer number of pixels (or None), got {step!r}")
    return int(step)


def _transfer_cut(eps):
    """sigma |dk| beyond which exp(-sigma^2 dk^2 / 2) < eps."""
    return math.sqrt(2 * math.log(1 / eps))


def _fft_length(n, pad, step, real=False):
    """Smallest fast FFT length >= n + pad that is a multiple of ``step``.

    ``real``: the length of a real transform, whose fast lengths have no factor above 5 (the real
    FFT of ``scipy.fft`` has no special pass for 7 or 11: 4200 points cost 15 % more than 4320).
    """
    return step * sfft.next_fast_len(-(-(n + pad) // step), real=real)


class _Axis:
    """One axis of the separable filter: the spectrum window around q and its transfer.

    The window holds the bins j = start, ..., start + width - 1 (taken modulo ``length``),
    centred on the bin nearest q; it is the whole axis when the Gaussian is wider than that.
    """

    def __init__(self, q_px, sigma_px, length, eps):
        half = math.ceil(_transfer_cut(eps) / sigma_px * length / (2 * math.pi))
        centre = round(q_px * length / (2 * math.pi))
        width = 2 * half + 1
        if width >= length:
            width, half = length, length // 2
        self.start = centre - half
        j = self.start + np.arange(width)
        self.index = j % length
        # The 2 pi-periodic transfer sum_m exp(-sigma^2 (k - q - 2 pi m)^2 / 2): the spectrum of the
        # Gaussian sampled on the pixels (Poisson summation). The kernel is then the same on every FFT
        # grid (chunks, decimation), also when sigma is a pixel or two and the Gaussian reaches k = pi.
        dk = 2 * np.pi * j / length - q_px
        terms = math.ceil(_transfer_cut(eps) / (2 * np.pi * sigma_px)) + 1
        self.transfer = sum(np.exp(-0.5 * (sigma_px * (dk - 2 * np.pi * m)) ** 2) for m in range(-terms, terms + 1))
        self.q_px, self.length = q_px, length

    def sample_factor(self, step, first, count, origin):
        """exp(2 pi i start r / P) exp(-i q (origin + r)) / step at the local samples r = first + step m."""
        r = first + step * np.arange(count)
        shift = 2 * np.pi * self.start / self.length
        # exp(2 pi i start r / P): the window was moved to bin 0 before the inverse FFT.
        return np.exp(1j * (shift * (r - first) - self.q_px * (origin + r))) / step

    def first_twist(self, step, first):
        """The transfer times exp(2 pi i j first / P): moves the sampling grid to start at ``first``."""
        if first == 0:
            return self.transfer
        j = self.start + np.arange(self.transfer.size)
        return self.transfer * np.exp(2j * np.pi * j * first / self.length)


@functools.lru_cache(maxsize=64)
def _axis(q_px, sigma_px, length, eps):
    """The cached :class:`_Axis` (its transfer is the same on every call with these numbers)."""
    ax = _Axis(q_px, sigma_px, length, eps)
    ax.index.setflags(write=False)
    ax.transfer.setflags(write=False)
    return ax


def _fold(block, length, axis):
    """Sum the spectrum window modulo ``length`` bins (sampling every step-th pixel folds it).

    Works in place on ``block`` and returns a view of its first ``length`` entries along ``axis``.
    """
    width = block.shape[axis]
    if width <= length:
        return block
    index = [slice(None)] * block.ndim

    def take(a, b):
        index[axis] = slice(a, b)
        return tuple(index)

    for start in range(length, width, length):
        stop = min(width, start + length)
        block[take(0, stop - start)] += block[take(start, stop)]
    return block[take(0, length)]


@functools.lru_cache(maxsize=64)
def _smooth_1d(n, sigma_px, length, step, first, count, eps, dtype):
    """(g * 1_[0, n))(r) at r = first + step m: one axis of the separable normaliser, same truncated filter."""
    ax = _axis(0.0, sigma_px, length, eps)
    spectrum = sfft.fft(np.ones(n, dtype), n=length)
    block = _fold(spectrum[ax.index] * ax.first_twist(step, first), length // step, 0)
    values = sfft.ifft(block, n=length // step)[:count]
    values = (values * ax.sample_factor(step, first, count, 0.0)).real
    values.setflags(write=False)  # cached: the same normaliser serves every call with these numbers
    return values


def _column_spectrum(data, valid, lengths, need, rtype, ctype, check_finite=False):
    """The 2-D spectrum of ``data`` (zero where not ``valid``, zero padded to ``lengths``) at the
    half-spectrum columns ``need`` and every frequency row, stored transposed: shape (need.size, P_y).

    The rows are transformed a few at a time (each thread its own span of rows): copied into a
    zero-padded tile that stays in cache, transformed, and the columns some q needs written
    transposed into the buffer of the column transform, which is the only full-size temporary (as
    wide as those columns). The column transform then runs over contiguous memory.

    ``check_finite``: raise ``_NotFinite`` if a row sum (the zero-frequency bin of the row
    transform) is not finite, i.e. if the row holds NaN or inf.
    """
    ny, nx = data.shape
    py, px = lengths
    lo, hi = int(need[0]), int(need[-1]) + 1
    contiguous = hi - lo == need.size
    buffer = np.empty((need.size, py), dtype=ctype)
    tile_rows = max(1, _ROW_TILE // px)
    threaded = ny * nx >= _THREADED_PIXELS
    bad = []

    def rows(span):
        r0, r1 = span
        if r0 >= ny:
            buffer[:, r0:r1] = 0  # the zero padding of the column transform (its pages are touched here too)
            return
        tile = np.zeros((min(tile_rows, r1 - r0), px), dtype=rtype)  # the zero padding, written once
        for a in range(r0, r1, tile_rows):
            b = min(r1, a + tile_rows)
            part = tile[: b - a]
            part[:, :nx] = data[a:b] if valid is None else np.where(valid[a:b], data[a:b], 0)
            spectrum = sfft.rfft(part, axis=1, workers=1 if threaded else -1)
            if check_finite and not np.isfinite(spectrum[:, 0]).all():
                bad.append(a)
                return
            buffer[:, a:b] = (spectrum[:, lo:hi] if contiguous else spectrum[:, need]).T

    spans = _spans(ny, _TASKS_PER_THREAD * _threads() if threaded else 1, tile_rows) + [(ny, py)] * (py > ny)
    _parallel(rows, spans, threaded)
    if bad:
        raise _NotFinite
    return sfft.fft(buffer, axis=1, workers=-1, overwrite_x=True)


def _runs(u, values):
    """Split positions ``u`` with source indices ``values`` into runs where both advance by one
    (values by +1 or -1): a list of (first position, last position + 1, source slice)."""
    if u.size == 0:
        return []
    du, dv = np.diff(u), np.diff(values.astype(np.int64))
    ok = (du == 1) & (np.abs(dv) == 1)
    cut = ~ok
    cut[1:] |= ok[:-1] & (dv[1:] != dv[:-1])  # a change of direction ends a run as well
    ends = np.flatnonzero(cut)
    starts = np.concatenate([[0], ends + 1])
    stops = np.concatenate([ends + 1, [u.size]])
    runs = []
    for i0, i1 in zip(starts, stops):
        v0, v1 = int(values[i0]), int(values[i1 - 1])
        sl = slice(v0, v1 + 1) if v1 >= v0 else slice(v0, None if v1 == 0 else v1 - 1, -1)
        runs.append((int(u[i0]), int(u[i1 - 1]) + 1, sl))
    return runs


def _filter_stack(data, q_px, sigma_px, lengths, step, first, count, origin, eps, rtype,
                  valid=None, inverse_norm=None, out=None, check_finite=False):
    """G_sigma * [data exp(-i q.r)] for every q, sampled at rows/cols first + step m.

    ``data`` is real (set to zero where ``valid`` is False); ``lengths`` (P_y, P_x) are the FFT
    lengths (zero padding beyond the data makes the convolution linear); ``origin`` is the global
    pixel of data[0, 0] for the reference wave. ``inverse_norm`` is either a pair of 1-D factors
    (separable normaliser) or a 2-D array on the output grid, or None. ``check_finite``: raise
    ``_NotFinite`` if ``data`` holds NaN or inf.
    """
    ctype = np.complex64 if rtype == np.float32 else np.complex128
    py, px = lengths
    ly, lx = py // step, px // step
    half = px // 2
    axes = [(_axis(float(qj[0]), sigma_px[0], py, eps), _axis(float(qj[1]), sigma_px[1], px, eps)) for qj in q_px]
    # Frequency columns each q needs, as columns of the half spectrum (negative ones by conjugation).
    cols = [np.where(ax.index <= half, ax.index, px - ax.index) for _, ax in axes]
    need = np.unique(np.concatenate(cols))
    if out is None:
        out = np.empty((len(q_px),) + tuple(count), dtype=ctype)
    if step > 1:
        # The spectrum is passed on without a name here, so that it is freed once the tiles are done.
        threaded = data.shape[0] * data.shape[1] >= _THREADED_PIXELS
        return _decimated_inverse(_column_spectrum(data, valid, lengths, need, rtype, ctype, check_finite),
                                  need, axes, lengths, step, first, count, origin, rtype, inverse_norm, out, threaded)
    spectrum = _column_spectrum(data, valid, lengths, need, rtype, ctype, check_finite)  # (columns, P_y)
    block_rows = max(1, _BLOCK_ELEMENTS // lx)
    # One zero-padded buffer, reused for every block of rows of every q (transformed in place).
    buffer = np.zeros((min(block_rows, count[0]), lx), dtype=ctype)
    for j, (ay, ax) in enumerate(axes):
        negative = ax.index > half
        pos = np.searchsorted(need, cols[j])
        # The window, transposed: (k_x bins, k_y bins), times the transfer (and the twist that moves
        # the sampling grid), gathered by slices; negative k_x from I~(ky, -kx) = conj(I~(-ky, kx)).
        window = np.empty((ax.index.size, ay.index.size), dtype=ctype)
        tx, ty = ax.first_twist(step, first[1]), ay.first_twist(step, first[0])
        real = np.isrealobj(tx) and np.isrealobj(ty)
        kind = rtype if real else ctype
        transfer = np.multiply.outer(tx.astype(kind), ty.astype(kind))
        every = np.arange(ay.index.size)
        for part, src_rows, conj in ((~negative, ay.index, False), (negative, (-ay.index) % py, True)):
            u = np.flatnonzero(part)
            row_runs = _runs(every, src_rows)  # the window is contiguous modulo P_y: one or two slices
            for u0, u1, sl in _runs(u, pos[u]):
                for v0, v1, sr in row_runs:
                    target = window[u0:u1, v0:v1]
                    t = transfer[u0:u1, v0:v1]
                    if not conj:
                        np.multiply(spectrum[sl, sr], t, out=target)
                    elif real:
                        # conj(I~) t = conj(I~ t) for a real transfer.
                        np.multiply(spectrum[sl, sr], t, out=target)
                        np.conjugate(target, out=target)
                    else:
                        np.multiply(np.conjugate(spectrum[sl, sr]), t, out=target)
        done_y = sfft.ifft(_fold(window, ly, 1), n=ly, axis=1, workers=-1, overwrite_x=True)[:, : count[0]]
        # (rows, k_x bins): one cache-friendly transpose, so the row blocks below read contiguous memory.
        done_y = np.ascontiguousarray(_fold(done_y, lx, 0).T)
        width = done_y.shape[1]
        fy = ay.sample_factor(step, first[0], count[0], origin[0])
        fx = ax.sample_factor(step, first[1], count[1], origin[1])
        if isinstance(inverse_norm, tuple):
            fy, fx = fy * inverse_norm[0], fx * inverse_norm[1]
        fy, fx = fy.astype(ctype), fx.astype(ctype)
        # The row factor commutes with the transform along the rows: apply it on the narrow window.
        for r0 in range(0, count[0], block_rows):
            r1 = min(count[0], r0 + block_rows)
            rows = buffer[: r1 - r0]
            np.multiply(done_y[r0:r1], fy[r0:r1, None], out=rows[:, :width])
            rows[:, width:] = 0
            res = sfft.ifft(rows, axis=1, workers=-1, overwrite_x=True)
            target = out[j, r0:r1]
            np.multiply(res[:, : count[1]], fx, out=target)
            if isinstance(inverse_norm, np.ndarray):
                target *= inverse_norm[r0:r1]
    return out


def _split_run(u0, u1, sl, size):
    """Cut a run (positions u0..u1, source slice ``sl`` of step +1 or -1) into pieces of at most ``size``."""
    direction = sl.step or 1
    for a in range(u0, u1, size):
        b = min(u1, a + size)
        s0 = sl.start + (a - u0) * direction
        s1 = s0 + (b - a) * direction
        yield a, b, slice(s0, s1 if s1 >= 0 else None, direction)


def _decimated_inverse(spectrum, need, axes, lengths, step, first, count, origin, rtype,
                       inverse_norm, out, threaded):
    """The per-q half of :func:`_filter_stack` on a decimated grid (step > 1).

    Two passes over memory per q, each on tiles that stay in cache: (1) a tile of k_x bins of the
    window, all its k_y bins, is gathered from the transposed spectrum times the transfer, folded
    modulo L_y = P_y / step, inverse transformed along k_y and written, times the row factor, into
    a (row, k_x) stack; (2) a block of rows of the stack is folded modulo L_x = P_x / step, inverse
    transformed along k_x and written, times the column factor (and the normaliser), to ``out``.
    The tiles and the blocks are shared among the threads.
    """
    ctype = out.dtype
    py, px = lengths
    ly, lx = py // step, px // step
    half = px // 2
    k = len(axes)
    wy, wx = axes[0][0].index.size, axes[0][1].index.size  # the same for every q (sigma and P set them)
    stack = np.empty((k, count[0], max(wx, lx)), dtype=ctype)
    if wx < lx:
        stack[:, :, wx:] = 0  # the zero padding of the transform along k_x
    factors, pieces = [], []
    tile = max(4, _TILE_ELEMENTS // max(wy, ly))  # k_x bins per tile
    every = np.arange(wy)
    for j, (ay, ax) in enumerate(axes):
        tx, ty = ax.first_twist(step, first[1]), ay.first_twist(step, first[0])
        real = np.isrealobj(tx) and np.isrealobj(ty)
        kind = rtype if real else ctype
        fy = ay.sample_factor(step, first[0], count[0], origin[0])
        fx = ax.sample_factor(step, first[1], count[1], origin[1])
        if isinstance(inverse_norm, tuple):
            fy, fx = fy * inverse_norm[0], fx * inverse_norm[1]
        factors.append((tx.astype(kind)[:, None], ty.astype(kind), real, fy.astype(ctype), fx.astype(ctype)))
        # Negative k_x from I~(ky, -kx) = conj(I~(-ky, kx)); the window is contiguous modulo P_y
        # along k_y (one or two slices of the spectrum's rows).
        negative = ax.index > half
        pos = np.searchsorted(need, np.where(negative, px - ax.index, ax.index))
        for part, src_rows, conj in ((~negative, ay.index, False), (negative, (-ay.index) % py, True)):
            u = np.flatnonzero(part)
            row_runs = _runs(every, src_rows)
            for u0, u1, sl in _runs(u, pos[u]):
                for piece in _split_run(u0, u1, sl, tile):
                    pieces.append((j, piece, row_runs, conj))

    def columns(chunk):
        buffer = np.empty((tile, max(wy, ly)), dtype=ctype)  # (k_x, k_y), as the spectrum is stored
        for j, (u0, u1, sl), row_runs, conj in chunk:
            tx, ty, real, fy, _ = factors[j]
            window = buffer[: u1 - u0]
            window[:, wy:] = 0  # the zero padding of the transform along k_y (when the window is short)
            for v0, v1, sr in row_runs:
                src = spectrum[sl, sr]
                dst = window[:, v0:v1]
                if conj and not real:
                    np.conjugate(src, out=dst)
                    dst *= ty[v0:v1]
                else:
                    np.multiply(src, ty[v0:v1], out=dst)
                dst *= tx[u0:u1]
                if conj and real:
                    np.conjugate(dst, out=dst)  # conj(I~) t = conj(I~ t) for a real transfer
            # Sampling every step-th row folds the spectrum modulo P_y / step bins (Poisson summation).
            done = sfft.ifft(_fold(window, ly, 1), axis=1, workers=1, overwrite_x=True)
            kept = done[:, : count[0]]
            kept *= fy
            stack[j, :, u0:u1] = kept.T  # numpy's transposing copy is faster than a transposing multiply

    rows = max(1, _TILE_ELEMENTS // max(wx, lx))

    def finish(task):
        j, r0, r1 = task
        fx = factors[j][4]
        for a in range(r0, r1, rows):
            b = min(r1, a + rows)
            done = sfft.ifft(_fold(stack[j, a:b], lx, 1), axis=1, workers=1, overwrite_x=True)
            target = out[j, a:b]
            np.multiply(done[:, : count[1]], fx, out=target)
            if isinstance(inverse_norm, np.ndarray):
                target *= inverse_norm[a:b]

    parts = _TASKS_PER_THREAD * _threads() if threaded else 1
    _parallel(columns, [pieces[a:b] for a, b in _spans(len(pieces), parts)], threaded)
    spectrum = None  # the tiles hold all of it that is needed: free it before the output is written
    _parallel(finish, [(j, a, b) for j in range(k) for a, b in _spans(count[0], parts, rows)], threaded)
    return out


_NORM_CACHE: dict = {}


def _masked_inverse_norm(valid, sigma_px, lengths, step, first, count, eps, rtype):
    """1 / (G * valid) on the output grid, NaN where the weight is below MIN_WEIGHT.

    The same filter at q = 0 applied to the weights, once for all q; the last one is kept, keyed
    by a digest of the mask, so repeated calls with one mask (several maps, iterations) reuse it.
    """
    import hashlib

    digest = hashlib.blake2b(np.packbits(valid).tobytes(), digest_size=16).digest()
    key = (digest, valid.shape, tuple(sigma_px), tuple(lengths), step, tuple(first), tuple(count), eps, np.dtype(rtype))
    cached = _NORM_CACHE.get(key)
    if cached is not None:
        return cached
    norm = _filter_stack(valid, np.zeros((1, 2)), sigma_px, lengths, step, first, count, (0, 0), eps, rtype)[0].real
    inverse = np.full(norm.shape, np.nan, dtype=rtype)
    np.divide(1, norm, out=inverse, where=norm > MIN_WEIGHT)
    inverse.setflags(write=False)
    _NORM_CACHE.clear()
    _NORM_CACHE[key] = inverse
    return inverse


def _lockin_memory(image, valid, q_px, sigma_px, *, step, boundary, pad, origin=(0, 0), first=(0, 0), count=None,
                   check_finite=False):
    """The lock-in of one in-memory array. ``image`` is float32 or float64 (it sets the precision);
    ``valid`` is a boolean array (False = masked or NaN) or None when every pixel counts;
    ``check_finite`` (with ``valid`` None): raise ``_NotFinite`` if the image holds NaN or inf."""
    rtype = image.dtype
    eps = TRANSFER_EPS[np.dtype(rtype)]
    ny, nx = image.shape
    if count is None:
        count = (-(-(ny - first[0]) // step), -(-(nx - first[1]) // step))
    if boundary == "periodic":
        if ny % step or nx % step:
            # Folding needs whole periods of step pixels: compute on the full grid and sample it.
            full = _filter_stack(image, q_px, sigma_px, (ny, nx), 1, (0, 0), (ny, nx), origin, eps, rtype,
                                 check_finite=check_finite)
            return np.ascontiguousarray(full[:, first[0] :: step, first[1] :: step][:, : count[0], : count[1]])
        return _filter_stack(image, q_px, sigma_px, (ny, nx), step, first, count, origin, eps, rtype,
                             check_finite=check_finite)
    lengths = (_fft_length(ny, pad[0], step), _fft_length(nx, pad[1], step, real=True))
    if valid is None:
        # Nothing masked: the normaliser G * 1_frame is separable, two 1-D filters.
        norm_y = _smooth_1d(ny, sigma_px[0], lengths[0], step, first[0], count[0], eps, rtype)
        norm_x = _smooth_1d(nx, sigma_px[1], lengths[1], step, first[1], count[1], eps, rtype)
        inverse = tuple(np.where(n > MIN_WEIGHT, 1 / np.where(n > MIN_WEIGHT, n, 1), np.nan) for n in (norm_y, norm_x))
        return _filter_stack(image, q_px, sigma_px, lengths, step, first, count, origin, eps, rtype,
                             inverse_norm=inverse, check_finite=check_finite)
    inverse = _masked_inverse_norm(valid, sigma_px, lengths, step, first, count, eps, rtype)
    return _filter_stack(image, q_px, sigma_px, lengths, step, first, count, origin, eps, rtype,
                         valid=valid, inverse_norm=inverse)


def lockin(image, q, *, sigma_nm, pixel_size_nm, mask=None, boundary="normalized", step=None):
    """Spatial lock-in: the complex local Fourier component A(r) of an image at q.

    A(r) = G_sigma * [I(r) exp(-i q.r)], with G_sigma a unit-sum Gaussian of
    width ``sigma_nm``. For I = A0 cos(q.r + phi), 2|A| = A0 and arg A = phi.

    Computed in Fourier space: A = exp(-i q.r) IFFT[I~(k) exp(-sigma^2 |k - q|^2 / 2)]
    (docs/methods.md §1), with one real forward FFT shared by every q and only the
    window of the spectrum where the transfer exceeds ``TRANSFER_EPS`` (1e-10
    for float32, 1e-16 for float64) transformed back. Dropping the rest changes
    A by at most eps * sqrt(sum I^2) / w(r), w the normaliser below (Parseval),
    i.e. eps * sqrt(N_pixels) * rms(I) / w.

    Parameters
    ----------
    image : (row, col) array_like or dask array
        The image. A dask array gives a lazy dask result computed chunk by chunk
        (``dask.array.map_overlap`` with an overlap of ``TRUNCATE`` sigma).
    q : (2,) or (k, 2) array_like
        Wavevector(s) (qx, qy) in rad/nm, x along columns and y along rows.
    sigma_nm : float
        Width of the Gaussian low-pass filter in nm; the spatial resolution of
        the amplitude and phase maps is about ``sigma_nm``.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col).
    mask : (row, col) array of bool, optional
        True where pixels are untrusted; they are left out of the average
        (normalised convolution) and filled from their neighbours. NaN pixels
        of the image count as masked.
    boundary : {"normalized", "periodic"}
        "normalized" (default): zero outside the frame and the mask (the FFT
        grid is zero padded by ``TRUNCATE`` sigma, so the convolution is linear,
        not circular), divided by the equally filtered weight G * w, so a
        straight edge does not halve the amplitude. Without a mask the weight is
        separable, (g * 1_rows)(y) (g * 1_cols)(x), and costs two 1-D FFTs.
        "periodic": the frame is taken as periodic (exact for an image holding
        whole periods, and the Fourier form of docs/methods.md §1).
    step : int, optional
        Return A only at the pixels (s m, s n), s = ``step``: rows 0, s, 2s, ...
        and columns 0, s, 2s, ..., shape (ceil(rows / s), ceil(cols / s)). The
        spectrum window around q is folded modulo P / s bins (P the FFT length,
        a multiple of s) and inverse transformed on P / s points, which is the
        same truncated filter sampled exactly (Poisson summation), for any s.
        At the sampled pixels the result equals the full-resolution one up to
        (i) the transfer truncation above, eps sqrt(sum I^2) / w on each, and
        (ii) near the edges, the Gaussian tail that wraps round the zero
        padding of TRUNCATE sigma, erfc(6 / sqrt 2) / 2 = 1e-9 of max|I| / w
        per edge (the two grids have different lengths P); elsewhere they agree
        to rounding. A step up to :func:`lossless_step` also keeps the whole
        band of A, so it can be interpolated back (band-limited) without loss.
        None (default) = 1.

    Returns
    -------
    A : complex ndarray or dask array
        Shaped like the image (or its decimated grid) for a single q, else
        (k, row, col); complex64 for a float32 image, complex128 otherwise. The
        phase reference is pixel (0, 0) of the input array. Pixels with almost
        no valid neighbours (filtered weight below ``MIN_WEIGHT``) are NaN.

    Raises
    ------
    InputError
        If q lies beyond the Nyquist limit, sigma is not positive or larger
        than half the frame, step is not a positive integer, or the image is
        not 2-D.

    See Also
    --------
    amplitude, phase, local_wavevector, trusted_mask, choose_sigma, lossless_step

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
    >>> coarse = lockin(image, q, sigma_nm=1.0, pixel_size_nm=dx, step=4)
    >>> coarse.shape, bool(np.allclose(coarse, lockin(image, q, sigma_nm=1.0, pixel_size_nm=dx)[::4, ::4]))
    ((32, 32), True)
    """
    if boundary not in BOUNDARIES:
        raise InputError(f"boundary must be one of {BOUNDARIES}, got {boundary!r}")
    step = _check_step(step)
    lazy = _is_dask(image)
    if not lazy:
        image = np.asarray(image)
    if image.ndim != 2:
        raise InputError(f"lockin needs a 2-D image (row, col), got shape {tuple(image.shape)}")
    if min(image.shape) < 2:
        raise InputError(f"lockin needs an image of at least 2 x 2 pixels, got shape {tuple(image.shape)}")
    if np.issubdtype(image.dtype, np.complexfloating) or image.dtype.kind not in "biuf":
        raise InputError(f"lockin needs a real image, got dtype {image.dtype}")
    pixel_size = pixel_size_pair(pixel_size_nm)
    q, single = _as_q_array(q)
    sigma_nm = _check_q_sigma(q, sigma_nm, pixel_size, image.shape)
    sigma_px = (sigma_nm / pixel_size[0], sigma_nm / pixel_size[1])
    # (row, col) components in rad/px: q_y dy along rows, q_x dx along columns.
    q_px = np.column_stack([q[:, 1] * pixel_size[0], q[:, 0] * pixel_size[1]])
    pad = (int(math.ceil(TRUNCATE * sigma_px[0])), int(math.ceil(TRUNCATE * sigma_px[1])))
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != tuple(image.shape):
            raise InputError(f"mask shape {mask.shape} differs from the image shape {tuple(image.shape)}")
    rtype = np.float32 if image.dtype == np.float32 else np.float64
    if lazy:
        result = _lockin_dask(image.astype(rtype), q_px, sigma_px, mask, boundary, pad, step)
    else:
        image = np.asarray(image, dtype=rtype)
        result = None
        if mask is None or not mask.any():
            try:
                # Every pixel counts unless the row sums met on the way say otherwise.
                result = _lockin_memory(image, None, q_px, sigma_px, step=step, boundary=boundary, pad=pad,
                                        check_finite=True)
            except _NotFinite:
                pass
        if result is None:
            valid = np.isfinite(image)
            if mask is not None:
                valid &= ~mask
            if valid.all():
                valid = None  # a row sum overflowed: every pixel is finite after all
            if valid is not None and boundary == "periodic":
                raise InputError("boundary='periodic' needs a complete image with no masked or NaN pixels")
            result = _lockin_memory(image, valid, q_px, sigma_px, step=step, boundary=boundary, pad=pad)
    return result[0] if single else result


def lossless_step(sigma_nm, pixel_size_nm, *, tolerance=1e-6):
    """Largest decimation step (pixels) that keeps the whole band of a lock-in field.

    A = G_sigma * [I exp(-i q.r)] has its spectrum inside |k_y|, |k_x| <= c / sigma
    up to a relative tail ``tolerance`` = exp(-c^2 / 2) of the Gaussian transfer.
    Samples every s pixels hold a band of width 2 pi / s per axis without aliasing
    (sampling theorem), so s <= pi sigma / c, about sigma / 2 for tolerance 1e-6
    (c = 5.26). Use it as ``lockin(..., step=lossless_step(...))``.

    Parameters
    ----------
    sigma_nm : float
        The lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col); the coarser axis (fewest
        pixels per sigma) sets the step.
    tolerance : float
        Relative size of the Gaussian transfer allowed to alias, 0 < tolerance < 1.

    Returns
    -------
    int
        The step in pixels, at least 1.

    Examples
    --------
    >>> lossless_step(8.0, 1.0)
    4
    >>> lossless_step(0.8, 0.1, tolerance=1e-10)
    3
    """
    sigma_nm = positive(sigma_nm, "sigma_nm")
    if not 0 < tolerance < 1:
        raise InputError(f"tolerance must lie between 0 and 1, got {tolerance!r}")
    sigma_px = sigma_nm / max(pixel_size_pair(pixel_size_nm))
    return max(1, int(math.floor(math.pi * sigma_px / _transfer_cut(tolerance) * (1 + 1e-12))))


def _dask_chunks(chunks, depth, step, n):
    """Chunk sizes along one axis: borders on multiples of ``step``, every chunk at least ``depth`` long."""
    borders = np.cumsum(chunks)[:-1]
    borders = np.unique(np.round(borders / step).astype(int) * step)
    kept, previous = [], 0
    for b in borders:
        if 0 < b < n and b - previous >= max(depth, 1):
            kept.append(int(b))
            previous = int(b)
    while kept and n - kept[-1] < depth:
        kept.pop()
    return tuple(int(c) for c in np.diff([0] + kept + [n]))


def _lockin_dask(image, q_px, sigma_px, mask, boundary, pad, step):
    import dask.array as da

    if boundary == "periodic":
        raise InputError("boundary='periodic' is not available for dask arrays; use 'normalized'")
    depth = (int(math.ceil(TRUNCATE * sigma_px[0])), int(math.ceil(TRUNCATE * sigma_px[1])))
    chunks = tuple(_dask_chunks(c, d, step, n) for c, d, n in zip(image.chunks, depth, image.shape))
    image = image.rechunk(chunks)
    args = [image]
    if mask is not None:
        args.append(da.from_array(mask, chunks=chunks))
    starts = [np.cumsum((0,) + c[:-1]) for c in chunks]
    out_chunks = tuple(tuple(-(-c // step) for c in axis) for axis in chunks)
    ctype = np.complex64 if image.dtype == np.float32 else np.complex128

    def block(img, msk=None, block_info=None):
        loc = block_info[0]["chunk-location"]
        # With boundary="none" a block has a margin only towards its neighbours.
        first = (depth[0] if loc[0] > 0 else 0, depth[1] if loc[1] > 0 else 0)
        origin = (int(starts[0][loc[0]]) - first[0], int(starts[1][loc[1]]) - first[1])
        count = (out_chunks[0][loc[0]], out_chunks[1][loc[1]])
        valid = np.isfinite(img)
        if msk is not None:
            valid &= ~msk
        return _lockin_memory(img, None if valid.all() else valid, q_px, sigma_px, step=step,
                              boundary="normalized", pad=pad, origin=origin, first=first, count=count)

    return da.map_overlap(
        block, *args, depth={0: depth[0], 1: depth[1]}, boundary="none", trim=False,
        align_arrays=False, allow_rechunk=False, new_axis=0,
        chunks=((len(q_px),),) + out_chunks, dtype=ctype, meta=np.empty((0, 0, 0), ctype),
    )


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

    The phase step between the two neighbours of a pixel, arg(A(r + h) conj A(r - h)) / 2h
    (one-sided at the frame edges), is blind to the 2 pi jumps of the wrapped phase
    (docs/methods.md §3) and exact for a phase that varies linearly over 2h, up to
    |grad phi| h < pi; on a decimated grid (h = step pixels) it stays exact where the
    first-order form Im(conj(A) grad A) / |A|^2 would read sin(g h) / h.

    Parameters
    ----------
    a : complex ndarray, (row, col) or (k, row, col)
        Lock-in field.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.

    Returns
    -------
    ndarray
        Shape (2, ...) holding (dphi/dx, dphi/dy), x along columns; float32 for a
        complex64 field, float64 otherwise.

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010): the local wavevector as the phase gradient.

    Examples
    --------
    >>> y, x = np.mgrid[:32, :32] * 0.1
    >>> g = phase_gradient(np.exp(1j * (0.3 * x - 0.2 * y)), pixel_size_nm=0.1)
    >>> bool(np.allclose(g[0], 0.3, atol=1e-6) and np.allclose(g[1], -0.2, atol=1e-6))
    True
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    a = np.asarray(a)
    if not np.iscomplexobj(a):
        a = a.astype(np.complex128)
    real = np.float32 if a.dtype == np.complex64 else np.float64
    out = np.zeros((2,) + a.shape, dtype=real)
    for g, axis, h in ((out[0], -1, dx), (out[1], -2, dy)):
        n = a.shape[axis]
        if n < 2:
            continue
        take = lambda lo, hi: a[(Ellipsis, slice(lo, hi), slice(None))] if axis == -2 else a[..., lo:hi]  # noqa: E731
        put = (lambda lo, hi: (Ellipsis, slice(lo, hi), slice(None))) if axis == -2 else (lambda lo, hi: (Ellipsis, slice(lo, hi)))
        if n > 2:
            g[put(1, n - 1)] = np.angle(take(2, n) * np.conj(take(0, n - 2))) / (2 * h)
        g[put(0, 1)] = np.angle(take(1, 2) * np.conj(take(0, 1))) / h
        g[put(n - 1, n)] = np.angle(take(n - 1, n) * np.conj(take(n - 2, n - 1))) / h
    zero = a == 0
    if zero.any():
        out[:, zero] = 0.0
    return out


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
        from masked pixels (docs/methods.md §1 recommends 2 to 3).

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
    # The frame's part in closed form (the nearest edge is straight across) and the distance to masked
    # pixels only next to them (:func:`_trusted`): the same answer as one distance transform of the
    # whole frame, at a cost that grows as N, not with the frame's distance transform per call.
    bad = None if mask is None else np.asarray(mask, dtype=bool)
    if bad is not None and not bad.any():
        bad = None
    return _trusted(bad, tuple(shape)[-2:], sigma_nm, pixel_size_pair(pixel_size_nm), margin_sigma)


def _trusted(bad, shape, sigma_nm, pixel_size, margin_sigma=2.5):
    """``trusted_mask(shape, mask=bad)``, with the distance transform run only next to the bad pixels.

    A pixel is trusted at least ``margin_sigma`` sigma from the frame edge (the
    edge sits half a pixel outside the outermost row or column) and from every
    pixel of ``bad``. The frame part is closed form; the distance to ``bad`` is
    computed by :func:`scipy.ndimage.distance_transform_edt` on row blocks
    with a halo of the margin (:func:`_trusted_rows`), and only on the column
    ranges that have a bad pixel within the margin, which gives the same answer:
    a bad pixel closer than the margin always lies in the window.
    """
    ny, nx = shape
    bad_rows = None if bad is None else (lambda a, b: bad[a:b])
    hy = _trusted_halo(sigma_nm, pixel_size, margin_sigma)[0]
    out = np.empty((ny, nx), dtype=bool)
    block = max(hy, 64)
    for r0 in range(0, ny, block):
        r1 = min(ny, r0 + block)
        out[r0:r1] = _trusted_rows(bad_rows, shape, sigma_nm, pixel_size, r0, r1, margin_sigma)
    return out


def _trusted_halo(sigma_nm, pixel_size, margin_sigma=2.5):
    """Rows and columns of ``bad`` beyond a block that can untrust a pixel of it."""
    dy, dx = pixel_size
    limit, half = margin_sigma * float(sigma_nm), 0.5 * min(dy, dx)
    return int(math.ceil((limit + half) / dy)) + 1, int(math.ceil((limit + half) / dx)) + 1


def _trusted_rows(bad_rows, shape, sigma_nm, pixel_size, r0, r1, margin_sigma=2.5):
    """Rows r0 ... r1 - 1 of :func:`_trusted`; ``bad_rows(a, b)`` gives rows a ... b - 1 of the bad
    pixels (or None when there are none there), ``bad_rows`` None: no bad pixels at all."""
    dy, dx = pixel_size
    ny, nx = shape
    limit, half = margin_sigma * float(sigma_nm), 0.5 * min(dy, dx)
    rows = np.arange(r0, r1)
    rows_ok = np.minimum(rows + 1, ny - rows) * dy - half >= limit
    cols_ok = np.minimum(np.arange(1, nx + 1), np.arange(nx, 0, -1)) * dx - half >= limit
    out = rows_ok[:, None] & cols_ok[None, :]
    if bad_rows is None or not out.any():
        return out
    hy, hx = _trusted_halo(sigma_nm, pixel_size, margin_sigma)
    a, b = max(0, r0 - hy), min(ny, r1 + hy)
    window = bad_rows(a, b)
    if window is None:
        return out
    out &= ~window[r0 - a : r1 - a]
    columns = window.any(axis=0)
    if not columns.any():
        return out
    near = np.convolve(columns, np.ones(2 * hx + 1), mode="same") > 0.5
    edges = np.flatnonzero(np.diff(np.r_[0, near.astype(np.int8), 0]))
    for c0, c1 in zip(edges[::2], edges[1::2]):
        distance = ndimage.distance_transform_edt(~window[:, c0:c1], sampling=(dy, dx))
        out[:, c0:c1] &= distance[r0 - a : r1 - a] - half >= limit
    return out


def choose_sigma(q, *, leakage=0.01, include_dc=True):
    """Lock-in width that keeps every other Fourier peak's leakage below ``leakage``.

    A peak at distance dk leaks in with weight exp(-sigma^2 dk^2 / 2), so
    sigma = sqrt(2 ln(1/leakage)) / dk_min (docs/methods.md §1: sigma dk >= 3.03 for 1 %).
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
