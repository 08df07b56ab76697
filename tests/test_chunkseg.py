"""Chunked segmentation and phase defects against the in-memory functions and analytic scenes.

The reference for every equality is the in-memory function of domains.segment
(segment_states, phase_defects, disc_closing), run on the same numpy arrays; the
scenes are drawn analytically here (bands, a snake, squares, vortices at known
places), so counts and memberships are also checked against the drawing.
"""

import dask.array as da
import numpy as np
import pytest
from numpy.testing import assert_array_equal
from scipy import ndimage

from domains._chunkseg import _closing, phase_defects_chunked, segment_states_chunked
from domains._errors import InputError
from domains.segment import disc_closing, phase_defects, segment_states

IRREGULAR = ((97, 150, 61, 92), (61, 130, 47, 162))     # 400 x 400 samples, chunks thinner and thicker than the halo


def _drawn_scene():
    """A 400 x 400 state map drawn from shapes, with its truth.

    State 0 fills the frame; a band of state 1 crosses it from left to right (through every chunk
    column); a snake of state 2 goes down, turns and comes back up, crossing the chunk border
    at row 97 twice with both of its arms, so that within the first chunk row its two arms are
    separate pieces joined only through the chunk below; four 7 x 7 squares of state 1 are islands
    (their confident cores are a few samples, their area 49 samples, below the minimum of 50).
    """
    n = 400
    state = np.zeros((n, n), np.int64)
    state[200:240, :] = 1                                     # band: rows 200-239, all columns
    snake = np.zeros((n, n), bool)
    snake[20:130, 100:115] = True                             # left arm, rows 20-129 (crosses row 97)
    snake[20:130, 150:165] = True                             # right arm
    snake[115:130, 100:165] = True                            # the turn, below the border at row 97
    state[snake] = 2
    squares = [(40, 300), (300, 50), (330, 250), (94, 60)]    # the last one straddles the border at row 97
    for r, c in squares:
        state[r:r + 7, c:c + 7] = 1
    # Confidence falls to 0 at every boundary between states over 3 samples (a distance, derived).
    boundary = np.zeros((n, n), bool)
    boundary[:-1] |= state[:-1] != state[1:]
    boundary[:, :-1] |= state[:, :-1] != state[:, 1:]
    confidence = np.clip(ndimage.distance_transform_edt(~boundary) / 3.0, 0, 1)
    # A perturbation far below every step of the drawing makes the flooding values distinct: on exact
    # ties the in-memory flood's order depends on the whole frame's marker heap, which a chunk cannot see.
    confidence += 1e-6 * np.random.default_rng(0).random((n, n))
    ordered = np.ones((n, n), bool)
    ordered[300:302, 120:220] = False                         # a two-sample gap, bridged by the closing
    ordered[:, 380:] = False                                  # a disordered strip at the right edge
    return state, confidence, ordered, snake, len(squares)


def _dask(array, chunks=IRREGULAR):
    return da.from_array(array, chunks=chunks)


def _assert_same(seg, ref):
    assert seg.state == ref.state
    assert seg.islands == ref.islands
    assert seg.parameters == ref.parameters
    assert_array_equal(seg.grown.compute(), ref.grown)
    assert_array_equal(seg.walls.compute(), ref.walls)
    assert_array_equal(seg.labels.compute(), ref.labels)


