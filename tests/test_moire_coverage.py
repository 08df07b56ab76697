"""Calibrated errors of the moiré's twist, heterostrain, heterostrain axis and period: coverage over noise realisations.

An error bar is tested by what it promises: over independent noise realisations of one scene
the truth lies within two reported standard errors in about 95 % of them (95.45 % for a normal
error; derived). The issue asks for 90-99 %: below, the errors are too small; above, too large.

Scenes come from ``domains.synth.twisted_bilayer``, which renders the two layers' lattices
(phases of the layers' own Bragg vectors) and adds white noise; nothing of the analysis is used
to make the image. The truth is the scene's input (twist, heterostrain, its axis) and, for the
period, the moiré wavevectors computed here with numpy from their definition k_j = G1_j - G2_j,
G2 = T^-T G1, T = R(theta)(I + E), E = R(phi) diag(eps, -nu eps) R(phi)^T (K. Hermann,
J. Phys.: Condens. Matter 24, 314210 (2012); A. Kerelsky et al., Nature 572, 95 (2019)).
"""

import numpy as np
import pytest

from domains.moire import moire_fields, moire_maps, twist_domains
from domains.synth.moire import twisted_bilayer

A_NM = 0.246  # lattice constant of the invented layers (graphene's, from memory)
NU = 0.16  # Poisson ratio used by the scene and the analysis (graphene, Kerelsky et al. 2019)


def _rot(angle_rad):
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.array([[c, -s], [s, c]])


def analytic_period_nm(theta_deg, eps_percent, axis_deg):
    """Mean of the three moiré wavelengths from the analytic wavevectors (derived, independent of the code).

    The scene's layer 1 is the hexagonal lattice a1 = a(1, 0), a2 = a(1/2, sqrt 3/2) turned by
    -theta/2; layer 2 = T layer 1. Real-space moiré vectors L_i obey L_i . k_j = 2 pi delta_ij;
    the three distances between neighbouring maxima are |L1|, |L2| and the shorter of |L1 +- L2|.
    """
    basis = A_NM * np.array([[1.0, 0.0], [0.5, np.sqrt(3) / 2]])
    b = 2 * np.pi * np.linalg.inv(basis).T  # rows: reciprocal vectors
    g1 = (_rot(-np.radians(theta_deg) / 2) @ b.T).T
    eps = eps_percent / 100
    r = _rot(np.radians(axis_deg))
    t = _rot(np.radians(theta_deg)) @ (np.eye(2) + r @ np.diag([eps, -NU * eps]) @ r.T)
    g2 = (np.linalg.inv(t).T @ g1.T).T
    k = g1 - g2
    moire_vectors = 2 * np.pi * np.linalg.inv(k).T  # rows L1, L2
    l1, l2 = moire_vectors
    lengths = [np.hypot(*l1), np.hypot(*l2), min(np.hypot(*(l1 - l2)), np.hypot(*(l1 + l2)))]
    return float(np.mean(lengths))


def test_analytic_period_reduces_to_hermann():
    # Hermann (2012): without heterostrain lambda = a / (2 sin(theta / 2)), 12.814 nm at 1.1 deg (docs/methods.md §4)
    assert abs(analytic_period_nm(1.1, 0.0, 0.0) - 12.814) < 1e-3


def _coverage(values, errors, truth, *, axial=False):
    values, errors = np.asarray(values, float), np.asarray(errors, float)
    diff = values - truth
    if axial:
        diff = (diff + 90) % 180 - 90  # an axis is known modulo 180 deg
    return float(np.mean(np.abs(diff) <= 2 * errors))


@pytest.mark.slow
def test_frame_errors_cover_the_truth_over_100_noise_realisations():
    # One small scene (64 x 64 nm, 1.5 deg, 0.3 % heterostrain along 25 deg, noise of the image's own
    # standard deviation), 100 realisations; the wavevectors are found by the code each time, as a
    # user's run would. 100 rather than 20: with 20 the 99 % bound would need a miss in every run.
    theta, eps, axis = 1.5, 0.3, 25.0
    period = analytic_period_nm(theta, eps, axis)
    found = {"twist_deg": [], "heterostrain_percent": [], "heterostrain_angle_deg": [], "period_nm": []}
    errors = {key: [] for key in found}
    for seed in range(100):
        image, _ = twisted_bilayer(shape=(128, 128), pixel_size_nm=0.5, a_nm=A_NM, theta_deg=theta,
                                   heterostrain_percent=eps, heterostrain_angle_deg=axis, noise=1.0, rng=seed)
        summary = moire_maps(image, pixel_size_nm=0.5, a_nm=A_NM).summary
        for key in found:
            found[key].append(summary[key])
            errors[key].append(summary[f"{key}_err"])
    truth = {"twist_deg": theta, "heterostrain_percent": eps, "heterostrain_angle_deg": axis, "period_nm": period}
    for key in found:
        frac = _coverage(found[key], errors[key], truth[key], axial=key == "heterostrain_angle_deg")
        assert 0.90 <= frac <= 0.99, (key, frac)  # issue 12: truth within 2 sigma in 90-99 % (95.45 % derived)


@pytest.mark.slow
def test_per_domain_errors_cover_the_truth_in_a_two_twist_scene():
    # Two twist bands (1.05 and 1.30 deg, 0.1 % heterostrain along 20 deg) in a 96 x 96 nm frame,
    # 40 noise realisations: each twist domain's own twist and heterostrain, fitted 2 sigma from the
    # wall, and its period, against its band's truth. 80 domain values; 90-99 % within 2 sigma (issue 12).
    regions, eps = (1.05, 1.30), 0.1
    z_twist, z_eps, z_period, counts = [], [], [], []
    for seed in range(40):
        image, truth = twisted_bilayer(shape=(320, 320), pixel_size_nm=0.3, a_nm=A_NM, regions=list(regions),
                                       heterostrain_percent=eps, heterostrain_angle_deg=20.0, noise=0.5,
                                       rng=100 + seed)
        maps = moire_maps(image, pixel_size_nm=0.3, a_nm=A_NM)
        dom = twist_domains(maps.twist_deg, pixel_size_nm=0.3, twist_err_deg=maps.twist_deg_err,
                            resolution_nm=maps.sigma_nm, trusted=maps.trusted)
        fields = moire_fields(maps, dom)
        counts.append(len(fields.table))
        for row in fields.table:
            band = truth["regions"][int(row["centroid_y_nm"] / 0.3), int(row["centroid_x_nm"] / 0.3)]
            z_twist.append((row["twist_deg"] - regions[band - 1]) / row["twist_deg_err"])
            z_eps.append((row["heterostrain_percent"] - eps) / row["heterostrain_percent_err"])
            # the band's period from the analytic wavevectors (derived above, independent of the code)
            period = analytic_period_nm(regions[band - 1], eps, 20.0)
            z_period.append((row["period_nm"] - period) / row["period_nm_err"])
    assert counts == [2] * 40  # the scene's two bands, every time
    for z in (z_twist, z_eps, z_period):
        frac = float(np.mean(np.abs(z) <= 2))
        assert 0.90 <= frac <= 0.99, frac  # issue 12: 90-99 % (95.45 % for a calibrated normal error, derived)
