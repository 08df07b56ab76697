"""Geometric phase analysis on rendered lattice images with analytically known displacement fields."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from domains import InputError
from domains.strain import displacement_from_phases, distortion, gpa, gpa_phases, strain_rotation

A_NM = 0.246  # an invented hexagonal lattice constant (nm), also used by the moiré tests
N, DX = 192, 0.05  # 9.6 nm frame; Nyquist 62.8 rad/nm against |G| = 29.5 rad/nm
SIGMA = 0.8  # nm: sigma |G| = 24, leakage of other Bragg peaks and DC is negligible


def hex_q(a_nm=A_NM, angle_deg=0.0):
    """Bragg triplet of a hexagonal lattice (rad/nm), first vector along angle_deg."""
    g = 4 * np.pi / (np.sqrt(3) * a_nm)
    ang = np.radians(angle_deg + np.array([0.0, 120.0, 240.0]))
    return g * np.stack([np.cos(ang), np.sin(ang)], axis=1)


def coords(n=N, dx=DX):
    y, x = np.mgrid[:n, :n] * dx
    return x, y


def render(q, u_of_r):
    """I(r) = sum_j cos(q_j . (r - u(r))): a lattice displaced by the Eulerian field u (GPA sign)."""
    x, y = coords()
    ux, uy = u_of_r(x, y)
    return sum(np.cos(qj[0] * (x - ux) + qj[1] * (y - uy)) for qj in q)


def render_deformed(q, F):
    """Lattice deformed by the homogeneous map r = F X about the origin: I(r) = sum cos(q . F^-1 r)."""
    x, y = coords()
    finv = np.linalg.inv(F)
    X = finv[0, 0] * x + finv[0, 1] * y
    Y = finv[1, 0] * x + finv[1, 1] * y
    return sum(np.cos(qj[0] * X + qj[1] * Y) for qj in q)


# Edge bias of a phase gradient in the trusted region (>= 3.5 sigma from the edge) is below
# (d/sigma) phi(d/sigma) = 3.5 * 8.7e-4 = 0.3 % of the detuning-induced gradient [derived, see
# domains.strain.gpa]; the central difference adds (s dx)^2/6 relative [derived]. For a 1 %
# distortion both stay below 3e-5 absolute, so 5e-5 is the tolerance on e.
TOL_E = 5e-5


def test_lagrangian_stretch_gives_eulerian_0_00990():
    q = hex_q()
    F = np.diag([1.01, 1.0])
    res = gpa(render_deformed(q, F), q, sigma_nm=SIGMA, pixel_size_nm=DX)
    t = res.trusted
    assert t.sum() > 1000
    # docs/methods.md §3 check value [derived]: e_xx = 1 - 1/1.01 = 0.00990 for a 1 % Lagrangian stretch.
    assert_allclose(np.median(res.exx[t]), 0.00990, atol=TOL_E)
    assert_allclose(res.exx[t], 1 - 1 / 1.01, atol=TOL_E)
    # derived: no shear, no stretch along y and no rotation for F = diag(1.01, 1).
    assert_allclose(res.eyy[t], 0, atol=TOL_E)
    assert_allclose(res.exy[t], 0, atol=TOL_E)
    assert_allclose(res.rotation_rad[t], 0, atol=TOL_E)
    lag = gpa(render_deformed(q, F), q, sigma_nm=SIGMA, pixel_size_nm=DX, kind="lagrangian")
    # derived (Rouvière & Sarigiannidou, Ultramicroscopy 2005): Lagrangian e_xx = F_xx - 1 = 0.01.
    assert_allclose(lag.exx[t], 0.01, atol=TOL_E)


def test_rigid_rotation_half_degree():
    q = hex_q()
    c, s = np.cos(np.radians(0.5)), np.sin(np.radians(0.5))
    res = gpa(render_deformed(q, np.array([[c, -s], [s, c]])), q, sigma_nm=SIGMA, pixel_size_nm=DX)
    t = res.trusted
    # docs/methods.md §3 check value [derived]: omega = sin(0.5 deg) = 8.727e-3 rad, strain below 1e-4.
    assert_allclose(res.rotation_rad[t], 8.727e-3, atol=TOL_E)
    for comp in (res.exx, res.eyy, res.exy):
        assert np.max(np.abs(comp[t])) < 1e-4


def test_general_linear_field_displacement_and_distortion():
    q = hex_q(angle_deg=13.0)
    e_true = np.array([[0.006, -0.004], [0.003, -0.005]])
    u0 = np.array([0.031, -0.052])

    def u(x, y):
        return u0[0] + e_true[0, 0] * x + e_true[0, 1] * y, u0[1] + e_true[1, 0] * x + e_true[1, 1] * y

    image = render(q, u)
    res = gpa(image, q, sigma_nm=SIGMA, pixel_size_nm=DX)
    t = res.trusted
    # derived: for I = sum cos(q.(r - u)) with u linear, P_q = -q.u exactly and e = grad u = e_true.
    for i in range(2):
        for j in range(2):
            assert_allclose(res.distortion[i, j][t], e_true[i, j], atol=TOL_E)
    x, y = coords()
    ux, uy = u(x, y)
    # derived: u is recovered up to one lattice vector R (the phases are only known mod 2 pi),
    # i.e. u_meas - u_true is a constant R with q.R a multiple of 2 pi. The edge bias of the
    # phase (not its gradient) is (detuning) x (centroid shift) ~ 0.2 rad/nm * 1e-3 nm: << 1e-4 nm.
    dux, duy = res.ux_nm[t] - ux[t], res.uy_nm[t] - uy[t]
    assert np.std(dux) < 2e-4 and np.std(duy) < 2e-4
    shift = np.array([np.median(dux), np.median(duy)])
    cycles = q @ shift / (2 * np.pi)
    assert_allclose(cycles, np.round(cycles), atol=2e-3)


def test_three_peaks_agree_with_two():
    q = hex_q(angle_deg=-7.0)
    F = np.array([[1.004, 0.002], [-0.001, 0.997]])
    image = render_deformed(q, F)
    r3 = gpa(image, q, sigma_nm=SIGMA, pixel_size_nm=DX)
    r2 = gpa(image, q[:2], sigma_nm=SIGMA, pixel_size_nm=DX)
    t = r3.trusted
    # derived: e = I - F^-1 whatever the (non-collinear) peaks used.
    e_true = np.eye(2) - np.linalg.inv(F)
    for i in range(2):
        for j in range(2):
            assert_allclose(r3.distortion[i, j][t], e_true[i, j], atol=TOL_E)
            assert_allclose(r2.distortion[i, j][t], e_true[i, j], atol=TOL_E)


def test_gpa_displacement_is_minus_drift_displacement():
    q = hex_q()
    u_d = np.array([0.04, -0.03])
    x, y = coords()
    # Drift-correction model (Lawler et al., Nature 2010): T = sum cos(Q.(r + u)).
    image = sum(np.cos(qj[0] * (x + u_d[0]) + qj[1] * (y + u_d[1])) for qj in q)
    phases, amps = gpa_phases(image, q, sigma_nm=SIGMA, pixel_size_nm=DX)
    u = displacement_from_phases(phases, q)
    centre = (slice(80, 112), slice(80, 112))
    # derived: P = +q.u_d, so the GPA displacement is -u_d (module docstring: u_GPA = -u_drift).
    assert_allclose(u[0][centre], -u_d[0], atol=1e-6)
    assert_allclose(u[1][centre], -u_d[1], atol=1e-6)
    # derived: each of the three cosines has unit amplitude, so 2|A| = 1 away from the edges.
    assert_allclose(amps[:, 80:112, 80:112], 1.0, atol=1e-6)


def test_eulerian_lagrangian_conversion_round_trip():
    rng = np.random.default_rng(5)
    F = np.eye(2)[:, :, None] + 0.05 * rng.standard_normal((2, 2, 20))
    finv = np.stack([np.linalg.inv(F[:, :, k]) for k in range(20)], axis=-1)
    e_eul = np.eye(2)[:, :, None] - finv
    exx, eyy, exy, omega = strain_rotation(e_eul, kind="lagrangian")
    # derived (Rouvière & Sarigiannidou 2005): the Lagrangian distortion is F - I.
    lag = F - np.eye(2)[:, :, None]
    assert_allclose(exx, lag[0, 0], rtol=0, atol=1e-12)
    assert_allclose(eyy, lag[1, 1], rtol=0, atol=1e-12)
    assert_allclose(exy, 0.5 * (lag[0, 1] + lag[1, 0]), rtol=0, atol=1e-12)
    assert_allclose(omega, 0.5 * (lag[1, 0] - lag[0, 1]), rtol=0, atol=1e-12)


def test_distortion_needs_no_unwrapping():
    x, y = coords(64, 0.1)
    q = np.array([[10.0, 0.0], [0.0, 10.0]])
    # A phase ramp wrapping many times: -q.u with u = (0.03 x, 0), so P spans 19 rad.
    phases = np.angle(np.exp(-1j * np.stack([10 * 0.03 * x, 0 * y])))
    e = distortion(phases, q, pixel_size_nm=0.1)
    # derived: e_xx = 0.03, and the central difference of a ramp of 0.03 rad/px is exact
    # to (0.03)^2/6 relative.
    assert_allclose(e[0, 0], 0.03, rtol=2e-4)
    assert_allclose(e[1, 1], 0.0, atol=1e-12)


def test_bad_input():
    image = np.zeros((32, 32))
    with pytest.raises(InputError, match="q"):
        gpa(image, [[5.0, 0.0], [10.0, 0.0]], sigma_nm=0.5, pixel_size_nm=0.05)  # collinear
    with pytest.raises(InputError, match="Nyquist"):
        gpa(image, [[80.0, 0.0], [0.0, 10.0]], sigma_nm=0.5, pixel_size_nm=0.05)  # pi/0.05 = 62.8
    with pytest.raises(InputError, match="shape"):
        gpa(image, [[5.0, 0.0]], sigma_nm=0.5, pixel_size_nm=0.05)
    with pytest.raises(InputError, match="kind"):
        strain_rotation(np.zeros((2, 2)), kind="material")
    with pytest.raises(InputError, match="phases"):
        distortion(np.zeros((3, 8, 8)), [[5.0, 0.0], [0.0, 5.0]], pixel_size_nm=0.05)
