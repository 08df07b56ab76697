"""Drift correction of a lazy (dask) frame against the in-memory correction of the same frame (issue 11).

Reference: the in-memory path of :func:`domains.drift.correct_drift` on the same image, itself
checked against the analytic drift of the scenes in tests/test_drift.py and tests/test_drift_grid.py.
The chunks are irregular and cut the frame across the halo, the decimated grid and the lock-in's
own chunks.

Tolerances (derived). Both paths run the lock-ins in float32; the chunked lock-in uses other FFT
lengths than the whole frame's, so the two round differently. An FFT-based convolution in float32
is accurate to about log2(P) u relative to the rms of its input (N. J. Higham, Accuracy and
Stability of Numerical Algorithms, 2nd ed., SIAM 2002, §24.1; from memory), u = 6e-8, P <= 1024:
6e-7. Relative to |A| = 1/2 of a unit cosine among three (rms 1.22) that is 1.5e-6 rad of phase,
and up to four times more at a frame corner, where the normalised convolution divides by a weight
of 1/4: PHASE_TOL = 1e-5 rad with margin. The displacement is pinv(Q) theta, so its error is at most
PHASE_TOL / |Q| = 2.5e-5 px for the 16-pixel period (|Q| = 0.39 rad/px), and the cubic spline
extrapolates the last (< step) rows and columns with no gain beyond 1 + a few %: U_TOL = 3e-5 px.
The corrected image moves by |grad T| du <= (sum_j |Q_j|) U_TOL = 1.18 * 3e-5 = 3.5e-5 per unit
cosine, plus float32 rounding of values up to 3: T_TOL = 4e-5. The residual phase is the phase of a
lock-in of the corrected image: PHASE_TOL + |Q| U_TOL = 2.2e-5 rad -> R_TOL = 2.5e-5 rad.
Boolean maps (outside, mask, trusted) are equal exactly where no source point r - u(r) lies within
U_TOL of the frame edge (checked for each scene before it is relied on).
"""

import dask.array as da
import numpy as np
import pytest
from numpy.testing import assert_allclose

from domains import pipeline
from domains.drift import DriftResult, correct_channels, correct_drift
from domains.synth import cdw_scene

SHAPE = (513, 470)  # odd sizes: the decimated grid's last sample is not the last pixel
CHUNKS = ((100, 157, 256), (200, 270))  # irregular, not multiples of the grid step
PIX = 0.025  # nm per pixel, a 16-pixel Bragg period as in tests/test_drift.py
SIGMA = 10 * PIX
ROWS, COLS = np.mgrid[: SHAPE[0], : SHAPE[1]].astype(float)
# A hexagonal lattice with a 16-pixel period (rad/px), not on integer bins of this frame.
Q_PX = 2 * np.pi / 16 * np.array([[1.0, 0.0], [-0.5, np.sqrt(3) / 2], [-0.5, -np.sqrt(3) / 2]])
Q_NM = Q_PX / PIX

PHASE_TOL = 1e-5
U_TOL_PX = 3e-5
T_TOL = 4e-5
R_TOL = 2.5e-5


def drifted_lattice():
    """T(r) = sum_j cos(Q_j . (r + u(r))) with a slow field and components as fast as the lock-in
    follows (|k| sigma = 2 and 1.5), built analytically in pixels."""
    ux = 1.2 * np.sin(2 * np.pi * ROWS / SHAPE[0]) + 0.5 * np.sin(0.2 * ROWS + 0.3)
    uy = 0.4 * np.sin(0.15 * COLS + 1.1) + 0.8 * np.cos(2 * np.pi * COLS / SHAPE[1])
    return sum(np.cos(qx * (COLS + ux) + qy * (ROWS + uy)) for qx, qy in Q_PX)


def near_edge(result):
    """Pixels whose source point r - u(r) (in-memory field) lies within U_TOL_PX of the frame edge."""
    rows = ROWS - result.u_nm[1] / PIX
    cols = COLS - result.u_nm[0] / PIX
    margin = np.minimum.reduce([np.abs(rows), np.abs(rows - (SHAPE[0] - 1)), np.abs(cols), np.abs(cols - (SHAPE[1] - 1))])
    return margin < 2 * U_TOL_PX


