"""Moiré patterns of two stacked lattices: period and twist formulas, local twist and heterostrain maps, moiré maxima and twist-angle domains.

Conventions
-----------
Layer 2 is layer 1 transformed by T = R(θ)(I + E): real-space lattice vectors
a2_i = T a1_i, reciprocal vectors G2_j = T^{-T} G1_j, and the moiré wavevectors
are k_j = G1_j - G2_j = (I - T^{-T}) G1_j [derived]. The uniaxial heterostrain
is E = R(φs) diag(ε, -νε) R(φs)ᵀ, ε > 0 a tension along φs (Kerelsky et al.
2019; Huder et al. 2018). Angles are measured from +x (columns) towards +y
(rows). A hexagonal moiré of period λ (the distance between neighbouring
bright AA sites) has its Fourier peaks at |k| = 4π/(√3 λ).

From an image alone one cannot tell which layer is on top, so the maps report
the twist as a non-negative angle, and the heterostrain as a magnitude |ε| and
the direction of its principal axis (0-180°).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ._checks import positive, within_nyquist
from ._errors import InputError
from ._lockin import choose_sigma, local_wavevector, lockin, phase_gradient, trusted_mask
from ._scan import pixel_size_pair

__all__ = [
    "MoireFields",
    "MoireMaps",
    "TwistDomains",
    "TwistStrain",
    "find_moire_q",
    "layer_transform",
    "moire_fields",
    "moire_maps",
    "moire_maxima",
    "moire_period",
    "moire_period_mismatch",
    "moire_wavelengths",
    "moire_wavevectors",
    "region_fit",
    "triangle_twist",
    "twist_domains",
    "twist_from_period",
    "twist_strain_from_wavevectors",
]

#: Poisson ratio of graphene used by default for uniaxial heterostrain (Kerelsky et al. 2019).
POISSON_GRAPHENE = 0.16

#: Below this fraction of its median amplitude a moiré component's local wavevector is not used.
WEAK_AMPLITUDE = 0.25

_HEX = 4 * math.pi / math.sqrt(3)  # |k| * period of a hexagonal pattern


# --------------------------------------------------------------------------- helpers


def _rot(angle_rad):
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return np.array([[c, -s], [s, c]])


def _vectors(q, name, counts=(2, 3)):
    try:
        q = np.asarray(q, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be an array of (qx, qy) pairs in rad/nm, got {q!r}") from None
    if q.ndim != 2 or q.shape[1] != 2 or q.shape[0] not in counts:
        raise InputError(f"{name} must have shape (k, 2) with k in {counts}, got shape {q.shape}")
    if not np.all(np.isfinite(q)):
        raise InputError(f"{name} must be finite, got {q.tolist()}")
    norms = np.hypot(q[:, 0], q[:, 1])
    if np.any(norms == 0):
        raise InputError(f"{name} holds a zero vector: {q.tolist()}")
    best = max(
        abs(q[i, 0] * q[j, 1] - q[i, 1] * q[j, 0]) / (norms[i] * norms[j])
        for i in range(len(q)) for j in range(i + 1, len(q))
    )
    if best < 1e-3:
        raise InputError(f"{name} must hold two non-collinear wavevectors, got collinear ones: {q.tolist()}")
    return q


def _triplet(q):
    """Three vectors summing to (about) zero, ordered by increasing angle, from two or three."""
    q = np.asarray(q, dtype=float)
    if len(q) == 2:
        q = np.vstack([q, -q[0] - q[1]])
    else:
        best = None
        for s1 in (1, -1):
            for s2 in (1, -1):
                cand = np.vstack([q[0], s1 * q[1], s2 * q[2]])
                err = np.hypot(*cand.sum(axis=0))
                if best is None or err < best[0]:
                    best = (err, cand)
        q = best[1]
    order = np.argsort(np.arctan2(q[:, 1], q[:, 0]))
    return q[order]


def _rot_stack(angle):
    """Rotation matrices for an array of angles, shape angle.shape + (2, 2)."""
    c, s = np.cos(angle), np.sin(angle)
    return np.stack([np.stack([c, -s], -1), np.stack([s, c], -1)], -2)


def _inv2(m):
    """Inverse of stacked 2 x 2 matrices (..., 2, 2), written out."""
    a, b, c, d = m[..., 0, 0], m[..., 0, 1], m[..., 1, 0], m[..., 1, 1]
    det = a * d - b * c
    out = np.empty_like(m)
    out[..., 0, 0], out[..., 0, 1] = d / det, -b / det
    out[..., 1, 0], out[..., 1, 1] = -c / det, a / det
    return out


def _pinv_cols(a):
    """Pseudo-inverse of stacked (..., 2, k) matrices of full row rank: Aᵀ(AAᵀ)⁻¹."""
    at = np.swapaxes(a, -1, -2)
    return at @ _inv2(a @ at)


def _decompose(K, G, *, poisson, reference):
    """Twist, signed uniaxial heterostrain and its direction from matched K and G.

    K, G: (..., k, 2) with row j of K the moiré vector of Bragg vector G_j.
    Returns theta (rad), eps (signed, dimensionless), strain angle (rad, [0, pi)),
    and the transform T (..., 2, 2).
    """
    Kc = np.swapaxes(np.asarray(K, dtype=float), -1, -2)
    Gc = np.swapaxes(np.asarray(G, dtype=float), -1, -2)
    eye = np.eye(2)
    if reference == "layer1":
        # T^-T = I - K G^-1 (docs/methods.md §4), G the Bragg vectors of layer 1.
        mt = eye - Kc @ _pinv_cols(np.broadcast_to(Gc, np.broadcast_shapes(Gc.shape, Kc.shape)))
    else:
        # G the mean lattice: G1 = G + K/2, G2 = G - K/2, so T^-T = G2 G1^-1 exactly,
        # and swapping the layers (K -> -K) gives T -> T^-1.
        mt = (Gc - Kc / 2) @ _pinv_cols(Gc + Kc / 2)
    T = np.swapaxes(_inv2(mt), -1, -2)
    # Polar decomposition T = R(theta) P of a 2 x 2 matrix with det > 0, in closed form.
    theta = np.arctan2(T[..., 1, 0] - T[..., 0, 1], T[..., 0, 0] + T[..., 1, 1])
    c, s = np.cos(theta), np.sin(theta)
    pxx = c * T[..., 0, 0] + s * T[..., 1, 0] - 1
    pyy = -s * T[..., 0, 1] + c * T[..., 1, 1] - 1
    pxy = 0.5 * (c * T[..., 0, 1] + s * T[..., 1, 1] - s * T[..., 0, 0] + c * T[..., 1, 0])
    half_diff = np.hypot(0.5 * (pxx - pyy), pxy)
    psi = 0.5 * np.arctan2(2 * pxy, pxx - pyy)  # axis of the larger principal strain
    # Uniaxial E = R diag(eps, -nu eps) R^T: eigenvalue difference (1 + nu)|eps|, trace (1 - nu) eps.
    tension = (pxx + pyy) >= 0
    eps = np.where(tension, 1, -1) * 2 * half_diff / (1 + poisson)
    angle = np.mod(np.where(tension, psi, psi + np.pi / 2), np.pi)
    return theta, eps, angle, T


def _wavelengths(K):
    """Distances between neighbouring moiré maxima along the three directions, from (..., k, 2)."""
    K = np.asarray(K, dtype=float)
    Kc = np.swapaxes(K[..., :2, :], -1, -2)
    L = 2 * np.pi * np.swapaxes(_inv2(Kc), -1, -2)  # columns L_i with L_i . K_j = 2 pi delta_ij
    l1, l2 = L[..., :, 0], L[..., :, 1]
    third = np.minimum(np.hypot(*np.moveaxis(l1 - l2, -1, 0)), np.hypot(*np.moveaxis(l1 + l2, -1, 0)))
    return np.stack([np.hypot(*np.moveaxis(l1, -1, 0)), np.hypot(*np.moveaxis(l2, -1, 0)), third], axis=-1)


def _hex_bragg(a_nm, alpha_rad):
    """Hexagonal Bragg triplet of lattice constant a, the first vector at angle alpha."""
    g = _HEX / a_nm
    angles = alpha_rad + np.array([0.0, 2 * np.pi / 3, 4 * np.pi / 3])
    return g * np.stack([np.cos(angles), np.sin(angles)], axis=1)


def _match_bragg(K, G):
    """Reorder and sign the Bragg vectors so that G_j belongs to K_j.

    For a small twist k_j ≈ θ R(-90°) G_j, so G_j is the ±G closest to R(+90°) k_j;
    this choice also makes the twist come out positive.
    """
    G = np.asarray(G, dtype=float)
    cands = np.vstack([G, -G])
    out = []
    for k in K:
        target = np.array([-k[1], k[0]]) / np.hypot(*k)
        cosines = cands @ target / np.hypot(cands[:, 0], cands[:, 1])
        out.append(cands[int(np.argmax(cosines))])
    return np.array(out)


# --------------------------------------------------------------------------- geometry


def moire_period(a_nm, theta_deg):
    """Moiré period of two identical lattices twisted by θ: λ = a / (2 sin(θ/2)).

    Parameters
    ----------
    a_nm : float
        Lattice constant in nm.
    theta_deg : float or array_like
        Twist angle in degrees (non-zero).

    Returns
    -------
    float or ndarray
        Period in nm (distance between neighbouring AA sites).

    Raises
    ------
    InputError
        If ``a_nm`` is not positive or θ is zero.

    References
    ----------
    .. [1] K. Hermann, "Periodic overlayers and moiré patterns: theoretical
       studies of geometric properties", J. Phys.: Condens. Matter 24, 314210
       (2012). doi:10.1088/0953-8984/24/31/314210

    Examples
    --------
    >>> round(moire_period(0.246, 1.1), 3)
    12.814
    """
    a_nm = positive(a_nm, "a_nm")
    theta = np.radians(np.asarray(theta_deg, dtype=float))
    if np.any(np.sin(np.abs(theta) / 2) == 0):
        raise InputError(f"theta_deg must be non-zero for identical lattices, got {theta_deg!r}")
    period = a_nm / (2 * np.sin(np.abs(theta) / 2))
    return float(period) if period.ndim == 0 else period


def moire_period_mismatch(a_nm, theta_deg, delta):
    """Moiré period and orientation of two lattices with mismatch δ twisted by θ.

    λ = (1 + δ) a / sqrt(2 (1 + δ)(1 - cos θ) + δ²) and
    tan φ = sin θ / ((1 + δ) - cos θ), φ the angle between the moiré and the
    lattice of constant a (Yankowitz et al. 2012).

    Parameters
    ----------
    a_nm : float
        The smaller lattice constant, nm.
    theta_deg : float
        Twist angle in degrees.
    delta : float
        Relative mismatch (a_other / a - 1), e.g. 0.018.

    Returns
    -------
    period_nm : float
        Moiré period in nm.
    phi_deg : float
        Orientation of the moiré relative to the lattice, degrees.

    Raises
    ------
    InputError
        If both δ and θ vanish (no moiré) or ``a_nm`` is not positive.

    References
    ----------
    .. [1] M. Yankowitz et al., "Emergence of superlattice Dirac points in
       graphene on hexagonal boron nitride", Nat. Phys. 8, 382 (2012).
       doi:10.1038/nphys2272

    Examples
    --------
    >>> period, phi = moire_period_mismatch(0.246, 1.0, 0.018)
    >>> round(period, 3), round(phi, 2)
    (9.945, 43.87)
    """
    a_nm = positive(a_nm, "a_nm")
    theta = math.radians(float(theta_deg))
    delta = float(delta)
    denom = 2 * (1 + delta) * (1 - math.cos(theta)) + delta**2
    if denom <= 0:
        raise InputError(f"no moiré for delta = {delta} and theta_deg = {theta_deg}: the lattices coincide")
    period = (1 + delta) * a_nm / math.sqrt(denom)
    phi = math.degrees(math.atan2(math.sin(theta), (1 + delta) - math.cos(theta)))
    return period, phi


def twist_from_period(period_nm, a_nm):
    """Twist angle of two identical lattices from the moiré period: θ = 2 arcsin(a / 2λ).

    Parameters
    ----------
    period_nm : float or array_like
        Moiré period(s) in nm, at least a/2.
    a_nm : float
        Lattice constant in nm.

    Returns
    -------
    float or ndarray
        Twist in degrees.

    Raises
    ------
    InputError
        If a period is shorter than a/2 or ``a_nm`` is not positive.

    References
    ----------
    .. [1] K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012).
       doi:10.1088/0953-8984/24/31/314210

    Examples
    --------
    >>> round(twist_from_period(12.814, 0.246), 3)
    1.1
    """
    a_nm = positive(a_nm, "a_nm")
    period = np.asarray(period_nm, dtype=float)
    if np.any(period < a_nm / 2):
        raise InputError(f"period_nm must be at least a_nm/2 = {a_nm / 2:g} nm, got {period_nm!r}")
    theta = np.degrees(2 * np.arcsin(a_nm / (2 * period)))
    return float(theta) if theta.ndim == 0 else theta


def layer_transform(theta_deg, strain_percent=0.0, strain_angle_deg=0.0, *, poisson=POISSON_GRAPHENE):
    """The map T = R(θ)(I + E) that takes layer 1 onto layer 2.

    Parameters
    ----------
    theta_deg : float
        Twist of layer 2 relative to layer 1, degrees, positive from +x to +y.
    strain_percent : float
        Uniaxial heterostrain ε of layer 2 in percent (positive: tension).
    strain_angle_deg : float
        Direction φs of the strain axis, degrees from +x.
    poisson : float
        Poisson ratio ν; E = R(φs) diag(ε, -νε) R(φs)ᵀ.

    Returns
    -------
    (2, 2) ndarray

    Examples
    --------
    >>> layer_transform(90.0).round(12).tolist()
    [[0.0, -1.0], [1.0, 0.0]]
    """
    eps = float(strain_percent) / 100
    rs = _rot(math.radians(float(strain_angle_deg)))
    E = rs @ np.diag([eps, -float(poisson) * eps]) @ rs.T
    return _rot(math.radians(float(theta_deg))) @ (np.eye(2) + E)


def moire_wavevectors(G, theta_deg, strain_percent=0.0, strain_angle_deg=0.0, *, poisson=POISSON_GRAPHENE):
    """Moiré wavevectors k_j = (I - T^{-T}) G_j of layer 1 (Bragg vectors G_j) and layer 2 = T · layer 1.

    Parameters
    ----------
    G : (k, 2) array_like
        Bragg wavevectors of layer 1, rad/nm (any k >= 1).
    theta_deg, strain_percent, strain_angle_deg, poisson
        As in :func:`layer_transform`.

    Returns
    -------
    (k, 2) ndarray
        Moiré wavevectors in rad/nm, k_j = G1_j - G2_j.

    References
    ----------
    .. [1] K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012).
       doi:10.1088/0953-8984/24/31/314210
    .. [2] A. Kerelsky et al., "Maximized electron interactions at the magic
       angle in twisted bilayer graphene", Nature 572, 95 (2019).
       doi:10.1038/s41586-019-1431-9

    Examples
    --------
    >>> g = 4 * np.pi / (np.sqrt(3) * 0.246)
    >>> k = moire_wavevectors([[g, 0.0]], 1.1)
    >>> round(float(4 * np.pi / (np.sqrt(3) * np.hypot(*k[0]))), 3)
    12.814
    """
    G = np.atleast_2d(np.asarray(G, dtype=float))
    if G.ndim != 2 or G.shape[1] != 2:
        raise InputError(f"G must have shape (k, 2) in rad/nm, got {np.shape(G)}")
    T = layer_transform(theta_deg, strain_percent, strain_angle_deg, poisson=poisson)
    return G @ (np.eye(2) - np.linalg.inv(T).T).T


def moire_wavelengths(K):
    """The three distances between neighbouring moiré maxima from two or three moiré wavevectors.

    With real-space moiré vectors L_i (L_i · k_j = 2π δ_ij) they are |L1|, |L2|
    and the shorter of |L1 ± L2|; all equal 4π/(√3 |k|) for a hexagonal moiré.

    Parameters
    ----------
    K : (2, 2) or (3, 2) array_like
        Moiré wavevectors, rad/nm.

    Returns
    -------
    (3,) ndarray
        Wavelengths in nm.

    Examples
    --------
    >>> g = 4 * np.pi / (np.sqrt(3) * 0.246)
    >>> G = g * np.array([[1, 0], [-0.5, np.sqrt(3) / 2]])
    >>> moire_wavelengths(moire_wavevectors(G, 1.1)).round(3).tolist()
    [12.814, 12.814, 12.814]
    """
    K = _triplet(_vectors(K, "K"))
    return _wavelengths(K)


@dataclass
class TwistStrain:
    """Twist and uniaxial heterostrain of layer 2 relative to layer 1."""

    theta_deg: float
    strain_percent: float
    strain_angle_deg: float
    transform: np.ndarray


def twist_strain_from_wavevectors(K, G, *, poisson=POISSON_GRAPHENE, reference="layer1"):
    """Invert moiré wavevectors for twist and uniaxial heterostrain.

    T = (I - K G⁻¹)^{-T} (G the Bragg vectors of layer 1), then the polar
    decomposition T = U P gives θ from U and E = P - I; the uniaxial model
    E = R(φs) diag(ε, -νε) R(φs)ᵀ gives |ε| = (λ1 - λ2)/(1 + ν) from the
    principal strains, its sign from the trace (1 - ν)ε [derived, docs/methods.md §4].

    Parameters
    ----------
    K : (k, 2) array_like, k = 2 or 3
        Moiré wavevectors k_j = G1_j - G2_j, rad/nm, row j matched to G_j.
    G : (k, 2) array_like
        Bragg wavevectors, rad/nm.
    poisson : float
        Poisson ratio ν of the uniaxial strain model.
    reference : {"layer1", "mean"}
        Whether G is the lattice of layer 1 or the mean of the two layers
        (what an image with both layers shows); with "mean",
        T^{-T} = (G - K/2)(G + K/2)⁻¹, exact and symmetric under a layer swap.

    Returns
    -------
    TwistStrain
        ``theta_deg`` (signed), ``strain_percent`` (signed, > 0 tension of
        layer 2), ``strain_angle_deg`` in [0, 180) and ``transform`` T.

    Raises
    ------
    InputError
        If K or G is malformed or collinear, or ``reference`` is unknown.

    References
    ----------
    .. [1] A. Kerelsky et al., Nature 572, 95 (2019). doi:10.1038/s41586-019-1431-9
    .. [2] L. Huder et al., "Electronic spectrum of twisted graphene layers
       under heterostrain", Phys. Rev. Lett. 120, 156405 (2018).
       doi:10.1103/PhysRevLett.120.156405

    Examples
    --------
    >>> g = 4 * np.pi / (np.sqrt(3) * 0.246)
    >>> G = g * np.array([[1, 0], [-0.5, np.sqrt(3) / 2]])
    >>> r = twist_strain_from_wavevectors(moire_wavevectors(G, 1.1, 0.2, 30.0), G)
    >>> round(r.theta_deg, 6), round(r.strain_percent, 6), round(r.strain_angle_deg, 6)
    (1.1, 0.2, 30.0)
    """
    if reference not in ("layer1", "mean"):
        raise InputError(f"reference must be 'layer1' or 'mean', got {reference!r}")
    K = _vectors(K, "K")
    G = _vectors(G, "G")
    if K.shape != G.shape:
        raise InputError(f"K and G must have the same shape, got {K.shape} and {G.shape}")
    theta, eps, angle, T = _decompose(K, G, poisson=float(poisson), reference=reference)
    return TwistStrain(float(np.degrees(theta)), float(eps * 100), float(np.degrees(angle)), T)


# --------------------------------------------------------------------------- peaks


def _flatten(image, mask):
    """The image less its least-squares plane (over valid pixels).

    The mean and a tilt sit at and next to q = 0, a distance |K| from every moiré
    peak; left in, they leak into the lock-in in proportion to their size.
    """
    image = np.asarray(image, dtype=float)
    valid = np.isfinite(image) if mask is None else np.isfinite(image) & ~np.asarray(mask, bool)
    if not valid.any():
        raise InputError("image has no finite unmasked pixel")
    rows, cols = np.mgrid[: image.shape[0], : image.shape[1]]
    design = np.stack([np.ones(valid.sum()), rows[valid], cols[valid]], axis=1)
    coef, *_ = np.linalg.lstsq(design, image[valid], rcond=None)
    return image - coef[0] - coef[1] * rows - coef[2] * cols


def _noise_std(image):
    """White-noise level from the outer quarter of the spectrum (median of an exponential = ln 2 · mean)."""
    img = image - np.nanmean(image)
    img = np.where(np.isfinite(img), img, 0.0)
    power = np.abs(np.fft.fft2(img)) ** 2
    fy = np.abs(np.fft.fftfreq(img.shape[0]))[:, None]
    fx = np.abs(np.fft.fftfreq(img.shape[1]))[None, :]
    outer = (fy > 0.375) & (fx > 0.375)
    return float(np.sqrt(np.median(power[outer]) / (img.size * math.log(2))))


def _refine_q(image, q, *, sigma_nm, pixel_size, mask, region, iterations=3):
    """q <- q + <grad phi>, the |A|²-weighted mean over ``region`` (docs/methods.md §7: the best sub-pixel estimate).

    Returns the refined q, and the last lock-in field with the q it was taken at
    (its local wavevector q_used + grad phi is valid whatever the small detuning).
    """
    q = np.array(q, dtype=float)
    for _ in range(iterations):
        a = lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=mask)
        grad = phase_gradient(a, pixel_size_nm=pixel_size)  # (2, k, r, c)
        w = np.abs(a) ** 2
        ok = region[None] & np.isfinite(w) & np.all(np.isfinite(grad), axis=0)
        w = np.where(ok, w, 0.0)
        step = np.einsum("ckrs,krs->kc", np.where(ok[None], grad, 0.0), w) / w.sum(axis=(1, 2))[:, None]
        q_used, q = q, q + step
        if np.max(np.hypot(step[:, 0], step[:, 1])) < 1e-7 * np.max(np.hypot(q[:, 0], q[:, 1])):
            break
    return q, a, q_used


def find_moire_q(image, *, pixel_size_nm, q_max_rad_per_nm=None, mask=None, refine=True, n_peaks=24):
    """Find the moiré wavevector triplet: the lowest-|q| strong triplet of peaks summing to zero.

    The spectrum (plane removed, Hann window) is searched for local maxima;
    triplets ±q1 ± q2 ± q3 ≈ 0 of comparable length are candidates (moiré
    fundamentals, their harmonics and the atomic Bragg peaks all form such
    triplets); the moiré is the one of lowest mean |q| that holds at least
    20 % of the power of the strongest triplet up to twice its |q| and 2 % of
    the strongest overall (the search is repeated below a ladder of |q|
    limits, so that many strong atomic peaks cannot hide it). With
    ``refine`` each vector is
    refined by the lock-in phase gradient (docs/methods.md §7).

    Parameters
    ----------
    image : (row, col) array_like
        Topograph or map showing the moiré.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    q_max_rad_per_nm : float, optional
        Ignore peaks beyond this |q| (e.g. below the atomic Bragg peaks).
    mask : (row, col) array of bool, optional
        True where pixels are untrusted (used in the refinement).
    refine : bool
        Refine the FFT peaks with the lock-in phase gradient.
    n_peaks : int
        Number of strongest spectral maxima searched for triplets.

    Returns
    -------
    (3, 2) ndarray
        Moiré wavevectors (qx, qy) in rad/nm, summing to about zero, ordered by angle.

    Raises
    ------
    InputError
        If no triplet is found.

    Examples
    --------
    >>> from domains.synth.moire import twisted_bilayer
    >>> image, truth = twisted_bilayer(shape=(128, 128), pixel_size_nm=0.5, theta_deg=2.0)
    >>> k = find_moire_q(image, pixel_size_nm=0.5)
    >>> bool(np.allclose(np.hypot(*k.T), np.hypot(*truth["moire_q_rad_per_nm"].T), rtol=0.01))
    True
    """
    from skimage.feature import peak_local_max

    pixel_size = pixel_size_pair(pixel_size_nm)
    image = np.asarray(image, dtype=float)
    if image.ndim != 2:
        raise InputError(f"image must be 2-D (row, col), got shape {image.shape}")
    ny, nx = image.shape
    image = _flatten(image, mask)
    flat = np.where(np.isfinite(image), image, 0.0)
    window = np.outer(np.hanning(ny), np.hanning(nx))
    power = np.fft.fftshift(np.abs(np.fft.fft2(flat * window)) ** 2)
    fy = (np.arange(ny) - ny // 2)[:, None]
    fx = (np.arange(nx) - nx // 2)[None, :]
    qy = 2 * np.pi * fy / (ny * pixel_size[0])
    qx = 2 * np.pi * fx / (nx * pixel_size[1])
    # The DC term and the window's main lobe (2 bins) are no peaks.
    power = np.where((np.abs(fy) <= 2) & (np.abs(fx) <= 2), 0.0, power)
    if q_max_rad_per_nm is not None:
        power = np.where(np.hypot(qx, qy) > float(q_max_rad_per_nm), 0.0, power)
    floor = np.median(power[power > 0]) if np.any(power > 0) else 0.0
    qnorm = np.hypot(qx, qy)
    tol = 2.5 * 2 * np.pi / min(ny * pixel_size[0], nx * pixel_size[1])

    # True local maxima of the whole spectrum, one of each +-q pair (a real image's spectrum
    # is symmetric). Maxima are found once: cutting the map at a |q| limit would turn the
    # skirt of a strong peak into false maxima along the cut.
    maxima = [(r, c) for r, c in peak_local_max(power, min_distance=2, threshold_abs=20 * floor, exclude_border=False)
              if fy[r, 0] > 0 or (fy[r, 0] == 0 and fx[0, c] > 0)]
    all_vec = np.array([[qx[0, c], qy[r, 0]] for r, c in maxima]).reshape(-1, 2)
    all_pw = np.array([power[r, c] for r, c in maxima])
    all_norm = np.hypot(all_vec[:, 0], all_vec[:, 1])

    def triplets(limit):
        """Sum-zero triplets among the strongest maxima below |q| = limit."""
        sel = np.nonzero(all_norm < limit)[0]
        sel = sel[np.argsort(all_pw[sel])[::-1][:n_peaks]]
        vec, pw = all_vec[sel], all_pw[sel]
        norms = np.hypot(vec[:, 0], vec[:, 1])
        found = []
        for i in range(len(vec)):
            for j in range(i + 1, len(vec)):
                for s in (1, -1):
                    third = -(vec[i] + s * vec[j])
                    d = np.minimum(np.hypot(*(vec - third).T), np.hypot(*(vec + third).T))
                    m = int(np.argmin(d))
                    if m in (i, j) or d[m] > tol:
                        continue
                    lengths = norms[[i, j, m]]
                    if lengths.max() > 1.6 * lengths.min():
                        continue
                    found.append((pw[i] + pw[j] + pw[m], lengths.mean(), vec[[i, j, m]]))
        return found

    # Strong Bragg clusters can crowd weak moiré peaks out of one candidate list, so the
    # search is repeated below a ladder of |q| limits and the candidates pooled.
    qmin = 3 * 2 * np.pi / min(ny * pixel_size[0], nx * pixel_size[1])
    limit = float(q_max_rad_per_nm) if q_max_rad_per_nm is not None else float(qnorm.max()) * 1.01
    cands = []
    while limit > qmin:
        cands += triplets(limit)
        limit *= 0.6
    if not cands:
        raise InputError("image: no triplet of spectral peaks forming a moiré (q1 + q2 + q3 = 0) was found")
    # The moiré fundamental: the lowest-|q| triplet that is not weak next to the triplets up to
    # twice its |q| (its own harmonics are weaker; stray triplets of noise or leakage are weak
    # next to it), nor negligible (< 2 %) next to the strongest triplet (often the Bragg peaks).
    strongest = max(c[0] for c in cands)

    def plausible(c):
        near = max(d[0] for d in cands if d[1] <= 2 * c[1])
        return c[0] >= 0.02 * strongest and c[0] >= 0.2 * near

    chosen = min((c for c in cands if plausible(c)), key=lambda c: c[1])
    k = _triplet(chosen[2])
    if refine:
        sigma, _ = choose_sigma(k, leakage=0.01)
        sigma = min(sigma, 0.2 * min(ny * pixel_size[0], nx * pixel_size[1]))
        region = trusted_mask(image.shape, sigma_nm=sigma, pixel_size_nm=pixel_size, mask=mask)
        if region.sum() > 0:
            k = _refine_q(image, k, sigma_nm=sigma, pixel_size=pixel_size, mask=mask, region=region)[0]
    return k


# --------------------------------------------------------------------------- maps


@dataclass
class MoireMaps:
    """Local moiré period, twist and heterostrain maps from :func:`moire_maps`.

    Maps are (row, col) on the input grid, NaN where undefined; ``trusted``
    marks pixels at least 2.5 sigma from the frame edge and masked pixels.
    The lock-in samples (``patch_*``, ``lockin_q_rad_per_nm``, ``valid``) let
    :func:`region_fit` measure any region's wavevectors with calibrated errors.
    """

    mode: str
    pixel_size_nm: tuple
    sigma_nm: float
    a_nm: float
    poisson: float
    moire_q_rad_per_nm: np.ndarray
    bragg_q_rad_per_nm: np.ndarray
    local_q_rad_per_nm: np.ndarray
    amplitude: np.ndarray
    period_nm: np.ndarray
    period_nm_err: np.ndarray
    twist_deg: np.ndarray
    twist_deg_err: np.ndarray
    heterostrain_percent: np.ndarray
    heterostrain_percent_err: np.ndarray
    heterostrain_angle_deg: np.ndarray
    trusted: np.ndarray
    maxima_nm: np.ndarray
    triangles: dict
    summary: dict = field(default_factory=dict)
    #: Reference wavevectors of the lock-in (3, 2), rad/nm; its phases are relative to them.
    lockin_q_rad_per_nm: np.ndarray = None
    #: Pixel (row, col) of each lock-in sample for region fits (:func:`region_fit`), (n, 2).
    patch_rc: np.ndarray = None
    #: Grid indices (i, j) of those samples, (n, 2).
    patch_ij: np.ndarray = None
    #: The lock-in fields A_j at those samples, (3, n) complex.
    patch_lockin: np.ndarray = None
    #: Pixels that entered the lock-in (finite and not masked).
    valid: np.ndarray = None


def _solve_orientation(K, a_nm, poisson, near=None):
    """Orientation of the (unseen) hexagonal lattice from the moiré alone.

    With G = R(α) G0 of known length, every α gives some T; the uniaxial model
    with Poisson ratio ν fixes α by λmin + ν λmax = 0 (tension branch). The
    compression branch gives the same |ε| and a twist that differs by about
    (ε/θ)² θ; an image of the moiré alone cannot tell them apart.
    """
    from scipy.optimize import brentq

    alpha0 = math.atan2(K[0, 0], -K[0, 1])  # direction of R(+90°) k_1

    def residual(alpha):
        alpha = np.atleast_1d(alpha)
        G = np.stack([_hex_bragg(a_nm, al) for al in alpha])
        theta, eps, angle, T = _decompose(np.broadcast_to(K, G.shape), G, poisson=poisson, reference="layer1")
        p = _rot_stack(-theta) @ T - np.eye(2)
        lam = np.linalg.eigvalsh(0.5 * (p + np.swapaxes(p, -1, -2)))
        return lam[:, 0] + poisson * lam[:, 1]

    if near is not None:
        # A small change of K moves the root a little: search a narrow bracket first.
        grid = float(near) + np.radians(np.arange(-1.0, 1.001, 0.25))
        values = residual(grid)
        if np.any(np.sign(values[:-1]) != np.sign(values[1:])):
            i = int(np.nonzero(np.sign(values[:-1]) != np.sign(values[1:]))[0][0])
            return float(brentq(lambda al: float(residual(al)[0]), grid[i], grid[i + 1], xtol=1e-13))
    grid = alpha0 + np.radians(np.arange(-30.0, 30.001, 0.25))
    values = residual(grid)
    roots = []
    for i in np.nonzero(np.sign(values[:-1]) != np.sign(values[1:]))[0]:
        roots.append(brentq(lambda al: float(residual(al)[0]), grid[i], grid[i + 1], xtol=1e-13))
    if not roots:
        return float(grid[int(np.argmin(np.abs(values)))])
    return float(min(roots, key=lambda r: abs(r - alpha0)))


def moire_maps(image, moire_q=None, *, pixel_size_nm, a_nm=None, bragg_q=None, sigma_nm=None, mask=None,
               poisson=POISSON_GRAPHENE, leakage=0.002):
    """Local moiré period, twist angle and heterostrain maps by geometric phase analysis of the moiré peaks.

    The lock-in at each moiré wavevector gives the local moiré vectors
    K_j(r) = q_j + ∇φ_j (Hÿtch et al. 1998); with the Bragg vectors G they give
    T(r) = (I - K G⁻¹)^{-T}, and its polar decomposition the local twist and
    heterostrain (docs/methods.md §4). The reference q are first refined to the
    frame's mean wavevectors.

    Two modes:

    - "atomic" (``bragg_q`` given): the Bragg vectors are measured from the
      image (refined, taken as the mean lattice of the two layers).
    - "period" (no ``bragg_q``): a hexagonal lattice of constant ``a_nm`` is
      assumed; its orientation is fixed by the uniaxial heterostrain model
      (tension branch). Without heterostrain this is θ = 2 arcsin(a / 2λ).

    Parameters
    ----------
    image : (row, col) array_like
        Topograph or map showing the moiré.
    moire_q : (2, 2) or (3, 2) array_like, optional
        Moiré wavevectors in rad/nm (any signs); found by :func:`find_moire_q`
        when omitted.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    a_nm : float, optional
        Lattice constant in nm; required in period mode.
    bragg_q : (2, 2) or (3, 2) array_like, optional
        Atomic Bragg wavevectors in rad/nm; selects the atomic mode.
    sigma_nm : float, optional
        Lock-in width; by default the smallest that keeps the leakage of the
        other moiré peaks and the DC term below ``leakage``.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    poisson : float
        Poisson ratio of the uniaxial heterostrain model (0.16 for graphene).
    leakage : float
        Leakage allowed when choosing ``sigma_nm``. A neighbouring peak leaking
        in with weight ℓ makes the local wavevector ripple by about ℓ|K|
        [derived], so the default 0.2 % keeps the twist map's ripple near
        0.2 % of θ (σ ≈ 0.49 λ).

    Returns
    -------
    MoireMaps
        Maps of ``period_nm`` (mean of the three local wavelengths),
        ``twist_deg`` (≥ 0), ``heterostrain_percent`` (|ε|),
        ``heterostrain_angle_deg``, their ``*_err`` (one standard deviation
        from the white-noise level of the image), NaN where a moiré component's
        amplitude falls below a quarter of its median (walls, defects), the
        moiré ``maxima_nm`` and
        per-triangle twists (:func:`triangle_twist`), and a ``summary`` dict
        whose period, twist, heterostrain and axis, with their 1σ ``*_err``,
        come from :func:`region_fit` over the trusted frame (errors calibrated
        on the measured phase noise; docs/methods.md §4). For a field that
        varies, see :func:`twist_domains` and :func:`moire_fields`.

    Raises
    ------
    InputError
        If ``a_nm`` is missing in period mode, q are collinear or beyond
        Nyquist, or the image is not 2-D.

    References
    ----------
    .. [1] M. J. Hÿtch, E. Snoeck, R. Kilaas, Ultramicroscopy 74, 131 (1998).
       doi:10.1016/S0304-3991(98)00035-7
    .. [2] A. Kerelsky et al., Nature 572, 95 (2019). doi:10.1038/s41586-019-1431-9
    .. [3] K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012).
       doi:10.1088/0953-8984/24/31/314210

    Examples
    --------
    >>> from domains.synth.moire import twisted_bilayer
    >>> image, truth = twisted_bilayer(shape=(128, 128), pixel_size_nm=0.5, theta_deg=2.0)
    >>> maps = moire_maps(image, truth["moire_q_rad_per_nm"], pixel_size_nm=0.5, a_nm=0.246)
    >>> round(maps.summary["twist_deg"], 3), maps.summary["mode"]
    (2.0, 'period')
    """
    pixel_size = pixel_size_pair(pixel_size_nm)
    image = np.asarray(image)
    if image.ndim != 2:
        raise InputError(f"image must be 2-D (row, col), got shape {image.shape}")
    if image.dtype.kind not in "biuf":
        raise InputError(f"image must hold real numbers, got dtype {image.dtype}")
    image = _flatten(image.astype(float), mask)
    poisson = float(poisson)
    if bragg_q is None:
        mode = "period"
        if a_nm is None:
            raise InputError("a_nm is required in period mode (no bragg_q given): the twist needs the lattice constant")
        a_nm = positive(a_nm, "a_nm")
    else:
        mode = "atomic"
        bragg_q = _vectors(bragg_q, "bragg_q")
        within_nyquist(bragg_q, pixel_size, "bragg_q")
        if a_nm is not None:
            a_nm = positive(a_nm, "a_nm")
    if moire_q is None:
        q_max = None if bragg_q is None else 0.5 * float(np.min(np.hypot(*bragg_q.T)))
        moire_q = find_moire_q(image, pixel_size_nm=pixel_size, q_max_rad_per_nm=q_max, mask=mask, refine=False)
    K = _vectors(moire_q, "moire_q")
    within_nyquist(K, pixel_size, "moire_q")
    K = _triplet(K)
    if sigma_nm is None:
        sigma_nm, _ = choose_sigma(K, leakage=leakage)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    trusted = trusted_mask(image.shape, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=mask)
    if not trusted.any():
        extent = (image.shape[0] * pixel_size[0], image.shape[1] * pixel_size[1])
        raise InputError(
            f"image of {extent[0]:g} x {extent[1]:g} nm is too small for sigma_nm = {sigma_nm:g} nm: "
            "no pixel lies 2.5 sigma from the edges"
        )
    K, a, k_used = _refine_q(image, K, sigma_nm=sigma_nm, pixel_size=pixel_size, mask=mask, region=trusted)

    if mode == "atomic":
        # The Bragg peaks of the two layers sit K apart; a lock-in that passes both
        # equally (sigma ~ 1/|K|) has its weighted mean gradient at the mean lattice.
        sigma_g = min(sigma_nm, 1.0 / float(np.max(np.hypot(*K.T))))
        region_g = trusted_mask(image.shape, sigma_nm=sigma_g, pixel_size_nm=pixel_size, mask=mask) & trusted
        G = _refine_q(image, bragg_q, sigma_nm=sigma_g, pixel_size=pixel_size, mask=mask, region=region_g)[0]
        G = _match_bragg(K, _triplet(G))
        if a_nm is None:
            a_nm = float(_HEX / np.mean(np.hypot(*G.T)))
        theta0, _, _, _ = _decompose(K, G, poisson=poisson, reference="mean")
        if theta0 < 0:  # label the layers so that the twist is positive
            K, k_used, a = -K, -k_used, np.conj(a)
            G = _match_bragg(K, G)
    else:
        G = _hex_bragg(a_nm, _solve_orientation(K, a_nm, poisson))
    # A measured Bragg peak is the mean of the two layers' peaks; an assumed lattice
    # constant is that of a layer (whose mean with the other layer is shorter by cos(θ/2)).
    reference = "mean" if mode == "atomic" else "layer1"

    theta_g, eps_g, angle_g, _ = _decompose(K, G, poisson=poisson, reference=reference)

    kloc = local_wavevector(a, k_used, pixel_size_nm=pixel_size)  # (2, 3, r, c)
    kpix = np.moveaxis(kloc, (0, 1), (-1, -2))  # (r, c, 3, 2)
    finite = np.all(np.isfinite(kpix), axis=(-1, -2))
    kpix = np.where(finite[..., None, None], kpix, K)

    def quantities(kp):
        theta, eps, angle, _ = _decompose(kp, G, poisson=poisson, reference=reference)
        return np.degrees(theta), np.abs(eps) * 100, np.degrees(angle), _wavelengths(kp).mean(axis=-1)

    theta, eps, angle, period = quantities(kpix)

    # Uncertainty: phase-gradient noise of a lock-in of white noise s_n with a unit-sum
    # Gaussian of width s (pixels): std(d phi/dx) = s_n / (4 sqrt(pi) s^2 |A|) per pixel
    # [derived: sum of (dG/dx)^2 = 1/(8 pi s^4), half of it in the phase direction].
    noise = _noise_std(image)
    s_px = sigma_nm / math.sqrt(pixel_size[0] * pixel_size[1])
    with np.errstate(divide="ignore", invalid="ignore"):
        sk = noise / (4 * math.sqrt(math.pi) * s_px**2 * np.abs(a)) / math.sqrt(pixel_size[0] * pixel_size[1])
    sk = np.where(np.isfinite(sk), sk, np.inf)  # (3, r, c), rad/nm per component
    step = 1e-4 * float(np.mean(np.hypot(*K.T)))
    var = [np.zeros(image.shape) for _ in range(3)]
    base = (theta, eps, period)
    for j in range(kpix.shape[-2]):
        for c in range(2):
            shifted = kpix.copy()
            shifted[..., j, c] += step
            t2, e2, _, p2 = quantities(shifted)
            for v, new, old in zip(var, (t2, e2, p2), base):
                v += ((new - old) / step * sk[j]) ** 2
    theta_err, eps_err, period_err = (np.sqrt(v) for v in var)

    # Where a moiré component nearly vanishes (a wall, a phase slip, a defect) its phase
    # gradient is singular and the local moiré vector undefined.
    amp = np.abs(a)
    ref_amp = np.array([np.nanmedian(amp[j][trusted]) for j in range(len(amp))])
    weak = np.any(amp < WEAK_AMPLITUDE * ref_amp[:, None, None], axis=0)
    undefined = ~finite | weak
    for m in (theta, eps, angle, period, theta_err, eps_err, period_err):
        m[undefined] = np.nan

    sign = 1.0 if theta_g >= 0 else -1.0
    theta = sign * theta
    maxima = moire_maxima(image, pixel_size_nm=pixel_size, period_nm=float(np.mean(_wavelengths(K))), mask=mask)
    tri = triangle_twist(maxima, a_nm)

    t = trusted & ~undefined
    rc, ij = _patch_grid(image.shape, sigma_nm, pixel_size)
    maps = MoireMaps(
        mode=mode, pixel_size_nm=pixel_size, sigma_nm=float(sigma_nm), a_nm=float(a_nm), poisson=poisson,
        moire_q_rad_per_nm=K, bragg_q_rad_per_nm=G, local_q_rad_per_nm=np.moveaxis(kloc, 0, 1),
        amplitude=2 * np.abs(a), period_nm=period, period_nm_err=period_err, twist_deg=theta,
        twist_deg_err=theta_err, heterostrain_percent=eps, heterostrain_percent_err=eps_err,
        heterostrain_angle_deg=angle, trusted=trusted, maxima_nm=maxima, triangles=tri, summary={},
        lockin_q_rad_per_nm=np.asarray(k_used, float), patch_rc=rc, patch_ij=ij,
        patch_lockin=a[:, rc[:, 0], rc[:, 1]],
        valid=np.isfinite(image) if mask is None else np.isfinite(image) & ~np.asarray(mask, bool),
    )
    fit = region_fit(maps, t)
    wl = _wavelengths(K) if fit is None else fit["wavelengths_nm"]
    values = {"twist_deg": abs(math.degrees(theta_g)), "heterostrain_percent": abs(eps_g) * 100,
              "heterostrain_angle_deg": math.degrees(angle_g), "period_nm": float(np.mean(wl))}
    if fit is not None:
        values = {key: fit[key] for key in values}
    summary = {
        "mode": mode,
        "period_nm": values["period_nm"],
        "period_nm_err": None if fit is None else fit["period_nm_err"],
        "wavelengths_nm": [float(v) for v in wl],
        "twist_deg": values["twist_deg"],
        "twist_deg_err": None if fit is None else fit["twist_deg_err"],
        "twist_deg_std": float(np.nanstd(theta[t])),
        "twist_deg_min": float(np.nanmin(theta[t])),
        "twist_deg_max": float(np.nanmax(theta[t])),
        "heterostrain_percent": values["heterostrain_percent"],
        "heterostrain_percent_err": None if fit is None else fit["heterostrain_percent_err"],
        "heterostrain_angle_deg": values["heterostrain_angle_deg"],
        "heterostrain_angle_deg_err": None if fit is None else fit["heterostrain_angle_deg_err"],
        "n_patches": 0 if fit is None else fit["n_patches"],
        "closure_ratio": None if fit is None else fit["closure_ratio"],
        "twist_from_maxima_deg": float(np.median(tri["twist_deg"])) if len(tri["twist_deg"]) else None,
        "twist_from_maxima_deg_std": float(np.std(tri["twist_deg"])) if len(tri["twist_deg"]) else None,
        "n_triangles": int(len(tri["twist_deg"])),
        "a_nm": float(a_nm),
        "poisson": poisson,
        "sigma_nm": float(sigma_nm),
        "moire_q_rad_per_nm": (K if fit is None else fit["moire_q_rad_per_nm"]).tolist(),
        "bragg_q_rad_per_nm": (G if fit is None else fit["bragg_q_rad_per_nm"]).tolist(),
    }
    maps.summary = summary
    return maps


# --------------------------------------------------------------------------- calibrated errors


#: Spacing of the lock-in samples used for a region's wavevectors, in units of sigma. Lock-in values
#: of white noise a distance d apart correlate by exp(-d^2 / 4 sigma^2) [derived: the autocorrelation
#: of the unit-sum Gaussian kernel], 61 % at sqrt(2) sigma; the fit takes that correlation into
#: account. Sampled that densely the lock-in field loses little (its power spectrum has fallen to
#: exp(-pi^2 / 2) = 0.7 % at the samples' Nyquist frequency), while a denser grid would make the
#: correlation matrix so ill-conditioned that the whitening amplifies the leakage ripple [measured:
#: at spacing sigma the errors came out 3 x the scatter over noise realisations].
PATCH_SPACING_SIGMA = math.sqrt(2.0)

_PHI_2 = 0.9772498680518208  # standard normal CDF at 2: a 2-sigma interval holds 95.45 %


def _patch_grid(shape, sigma_nm, pixel_size):
    """Lock-in sample pixels (row, col) at half the fit's spacing, centred on the frame, and their grid indices.

    A region's fit uses one of the four sub-grids of even or odd indices (spacing
    :data:`PATCH_SPACING_SIGMA` σ), the one that puts most samples inside it.
    """
    axes, index = [], []
    for n, d in zip(shape, pixel_size):
        step = max(0.5 * PATCH_SPACING_SIGMA * float(sigma_nm) / d, 1.0)  # distinct pixels
        centre = (n - 1) / 2
        k = int(math.floor(centre / step))
        axes.append(np.clip(np.round(centre + step * np.arange(-k, k + 1)).astype(int), 0, n - 1))
        index.append(np.arange(2 * k + 1))
    rr, cc = np.meshgrid(*axes, indexing="ij")
    ii, jj = np.meshgrid(*index, indexing="ij")
    return np.stack([rr.ravel(), cc.ravel()], axis=1), np.stack([ii.ravel(), jj.ravel()], axis=1)


def _geometry(K, *, mode, a_nm, poisson, G, near=None):
    """Twist (deg, >= 0), |heterostrain| (%), its axis (deg) and mean period (nm) of one triplet K.

    In period mode the (unseen) lattice's orientation is solved again for this K (near the
    angle ``near``, rad, when given), so that its dependence on K enters the propagated errors.
    """
    if mode == "period":
        G = _hex_bragg(a_nm, _solve_orientation(K, a_nm, poisson, near=near))
    theta, eps, angle, _ = _decompose(K, G, poisson=poisson, reference="mean" if mode == "atomic" else "layer1")
    return np.array([abs(math.degrees(float(theta))), abs(float(eps)) * 100, math.degrees(float(angle)),
                     float(_wavelengths(K).mean())]), G


def _edge_phases(valid, rc, dk, sigma_nm, pixel_size):
    """Phase that the normalised lock-in adds, near invalid pixels, to components detuned by dk from the reference.

    For a component a exp(i(q + dk).r) the lock-in at q gives a exp(i dk.r) B(r) with
    B(r) = sum_u G(u) w(r + u) exp(i dk.u) (w the valid pixels) [derived]; B is real where the
    Gaussian's reach (4 sigma) holds no invalid pixel. Returns arg B, shape (len(dk), len(rc)).
    """
    dy, dx = pixel_size
    out = np.zeros((len(dk), len(rc)))
    if valid is None:
        return out
    ry, rx = int(math.ceil(4 * sigma_nm / dy)), int(math.ceil(4 * sigma_nm / dx))
    uy, ux = np.arange(-ry, ry + 1) * dy, np.arange(-rx, rx + 1) * dx
    g = np.exp(-uy[:, None] ** 2 / (2 * sigma_nm**2)) * np.exp(-ux[None, :] ** 2 / (2 * sigma_nm**2))
    padded = np.pad(np.asarray(valid, bool), ((ry, ry), (rx, rx)), constant_values=False)
    near = [i for i, (r, c) in enumerate(rc) if not padded[r:r + 2 * ry + 1, c:c + 2 * rx + 1].all()]
    if not near:
        return out
    waves = [np.exp(1j * d[1] * uy)[:, None] * np.exp(1j * d[0] * ux)[None, :] for d in np.asarray(dk, float)]
    for i in near:
        r, c = rc[i]
        gw = g * padded[r:r + 2 * ry + 1, c:c + 2 * rx + 1]
        for j, wave in enumerate(waves):
            out[j, i] = np.angle(np.sum(gw * wave))
    return out


def _fit_component(z, x, y, dk0, chol):
    """Plane phi0 + dk.(r - r_mean) through the wrapped phases of z by generalised least squares.

    The phase noise of sample i has variance proportional to 1/|z_i|^2 and samples correlate
    as the lock-in does, rho_ij = exp(-d_ij^2 / 4 sigma^2);
    the model is whitened by L^-1 D with D = diag|z| (``chol`` holds L^-1, L the correlation's
    Cholesky factor). Returns dk, its covariance (scaled by the
    whitened residual variance) and the degrees of freedom.
    """
    n = z.size
    xm, ym = x - x.mean(), y - y.mean()
    X = np.stack([np.ones(n), xm, ym], axis=1)
    d = np.abs(z) / np.sqrt(np.mean(np.abs(z) ** 2))
    whiten = chol * d[None, :]  # L^-1 D, L the Cholesky factor of the correlation (chol holds L^-1)

    def white(v):
        return whiten @ v

    Xw = white(X)
    solve = np.linalg.pinv(Xw)
    phi = np.angle(z)
    w = d**2
    p = np.array([np.angle(np.sum(w * z * np.exp(-1j * (dk0[0] * xm + dk0[1] * ym)))), dk0[0], dk0[1]])
    for _ in range(50):
        model = X @ p
        target = model + np.angle(np.exp(1j * (phi - model)))
        new = solve @ white(target)
        done = np.allclose(new, p, rtol=0, atol=1e-12)
        p = new
        if done:
            break
    res = white(np.angle(np.exp(1j * (phi - X @ p))))
    dof = n - 3
    s2 = float(res @ res / dof)
    cov = s2 * np.linalg.inv(Xw.T @ Xw)
    return p[1:], cov[1:, 1:], dof


def region_fit(maps, region):
    """Moiré wavevectors, twist, heterostrain and period of one region, with calibrated errors.

    The lock-in field of each moiré component is read on a grid of samples
    √2 σ apart (:data:`PATCH_SPACING_SIGMA`) inside ``region``; a plane
    φ0 + δk·r fitted to the (wrapped) phases by generalised least squares gives
    the region's wavevector q_j + δk_j. The samples' phase noise has variance
    ∝ 1/|A|² and correlates between samples as the lock-in of white noise does,
    exp(−d²/4σ²) [derived]; the fit whitens both, and its covariance is
    scaled by the measured (whitened) phase scatter about the plane, so it
    holds the noise actually present and any real variation of the field, and
    its effective number of independent patches is that of the region's area
    over the lock-in's reach. The 1σ errors are scaled by t_ν(0.9772)/2
    (Student t, ν = n − 3), so that ±2 errors hold 95.45 % although the
    scatter is estimated (JCGM 100:2008, G.3), and by the Birge ratio of the
    closure k1 + k2 + k3 = 0 (exact for any homogeneous layer transform)
    when the three wavevectors disagree beyond their errors (a χ² test of the
    closure at 5 %; R. T. Birge, Phys. Rev. 40, 207 (1932)). Twist,
    heterostrain, its axis and the mean period follow from the three
    wavevectors (docs/methods.md §4); their
    errors are propagated through the Jacobian (forward differences).

    Parameters
    ----------
    maps : MoireMaps
        From :func:`moire_maps`.
    region : (row, col) array of bool
        Pixels of the region (e.g. a twist domain's trusted core).

    Returns
    -------
    dict or None
        ``twist_deg``, ``heterostrain_percent``, ``heterostrain_angle_deg``, ``period_nm``
        and their ``*_err`` (1σ), ``wavelengths_nm``, ``moire_q_rad_per_nm`` (3, 2),
        ``moire_q_cov`` (3, 2, 2 covariance of each wavevector, (rad/nm)²), ``bragg_q_rad_per_nm``,
        ``n_patches``, ``dof``, ``closure_ratio`` (Birge ratio, 1 when the three agree
        within their errors); None when the region holds fewer than four samples
        or they lie on one row or column.

    References
    ----------
    .. [1] D. C. Rife, R. R. Boorstyn, "Single-tone parameter estimation from
       discrete-time observations", IEEE Trans. Inf. Theory 20, 591 (1974).
       doi:10.1109/TIT.1974.1055282
    .. [2] R. T. Birge, "The calculation of errors by the method of least
       squares", Phys. Rev. 40, 207 (1932). doi:10.1103/PhysRev.40.207
    .. [3] JCGM 100:2008, Evaluation of measurement data: Guide to the expression
       of uncertainty in measurement, annex G.

    Examples
    --------
    >>> from domains.synth.moire import twisted_bilayer
    >>> image, truth = twisted_bilayer(shape=(160, 160), pixel_size_nm=0.5, theta_deg=1.5, noise=0.5, rng=1)
    >>> maps = moire_maps(image, truth["moire_q_rad_per_nm"], pixel_size_nm=0.5, a_nm=0.246)
    >>> fit = region_fit(maps, maps.trusted)
    >>> bool(abs(fit["twist_deg"] - 1.5) < 3 * fit["twist_deg_err"] + 1e-9), fit["n_patches"] >= 4
    (True, True)
    """
    from scipy import stats
    from scipy.linalg import solve_triangular

    region = np.asarray(region, bool)
    if maps.patch_rc is None or region.shape != maps.trusted.shape:
        raise InputError(f"region must be a bool map of shape {maps.trusted.shape} for these moiré maps")
    rc = maps.patch_rc
    z_all = maps.patch_lockin
    usable = region[rc[:, 0], rc[:, 1]] & np.all(np.isfinite(z_all), axis=0) & np.all(z_all != 0, axis=0)
    # Of the four sub-grids at the fit's spacing, the one with most samples in the region.
    parity = maps.patch_ij % 2
    best = max(((oi, oj) for oi in (0, 1) for oj in (0, 1)),
               key=lambda o: int(np.sum(usable & (parity[:, 0] == o[0]) & (parity[:, 1] == o[1]))))
    inside = usable & (parity[:, 0] == best[0]) & (parity[:, 1] == best[1])
    n = int(inside.sum())
    if n < 4:
        return None
    dy, dx = maps.pixel_size_nm
    x, y = rc[inside, 1] * dx, rc[inside, 0] * dy
    if np.ptp(x) == 0 or np.ptp(y) == 0:
        return None  # samples on one line fix the wavevector along it only
    d2 = (x[:, None] - x[None]) ** 2 + (y[:, None] - y[None]) ** 2
    try:
        lower = np.linalg.cholesky(np.exp(-d2 / (4 * maps.sigma_nm**2)) + 1e-10 * np.eye(n))
    except np.linalg.LinAlgError:
        return None  # samples too close for their correlation to be inverted
    chol = solve_triangular(lower, np.eye(n), lower=True)  # L^-1, applied to every component
    # Start from the |A|^2-weighted mean local wavevector of the region, so that the wrapped
    # phases of neighbouring patches differ by less than pi.
    kq = maps.local_q_rad_per_nm  # (3, 2, row, col)
    w = np.where(region, maps.amplitude ** 2, 0.0)
    ok = np.all(np.isfinite(kq), axis=1) & region[None]
    k_used = np.asarray(maps.lockin_q_rad_per_nm, float)
    dk = []
    for j in range(len(k_used)):
        wj = np.where(ok[j], w[j], 0.0)
        dk.append((np.array([np.sum(np.where(ok[j], kq[j, c], 0.0) * wj) for c in range(2)]) / wj.sum()
                   - k_used[j]) if wj.sum() > 0 else np.zeros(2))
    z = z_all[:, inside]
    bias = np.zeros(z.shape)
    for _ in range(4):
        fits = [_fit_component(z[j] * np.exp(-1j * bias[j]), x, y, dk[j], chol) for j in range(len(k_used))]
        dk = [f[0] for f in fits]
        # Near the frame edge or a mask the normalised lock-in shifts the phase of a component detuned
        # from its reference; remove that shift, computed for the fitted detuning, and fit again.
        new = _edge_phases(maps.valid, rc[inside], np.array(dk), maps.sigma_nm, maps.pixel_size_nm)
        if np.max(np.abs(new - bias), initial=0.0) < 1e-6:
            break
        bias = new
    K = k_used + np.array(dk)
    covs = np.array([f[1] for f in fits])
    dof = fits[0][2]
    # Student t with nu = n - 3: +-2 errors hold 95.45 % although the scatter comes from n samples.
    t_factor = float(stats.t.ppf(_PHI_2, dof)) / 2
    closure = K.sum(axis=0)
    chi2 = float(closure @ np.linalg.solve(covs.sum(axis=0), closure)) if len(K) == 3 else 0.0
    # Inflate only when the closure fails a chi-square test at 5 % (2 degrees of freedom): a Birge
    # ratio from two numbers scatters widely, and inflating on every chance excess over 1 would
    # make the errors too large for pure noise.
    birge = math.sqrt(chi2 / 2) if chi2 > stats.chi2.ppf(0.95, 2) else 1.0
    covs = covs * (t_factor * birge) ** 2
    mode, G = maps.mode, np.asarray(maps.bragg_q_rad_per_nm, float)
    kw = dict(mode=mode, a_nm=maps.a_nm, poisson=maps.poisson, G=G)
    f0, G0 = _geometry(K, **kw)
    kw["near"] = math.atan2(G0[0, 1], G0[0, 0])
    # Forward differences: with a step of 1e-4 |K| the Jacobian is good to about 1e-4 relative,
    # far below what an error bar needs.
    step = 1e-4 * float(np.mean(np.hypot(*K.T)))
    jac = np.zeros((4, K.size))
    for i in range(K.size):
        dK = np.zeros(K.size)
        dK[i] = step
        diff = _geometry(K + dK.reshape(K.shape), **kw)[0] - f0
        diff[2] = (diff[2] + 90) % 180 - 90  # the axis lives on [0, 180)
        jac[:, i] = diff / step
    cov_k = np.zeros((K.size, K.size))
    for j in range(len(K)):
        cov_k[2 * j:2 * j + 2, 2 * j:2 * j + 2] = covs[j]
    err = np.sqrt(np.maximum(np.diag(jac @ cov_k @ jac.T), 0))
    # An axis known to no better than a uniform guess on [0, 180) has the error of that guess.
    err[2] = min(err[2], 180 / math.sqrt(12))
    wl = _wavelengths(K)
    return {
        "twist_deg": float(f0[0]), "twist_deg_err": float(err[0]),
        "heterostrain_percent": float(f0[1]), "heterostrain_percent_err": float(err[1]),
        "heterostrain_angle_deg": float(f0[2]), "heterostrain_angle_deg_err": float(err[2]),
        "period_nm": float(f0[3]), "period_nm_err": float(err[3]),
        "wavelengths_nm": wl, "moire_q_rad_per_nm": K, "moire_q_cov": covs, "bragg_q_rad_per_nm": G0,
        "n_patches": n, "dof": int(dof), "closure_ratio": float(math.sqrt(chi2 / 2)),
    }


# --------------------------------------------------------------------------- maxima


def moire_maxima(image, *, pixel_size_nm, period_nm, mask=None):
    """Sub-pixel positions of the moiré maxima (the bright sites of the pattern).

    The image is smoothed with a Gaussian of width λ/8, which removes atomic
    detail and noise but keeps the moiré; local maxima at least 0.6 λ apart
    and above the median, and at least λ/4 from the frame edge, are kept and
    refined by a parabola through the 3 x 3 neighbourhood.

    Parameters
    ----------
    image : (row, col) array_like
        Topograph or map.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    period_nm : float
        Moiré period λ in nm.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted; maxima there are dropped.

    Returns
    -------
    (n, 2) ndarray
        Positions (x, y) in nm.

    Examples
    --------
    >>> y, x = np.mgrid[:64, :64] * 0.5
    >>> k = 2 * np.pi / 8.0
    >>> image = np.cos(k * (x - 1.3)) + np.cos(k * (y - 2.1))
    >>> p = moire_maxima(image, pixel_size_nm=0.5, period_nm=8.0)
    >>> bool(np.allclose(np.mod(p - [1.3, 2.1] + 4, 8.0) - 4, 0, atol=0.05))
    True
    """
    from skimage.feature import peak_local_max

    dy, dx = pixel_size_pair(pixel_size_nm)
    period_nm = positive(period_nm, "period_nm")
    image = np.asarray(image, dtype=float)
    bad = ~np.isfinite(image) if mask is None else ~np.isfinite(image) | np.asarray(mask, bool)
    filled = np.where(bad, np.nanmean(image[~bad]) if (~bad).any() else 0.0, image)
    smooth = ndimage.gaussian_filter(filled, (period_nm / 8 / dy, period_nm / 8 / dx), mode="nearest")
    min_dist = max(1, int(0.6 * period_nm / max(dy, dx)))
    # Within a quarter period of the frame edge the smoothing is one-sided and biased.
    border = max(1, int(math.ceil(0.25 * period_nm / min(dy, dx))))
    peaks = peak_local_max(smooth, min_distance=min_dist, threshold_abs=float(np.median(smooth)),
                           exclude_border=border)
    out = []
    for r, c in peaks:
        if bad[max(r - 1, 0): r + 2, max(c - 1, 0): c + 2].any():
            continue
        win = smooth[r - 1: r + 2, c - 1: c + 2]
        d_r = _parabola_offset(win[0, 1], win[1, 1], win[2, 1])
        d_c = _parabola_offset(win[1, 0], win[1, 1], win[1, 2])
        out.append(((c + d_c) * dx, (r + d_r) * dy))
    return np.array(out, dtype=float).reshape(-1, 2)


def _parabola_offset(left, centre, right):
    denom = left - 2 * centre + right
    if denom >= 0:
        return 0.0
    return float(np.clip(0.5 * (left - right) / denom, -0.5, 0.5))


def triangle_twist(points, a_nm, *, max_distortion=0.3):
    """Local twist per Delaunay triangle of moiré maxima, θ = 2 arcsin(a / 2 l̄).

    l̄ is the mean edge length of the triangle; a second estimate independent
    of the lock-in (Hermann 2012). Triangles whose edges differ from the median
    edge by more than ``max_distortion`` (relative), such as the long thin
    triangles along the hull, are dropped.

    Parameters
    ----------
    points : (n, 2) array_like
        Maxima (x, y) in nm, e.g. from :func:`moire_maxima`.
    a_nm : float
        Lattice constant in nm.
    max_distortion : float
        Largest relative deviation of an edge from the median edge length.

    Returns
    -------
    dict
        ``triangles`` (m, 3) point indices, ``centroids_nm`` (m, 2),
        ``period_nm`` (m,) mean edge, ``twist_deg`` (m,).

    References
    ----------
    .. [1] K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012).
       doi:10.1088/0953-8984/24/31/314210

    Examples
    --------
    >>> lam = 12.814
    >>> pts = [[i * lam + j * lam / 2, j * lam * np.sqrt(3) / 2] for i in range(4) for j in range(4)]
    >>> res = triangle_twist(pts, 0.246)
    >>> len(res["twist_deg"]), round(float(np.median(res["twist_deg"])), 3)
    (18, 1.1)
    """
    from scipy.spatial import Delaunay

    a_nm = positive(a_nm, "a_nm")
    points = np.asarray(points, dtype=float).reshape(-1, 2)
    empty = {"triangles": np.zeros((0, 3), int), "centroids_nm": np.zeros((0, 2)),
             "period_nm": np.zeros(0), "twist_deg": np.zeros(0)}
    if len(points) < 3:
        return empty
    try:
        tri = Delaunay(points).simplices
    except Exception:  # all points collinear: no triangles
        return empty
    p = points[tri]
    edges = np.stack([np.hypot(*(p[:, 1] - p[:, 0]).T), np.hypot(*(p[:, 2] - p[:, 1]).T),
                      np.hypot(*(p[:, 0] - p[:, 2]).T)], axis=1)
    median = np.median(edges)
    good = np.all(np.abs(edges / median - 1) <= max_distortion, axis=1)
    lengths = edges[good].mean(axis=1)
    ok = lengths > a_nm / 2
    return {
        "triangles": tri[good][ok],
        "centroids_nm": p[good][ok].mean(axis=1),
        "period_nm": lengths[ok],
        "twist_deg": np.degrees(2 * np.arcsin(a_nm / (2 * lengths[ok]))),
    }


# --------------------------------------------------------------------------- domains


@dataclass
class TwistDomains:
    """Twist-angle domains from :func:`twist_domains`.

    Attributes
    ----------
    labels : (row, col) int32
        Domains 1..N covering every valid pixel of the frame; 0 on the one-pixel
        walls between domains and on invalid (masked) pixels.
    grown : (row, col) int32
        The same before the walls were cut out (no gaps between domains).
    walls : (row, col) bool
        One-pixel walls between two twist domains (:func:`domains.segment.thin_walls`).
    core : (row, col) int32
        Where each domain was found: trusted pixels within half a tolerance of
        its level, opened by the resolution (the seeds of ``grown``).
    boundaries : (row, col) bool
        Same as ``walls`` (kept for earlier callers).
    table : list of dict
        One row per domain.
    tolerance_deg, tolerance_source, min_area_nm2
        The thresholds used and where the tolerance came from.
    """

    labels: np.ndarray
    boundaries: np.ndarray
    table: list
    tolerance_deg: float
    tolerance_source: str
    min_area_nm2: float
    grown: np.ndarray = None
    walls: np.ndarray = None
    core: np.ndarray = None


def _nearest_level(values, levels):
    """Index of the level nearest to each value (ties: the lower index, as ``argmin``), O(N log L) in memory N."""
    order = np.argsort(levels, kind="stable")
    ordered_levels = levels[order]
    hi = np.clip(np.searchsorted(ordered_levels, values), 0, levels.size - 1)
    lo = np.clip(hi - 1, 0, levels.size - 1)
    d_lo = np.abs(values - ordered_levels[lo])
    d_hi = np.abs(values - ordered_levels[hi])
    take_hi = (d_hi < d_lo) | ((d_hi == d_lo) & (order[hi] < order[lo]))
    nearest = np.where(take_hi, order[hi], order[lo])
    # Values with no finite distance (inf) go to level 0, as argmin over all-inf does.
    return np.where(np.isfinite(values), nearest, 0)


def twist_domains(twist_deg_map, *, pixel_size_nm, tolerance_deg=None, twist_err_deg=None, min_area_nm2=None,
                  resolution_nm=None, trusted=None, valid=None):
    """Twist-angle domains covering the frame: connected regions of one twist range, grown to meet at walls.

    Twist levels are picked greedily from the histogram of the trusted
    pixels (the most populated window of width ``tolerance_deg`` first, then
    the next among the remaining pixels); each pixel within half a tolerance
    of a level joins it. Each level's region is opened with a disk of radius
    ``resolution_nm``/2 (so strips narrower than the maps' resolution, such
    as the transition across a sharp twist boundary, are not domains), split
    into connected components, and
    components smaller than ``min_area_nm2`` are dropped: these are the
    domains' cores (``core``). With ``resolution_nm`` given, the levels come
    only from pixels where the twist is flat at that resolution (it changes by
    less than half a tolerance over ``resolution_nm``), and a level needs
    ``min_area_nm2`` of them: the blend across a sharp boundary is no level,
    and a twist gradient steeper than that has no domains. The cores are then grown over every valid pixel
    of the frame, each pixel joining the nearest core it is connected to
    through valid pixels (a watershed flood on the distance to the cores):
    the band where the lock-in blends two twists (about 2.6 σ wide, 10-90 %)
    is split down its middle, and the border where the maps are not trusted
    (within 2.5 σ of the frame edge) goes to the domain it continues. Walls are
    the one-pixel lines where two grown domains meet.
    The opening is two thresholds of exact Euclidean distance transforms, so
    its cost does not grow with the radius; it equals ``scipy.ndimage.binary_opening``
    by the disc {i^2 + j^2 <= r^2} with ``border_value=0`` (outside the frame
    counts as outside the region, so straight frame edges survive and only
    corners thinner than the disc are lost there). Memory is linear in the
    number of pixels, whatever the number of levels and domains.

    Parameters
    ----------
    twist_deg_map : (row, col) array_like
        Local twist in degrees (e.g. ``MoireMaps.twist_deg``), NaN where undefined.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    tolerance_deg : float, optional
        Width of one twist range. By default four times the median twist
        uncertainty (``twist_err_deg``), but at least 2 % of the median twist,
        the precision to which the rigid-layer moiré model itself holds.
    twist_err_deg : float or (row, col) array_like, optional
        Twist uncertainty (``MoireMaps.twist_deg_err``).
    min_area_nm2 : float, optional
        Smallest domain; by default π·resolution², a disk one resolution in
        radius (or 1 % of the trusted area when no resolution is given).
    resolution_nm : float, optional
        Spatial resolution of the map (the lock-in sigma).
    trusted : (row, col) array of bool, optional
        Pixels whose twist is trusted (e.g. ``MoireMaps.trusted``): the levels
        and the cores come from them alone.
    valid : (row, col) array of bool, optional
        Pixels the domains may cover (default: all; e.g. not masked).

    Returns
    -------
    TwistDomains
        ``labels`` (int32, domains covering the valid frame, 0 on walls and
        invalid pixels), ``grown`` (no walls cut out), ``walls`` (bool, one
        pixel thin), ``core`` (where each domain was found), ``table`` (one
        dict per domain: ``id``, ``twist_deg_mean``, ``twist_deg_std`` (over
        its core), ``area_nm2``, ``centroid_x_nm``, ``centroid_y_nm`` (over
        ``labels``), ``touches_edge`` (reaches the frame edge: cut by the frame)),
        and the ``tolerance_deg`` used with where it came from.

    Raises
    ------
    InputError
        If the map is not 2-D or holds no finite trusted pixel.

    Examples
    --------
    >>> twist = np.where(np.arange(80)[None, :] < 40, 1.0, 1.3) * np.ones((80, 1))
    >>> trusted = np.zeros((80, 80), bool); trusted[10:-10, 10:-10] = True
    >>> dom = twist_domains(twist, pixel_size_nm=1.0, tolerance_deg=0.05, trusted=trusted)
    >>> len(dom.table), sorted(round(d["twist_deg_mean"], 2) for d in dom.table)
    (2, [1.0, 1.3])
    >>> int((dom.grown > 0).sum()), int(dom.walls.sum()), [d["touches_edge"] for d in dom.table]
    (6400, 80, [True, True])
    """
    pixel_size = pixel_size_pair(pixel_size_nm)
    twist = np.asarray(twist_deg_map, dtype=float)
    if twist.ndim != 2:
        raise InputError(f"twist_deg_map must be 2-D (row, col), got shape {twist.shape}")
    use = np.isfinite(twist)
    if trusted is not None:
        trusted = np.asarray(trusted, dtype=bool)
        if trusted.shape != twist.shape:
            raise InputError(f"trusted shape {trusted.shape} differs from twist_deg_map shape {twist.shape}")
        use &= trusted
    if not use.any():
        raise InputError("twist_deg_map has no finite trusted pixel")
    values = twist[use]
    median_twist = float(np.median(values))
    floor = 0.02 * abs(median_twist)
    if tolerance_deg is None:
        if twist_err_deg is not None:
            err = np.asarray(twist_err_deg, dtype=float)
            err = float(np.nanmedian(err[use] if err.shape == twist.shape else err))
            tolerance_deg = max(4 * err, floor)
            source = ("4 x median twist uncertainty" if 4 * err >= floor else "2 % of the median twist (above 4 x uncertainty)")
        else:
            tolerance_deg, source = floor, "2 % of the median twist (no uncertainty given)"
        if tolerance_deg <= 0:
            tolerance_deg, source = 1e-3, "fallback 0.001 deg (zero twist)"
    else:
        tolerance_deg = positive(tolerance_deg, "tolerance_deg")
        source = "given"
    area_px = pixel_size[0] * pixel_size[1]
    if min_area_nm2 is None:
        min_area_nm2 = (math.pi * float(resolution_nm) ** 2 if resolution_nm is not None
                        else 0.01 * use.sum() * area_px)

    # Greedy histogram levels, from the pixels where the twist is flat at the maps' resolution: across
    # a boundary the maps blend two twists over about 2.6 sigma, and the blend's values are no level.
    # Flat: the twist changes by less than half a tolerance over one resolution length.
    if resolution_nm is not None:
        filled = np.where(np.isfinite(twist), twist, np.nanmedian(values))
        gy, gx = np.gradient(filled, *pixel_size)
        values = twist[use & (np.hypot(gx, gy) * float(resolution_nm) <= tolerance_deg / 2)]
    levels = []
    remaining = np.sort(values)
    while remaining.size:
        lo = np.searchsorted(remaining, remaining - tolerance_deg / 2, side="left")
        hi = np.searchsorted(remaining, remaining + tolerance_deg / 2, side="right")
        i = int(np.argmax(hi - lo))
        if (hi[i] - lo[i]) * area_px < min_area_nm2:
            break  # no level left with the area of a domain (greedy: later windows hold fewer pixels)
        inside = remaining[lo[i]:hi[i]]
        level = float(np.mean(inside))
        levels.append(level)
        remaining = remaining[np.abs(remaining - level) > tolerance_deg / 2]
    levels = np.array(levels)

    nearest = _nearest_level(np.where(use, twist, np.inf), levels)
    assigned = use & (np.abs(np.where(use, twist, np.inf) - levels[nearest]) <= tolerance_deg / 2)
    labels = np.zeros(twist.shape, dtype=np.int32)
    radius_px = 0.0 if resolution_nm is None else 0.5 * float(resolution_nm) / max(pixel_size)
    min_px = min_area_nm2 / area_px
    next_id = 1
    level_map = np.where(assigned, nearest + 1, 0)
    for k, box in enumerate(ndimage.find_objects(level_map), start=1):
        if box is None:
            continue
        # Work in the bounding box, grown by the opening radius.
        pad = int(math.ceil(radius_px)) + 1
        box = tuple(slice(max(b.start - pad, 0), b.stop + pad) for b in box)
        region = level_map[box] == k
        if region.sum() < min_px:
            continue
        if radius_px >= 1:
            # Opening by a disk via two distance transforms: erode (distance > r), then dilate.
            core = ndimage.distance_transform_edt(np.pad(region, 1)) [1:-1, 1:-1] > radius_px
            region = region & (ndimage.distance_transform_edt(~core) <= radius_px) if core.any() else core
        comp, n = ndimage.label(region)
        if n == 0:
            continue
        sizes = np.bincount(comp.ravel())[1:]
        big = np.nonzero(sizes >= min_px)[0] + 1
        # One lookup relabels the kept components (no full-box mask per component).
        lut = np.zeros(n + 1, dtype=np.int32)
        lut[big] = np.arange(next_id, next_id + big.size, dtype=np.int32)
        new = lut[comp]
        sub = labels[box]
        sub[new > 0] = new[new > 0]
        next_id += big.size

    # Grow the cores over the valid frame: each pixel joins the nearest core it is connected to.
    from skimage.segmentation import watershed

    from .segment import thin_walls

    core = labels
    if valid is None:
        valid = np.ones(twist.shape, bool)
    else:
        valid = np.asarray(valid, dtype=bool)
        if valid.shape != twist.shape:
            raise InputError(f"valid shape {valid.shape} differs from twist_deg_map shape {twist.shape}")
    if core.any():
        distance = ndimage.distance_transform_edt(core == 0, sampling=pixel_size)
        grown = watershed(distance, markers=core, mask=valid | (core > 0)).astype(np.int32)
    else:
        grown = core.copy()
    walls = thin_walls(grown)
    labels = np.where(walls, 0, grown).astype(np.int32)

    # Per-domain sums in one pass over the frame (a mask per domain would cost N x domains):
    # twist statistics over the cores (trusted, within the tolerance), areas over the labels.
    table = []
    flat = core.ravel()
    inside = flat > 0
    lab_in = flat[inside]
    count = np.bincount(lab_in, minlength=next_id).astype(float)
    vals = twist.ravel()[inside]
    mean = np.bincount(lab_in, weights=vals, minlength=next_id) / np.maximum(count, 1)
    var = np.bincount(lab_in, weights=(vals - mean[lab_in]) ** 2, minlength=next_id) / np.maximum(count, 1)
    flat = labels.ravel()
    inside = flat > 0
    lab_in = flat[inside]
    area = np.bincount(lab_in, minlength=next_id).astype(float)
    rows, cols = np.divmod(np.nonzero(inside)[0], labels.shape[1])
    row_mean = np.bincount(lab_in, weights=rows, minlength=next_id) / np.maximum(area, 1)
    col_mean = np.bincount(lab_in, weights=cols, minlength=next_id) / np.maximum(area, 1)
    edge = np.zeros(next_id, bool)
    for side in (labels[0], labels[-1], labels[:, 0], labels[:, -1]):
        edge[side[side > 0]] = True
    for lab in range(1, next_id):
        table.append({
            "id": lab,
            "twist_deg_mean": float(mean[lab]),
            "twist_deg_std": float(math.sqrt(var[lab])),
            "area_nm2": float(area[lab] * area_px),
            "centroid_x_nm": float(col_mean[lab] * pixel_size[1]),
            "centroid_y_nm": float(row_mean[lab] * pixel_size[0]),
            "touches_edge": bool(edge[lab]),
        })
    return TwistDomains(labels=labels, boundaries=walls, table=table, tolerance_deg=float(tolerance_deg),
                        tolerance_source=source, min_area_nm2=float(min_area_nm2), grown=grown, walls=walls,
                        core=core)


# --------------------------------------------------------------------------- fields


#: A distribution has separate modes when the density halfway between two levels falls below this
#: fraction of the smaller level's density (the half-maximum convention for resolving two peaks;
#: common practice, no source).
DIP_RATIO = 0.5

#: A twist domain's own values are fitted this many sigma from its walls, where the lock-in's kernel
#: puts Phi(-2) = 2.3 % of its weight across the wall [derived].
WALL_MARGIN_SIGMA = 2.0

#: Two twist domains disagree when their values differ by more than this many combined errors.
DISAGREE_SIGMA = 3.0

_FIELDS = (("twist_deg", "twist", "°", 4), ("period_nm", "period", " nm", 4),
           ("heterostrain_percent", "heterostrain", " %", 3))


@dataclass
class MoireFields:
    """Twist, period and heterostrain as fields, from :func:`moire_fields`.

    Attributes
    ----------
    table : list of dict
        One row per twist domain: the domain's values from its own wavevectors
        with calibrated errors (:func:`region_fit`), its area and edge contact.
    summary : dict
        Frame statistics to merge into the ``moire`` block of summary.json:
        ``<q>_median``, ``<q>_q25``, ``<q>_q75`` over the trusted frame,
        ``<q>_distribution`` ("uniform", "varies" or "multimodal") and
        ``<q>_levels`` (the twist domains' values, those agreeing within 3
        errors merged: ``value``, ``err``, ``area_fraction``) for q in
        twist_deg, period_nm, heterostrain_percent, ``multimodal`` and
        ``field_note``. The frame value of each quantity (``<q>``, ``<q>_err``,
        and ``heterostrain_angle_deg`` with its error) is the twist domains'
        merged value where it is uniform, and the median with no error
        (``<q>_err`` None) where it varies.
    notes : list of str
        The same in words.
    """

    table: list
    summary: dict
    notes: list


def _with_error(value, error, unit=""):
    """'1.30016 ± 0.00036 unit': the value to the last decimal of its error's two significant digits."""
    if error is None or not np.isfinite(error) or error <= 0:
        return f"{value:.4g}{unit}"
    decimals = max(0, 1 - int(math.floor(math.log10(error))))
    return f"{value:.{decimals}f} ± {error:.2g}{unit}"


