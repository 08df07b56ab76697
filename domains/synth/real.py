"""Hostile synthetic scenes: what a real microscope gives, with an analytically known truth.

Every scene here is rendered in two stages.

1. The periodic part (atoms, CDW, moiré) is evaluated at material coordinates
   s = r + u(r), where u is the scan displacement of :class:`Conditions`
   (thermal drift accumulating per row, exponentially decaying piezo creep and
   the lateral jump of a tip change). Nothing is resampled, so the truth stays
   analytic and ``truth_maps["displacement"]`` is exactly the u used.
2. Additive artefacts follow: terrace steps (also at s, they belong to the
   sample), the tip change's contrast and offset, a tilted plane, 1/f noise,
   per-line offsets, white noise, and finally glitched scan rows.

The superlattice scenes describe a commensurate CDW by an integer supercell
matrix M (A_super = M A, rows real-space basis vectors), whose reciprocal basis
is B_super = M^{-T} B; the CDW wavevectors are the shortest vectors of B_super
that are not Bragg vectors, and the |det M| lattice translations distinct modulo
the superlattice are the translational variants (docs/methods.md §8).

Every scene is invented: lattices, sizes and layouts belong to no real material
or measurement.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import ndimage

from .._errors import InputError
from .._lattice import bragg_vectors, real_basis, reciprocal_basis
from .._scan import Scan, pixel_size_pair
from .cdw import Scene, _assign_variants, _rng, smooth_partition, voronoi_labels
from .moire import twisted_bilayer

__all__ = ["Conditions", "scan_displacement", "supercell_geometry", "supercell_cdw_scene",
           "incommensurate_cdw_scene", "bilayer_scene", "real_scene", "REAL_SCENES", "electronic_types_scene"]

# Lattice-coordinate maps of the hexagonal point group (act on row vectors m: m -> m P).
_MIRROR = np.array([[1, 0], [1, -1]])  # reflection about a1: a1 -> a1, a2 -> a1 - a2
_ROT60 = np.array([[0, 1], [-1, 1]])  # rotation by 60 degrees: a1 -> a2, a2 -> a2 - a1


# --------------------------------------------------------------------------- conditions


def _pair(value, name):
    try:
        out = tuple(float(v) for v in np.broadcast_to(np.asarray(value, dtype=float), (2,)))
    except (TypeError, ValueError):
        raise InputError(f"{name} must be one number or an (x, y) pair, got {value!r}") from None
    if not all(math.isfinite(v) for v in out):
        raise InputError(f"{name} must be finite, got {value!r}")
    return out


@dataclass(frozen=True)
class Conditions:
    """Scan imperfections, all off by default, each in physical units.

    Attributes
    ----------
    thermal_drift_nm_per_line : (float, float)
        Linear drift (dx, dy) in nm accumulated per scan row: u = drift * row.
    creep_nm : (float, float)
        Piezo creep (x, y) in nm at row 0, decaying as u = creep * exp(-row / creep_lines).
    creep_lines : float
        Decay length of the creep, in rows.
    tip_change_row : int or None
        First row scanned with the changed tip (None: no tip change).
    tip_change_contrast : float
        Factor on the corrugation from ``tip_change_row`` on.
    tip_change_offset_nm : float
        Height offset added from ``tip_change_row`` on.
    tip_change_shift_px : (float, float)
        Lateral jump (x, y) of the image content, in pixels, from ``tip_change_row`` on;
        rendered into the coordinates as a displacement.
    glitch_lines : int
        Number of isolated scan rows replaced by garbage (noise and spikes).
    steps : int
        Number of terrace steps crossing the frame (straight or gently curved).
    step_height_nm : float
        Height of each step; each terrace is raised by it.
    tilt_nm : float
        Height change of a background plane across the frame.
    pink_noise_nm : float
        Standard deviation of isotropic 1/f noise (power spectral density ∝ 1/|k|).
    line_noise_nm : float
        Standard deviation of a random offset per scan row.
    white_noise_nm : float
        Standard deviation of white noise per pixel.

    Examples
    --------
    >>> c = Conditions(thermal_drift_nm_per_line=(0.001, 0.0), glitch_lines=2)
    >>> c.thermal_drift_nm_per_line, c.steps, c.is_clean
    ((0.001, 0.0), 0, False)
    >>> Conditions().is_clean
    True
    """

    thermal_drift_nm_per_line: tuple = (0.0, 0.0)
    creep_nm: tuple = (0.0, 0.0)
    creep_lines: float = 60.0
    tip_change_row: int | None = None
    tip_change_contrast: float = 1.0
    tip_change_offset_nm: float = 0.0
    tip_change_shift_px: tuple = (0.0, 0.0)
    glitch_lines: int = 0
    steps: int = 0
    step_height_nm: float = 0.6
    tilt_nm: float = 0.0
    pink_noise_nm: float = 0.0
    line_noise_nm: float = 0.0
    white_noise_nm: float = 0.0

    def __post_init__(self):
        for name in ("thermal_drift_nm_per_line", "creep_nm", "tip_change_shift_px"):
            object.__setattr__(self, name, _pair(getattr(self, name), name))
        for name in ("pink_noise_nm", "line_noise_nm", "white_noise_nm", "step_height_nm"):
            value = float(getattr(self, name))
            if not (math.isfinite(value) and value >= 0):
                raise InputError(f"Conditions.{name} must be a finite number >= 0 (nm), got {value!r}")
            object.__setattr__(self, name, value)
        for name in ("glitch_lines", "steps"):
            value = getattr(self, name)
            if int(value) != value or value < 0:
                raise InputError(f"Conditions.{name} must be a whole number >= 0, got {value!r}")
            object.__setattr__(self, name, int(value))
        if not float(self.creep_lines) > 0:
            raise InputError(f"Conditions.creep_lines must be positive (rows), got {self.creep_lines!r}")
        if not float(self.tip_change_contrast) > 0:
            raise InputError(f"Conditions.tip_change_contrast must be positive, got {self.tip_change_contrast!r}")
        if self.tip_change_row is not None and (int(self.tip_change_row) != self.tip_change_row
                                                or self.tip_change_row < 0):
            raise InputError(f"Conditions.tip_change_row must be a row index >= 0 or None, got {self.tip_change_row!r}")

    @property
    def is_clean(self) -> bool:
        """True when every imperfection is off."""
        return self == Conditions()


def scan_displacement(shape, pixel_size_nm, conditions):
    """The scan displacement u(r) of ``conditions``: drift, creep and the tip-change jump.

    u(row) = drift * row + creep * exp(-row / creep_lines) + shift * [row >= tip_change_row],
    the shift converted from pixels to nm. The image shows the material point
    s = r + u(r) at pixel r.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float or (float, float)
        Pixel size (dy, dx) in nm.
    conditions : Conditions
        The imperfections.

    Returns
    -------
    ndarray, shape (2, row, col)
        (ux, uy) in nm.

    Examples
    --------
    >>> u = scan_displacement((4, 3), 0.1, Conditions(thermal_drift_nm_per_line=(0.01, 0.02)))
    >>> u[:, 3, 0].round(6).tolist()
    [0.03, 0.06]
    """
    shape = tuple(int(s) for s in shape)
    dy, dx = pixel_size_pair(pixel_size_nm)
    rows = np.arange(shape[0], dtype=float)
    per_row = np.zeros((2, shape[0]))
    c = conditions
    for k in range(2):
        per_row[k] += c.thermal_drift_nm_per_line[k] * rows
        per_row[k] += c.creep_nm[k] * np.exp(-rows / float(c.creep_lines))
    if c.tip_change_row is not None:
        below = rows >= c.tip_change_row
        per_row[0] += below * c.tip_change_shift_px[0] * dx
        per_row[1] += below * c.tip_change_shift_px[1] * dy
    return np.ascontiguousarray(np.broadcast_to(per_row[:, :, None], (2,) + shape))


def _pink_noise(shape, pixel_size, std_nm, rng):
    """Isotropic noise with power spectral density ∝ 1/|k| (no DC), scaled to ``std_nm``."""
    white = np.fft.rfft2(rng.standard_normal(shape))
    ky = np.fft.fftfreq(shape[0], pixel_size[0])[:, None]
    kx = np.fft.rfftfreq(shape[1], pixel_size[1])[None, :]
    k = np.hypot(kx, ky)
    k[0, 0] = np.inf
    field = np.fft.irfft2(white / np.sqrt(k), s=shape)
    return field * (std_nm / field.std())


def _steps(shape, pixel_size, sx, sy, conditions, rng):
    """Terrace heights (nm), edge mask, terrace index and the edges' geometry.

    Edge k is the curve f_k(s) = n.(s - c) - p_k + kappa_k (t.(s - c))^2 = 0 (n the
    step normal, t along the edge, c the frame centre); the height is
    step_height * sum_k H(f_k), H a tanh of width ``_STEP_WIDTH_NM``.
    """
    n_steps = conditions.steps
    height_nm, width_nm = shape[0] * pixel_size[0], shape[1] * pixel_size[1]
    centre = np.array([width_nm, height_nm]) / 2
    normal_angle = rng.uniform(0, 2 * np.pi)
    nvec = np.array([np.cos(normal_angle), np.sin(normal_angle)])
    tvec = np.array([-nvec[1], nvec[0]])
    half = 0.5 * (abs(nvec[0]) * width_nm + abs(nvec[1]) * height_nm)  # half extent of the frame along n
    spacing = 2 * half / (n_steps + 1)
    offsets = -half + spacing * (np.arange(1, n_steps + 1) + rng.uniform(-0.2, 0.2, n_steps))
    # Gentle curvature: a sagitta of at most a fifth of the spacing across the frame, so edges never cross.
    half_length = 0.5 * math.hypot(width_nm, height_nm)
    curvature = rng.uniform(-0.2, 0.2, n_steps) * spacing / half_length**2
    dxc, dyc = sx - centre[0], sy - centre[1]
    along_n = nvec[0] * dxc + nvec[1] * dyc
    along_t = tvec[0] * dxc + tvec[1] * dyc
    terrace = np.zeros(shape, np.int32)
    heights = np.zeros(shape)
    edges = np.zeros(shape, bool)
    edge_band = 3 * _STEP_WIDTH_NM + max(pixel_size)
    for p, kappa in zip(offsets, curvature):
        f = along_n - p + kappa * along_t**2
        terrace += (f > 0).astype(np.int32)
        heights += 0.5 * (1 + np.tanh(f / _STEP_WIDTH_NM))
        edges |= np.abs(f) < edge_band
    geometry = {"normal_angle_deg": math.degrees(normal_angle), "offsets_nm": offsets.tolist(),
                "curvature_per_nm": curvature.tolist(), "centre_nm": centre.tolist(),
                "edge_width_nm": _STEP_WIDTH_NM,
                "edge_equation": ("n.(s - c) - offset + curvature (t.(s - c))^2 = 0, "
                                  "n = (cos a, sin a), t = (-sin a, cos a)")}
    return conditions.step_height_nm * heights, edges, terrace, geometry


_STEP_WIDTH_NM = 0.2  # tanh half-width of a step edge as the tip sees it (common practice, no source)


class _Artefacts:
    """The random parts of one scan's imperfections, drawn once and applied to every channel."""

    def __init__(self, shape, pixel_size, conditions, rng):
        self.shape, self.pixel_size, self.c = shape, pixel_size, conditions
        c = conditions
        self.u = scan_displacement(shape, pixel_size, c)
        self.below = np.zeros(shape[0], bool)
        if c.tip_change_row is not None:
            self.below[int(c.tip_change_row):] = True
        self.glitch_rows = np.sort(rng.choice(np.arange(1, shape[0] - 1), size=min(c.glitch_lines, shape[0] - 2),
                                              replace=False)) if c.glitch_lines else np.zeros(0, int)
        self.tilt_dir = rng.uniform(0, 2 * np.pi)
        self.rng = rng

    def coordinates(self):
        """Material coordinates s = r + u(r) (nm), as (sx, sy)."""
        dy, dx = self.pixel_size
        y, x = np.mgrid[: self.shape[0], : self.shape[1]]
        return x * dx + self.u[0], y * dy + self.u[1]

    def contrast(self):
        """Factor on the corrugation per row (the tip change), shape (row, 1)."""
        return np.where(self.below, float(self.c.tip_change_contrast), 1.0)[:, None]

    def topography(self, corrugation_nm, sx, sy):
        """Corrugation plus every additive artefact; returns (topography, truth, truth_maps)."""
        c, rng, shape, ps = self.c, self.rng, self.shape, self.pixel_size
        topo = corrugation_nm * self.contrast()
        truth, maps = {}, {}
        if c.steps:
            heights, edges, terrace, geometry = _steps(shape, ps, sx, sy, c, rng)
            topo = topo + heights
            maps["step_edges"], maps["terrace"] = edges, terrace
            truth["step_edges"] = geometry
        if c.tip_change_offset_nm:
            topo = topo + c.tip_change_offset_nm * self.below[:, None]
        if c.tilt_nm:
            dy, dx = ps
            y, x = np.mgrid[: shape[0], : shape[1]]
            h, w = shape[0] * dy, shape[1] * dx
            topo = topo + c.tilt_nm * ((x * dx / w - 0.5) * np.cos(self.tilt_dir)
                                       + (y * dy / h - 0.5) * np.sin(self.tilt_dir))
            truth["tilt_direction_deg"] = math.degrees(self.tilt_dir)
        if c.pink_noise_nm:
            topo = topo + _pink_noise(shape, ps, c.pink_noise_nm, rng)
        if c.line_noise_nm:
            offsets = rng.normal(0, c.line_noise_nm, shape[0])
            topo = topo + offsets[:, None]
            truth["line_offsets_nm"] = offsets.tolist()
        if c.white_noise_nm:
            topo = topo + rng.normal(0, c.white_noise_nm, shape)
        topo = self.glitch(topo, scale=10 * max(float(np.std(corrugation_nm)), 1e-3))
        return topo, truth, maps

    def glitch(self, image, scale):
        """Replace the glitched rows by garbage: a jump, noise of ``scale`` and a few spikes."""
        if not len(self.glitch_rows):
            return image
        image = np.array(image, copy=True)
        rng = self.rng
        for row in self.glitch_rows:
            garbage = float(np.median(image)) + rng.normal(0, 1) * scale + rng.normal(0, scale, image.shape[1])
            spikes = rng.choice(image.shape[1], size=max(1, image.shape[1] // 50), replace=False)
            garbage[spikes] += rng.choice([-1, 1], spikes.size) * 5 * scale
            image[row] = garbage
        return image

    def truth(self):
        """JSON-ready truth of the conditions and their pixel maps."""
        t = asdict(self.c)
        t["glitch_rows"] = self.glitch_rows.tolist()
        t["displacement_formula"] = ("u(row) = drift * row + creep * exp(-row / creep_lines)"
                                     " + shift_px * pixel * [row >= tip_change_row]")
        mask = np.zeros(self.shape, bool)
        mask[self.glitch_rows] = True
        maps = {"displacement": self.u, "glitch_mask": mask,
                "tip_changed": np.broadcast_to(self.below[:, None], self.shape).copy()}
        return t, maps


def _conditions(conditions):
    if conditions is None:
        return Conditions()
    if isinstance(conditions, dict):
        return Conditions(**conditions)
    if not isinstance(conditions, Conditions):
        raise InputError(f"conditions must be a Conditions (or a dict of its fields), got {type(conditions).__name__}")
    return conditions


def _shape(shape):
    try:
        shape = tuple(int(s) for s in shape)
    except (TypeError, ValueError):
        raise InputError(f"shape must be two image sizes (row, col), got {shape!r}") from None
    if len(shape) != 2 or min(shape) < 16:
        raise InputError(f"shape must be two sizes of at least 16 pixels, got {shape}")
    return shape


def _check_resolved(q, pixel_size, name):
    """Raise if a wavevector lies beyond 0.95 of the Nyquist limit (the atoms must be resolved)."""
    dy, dx = pixel_size
    q = np.atleast_2d(q)
    over = (np.abs(q[:, 0]) > 0.95 * math.pi / dx) | (np.abs(q[:, 1]) > 0.95 * math.pi / dy)
    if np.any(over):
        raise InputError(f"pixel_size_nm = {(dy, dx)} cannot resolve {name} = {q[over][0].round(3).tolist()} rad/nm "
                         f"(Nyquist {math.pi / dx:.3g}, {math.pi / dy:.3g} rad/nm); use smaller pixels")


# --------------------------------------------------------------------------- supercell geometry


def _int_matrix(M, name="supercell"):
    arr = np.asarray(M)
    if arr.shape != (2, 2) or not np.all(np.equal(np.round(arr), arr)):
        raise InputError(f"{name} must be an integer 2 x 2 matrix, got {M!r}")
    arr = np.round(arr).astype(int)
    if round(abs(np.linalg.det(arr))) < 1:
        raise InputError(f"{name} must have a non-zero determinant, got {arr.tolist()}")
    return arr


def _hex_norm2(m):
    m = np.asarray(m)
    return m[..., 0] ** 2 + m[..., 1] ** 2 + m[..., 0] * m[..., 1]


def _variants(M):
    """The |det M| lattice translations (m1, m2) distinct modulo the superlattice, shortest representatives."""
    det = int(round(abs(np.linalg.det(M))))
    adj = np.round(np.linalg.inv(M) * np.linalg.det(M)).astype(int)  # m M^-1 = (m adj) / det M
    bound = int(np.abs(M).sum(axis=0).max())
    ii, jj = np.mgrid[-bound: bound + 1, -bound: bound + 1]
    cands = np.stack([ii.ravel(), jj.ravel()], 1)
    cands = cands[np.lexsort((cands[:, 1], cands[:, 0], _hex_norm2(cands)))]
    reps = {}
    for m in cands:
        key = tuple(np.mod(m @ adj, det))
        reps.setdefault(key, (int(m[0]), int(m[1])))
    out = sorted(reps.values(), key=lambda m: (_hex_norm2(np.array(m)), m))
    return out, adj, det


def _same_superlattice(M1, M2):
    t = M2 @ np.linalg.inv(M1)
    return np.allclose(t, np.round(t), atol=1e-9) and round(abs(np.linalg.det(t))) == 1


def _shortest_star(basis, exclude=None):
    """Shortest non-zero integer combinations of the rows of ``basis``, excluding those ``exclude`` flags."""
    span = 6
    ii, jj = np.mgrid[-span: span + 1, -span: span + 1]
    hk = np.stack([ii.ravel(), jj.ravel()], 1)
    vecs = hk @ basis
    lengths = np.hypot(*vecs.T)
    keep = lengths > 1e-12
    if exclude is not None:
        keep &= ~exclude(vecs)
    vecs, lengths = vecs[keep], lengths[keep]
    return vecs[lengths < lengths.min() * (1 + 1e-9)]


def supercell_geometry(supercell, a_nm, angle_deg=0.0):
    """Wavevectors, variants and rotation of a commensurate superlattice A_super = M A on a hexagonal lattice.

    The superlattice's reciprocal basis is B_super = M^{-T} B. Its CDW wavevectors
    are the shortest vectors of B_super that are not Bragg vectors, one of each
    ± pair (three at 120 degrees summing to zero for a triple-q star). A lattice
    translation R shifts component j by -Q_j . R; the |det M| translations distinct
    modulo the superlattice are the translational variants (docs/methods.md §8).

    Parameters
    ----------
    supercell : (2, 2) integer array_like
        M; rows give the superlattice basis in units of the lattice basis a1, a2.
    a_nm : float
        Lattice constant, nm.
    angle_deg : float
        Direction of a1 from the x axis, degrees.

    Returns
    -------
    dict
        ``M``, ``det``, ``real_basis_nm`` (a1, a2), ``super_basis_nm`` (M A),
        ``q_bragg_rad_per_nm`` (3, 2), ``q_cdw_rad_per_nm`` (k, 2),
        ``variants`` (list of (m1, m2), shortest representatives, (0, 0) first),
        ``rotation_deg`` (of the shortest superlattice vector from the nearest lattice
        direction, in (-30, 30]) and ``chirality`` (+1, -1, or 0 if the superlattice is
        its own mirror image).

    References
    ----------
    .. [1] W. L. McMillan, Phys. Rev. B 14, 1496 (1976) (commensurate CDW domains).
       doi:10.1103/PhysRevB.14.1496

    Examples
    --------
    >>> g = supercell_geometry([[4, -1], [1, 3]], 0.336)
    >>> g["det"], len(g["variants"]), round(g["rotation_deg"], 2), len(g["q_cdw_rad_per_nm"])
    (13, 13, -13.9, 3)
    >>> len(supercell_geometry([[2, 0], [0, 1]], 0.336)["q_cdw_rad_per_nm"])
    1
    """
    M = _int_matrix(supercell)
    A = real_basis("hexagonal", a_nm, angle_deg)
    B = reciprocal_basis(A)
    A_super = M @ A
    B_super = reciprocal_basis(A_super)

    def is_bragg(q):
        c = q @ A.T / (2 * np.pi)  # coordinates in the basis B
        return np.all(np.abs(c - np.round(c)) < 1e-9, axis=1)

    star = _shortest_star(B_super, exclude=is_bragg)
    angles = np.mod(np.arctan2(star[:, 1], star[:, 0]) - math.radians(angle_deg) + 1e-9, 2 * np.pi)
    order = np.argsort(angles)
    star, angles = star[order], angles[order]
    if len(star) == 6:
        q_cdw = star[[0, 2, 4]]
    else:
        q_cdw = star[angles < np.pi - 1e-9]
    # Rotation of the superlattice: direction of its shortest real-space vector from a1, folded to (-30, 30].
    shortest = _shortest_star(A_super)
    rel = np.degrees(np.arctan2(shortest[:, 1], shortest[:, 0])) - angle_deg
    folded = -(np.mod(-rel + 30, 60) - 30)
    rotation = float(folded[np.argmin(np.abs(folded))]) if len(folded) else 0.0
    rotation = 30.0 if abs(abs(rotation) - 30) < 1e-9 else rotation
    if abs(rotation) < 1e-9:
        rotation = 0.0
    mirror = M @ _MIRROR
    chirality = 0 if _same_superlattice(M, mirror) else (1 if rotation > 0 else -1)
    variants, _, det = _variants(M)
    return {
        "M": M.tolist(),
        "det": det,
        "real_basis_nm": A.tolist(),
        "super_basis_nm": A_super.tolist(),
        "q_bragg_rad_per_nm": bragg_vectors("hexagonal", a_nm, angle_deg).tolist(),
        "q_cdw_rad_per_nm": q_cdw.tolist(),
        "variants": [list(v) for v in variants],
        "rotation_deg": rotation,
        "chirality": chirality,
    }


def _structures(M, mirror_domains, rotation_domains):
    """The distinct superlattices (supercell matrices) the domains may take."""
    found = [M]
    extra = []
    if rotation_domains:
        R = np.eye(2, dtype=int)
        for _ in range(5):
            R = R @ _ROT60
            extra.append(M @ R)
    if mirror_domains:
        extra.append(M @ _MIRROR)
        if rotation_domains:
            R = np.eye(2, dtype=int)
            for _ in range(5):
                R = R @ _ROT60
                extra.append(M @ _MIRROR @ R)
    for cand in extra:
        if not any(_same_superlattice(f, cand) for f in found):
            found.append(cand)
    return found


def _voronoi_at(seeds_px, sx, sy, pixel_size):
    """Voronoi labels 1..n of the material points (sx, sy) (nm), seeds given as (row, col) pixels."""
    dy, dx = pixel_size
    best = np.full(sx.shape, np.inf)
    labels = np.zeros(sx.shape, np.int32)
    for d, (row, col) in enumerate(seeds_px):
        dist = (sx - col * dx) ** 2 + (sy - row * dy) ** 2
        closer = dist < best
        labels[closer] = d + 1
        best = np.where(closer, dist, best)
    return labels


def _layout(shape, n_domains, options_of, rng, sx, sy, pixel_size):
    """A Voronoi layout whose neighbouring domains differ in (structure, variant); redrawn if it cannot be coloured.

    The seeds are material points: the labels are evaluated at s = r + u(r), so drift
    and creep move the domains with the lattice.
    """
    last = None
    for _ in range(30):
        _, seeds = voronoi_labels(shape, n_domains, rng=rng)
        labels = _voronoi_at(seeds, sx, sy, pixel_size)
        if len(np.unique(labels)) < n_domains:
            continue
        try:
            return labels, seeds, _assign_variants(labels, 0, rng, candidates=options_of)
        except InputError as err:
            last = err
    raise InputError(f"n_domains = {n_domains}: {last}; use fewer domains or more structures")


def _nonlinear(p, nonlinearity, cdw_to_lattice):
    """p + κ p² / p_max, p_max = 3 (1 + r) the largest value of p: the quadratic term's peak is κ times p's.

    The square holds every sum and difference of the wavevectors present (harmonics and
    mixing), as a tip's nonlinear response or a non-sinusoidal charge profile would
    (common practice, no source). The DC part of p² is removed.
    """
    if not nonlinearity:
        return p
    sq = p * p
    return p + float(nonlinearity) * (sq - sq.mean()) / (3 * (1 + float(cdw_to_lattice)))


def _cdw_maps(biases_V, lattice, cdw, art, pixel_size, source):
    """Conductance maps (nS) of the same scan: lattice and CDW terms, the CDW sign inverting between biases."""
    maps = []
    rng = art.rng
    for k, bias in enumerate(biases_V or ()):
        sign = -1.0 if k == 0 and len(biases_V) > 1 else 1.0
        g = 1.0 + (0.05 * lattice + sign * 0.05 * cdw) * art.contrast() + rng.normal(0, 0.01, art.shape)
        g = art.glitch(g, scale=10 * float(np.std(g)))
        maps.append(Scan(g, pixel_size_nm=pixel_size, channel="conductance", bias_V=float(bias), setpoint_A=1e-10,
                         source=f"<{source}, {bias:+.2f} V>", metadata={"units": "nS"}))
    return maps


# --------------------------------------------------------------------------- commensurate supercell CDW


def supercell_cdw_scene(*, shape=(1024, 1024), pixel_size_nm=0.05, a_nm=0.336, angle_deg=7.0,
                        supercell=((4, -1), (1, 3)), mirror_domains=False, rotation_domains=False, n_domains=6,
                        cdw_to_lattice=2.0, lattice_nm=0.02, wall_width_nm=0.25, nonlinearity=0.0,
                        conditions=None, biases_V=(-0.3, 0.3), rng=0):
    """A commensurate CDW on a hexagonal lattice, given by a supercell matrix, in translational (and mirror) domains.

    The topograph is t_lat sum_j cos(G_j . s) + t_cdw sum_types Re sum_j psi_j(r) exp(i Q_j . s),
    s = r + u(r) the material coordinate of :class:`Conditions`. Q_j are the shortest
    non-Bragg vectors of B_super = M^{-T} B (:func:`supercell_geometry`); a domain in
    translational variant R (lattice units, reduced modulo the superlattice) has
    phases phi_j = -Q_j . R; psi_j = sum_d w_d exp(i phi_j^d) over the domains of one
    structure, w_d a Gaussian-smoothed Voronoi partition (walls of width
    ``wall_width_nm``). Conductance maps at ``biases_V`` carry the same lattice and
    a CDW term whose sign inverts between the first two biases.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float or (float, float)
        Pixel size, one value or (dy, dx), nm. Must resolve the Bragg peaks.
    a_nm : float
        Lattice constant, nm (an invented layered crystal).
    angle_deg : float
        Direction of a1 from the x axis, degrees.
    supercell : (2, 2) integer array_like
        M with A_super = M A. √13×√13: ((4, -1), (1, 3)); √7: ((3, -1), (1, 2));
        √3: ((2, -1), (1, 1)); n×n: n I; 2×1 stripes: ((2, 0), (0, 1)).
    mirror_domains : bool
        Half of the domains take the mirror superlattice M P (R-θ instead of R+θ).
    rotation_domains : bool
        Domains also take the superlattices rotated by multiples of 60 degrees
        that differ from M (orientational domains of a stripe phase).
    n_domains : int
        Number of Voronoi domains; neighbours always differ in structure or variant.
    cdw_to_lattice : float
        Amplitude of each CDW component over that of each atomic component.
    lattice_nm : float
        Amplitude of each atomic component, nm.
    wall_width_nm : float
        Gaussian standard deviation of the wall profile, nm (0: sharp).
    nonlinearity : float
        κ of a quadratic term: the corrugation is p + κ (p² - <p²>) / (3 (1 + r)), p the
        linear sum in units of ``lattice_nm`` and r = ``cdw_to_lattice``; it adds the harmonics
        and mixing peaks (2Q, Q_i ± Q_j, G ± Q, ...) that real topographs show.
    conditions : Conditions, optional
        Scan imperfections (default: none).
    biases_V : sequence of float
        Biases of the conductance maps.
    rng : int or numpy.random.Generator
        Randomness (seed).

    Returns
    -------
    Scene
        kind "supercell_cdw". ``truth``: ``lattice``, ``structures`` (per structure:
        ``M``, ``det``, ``q_cdw_rad_per_nm``, ``variants``, ``rotation_deg``, ``chirality``),
        ``M``, ``M_mirror``, ``det``, ``domains`` (label, structure, chirality, variant
        index, R, phases), ``order_components`` ((structure, j) per row of
        ``order_amplitude``), ``conditions``. ``truth_maps``: ``labels``, ``structure``,
        ``variant`` (index into that structure's variants), ``order_amplitude``,
        ``displacement``, ``glitch_mask``, ``tip_changed`` and, with steps,
        ``step_edges`` and ``terrace``.

    References
    ----------
    .. [1] W. L. McMillan, "Theory of discommensurations and the
       commensurate-incommensurate charge-density-wave phase transition",
       Phys. Rev. B 14, 1496 (1976). doi:10.1103/PhysRevB.14.1496

    Examples
    --------
    >>> scene = supercell_cdw_scene(shape=(96, 96), n_domains=3, rng=1)
    >>> scene.truth["det"], scene.topography.shape, len(scene.maps)
    (13, (96, 96), 2)
    """
    rng = _rng(rng)
    shape = _shape(shape)
    pixel_size = pixel_size_pair(pixel_size_nm)
    conditions = _conditions(conditions)
    if not float(cdw_to_lattice) >= 0:
        raise InputError(f"cdw_to_lattice must be >= 0, got {cdw_to_lattice!r}")
    if int(n_domains) < 1:
        raise InputError(f"n_domains must be at least 1, got {n_domains!r}")
    M = _int_matrix(supercell)
    structures = _structures(M, mirror_domains, rotation_domains)
    geoms = [supercell_geometry(m, a_nm, angle_deg) for m in structures]
    bragg = np.array(geoms[0]["q_bragg_rad_per_nm"])
    _check_resolved(bragg, pixel_size, "the Bragg vectors")

    n_types = len(structures)
    # Structure of each domain: cycle through the structures so each appears (half mirror, half not).
    type_of = rng.permutation(np.arange(int(n_domains)) % n_types)
    dets = [g["det"] for g in geoms]

    def options(d):
        t = int(type_of[d - 1])
        return [(t, v) for v in range(dets[t])]

    art = _Artefacts(shape, pixel_size, conditions, rng)
    sx, sy = art.coordinates()
    if n_domains == 1:
        labels, seeds = np.ones(shape, np.int32), np.array([[shape[0] / 2, shape[1] / 2]])
        chosen = [(int(type_of[0]), int(rng.integers(dets[int(type_of[0])])))]
    else:
        labels, seeds, chosen = _layout(shape, int(n_domains), options, rng, sx, sy, pixel_size)
    lattice = sum(np.cos(g[0] * sx + g[1] * sy) for g in bragg)
    weights = smooth_partition(labels, 0.0) if wall_width_nm == 0 else None
    if weights is None:
        # Anisotropic pixels: the Gaussian wall profile in nm, sigma per axis in pixels.
        ids = np.arange(1, labels.max() + 1)
        sigma = (wall_width_nm / pixel_size[0], wall_width_nm / pixel_size[1])
        weights = np.stack([ndimage.gaussian_filter((labels == i).astype(float), sigma, mode="nearest") for i in ids])

    cdw = np.zeros(shape)
    amplitude, components, domains = [], [], []
    for t, geom in enumerate(geoms):
        q_cdw = np.array(geom["q_cdw_rad_per_nm"])
        A = np.array(geom["real_basis_nm"])
        for d in range(int(n_domains)):
            if chosen[d][0] != t:
                continue
            R = np.array(geom["variants"][chosen[d][1]])
            phases = -(q_cdw @ (R @ A))
            domains.append({"label": d + 1, "structure": t, "chirality": geom["chirality"], "variant": chosen[d][1],
                            "R": R.tolist(), "phases_rad": np.angle(np.exp(1j * phases)).tolist(),
                            "seed_row_col": np.asarray(seeds[d]).tolist()})
        members = [d for d in range(int(n_domains)) if chosen[d][0] == t]
        for j, q in enumerate(q_cdw):
            psi = np.zeros(shape, complex)
            for d in members:
                R = np.array(geom["variants"][chosen[d][1]])
                psi += weights[d] * np.exp(-1j * (q @ (R @ A)))
            cdw += np.real(psi * np.exp(1j * (q[0] * sx + q[1] * sy)))
            amplitude.append(np.abs(psi))
            components.append([t, j])
    domains.sort(key=lambda e: e["label"])

    corrugation = lattice_nm * _nonlinear(lattice + float(cdw_to_lattice) * cdw, nonlinearity, cdw_to_lattice)
    topo, extra_truth, extra_maps = art.topography(corrugation, sx, sy)
    cond_truth, cond_maps = art.truth()
    cond_truth.update(extra_truth)
    truth = {
        "lattice": {"kind": "hexagonal", "a_nm": float(a_nm), "angle_deg": float(angle_deg),
                    "q_bragg_rad_per_nm": bragg.tolist()},
        "M": M.tolist(),
        "M_mirror": (M @ _MIRROR).tolist(),
        "det": geoms[0]["det"],
        "structures": geoms,
        "q_cdw_rad_per_nm": geoms[0]["q_cdw_rad_per_nm"],
        "n_domains": int(n_domains),
        "domains": domains,
        "order_components": components,
        "lattice_nm": float(lattice_nm),
        "cdw_nm": float(lattice_nm * cdw_to_lattice),
        "cdw_to_lattice": float(cdw_to_lattice),
        "nonlinearity": float(nonlinearity),
        "wall_width_nm": float(wall_width_nm),
        "pixel_size_nm": list(pixel_size),
        "contrast_phase_shift_rad": float(np.pi),
        "conditions": cond_truth,
    }
    structure_of = np.array([c[0] for c in chosen], np.int32)
    variant_of = np.array([c[1] for c in chosen], np.int32)
    truth_maps = {"labels": labels, "structure": structure_of[labels - 1], "variant": variant_of[labels - 1],
                  "order_amplitude": np.array(amplitude), **cond_maps, **extra_maps}
    topography = Scan(topo, pixel_size_nm=pixel_size, channel="topography", bias_V=biases_V[-1] if biases_V else None,
                      setpoint_A=1e-10, source="<synthetic supercell CDW scene>", metadata={"units": "nm"})
    maps = _cdw_maps(biases_V, lattice, float(cdw_to_lattice) * cdw, art, pixel_size, "synthetic supercell CDW scene")
    return Scene("supercell_cdw", topography, maps, truth, truth_maps)


# --------------------------------------------------------------------------- incommensurate CDW


def _nearest_lattice_point(f, A):
    """Nearest hexagonal lattice point (integer m1, m2) to fractional coordinates f (..., 2)."""
    base = np.floor(f)
    best, best_d = None, None
    for o in ((0, 0), (1, 0), (0, 1), (1, 1)):
        m = base + o
        d = (f - m) @ A
        dist = d[..., 0] ** 2 + d[..., 1] ** 2
        if best is None:
            best, best_d = m.copy(), dist
        else:
            closer = dist < best_d
            best[closer] = m[closer]
            best_d = np.where(closer, dist, best_d)
    return best.astype(int)


def incommensurate_cdw_scene(*, shape=(1024, 1024), pixel_size_nm=0.05, a_nm=0.344, angle_deg=11.0, n=3, delta=0.02,
                             discommensurations=False, slip_width_nm=0.4, cdw_to_lattice=2.0, lattice_nm=0.02,
                             nonlinearity=0.0, conditions=None, biases_V=(-0.3, 0.3), rng=0):
    """A nearly commensurate triple-q CDW, q_j = (1 - δ) G_j / n: uniform, or McMillan's commensurate patches.

    Uniform: cos(q_j . s + phi_j) with a random overall translation. With
    ``discommensurations`` the CDW is the commensurate one (Q_j = G_j / n)
    displaced by a lattice vector R(s) that is constant in patches: R(s) is the
    lattice point nearest to δ (s - s0), so the patches are the Wigner–Seitz cells
    of the lattice scaled by 1/δ (a hexagonal network of hexagons a/δ across), and
    neighbours differ by a nearest-neighbour vector, a phase slip of 2π/n in two of
    the three components. psi_j = G_w ∗ exp(-i Q_j . R(s)) smooths the slips over
    ``slip_width_nm``. Since R(s) follows δ (s - s0) on average, the mean wavevector
    is (1 - δ) Q_j (McMillan 1976).

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float or (float, float)
        Pixel size, nm; must resolve the Bragg peaks.
    a_nm : float
        Lattice constant, nm.
    angle_deg : float
        Direction of a1 from the x axis, degrees.
    n : int
        Commensurate order (q near G / n).
    delta : float
        Incommensurability δ, 0 < |δ| < 0.5.
    discommensurations : bool
        Commensurate patches separated by phase slips (True) or a uniform wave (False).
    slip_width_nm : float
        Gaussian standard deviation of a slip, nm.
    cdw_to_lattice, lattice_nm : float
        CDW amplitude over the atomic one, and the atomic amplitude (nm), per component.
    nonlinearity : float
        Relative size of a quadratic term in the corrugation (harmonics and mixing peaks,
        e.g. G - n q close to the commensurate spots).
    conditions : Conditions, optional
        Scan imperfections.
    biases_V : sequence of float
        Biases of the conductance maps.
    rng : int or numpy.random.Generator
        Randomness (seed).

    Returns
    -------
    Scene
        kind "incommensurate_cdw". ``truth``: ``lattice``, ``n``, ``delta``,
        ``q_cdw_rad_per_nm`` (mean wavevectors (1 - δ) G / n), ``q_commensurate_rad_per_nm``,
        ``dq_rad_per_nm`` (|G| δ / n), ``discommensuration_spacing_nm`` (2π/|Δq|, the length over
        which the phase against the commensurate wave winds by 2π, as docs/methods.md §8 reports it),
        ``slip_spacing_nm`` (2π/(n|Δq|) = d_G/δ, between successive 2π/n slips along G_j),
        and with discommensurations ``patches`` (label, R, variant). ``truth_maps``: ``labels``
        (patches; all 1 if uniform), ``variant`` ((m1 mod n) n + (m2 mod n)), ``slip_lines``,
        ``order_amplitude`` and the conditions' maps.

    References
    ----------
    .. [1] W. L. McMillan, "Theory of discommensurations and the
       commensurate-incommensurate charge-density-wave phase transition",
       Phys. Rev. B 14, 1496 (1976). doi:10.1103/PhysRevB.14.1496

    Examples
    --------
    >>> scene = incommensurate_cdw_scene(shape=(64, 64), delta=0.02)
    >>> round(scene.truth["slip_spacing_nm"], 3)
    14.896
    """
    rng = _rng(rng)
    shape = _shape(shape)
    pixel_size = pixel_size_pair(pixel_size_nm)
    conditions = _conditions(conditions)
    n = int(n)
    delta = float(delta)
    if n < 1:
        raise InputError(f"n must be a positive integer, got {n!r}")
    if not 0 < abs(delta) < 0.5:
        raise InputError(f"delta must satisfy 0 < |delta| < 0.5, got {delta!r}")
    A = real_basis("hexagonal", a_nm, angle_deg)
    bragg = bragg_vectors("hexagonal", a_nm, angle_deg)
    _check_resolved(bragg, pixel_size, "the Bragg vectors")
    Q = bragg / n
    q_mean = (1 - delta) * Q
    dq = abs(delta) * float(np.hypot(*Q[0]))

    art = _Artefacts(shape, pixel_size, conditions, rng)
    sx, sy = art.coordinates()
    lattice = sum(np.cos(g[0] * sx + g[1] * sy) for g in bragg)
    truth = {
        "lattice": {"kind": "hexagonal", "a_nm": float(a_nm), "angle_deg": float(angle_deg),
                    "q_bragg_rad_per_nm": bragg.tolist()},
        "n": n, "delta": delta, "discommensurations": bool(discommensurations),
        "q_cdw_rad_per_nm": q_mean.tolist(), "q_commensurate_rad_per_nm": Q.tolist(),
        "dq_rad_per_nm": dq, "discommensuration_spacing_nm": 2 * np.pi / dq,
        "slip_spacing_nm": 2 * np.pi / (n * dq), "slip_width_nm": float(slip_width_nm),
        "lattice_nm": float(lattice_nm), "cdw_nm": float(lattice_nm * cdw_to_lattice),
        "cdw_to_lattice": float(cdw_to_lattice), "nonlinearity": float(nonlinearity),
        "pixel_size_nm": list(pixel_size),
    }
    cdw = np.zeros(shape)
    if not discommensurations:
        t0 = rng.uniform(0, 1, 2) @ A * n  # a random translation of the wave
        phases = -(q_mean @ t0)
        for q, p in zip(q_mean, phases):
            cdw += np.cos(q[0] * sx + q[1] * sy + p)
        labels = np.ones(shape, np.int32)
        variant = np.zeros(shape, np.int32)
        slip_lines = np.zeros(shape, bool)
        amplitude = np.ones((3,) + shape)
        truth["phases_rad"] = np.angle(np.exp(1j * phases)).tolist()
    else:
        height, width = shape[0] * pixel_size[0], shape[1] * pixel_size[1]
        s0 = np.array([width, height]) * rng.uniform(0.3, 0.7, 2)
        v = delta * np.stack([sx - s0[0], sy - s0[1]], -1)  # (r, c, 2) nm
        m = _nearest_lattice_point(v @ np.linalg.inv(A), A)  # (r, c, 2)
        code = (m[..., 0].astype(np.int64) << 32) + (m[..., 1].astype(np.int64) + (1 << 31))
        codes, inverse = np.unique(code.ravel(), return_inverse=True)
        keys = np.stack([codes >> 32, (codes & 0xFFFFFFFF) - (1 << 31)], 1)
        labels = (inverse.reshape(shape) + 1).astype(np.int32)
        variant = (np.mod(m[..., 0], n) * n + np.mod(m[..., 1], n)).astype(np.int32)
        slip_lines = np.zeros(shape, bool)
        slip_lines[:, 1:] |= labels[:, 1:] != labels[:, :-1]
        slip_lines[1:] |= labels[1:] != labels[:-1]
        Rc = m @ A  # (r, c, 2) nm
        sigma = (slip_width_nm / pixel_size[0], slip_width_nm / pixel_size[1])
        amplitude = []
        for q in Q:
            raw = np.exp(-1j * (Rc @ q))
            psi = (ndimage.gaussian_filter(raw.real, sigma, mode="nearest")
                   + 1j * ndimage.gaussian_filter(raw.imag, sigma, mode="nearest"))
            cdw += np.real(psi * np.exp(1j * (q[0] * sx + q[1] * sy)))
            amplitude.append(np.abs(psi))
        amplitude = np.array(amplitude)
        truth["origin_nm"] = s0.tolist()
        truth["patches"] = [{"label": i + 1, "R": k.tolist(), "variant": int((k[0] % n) * n + k[1] % n),
                             "phases_rad": np.angle(np.exp(-1j * (Q @ (k @ A)))).tolist()}
                            for i, k in enumerate(keys)]
        truth["patch_diameter_nm"] = float(a_nm / abs(delta))

    corrugation = lattice_nm * _nonlinear(lattice + float(cdw_to_lattice) * cdw, nonlinearity, cdw_to_lattice)
    topo, extra_truth, extra_maps = art.topography(corrugation, sx, sy)
    cond_truth, cond_maps = art.truth()
    cond_truth.update(extra_truth)
    truth["conditions"] = cond_truth
    truth_maps = {"labels": labels, "variant": variant, "slip_lines": slip_lines, "order_amplitude": amplitude,
                  **cond_maps, **extra_maps}
    topography = Scan(topo, pixel_size_nm=pixel_size, channel="topography", bias_V=biases_V[-1] if biases_V else None,
                      setpoint_A=1e-10, source="<synthetic incommensurate CDW scene>", metadata={"units": "nm"})
    maps = _cdw_maps(biases_V, lattice, float(cdw_to_lattice) * cdw, art, pixel_size,
                     "synthetic incommensurate CDW scene")
    return Scene("incommensurate_cdw", topography, maps, truth, truth_maps)


# --------------------------------------------------------------------------- bilayer


def bilayer_scene(*, shape=(1024, 1024), pixel_size_nm=0.08, a_nm=0.246, theta_deg=1.0, heterostrain_percent=0.3,
                  heterostrain_angle_deg=20.0, mismatch=0.0, resolve_atoms=True, corrugation_nm=0.03,
                  conditions=None, poisson=0.16, rng=0):
    """A twisted (and strained, and lattice-mismatched) bilayer with the atoms resolved, under scan conditions.

    Layer 1 (top) is a hexagonal lattice of constant a; layer 2 (bottom) is
    T · layer 1 with T = R(θ)(1 + δ)(I + E), E a uniaxial heterostrain, so its
    lattice constant is (1 + δ) a. Both are rendered at s = r + u(r)
    (:func:`domains.synth.twisted_bilayer`), scaled to ``corrugation_nm`` (standard
    deviation of the clean image), then the additive artefacts are applied.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float or (float, float)
        Pixel size, nm; with ``resolve_atoms`` below √3 a / 4 (Nyquist for the Bragg peaks).
    a_nm : float
        Lattice constant of the top layer, nm.
    theta_deg : float
        Twist of the bottom layer relative to the top, degrees.
    heterostrain_percent, heterostrain_angle_deg : float
        Uniaxial heterostrain ε (%) of the bottom layer and its axis (degrees from x).
    mismatch : float
        δ: the bottom layer's lattice constant is (1 + δ) a.
    resolve_atoms : bool
        Render the atoms (True) or only the moiré.
    corrugation_nm : float
        Standard deviation of the clean image, nm.
    conditions : Conditions, optional
        Scan imperfections.
    poisson : float
        Poisson ratio of the heterostrain.
    rng : int or numpy.random.Generator
        Randomness (seed).

    Returns
    -------
    Scene
        kind "bilayer". ``truth``: ``a_nm``, ``a_bottom_nm``, ``theta_deg``,
        ``heterostrain_percent``, ``heterostrain_angle_deg``, ``mismatch``, ``poisson``,
        ``bragg_q_top_rad_per_nm``, ``bragg_q_bottom_rad_per_nm``, ``moire_q_rad_per_nm``
        (k = G_top - G_bottom), ``wavelengths_nm``, ``period_nm``, ``conditions``.
        ``truth_maps``: ``labels`` (all 1), ``twist_deg``, ``heterostrain_percent``,
        ``period_nm`` and the conditions' maps.

    References
    ----------
    .. [1] K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012).
       doi:10.1088/0953-8984/24/31/314210
    .. [2] M. Yankowitz et al., Nat. Phys. 8, 382 (2012). doi:10.1038/nphys2272

    Examples
    --------
    >>> scene = bilayer_scene(shape=(64, 64), theta_deg=2.0, heterostrain_percent=0.0)
    >>> round(scene.truth["period_nm"], 3)
    7.048
    """
    rng = _rng(rng)
    shape = _shape(shape)
    pixel_size = pixel_size_pair(pixel_size_nm)
    conditions = _conditions(conditions)
    art = _Artefacts(shape, pixel_size, conditions, rng)
    image, t = twisted_bilayer(shape=shape, pixel_size_nm=pixel_size, a_nm=a_nm, theta_deg=theta_deg,
                               heterostrain_percent=heterostrain_percent, heterostrain_angle_deg=heterostrain_angle_deg,
                               resolve_atoms=resolve_atoms, poisson=poisson, mismatch=mismatch,
                               displacement_nm=None if not np.any(art.u) else art.u)
    sx, sy = art.coordinates()
    topo, extra_truth, extra_maps = art.topography(float(corrugation_nm) * image, sx, sy)
    cond_truth, cond_maps = art.truth()
    cond_truth.update(extra_truth)
    k = np.asarray(t["moire_q_rad_per_nm"])
    truth = {
        "a_nm": float(a_nm), "a_bottom_nm": float(a_nm) * (1 + float(mismatch)), "theta_deg": float(theta_deg),
        "heterostrain_percent": float(heterostrain_percent), "heterostrain_angle_deg": float(heterostrain_angle_deg),
        "mismatch": float(mismatch), "poisson": float(poisson), "resolve_atoms": bool(resolve_atoms),
        "bragg_q_top_rad_per_nm": np.asarray(t["bragg_q_layer1_rad_per_nm"]).tolist(),
        "bragg_q_bottom_rad_per_nm": np.asarray(t["bragg_q_layer2_rad_per_nm"]).tolist(),
        "moire_q_rad_per_nm": k.tolist(), "wavelengths_nm": np.asarray(t["wavelengths_nm"]).tolist(),
        "period_nm": float(t["period_nm_centre"]), "corrugation_nm": float(corrugation_nm),
        "pixel_size_nm": list(pixel_size), "conditions": cond_truth,
    }
    truth_maps = {"labels": np.ones(shape, np.int32), "twist_deg": t["theta_deg"],
                  "heterostrain_percent": t["heterostrain_percent"], "period_nm": t["period_nm"],
                  **cond_maps, **extra_maps}
    topography = Scan(topo, pixel_size_nm=pixel_size, channel="topography", bias_V=0.2, setpoint_A=1e-10,
                      source="<synthetic bilayer scene>", metadata={"units": "nm"})
    return Scene("bilayer", topography, [], truth, truth_maps)


# --------------------------------------------------------------------------- catalogue

REAL_SCENES = ("sqrt13", "sqrt7", "sqrt3", "nearly_commensurate", "discommensurate", "strong_cdw_tip_change", "creep",
               "steps", "stripes_2x1", "bilayer", "mismatch", "noisy")


def _pixel_for(size, base_nm, period_nm):
    """``base_nm`` at 1024 pixels, larger for smaller frames, but always < period / 2.8 (atoms resolved)."""
    return min(base_nm * 1024 / size, period_nm / 2.8)


def real_scene(kind, *, size=1024, rng=0, **overrides):
    """A ready-made hostile scene by name, for testing the analysis on what a microscope really gives.

    Each scene combines an order with scan imperfections; some have rectangular
    frames or non-square pixels. The seed also jitters the lattice angle, the
    lattice constant, δ and the twist by small amounts, so that every seed gives a
    different but valid scene; the truth holds the values used.

    ============================  ==========================================================
    kind                          scene
    ============================  ==========================================================
    ``sqrt13``                    √13×√13 R13.9° with mirror domains, CDW 2× atoms, drift, noise
    ``sqrt7``                     √7×√7 R19.1°, mirror domains, 1/f noise, line noise
    ``sqrt3``                     √3×√3 R30°, non-square pixels, creep
    ``nearly_commensurate``       uniform q = (1 - δ) G / 3, δ ≈ 0.01-0.02, drift
    ``discommensurate``           McMillan patches, 3×3 commensurate inside, δ ≈ 0.03
    ``strong_cdw_tip_change``     3×3, CDW 3× atoms, a tip change (contrast, offset, jump)
    ``creep``                     3×3, piezo creep and thermal drift
    ``steps``                     3×3 with two 0.6 nm steps and a tilt
    ``stripes_2x1``               2×1 stripes in orientational and phase-slip domains
    ``bilayer``                   twist ≈ 1°, 0.3 % heterostrain, atoms resolved
    ``mismatch``                  1.8 % lattice mismatch, small twist, atoms resolved
    ``noisy``                     3×3 with 1/f and line noise and glitched rows; 3:4 frame, non-square pixels
    ============================  ==========================================================

    Parameters
    ----------
    kind : str
        One of ``REAL_SCENES``.
    size : int
        Number of columns (rows too, except for rectangular frames); the pixel
        grows for small sizes so the frame keeps a useful extent, as long as the
        atoms stay resolved.
    rng : int or numpy.random.Generator
        Seed: layout, jitter and noise.
    **overrides
        Keyword arguments of the underlying scene function that replace the catalogue's.

    Returns
    -------
    Scene
        ``truth["scene"]`` holds the kind.

    Examples
    --------
    >>> scene = real_scene("sqrt7", size=96, rng=3)
    >>> scene.truth["scene"], scene.truth["det"]
    ('sqrt7', 7)
    """
    if kind not in REAL_SCENES:
        raise InputError(f"kind must be one of {', '.join(REAL_SCENES)}; got {kind!r}")
    size = int(size)
    if size < 32:
        raise InputError(f"size must be at least 32 pixels, got {size}")
    # Each kind draws from its own stream, so two kinds with one seed do not share a layout.
    if isinstance(rng, np.random.Generator) or rng is None:
        gen = _rng(rng)
    else:
        gen = np.random.default_rng((int(rng), REAL_SCENES.index(kind)))
    jitter_angle = float(gen.uniform(-4, 4))
    jitter_a = float(1 + gen.uniform(-0.01, 0.01))
    rows_of = {"noisy": size * 3 // 4}
    shape = (rows_of.get(kind, size), size)
    a_cdw = 0.336 * jitter_a
    d_cdw = a_cdw * math.sqrt(3) / 2
    px = _pixel_for(size, 0.05, d_cdw)
    line = px  # nm per row, for drift in pixel terms

    if kind in ("bilayer", "mismatch"):
        a = 0.246 * jitter_a
        px = _pixel_for(size, 0.08, a * math.sqrt(3) / 2)
        if kind == "bilayer":
            args = dict(shape=shape, pixel_size_nm=px, a_nm=a, theta_deg=1.0 + gen.uniform(-0.1, 0.1),
                        heterostrain_percent=0.3, heterostrain_angle_deg=float(gen.uniform(0, 180)), mismatch=0.0,
                        conditions=Conditions(thermal_drift_nm_per_line=(0.02 * px, 0.01 * px), tilt_nm=0.3,
                                              line_noise_nm=0.002, white_noise_nm=0.006))
        else:
            args = dict(shape=shape, pixel_size_nm=px, a_nm=a, theta_deg=0.4 + gen.uniform(-0.15, 0.15),
                        heterostrain_percent=0.0, mismatch=0.018,
                        conditions=Conditions(creep_nm=(0.5, 0.3), creep_lines=shape[0] / 10, tilt_nm=0.2,
                                              pink_noise_nm=0.004, white_noise_nm=0.005))
        args.update(overrides)
        scene = bilayer_scene(rng=gen, **args)
    elif kind in ("nearly_commensurate", "discommensurate"):
        a = 0.344 * jitter_a
        px = _pixel_for(size, 0.05, a * math.sqrt(3) / 2)
        if kind == "nearly_commensurate":
            args = dict(shape=shape, pixel_size_nm=px, a_nm=a, angle_deg=11.0 + jitter_angle, n=3,
                        delta=float(gen.uniform(0.01, 0.02)), discommensurations=False, cdw_to_lattice=2.0,
                        nonlinearity=0.15,
                        conditions=Conditions(thermal_drift_nm_per_line=(0.03 * px, -0.02 * px), tilt_nm=0.3,
                                              line_noise_nm=0.003, white_noise_nm=0.005))
        else:
            args = dict(shape=shape, pixel_size_nm=px, a_nm=a, angle_deg=11.0 + jitter_angle, n=3,
                        delta=float(gen.uniform(0.025, 0.035)), discommensurations=True, slip_width_nm=0.5,
                        cdw_to_lattice=2.0, nonlinearity=0.15,
                        conditions=Conditions(thermal_drift_nm_per_line=(0.02 * px, 0.02 * px),
                                              line_noise_nm=0.002, white_noise_nm=0.005))
        args.update(overrides)
        scene = incommensurate_cdw_scene(rng=gen, **args)
    else:
        angle = 7.0 + jitter_angle
        common = dict(shape=shape, pixel_size_nm=px, a_nm=a_cdw, angle_deg=angle)
        if kind == "sqrt13":
            args = dict(supercell=((4, -1), (1, 3)), mirror_domains=True, n_domains=6, cdw_to_lattice=2.0,
                        nonlinearity=0.2,
                        conditions=Conditions(thermal_drift_nm_per_line=(0.02 * line, 0.01 * line), tilt_nm=0.4,
                                              line_noise_nm=0.002, white_noise_nm=0.004))
        elif kind == "sqrt7":
            args = dict(supercell=((3, -1), (1, 2)), mirror_domains=True, n_domains=6, cdw_to_lattice=1.0,
                        nonlinearity=0.15,
                        conditions=Conditions(pink_noise_nm=0.006, line_noise_nm=0.004, white_noise_nm=0.003,
                                              tilt_nm=0.3))
        elif kind == "sqrt3":
            common["pixel_size_nm"] = (px, px * 0.85)
            args = dict(supercell=((2, -1), (1, 1)), n_domains=5, cdw_to_lattice=0.5,
                        conditions=Conditions(creep_nm=(0.6, 0.4), creep_lines=shape[0] / 12,
                                              white_noise_nm=0.003, tilt_nm=0.2))
        elif kind == "strong_cdw_tip_change":
            args = dict(supercell=((3, 0), (0, 3)), n_domains=6, cdw_to_lattice=3.0, nonlinearity=0.2,
                        conditions=Conditions(tip_change_row=int(shape[0] * gen.uniform(0.4, 0.6)),
                                              tip_change_contrast=0.6, tip_change_offset_nm=0.05,
                                              tip_change_shift_px=(3.0, 2.0), white_noise_nm=0.004,
                                              line_noise_nm=0.002))
        elif kind == "creep":
            args = dict(supercell=((3, 0), (0, 3)), n_domains=5, cdw_to_lattice=2.0,
                        conditions=Conditions(creep_nm=(1.5, 1.0), creep_lines=shape[0] / 8,
                                              thermal_drift_nm_per_line=(0.05 * line, 0.03 * line),
                                              white_noise_nm=0.004))
        elif kind == "steps":
            args = dict(supercell=((3, 0), (0, 3)), n_domains=5, cdw_to_lattice=2.0,
                        conditions=Conditions(steps=2, step_height_nm=0.6, tilt_nm=0.5, white_noise_nm=0.004,
                                              line_noise_nm=0.002))
        elif kind == "stripes_2x1":
            args = dict(supercell=((2, 0), (0, 1)), rotation_domains=True, n_domains=7, cdw_to_lattice=1.5,
                        conditions=Conditions(thermal_drift_nm_per_line=(0.02 * line, 0.0), white_noise_nm=0.004,
                                              line_noise_nm=0.002))
        else:  # noisy
            common["pixel_size_nm"] = (px * 1.15, px)
            args = dict(supercell=((3, 0), (0, 3)), n_domains=6, cdw_to_lattice=2.0,
                        conditions=Conditions(pink_noise_nm=0.01, line_noise_nm=0.008, white_noise_nm=0.008,
                                              glitch_lines=max(2, shape[0] // 150), tilt_nm=0.5))
        common.update(args)
        common.update(overrides)
        scene = supercell_cdw_scene(rng=gen, **common)
    scene.truth["scene"] = kind
    scene.truth["seed"] = int(rng) if isinstance(rng, (int, np.integer)) else None
    return scene


# --------------------------------------------------------------------------- electronic types


def _type_offsets(n_types, biases_V):
    """Default conductance offsets (nS) per type and bias, x = V / max|V|: -0.4 x, +0.4 x, +0.25 (derived patterns)."""
    x = np.asarray(biases_V, float) / max(np.abs(biases_V).max(), 1e-12)
    patterns = [-0.4 * x, 0.4 * x, np.full_like(x, 0.25)]
    if n_types == 1:
        return np.zeros((1, len(x)))
    return np.array(patterns[:n_types])


def electronic_types_scene(*, shape=(1024, 1024), pixel_size_nm=0.05, a_nm=0.336, angle_deg=7.0, n_types=2,
                           n_domains=10, biases_V=(-0.3, -0.1, 0.1, 0.3), offsets_nS=None, cdw_amplitude_nS=None,
                           base_nS=1.0, noise_nS=0.05, lattice_nS=0.03, tip_change=True, tip_change_contrast=0.85,
                           tip_change_offset_nS=0.15, setpoint_ratio=1.5, wall_width_nm=0.25, rng=0):
    """A 3×3 CDW in Voronoi domains whose electronic type (conductance, CDW amplitude) is independent of the variant.

    The topograph is :func:`supercell_cdw_scene` with M = 3 I (nine translational
    variants, neighbours in different variants). Each domain also gets an electronic
    type t, drawn independently of its variant. The true conductance at bias V_k is

    g_k(r) = b_k + sum_d w_d(r) [delta_{t(d),k} + s_k a_{t(d),k} sum_j cos(Q_j . r + phi_j^d)]
    + l sum_j cos(G_j . r),

    w_d the smoothed Voronoi partition, b_k = ``base_nS`` (1 + 0.8 |V_k| / 1 V), s_k = sign(V_k)
    (filled- and empty-state CDW contrasts complementary), l = ``lattice_nS``. The maps are
    taken at different times: map k is recorded at the setpoint I_k (I_0 = 100 pA, every
    odd-numbered map at ``setpoint_ratio`` I_0), and a constant-current dI/dV map scales
    with the setpoint current, m_k = (I_k / I_0) g_k (common practice, no source). With
    ``tip_change``, the tip changes at a row of map n // 2: from that row on, and in every
    later map, m -> c m + o (c = ``tip_change_contrast``, o = ``tip_change_offset_nS``).
    White noise of ``noise_nS`` is added last.

    Parameters
    ----------
    shape : (int, int)
        Image shape (row, col).
    pixel_size_nm : float
        Pixel size, nm (must resolve the atoms).
    a_nm, angle_deg : float
        Lattice constant (nm) and direction of a1 (degrees), an invented layered crystal.
    n_types : {1, 2, 3}
        Number of electronic types.
    n_domains : int
        Number of Voronoi domains (at least ``n_types``).
    biases_V : sequence of float
        Bias of each map, V (distinct, nonzero).
    offsets_nS : (n_types, n_biases) array_like, optional
        delta_{t,k}, nS. Default with x = V / max|V|: type 0 -0.4 x, type 1 +0.4 x,
        type 2 +0.25 (bright at negative bias, the opposite, and the same at both).
    cdw_amplitude_nS : (n_types, n_biases) array_like, optional
        a_{t,k}, nS; default 0.06 (1 + 0.5 t) at every bias.
    base_nS, noise_nS, lattice_nS : float
        Background conductance at 0 V, white noise per pixel and the atomic term, nS.
    tip_change : bool
        Whether the tip changes (contrast and offset) between maps.
    tip_change_contrast, tip_change_offset_nS : float
        c and o of the tip change.
    setpoint_ratio : float
        Setpoint of the odd-numbered maps over that of the even-numbered ones.
    wall_width_nm : float
        Gaussian width of the walls, nm.
    rng : int or numpy.random.Generator
        Seed.

    Returns
    -------
    Scene
        kind "electronic_types"; ``maps`` are conductance Scans (nS) with ``setpoint_A``.
        ``truth["electronic"]``: ``type_of_domain`` ({label: type}), ``offsets_nS``,
        ``cdw_amplitude_nS``, ``biases_V``, ``setpoints_A``, ``tip_change``,
        ``area_px`` per domain, ``type_contrast_nS`` (n_types, n_biases: delta_t minus its
        area-weighted mean over the frame's domains, the truth of a contrast relative to the
        frame) and the other truths of :func:`supercell_cdw_scene`. ``truth_maps["type"]``
        is the type of each pixel.

    References
    ----------
    .. [1] J. M. Carpinelli et al., Nature 381, 398 (1996) (complementary filled- and
       empty-state CDW images). doi:10.1038/381398a0

    Examples
    --------
    >>> scene = electronic_types_scene(shape=(96, 96), n_domains=4, rng=1)
    >>> len(scene.maps), sorted(set(scene.truth["electronic"]["type_of_domain"].values()))
    (4, [0, 1])
    """
    gen = _rng(rng)
    shape = _shape(shape)
    if int(n_types) != n_types or not 1 <= int(n_types) <= 3:
        raise InputError(f"n_types must be 1, 2 or 3, got {n_types!r}")
    n_types = int(n_types)
    if int(n_domains) != n_domains or int(n_domains) < n_types:
        raise InputError(f"n_domains must be a whole number >= n_types = {n_types}, got {n_domains!r}")
    biases = np.asarray(biases_V, float).ravel()
    if biases.size < 1 or not np.all(np.isfinite(biases)) or len(set(biases.tolist())) != biases.size \
            or np.any(biases == 0):
        raise InputError(f"biases_V must be distinct, finite, nonzero biases in V, got {biases_V!r}")
    nb = biases.size
    offsets = _type_offsets(n_types, biases) if offsets_nS is None else np.asarray(offsets_nS, float)
    amps = (0.06 * (1 + 0.5 * np.arange(n_types))[:, None] * np.ones(nb) if cdw_amplitude_nS is None
            else np.asarray(cdw_amplitude_nS, float))
    for name, arr in (("offsets_nS", offsets), ("cdw_amplitude_nS", amps)):
        if arr.shape != (n_types, nb) or not np.all(np.isfinite(arr)):
            raise InputError(f"{name} must be finite with shape (n_types, n_biases) = {(n_types, nb)}, "
                             f"got shape {arr.shape}")
    if not float(setpoint_ratio) > 0:
        raise InputError(f"setpoint_ratio must be positive, got {setpoint_ratio!r}")
    if not float(tip_change_contrast) > 0:
        raise InputError(f"tip_change_contrast must be positive, got {tip_change_contrast!r}")

    base = supercell_cdw_scene(shape=shape, pixel_size_nm=pixel_size_nm, a_nm=a_nm, angle_deg=angle_deg,
                               supercell=((3, 0), (0, 3)), n_domains=int(n_domains), cdw_to_lattice=2.0,
                               wall_width_nm=wall_width_nm, conditions=Conditions(white_noise_nm=0.004),
                               biases_V=(), rng=gen)
    pixel = pixel_size_pair(pixel_size_nm)
    labels = base.truth_maps["labels"]
    ids = np.arange(1, int(n_domains) + 1)
    type_of = gen.permutation(np.arange(int(n_domains)) % n_types)
    y, x = np.mgrid[: shape[0], : shape[1]]
    sx, sy = x * pixel[1], y * pixel[0]
    q_cdw = np.array(base.truth["q_cdw_rad_per_nm"])
    bragg = np.array(base.truth["lattice"]["q_bragg_rad_per_nm"])
    lattice = sum(np.cos(g[0] * sx + g[1] * sy) for g in bragg)
    sigma = (max(wall_width_nm, 1e-9) / pixel[0], max(wall_width_nm, 1e-9) / pixel[1])
    offset_map = np.zeros((nb,) + shape)
    cdw_map = np.zeros((nb,) + shape)
    for entry in base.truth["domains"]:
        d = entry["label"]
        w = (ndimage.gaussian_filter((labels == d).astype(float), sigma, mode="nearest") if wall_width_nm > 0
             else (labels == d).astype(float))
        t = int(type_of[d - 1])
        wave = sum(np.cos(q[0] * sx + q[1] * sy + p) for q, p in zip(q_cdw, entry["phases_rad"]))
        for k in range(nb):
            offset_map[k] += w * offsets[t, k]
            cdw_map[k] += w * amps[t, k] * np.sign(biases[k]) * wave
    setpoints = np.where(np.arange(nb) % 2 == 1, float(setpoint_ratio), 1.0) * 1e-10
    tc_map, tc_row = nb // 2, int(round(shape[0] * gen.uniform(0.35, 0.65)))
    maps = []
    for k, bias in enumerate(biases):
        g = base_nS * (1 + 0.8 * abs(bias)) + offset_map[k] + cdw_map[k] + lattice_nS * lattice
        m = g * setpoints[k] / setpoints[0]
        if tip_change and k >= tc_map:
            rows = slice(tc_row if k == tc_map else 0, None)
            m[rows] = tip_change_contrast * m[rows] + tip_change_offset_nS
        m = m + gen.normal(0, noise_nS, shape)
        maps.append(Scan(m, pixel_size_nm=pixel, channel="conductance", bias_V=float(bias),
                         setpoint_A=float(setpoints[k]), source=f"<synthetic electronic types scene, {bias:+.2f} V>",
                         metadata={"units": "nS"}))
    area = np.bincount(labels.ravel(), minlength=int(n_domains) + 1)[1:].astype(float)
    mean_offset = (area[:, None] * offsets[type_of]).sum(0) / area.sum()
    truth = dict(base.truth)
    truth["electronic"] = {
        "type_of_domain": {int(d): int(type_of[d - 1]) for d in ids},
        "offsets_nS": offsets.tolist(), "cdw_amplitude_nS": amps.tolist(), "biases_V": biases.tolist(),
        "base_nS": [float(base_nS * (1 + 0.8 * abs(b))) for b in biases], "lattice_nS": float(lattice_nS),
        "noise_nS": float(noise_nS), "setpoints_A": setpoints.tolist(), "area_px": area.tolist(),
        "type_contrast_nS": (offsets - mean_offset[None, :]).tolist(),
        "tip_change": ({"map_index": tc_map, "row": tc_row, "contrast": float(tip_change_contrast),
                        "offset_nS": float(tip_change_offset_nS), "formula": "m -> c m + o"} if tip_change else None),
    }
    truth_maps = dict(base.truth_maps)
    truth_maps["type"] = type_of[labels - 1].astype(np.int32)
    topography = base.topography
    return Scene("electronic_types", topography, maps, truth, truth_maps)
