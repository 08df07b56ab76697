"""Synthetic twisted bilayer: two invented hexagonal layers, twisted (and optionally strained), with a stacking-dependent contrast and an analytic truth.

Model
-----
Layer l maps an image point r to a material coordinate X_l = A_l⁻¹ (r - c)
(c the frame centre), with A_1 = R(-θ/2) and A_2 = T A_1, T = R(θ)(I + E),
E = R(φs) diag(ε, -νε) R(φs)ᵀ. Each layer is a triangular lattice of bright
sites, ρ(X) = (Σ_j cos(G0_j · X) + 3/2) / (9/2) in [0, 1], and the image is
h = exp(κ (ρ1 + ρ2)): the product exp(κρ1) exp(κρ2) holds the difference
frequencies G1_j - G2_j, so the moiré is a real low-|q| Fourier component,
bright where the layers are in register (AA) [derived]. With
``resolve_atoms=False`` only that low-frequency part is rendered, analytically:
Σ_n |c_n|² cos(n · (Φ1 - Φ2)), c_n the Fourier coefficients of exp(κρ).

The twist may vary: ``twist_gradient_deg_per_nm`` along x, and ``regions``
(vertical bands of different twist). The true local twist and heterostrain
are computed from the exact gradients of the layer phases Φ_lj = G0_j · X_l,
so they include the strain a twist gradient necessarily carries (by
compatibility a varying rotation comes with strain growing away from the
centre row, about |y - yc| dθ/dx).
"""

from __future__ import annotations

import math

import numpy as np

from .._errors import InputError
from .._scan import pixel_size_pair

__all__ = ["twisted_bilayer"]


def _rot(angle):
    """Rotation matrices for an array of angles, shape angle.shape + (2, 2)."""
    angle = np.asarray(angle, dtype=float)
    c, s = np.cos(angle), np.sin(angle)
    return np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)


