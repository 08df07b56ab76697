"""Segmentation morphology and defect rules against independent truths (scipy, analytic shapes and fields)."""

import math

import numpy as np
import pytest
from numpy.testing import assert_array_equal
from scipy import ndimage

from domains._errors import InputError
from domains.segment import _disc_fraction, disc_closing, segment_states


def _disc(r):
    return np.hypot(*np.mgrid[-r: r + 1, -r: r + 1]) <= r


@pytest.mark.parametrize("seed", range(6))
def test_disc_closing_equals_scipy_binary_closing(seed):
    rng = np.random.default_rng(seed)
    for _ in range(25):
        shape = tuple(int(v) for v in rng.integers(6, 48, 2))
        r = int(rng.integers(1, 9))
        mask = rng.random(shape) < rng.uniform(0.2, 0.9)
        # reference library: scipy.ndimage.binary_closing with the same disc, border_value=0
        assert_array_equal(disc_closing(mask, r, edge="zero"), ndimage.binary_closing(mask, structure=_disc(r)))
        # reference library: the old segmentation convention, scipy's closing of the edge-replicated mask
        padded = ndimage.binary_closing(np.pad(mask, r, mode="edge"), structure=_disc(r))[r:-r, r:-r]
        assert_array_equal(disc_closing(mask, r), padded)


@pytest.mark.parametrize("gap", [1, 4, 5, 6, 9])
def test_disc_closing_bridges_a_straight_gap_up_to_twice_the_radius(gap):
    # derived: a straight gap of g pixels between two half-planes is filled by the dilation
    # with a disc of radius r iff g <= 2r (each side grows by r); the erosion then takes back
    # nothing. Wider gaps come back unchanged (dilation then erosion restore a straight edge).
    r = 3
    mask = np.ones((30, 40), bool)
    mask[:, 15: 15 + gap] = False
    closed = disc_closing(mask, r)
    if gap <= 2 * r:
        assert closed.all()  # derived: see above
    else:
        assert_array_equal(closed, mask)  # derived: see above


def test_disc_closing_keeps_a_disc_hole_larger_than_the_element():
    # derived: closing fills only holes the structuring disc cannot enter. In a round hole of
    # radius 10, a pixel within 10 - r = 6 of the centre has no True pixel within r, so the
    # dilation leaves it False and the erosion cannot make it True; a one-pixel hole is filled.
    y, x = np.mgrid[:64, :64]
    mask = np.hypot(y - 32, x - 32) > 10
    mask[10, 10] = False
    closed = disc_closing(mask, 4)
    assert closed[10, 10]  # derived: see above
    assert_array_equal(closed[np.hypot(y - 32, x - 32) <= 6], False)  # derived: see above


def test_disc_closing_rejects_bad_input():
    # common practice, no source: bad input raises InputError naming the argument
    with pytest.raises(InputError, match="radius_px"):
        disc_closing(np.ones((4, 4), bool), -1)
    with pytest.raises(InputError, match="mask"):
        disc_closing(np.ones(4, bool), 1)
    with pytest.raises(InputError, match="edge"):
        disc_closing(np.ones((4, 4), bool), 1, edge="mirror")


def test_disc_fraction_equals_direct_convolution_and_the_lattice_count():
    rng = np.random.default_rng(3)
    mask = rng.random((50, 70)) < 0.6
    for r in (1, 5, 12):
        d = _disc(r)
        # reference library: scipy.ndimage.convolve with zeros outside the frame
        direct = ndimage.convolve(mask.astype(float), d / d.sum(), mode="constant")
        assert np.max(np.abs(_disc_fraction(mask, r) - direct)) < 1e-12
    # derived: at the corner of an all-True frame the disc keeps the lattice points with i, j >= 0,
    # sum_{i=0..r} (floor(sqrt(r^2 - i^2)) + 1), out of sum_{i=-r..r} (2 floor(sqrt(r^2 - i^2)) + 1).
    r = 7
    quarter = sum(math.isqrt(r * r - i * i) + 1 for i in range(r + 1))
    whole = sum(2 * math.isqrt(r * r - i * i) + 1 for i in range(-r, r + 1))
    assert _disc_fraction(np.ones((30, 30), bool), r)[0, 0] == quarter / whole


