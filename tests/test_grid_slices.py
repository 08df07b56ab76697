"""A spectroscopic grid processed energy chunk by energy chunk: in memory and on dask give the same
results, a dask grid is never computed whole, the labels' geometry is computed once for every slice,
and the memory of the pass does not grow with the number of energies.

The scene is ``domains.synth.electronic_types_scene`` (two electronic types, a 3x3 CDW) with its TRUE
labels, so nothing here depends on the segmentation.
"""

from __future__ import annotations

import math
import tracemalloc

import dask.array as da
import numpy as np
import pytest
from numpy.testing import assert_allclose

from domains import compare, pipeline
from domains._scan import Scan
from domains.synth import electronic_types_scene

PIXEL_NM = 0.05
# derived: the 3x3 CDW of a = 0.336 nm has |Q| = 7.20 rad/nm; sigma |Q| = 3.6 keeps its leak into the
# smoothed map below exp(-6.5) (docs/methods.md §1).
SIGMA_NM = 0.5
# The energies and the two types' conductance offsets (nS) of tests/test_types.py's grid: the types differ
# at negative energies only (invented values).
GRID_E = (-0.3, -0.2, -0.1, -0.05, 0.05, 0.1, 0.2, 0.3)
GRID_OFFSETS = ((-0.2, -0.15, -0.1, 0.0, 0.0, 0.0, 0.0, 0.0), (0.2, 0.15, 0.1, 0.0, 0.0, 0.0, 0.0, 0.0))
# Irregular energy chunks over the 8 energies, and rows cut unevenly: every way a block can start, end and be
# cut is exercised (the dask-image practice of chunks small and irregular).
ENERGY_CHUNKS = (1, 3, 2, 1, 1)
ROW_CHUNKS = (90, 166)


@pytest.fixture(scope="module")
def scene():
    s = electronic_types_scene(shape=(256, 256), n_types=2, n_domains=6, biases_V=GRID_E, offsets_nS=GRID_OFFSETS,
                               tip_change=False, setpoint_ratio=1.0, noise_nS=0.05, rng=12)
    labels = s.truth_maps["labels"].astype(np.int32)
    q = np.array(s.truth["q_cdw_rad_per_nm"], float)
    data = np.stack([m.data for m in s.maps]).astype(np.float32)
    energies = np.array(GRID_E)
    mask = np.zeros(labels.shape, bool)
    mask[200:215, 20:45] = True  # an untrusted patch: the masked lock-in and the masked geometry run too
    return data, energies, labels, q, mask


class _CountingStore:
    """An array-like that records how many energies each read of data spans."""

    def __init__(self, array):
        self.array, self.shape, self.dtype, self.ndim = array, array.shape, array.dtype, array.ndim
        self.spans, self.reads = [], 0

    def __getitem__(self, key):
        out = self.array[key]
        if out.size == 0:  # dask's look at the dtype, not a read of data
            return out
        self.reads += 1
        self.spans.append(out.shape[0] if out.ndim == 3 else 1)
        return out


def _analyse(grid, energies, labels, q, mask):
    return compare._grid_analysis(grid, energies, labels, q, sigma_nm=SIGMA_NM, pixel_size_nm=PIXEL_NM, mask=mask,
                                  units="nS")


def _assert_same_phase(a, b, atol):
    # NaN (a domain without interior pixels) in the same places; elsewhere equal modulo 2 pi
    assert np.array_equal(np.isnan(a), np.isnan(b))
    ok = ~np.isnan(a)
    assert_allclose(np.angle(np.exp(1j * (a[ok] - b[ok]))), 0, atol=atol)


def _assert_same_contrast(a, b, rtol):
    assert a.biases_V == b.biases_V and a.domains == b.domains and a.working_step == b.working_step
    for sa, sb in zip(a.sets(), b.sets()):
        assert sa.quantity == sb.quantity and sa.pairs == sb.pairs
        for name in ("mean", "mean_se", "frame", "frame_se", "contrast", "contrast_se", "cov", "noise",
                     "wall_delta", "wall_se"):
            x, y = getattr(sa, name), getattr(sb, name)
            assert np.array_equal(np.isnan(x), np.isnan(y)), f"{sa.quantity}.{name}"
            ok = ~np.isnan(y)
            scale = float(np.max(np.abs(y[ok]))) if ok.any() else 0.0
            # float32 precision of the slices, relative to the largest value of the quantity
            assert_allclose(x[ok], y[ok], rtol=rtol, atol=rtol * scale, err_msg=f"{sa.quantity}.{name}")