def _groups(values, errors, weights):
    """Merge levels that agree within DISAGREE_SIGMA combined errors: (value, error, weight) per group, sorted."""
    order = np.argsort(values)
    groups = []
    for i in order:
        v, e, w = values[i], errors[i], weights[i]
        if groups:
            gv, ge, gw = groups[-1]
            if abs(v - gv) <= DISAGREE_SIGMA * math.hypot(e, ge):
                total = gw + w
                groups[-1] = ((gv * gw + v * w) / total, math.hypot(ge * gw, e * w) / total, total)
                continue
        groups.append((v, e, w))
    return groups


def _dip_ratios(pixels, levels):
    """Density halfway between neighbouring levels over that at the smaller of the two (windows of a sixth)."""
    pixels = np.sort(pixels)
    out = []
    for lo, hi in zip(levels[:-1], levels[1:]):
        half = (hi - lo) / 6

        def count(centre, half=half):
            return np.searchsorted(pixels, centre + half) - np.searchsorted(pixels, centre - half)

        peak = min(count(lo), count(hi))
        out.append(count(0.5 * (lo + hi)) / peak if peak > 0 else math.inf)
    return out


def moire_fields(maps, domains):
    """Twist, period and heterostrain summarised per twist domain and over the frame, with a flag for multimodality.

    Each twist domain's values come from its own moiré wavevectors, fitted on
    the patches of its trusted part farther than 2σ from a wall (where the
    lock-in does not mix in the neighbour), with calibrated errors
    (:func:`region_fit`). Over the trusted frame each local map is
    summarised by its median and quartiles. A quantity *varies* when two
    twist domains, or two quarters of the trusted frame fitted on their own,
    disagree by more than 3 combined errors; it is
    *multimodal* when, besides, the density of its trusted pixels halfway
    between two disagreeing levels falls below half the density at the
    smaller level (a dip between separate modes, :data:`DIP_RATIO`), which
    a continuous gradient does not show. A quantity that varies has no single
    value: its frame value becomes the median, with no error.

    Parameters
    ----------
    maps : MoireMaps
        From :func:`moire_maps`.
    domains : TwistDomains
        From :func:`twist_domains` on ``maps.twist_deg``.

    Returns
    -------
    MoireFields

    References
    ----------
    .. [1] M. J. Hÿtch, E. Snoeck, R. Kilaas, Ultramicroscopy 74, 131 (1998).
       doi:10.1016/S0304-3991(98)00035-7

    Examples
    --------
    >>> from domains.synth.moire import twisted_bilayer
    >>> image, _ = twisted_bilayer(shape=(320, 320), pixel_size_nm=0.3, regions=[1.0, 1.3], noise=0.2, rng=1)
    >>> maps = moire_maps(image, pixel_size_nm=0.3, a_nm=0.246)
    >>> dom = twist_domains(maps.twist_deg, pixel_size_nm=0.3, twist_err_deg=maps.twist_deg_err,
    ...                     resolution_nm=maps.sigma_nm, trusted=maps.trusted)
    >>> fields = moire_fields(maps, dom)
    >>> fields.summary["twist_deg_distribution"], sorted(round(r["twist_deg"], 2) for r in fields.table)
    ('multimodal', [1.0, 1.3])
    """
    t = maps.trusted & np.isfinite(maps.twist_deg)
    labels = np.asarray(domains.labels)
    walls = np.asarray(domains.walls if domains.walls is not None else domains.boundaries, bool)
    far = ndimage.distance_transform_edt(~walls, sampling=maps.pixel_size_nm) > WALL_MARGIN_SIGMA * maps.sigma_nm
    total = float((labels > 0).sum())
    table = []
    for row in domains.table:
        lab = row["id"]
        fit = region_fit(maps, (labels == lab) & maps.trusted & far)
        out = {"id": lab}
        for key, *_ in _FIELDS + (("heterostrain_angle_deg",),):
            out[key] = math.nan if fit is None else fit[key]
            out[f"{key}_err"] = math.nan if fit is None else fit[f"{key}_err"]
        if fit is None:
            # No room for a plane fit (narrower than the lock-in's reach on both sides of its walls):
            # the mean of the local maps over the domain's core, and their spread there as a
            # (conservative) error; the core excludes the band where two twists blend.
            inside = (np.asarray(domains.core) == lab) & t if domains.core is not None else (labels == lab) & t
            for key in ("twist_deg", "period_nm", "heterostrain_percent"):
                values = getattr(maps, key)[inside]
                values = values[np.isfinite(values)]
                out[key] = float(values.mean()) if values.size else math.nan
                out[f"{key}_err"] = float(values.std()) if values.size > 1 else math.nan
            doubled = np.radians(2 * maps.heterostrain_angle_deg[inside])
            doubled = doubled[np.isfinite(doubled)]
            if doubled.size > 1:
                resultant = np.mean(np.exp(1j * doubled))
                out["heterostrain_angle_deg"] = float(np.degrees(np.angle(resultant)) / 2 % 180)
                # circular standard deviation of the doubled angle, halved (Mardia & Jupp 2000, §2.3.4)
                spread = math.sqrt(max(-2 * math.log(max(abs(resultant), 1e-300)), 0.0))
                out["heterostrain_angle_deg_err"] = float(min(np.degrees(spread) / 2, 180 / math.sqrt(12)))
        out["error_from"] = "fit" if fit is not None else "spread"
        out.update({
            "twist_deg_mean": row["twist_deg_mean"], "twist_deg_std": row["twist_deg_std"],
            "area_nm2": row["area_nm2"],
            "area_fraction": row["area_nm2"] / (total * maps.pixel_size_nm[0] * maps.pixel_size_nm[1]) if total else math.nan,
            "centroid_x_nm": row["centroid_x_nm"], "centroid_y_nm": row["centroid_y_nm"],
            "touches_edge": row["touches_edge"], "n_patches": 0 if fit is None else fit["n_patches"],
            "closure_ratio": math.nan if fit is None else fit["closure_ratio"],
        })
        table.append(out)

    # Does the field vary where no two twist domains tell? The four quarters of the trusted frame, each
    # fitted on its own, must agree within DISAGREE_SIGMA combined errors (a gradient fails this).
    rows_t, cols_t = np.nonzero(t)
    quarters = []
    if rows_t.size:
        r_mid, c_mid = np.median(rows_t), np.median(cols_t)
        rr, cc = np.ogrid[:t.shape[0], :t.shape[1]]
        for top in (True, False):
            for left in (True, False):
                part = t & ((rr < r_mid) if top else (rr >= r_mid)) & ((cc < c_mid) if left else (cc >= c_mid))
                fit = region_fit(maps, part)
                if fit is not None:
                    quarters.append(fit)

    summary, notes = {}, []
    for key, name, unit, digits in _FIELDS:
        pixels = getattr(maps, key)[t]
        pixels = pixels[np.isfinite(pixels)]
        q25, median, q75 = (np.percentile(pixels, [25, 50, 75]) if pixels.size else (math.nan,) * 3)
        summary[f"{key}_median"], summary[f"{key}_q25"], summary[f"{key}_q75"] = float(median), float(q25), float(q75)
        rows = [r for r in table if np.isfinite(r[key]) and np.isfinite(r[f"{key}_err"])]
        groups = _groups(np.array([r[key] for r in rows]), np.array([r[f"{key}_err"] for r in rows]),
                         np.array([r["area_nm2"] for r in rows])) if rows else []
        kind = "uniform"
        if len(groups) > 1:
            kind = "varies"
            if min(_dip_ratios(pixels, [g[0] for g in groups])) < DIP_RATIO:
                kind = "multimodal"
        elif len(_groups(np.array([f[key] for f in quarters]), np.array([f[f"{key}_err"] for f in quarters]),
                         np.ones(len(quarters)))) > 1:
            kind = "varies"
        summary[f"{key}_distribution"] = kind
        area = sum(r["area_nm2"] for r in table) or 1.0
        summary[f"{key}_levels"] = [{"value": float(g[0]), "err": float(g[1]), "area_fraction": float(g[2] / area)}
                                    for g in groups]
        spread = (f"median {median:.{digits}g}{unit}, interquartile range {q25:.{digits}g}–{q75:.{digits}g}{unit} "
                  "over the trusted frame")
        if kind == "multimodal":
            weight = sum(g[2] for g in groups)
            modes = " and ".join(f"{_with_error(g[0], g[1], unit)} ({100 * g[2] / weight:.0f} % of the area)"
                                 for g in groups)
            notes.append(f"The {name} is multimodal: twist domains at {modes}; no single {name} describes the "
                         f"frame ({spread}).")
        elif kind == "varies":
            why = (f"its {len(rows)} twist domains differ beyond their errors, without separate modes" if len(groups) > 1
                   else "the quarters of the frame differ beyond their errors")
            notes.append(f"The {name} varies over the frame ({spread}): {why}.")
        if kind != "uniform":
            summary[key] = float(median)
            summary[f"{key}_err"] = None
        elif groups:
            # One level: the domains' values, merged (with one domain, its own fit).
            summary[key], summary[f"{key}_err"] = float(groups[0][0]), float(groups[0][1])
    # The heterostrain axis is an axial angle (0-180 deg): the area-weighted mean of the doubled angles.
    rows = [r for r in table if np.isfinite(r["heterostrain_angle_deg"]) and np.isfinite(r["heterostrain_angle_deg_err"])]
    if rows and summary["heterostrain_percent_distribution"] == "uniform":
        w = np.array([r["area_nm2"] for r in rows])
        doubled = np.radians(2 * np.array([r["heterostrain_angle_deg"] for r in rows]))
        mean = math.degrees(math.atan2(np.sum(w * np.sin(doubled)), np.sum(w * np.cos(doubled)))) / 2 % 180
        err = math.sqrt(np.sum((w * np.array([r["heterostrain_angle_deg_err"] for r in rows])) ** 2)) / w.sum()
        summary["heterostrain_angle_deg"], summary["heterostrain_angle_deg_err"] = float(mean), float(err)
    elif rows:
        summary["heterostrain_angle_deg_err"] = None
    summary["multimodal"] = any(summary[f"{key}_distribution"] == "multimodal" for key, *_ in _FIELDS)
    summary["field_note"] = " ".join(notes) if notes else "Twist, period and heterostrain are uniform within their errors."
    return MoireFields(table=table, summary=summary, notes=notes)