def twisted_bilayer(*, shape=(512, 512), pixel_size_nm=0.2, a_nm=0.246, theta_deg=1.1,
                    twist_gradient_deg_per_nm=0.0, heterostrain_percent=0.0, heterostrain_angle_deg=0.0,
                    regions=None, resolve_atoms=False, contrast=2.0, noise=0.0, poisson=0.16, rng=None,
                    mismatch=0.0, displacement_nm=None):
    """A twisted bilayer of two hexagonal layers with an analytically known moiré.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float or (float, float)
        Pixel size in nm. The default 0.2 nm with 512² pixels shows about
        eight moiré periods at 1.1°; with ``resolve_atoms`` it must resolve the
        Bragg peaks (below a√3/4, 0.1 nm for a = 0.246 nm).
    a_nm : float
        Lattice constant of both layers, nm.
    theta_deg : float
        Twist at the frame centre (or of every region), degrees.
    twist_gradient_deg_per_nm : float
        Change of the twist along x, degrees per nm.
    heterostrain_percent, heterostrain_angle_deg : float
        Uniaxial heterostrain ε (%) of layer 2 and its axis φs (degrees from x).
    regions : sequence of float, optional
        Twist angles of equal vertical bands (left to right), replacing
        ``theta_deg``; e.g. ``[1.0, 1.3]`` gives two twist domains with a
        boundary at the frame's centre column.
    resolve_atoms : bool
        Render the atomic lattices (True) or only the moiré (False).
    contrast : float
        κ of the stacking contrast exp(κ(ρ1 + ρ2)).
    noise : float
        Standard deviation of added white noise, in units of the clean
        image's standard deviation (the clean image is scaled to zero mean and
        unit standard deviation).
    poisson : float
        Poisson ratio of the heterostrain.
    rng : int or numpy.random.Generator, optional
        Random source for the noise.
    mismatch : float
        Lattice mismatch δ: layer 2 has lattice constant (1 + δ) a, so
        T = R(θ)(1 + δ)(I + E) (Yankowitz et al. 2012). The truth's twist and
        heterostrain maps are those of T / (1 + δ).
    displacement_nm : (2, row, col) array, optional
        A scan displacement u(r) (ux, uy) in nm: both layers are rendered at
        s = r + u(r) (drift, creep), so the image stays analytic. The truth maps
        are the material's (gradients with respect to s), and ``aa_sites_nm`` are
        material positions.

    Returns
    -------
    image : (row, col) ndarray
        The rendered image.
    truth : dict
        ``theta_deg``, ``heterostrain_percent`` (signed), ``heterostrain_angle_deg``
        and ``period_nm`` maps (local, from the exact layer gradients);
        ``moire_q_map`` (3, 2, row, col); at the frame centre ``moire_q_rad_per_nm``
        (3, 2), ``bragg_q_layer1_rad_per_nm``, ``bragg_q_layer2_rad_per_nm``,
        ``bragg_q_rad_per_nm`` (their mean), ``wavelengths_nm`` (3,) and
        ``period_nm_centre``; ``regions`` (int32 labels 1..k), ``region_theta_deg``,
        ``boundary_x_nm`` (band edges), ``aa_sites_nm`` (for a uniform moiré),
        ``a_nm``, ``mismatch``, ``pixel_size_nm``, ``noise_std``.

    Raises
    ------
    InputError
        If the pixel cannot resolve the Bragg peaks with ``resolve_atoms``,
        the moiré is beyond Nyquist, or an argument is out of range.

    References
    ----------
    .. [1] K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012).
       doi:10.1088/0953-8984/24/31/314210
    .. [2] M. Yankowitz et al., "Emergence of superlattice Dirac points in
       graphene on hexagonal boron nitride", Nat. Phys. 8, 382 (2012).
       doi:10.1038/nphys2272

    Examples
    --------
    >>> image, truth = twisted_bilayer(shape=(64, 64), pixel_size_nm=0.5, theta_deg=2.0)
    >>> image.shape, round(truth["period_nm_centre"], 3)
    ((64, 64), 7.048)
    """
    shape = tuple(int(s) for s in shape)
    if len(shape) != 2 or min(shape) < 8:
        raise InputError(f"shape must be two sizes of at least 8 pixels, got {shape}")
    dy, dx = pixel_size_pair(pixel_size_nm)
    a_nm = float(a_nm)
    if not a_nm > 0:
        raise InputError(f"a_nm must be positive, got {a_nm}")
    if noise < 0:
        raise InputError(f"noise must be >= 0, got {noise}")
    mismatch = float(mismatch)
    if not -0.5 < mismatch < 0.5:
        raise InputError(f"mismatch must be a relative difference of lattice constants in (-0.5, 0.5), got {mismatch}")
    g0 = 4 * math.pi / (math.sqrt(3) * a_nm)
    if resolve_atoms and g0 * 1.05 > math.pi / max(dx, dy):
        raise InputError(
            f"pixel_size_nm = {pixel_size_nm} cannot resolve atoms of a_nm = {a_nm}: "
            f"the Bragg peaks at {g0:.3g} rad/nm lie beyond Nyquist ({math.pi / max(dx, dy):.3g} rad/nm); "
            f"use at most {math.pi / (1.05 * g0):.3g} nm"
        )
    ny, nx = shape
    y, x = np.mgrid[:ny, :nx].astype(float)
    x *= dx
    y *= dy
    xc, yc = (nx - 1) / 2 * dx, (ny - 1) / 2 * dy
    if displacement_nm is not None:
        u = np.asarray(displacement_nm, dtype=float)
        if u.shape != (2,) + shape:
            raise InputError(f"displacement_nm must have shape {(2,) + shape} (ux, uy in nm), got {u.shape}")
        rel = np.stack([x + u[0] - xc, y + u[1] - yc], axis=-1)
    else:
        rel = np.stack([x - xc, y - yc], axis=-1)  # (r, c, 2)

    # Twist field (radians) and its x derivative.
    labels = np.ones(shape, dtype=np.int32)
    if regions is not None:
        region_theta = [float(t) for t in regions]
        if not region_theta:
            raise InputError("regions must hold at least one twist angle (degrees)")
        edges = np.linspace(0, nx * dx, len(region_theta) + 1)
        band = np.clip(np.searchsorted(edges, x[0] + 0.5 * dx, side="right") - 1, 0, len(region_theta) - 1)
        labels = np.broadcast_to(band[None, :] + 1, shape).astype(np.int32)
        base = np.array(region_theta)[labels - 1]
        boundary_x = edges[1:-1].tolist()
    else:
        region_theta = [float(theta_deg)]
        base = np.full(shape, float(theta_deg))
        boundary_x = []
    # A rotation field beta(x) applied about c adds (x - xc) beta'/2 to the local rotation
    # [derived: antisymmetric part of d/dx (R(beta) (r - c))], so the fields use 2/3 of the
    # gradient and the local twist then changes at the requested rate near the centre row.
    grad_field = 2.0 / 3.0 * float(twist_gradient_deg_per_nm)
    theta = np.radians(base + grad_field * (x - xc))
    dtheta_dx = math.radians(grad_field)
    if regions is None and grad_field == 0:
        # One twist everywhere: a single set of matrices broadcasts over the pixels (fast path).
        theta = theta[:1, :1]

    eps = float(heterostrain_percent) / 100
    rs = _rot(math.radians(float(heterostrain_angle_deg)))
    E = rs @ np.diag([eps, -poisson * eps]) @ rs.T
    strain_inv = np.linalg.inv(np.eye(2) + E)

    # A_l^-1 and d(A_l^-1)/dtheta per pixel; R'(p) = R(p + pi/2).
    a1_inv = _rot(theta / 2)
    d_a1_inv = 0.5 * _rot(theta / 2 + np.pi / 2)
    dilation = 1.0 + mismatch
    a2_inv = _rot(theta / 2) @ strain_inv @ _rot(-theta) / dilation
    d_a2_inv = (0.5 * _rot(theta / 2 + np.pi / 2) @ strain_inv @ _rot(-theta)
                - _rot(theta / 2) @ strain_inv @ _rot(-theta + np.pi / 2)) / dilation

    basis = np.array([[1.0, 0.0], [0.5, math.sqrt(3) / 2]]) * a_nm  # rows a1, a2
    recip = 2 * math.pi * np.linalg.inv(basis).T  # rows b1, b2
    G0 = np.array([recip[0], recip[1], -(recip[0] + recip[1])])  # (3, 2)

    def phases_and_gradients(a_inv, d_a_inv):
        X = np.einsum("rcij,rcj->rci", a_inv, rel)
        phi = X @ G0.T  # (r, c, 3)
        # grad_r (G . A^-1 r): A^-T G, plus the x-derivative of A^-1 through the twist field.
        grad = np.einsum("rcji,kj->rcki", a_inv, G0)  # (r, c, 3, 2): (A^-T G0_k)_i
        if dtheta_dx:
            dX = np.einsum("rcij,rcj->rci", d_a_inv, rel)  # d X / d theta
            grad[..., 0] += (dX @ G0.T) * dtheta_dx
        return phi, grad

    phi1, grad1 = phases_and_gradients(a1_inv, d_a1_inv)
    phi2, grad2 = phases_and_gradients(a2_inv, d_a2_inv)

    # Truth: local lattices -> T = (G2 G1^-1)^-T, decomposed like the measurement.
    from ..moire import _decompose, _wavelengths

    kmap = grad1 - grad2  # (r, c, 3, 2)
    # Twist and heterostrain of T / (1 + δ): remove the mismatch dilation from layer 2 first.
    t_theta, t_eps, t_angle, _ = _decompose(grad1 - dilation * grad2, grad1, poisson=poisson, reference="layer1")
    t_period = _wavelengths(kmap).mean(axis=-1)
    t_theta, t_eps, t_angle, t_period = (np.array(np.broadcast_to(v, shape))
                                         for v in (t_theta, t_eps, t_angle, t_period))
    kmap = np.array(np.broadcast_to(kmap, shape + kmap.shape[2:]))

    # Stacking contrast.
    def rho(p):
        return (np.cos(p).sum(axis=-1) + 1.5) / 4.5

    if resolve_atoms:
        image = np.exp(contrast * (rho(phi1) + rho(phi2)))
    else:
        n = 32
        psi = 2 * np.pi * np.arange(n) / n
        p1, p2 = np.meshgrid(psi, psi, indexing="ij")
        single = np.exp(contrast * (np.cos(p1) + np.cos(p2) + np.cos(p1 + p2) + 1.5) / 4.5)
        coeff = np.abs(np.fft.fft2(single) / n**2) ** 2
        freqs = np.fft.fftfreq(n, 1 / n).astype(int)
        d1 = phi1[..., 0] - phi2[..., 0]
        d2 = phi1[..., 1] - phi2[..., 1]
        image = np.zeros(shape)
        keep = np.argwhere(coeff > 1e-12 * coeff.max())
        for i, j in keep:
            image += coeff[i, j] * np.cos(freqs[i] * d1 + freqs[j] * d2)
    image = (image - image.mean()) / image.std()
    if noise > 0:
        gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
        image = image + noise * gen.standard_normal(shape)

    kmax = float(np.max(np.abs(kmap[..., 0]))), float(np.max(np.abs(kmap[..., 1])))
    if kmax[0] > math.pi / dx or kmax[1] > math.pi / dy:
        raise InputError(
            f"pixel_size_nm = {pixel_size_nm} is too large for this moiré (theta_deg = {theta_deg}): "
            "its wavevectors lie beyond Nyquist"
        )

    # Frame-centre values (exact for a uniform moiré).
    ic, jc = ny // 2, nx // 2
    t_center = math.radians(region_theta[labels[ic, jc] - 1] + grad_field * (jc * dx - xc))
    T = _rot(t_center) @ (np.eye(2) + E) * dilation
    g1 = (_rot(-t_center / 2) @ G0.T).T
    g2 = (np.linalg.inv(T).T @ g1.T).T
    k_centre = g1 - g2
    wl = _wavelengths(k_centre)

    aa = np.zeros((0, 2))
    if regions is None and twist_gradient_deg_per_nm == 0 and (theta_deg != 0 or mismatch != 0 or eps != 0):
        # AA sites: X1 - X2 a lattice vector n, r = c + (A1^-1 - A2^-1)^-1 n.
        m = np.linalg.inv(a1_inv[0, 0] - a2_inv[0, 0])
        span = np.abs(np.linalg.inv(m) @ np.array([[nx * dx, nx * dx, -nx * dx, -nx * dx],
                                                   [ny * dy, -ny * dy, ny * dy, -ny * dy]]) / 2).max()
        nmax = int(np.ceil(span / a_nm * 2)) + 2
        ii, jj = np.mgrid[-nmax:nmax + 1, -nmax:nmax + 1]
        lattice = ii.ravel()[:, None] * basis[0] + jj.ravel()[:, None] * basis[1]
        pts = lattice @ m.T + [xc, yc]
        inside = (pts[:, 0] >= 0) & (pts[:, 0] <= (nx - 1) * dx) & (pts[:, 1] >= 0) & (pts[:, 1] <= (ny - 1) * dy)
        aa = pts[inside]

    truth = {
        "theta_deg": np.degrees(t_theta),
        "heterostrain_percent": t_eps * 100,
        "heterostrain_angle_deg": np.degrees(t_angle),
        "period_nm": t_period,
        "moire_q_map": np.moveaxis(kmap, (0, 1), (-2, -1)),
        "moire_q_rad_per_nm": k_centre,
        "bragg_q_layer1_rad_per_nm": g1,
        "bragg_q_layer2_rad_per_nm": g2,
        "bragg_q_rad_per_nm": 0.5 * (g1 + g2),
        "wavelengths_nm": wl,
        "period_nm_centre": float(wl.mean()),
        "regions": labels,
        "region_theta_deg": region_theta,
        "boundary_x_nm": boundary_x,
        "aa_sites_nm": aa,
        "a_nm": a_nm,
        "mismatch": mismatch,
        "poisson": poisson,
        "pixel_size_nm": (dy, dx),
        "noise_std": float(noise),
    }
    return image, truth


