"""Coverage of the reported 1 sigma errors: over noise realisations of one scene whose truth is analytic,
the truth lies within 2 reported sigma in 90-99 % of them (docs/methods.md §10).

The scene is built here with numpy: a hexagonal lattice (a = 0.34 nm, a1 at 4 degrees) and a
commensurate 3x3 CDW, Q_j = G_j / 3, in two translational variants, (0, 0) and (1, 0), whose phases
-2 pi (m1, m2, -m1 - m2) / 3 (docs/methods.md §5) change across a straight wall tilted 17 degrees from
the y axis; the wall is a step smoothed by a Gaussian of intrinsic width w. White noise is added; each
realisation redraws the noise only. The truth is: a, the angle, Q_j, w and the phase jumps, all from
the construction, none from the code under test.

The chain is the pipeline's, called step by step on 128 x 128 pixels: peaks, lattice and its lock-in
refinement, the order step (told the superlattice is 3x3: the classification is tested elsewhere,
here its errors are), then the order's lock-in on the decimated grid at the step the pipeline takes
for large frames (sigma / 2), the variant map, the segmentation and the wall table.

Why 90-99 % over 100 realisations (derived): for calibrated Gaussian errors P(|z| < 2) = 0.954; the
count of misses out of 100 is binomial with mean 4.6 and standard deviation 2.1, so an estimator
whose errors are right passes with probability about 0.99, while errors 30 % too small (0.87) or
too large (0.997) fail.
"""

import math

import numpy as np
import pytest
from scipy.special import erf

from domains import fourier, lockin, measure, order, segment, trusted_mask
from domains._grid import Grid
from domains._lattice import bragg_vectors
from domains._read_order import find_lattice, read_order
from domains.pipeline import Config, _choose_sigma, _headline, _refine_lattice

PX = 0.05  # nm per pixel
N_PIX = 128
A_NM, ANGLE_DEG = 0.34, 4.0
VARIANTS = ((0, 0), (1, 0))
TILT_DEG = 17.0
REALISATIONS = 100
LOW, HIGH = 0.90, 0.99


def _variant_phases(m1, m2):
    # derived (docs/methods.md §5): translating a 3x3 CDW by m1 a1 + m2 a2 shifts phi_j by -2 pi n_j / 3
    return -2 * np.pi * np.array([m1, m2, -m1 - m2]) / 3


def _scene(rng, *, w_nm, noise, lattice_amp=1.0, cdw_amp=1.0):
    """Image and the signed distance (nm) to the true wall line, positive on the (1, 0) side."""
    y, x = np.mgrid[:N_PIX, :N_PIX] * PX
    g = bragg_vectors("hexagonal", A_NM, ANGLE_DEG)
    c, s = math.cos(math.radians(TILT_DEG)), math.sin(math.radians(TILT_DEG))
    d = (x - N_PIX * PX / 2) * c - (y - N_PIX * PX / 2) * s
    step = 0.5 * (1 + erf(d / (math.sqrt(2) * w_nm)))  # Gaussian-smoothed step of width w
    ph0, ph1 = (_variant_phases(*v) for v in VARIANTS)
    image = lattice_amp * sum(np.cos(gj[0] * x + gj[1] * y) for gj in g)
    for j, q in enumerate(g / 3):
        psi = (1 - step) * np.exp(1j * ph0[j]) + step * np.exp(1j * ph1[j])
        image = image + cdw_amp * np.real(psi * np.exp(1j * (q[0] * x + q[1] * y)))
    return image + rng.normal(0, noise, image.shape), d