@pytest.mark.parametrize("gap", [3, 8])
def test_segment_states_draws_a_wall_across_a_bridged_gap(gap):
    # derived (docs/methods.md §5): at a pi slip the amplitude vanishes, so the ordered mask has a gap;
    # bridge_nm = r pixels closes gaps of up to 2r pixels and the wall is drawn in it, one
    # pixel per row; a wider gap stays open and no wall is drawn (two separate regions).
    px = 0.1
    n_rows, n_cols = 40, 60
    state = np.zeros((n_rows, n_cols), int)
    state[:, 30:] = 1
    ordered = np.ones((n_rows, n_cols), bool)
    ordered[:, 30 - gap // 2: 30 - gap // 2 + gap] = False
    seg = segment_states(state, np.ones((n_rows, n_cols)), ordered, pixel_size_nm=px, min_area_nm2=1.0,
                         confidence_threshold=0.5, bridge_nm=3 * px)
    assert seg.labels.max() == 2  # derived: two halves, two domains
    rows, cols = np.nonzero(seg.walls)
    if gap <= 6:
        assert sorted(rows.tolist()) == list(range(n_rows))  # derived: see above
        # derived: the seeds meet inside the bridged gap (or on its edge pixel)
        assert np.all((cols >= 30 - gap // 2 - 1) & (cols <= 30 - gap // 2 + gap))
    else:
        assert rows.size == 0  # derived: see above


def test_nearest_level_equals_brute_force_argmin():
    from domains.moire import _nearest_level

    rng = np.random.default_rng(5)
    levels = np.array([0.0, 0.2, -0.2, 0.4, 0.1, 0.35])
    # values on a 0.05 grid hit exact midpoints between levels: ties go to the lower index
    values = np.concatenate([np.round(rng.normal(0, 0.3, 4000) / 0.05) * 0.05, [np.inf]])
    brute = np.argmin(np.abs(values[:, None] - levels), axis=1)
    assert_array_equal(_nearest_level(values, levels), brute)  # reference: numpy argmin over all levels


def test_twist_domains_on_an_analytic_disc_and_an_unresolved_strip():
    from domains.moire import twist_domains

    # derived: a disc of twist 1.3 deg (radius 20 px) in a 1.0 deg background, and a strip of
    # 1.6 deg two pixels wide. Opening with a disc of radius resolution/2 = 4 px keeps the
    # large disc and removes the strip (narrower than 2 x 4 px), which becomes unassigned.
    n = 96
    y, x = np.mgrid[:n, :n]
    twist = np.where(np.hypot(y - 40, x - 50) <= 20, 1.3, 1.0)
    twist[85:87, 10:80] = 1.6
    dom = twist_domains(twist, pixel_size_nm=1.0, tolerance_deg=0.1, resolution_nm=8.0)
    means = sorted(round(d["twist_deg_mean"], 6) for d in dom.table)
    assert means == [1.0, 1.3]  # derived: two domains; the strip is gone
    assert not dom.core[85:87, 10:80].any()  # derived: the strip is narrower than the opening disc
    disc_row = next(d for d in dom.table if abs(d["twist_deg_mean"] - 1.3) < 1e-9)
    # derived: lattice points within radius 20 (Gauss circle count) = the digital disc's area;
    # a disc opened by a smaller disc is itself (digital pixels at the rim may go: one rim ring)
    lattice = sum(2 * math.isqrt(400 - i * i) + 1 for i in range(-20, 21))
    assert lattice - 2 * math.pi * 20 <= disc_row["area_nm2"] <= lattice
    # derived: the centroid of a disc is its centre
    assert abs(disc_row["centroid_x_nm"] - 50) < 0.5 and abs(disc_row["centroid_y_nm"] - 40) < 0.5
    assert disc_row["twist_deg_std"] < 1e-9  # derived: a uniform domain has no spread (float rounding)


def _vortex(shape, row0, col0, sign=1):
    # derived: exp(i * sign * atan2(y - y0, x - x0)) winds by sign counter-clockwise in (x, y)
    y, x = np.mgrid[: shape[0], : shape[1]].astype(float)
    return np.exp(1j * sign * np.arctan2(y - row0, x - col0))


def test_defect_needs_every_loop_pixel_ordered():
    from domains.segment import phase_defects

    field = _vortex((61, 61), 30.5, 30.5)
    ordered = np.ones((61, 61), bool)
    found = phase_defects(field, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0)
    assert [(d["winding"], d["row"], d["col"]) for d in found] == [(1, 30.5, 30.5)]  # derived: one +1 winding
    # derived: a disordered patch far from the loop (radius 2 sigma = 10) changes nothing ...
    far = ordered.copy()
    far[2:6, 2:6] = False
    assert len(phase_defects(field, pixel_size_nm=1.0, ordered=far, sigma_nm=5.0)) == 1
    # ... one crossing the loop rejects the winding (the rule: every loop pixel ordered)
    cut = ordered.copy()
    cut[28:33, 39:43] = False
    assert phase_defects(field, pixel_size_nm=1.0, ordered=cut, sigma_nm=5.0) == []
    # derived: a loop that leaves the frame cannot be tested: no defect
    assert phase_defects(field[:, 22:], pixel_size_nm=1.0, ordered=ordered[:, 22:], sigma_nm=5.0) == []


def test_defect_amplitude_threshold_and_sign():
    from domains.segment import phase_defects

    field = 0.3 * _vortex((61, 61), 30.5, 30.5, sign=-1)
    ordered = np.ones((61, 61), bool)
    # derived: |field| = 0.3 on the loop, so a threshold of 0.2 keeps it and 0.4 rejects it
    assert [d["winding"] for d in phase_defects(field, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0,
                                                amplitude_threshold=0.2)] == [-1]
    assert phase_defects(field, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0, amplitude_threshold=0.4) == []


def test_close_like_windings_are_one_unresolved_defect():
    from domains.segment import phase_defects

    shape = (81, 101)
    ordered = np.ones(shape, bool)
    # derived: two +1 cores 4 pixels apart sit inside one loop of radius 10: winding +2, at their midpoint
    close = _vortex(shape, 40.5, 48.5) * _vortex(shape, 40.5, 52.5)
    found = phase_defects(close, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0)
    assert [(d["winding"], d["row"], d["col"]) for d in found] == [(2, 40.5, 50.5)]
    # derived: a +1 and a -1 core 30 pixels apart are two defects, each at its core
    pair = _vortex(shape, 40.5, 35.5) * _vortex(shape, 40.5, 65.5, sign=-1)
    found = phase_defects(pair, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0)
    assert sorted((d["winding"], d["col"]) for d in found) == [(-1, 65.5), (1, 35.5)]


def _half_noise_scene(with_vortex, rng_seed=0):
    # A wave of amplitude 1 in the left half, none in the right half, white noise of std 1
    # everywhere; optionally a +1 phase winding in the left half.
    n, px, sigma_nm = (160, 240), 1.0, 6.0
    y, x = np.mgrid[: n[0], : n[1]].astype(float)
    q = np.array([1.1, 0.4])
    winding = np.arctan2(y - 80.3, x - 60.6) if with_vortex else 0.0
    core = np.tanh(np.hypot(y - 80.3, x - 60.6) / 3.0) if with_vortex else 1.0
    wave = np.where(x < 120, core * np.cos(q[0] * x + q[1] * y + winding), 0.0)
    image = wave + np.random.default_rng(rng_seed).normal(0, 1.0, n)
    import domains

    a = domains.lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=px)
    trusted = domains.trusted_mask(image.shape, sigma_nm=sigma_nm, pixel_size_nm=px)
    # derived: white noise of std s_n through a unit-sum Gaussian lock-in gives a Rayleigh |A|
    # of scale s = s_n / sqrt(8 pi sigma_px^2); |A| > s sqrt(2 ln 1e6) with probability 1e-6.
    scale = 1.0 / math.sqrt(8 * math.pi * (sigma_nm / px) ** 2)
    return a, trusted, scale * math.sqrt(2 * math.log(1e6)), sigma_nm, px


@pytest.mark.parametrize("with_vortex", [False, True])
def test_windings_of_noise_are_not_defects(with_vortex):
    from domains.segment import phase_defects

    a, trusted, threshold, sigma_nm, px = _half_noise_scene(with_vortex)
    # The noise half does wind (this is what the threshold must reject): without it,
    # loops of pure noise count (derived: lock-in noise phases wind at a density ~ 1 / sigma^2).
    loose = phase_defects(a, pixel_size_nm=px, ordered=trusted, sigma_nm=sigma_nm)
    assert len(loose) > 2  # derived: see above
    found = phase_defects(a, pixel_size_nm=px, ordered=trusted, sigma_nm=sigma_nm, amplitude_threshold=threshold)
    if not with_vortex:
        assert found == []  # derived: no winding in the scene where the order is significant
    else:
        assert [d["winding"] for d in found] == [1]  # derived: the one built-in winding
        # within the lock-in resolution sigma of the true core
        assert math.hypot(found[0]["x_nm"] - 60.6, found[0]["y_nm"] - 80.3) < sigma_nm


def _three_strips(w1_nm, w2_nm, sigma_nm, noise, seed=0):
    # derived (forward model, docs/methods.md §5): a Gaussian-smoothed step of width w seen through a
    # Gaussian lock-in of width sigma is, in the complex field, a step of width sqrt(w^2 + sigma^2)
    from scipy.special import erf

    px = 0.05
    y, x = np.mgrid[:60, :200] * px
    p = np.exp(2j * np.pi * np.arange(3) / 3)

    def step(x0, w):
        return 0.5 * (1 + erf((x - x0) / (math.sqrt(2) * math.hypot(w, sigma_nm))))

    field = p[0] + step(3.0, w1_nm) * (p[1] - p[0]) + step(7.0, w2_nm) * (p[2] - p[1])
    rng = np.random.default_rng(seed)
    field = field + noise * (rng.normal(size=field.shape) + 1j * rng.normal(size=field.shape))
    grown = np.where(x < 3.0, 1, np.where(x < 7.0, 2, 3))
    return field[None], grown, px


def test_unresolved_wall_has_an_upper_limit_and_no_width():
    from domains.measure import domain_summary, wall_table
    from domains.segment import thin_walls

    sigma = 0.5
    field, grown, px = _three_strips(0.1, 1.0, sigma, noise=0.05)
    rows = wall_table(grown, thin_walls(grown), pixel_size_nm=px, fields=field, sigma_nm=sigma)
    narrow, wide = sorted(rows, key=lambda r: r["domain_a"])
    # derived: w = 0.1 nm adds 0.01 nm to W = sqrt(w^2 + sigma^2), far below the noise-limited
    # error of W, so the wall is not resolved; its limit must cover the truth and stay below
    # sigma (a wall that narrow is seen as a step of width ~ sigma)
    assert not narrow["width_resolved"]  # derived: see above
    assert math.isnan(narrow["width_nm"]) and math.isnan(narrow["width_nm_err"])  # derived: no value, a limit
    assert 0.1 <= narrow["width_nm_upper_limit"] < sigma  # derived: see above
    # derived: w = 1.0 nm gives W = 1.118 nm, well above sigma: resolved. White noise of 0.05 over
    # the ~5000 pixels near the wall pins W to ~0.01 nm, so the sampling (a pixel) sets the tolerance
    assert wide["width_resolved"] and math.isnan(wide["width_nm_upper_limit"])  # derived: see above
    assert abs(wide["width_nm"] - 1.0) < px  # derived: see above
    summary = domain_summary([], rows)
    # derived: the headline width is the resolved wall's alone, the narrow one appears as its limit
    assert summary["wall_width_nm_mean"] == wide["width_nm"]  # derived: see above
    assert summary["wall_width_nm_mean_err"] == wide["width_nm_err"]  # derived: one wall, its own fit error
    assert summary["wall_width_nm_upper_limit"] == narrow["width_nm_upper_limit"]  # derived: see above
    assert (summary["wall_width_count_resolved"], summary["wall_width_count_unresolved"]) == (1, 1)  # derived


def test_twist_domain_opening_equals_scipy_binary_opening():
    from domains.moire import twist_domains

    rng = np.random.default_rng(2)
    for _ in range(20):
        n = int(rng.integers(20, 60))
        r = int(rng.integers(1, 5))
        region = ndimage.gaussian_filter(rng.random((n, n)), 2) > 0.5
        twist = np.where(region, 1.0, 2.0)
        dom = twist_domains(twist, pixel_size_nm=1.0, tolerance_deg=0.1, resolution_nm=2 * r, min_area_nm2=1e-9)
        ids = [row["id"] for row in dom.table if abs(row["twist_deg_mean"] - 1.0) < 1e-9]
        # reference library: scipy.ndimage.binary_opening by the same disc, border_value=0
        assert_array_equal(np.isin(dom.core, ids), ndimage.binary_opening(region, structure=_disc(r)))


def test_defects_per_component_significance():
    from domains.segment import phase_defects

    shape = (61, 61)
    # derived: component 0 winds with amplitude 1, component 1 winds with amplitude 0.01 (an
    # absent order's noise); a shared "ordered" mask cannot tell them apart ...
    fields = np.stack([_vortex(shape, 30.5, 30.5), 0.01 * _vortex(shape, 30.5, 30.5, sign=-1)])
    shared = np.ones(shape, bool)
    assert sorted(d["component"] for d in phase_defects(fields, pixel_size_nm=1.0, ordered=shared,
                                                        sigma_nm=5.0)) == [0, 1]
    # ... a per-component mask or an amplitude threshold between 0.01 and 1 keeps component 0 only
    per_component = np.stack([shared, np.zeros(shape, bool)])
    assert [d["component"] for d in phase_defects(fields, pixel_size_nm=1.0, ordered=per_component,
                                                  sigma_nm=5.0)] == [0]
    assert [d["component"] for d in phase_defects(fields, pixel_size_nm=1.0, ordered=shared, sigma_nm=5.0,
                                                  amplitude_threshold=0.1)] == [0]


def test_defect_optional_ordered_fraction_rule():
    from domains.segment import phase_defects

    field = _vortex((61, 61), 30.5, 30.5)
    ordered = np.ones((61, 61), bool)
    y, x = np.mgrid[:61, :61]
    ordered[np.hypot(y - 30.5, x - 30.5) < 4] = False  # an unordered core well inside the loop (radius 10)
    # derived: the core removes the 52 pixels closer than 4 to the plaquette centre (counted on
    # the lattice), all inside the disc of radius 10 (317 lattice points) around the plaquette's
    # corner pixels: an ordered fraction of 1 - 52/317 = 0.836
    assert ((~ordered).sum(), int((np.hypot(*np.mgrid[-10:11, -10:11]) <= 10).sum())) == (52, 317)  # derived
    kept = phase_defects(field, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0, min_ordered_fraction=0.8)
    dropped = phase_defects(field, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0, min_ordered_fraction=0.85)
    assert (len(kept), len(dropped)) == (1, 0)  # derived: see above
    # derived: without the extra rule only the loop matters, and the loop is ordered
    assert len(phase_defects(field, pixel_size_nm=1.0, ordered=ordered, sigma_nm=5.0)) == 1


@pytest.mark.parametrize("seed", range(3))
def test_distance_threshold_equals_scipy_edt(seed):
    # reference library: scipy.ndimage.distance_transform_edt, thresholded; the blockwise version
    # must give the same pixels, with square and with non-square pixels
    from domains.segment import _distance_compare

    rng = np.random.default_rng(seed)
    mask = rng.random((301, 77)) < 0.97
    for sampling in (None, (0.13, 0.07)):
        reference = ndimage.distance_transform_edt(mask, sampling=sampling)
        for radius in (1.0, 2.5, 0.3 if sampling else 4.0):
            assert_array_equal(_distance_compare(mask, radius, sampling=sampling), reference <= radius)
            assert_array_equal(_distance_compare(mask, radius, greater=True, sampling=sampling), reference > radius)
