"""Coverage of the reported errors not covered elsewhere: the frame-mean detuning of a commensurate order
and the domain block's median area, interior-only mean area and mean wall width.

An error bar is tested by what it promises: over independent realisations the truth lies within two
reported standard errors in about 95 % of them (95.45 % for a calibrated normal error; derived); issue
12 asks for 90-99 %.
"""

import math

import numpy as np
import pytest
from scipy import stats

from domains import fourier, measure
from domains._read_order import find_lattice, read_order
from domains.pipeline import _refine_lattice
from domains.synth import cdw_scene

LOW, HIGH = 0.90, 0.99
DETUNING_REALISATIONS = 30


@pytest.mark.slow
def test_mean_detuning_error_covers_zero_in_a_single_commensurate_domain():
    # One 3x3 domain (cdw_scene with n_domains=1: psi_j = exp(i phi_j) everywhere, the scene's
    # construction) seen through the scene's smooth drift and white noise, 30 draws of drift and noise:
    # the frame-mean wavevector is the commensurate one, a detuning of zero (derived: no phase slip; the
    # drift's phase is cancelled by the lattice's, Lawler et al. 2010). The chain is the pipeline's:
    # peaks, lattice and its lock-in refinement, read_order.
    z = []
    for seed in range(DETUNING_REALISATIONS):
        scene = cdw_scene(shape=(192, 192), n_domains=1, noise_nm=0.008, biases_V=(), rng=900 + seed)
        image = np.asarray(scene.topography.data, float)
        pixel = tuple(scene.topography.pixel_size_nm)
        peaks = fourier.find_peaks(image, pixel_size_nm=pixel, max_peaks=60)
        reading = _refine_lattice(image, pixel, None, find_lattice(peaks, shape=image.shape, pixel_size_nm=pixel),
                                  peaks)
        result = read_order(image, pixel_size_nm=pixel, lattice_reading=reading, peaks=peaks)
        family = result.families[0]
        assert family.name == "3x3"  # the scene's order
        detuning = np.asarray(family.mean_detuning_rad_per_nm)
        err = np.asarray(family.mean_detuning_err_rad_per_nm)
        # A member added by the orbit's symmetry is not measured: no detuning, no error (never another
        # member's mean, which differs from it by sqrt(3) |Q|)
        assert np.array_equal(np.isnan(detuning).any(axis=1), np.isnan(err))
        assert np.isfinite(err).sum() >= 2
        z.extend((detuning[np.isfinite(err)] / err[np.isfinite(err), None]).ravel())
    z = np.asarray(z)
    # about 170 values, per Cartesian component: for calibrated normal errors 7.7 +- 2.7 outside 2 sigma
    # (binomial, derived), 90-99 % holds with probability 0.99; errors three times too large (the count of
    # sigma-patches this replaced, coverage 100 %, z spread 0.31, measured) fail
    assert LOW <= float(np.mean(np.abs(z) < 2)) <= HIGH


REALISATIONS = 200
N_DOMAINS = (4, 6, 10)


def _gamma_frames(n, rng):
    # A frame's domains as a sample of the material's: gamma-distributed areas, shape 4 and mean 30 nm^2
    # (close to random Voronoi cells, shape ~3.6; from memory); each domain touches the frame with
    # probability 0.4, independently of its area.
    areas = rng.gamma(4.0, 7.5, n)
    touches = rng.random(n) < 0.4
    return [{"area_nm2": a, "touches_edge": bool(t)} for a, t in zip(areas, touches)]


@pytest.mark.slow
@pytest.mark.parametrize("n", N_DOMAINS)
def test_median_and_interior_mean_area_errors_cover_the_material(n):
    rng = np.random.default_rng(50 + n)
    median_truth = stats.gamma(4.0, scale=7.5).median()  # scipy.stats (reference library)
    covered_median, covered_interior = [], []
    for _ in range(REALISATIONS):
        s = measure.domain_summary(_gamma_frames(n, rng), [])
        covered_median.append(abs(s["area_nm2_median"] - median_truth) < 2 * s["area_nm2_median_err"])
        if np.isfinite(s["area_nm2_mean_interior_err"]):  # two interior domains at least
            covered_interior.append(abs(s["area_nm2_mean_interior"] - 30.0) < 2 * s["area_nm2_mean_interior_err"])
    # 200 frames: binomial sd of a 95 % coverage 1.5 %; the window is 3 of those (derived)
    assert LOW <= np.mean(covered_median) <= HIGH
    assert len(covered_interior) >= 0.5 * REALISATIONS
    assert LOW <= np.mean(covered_interior) <= HIGH


@pytest.mark.slow
@pytest.mark.parametrize("material_spread_nm", [0.0, 0.05])
def test_mean_wall_width_error_covers_the_truth(material_spread_nm):
    # n resolved walls of one true width w = 0.5 nm (or of widths spread by 0.05 nm about it, a material
    # whose walls differ), each measured with its own calibrated fit error e_i (0.02-0.1 nm; their
    # coverage: test_errors_coverage.py): the reported mean width must hold w within 2 errors.
    rng = np.random.default_rng(77)
    covered = []
    for _ in range(REALISATIONS):
        for n in (3, 8):
            e = rng.uniform(0.02, 0.1, n)
            walls = [{"length_nm": 3.0, "width_nm": 0.5 + rng.normal(0, material_spread_nm) + rng.normal(0, ei),
                      "width_nm_err": ei, "width_resolved": True, "width_nm_upper_limit": math.nan} for ei in e]
            s = measure.domain_summary([{"area_nm2": 10.0, "touches_edge": False}], walls)
            covered.append(abs(s["wall_width_nm_mean"] - 0.5) < 2 * s["wall_width_nm_mean_err"])
    # 400 means: binomial sd 1.1 % around 95 % (derived)
    assert LOW <= np.mean(covered) <= HIGH