def test_drawn_scene_equals_in_memory_and_the_drawing():
    state, confidence, ordered, snake, n_squares = _drawn_scene()
    args = dict(pixel_size_nm=0.1, min_area_nm2=0.5, confidence_threshold=0.9, bridge_nm=0.2)
    ref = segment_states(state, confidence, ordered, **args)
    seg = segment_states_chunked(_dask(state), _dask(confidence), _dask(ordered), **args)
    # reference: the in-memory segment_states, pixel for pixel and label number for label number
    _assert_same(seg, ref)
    assert seg.labels.chunks == IRREGULAR and seg.grown.chunks == IRREGULAR and seg.walls.chunks == IRREGULAR
    assert (seg.labels.dtype, seg.grown.dtype, seg.walls.dtype) == (np.int32, np.int32, bool)
    grown = seg.grown.compute()
    # analytic (the drawing): state 0 is cut by the band into a part above and a part below, the band
    # is one domain, the snake another: 4 domains; the 4 squares (49 samples < 50) are islands
    assert len(seg.state) == 4 and seg.islands == n_squares
    assert sorted(seg.state.values()) == [0, 0, 1, 2]
    # analytic: the snake's confident core (3 samples inside its edge) is one domain
    core = ndimage.binary_erosion(snake, iterations=3)
    snake_labels = np.unique(grown[core])
    assert snake_labels.size == 1 and seg.state[int(snake_labels[0])] == 2
    # analytic: the band crosses all four chunk columns and keeps one label
    assert np.unique(grown[210:230, :380]).size == 1


def test_snake_is_joined_through_the_next_chunk_row():
    # The snake's arms are separate pieces within the first chunk row (rows 0-96): only the chunk
    # below joins them, through the union of border equivalences.
    state, confidence, ordered, snake, _ = _drawn_scene()
    args = dict(pixel_size_nm=0.1, min_area_nm2=0.5, confidence_threshold=0.9)
    first_row = snake[:97]
    # analytic (the drawing): two pieces above the border
    assert ndimage.label(first_row, structure=np.ones((3, 3)))[1] == 2
    seg = segment_states_chunked(_dask(state), _dask(confidence), _dask(ordered), **args)
    labels = seg.grown.compute()
    left, right = labels[50, 107], labels[50, 157]
    assert left == right != 0          # analytic: one snake, one id
    # reference: the in-memory segment_states gives the same id there
    assert segment_states(state, confidence, ordered, **args).grown[50, 107] == left


def _random_scene(seed, n=(300, 340), dtype=np.float64):
    """States from the largest of three smoothed noises; confidence = the margin over the second."""
    rng = np.random.default_rng(seed)
    noise = ndimage.gaussian_filter(rng.normal(size=(3,) + n), (0, 5, 5))
    state = np.argmax(noise, axis=0)
    top = np.sort(noise, axis=0)
    confidence = (top[-1] - top[-2]).astype(dtype)
    confidence /= confidence.std()
    ordered = ndimage.gaussian_filter(rng.normal(size=n), 4) > -0.05
    trusted = np.ones(n, bool)
    trusted[:, :23] = False
    confidence[rng.random(n) < 0.002] = np.nan            # NaN confidence: never a core, flooded last
    return state, confidence, ordered, trusted


@pytest.mark.parametrize("seed,dtype,bridge_nm", [(0, np.float64, 0.0), (1, np.float32, 3.0), (2, np.float64, 2.0)])
def test_random_states_equal_in_memory_with_a_whole_frame_halo(seed, dtype, bridge_nm):
    # With a halo covering the frame every chunk's watershed floods the whole frame, so the result
    # must equal the in-memory one exactly (ties included); labels, islands and the closing are
    # exact for any halo. Chunks: irregular, some thinner than the closing's overlap.
    state, confidence, ordered, trusted = _random_scene(seed, dtype=dtype)
    chunks = ((97, 150, 53), (61, 80, 100, 40, 59))
    args = dict(pixel_size_nm=1.0, min_area_nm2=30.0, confidence_threshold=0.5, bridge_nm=bridge_nm)
    ref = segment_states(state, confidence, ordered, trusted=trusted, **args)
    assert len(ref.state) > 20 and ref.islands > 5     # the scene exercises both (not a test of the code)
    seg = segment_states_chunked(_dask(state, chunks), _dask(confidence, chunks), _dask(ordered, chunks),
                                 trusted=_dask(trusted, chunks), halo_px=340, **args)
    _assert_same(seg, ref)     # reference: the in-memory segment_states