def compare(lazy, memory):
    """The lazy result against the in-memory one, to the tolerances derived above."""
    assert isinstance(lazy, DriftResult) and lazy.step == memory.step and lazy.iterations == memory.iterations
    # derived: both measure u at the same samples; float32 lock-in rounding only
    assert np.array_equal(np.isnan(lazy.u_coarse_nm), np.isnan(memory.u_coarse_nm))
    assert_allclose(lazy.u_coarse_nm, memory.u_coarse_nm, rtol=0, atol=U_TOL_PX * PIX, equal_nan=True)
    assert_allclose(np.asarray(lazy.u_nm), memory.u_nm, rtol=0, atol=U_TOL_PX * PIX, equal_nan=True)
    corrected = lazy.corrected.compute()
    assert corrected.dtype == memory.corrected.dtype  # float32 stays float32 (as in memory)
    assert np.array_equal(np.isnan(corrected), np.isnan(memory.corrected))
    assert_allclose(corrected, memory.corrected, rtol=0, atol=T_TOL, equal_nan=True)
    assert not near_edge(memory).any()  # so the boolean maps must agree exactly (derived)
    for name in ("outside", "mask", "trusted"):
        assert np.array_equal(np.asarray(getattr(lazy, name)), getattr(memory, name)), name
    assert_allclose(np.asarray(lazy.residual_phase_rad), memory.residual_phase_rad, rtol=0, atol=R_TOL,
                    equal_nan=True)
    assert_allclose(lazy.residual_rms_rad, memory.residual_rms_rad, rtol=0, atol=R_TOL)
    assert_allclose(lazy.residual_max_rad, memory.residual_max_rad, rtol=0, atol=R_TOL)
    assert_allclose(lazy.lockin_coarse, memory.lockin_coarse, rtol=0, atol=PHASE_TOL, equal_nan=True)
    assert lazy.converged == memory.converged
    assert_allclose(lazy.phase_sum_rms_rad, memory.phase_sum_rms_rad, rtol=0, atol=PHASE_TOL)


@pytest.fixture(scope="module")
def plain():
    image = drifted_lattice().astype(np.float32)
    memory = correct_drift(image, Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX)
    lazy = correct_drift(da.from_array(image, chunks=CHUNKS), Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX)
    return image, memory, lazy


def test_chunked_equals_in_memory_float32(plain):
    _, memory, lazy = plain
    assert memory.residual_max_rad.max() < 0.03  # the reference did its job (docs/methods.md §2 tolerance)
    compare(lazy, memory)
    # the correction keeps the input's irregular chunks (none thinner than the halo here)
    assert lazy.corrected.chunks == CHUNKS and lazy.corrected.dtype == np.float32


def test_chunks_thinner_than_the_halo_are_merged(plain):
    image, memory, _ = plain
    thin = ((20, 300, 193), (13, 57, 400))  # 20 and 13 px: less than the halo (24 prefilter pixels alone)
    lazy = correct_drift(da.from_array(image, chunks=thin), Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX)
    compare(lazy, memory)
    # derived: a chunk thinner than the halo joins its neighbour; the others keep their borders
    assert lazy.corrected.chunks == ((320, 193), (70, 400))


def test_chunked_equals_in_memory_with_nan_mask_lattice():
    image = drifted_lattice()
    image[200:210, 100:140] = np.nan  # a hole across a chunk border
    mask = np.zeros(SHAPE, bool)
    mask[400:405, :] = True  # a glitched band of lines
    mask[50:52, 300:320] = True
    memory = correct_drift(image, Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX, mask=mask, translation="lattice")
    lazy = correct_drift(da.from_array(image, chunks=CHUNKS), Q_NM, sigma_nm=SIGMA, pixel_size_nm=PIX, mask=mask,
                         translation="lattice")
    compare(lazy, memory)
    assert memory.mask[405:410].any() or memory.mask[400:405].all()  # the mask was carried along (derived)


def test_lazy_result_indexes_from_grid(plain):
    _, memory, lazy = plain
    phase = lazy.residual_phase_rad
    assert phase.shape == memory.residual_phase_rad.shape and phase.dtype == np.float32
    rows = np.array([0, 7, 256, 512, -1])
    cols = np.array([0, 469, 100, 3, -2])
    # reference: the in-memory full-size arrays, indexed the same way (numpy semantics)
    assert_allclose(phase[:, rows, cols], memory.residual_phase_rad[:, rows, cols], rtol=0, atol=R_TOL)
    for key in ((Ellipsis, slice(None, None, 7), slice(None, None, 7)), (1, slice(3, 90), slice(400, None)),
                (slice(None), 100), (0, 5, slice(None, None, 3))):
        assert_allclose(phase[key], memory.residual_phase_rad[key], rtol=0, atol=R_TOL, err_msg=str(key))
    assert_allclose(lazy.u_nm[:, rows, cols], memory.u_nm[:, rows, cols], rtol=0, atol=U_TOL_PX * PIX)
    # nothing full size is held: the arrays are dask graphs, the rest lives on the decimated grid
    coarse = int(np.prod(lazy.u_coarse_nm.shape[1:]))
    for name, value in vars(lazy).items():
        if isinstance(value, np.ndarray):
            assert value.size <= len(Q_NM) * coarse, name
    for name in ("corrected", "outside", "mask", "trusted"):
        assert isinstance(getattr(lazy, name), da.Array), name


