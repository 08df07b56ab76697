"""The two grids of an analysis: the input grid and a decimated, band-limited grid.

A lock-in field A = G_sigma * [I exp(-i q.r)] is band-limited to about 1/sigma,
so it is known everywhere from its samples every ``step`` pixels as long as the
step stays below :func:`domains._lockin.lossless_step` (docs/methods.md §1). The
order, the domains, the walls and the defects are therefore computed on the
decimated grid, whose sample (i, j) sits exactly on input pixel (step·i, step·j)
(``lockin(..., step=step)`` returns the full-resolution values there, not block
averages). Labels come back to the input grid by nearest sample; walls are
redrawn one input pixel thin between the brought-back domains.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ._scan import pixel_size_pair

__all__ = ["Grid", "choose_step"]


def choose_step(sigma_nm, pixel_size_nm, shape, *, min_samples=96):
    """Decimation step for the analysis grid: lossless for the lock-in, at most sigma / 2.

    Parameters
    ----------
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Input pixel size in nm (row, col).
    shape : tuple of int
        Input shape (rows, cols).
    min_samples : int
        The decimated grid keeps at least this many samples along its shorter side.

    Returns
    -------
    int
        The step in input pixels (1: no decimation).

    References
    ----------
    .. [1] C. E. Shannon, Proc. IRE 37, 10 (1949): a band-limited field is fixed by its samples.

    Examples
    --------
    >>> choose_step(0.8, 0.1, (1024, 1024))
    4
    >>> choose_step(0.8, 0.1, (200, 1024))
    2
    """
    from ._lockin import lossless_step

    dy, dx = pixel_size_pair(pixel_size_nm)
    sigma_px = sigma_nm / max(dy, dx)
    step = min(lossless_step(sigma_nm, (dy, dx)), int(math.floor(sigma_px / 2)))
    step = min(step, max(1, min(shape) // min_samples))
    return max(1, int(step))


@dataclass(frozen=True)
class Grid:
    """An input grid and its decimated analysis grid.

    Attributes
    ----------
    shape : (int, int)
        Input shape.
    pixel_size_nm : (float, float)
        Input pixel size (row, col) in nm.
    step : int
        Decimation step in input pixels.

    Examples
    --------
    >>> g = Grid((10, 7), (0.1, 0.1), 3)
    >>> g.coarse_shape, g.coarse_pixel_nm
    ((4, 3), (0.30000000000000004, 0.30000000000000004))
    >>> g.to_input(np.arange(12).reshape(4, 3))[:, 0].tolist()
    [0, 0, 3, 3, 3, 6, 6, 6, 9, 9]
    """

    shape: tuple
    pixel_size_nm: tuple
    step: int

    @property
    def coarse_shape(self):
        """Shape of the decimated grid: ceil(n / step) per axis."""
        return tuple(-(-n // self.step) for n in self.shape)

    @property
    def coarse_pixel_nm(self):
        """Pixel size of the decimated grid (row, col) in nm."""
        return (self.pixel_size_nm[0] * self.step, self.pixel_size_nm[1] * self.step)

    def sample(self, array):
        """The input-grid array at the decimated grid's samples (the last two axes)."""
        return array[..., :: self.step, :: self.step]

    def nearest(self, axis, start=0, stop=None):
        """Index of the nearest sample of each input row (axis 0) or column (axis 1) in [start, stop)."""
        stop = self.shape[axis] if stop is None else stop
        return np.minimum((np.arange(start, stop) + self.step // 2) // self.step, self.coarse_shape[axis] - 1)

    def to_input(self, coarse):
        """Bring a decimated array back to the input grid: each pixel takes its nearest sample."""
        rows, cols = self.nearest(0), self.nearest(1)
        return coarse[..., rows[:, None], cols[None, :]]

    def coarse_rows(self, rows):
        """Input row indices to the nearest decimated rows."""
        return [int(min(round(r / self.step), self.coarse_shape[0] - 1)) for r in rows]

    def _starts(self, axis):
        index = self.nearest(axis)
        return np.flatnonzero(np.r_[True, index[1:] != index[:-1]])

    def block_mean(self, array):
        """Mean of the input pixels nearest to each sample (the last two axes), ignoring NaN.

        The cell of sample (i, j) is the set of input pixels that :meth:`to_input`
        maps to it, so per-domain sums over cells equal sums over the input pixels.
        """
        array = np.asarray(array, dtype=np.float64)
        finite = np.isfinite(array)
        rows, cols = self._starts(0), self._starts(1)

        def cells(values):
            return np.add.reduceat(np.add.reduceat(values, rows, axis=-2), cols, axis=-1)

        total, count = cells(np.where(finite, array, 0.0)), cells(finite.astype(np.float64))
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(count > 0, total / np.maximum(count, 1.0), np.nan)