def _walls(image, order_q, coefficients, bragg, sigma_nm):
    """The pipeline's wall chain on the decimated grid (step sigma / 2, as for frames of 384 px and more)."""
    step = int(sigma_nm / PX // 2)
    grid = Grid(image.shape, (PX, PX), step)
    pc = grid.coarse_pixel_nm
    a = lockin(image, order_q, sigma_nm=sigma_nm, pixel_size_nm=PX, step=step)
    trusted = grid.sample(trusted_mask(image.shape, sigma_nm=sigma_nm, pixel_size_nm=PX))
    floor = order.noise_floor(image, order_q, sigma_nm=sigma_nm, pixel_size_nm=PX, avoid_q=bragg, trusted=trusted,
                              step=step)
    state = order.family_order(a, [list(range(len(order_q)))], coefficients=coefficients, threshold=floor.threshold,
                               trusted=trusted)
    seg = segment.segment_states(state.state, state.score, state.ordered, pixel_size_nm=pc,
                                 min_area_nm2=math.pi * (2 * sigma_nm) ** 2,
                                 confidence_threshold=order.variant_confidence(coefficients), trusted=trusted,
                                 bridge_nm=2 * sigma_nm)
    rows = measure.wall_table(seg.grown, seg.walls, pixel_size_nm=pc, fields=state.fields, sigma_nm=sigma_nm,
                              trusted=trusted)
    return rows, seg, grid


def _phase_jump_truth(row, seg, grid, d, order_q):
    """True jump arg(Q_j P_j*) per reported component, from domain_a to domain_b."""
    g = bragg_vectors("hexagonal", A_NM, ANGLE_DEG) / 3
    jump = _variant_phases(*VARIANTS[1]) - _variant_phases(*VARIANTS[0])
    a_on_first_side = np.mean(grid.sample(d)[seg.labels == row["domain_a"]] < 0) > 0.5
    truth = []
    for q in order_q:
        j = int(np.argmin([min(np.hypot(*(q - t)), np.hypot(*(q + t))) for t in g]))
        sign = 1 if np.hypot(*(q - g[j])) < np.hypot(*(q + g[j])) else -1  # the wave at -Q has the opposite phase
        truth.append(sign * jump[j] * (1 if a_on_first_side else -1))
    return np.degrees(np.asarray(truth))


def _wrap_deg(x):
    return (np.asarray(x) + 180.0) % 360.0 - 180.0


def _numbers(text):
    return np.array([float(v) for v in text.split(";")])


@pytest.fixture(scope="module")
def realisations():
    """z = (value - truth) / reported error for every quantity, over REALISATIONS noise draws."""
    w_nm = 0.45
    g_true = bragg_vectors("hexagonal", A_NM, ANGLE_DEG)
    out = {"a": [], "angle": [], "q": [], "width": [], "resolved": [], "phase_jump": [], "q_err": []}
    for seed in range(REALISATIONS):
        image, d = _scene(np.random.default_rng(seed), w_nm=w_nm, noise=0.5)
        peaks = fourier.find_peaks(image, pixel_size_nm=PX, max_peaks=60)
        reading = find_lattice(peaks, shape=image.shape, pixel_size_nm=(PX, PX))
        reading = _refine_lattice(image, (PX, PX), None, reading, peaks)
        lat = reading.lattice
        out["a"].append((lat.a_nm - A_NM) / lat.a_err_nm)
        out["angle"].append(((lat.angle_deg - ANGLE_DEG + 30) % 60 - 30) / lat.angle_err_deg)
        result = read_order(image, pixel_size_nm=(PX, PX), lattice_reading=reading, peaks=peaks,
                            given_superlattice="3x3")
        family = result.families[0]
        for q, err in zip(family.q_rad_per_nm, family.q_err_rad_per_nm):
            truth = min(np.vstack([g_true, -g_true]) / 3, key=lambda t: np.hypot(*(t - q)))
            out["q"].append((q - truth) / err)
            out["q_err"].append(err)
        sigma_nm, _ = _choose_sigma(Config(), result.order_q, np.asarray(lat.bragg), None, image.shape, (PX, PX))
        rows, seg, grid = _walls(image, result.order_q, np.asarray(result.coefficients, float), lat.bragg, sigma_nm)
        assert len(rows) == 1  # the scene has one wall
        row = rows[0]
        out["resolved"].append(row["width_resolved"])
        if row["width_resolved"]:
            out["width"].append((row["width_nm"] - w_nm) / row["width_nm_err"])
        truth = _phase_jump_truth(row, seg, grid, d, result.order_q)
        out["phase_jump"].append(_wrap_deg(_numbers(row["phase_jump_deg"]) - truth) / _numbers(row["phase_jump_deg_err"]))
    return {k: np.asarray(v) for k, v in out.items()}


def _coverage(z):
    return float(np.mean(np.abs(np.asarray(z, float)) < 2))


@pytest.mark.slow
def test_lattice_constant_error_covers_the_truth(realisations):
    # derived: a from the Bragg vectors measured by lock-in phase planes; coverage window: module docstring
    assert LOW <= _coverage(realisations["a"]) <= HIGH


@pytest.mark.slow
def test_lattice_angle_error_covers_the_truth(realisations):
    # derived: the orientation of a1 (mod 60 degrees) from the same fit; coverage window: module docstring
    assert LOW <= _coverage(realisations["angle"]) <= HIGH


@pytest.mark.slow
def test_lattice_errors_include_a_drift_that_varies_over_the_frame():
    # The lattice seen through a smooth scan drift u(r) (domains.synth's drift model: long-wavelength
    # sinusoids plus a slow-axis creep, its truth the material's a and angle): the frame shows a
    # distorted lattice whose mean distortion no phase noise accounts for. Here the drift and the
    # noise are redrawn each time; the error must still cover the material's lattice.
    from domains.synth.cdw import smooth_drift

    g = bragg_vectors("hexagonal", A_NM, ANGLE_DEG)
    y, x = np.mgrid[:N_PIX, :N_PIX] * PX
    z_a, z_angle = [], []
    for seed in range(50):
        rng = np.random.default_rng(2000 + seed)
        u = smooth_drift((N_PIX, N_PIX), (PX, PX), 0.03, rng)  # up to 0.03 nm, a tenth of a
        image = sum(np.cos(gj[0] * (x + u[0]) + gj[1] * (y + u[1])) for gj in g) + rng.normal(0, 0.5, x.shape)
        peaks = fourier.find_peaks(image, pixel_size_nm=PX, max_peaks=60)
        reading = _refine_lattice(image, (PX, PX), None, find_lattice(peaks, shape=image.shape,
                                                                       pixel_size_nm=(PX, PX)), peaks)
        lat = reading.lattice
        z_a.append((lat.a_nm - A_NM) / lat.a_err_nm)
        z_angle.append(((lat.angle_deg - ANGLE_DEG + 30) % 60 - 30) / lat.angle_err_deg)
    # coverage window of the module docstring (50 draws: one miss more or less moves it by 2 %)
    assert LOW <= _coverage(z_a) <= HIGH
    assert LOW <= _coverage(z_angle) <= HIGH


@pytest.mark.slow
def test_commensurate_wavevector_error_is_the_lattice_error_propagated(realisations):
    z = realisations["q"]  # (3 per realisation, 2 Cartesian components), each against Q_j = G_j / 3
    # derived: a commensurate Q is exact in lattice units, its error is the basis's, nonzero
    assert np.all(realisations["q_err"] > 0)
    # coverage window: module docstring, per Cartesian component (the error is quoted per component)
    assert LOW <= _coverage(z[:, 0]) <= HIGH
    assert LOW <= _coverage(z[:, 1]) <= HIGH


IC_REALISATIONS = 30
IC_N_PIX, IC_NOISE_NM = 256, 0.03


@pytest.fixture(scope="module")
def incommensurate():
    """z = (q - truth) / q_err per Cartesian component of an incommensurate CDW's wavevectors, with the
    errors and the Cramér–Rao bound of each, over IC_REALISATIONS noise draws of one scene.

    The scene (domains.synth.incommensurate_cdw_scene, uniform: cos(q_j . r + phi_j) with
    q_j = (1 - delta) G_j / 3, delta = 0.05, its truth built by numpy from the parameters) gets white
    noise only. The chain is the pipeline's: peaks, lattice and its lock-in refinement, read_order.
    """
    from domains.synth import incommensurate_cdw_scene
    from domains.synth.real import Conditions

    out = {"z": [], "err": [], "crb": []}
    for seed in range(IC_REALISATIONS):
        scene = incommensurate_cdw_scene(shape=(IC_N_PIX, IC_N_PIX), delta=0.05, rng=seed,
                                         conditions=Conditions(white_noise_nm=IC_NOISE_NM))
        image = np.asarray(scene.topography.data, float)
        pixel = tuple(scene.topography.pixel_size_nm)
        truth = np.array(scene.truth["q_cdw_rad_per_nm"])
        peaks = fourier.find_peaks(image, pixel_size_nm=pixel, max_peaks=60)
        reading = _refine_lattice(image, pixel, None, find_lattice(peaks, shape=image.shape, pixel_size_nm=pixel),
                                  peaks)
        result = read_order(image, pixel_size_nm=pixel, lattice_reading=reading, peaks=peaks)
        assert result.kind == "incommensurate"  # delta = 0.05 is 5 % off 3x3: far beyond the errors
        # Cramér–Rao bound of one real tone A cos(q.r + phi) in white noise s per pixel, per component:
        # var(q_x) >= 2 s^2 / (A^2 sum (x - <x>)^2) over the pixels (Rife & Boorstyn, IEEE Trans. Inf.
        # Theory 20, 591 (1974), in two dimensions; derived), A = cdw_nm of the scene's truth.
        x = np.arange(IC_N_PIX) * pixel[1]
        spread = IC_N_PIX * np.sum((x - x.mean()) ** 2)
        crb = math.sqrt(2 * IC_NOISE_NM**2 / (scene.truth["cdw_nm"] ** 2 * spread))
        for family in result.families:
            for q, err in zip(family.q_rad_per_nm, family.q_err_rad_per_nm):
                t = min(np.vstack([truth, -truth]), key=lambda v: np.hypot(*(v - q)))
                out["z"].append((q - t) / err)
                out["err"].append(err)
                out["crb"].append(crb)
    return {k: np.asarray(v) for k, v in out.items()}


@pytest.mark.slow
def test_incommensurate_wavevector_error_covers_the_truth(incommensurate):
    z = incommensurate["z"]  # (3 per realisation, 2 Cartesian components)
    assert len(z) == 3 * IC_REALISATIONS  # the three wavevectors of the triple-q wave in every draw
    # 180 values: for calibrated Gaussian errors 8.2 +- 2.8 fall outside 2 sigma, so 90-99 % holds with
    # probability > 0.99, and errors 1.3x too small (88 %) fail (derived); errors 1.3x too large cover
    # 99.1 %, which this count catches only half the time, so:
    assert LOW <= _coverage(z) <= HIGH
    # the spread of z is one: its standard deviation over 180 values is known to 1/sqrt(360) = 5 %,
    # so 0.8-1.2 is four of those (derived); errors 1.3x too large (z spread 0.77) fail, as did the
    # count of independent sigma-patches this replaced (z spread 0.65-0.75, measured)
    assert 0.8 <= float(np.std(z)) <= 1.2
    # per component (90 values: 7.5 %, so 0.8-1.25 is three of those; derived): no axis is off alone
    assert 0.8 <= float(np.std(z[:, 0])) <= 1.25 and 0.8 <= float(np.std(z[:, 1])) <= 1.25


@pytest.mark.slow
def test_incommensurate_wavevector_error_is_not_below_the_cramer_rao_bound(incommensurate):
    # No unbiased estimator beats the Cramér–Rao bound of a tone (Rife & Boorstyn 1974; see the
    # fixture): an error below it claims information the image does not hold. The lock-in's
    # phase-gradient estimate uses only the ordered region and is not efficient: above the bound.
    assert np.all(incommensurate["err"] >= incommensurate["crb"])
    # the measured scatter obeys the bound too (a check of the scene's truth, not of the code)
    assert float(np.std(incommensurate["z"] * incommensurate["err"][:, None])) >= incommensurate["crb"][0]


@pytest.mark.slow
def test_wall_width_error_covers_the_truth_on_the_decimated_grid(realisations):
    # derived: w = 0.45 nm seen through sigma ~ 0.43 nm is W = sqrt(w^2 + sigma^2) = 1.45 sigma, far
    # above sigma at this noise: resolved in (nearly) every realisation
    assert np.mean(realisations["resolved"]) >= 0.95
    assert LOW <= _coverage(realisations["width"]) <= HIGH  # coverage window: module docstring


@pytest.mark.slow
def test_wall_phase_jump_errors_cover_the_truth(realisations):
    z = realisations["phase_jump"]  # (realisation, component); true jumps -120, 0, +120 deg (derived above)
    # coverage window of the module docstring, over the three components together
    assert LOW <= _coverage(z) <= HIGH
    # and in each: the component that does not jump carries, near a sharp wall, the others' steps
    # leaking into its band (a misfit its residuals count as noise): its error may only err high
    for j in range(z.shape[1]):
        assert _coverage(z[:, j]) >= LOW


@pytest.mark.slow
def test_unresolved_wall_is_reported_by_an_upper_limit_that_covers_the_truth():
    # A narrow wall: w = 0.1 nm against sigma ~ 0.43 nm gives W = 1.03 sigma, a broadening of the
    # order of its own error (derived), so the fit often cannot tell it from a sharp step.
    w_nm = 0.1
    g = bragg_vectors("hexagonal", A_NM, ANGLE_DEG)
    coefficients = np.array([[1, 0], [0, 1], [-1, -1]]) / 3  # derived: Q_j = G_j / 3 in the basis (G1, G2)
    covered, unresolved = [], 0
    for seed in range(REALISATIONS):
        image, d = _scene(np.random.default_rng(1000 + seed), w_nm=w_nm, noise=0.5)
        sigma_nm, _ = _choose_sigma(Config(), g / 3, g, None, image.shape, (PX, PX))
        rows, _, _ = _walls(image, g / 3, coefficients, g, sigma_nm)
        assert len(rows) == 1  # the scene has one wall
        row = rows[0]
        if row["width_resolved"]:
            assert math.isnan(row["width_nm_upper_limit"])  # a value with its error, no limit
            covered.append(abs(row["width_nm"] - w_nm) < 2 * row["width_nm_err"])
        else:
            unresolved += 1
            assert math.isnan(row["width_nm"]) and math.isnan(row["width_nm_err"])  # a limit, no value
            # derived: the limit sqrt((W + 2 dW)^2 - sigma^2) is below w only when W falls 2 dW low
            covered.append(w_nm <= row["width_nm_upper_limit"])
    assert unresolved >= REALISATIONS // 4  # the scene is built near the resolution, see above
    # what is printed (value +- 2 errors, or [0, limit]) holds the truth: coverage window of the docstring
    assert LOW <= np.mean(covered) <= HIGH


@pytest.mark.slow
def test_mean_domain_area_error_covers_the_material_mean():
    # The error of the mean area treats the frame's domains as a sample of the material's: each draw
    # is one frame of six domains whose areas are gamma-distributed with shape 4 and mean 30 nm^2 (close
    # to the areas of random Voronoi cells, shape ~3.6; from memory), the truth the distribution's mean.
    rng = np.random.default_rng(5)
    covered = []
    for _ in range(REALISATIONS):
        rows = [{"area_nm2": a, "touches_edge": False} for a in rng.gamma(4.0, 7.5, 6)]
        s = measure.domain_summary(rows, [])
        covered.append(abs(s["area_nm2_mean"] - 30.0) < 2 * s["area_nm2_mean_err"])
    assert LOW <= np.mean(covered) <= HIGH  # coverage window: module docstring


def test_headline_gives_an_upper_limit_when_no_wall_is_resolved():
    # The numbers a reader sees first: with every wall unresolved there is no width, only a limit.
    nan = float("nan")
    walls = [{"length_nm": 5.0, "width_nm": nan, "width_nm_err": nan, "width_nm_upper_limit": 0.31,
              "width_resolved": False},
             {"length_nm": 3.0, "width_nm": nan, "width_nm_err": nan, "width_nm_upper_limit": 0.27,
              "width_resolved": False}]
    domains = measure.domain_summary([{"area_nm2": 10.0, "touches_edge": False}], walls)
    summary = {"input": {"source": "<scene>", "shape": [8, 8], "pixel_size_nm": [0.05, 0.05]},
               "lattice": None, "order_kind": "commensurate", "superlattice": {"order": "3x3"},
               "domains": domains, "sigma_nm": 0.43}
    text = _headline(summary)["walls"]
    assert "±" not in text  # derived: no resolved width, so no value with an error bar
    assert "below 0.31 nm" in text  # derived: the largest per-wall limit bounds every unresolved wall
    resolved = walls + [{"length_nm": 4.0, "width_nm": 0.6, "width_nm_err": 0.05, "width_nm_upper_limit": nan,
                         "width_resolved": True}]
    summary["domains"] = measure.domain_summary([{"area_nm2": 10.0, "touches_edge": False}], resolved)
    text = _headline(summary)["walls"]
    # derived: one resolved wall gives its own width and fit error; the two others stay a limit
    # (the value to the last digit of the error's two significant ones)
    assert "0.600 ± 0.050 nm (1 resolved)" in text and "below 0.31 nm" in text