def test_correct_channels_of_dask_stack_chunk_by_chunk(plain):
    image, memory, lazy = plain
    stack = np.stack([image, 2 * image + 1]).astype(np.float32)
    out = correct_channels(da.from_array(stack, chunks=((1, 1),) + CHUNKS), lazy)
    assert isinstance(out, da.Array)
    # derived: resampling is linear and exact for a constant, so 2 T + 1 -> 2 T' + 1 (float32 values up to 7)
    result = out.compute()
    assert_allclose(result[0], memory.corrected, rtol=0, atol=T_TOL, equal_nan=True)
    assert_allclose(result[1], 2 * memory.corrected + 1, rtol=0, atol=2 * T_TOL + 7 * 1.2e-7, equal_nan=True)


@pytest.fixture(scope="module")
def runs():
    scene = cdw_scene(shape=(512, 512), n_domains=4, rng=3, drift_nm=0.15)
    topo = scene.topography
    memory = pipeline.analyze(topo, progress=False)
    lazy_topo = topo.with_data(da.from_array(np.asarray(topo.data), chunks=((100, 200, 212), (300, 137, 75))))
    lazy = pipeline.analyze(lazy_topo, progress=False)
    return scene, memory, lazy


def test_lazy_analyze_corrects_drift_like_in_memory(runs):
    scene, memory, lazy = runs
    m, z = memory.summary, lazy.summary
    # the drift is on by default in both runs and the image stays lazy
    assert m["drift"] is not None and z["drift"] is not None
    assert isinstance(lazy.maps["labels"][0], da.Array)
    # truth: the scene's drift (domains.synth, same sign convention T(r) = f(r + u)) up to an affine field
    # (a uniform strain is absorbed by the measured Bragg vectors, a translation by "remove"), over the
    # samples 3 sigma inside the frame. Tolerance 0.01 nm: the lock-in phase noise of the scene's
    # 0.004 nm white noise on a 0.01 nm Bragg amplitude, averaged over a Gaussian of sigma = 10 px,
    # is 0.004 / 0.01 / sqrt(4 pi 10^2) = 0.011 rad, i.e. 5e-4 nm for |G| = 21.5 rad/nm, plus the 1 %
    # leakage of each CDW peak (0.012 / 0.02 * 0.01 rad = 3e-4 nm): 8e-4 nm, and its maximum over
    # ~200 independent areas of 4 pi sigma^2 is about 3.5 times that (Gaussian tail), 3e-3 nm; the
    # tolerance allows three times more for the walls, where the CDW amplitude changes (derived).
    pix = scene.topography.pixel_size_nm[0]
    ux, attrs = lazy.maps["displacement/ux"]
    uy = lazy.maps["displacement/uy"][0]
    step = int(round(attrs["pixel_size_nm"][0] / pix))
    truth = scene.truth_maps["displacement"][:, ::step, ::step]
    sigma_px = z["drift"]["sigma_nm"] / pix
    samples = np.arange(truth.shape[1]) * step
    inner = (samples >= 3 * sigma_px) & (samples < scene.topography.shape[0] - 3 * sigma_px)
    rows, cols = np.meshgrid(samples[inner], samples[inner], indexing="ij")
    design = np.column_stack([np.ones(rows.size), rows.ravel(), cols.ravel()])
    for found, true in ((ux, truth[0]), (uy, truth[1])):
        diff = (true[np.ix_(inner, inner)] - np.asarray(found, float)[np.ix_(inner, inner)]).ravel()
        affine = design @ np.linalg.lstsq(design, diff, rcond=None)[0]
        assert np.abs(diff - affine).max() < 0.01
        assert np.abs(true).max() > 0.1  # the drift is there to be found
    # reference: the in-memory run of the same analysis
    assert z["domains"]["count"] == m["domains"]["count"] == scene.truth["n_domains"]
    assert z["superlattice"]["order"] == m["superlattice"]["order"] == "3x3"
    assert z["lattice"]["kind"] == m["lattice"]["kind"] == "hexagonal"
    assert_allclose(z["lattice"]["a_nm"], m["lattice"]["a_nm"], rtol=1e-6)  # same peaks, float rounding
    assert_allclose(z["drift"]["residual_phase_rms_rad"], m["drift"]["residual_phase_rms_rad"], rtol=0, atol=R_TOL)
    assert_allclose(lazy.maps["displacement/ux"][0], memory.maps["displacement/ux"][0], rtol=0, atol=1e-6)
    # labels are decided on the decimated grid from the same (float32-equal) fields: exactly equal
    assert np.array_equal(np.asarray(lazy.maps["labels"][0]), memory.maps["labels"][0])