def test_default_halo_is_exact_where_flood_paths_are_short():
    # The drawn scene's uncertain zones are 3 samples wide (derived from its confidence), far below
    # the default halo of 16 samples: the chunked watershed equals the in-memory one.
    state, confidence, ordered, _, _ = _drawn_scene()
    args = dict(pixel_size_nm=0.1, min_area_nm2=0.5, confidence_threshold=0.9, bridge_nm=0.2)
    small = ((40,) * 10, (50,) * 8)
    seg = segment_states_chunked(_dask(state, small), _dask(confidence, small), _dask(ordered, small), **args)
    _assert_same(seg, segment_states(state, confidence, ordered, **args))   # reference: in-memory


def test_numpy_inputs_and_no_domain():
    # reference: the in-memory function; analytic: nothing is confident, so there is no core: no
    # domain, no island, no wall. Confidence and ordered are given as numpy arrays.
    state = np.zeros((50, 60), int)
    state[:, 30:] = 1
    confidence = np.full((50, 60), 0.1)
    args = dict(pixel_size_nm=1.0, min_area_nm2=4.0, confidence_threshold=0.5)
    seg = segment_states_chunked(_dask(state, 17), confidence, np.ones((50, 60), bool), **args)
    ref = segment_states(state, confidence, np.ones((50, 60), bool), **args)
    _assert_same(seg, ref)
    assert seg.state == {} and seg.islands == 0 and not seg.walls.compute().any()   # analytic


def test_all_cores_are_islands():
    # analytic: 2 x 2 squares of state 1 in a disordered frame, each 4 samples < min area 10
    state = np.full((64, 64), -1)
    for r, c in [(5, 5), (30, 31), (31, 60), (62, 0)]:
        state[r:r + 2, c:c + 2] = 1
    args = dict(pixel_size_nm=1.0, min_area_nm2=10.0, confidence_threshold=0.5)
    conf, ordered = np.ones((64, 64)), np.ones((64, 64), bool)
    seg = segment_states_chunked(_dask(state, 31), _dask(conf, 31), _dask(ordered, 31), **args)
    _assert_same(seg, segment_states(state, conf, ordered, **args))   # reference: in-memory
    assert seg.islands == 4    # analytic: the square at (30, 31) straddles a chunk corner and counts once


@pytest.mark.parametrize("seed", range(4))
def test_closing_equals_in_memory_disc_closing(seed):
    # reference: domains.segment.disc_closing (edge "replicate"), itself checked against scipy's closing
    rng = np.random.default_rng(seed)
    mask = ndimage.gaussian_filter(rng.normal(size=(150, 170)), 2) > 0.02
    radius = int(rng.integers(1, 7))
    chunks = ((37, 50, 63), (29, 70, 71))
    assert_array_equal(_closing(_dask(mask, chunks), radius, chunks).compute(), disc_closing(mask, radius))


def test_bad_shapes_are_refused():
    # common practice, no source: bad input raises InputError naming the arrays
    with pytest.raises(InputError, match="differ in shape"):
        segment_states_chunked(_dask(np.zeros((10, 10), int), 5), np.zeros((10, 9)), np.ones((10, 10), bool),
                               pixel_size_nm=1.0, min_area_nm2=1.0, confidence_threshold=0.5)
    with pytest.raises(InputError, match="ordered shape"):
        phase_defects_chunked(np.ones((2, 10, 10), complex), pixel_size_nm=1.0, ordered=np.ones((9, 10), bool),
                              sigma_nm=1.0)


def _vortex_field(n, centres, signs, seed):
    """A field whose phase winds by sign * 2 pi around each centre (row, col), with weak smooth noise."""
    y, x = np.mgrid[:n, :n].astype(float)
    phase = np.zeros((n, n))
    for (r, c), s in zip(centres, signs):
        phase += s * np.arctan2(y - r, x - c)
    rng = np.random.default_rng(seed)
    noise = ndimage.gaussian_filter(rng.normal(size=(n, n)), 3)
    return np.exp(1j * (phase + 0.5 * noise / noise.std()))