def test_dask_grid_with_irregular_energy_chunks_equals_the_in_memory_grid(scene):
    data, energies, labels, q, mask = scene
    fp_mem, ec_mem = _analyse(data, energies, labels, q, mask)
    store = _CountingStore(data)
    lazy = da.from_array(store, chunks=(ENERGY_CHUNKS, ROW_CHUNKS, (256,)))
    fp_lazy, ec_lazy = _analyse(lazy, energies, labels, q, mask)
    # derived: the same float32 slices go through the same code; agreement to float32 precision (eps 1.2e-7,
    # a few roundings in the reductions): rtol 1e-6.
    rtol = 1e-6
    assert_allclose(fp_lazy.amplitude, fp_mem.amplitude, rtol=rtol)
    _assert_same_phase(fp_lazy.phase_rad, fp_mem.phase_rad, rtol)
    assert np.array_equal(fp_lazy.n_pixels, fp_mem.n_pixels) and np.array_equal(fp_lazy.domains, fp_mem.domains)
    _assert_same_contrast(ec_lazy, ec_mem, rtol)
    assert ec_mem.amplitude is not None  # q is resolved: both quantities compared
    # Every stored chunk was read once, and no read spanned more than one energy chunk (4 energies at most).
    # derived: one read per energy chunk and row chunk.
    assert store.reads == len(ENERGY_CHUNKS) * 2 and max(store.spans) == max(ENERGY_CHUNKS)
    # The types found from either are the same (synthetic truth: two types).
    t_mem, t_lazy = compare.electronic_types(ec_mem), compare.electronic_types(ec_lazy)
    assert sorted(t_mem.types) == sorted(t_lazy.types) and len(t_mem.types) == 2


def test_one_pass_equals_the_two_public_functions(scene):
    data, energies, labels, q, mask = scene
    fp, ec = _analyse(data, energies, labels, q, mask)
    kw = dict(sigma_nm=SIGMA_NM, pixel_size_nm=PIXEL_NM, mask=mask)
    fp_alone = compare.grid_fingerprints(data, energies, labels, q, **kw)
    ec_alone = compare.grid_electronic_contrast(data, energies, labels, units="nS", q=q, **kw)
    # derived: the same slices, the same operations in the same order: equal to rounding.
    assert_allclose(fp.amplitude, fp_alone.amplitude, rtol=1e-12)
    _assert_same_phase(fp.phase_rad, fp_alone.phase_rad, 1e-12)
    _assert_same_contrast(ec, ec_alone, 1e-12)
    # int32 labels are used without an int64 copy: the same results as int64 labels (derived: the same values).
    fp64, ec64 = _analyse(data, energies, labels.astype(np.int64), q, mask)
    assert labels.dtype == np.int32
    assert_allclose(fp.amplitude, fp64.amplitude, rtol=1e-12)
    _assert_same_contrast(ec, ec64, 1e-12)


def test_a_grid_stored_as_one_chunk_is_read_a_few_slices_at_a_time(scene):
    data, energies, labels, q, mask = scene
    store = _CountingStore(data)
    lazy = da.from_array(store, chunks=(data.shape[0], 256, 256))  # one stored chunk holds every energy
    fp, ec = _analyse(lazy, energies, labels, q, mask)
    fp_mem, ec_mem = _analyse(data, energies, labels, q, mask)
    # derived: blocks of at most compare._GRID_BLOCK_SLICES = 4 slices, 8 energies -> 2 reads.
    assert max(store.spans) == compare._GRID_BLOCK_SLICES == 4 and store.reads == 2
    assert_allclose(fp.amplitude, fp_mem.amplitude, rtol=1e-6)  # float32 precision, as above
    _assert_same_contrast(ec, ec_mem, 1e-6)


def test_grid_blocks_cut_chunks_by_slices_and_bytes():
    # derived from the rule: energy chunks cut into blocks of <= 4 slices and <= 256 MiB, at least one slice.
    assert compare._grid_blocks((1, 3, 2, 4, 1, 1), 4) == [(0, 1), (1, 4), (4, 6), (6, 10), (10, 11), (11, 12)]
    assert compare._grid_blocks((10,), 4) == [(0, 4), (4, 8), (8, 10)]
    assert compare._grid_blocks((5,), 100 * 2**20) == [(0, 2), (2, 4), (4, 5)]  # two 100 MiB slices per block
    assert compare._grid_blocks((3,), 2**30) == [(0, 1), (1, 2), (2, 3)]  # a slice larger than the budget: one


