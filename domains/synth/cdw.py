"""Synthetic CDW and stripe scenes with analytically known domains, walls, drift and bias contrast."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from .._errors import InputError
from .._lattice import bragg_vectors
from .._scan import Scan, pixel_size_pair


@dataclass
class Scene:
    """A synthetic scene: the images a microscope would give, and the truth behind them.

    Attributes
    ----------
    kind : str
        "cdw", "stripes" or "moire"; from :mod:`domains.synth.real` also "supercell_cdw",
        "incommensurate_cdw" or "bilayer".
    topography : Scan
        The topograph (heights in nm).
    maps : list of Scan
        Conductance maps (nS), one per bias, on the same pixel grid as the topograph.
    truth : dict
        JSON-ready numbers: lattice, wavevectors, variants, phases, drift amplitude.
    truth_maps : dict of ndarray
        Pixel maps of the truth: ``labels`` (int32, 1..N, no 0), ``variant``,
        ``order_amplitude`` (|psi| per component), ``displacement`` (2, row, col) nm.
    """

    kind: str
    topography: Scan
    maps: list = field(default_factory=list)
    truth: dict = field(default_factory=dict)
    truth_maps: dict = field(default_factory=dict)


def _rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _coordinates(shape, pixel_size):
    dy, dx = pixel_size
    y, x = np.mgrid[: shape[0], : shape[1]].astype(float)
    return x * dx, y * dy


def voronoi_labels(shape, n_domains, *, rng=None, min_separation_px=None):
    """A Voronoi layout: each pixel labelled 1..n by its nearest random seed.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    n_domains : int
        Number of seeds (domains), at least 1.
    rng : int or numpy.random.Generator, optional
        Randomness.
    min_separation_px : float, optional
        Seeds are drawn again until all are at least this far apart
        (default: a third of the mean seed spacing), so that no domain is a sliver.

    Returns
    -------
    labels : ndarray of int32
        Labels 1..n_domains.
    seeds : ndarray, shape (n, 2)
        Seed positions (row, col) in pixels.

    Examples
    --------
    >>> labels, seeds = voronoi_labels((64, 64), 4, rng=1)
    >>> sorted(np.unique(labels).tolist())
    [1, 2, 3, 4]
    """
    rng = _rng(rng)
    if n_domains < 1:
        raise InputError(f"n_domains must be at least 1, got {n_domains}")
    if min_separation_px is None:
        min_separation_px = np.sqrt(shape[0] * shape[1] / n_domains) / 3
    seeds = np.empty((0, 2))
    while len(seeds) < n_domains:
        # Keep seeds a margin away from the frame so every domain owns real area.
        candidate = rng.uniform(0.08, 0.92, 2) * shape
        if len(seeds) == 0 or np.min(np.hypot(*(seeds - candidate).T)) >= min_separation_px:
            seeds = np.vstack([seeds, candidate])
    rows, cols = np.mgrid[: shape[0], : shape[1]]
    d2 = (rows[None] - seeds[:, 0, None, None]) ** 2 + (cols[None] - seeds[:, 1, None, None]) ** 2
    return (np.argmin(d2, axis=0) + 1).astype(np.int32), seeds


def smooth_partition(labels, wall_width_px):
    """Weights w_d(r) of each label, smoothed by a Gaussian of the wall width; they sum to one.

    A wall between two domains is then a step convolved with a Gaussian of
    standard deviation ``wall_width_px``, and at its centre both weights are 1/2.
    A width of 0 gives sharp walls.

    Parameters
    ----------
    labels : ndarray of int
        Labels 1..N.
    wall_width_px : float
        Gaussian standard deviation of the wall profile, pixels.

    Returns
    -------
    ndarray, shape (N, row, col)
        The weights.

    Examples
    --------
    >>> labels = np.ones((8, 8), int); labels[:, 4:] = 2
    >>> w = smooth_partition(labels, 1.0)
    >>> bool(np.allclose(w.sum(axis=0), 1))
    True
    """
    ids = np.arange(1, labels.max() + 1)
    weights = np.stack([(labels == i).astype(float) for i in ids])
    if wall_width_px > 0:
        weights = np.stack([ndimage.gaussian_filter(w, wall_width_px, mode="nearest") for w in weights])
    return weights


def cdw_variant_phases(n, m1, m2):
    """Phases of the three CDW components for the translational variant (m1, m2) of an n x n CDW.

    Translating the CDW by R = m1 a1 + m2 a2 shifts component j by -Q_j . R =
    -2 pi n_j / n with n_j = G_j . R / 2 pi = (m1, m2, -m1 - m2) (docs/methods.md §5).

    Parameters
    ----------
    n : int
        Superlattice order (n x n).
    m1, m2 : int
        Translation in units of the lattice vectors.

    Returns
    -------
    ndarray, shape (3,)
        Phases in radians, wrapped to (-pi, pi].

    Examples
    --------
    >>> np.round(cdw_variant_phases(3, 1, 0) / (2 * np.pi / 3), 6) + 0.0
    array([-1.,  0.,  1.])
    """
    phases = -2 * np.pi * np.array([m1, m2, -m1 - m2], dtype=float) / n
    return np.angle(np.exp(1j * phases))


def smooth_drift(shape, pixel_size, amplitude_nm, rng):
    """A smooth displacement field (ux, uy) in nm: a few long-wavelength sinusoids plus a linear creep."""
    x, y = _coordinates(shape, pixel_size)
    height, width = shape[0] * pixel_size[0], shape[1] * pixel_size[1]
    u = np.zeros((2,) + tuple(shape))
    for comp in range(2):
        for _ in range(2):
            kx, ky = rng.uniform(0.3, 1.2, 2) * 2 * np.pi / np.array([width, height]) * rng.choice([-1, 1], 2)
            u[comp] += np.sin(kx * x + ky * y + rng.uniform(0, 2 * np.pi))
    u *= amplitude_nm / max(np.abs(u).max(), 1e-12)
    # A slow creep along the slow-scan axis, typical of piezo relaxation (common practice, no source).
    u[0] += 0.3 * amplitude_nm * (y / height - 0.5)
    return u


def cdw_scene(
    *,
    shape=(512, 512),
    pixel_size_nm=0.056,
    a_nm=0.337,
    n=3,
    angle_deg=8.0,
    n_domains=6,
    wall_width_nm=0.25,
    drift_nm=0.1,
    lattice_nm=0.02,
    cdw_nm=0.012,
    noise_nm=0.004,
    tilt_nm=0.4,
    line_offset_nm=0.01,
    biases_V=(-0.25, 0.25),
    labels=None,
    variants=None,
    rng=0,
):
    """A commensurate n x n CDW on a hexagonal lattice, in translational domains.

    The topograph is T(r) = t_lat sum_j cos(G_j.s) + t_cdw Re sum_j psi_j(r) exp(i Q_j.s)
    with s = r + u(r) (a smooth drift, Lawler et al. 2010), Q_j = G_j / n, and
    psi_j = sum_d w_d(r) exp(i phi_j^d), w_d a smooth partition of a Voronoi
    layout, so that at a wall centre |psi_j| = |cos(dphi_j / 2)|. Then a tilted
    plane, a random offset per scan line and white noise are added.

    Two conductance maps follow at ``biases_V``: the same lattice term, and a CDW
    term whose sign flips between the two biases (a contrast inversion,
    dphi = pi for every component), plus noise.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float
        Pixel size in nm.
    a_nm : float
        Lattice constant in nm (an invented layered crystal).
    n : int or None
        Superlattice order (n x n); None or 0 for a scene with no CDW.
    angle_deg : float
        Direction of the first lattice vector from the x axis.
    n_domains : int
        Number of Voronoi domains; each gets a random translational variant,
        neighbouring domains always different.
    wall_width_nm : float
        Gaussian standard deviation of the wall profile; 0 for sharp slips.
    drift_nm : float
        Largest drift displacement in nm.
    lattice_nm, cdw_nm : float
        Amplitude of each atomic and each CDW component in the topograph (nm).
    noise_nm : float
        Standard deviation of the white noise per pixel (nm).
    tilt_nm : float
        Height change of the background plane across the frame (nm).
    line_offset_nm : float
        Standard deviation of the random offset of each scan line (row).
    biases_V : sequence of float
        Biases of the conductance maps (the first is taken as filled states).
    labels : (row, col) int array, optional
        A domain layout of your own (labels 1..N) instead of the Voronoi one.
    variants : sequence of (int, int), optional
        The variant (m1, m2) of each domain, instead of random ones.
    rng : int or numpy.random.Generator
        Randomness (seed).

    Returns
    -------
    Scene
        With ``truth`` holding the lattice, the Bragg and CDW wavevectors, the
        variant (m1, m2) and phases of each domain, and ``truth_maps`` the
        labels, variant index, |psi_j| and the displacement field.

    References
    ----------
    .. [1] W. L. McMillan, "Theory of discommensurations and the
       commensurate-incommensurate charge-density-wave phase transition",
       Phys. Rev. B 14, 1496 (1976). doi:10.1103/PhysRevB.14.1496

    Examples
    --------
    >>> scene = cdw_scene(shape=(128, 128), n_domains=3, rng=2)
    >>> scene.topography.shape, len(scene.maps), scene.truth["n"]
    ((128, 128), 2, 3)
    """
    rng = _rng(rng)
    pixel_size = pixel_size_pair(pixel_size_nm)
    shape = tuple(int(s) for s in shape)
    x, y = _coordinates(shape, pixel_size)
    bragg = bragg_vectors("hexagonal", a_nm, angle_deg)
    u = smooth_drift(shape, pixel_size, drift_nm, rng) if drift_nm else np.zeros((2,) + shape)
    sx, sy = x + u[0], y + u[1]

    lattice = sum(np.cos(g[0] * sx + g[1] * sy) for g in bragg)
    if labels is None:
        labels, seeds = voronoi_labels(shape, n_domains, rng=rng)
    else:
        labels = np.asarray(labels, dtype=np.int32)
        if labels.shape != shape or labels.min() < 1:
            raise InputError(f"labels must have shape {shape} and values 1..N, got {labels.shape}, min {labels.min()}")
        n_domains = int(labels.max())
        seeds = np.array([np.mean(np.nonzero(labels == d), axis=1) for d in range(1, n_domains + 1)])
    truth = {
        "lattice": {"kind": "hexagonal", "a_nm": a_nm, "angle_deg": angle_deg, "q_bragg_rad_per_nm": bragg.tolist()},
        "n": int(n) if n else None,
        "n_domains": int(n_domains),
        "drift_nm": drift_nm,
        "wall_width_nm": wall_width_nm,
        "noise_nm": noise_nm,
        "cdw_nm": cdw_nm,
        "lattice_nm": lattice_nm,
    }
    truth_maps = {"labels": labels, "displacement": u}
    cdw = np.zeros(shape)
    if n:
        q_cdw = bragg / n
        if variants is None:
            variants = _assign_variants(labels, n, rng)
        elif len(variants) != n_domains:
            raise InputError(f"variants must give one (m1, m2) per domain ({n_domains}), got {len(variants)}")
        phases = np.array([cdw_variant_phases(n, *variants[d]) for d in range(n_domains)])
        weights = smooth_partition(labels, wall_width_nm / pixel_size[0])
        psi = np.einsum("drc,dj->jrc", weights, np.exp(1j * phases))
        for j, q in enumerate(q_cdw):
            cdw += np.real(psi[j] * np.exp(1j * (q[0] * sx + q[1] * sy)))
        variant_index = np.array([m1 * n + m2 for m1, m2 in variants])
        truth.update(
            q_cdw_rad_per_nm=q_cdw.tolist(),
            domains=[
                {"label": d + 1, "variant": [int(v) for v in variants[d]], "phases_rad": phases[d].tolist(),
                 "seed_row_col": seeds[d].tolist()}
                for d in range(n_domains)
            ],
            contrast_phase_shift_rad=float(np.pi),
        )
        truth_maps["variant"] = variant_index[labels - 1].astype(np.int32)
        truth_maps["order_amplitude"] = np.abs(psi)

    height, width = shape[0] * pixel_size[0], shape[1] * pixel_size[1]
    tilt_dir = rng.uniform(0, 2 * np.pi)
    plane = tilt_nm * ((x / width - 0.5) * np.cos(tilt_dir) + (y / height - 0.5) * np.sin(tilt_dir))
    lines = rng.normal(0, line_offset_nm, shape[0])[:, None] if line_offset_nm else 0.0
    topo = lattice_nm * lattice + cdw_nm * cdw + plane + lines + rng.normal(0, noise_nm, shape)
    topography = Scan(topo, pixel_size_nm=pixel_size, channel="topography", bias_V=biases_V[-1] if biases_V else None,
                      setpoint_A=1e-10, source="<synthetic cdw scene>", metadata={"units": "nm"})

    maps = []
    # Conductance (nS): constant background, lattice contrast, CDW contrast inverting with bias.
    relative_noise = noise_nm / max(cdw_nm, 1e-12)
    for k, bias in enumerate(biases_V or ()):
        sign = -1.0 if k == 0 and len(biases_V) > 1 else 1.0
        g = 1.0 + 0.05 * lattice + sign * 0.08 * cdw + rng.normal(0, 0.08 * relative_noise, shape)
        maps.append(Scan(g, pixel_size_nm=pixel_size, channel="conductance", bias_V=float(bias), setpoint_A=1e-10,
                         source=f"<synthetic cdw scene, {bias:+.2f} V>", metadata={"units": "nS"}))
    return Scene("cdw", topography, maps, truth, truth_maps)


def _assign_variants(labels, n, rng, candidates=None):
    """A random variant (m1, m2) per domain, with neighbouring domains always different.

    ``candidates``, if given, is a function of the domain label (1..N) returning the
    list of hashable variants that domain may take (default: the n^2 pairs (m1, m2)).
    """
    n_domains = int(labels.max())
    neighbours = {d: set() for d in range(1, n_domains + 1)}
    for a, b in ((labels[:, :-1], labels[:, 1:]), (labels[:-1], labels[1:])):
        edge = a != b
        for p, q in set(zip(a[edge].tolist(), b[edge].tolist())):
            neighbours[p].add(q)
            neighbours[q].add(p)
    all_variants = [(m1, m2) for m1 in range(n) for m2 in range(n)]
    order = sorted(neighbours, key=lambda d: -len(neighbours[d]))
    chosen = {}

    def place(i):
        # Backtracking colouring: a Voronoi layout is planar, so n^2 >= 4 variants always suffice.
        if i == len(order):
            return True
        d = order[i]
        taken = {chosen[e] for e in neighbours[d] if e in chosen}
        options = all_variants if candidates is None else list(candidates(d))
        for k in rng.permutation(len(options)):
            if options[k] not in taken:
                chosen[d] = options[k]
                if place(i + 1):
                    return True
                del chosen[d]
        return False

    if not place(0):
        raise InputError(f"cannot give {n_domains} domains variants that differ between neighbours with n = {n}"
                         + ("" if candidates is None else " and the given candidates"))
    return [chosen[d] for d in range(1, n_domains + 1)]


def stripe_scene(
    *,
    shape=(512, 512),
    pixel_size_nm=0.05,
    a_nm=0.31,
    period_a=4,
    angle_deg=3.0,
    n_domains=5,
    wall_width_nm=0.3,
    lattice_nm=0.02,
    stripe_nm=0.015,
    noise_nm=0.004,
    tilt_nm=0.3,
    line_offset_nm=0.0,
    rng=0,
):
    """Unidirectional (stripe) order on a square lattice, in orientational domains.

    Each domain holds stripes along one of the two lattice directions, q = G_x /
    ``period_a`` or q = G_y / ``period_a``; at a wall the two orders cross over
    smoothly (a step convolved with a Gaussian of the wall width).

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float
        Pixel size in nm.
    a_nm : float
        Square lattice constant in nm (invented).
    period_a : int
        Stripe period in lattice constants.
    angle_deg : float
        Direction of the first lattice vector from the x axis.
    n_domains : int
        Number of Voronoi domains, alternating orientation between neighbours
        where the layout allows.
    wall_width_nm : float
        Gaussian standard deviation of the crossover.
    lattice_nm, stripe_nm, noise_nm, tilt_nm, line_offset_nm : float
        Amplitudes (nm) of the lattice, the stripes, the noise, the tilt and the
        scan-line offsets.
    rng : int or numpy.random.Generator
        Randomness (seed).

    Returns
    -------
    Scene
        ``truth_maps["orientation"]`` holds 0 (stripes along q of G_x) or 1 per pixel;
        ``truth_maps["labels"]`` the domains (connected regions of one orientation and one translational
        variant, ``truth["n_domains"]`` of them), ``truth_maps["cells"]`` the Voronoi cells;
        ``truth["q_stripe_rad_per_nm"]`` the two stripe wavevectors.

    Examples
    --------
    >>> scene = stripe_scene(shape=(128, 128), n_domains=3, rng=1)
    >>> sorted(np.unique(scene.truth_maps["orientation"]).tolist())
    [0, 1]
    """
    rng = _rng(rng)
    pixel_size = pixel_size_pair(pixel_size_nm)
    shape = tuple(int(s) for s in shape)
    x, y = _coordinates(shape, pixel_size)
    bragg = bragg_vectors("square", a_nm, angle_deg)
    q_stripe = bragg / period_a
    labels, seeds = voronoi_labels(shape, n_domains, rng=rng)
    orientation_of = np.array([d % 2 for d in range(n_domains)])
    if len(set(orientation_of.tolist())) < 2 and n_domains > 1:
        orientation_of[-1] = 1 - orientation_of[0]
    weights = smooth_partition(labels, wall_width_nm / pixel_size[0])
    # A commensurate stripe of period p has p translational variants, phases 2 pi m / p: each cell draws
    # one, so a phase slip between cells of one orientation is a multiple of 2 pi / p (a continuous slip
    # below pi / p would not be a domain wall of a commensurate order at all).
    variant_of = rng.integers(0, period_a, n_domains)
    phases = 2 * np.pi * variant_of / period_a
    stripes = np.zeros(shape)
    for d in range(n_domains):
        q = q_stripe[orientation_of[d]]
        stripes += weights[d] * np.cos(q[0] * x + q[1] * y + phases[d])
    lattice = sum(np.cos(g[0] * x + g[1] * y) for g in bragg)
    height, width = shape[0] * pixel_size[0], shape[1] * pixel_size[1]
    plane = tilt_nm * (x / width - 0.5)
    lines = rng.normal(0, line_offset_nm, shape[0])[:, None] if line_offset_nm else 0.0
    topo = lattice_nm * lattice + stripe_nm * stripes + plane + lines + rng.normal(0, noise_nm, shape)
    topography = Scan(topo, pixel_size_nm=pixel_size, channel="topography", bias_V=0.1, setpoint_A=1e-10,
                      source="<synthetic stripe scene>", metadata={"units": "nm"})
    truth = {
        "lattice": {"kind": "square", "a_nm": a_nm, "angle_deg": angle_deg, "q_bragg_rad_per_nm": bragg.tolist()},
        "q_stripe_rad_per_nm": q_stripe.tolist(),
        "period_nm": period_a * a_nm,
        "n_domains": int(n_domains),
        "domains": [{"label": d + 1, "orientation": int(orientation_of[d])} for d in range(n_domains)],
        "wall_width_nm": wall_width_nm,
        "noise_nm": noise_nm,
    }
    orientation = orientation_of[labels - 1].astype(np.int32)
    # Neighbouring Voronoi cells may share an orientation: the orientational domains are
    # the connected regions of one orientation.
    regions = sum(ndimage.label(orientation == o)[1] for o in (0, 1))
    truth["n_orientation_domains"] = int(regions)
    # The domains: connected regions of one orientation and one translational variant (two touching cells
    # that drew the same variant are one domain).
    state = (orientation_of * period_a + variant_of)[labels - 1]
    domain_map = np.zeros(shape, np.int32)
    for s in np.unique(state):
        found, _ = ndimage.label(state == s)
        domain_map[found > 0] = found[found > 0] + domain_map.max()
    truth["n_domains"] = int(domain_map.max())
    truth["domains"] = [{"label": d + 1, "orientation": int(orientation_of[d]), "variant": int(variant_of[d])}
                        for d in range(n_domains)]
    truth_maps = {"labels": domain_map, "cells": labels, "orientation": orientation,
                  "displacement": np.zeros((2,) + shape)}
    return Scene("stripes", topography, [], truth, truth_maps)