def test_defects_equal_in_memory_and_the_drawn_vortices():
    n = 256
    chunks = ((97, 64, 95), (61, 100, 95))
    # Centres at plaquette centres (x.5), several on chunk borders (rows 96-97, cols 160-161) and a
    # corner; a +- pair 20 samples apart.
    centres = [(96.5, 60.5), (40.5, 160.5), (160.5, 40.5), (200.5, 200.5), (200.5, 220.5), (96.5, 160.5)]
    signs = [1, -1, 1, 1, -1, -1]
    field = np.stack([_vortex_field(n, centres, signs, 0), _vortex_field(n, centres[:2], signs[:2], 1)])
    ordered = np.ones((2, n, n), bool)
    ordered[1, :, 230:] = False
    kwargs = dict(pixel_size_nm=0.2, ordered=ordered, sigma_nm=0.6)
    ref = phase_defects(field, **kwargs)
    got = phase_defects_chunked(da.from_array(field, chunks=(1,) + chunks), **kwargs)
    assert got == ref                                   # reference: in-memory phase_defects, same order
    # analytic (the drawing): every vortex found once, at its centre, with its sign
    found = sorted((d["component"], round(d["row"], 1), round(d["col"], 1), d["winding"]) for d in got)
    truth = sorted([(0, r, c, s) for (r, c), s in zip(centres, signs)] + [(1, r, c, s) for (r, c), s in
                                                                          zip(centres[:2], signs[:2])])
    assert found == truth


@pytest.mark.parametrize("kwargs", [dict(min_ordered_fraction=0.9), dict(amplitude_threshold=[0.02, 0.05]),
                                    dict(loop_radius_nm=1.3)])
def test_noise_windings_equal_in_memory(kwargs):
    # Windings of smoothed complex noise (many, some grouped, some cut by disorder): the in-memory
    # list is the reference, element for element. Chunks irregular, some thinner than the overlap.
    rng = np.random.default_rng(5)
    shape = (2, 220, 260)
    field = ndimage.gaussian_filter(rng.normal(size=shape), (0, 4, 4)) \
        + 1j * ndimage.gaussian_filter(rng.normal(size=shape), (0, 4, 4))
    ordered = ndimage.gaussian_filter(rng.normal(size=shape[1:]), 6) > -0.03
    ref = phase_defects(field, pixel_size_nm=0.5, ordered=ordered, sigma_nm=1.0, **kwargs)
    assert len(ref) > 30        # the scene has windings to find (not a test of the code)
    chunks = (1, (97, 13, 110), (61, 150, 49))
    got = phase_defects_chunked(da.from_array(field, chunks=chunks), pixel_size_nm=0.5,
                                ordered=da.from_array(ordered, chunks=chunks[1:]), sigma_nm=1.0, **kwargs)
    assert got == ref           # reference: in-memory phase_defects


def test_min_area_from_the_pixel_area():
    # analytic: min_area 2.5 nm2 over 0.5 x 1.0 nm samples is ceil(5) = 5 samples: a 2 x 2 square is an
    # island, a 1 x 5 bar is a domain; non-square samples
    state = np.full((40, 40), -1)
    state[10:12, 10:12] = 0
    state[30, 5:10] = 0
    conf, ordered = np.ones((40, 40)), np.ones((40, 40), bool)
    args = dict(pixel_size_nm=(0.5, 1.0), min_area_nm2=2.5, confidence_threshold=0.5)
    seg = segment_states_chunked(_dask(state, 11), _dask(conf, 11), _dask(ordered, 11), **args)
    assert seg.islands == 1 and seg.state == {1: 0}
    _assert_same(seg, segment_states(state, conf, ordered, **args))   # reference: in-memory