def test_geometry_is_computed_once_whatever_the_number_of_energies(scene, monkeypatch):
    data, energies, labels, q, mask = scene
    calls = {"_interior_labels": 0, "_contrast_geometry": 0, "_row_offset_model": 0, "_rho_kernels": 0}
    for name in calls:
        original = getattr(compare, name)

        def counted(*args, _name=name, _original=original, **kwargs):
            calls[_name] += 1
            return _original(*args, **kwargs)

        monkeypatch.setattr(compare, name, counted)
    _analyse(da.from_array(data, chunks=(ENERGY_CHUNKS, 256, 256)), energies, labels, q, mask)
    # derived: one interior for the fingerprints (margin 2.5 sigma) and one for the contrast (3.5 sigma);
    # one contrast geometry, with its line-offset model and correlation kernels; none per slice.
    assert calls == {"_interior_labels": 2, "_contrast_geometry": 1, "_row_offset_model": 1, "_rho_kernels": 1}


def _peak_of_pass(n_energies, shape):
    """Peak memory allocated (tracemalloc: numpy's buffers included) while a dask grid of float32 slices is
    analysed; the grid itself is allocated before tracing starts and read through dask."""
    s = electronic_types_scene(shape=shape, n_types=2, n_domains=6, biases_V=(-0.2, 0.2), tip_change=False,
                               setpoint_ratio=1.0, noise_nS=0.05, rng=5)
    labels = s.truth_maps["labels"].astype(np.int32)
    q = np.array(s.truth["q_cdw_rad_per_nm"], float)
    data = np.stack([s.maps[k % 2].data * (1 + 0.01 * k) for k in range(n_energies)]).astype(np.float32)
    lazy = da.from_array(data, chunks=(2,) + shape)
    energies = np.linspace(-0.3, 0.3, n_energies)
    _analyse(lazy, energies, labels, q, None)  # warm caches (FFT plans, the lock-in's normaliser)
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        _analyse(lazy, energies, labels, q, None)
        return tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()


def test_memory_of_the_pass_is_a_few_slices_not_the_grid():
    shape = (256, 256)
    slice_bytes = 4 * math.prod(shape)
    small, large = _peak_of_pass(6, shape), _peak_of_pass(30, shape)
    # derived: what is held across slices is a few numbers per domain and slice (kilobytes), so 24 more
    # slices (6 MiB of float32 grid) add less than one slice (256 KiB) to the peak.
    assert large - small < slice_bytes
    # derived: a block of 2 float32 slices, the slice in float32, its smoothed copy and the lock-in's
    # complex64 spectrum of 3 wavevectors on the zero-padded FFT grid, plus the labels' geometry (int64
    # labels are 2 slices): well under the 30 slices of the grid; 20 slices bound it with room.
    assert large < 20 * slice_bytes


def test_grid_step_on_a_dask_grid_equals_the_in_memory_grid(scene):
    data, energies, labels, q, mask = scene
    out = []
    for grid in (data, da.from_array(data, chunks=(ENERGY_CHUNKS, ROW_CHUNKS, (256,)))):
        scan = Scan(grid, pixel_size_nm=PIXEL_NM, energies_V=energies, source="<synthetic grid>",
                    metadata={"units": "nS"})
        summary, tables, views = {}, {}, {}
        pipeline._grid_step(summary, tables, views, scan, labels, q, SIGMA_NM, (PIXEL_NM, PIXEL_NM), mask)
        out.append((summary, tables))
    (s_mem, t_mem), (s_lazy, t_lazy) = out
    # derived: the same numbers to float32 precision (rtol 1e-6) in every table of the bundle ...
    assert set(t_mem) == set(t_lazy) and {"fingerprint", "grid_types", "type_spectra"} <= set(t_mem)
    for name in t_mem:
        assert t_mem[name][0] == t_lazy[name][0]
        assert len(t_mem[name][1]) == len(t_lazy[name][1])
        for row_m, row_l in zip(t_mem[name][1], t_lazy[name][1]):
            for key, value in row_m.items():
                if isinstance(value, float) and math.isfinite(value):
                    assert row_l[key] == pytest.approx(value, rel=1e-6, abs=1e-9), (name, key)
                else:
                    assert row_l[key] == value or (value != value and row_l[key] != row_l[key]), (name, key)
    # ... and the same types, sentences included.
    assert s_mem["grid"]["electronic_types"]["sentences"] == s_lazy["grid"]["electronic_types"]["sentences"]
    assert s_mem["grid"]["electronic_types"]["n_types"] == 2  # synthetic truth: two types
