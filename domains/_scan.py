"""The data model: one scan (image or spectroscopic grid) with its pixel size, channel, bias and mask."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._errors import InputError

CHANNELS = ("topography", "conductance", "current")


def _is_dask(array) -> bool:
    return type(array).__module__.startswith("dask")


def pixel_size_pair(pixel_size_nm, *, name="pixel_size_nm") -> tuple[float, float]:
    """Return a pixel size as a (row, col) pair of positive floats in nm.

    Parameters
    ----------
    pixel_size_nm : float or sequence of two floats
        One size for both axes, or (row, col) sizes, in nm.
    name : str
        Name used in the error message.

    Returns
    -------
    tuple of float
        (dy, dx) in nm.

    Raises
    ------
    InputError
        If the size is not one or two finite positive numbers.

    Examples
    --------
    >>> pixel_size_pair(0.05)
    (0.05, 0.05)
    >>> pixel_size_pair((0.05, 0.04))
    (0.05, 0.04)
    >>> pixel_size_pair("0.056 nm")
    Traceback (most recent call last):
    ...
    domains._errors.InputError: pixel_size_nm must be one number or a (row, col) pair of numbers in nm, got '0.056 nm'
    """
    expected = f"{name} must be one number or a (row, col) pair of numbers in nm, got {pixel_size_nm!r}"
    items = pixel_size_nm if isinstance(pixel_size_nm, (list, tuple, np.ndarray)) else [pixel_size_nm]
    # Strings ("0.056 nm", "abc") and booleans (JSON true) are not sizes, even where numpy would convert them.
    if any(isinstance(v, (str, bytes, bool, np.bool_)) or v is None for v in np.ravel(np.asarray(items, dtype=object))):
        raise InputError(expected)
    try:
        values = np.atleast_1d(np.asarray(pixel_size_nm, dtype=float))
    except (TypeError, ValueError):
        raise InputError(expected) from None
    if values.ndim != 1 or values.size not in (1, 2):
        raise InputError(expected)
    if not np.all(np.isfinite(values)) or np.any(values <= 0):
        raise InputError(f"{name} must be finite and positive (nm), got {pixel_size_nm!r}")
    if values.size == 1:
        return (float(values[0]), float(values[0]))
    return (float(values[0]), float(values[1]))


@dataclass
class Scan:
    """One scan: a 2-D image (row, col) or a 3-D grid (energy, row, col), with units.

    Parameters
    ----------
    data : array_like
        2-D image or 3-D spectroscopic grid. numpy and dask arrays are kept as
        they are (a dask array stays lazy).
    pixel_size_nm : float or (float, float)
        Real-space pixel size in nm, one value or (row, col).
    channel : {"topography", "conductance", "current"}
        What was measured.
    bias_V : float, optional
        Sample bias of a 2-D image, in V.
    energies_V : sequence of float, optional
        Bias of each energy slice of a 3-D grid, in V (required for grids).
    setpoint_A : float, optional
        Tunnelling-current setpoint in A.
    mask : array_like of bool, optional
        True where a pixel is untrusted, shaped like one image (row, col).
    source : str, optional
        Where the data came from (a path), used in messages.
    metadata : dict
        Free metadata, carried into the provenance record.

    Raises
    ------
    InputError
        If any field is invalid; the message states the received value.

    Examples
    --------
    >>> import numpy as np
    >>> scan = Scan(np.zeros((8, 8)), pixel_size_nm=0.05)
    >>> scan.shape, scan.pixel_size_nm, scan.extent_nm
    ((8, 8), (0.05, 0.05), (0.4, 0.4))
    """

    data: Any
    pixel_size_nm: Any
    channel: str = "topography"
    bias_V: float | None = None
    energies_V: Any = None
    setpoint_A: float | None = None
    mask: Any = None
    source: str = "<array>"
    metadata: dict = field(default_factory=dict)

    def __post_init__(self):
        where = self.source
        if not _is_dask(self.data):
            self.data = np.asarray(self.data)
        if self.data.ndim not in (2, 3):
            raise InputError(
                f"{where}: expected a 2-D image (row, col) or a 3-D grid (energy, row, col), "
                f"got an array of shape {tuple(self.data.shape)}"
            )
        if min(self.data.shape) < 1 or min(self.data.shape[-2:]) < 2:
            raise InputError(f"{where}: the image is empty or too small, shape {tuple(self.data.shape)}")
        if self.data.dtype.kind not in "biuf":
            raise InputError(f"{where}: expected real numbers, got dtype {self.data.dtype}")
        try:
            self.pixel_size_nm = pixel_size_pair(self.pixel_size_nm)
        except InputError as err:
            raise InputError(f"{where}: {err}") from None
        if self.channel not in CHANNELS:
            raise InputError(f"{where}: channel must be one of {', '.join(CHANNELS)}, got {self.channel!r}")
        if self.bias_V is not None:
            self.bias_V = _finite(self.bias_V, "bias_V", where)
        if self.setpoint_A is not None:
            self.setpoint_A = _finite(self.setpoint_A, "setpoint_A", where)
        if self.data.ndim == 3:
            if self.energies_V is None:
                raise InputError(f"{where}: a 3-D grid needs energies_V, one bias per slice")
            try:
                if any(isinstance(v, (str, bytes, bool)) for v in np.ravel(np.asarray(self.energies_V, dtype=object))):
                    raise ValueError
                energies = np.asarray(self.energies_V, dtype=float)
            except (TypeError, ValueError):
                energies = np.full(1, np.nan)  # reported below with the value received
            if energies.shape != (self.data.shape[0],) or not np.all(np.isfinite(energies)):
                raise InputError(
                    f"{where}: energies_V must hold {self.data.shape[0]} finite values (one per slice), "
                    f"got {self.energies_V!r}"
                )
            self.energies_V = energies
        elif self.energies_V is not None:
            raise InputError(f"{where}: energies_V is only for 3-D grids; this is a 2-D image")
        if self.mask is not None:
            mask = np.asarray(self.mask)
            if mask.shape != self.shape[-2:]:
                raise InputError(f"{where}: mask shape {mask.shape} differs from the image shape {self.shape[-2:]}")
            self.mask = mask.astype(bool, copy=False)  # a bool mask is kept, not copied (it may be large)

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.data.shape)

    @property
    def is_grid(self) -> bool:
        return self.data.ndim == 3

    @property
    def is_lazy(self) -> bool:
        return _is_dask(self.data)

    @property
    def extent_nm(self) -> tuple[float, float]:
        """Field of view (height, width) in nm."""
        ny, nx = self.shape[-2:]
        return (round(ny * self.pixel_size_nm[0], 12), round(nx * self.pixel_size_nm[1], 12))

    def with_data(self, data, **changes) -> "Scan":
        """A copy of this scan with new data (and any other field changed)."""
        fields = dict(
            pixel_size_nm=self.pixel_size_nm, channel=self.channel, bias_V=self.bias_V,
            energies_V=self.energies_V, setpoint_A=self.setpoint_A, mask=self.mask,
            source=self.source, metadata=dict(self.metadata),
        )
        fields.update(changes)
        return Scan(data, **fields)


def _finite(value, name, where) -> float:
    if isinstance(value, (str, bytes, bool, np.bool_)):
        raise InputError(f"{where}: {name} must be a number, got {value!r}")
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{where}: {name} must be a number, got {value!r}") from None
    if not np.isfinite(value):
        raise InputError(f"{where}: {name} must be finite, got {value!r}")
    return value
