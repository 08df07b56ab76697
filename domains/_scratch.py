"""Intermediate images of a lazy run, computed once and read back chunk by chunk.

A lazy run reads its levelled (and drift-corrected) image many times: the spectrum's crop,
the line offsets, every drift iteration, the lock-ins, the noise floor, the maps written to the
bundle. Left as a dask graph, each read computes the levelling (and the resampling) again from
the input store. :func:`checkpoint` computes such an image once into a zarr store in a scratch
folder and returns a dask array reading it: every later read costs one chunk read.

The scratch folder is ``$DOMAINS_SCRATCH`` when set, else the system's temporary folder
(:func:`tempfile.gettempdir`); it is removed when the run's :class:`Scratch` is closed or
garbage-collected. With a dask.distributed client in use and no ``$DOMAINS_SCRATCH``, the
image is kept in the workers' memory instead (``persist``): the workers of an existing cluster
may not see the client's temporary folder.
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
import weakref
from pathlib import Path

__all__ = ["Scratch", "checkpoint", "checkpoint_many"]


def _client():
    """The dask.distributed client in use, or None (dask.distributed is not imported for this)."""
    if "distributed" not in sys.modules:
        return None
    from distributed import default_client

    try:
        return default_client()
    except ValueError:
        return None


class Scratch:
    """A scratch folder for one run, removed on :meth:`close` (or when garbage-collected).

    Parameters
    ----------
    where : str or Path, optional
        Parent folder; default ``$DOMAINS_SCRATCH`` or the system's temporary folder.

    Examples
    --------
    >>> import dask.array as da
    >>> with Scratch() as scratch:
    ...     x = checkpoint(da.ones((4, 6), chunks=(2, 3)) * 2, scratch, "twos")
    ...     float(x.sum().compute())
    48.0
    """

    def __init__(self, where=None):
        parent = where or os.environ.get("DOMAINS_SCRATCH") or None
        self.path = Path(tempfile.mkdtemp(prefix="domains-scratch-", dir=parent))
        self.explicit = bool(where or os.environ.get("DOMAINS_SCRATCH"))
        # Removed when closed, when garbage-collected, or at the latest when the interpreter exits.
        self._remove = weakref.finalize(self, shutil.rmtree, str(self.path), ignore_errors=True)

    def close(self):
        self._remove()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def checkpoint(array, scratch, name):
    """Compute a dask array once and return a dask array of the same values, chunks and dtype that
    reads the stored result.

    Parameters
    ----------
    array : dask.array.Array
        The image (any dtype zarr stores).
    scratch : Scratch
        The run's scratch folder.
    name : str
        Store name inside the folder (``name.zarr``).

    Returns
    -------
    dask.array.Array
        Reads ``scratch.path / name.zarr`` chunk by chunk (or the persisted blocks on a
        dask.distributed cluster when no scratch folder was set explicitly).

    References
    ----------
    Checkpointing intermediate results of an out-of-core computation to chunked storage is
    common practice (no source); dask documents ``to_zarr``/``from_zarr`` and ``persist``.

    Examples
    --------
    >>> import dask.array as da
    >>> with Scratch() as scratch:
    ...     y = checkpoint(da.arange(10, chunks=4) ** 2, scratch, "squares")
    ...     y.chunks, int(y[3].compute())
    (((4, 4, 2),), 9)
    """
    return checkpoint_many({name: array}, scratch)[name]


def _regular(array):
    """``array`` with regular chunks (zarr's: all equal but a shorter last one)."""
    irregular = any(len(set(c[:-1])) > 1 or c[-1] > c[0] for c in array.chunks)
    return array.rechunk(tuple(max(c) for c in array.chunks)) if irregular else array


def checkpoint_many(arrays, scratch):
    """:func:`checkpoint` of several dask arrays in one computation: what they share (one block
    function with several outputs, the same input chunks) is computed once per chunk.

    Parameters
    ----------
    arrays : dict of str to dask.array.Array
        Store name (``name.zarr`` in the scratch folder) to the array to store.
    scratch : Scratch
        The run's scratch folder.

    Returns
    -------
    dict of str to dask.array.Array
        The same names, each a dask array of the same values, chunks and dtype reading its store.

    References
    ----------
    Common practice, no source: dask computes the graphs of several ``to_zarr(compute=False)``
    targets together, so keys they share are computed once.

    Examples
    --------
    >>> import dask.array as da
    >>> x = da.arange(12, chunks=5)
    >>> with Scratch() as scratch:
    ...     out = checkpoint_many({"double": 2 * x, "odd": x % 2 == 1}, scratch)
    ...     int(out["double"].sum().compute()), int(out["odd"].sum().compute()), out["odd"].dtype.name
    (132, 6, 'bool')
    """
    import dask
    import dask.array as da

    if _client() is not None and not scratch.explicit:
        return dict(zip(arrays, dask.persist(*arrays.values())))
    paths = {name: str(scratch.path / f"{name}.zarr") for name in arrays}
    # Regular chunks for zarr (its last chunk may be partial); the caller's chunks are restored on reading.
    dask.compute(*[_regular(a).to_zarr(paths[name], overwrite=True, compute=False) for name, a in arrays.items()])
    out = {}
    for name, array in arrays.items():
        stored = da.from_zarr(paths[name])
        out[name] = stored if stored.chunks == array.chunks else stored.rechunk(array.chunks)
    return out