def moire_scene(*, shape=(512, 512), pixel_size_nm=0.2, a_nm=0.246, regions=(1.05, 1.3), heterostrain_percent=0.1,
                heterostrain_angle_deg=20.0, noise=0.3, rng=0):
    """The built-in moiré scene: a twisted bilayer with two twist domains and a little heterostrain.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float
        Pixel size in nm.
    a_nm : float
        Lattice constant of both layers (nm); the analysis needs it, as the scene
        does not resolve the atoms.
    regions : sequence of float
        Twist angles (degrees) of equal vertical bands, left to right.
    heterostrain_percent, heterostrain_angle_deg : float
        Uniaxial heterostrain of layer 2 and its axis.
    noise : float
        White noise in units of the clean image's standard deviation.
    rng : int or numpy.random.Generator
        Randomness (seed).

    Returns
    -------
    domains.synth.Scene
        ``truth_maps`` holds ``labels`` (the twist bands) and ``twist_deg``; ``truth`` the
        band angles, the lattice constant and the moiré wavevectors at the centre.

    Examples
    --------
    >>> scene = moire_scene(shape=(96, 96), rng=1)
    >>> scene.kind, scene.truth["region_theta_deg"]
    ('moire', [1.05, 1.3])
    """
    from .._scan import Scan
    from .cdw import Scene

    image, truth = twisted_bilayer(shape=shape, pixel_size_nm=pixel_size_nm, a_nm=a_nm, regions=list(regions),
                                   heterostrain_percent=heterostrain_percent,
                                   heterostrain_angle_deg=heterostrain_angle_deg, noise=noise, rng=rng)
    topography = Scan(image, pixel_size_nm=pixel_size_nm, channel="topography", bias_V=0.2, setpoint_A=1e-10,
                      source="<synthetic moire scene>", metadata={"units": "arb. (normalised height)"})
    summary = {
        "a_nm": a_nm,
        "region_theta_deg": [float(t) for t in truth["region_theta_deg"]],
        "heterostrain_percent": heterostrain_percent,
        "heterostrain_angle_deg": heterostrain_angle_deg,
        "moire_q_rad_per_nm": np.asarray(truth["moire_q_rad_per_nm"]).tolist(),
        "period_nm_centre": truth["period_nm_centre"],
        "n_domains": len(regions),
    }
    maps = {"labels": np.asarray(truth["regions"], np.int32), "twist_deg": truth["theta_deg"],
            "displacement": np.zeros((2,) + tuple(shape))}
    return Scene("moire", topography, [], summary, maps)
