"""The order step: what the Fourier peaks of an image mean, decided once.

Two calls, one on each side of the drift correction:

* :func:`find_lattice` picks the atomic lattice among the detected peaks (or says
  it is not resolved): the lattice whose reciprocal cell is the smallest real
  cell among the complete sets of peaks (a hexagonal triplet closing on itself,
  G1 + G2 + G3 = 0, or a square pair), not the strongest set, so that a CDW
  stronger than the atoms is not taken for the lattice (docs/methods.md §8);
* :func:`read_order` reads every other peak family on the drift-corrected
  image against that lattice: commensurate superlattices as an integer supercell
  matrix M (A_super = M A, |det M| translational variants, any determinant up
  to :data:`MAX_DETERMINANT`, both chiralities), incommensurate order by a test
  of the measured local wavevector against its own noise (McMillan 1976),
  stripes, a second atomic lattice and the moiré it makes.

The result is a frozen :class:`OrderResult` with a ``to_summary()`` and the
reasons for every choice. ``fourier`` finds and refines peaks; this module
classifies them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from fractions import Fraction

import numpy as np

from ._errors import InputError
from ._lockin import amplitude, choose_sigma, lockin, phase_gradient, trusted_mask
from ._scan import pixel_size_pair

__all__ = ["MAX_DETERMINANT", "LatticeReading", "OrderFamily", "OrderResult", "find_lattice", "read_order",
           "order_basis", "slow_axis_drift_fit", "supercell_name"]

#: Largest |det M| (number of translational variants) searched for a commensurate superlattice.
MAX_DETERMINANT = 16
#: Largest real-space lattice constant taken for an atomic lattice without a hint (nm). The atomic
#: lattices of the layered crystals this tool is for lie between about 0.24 and 0.45 nm (from
#: memory); a larger cell seen alone is a superlattice or a moiré whose atoms are not resolved.
MAX_ATOMIC_A_NM = 0.6
#: A set of peaks counts as a harmonic of a finer set only if the finer set is this much stronger
#: (power ratio); a CDW up to ~5x the atomic corrugation keeps its Bragg peaks (derived: 5.5^2 = 30).
HARMONIC_POWER_RATIO = 30.0
#: Below this fraction of |G| a peak family is a moiré candidate (a 6 degree twist gives 0.105).
MOIRE_MAX_FRACTION = 0.12
#: Number of standard errors for "significantly incommensurate".
N_SIGMA = 3.0
#: Systematic floor of the commensurability test, as a fraction of |q|: the local wavevector of
#: commensurate patches read 0.1-0.2 % off the rational point near dense phase slips (measured on
#: synthetic discommensurate scenes); a 1 % incommensurability stays four times above it.
SYSTEMATIC_FRACTION = 2.5e-3


# --------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LatticeReading:
    """The atomic lattice as read from the peaks (before drift correction).

    Attributes
    ----------
    lattice : domains.fourier.Lattice or None
        The lattice; None when it is not resolved.
    resolved : bool
        Whether atoms are resolved (False also when ``lattice`` came from the user's ``a_nm``).
    source : str
        "found", "given" or "none".
    second : domains.fourier.Lattice or None
        A second atomic lattice of the same size (the other layer of a bilayer).
    unresolved_set_q : ndarray or None
        The finest complete set of peaks when it was too coarse for atoms (a superlattice or a moiré).
    reasons : tuple of str
    bragg_err_rad_per_nm : ndarray or None
        1 sigma error of each Cartesian component of each vector of ``lattice.bragg_measured``
        (the peaks the basis is fitted to): lock-in phase noise (:func:`_wavevector_fit`), scaled up
        by the closure misfit G1 + G2 + G3 of a hexagonal set when it exceeds its errors. None when
        the lattice was not measured by lock-in (given, or not refined).
    """

    lattice: object
    resolved: bool
    source: str
    second: object = None
    unresolved_set_q: np.ndarray | None = None
    reasons: tuple = ()
    slow_axis: tuple = (0.0, 0.0)
    bragg_err_rad_per_nm: np.ndarray | None = None

    @property
    def to_material(self) -> np.ndarray:
        """Matrix taking image-frame wavevectors (rows) to the frame of the undistorted material: q @ D.

        D = [[1, shear], [0, 1 + stretch]] is the slow-axis drift distortion r_img = D r (identity when none).
        """
        shear, stretch = self.slow_axis
        return np.array([[1.0, shear], [0.0, 1.0 + stretch]])


@dataclass(frozen=True)
class OrderFamily:
    """One family of order peaks related by the lattice's symmetry (a triple-q set, a stripe pair ...).

    Attributes
    ----------
    kind : str
        "commensurate", "incommensurate" or "moire".
    q_rad_per_nm : (k, 2) ndarray
        The family's fundamental wavevectors (measured for incommensurate order, exact for commensurate).
    q_err_rad_per_nm : (k,) ndarray
        1 sigma error of each Cartesian component of each wavevector. Commensurate order: exact in
        units of the lattice, so the error is that of the Bragg basis propagated to q = h G1 + k G2
        (:func:`_order_q_err`; zero for a lattice given by the user). Incommensurate order: the
        standard error of the local wavevector measured relative to the local lattice (the mode of
        the phase gradients, its error from :func:`_trimmed_centre_error`) with the basis's error added.
    coefficients : (k, 2) ndarray or None
        q = h G1 + k G2 in the Bragg basis (exact fractions for commensurate order, measured otherwise).
    supercell : (2, 2) int ndarray or None
        M with A_super = M A (commensurate order).
    name : str
        "3x3", "sqrt13xsqrt13R13.9", "2x1", "incommensurate", ...
    variants : int
        |det M| (1 for incommensurate order).
    chirality : int
        +1 or -1 for a rotated supercell (R+theta, R-theta), 0 otherwise.
    mean_detuning_rad_per_nm : (k, 2) ndarray or None
        Mean wavevector minus the commensurate one, over the frame (phase slips included).
    mean_detuning_err_rad_per_nm : (k,) ndarray or None
    discommensuration_nm : float or None
        2 pi / |dq| of the mean detuning when it is significant (McMillan 1976).
    presence : (k,) ndarray
        Fraction of the trusted frame where each component is above the noise threshold.
    """

    kind: str
    q_rad_per_nm: np.ndarray
    q_err_rad_per_nm: np.ndarray
    coefficients: np.ndarray | None
    supercell: np.ndarray | None
    name: str
    variants: int
    chirality: int = 0
    mean_detuning_rad_per_nm: np.ndarray | None = None
    mean_detuning_err_rad_per_nm: np.ndarray | None = None
    discommensuration_nm: float | None = None
    presence: np.ndarray | None = None
    _lattice: object = field(default=None, repr=False, compare=False)

    @property
    def component_names(self) -> list:
        """The supercell of each component alone (e.g. "2x1" for one direction of a stripe order)."""
        if self.kind != "commensurate" or self.coefficients is None or self._lattice is None:
            return []
        return [supercell_name([c], self._lattice)[1] for c in self.coefficients]

    def to_summary(self) -> dict:
        """JSON-ready description."""
        out = {
            "kind": self.kind, "name": self.name, "variants": int(self.variants), "chirality": int(self.chirality),
            "q_rad_per_nm": np.asarray(self.q_rad_per_nm).tolist(),
            "q_err_rad_per_nm": np.asarray(self.q_err_rad_per_nm).tolist(),
            "period_nm": [float(2 * math.pi / np.hypot(*q)) for q in self.q_rad_per_nm],
            "coefficients": None if self.coefficients is None else np.asarray(self.coefficients).tolist(),
            "supercell_matrix": None if self.supercell is None else np.asarray(self.supercell).astype(int).tolist(),
            "discommensuration_nm": self.discommensuration_nm,
        }
        if self.coefficients is not None and self.kind == "commensurate":
            out["fractions"] = [[str(Fraction(float(c)).limit_denominator(64)) for c in row]
                                for row in self.coefficients]
        if self.mean_detuning_rad_per_nm is not None:
            out["mean_detuning_rad_per_nm"] = np.asarray(self.mean_detuning_rad_per_nm).tolist()
            out["mean_detuning_err_rad_per_nm"] = np.asarray(self.mean_detuning_err_rad_per_nm).tolist()
        if self.presence is not None:
            out["presence_fraction"] = [float(p) for p in self.presence]
        return out


@dataclass(frozen=True)
class OrderResult:
    """What the peaks of an image mean: lattice, order families, moiré, and why.

    Attributes
    ----------
    kind : str
        "commensurate", "incommensurate", "stripes", "moire" or "none".
    lattice : LatticeReading
    families : tuple of OrderFamily
        The order's families (CDW or stripes), strongest first.
    stripes : bool
        Unidirectional order: locally one component dominates (orientational domains).
    moire_q_rad_per_nm : ndarray or None
        The moiré wavevectors (three), when a moiré is seen.
    moire_from_bragg : dict or None
        Twist and heterostrain from the two layers' Bragg peaks (atoms resolved).
    peaks : list of domains.fourier.Peak
        Every detected peak with its role.
    reasons : tuple of str
        Every decision, in words.
    """

    kind: str
    lattice: LatticeReading
    families: tuple = ()
    stripes: bool = False
    moire_q_rad_per_nm: np.ndarray | None = None
    moire_from_bragg: dict | None = None
    peaks: tuple = ()
    reasons: tuple = ()
    sigma_test_nm: float | None = None

    @property
    def order_q(self):
        """All order wavevectors (k, 2), family by family, or None."""
        if not self.families:
            return None
        return np.concatenate([f.q_rad_per_nm for f in self.families])

    @property
    def coefficients(self):
        """Coefficients of :attr:`order_q` in the Bragg basis (None if any family has none)."""
        if not self.families or any(f.coefficients is None for f in self.families):
            return None
        return np.concatenate([f.coefficients for f in self.families])

    def to_summary(self) -> dict:
        """JSON-ready description (the ``superlattice`` part of ``summary.json``)."""
        fams = [f.to_summary() for f in self.families]
        name = None
        if self.kind in ("commensurate", "incommensurate", "stripes") and self.families:
            names = []
            for f in self.families:
                if f.name not in names:
                    names.append(f.name)
            name = " + ".join(names)
            if self.stripes:
                comp = [f.component_names for f in self.families]
                comp = list(dict.fromkeys(n for c in comp for n in c))
                k = sum(len(f.q_rad_per_nm) for f in self.families)
                name = (f"{' / '.join(comp)} stripes" if comp else "incommensurate stripes") + \
                    f" ({k} orientation{'s' if k > 1 else ''})"
            mirrored = {f.chirality for f in self.families} == {1, -1}
            if mirrored:
                name += " (both chiralities)"
        return {
            "order": name,
            "kind": self.kind,
            "lattice_resolved": bool(self.lattice.resolved),
            "families": fams,
            "q_rad_per_nm": None if self.order_q is None else self.order_q.tolist(),
            "q_err_rad_per_nm": None if not self.families else np.concatenate(
                [f.q_err_rad_per_nm for f in self.families]).tolist(),
            "q_err_meaning": _q_err_meaning(self.families, self.lattice),
            "coefficients": None if self.coefficients is None else self.coefficients.tolist(),
            "variants": None if not self.families else int(sum(f.variants for f in self.families)),
            "moire_from_bragg": self.moire_from_bragg,
            "reasons": list(self.reasons),
        }


def _q_err_meaning(families, lattice_reading):
    """What ``q_err_rad_per_nm`` of the summary is, in words (None without an order)."""
    if not families:
        return None
    kinds = {f.kind for f in families}
    given = lattice_reading is None or lattice_reading.bragg_err_rad_per_nm is None
    basis = ("the lattice given or not measured by lock-in: the lattice constant and orientation errors "
             "propagated (zero for a lattice given by the user)" if given else
             "the errors of the Bragg vectors measured by lock-in (phase noise of the image; the closure "
             "G1 + G2 + G3 = 0 when it fails beyond them) propagated to q = h G1 + k G2")
    parts = []
    if "commensurate" in kinds:
        parts.append("commensurate q: exact in units of the lattice; its error is that of the lattice, " + basis)
    if "incommensurate" in kinds:
        parts.append("incommensurate q: standard error of the local wavevector measured relative to the "
                     "lattice (the mode of the phase gradients, its error simulated on the lock-in's noise "
                     "model at the measured spread), with the basis error added")
    return "1 sigma per Cartesian component, statistical; " + "; ".join(parts)


# --------------------------------------------------------------------------------------
# The lattice
# --------------------------------------------------------------------------------------


def order_basis(lattice):
    """The basis in which order coefficients are written: the first two Bragg vectors (G1, G2).

    They are the vectors whose phases the drift correction measures (G3 = -(G1 + G2) on a
    hexagonal lattice), so coefficients, relative phases and variant templates share one basis.

    Parameters
    ----------
    lattice : domains.fourier.Lattice

    Returns
    -------
    (2, 2) ndarray
        Rows G1, G2 in rad/nm.

    Examples
    --------
    >>> from domains.fourier import Lattice
    >>> order_basis(Lattice.from_params("square", 0.4)).shape
    (2, 2)
    """
    return np.asarray(lattice.bragg, float)[:2]


def _angle_between_deg(u, v):
    c = abs(u @ v) / (np.hypot(*u) * np.hypot(*v))
    return math.degrees(math.acos(min(1.0, c)))  # in [0, 90]


def _bin(shape, pixel):
    return 2 * math.pi / max(shape[0] * pixel[0], shape[1] * pixel[1])


def _nearest_peak(q, target):
    from .fourier import _canonical

    t = _canonical(target)
    d = np.hypot(*(q - t).T)
    m = int(np.argmin(d))
    return m, float(d[m])


def _lattice_candidates(q, power, err, bin_q):
    """Complete sets of peaks: hexagonal triplets closing on themselves and square pairs."""
    n = len(q)
    qa = np.hypot(*q.T)
    cands = {}
    for i in range(n):
        for j in range(i + 1, n):
            r = qa[i] / qa[j]
            if not 0.8 <= r <= 1.25:
                continue
            ang = _angle_between_deg(q[i], q[j])  # 60 for the canonical members of a hexagonal set
            if abs(ang - 60) <= 20:
                for third in (q[i] - q[j], q[i] + q[j]):
                    if not 0.8 <= np.hypot(*third) / qa[i] <= 1.25:
                        continue
                    m, d = _nearest_peak(q, third)
                    # A tip change or creep splits peaks: their interpolated centres can be a bin or more off.
                    tol = max(2.5 * bin_q, 4 * math.sqrt(err[i] ** 2 + err[j] ** 2 + err[m] ** 2))
                    if m in (i, j) or d > tol:
                        continue
                    idx = tuple(sorted((i, j, m)))
                    basis = np.array([q[i], q[j]])
                    area = abs(np.linalg.det(basis))
                    key = ("hexagonal", idx)
                    if key not in cands or cands[key]["closure"] > d:
                        # A set is as strong as its weakest member (a strong peak and two speckles are weak).
                        cands[key] = dict(kind="hexagonal", idx=idx, area=area, closure=d / bin_q,
                                          power=float(np.min(power[list(idx)])), basis=basis,
                                          distortion=float(np.std(qa[list(idx)]) / np.mean(qa[list(idx)])))
            elif abs(ang - 90) <= 5 and abs(r - 1) <= 0.05:
                # A square pair need not show its (1, 1) order; it is only taken when no hexagonal set exists.
                basis = np.array([q[i], q[j]])
                cands[("square", (i, j))] = dict(kind="square", idx=(i, j), area=abs(np.linalg.det(basis)),
                                                 closure=0.0, power=float(np.min(power[[i, j]])), basis=basis,
                                                 distortion=abs(r - 1))
    return list(cands.values())


def _is_harmonic_set(big, fine, q, power, bin_q):
    """Whether ``big`` is a harmonic of the finer set ``fine`` (all its vectors integer in fine's basis,
    fine much stronger, and for indices above 4 the second order 2 x fine present)."""
    if fine["area"] >= big["area"] * 0.99 or fine["power"] < HARMONIC_POWER_RATIO * big["power"]:
        return False
    inv = np.linalg.inv(fine["basis"])
    for m in big["idx"]:
        f = q[m] @ inv
        if np.hypot(*((f - np.round(f)) @ fine["basis"])) > 2 * bin_q:
            return False
    index = big["area"] / fine["area"]
    if index > 4.5:
        for v in fine["basis"]:
            _, d = _nearest_peak(q, 2 * v)
            if d > 2 * bin_q:
                return False
    return True


def _regularising_map(cand):
    """The linear map that takes the set's basis to a regular (hexagonal or square) one of the same mean size."""
    g = cand["basis"]
    size = float(np.mean(np.hypot(*g.T)))
    alpha = math.atan2(g[0, 1], g[0, 0])
    turn = math.atan2(g[0, 0] * g[1, 1] - g[0, 1] * g[1, 0], g[0] @ g[1])  # signed angle g1 -> g2
    step = math.radians(60 if cand["kind"] == "hexagonal" else 90) * (1 if turn >= 0 else -1)
    if cand["kind"] == "hexagonal" and abs(abs(turn) - math.radians(120)) < abs(abs(turn) - math.radians(60)):
        step *= 2
    h = size * np.array([[math.cos(alpha), math.sin(alpha)], [math.cos(alpha + step), math.sin(alpha + step)]])
    return np.linalg.solve(g, h).T


def _is_mixing_set(s, t, u, q, bin_q):
    """Whether every vector of set s is a sum of low-order points of sets t and u, s weaker than both
    (a nonlinearity mixes two lattices, e.g. G + Q of the atoms and a CDW: not a third lattice)."""
    if s["power"] >= min(t["power"], u["power"]):
        return False
    pts = []
    for c in (t, u):
        b = c["basis"]
        pts.append(np.array([h * b[0] + k * b[1] for h in range(-2, 3) for k in range(-2, 3)]))
    sums = (pts[0][:, None, :] + pts[1][None, :, :]).reshape(-1, 2)
    # Peaks split by a tip change or creep sit up to their sets' closure misfit off: allow for it.
    tol = (2 + t["closure"] + u["closure"]) * bin_q
    for m in s["idx"]:
        if min(np.min(np.hypot(*(sums - q[m]).T)), np.min(np.hypot(*(sums + q[m]).T))) > tol:
            return False
    return True


def find_lattice(peaks, *, shape, pixel_size_nm, given=None, a_nm=None, max_atomic_a_nm=MAX_ATOMIC_A_NM):
    """The atomic lattice among detected peaks, or "not resolved".

    Candidates are the complete sets of peaks: three peaks of similar length at
    about 60 degrees whose vectors close (G1 + G2 + G3 = 0 within the peak
    uncertainty: a linear distortion such as drift keeps the closure), or two
    equal peaks at 90 degrees. The atomic lattice is the candidate with the
    largest reciprocal cell (the smallest real cell) that is not a harmonic of a
    much stronger finer set, not the strongest candidate: in STM of layered CDW
    crystals the CDW usually dominates the atomic corrugation (common practice,
    no source). A set whose lattice constant exceeds ``max_atomic_a_nm`` is not
    taken for atoms: the lattice is then "not resolved" (unless ``a_nm`` is given).

    Parameters
    ----------
    peaks : list of domains.fourier.Peak
        Detected peaks (canonical half-plane).
    shape : (int, int)
        Image shape (row, col), for the frequency bin.
    pixel_size_nm : (float, float)
        Pixel size (row, col) in nm.
    given : dict or domains.fourier.Lattice, optional
        The user's lattice (skips the search).
    a_nm : float, optional
        The user's atomic lattice constant, used when the atoms are not resolved.
    max_atomic_a_nm : float
        Largest lattice constant taken for atoms without a hint.

    Returns
    -------
    LatticeReading

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> from domains.fourier import Lattice, Peak
    >>> lat = Lattice.from_params("hexagonal", 0.34, 5.0)
    >>> qs = [Peak(g, 1e-3, power=1.0) for g in lat.bragg] + [Peak(g / 3, 1e-3, power=9.0) for g in lat.bragg]
    >>> found = find_lattice(qs, shape=(512, 512), pixel_size_nm=(0.05, 0.05))
    >>> found.resolved, round(found.lattice.a_nm, 3)
    (True, 0.34)
    """
    from .fourier import _canonical, _fit_lattice, _lattice_from_dict

    if given is not None:
        lat = _lattice_from_dict(given)
        return LatticeReading(lat, True, "given", reasons=("lattice given by the user",))
    pixel = tuple(pixel_size_nm)
    bin_q = _bin(shape, pixel)
    q = np.array([_canonical(p.q, p.q_err) for p in peaks]).reshape(-1, 2)
    power = np.array([p.power if math.isfinite(p.power) else 0.0 for p in peaks])
    err = np.array([p.q_err if math.isfinite(p.q_err) else bin_q for p in peaks])
    cands = _lattice_candidates(q, power, err, bin_q) if len(q) >= 2 else []
    reasons = []
    if any(c["kind"] == "hexagonal" for c in cands):
        # Right-angled pairs among the many combination peaks of a hexagonal pattern are not a square lattice.
        cands = [c for c in cands if c["kind"] == "hexagonal"]
    if cands:
        # Drift and creep distort every set by the same linear map: undo the map that makes the strongest
        # set regular, then keep only the sets that are regular too (integer combinations of a commensurate
        # pattern close as well, but are not regular).
        ref = max(cands, key=lambda c: c["power"])
        undo = _regularising_map(ref)
        for c in cands:
            v = q[list(c["idx"])] @ undo.T
            lengths = np.hypot(*v.T)
            c["distortion"] = float(np.std(lengths) / np.mean(lengths))
            c["regular"] = c["distortion"] <= 0.03 and (c["kind"] != "square" or abs(
                _angle_between_deg(v[0], v[1]) - 90) <= 3)
        irregular = [c for c in cands if not c["regular"]]
        cands = [c for c in cands if c["regular"]]
        if irregular:
            reasons.append(f"{len(irregular)} closed set(s) of peaks are not regular once the strongest set is "
                           "made regular: not lattices")
    for c in cands:
        g = math.sqrt(c["area"] / (math.sqrt(3) / 2)) if c["kind"] == "hexagonal" else math.sqrt(c["area"])
        c["a"] = 4 * math.pi / (math.sqrt(3) * g) if c["kind"] == "hexagonal" else 2 * math.pi / g
    if cands:
        # A set a thousand times weaker (in power) than the strongest regular one is a product of two
        # weak terms (mixing), not atoms: a CDW up to ~30 times the atomic corrugation keeps its Bragg
        # peaks above this floor (derived: 31.6^2 = 1000).
        top = max(c["power"] for c in cands)
        faint = [c for c in cands if c["power"] < 1e-3 * top]
        if faint:
            reasons.append(f"{len(faint)} closed set(s) of peaks are over 1000 times weaker than the strongest: "
                           "not lattices")
            cands = [c for c in cands if c["power"] >= 1e-3 * top]
    keep = [c for c in cands if not any(_is_harmonic_set(c, f, q, power, bin_q) for f in cands)]
    if len(keep) < len(cands):
        reasons.append(f"{len(cands) - len(keep)} complete set(s) of peaks are harmonics of a much stronger finer set")
    def size(c):
        return math.sqrt(c["area"])

    # A low-|q| set (a moiré) is not a mixing partner: the second layer of a bilayer is G_bottom - k_moire too.
    mixed = [c for c in keep if any(_is_mixing_set(c, t, u, q, bin_q) for t in keep for u in keep
                                    if t is not c and u is not c and t is not u
                                    and min(size(t), size(u)) >= MOIRE_MAX_FRACTION * size(c))]
    if mixed:
        reasons.append(f"{len(mixed)} complete set(s) of peaks are sums of two stronger sets (mixing): not lattices")
        keep = [c for c in keep if not any(c is m for m in mixed)]
    keep.sort(key=lambda c: -c["area"])
    atomic = [c for c in keep if c["a"] <= max_atomic_a_nm]
    coarse = [c for c in keep if c["a"] > max_atomic_a_nm]
    if not atomic:
        unresolved = None if not coarse else q[list(coarse[0]["idx"])]
        if a_nm is not None:
            reasons.append(f"no atomic lattice among the peaks; indexing against the given a = {a_nm} nm")
            lat = _lattice_from_unresolved(unresolved, a_nm)
            if lat is not None:
                return LatticeReading(lat, False, "given a_nm", unresolved_set_q=unresolved, reasons=tuple(reasons))
        if coarse:
            reasons.append(f"the finest complete set of peaks has a period of {coarse[0]['a']:.3g} nm, larger than "
                           f"any atomic lattice ({max_atomic_a_nm} nm): atoms not resolved; it is read as order")
        else:
            reasons.append("no complete set of peaks (hexagonal triplet or square pair): atoms not resolved")
        return LatticeReading(None, False, "none", unresolved_set_q=unresolved, reasons=tuple(reasons))
    top_area = atomic[0]["area"]
    tied = [c for c in atomic if c["area"] >= 0.9 * top_area]
    tied.sort(key=lambda c: (c["closure"] > 1.0, -c["power"]))
    best = tied[0]
    idx = list(best["idx"])
    lat = _fit_lattice(best["kind"], q[idx], err[idx])
    reasons.append(f"atomic lattice: the finest complete set of peaks ({best['kind']}, a = {lat.a_nm:.4g} nm), "
                   "not the strongest set")
    if best["distortion"] > 0.03:
        reasons.append(f"its Bragg peaks differ in length by {100 * best['distortion']:.1f} % (drift or creep)")
    second = None
    # A second layer: a set of nearly the same size and orientation (twist, mismatch of a few percent).
    others = [c for c in tied[1:] if not set(c["idx"]) & set(best["idx"]) and abs(c["a"] / best["a"] - 1) < 0.06
              and c["kind"] == best["kind"]
              and min(_angle_between_deg(c["basis"][0], v) for v in q[list(best["idx"])]) < 8]
    if others:
        o = others[0]
        second = _fit_lattice(o["kind"], q[list(o["idx"])], err[list(o["idx"])])
        reasons.append(f"a second atomic lattice (a = {second.a_nm:.4g} nm, angle {second.angle_deg:.3f} deg): "
                       "two layers")
    return LatticeReading(lat, True, "found", second=second, reasons=tuple(reasons))


def _lattice_from_unresolved(qset, a_nm):
    """A hexagonal lattice of constant ``a_nm`` whose superlattice (n x n or sqrt(N) R theta) the set is."""
    from .fourier import Lattice

    if qset is None or len(qset) < 2:
        return None
    g = 4 * math.pi / (math.sqrt(3) * a_nm)
    qabs = float(np.mean(np.hypot(*np.asarray(qset).T)))
    ratio2 = (g / qabs) ** 2
    best = None
    for h in range(0, 6):
        for k in range(0, h + 1):
            nn = h * h + h * k + k * k
            if nn < 2 or abs(nn - ratio2) > 0.03 * ratio2:
                continue
            theta = math.degrees(math.atan2(math.sqrt(3) * k, 2 * h + k))
            if best is None or abs(nn - ratio2) < best[0]:
                best = (abs(nn - ratio2), theta)
    if best is None:
        return None
    q0 = np.asarray(qset)[0]
    # The set's first vector is along a superlattice reciprocal vector; the Bragg vector is rotated by -theta
    # from it (one chirality; the other gives the mirror domain's lattice).
    b_angle = math.degrees(math.atan2(q0[1], q0[0])) - best[1]
    return Lattice.from_params("hexagonal", a_nm, (b_angle - 30.0 + 30.0) % 60.0 - 30.0)


# --------------------------------------------------------------------------------------
# Supercells
# --------------------------------------------------------------------------------------


def supercell_name(coefficients, lattice):
    """The supercell matrix M and its name for commensurate wavevectors given as fractions of the Bragg basis.

    Parameters
    ----------
    coefficients : (k, 2) array_like
        Fractions (h, k) of each wavevector in the basis (G1, G2).
    lattice : domains.fourier.Lattice
        The lattice.

    Returns
    -------
    M : (2, 2) int ndarray
        A_super = M A (rows: real-space basis vectors).
    name : str
        "n x n", "n x m", "sqrtN x sqrtN R theta" or "supercell [[..]]".
    variants : int
        |det M|, the number of translational variants.
    chirality : int
        +1, -1 for a rotated (chiral) supercell, 0 otherwise.

    Examples
    --------
    >>> from domains.fourier import Lattice
    >>> lat = Lattice.from_params("hexagonal", 0.336, 0.0)
    >>> M, name, n, c = supercell_name([[4/13, 1/13]], lat)
    >>> name, n
    ('sqrt13xsqrt13R13.9', 13)
    """
    from .fourier import _fmt_deg, _supercell

    fracs = [tuple(Fraction(float(c)).limit_denominator(64) for c in row) for row in np.atleast_2d(coefficients)]
    # The basis of fourier._supercell is lattice.b (b1, b2); the order basis is (G1, G2) = (b1, b2).
    m, name = _supercell(fracs, lattice.kind, lattice)
    if m is None:
        return None, "unknown", 1, 0
    variants = int(round(abs(np.linalg.det(m))))
    chirality = 0
    if name.startswith("sqrt"):
        # The sign of the rotation of the supercell's first vector from the lattice's decides the chirality.
        from .fourier import _gauss_reduce

        from .fourier import Lattice

        # On the ideal lattice: the supercell's angle is a property of M, not of the measured distortion.
        a = Lattice.from_params(lattice.kind, lattice.a_nm, lattice.angle_deg).real_basis_nm
        cells = _gauss_reduce(m.astype(float) @ a)
        fold = 60.0 if lattice.kind == "hexagonal" else 90.0
        rot = (math.degrees(math.atan2(cells[0, 1], cells[0, 0]) - math.atan2(a[0, 1], a[0, 0]))) % fold
        if 1e-3 < rot < fold - 1e-3 and abs(rot - fold / 2) > 1e-3:
            chirality = 1 if rot < fold / 2 else -1
            angle = rot if chirality > 0 else fold - rot
            n_sites = variants
            name = f"sqrt{n_sites}xsqrt{n_sites}R{'' if chirality > 0 else '-'}{_fmt_deg(angle)}"
    # Present M on a reduced (shortest) real-space basis of the supercell.
    from .fourier import _gauss_reduce as _reduce

    a = lattice.real_basis_nm
    reduced = np.rint(_reduce(m.astype(float) @ a) @ np.linalg.inv(a)).astype(np.int64)
    if abs(round(np.linalg.det(reduced))) == variants:
        m = reduced if np.linalg.det(reduced) > 0 else reduced[::-1]
    return m, name, variants, chirality


def _fractions_near(f, basis, radius, max_den=MAX_DETERMINANT):
    """Rational points (denominator <= max_den) within ``radius`` (rad/nm) of fractional point f, nearest first
    within each denominator, smallest denominator first."""
    out = []
    for d in range(1, max_den + 1):
        base = np.floor(f * d)
        best = None
        for di in (0, 1):
            for dj in (0, 1):
                c = (base + (di, dj)) / d
                if np.all(np.abs(c) < 1e-12):
                    continue
                dist = float(np.hypot(*((f - c) @ basis)))
                if dist <= radius and (best is None or dist < best[0]):
                    best = (dist, c)
        if best is not None and not any(np.allclose(best[1], o[1]) for o in out):
            out.append((best[0], best[1], d))
    return out


# --------------------------------------------------------------------------------------
# Local wavevector statistics (the commensurability test)
# --------------------------------------------------------------------------------------


def _trimmed_centre(gx, gy):
    """Mode-seeking centre of a 2-D cloud of gradients: the mean of the core, trimmed at 1.5 robust spreads.

    Inside domains the phase gradient clusters tightly; walls and defects throw values far out.
    Returns the centre, the per-axis spread of the core and the number of values kept.
    """
    m = np.array([np.median(gx), np.median(gy)])
    keep = np.ones(gx.shape, bool)
    s0 = 0.0
    for _ in range(6):
        d = np.hypot(gx - m[0], gy - m[1])
        # Median radial distance of a 2-D Gaussian is 1.1774 of its per-axis sd (derived).
        s0 = float(np.median(d)) / 1.1774
        keep = d < 2.5 * max(s0, 1e-12)
        if keep.sum() < 8:
            break
        m = np.array([gx[keep].mean(), gy[keep].mean()])
    # A last, tight pass about the mode: phase slips between commensurate patches skew the cloud on one
    # side, and a window of one core spread keeps them out (a Gaussian core stays unbiased).
    d = np.hypot(gx - m[0], gy - m[1])
    tight = d < 1.0 * max(s0, 1e-12)
    if tight.sum() >= 8:
        for _ in range(3):
            m = np.array([gx[tight].mean(), gy[tight].mean()])
            tight = np.hypot(gx - m[0], gy - m[1]) < 1.0 * max(s0, 1e-12)
            if tight.sum() < 8:
                break
        keep = tight
    return m, s0, int(keep.sum())


#: Noise draws of the simulated trimmed centre (:func:`_trimmed_centre_error`): 2 x 40 squared
#: deviations fix its standard deviation to 8 % (derived: 1 / sqrt(2 x 80)).
CENTRE_ERROR_DRAWS = 40
#: Largest side (samples) of the window the centre's noise is simulated on; a larger region is
#: represented by its central window of this size, the error scaled by sqrt(window count / count).
CENTRE_ERROR_WINDOW = 512


def _trimmed_centre_error(region, sigma_nm, pixel, spread):
    """1 sigma per axis of :func:`_trimmed_centre` over ``region``, by simulating its noise model.

    The centre is a mode-seeking M-estimator whose window is set by the data, so its variance
    has no closed form: counting sigma-patches (one per 4 pi sigma^2, the area of the phase
    noise's correlation exp(-r^2 / 4 sigma^2)) treats the gradients of different patches as
    independent, but gradients are differences of one phase field and their sum telescopes
    (the linear part of the centre's error is set by the phase at the region's edges), so that
    count overstates the error (about 1.4x, measured on a tone and on incommensurate CDW scenes).
    Instead the centre is computed on ``CENTRE_ERROR_DRAWS`` draws of the noise the lock-in
    leaves: a unit field plus complex white noise filtered by the lock-in's Gaussian (so its
    correlation is exp(-r^2 / 4 sigma^2), derived), with the phase scatter sqrt(2) sigma s that
    gives the measured per-axis gradient spread s (the gradient of a phase of that correlation
    has variance v / (2 sigma^2), derived), sampled on the same grid and region; the spread of
    the simulated centres about the truth (zero), scaled by s over the simulated spread,
    is the error (a parametric bootstrap, Efron & Tibshirani 1993). The draws use a fixed seed.
    A region wider than ``CENTRE_ERROR_WINDOW`` samples is simulated on its central window of that
    size and the error scaled by sqrt(n_window / n): exact for the part of the error that averages
    over independent patches, an overstatement of the telescoping part, which falls faster with the
    area (by 18 % for a region twice the window's width, measured on a tone with a 256 window; only
    frames of thousands of pixels a side reach the window). NaN for fewer than 8 samples.

    References
    ----------
    .. [1] B. Efron and R. J. Tibshirani, An Introduction to the Bootstrap (Chapman & Hall, 1993), ch. 6.
    """
    from scipy import ndimage

    rows, cols = np.nonzero(region)
    if len(rows) < 8 or not (math.isfinite(spread) and spread > 0):
        return math.nan
    dy, dx = pixel
    n_region = len(rows)
    half = CENTRE_ERROR_WINDOW // 2
    cr, cc = (int(np.clip((rows.min() + rows.max()) // 2, half, max(region.shape[0] - half, half))),
              int(np.clip((cols.min() + cols.max()) // 2, half, max(region.shape[1] - half, half))))
    window = np.zeros_like(region)
    window[max(cr - half, 0):cr + half, max(cc - half, 0):cc + half] = True
    rows, cols = np.nonzero(region & window)
    if len(rows) < 8:
        return math.nan
    pad_r, pad_c = int(math.ceil(4 * sigma_nm / dy)) + 2, int(math.ceil(4 * sigma_nm / dx)) + 2
    r0, c0 = max(rows.min() - pad_r, 0), max(cols.min() - pad_c, 0)
    sub = (region & window)[r0:rows.max() + pad_r + 1, c0:cols.max() + pad_c + 1]
    width = (sigma_nm / dy, sigma_nm / dx)
    # Phase scatter of the measured spread, kept in the regime where the phase is near Gaussian.
    eps = min(math.sqrt(2) * sigma_nm * spread, 0.5)
    rng = np.random.default_rng(0)
    dev, spreads = [], []
    for _ in range(CENTRE_ERROR_DRAWS):
        w = [ndimage.gaussian_filter(rng.standard_normal(sub.shape), width, mode="wrap") for _ in range(2)]
        norm = math.sqrt(0.5 * (np.var(w[0]) + np.var(w[1])))
        field = 1 + eps * (w[0] + 1j * w[1]) / max(norm, 1e-300)
        g = phase_gradient(field, pixel_size_nm=pixel)
        centre, s_sim, _ = _trimmed_centre(g[0][sub], g[1][sub])
        dev.append(centre)
        spreads.append(s_sim)
    scale = spread / max(float(np.mean(spreads)), 1e-300) * math.sqrt(len(rows) / n_region)
    return float(np.sqrt(np.mean(np.square(dev))) * scale)


def _mean_gradient_error(weights, spread, sigma_nm, pixel):
    """1 sigma error, per Cartesian component (the root mean square of the two), of the weighted mean
    of a phase gradient field sampled at ``pixel`` = (dy, dx), each axis's samples spread by ``spread``.

    The lock-in's phase noise is correlated as rho(r) = exp(-r^2 / 4 sigma^2) (the autocorrelation of
    its Gaussian, derived), so the x-derivative's noise is correlated as
    (1 - x^2 / 2 sigma^2) rho(r) (minus the second derivative of rho, normalised to 1 at r = 0;
    derived), and var(sum w g / sum w) = s^2 sum_{p,p'} w_p w_p' k(p - p') / (sum w)^2 with s the
    samples' spread. That kernel integrates to zero along its axis: a mean of gradients telescopes to
    the phase at the region's edges, and its error falls faster than 1 / sqrt(number of patches).
    The spread counts all of the gradients' scatter as noise (real structure too): an upper bound where
    the order has walls. Evaluated with separable filters on the samples (as domains.compare's
    variances are).
    """
    from scipy import ndimage

    w = np.asarray(weights, dtype=float)
    total = float(w.sum())
    if total <= 0:
        return math.nan
    out = []
    for axis, s_axis in zip((1, 0), (spread[0], spread[1])):  # x along columns, y along rows
        kernels = []
        for ax, d in ((0, pixel[0]), (1, pixel[1])):
            half = int(math.ceil(8 * sigma_nm / d))
            m = np.arange(-half, half + 1) * d
            k = np.exp(-(m**2) / (4 * sigma_nm**2))
            if ax == axis:
                k = k * (1 - m**2 / (2 * sigma_nm**2))
            kernels.append(k)
        f = ndimage.correlate1d(w, kernels[0], axis=0, mode="constant")
        f = ndimage.correlate1d(f, kernels[1], axis=1, mode="constant")
        out.append(s_axis**2 * max(float(np.sum(w * f)), 0.0) / total**2)
    return float(math.sqrt(np.mean(out)))


def _wavevector_stats(image, q, *, sigma_nm, pixel, mask, threshold, basis=None):
    """Per wavevector: the local wavevector inside ordered regions and the frame mean, with standard errors.

    With ``basis`` (the Bragg vectors G1, G2), the gradient is that of the phase relative to the lattice,
    grad phi_q - (h grad theta_1 + k grad theta_2) with (h, k) the coefficients of q: residual drift and
    creep cancel, so the local wavevector is measured in units of the local lattice (Lawler et al. 2010).
    The local value is the centre of the gradient cloud over ordered pixels (walls excluded by trimming);
    its standard error is simulated on the lock-in's noise model (:func:`_trimmed_centre_error`). The
    frame mean (|A|^2-weighted, walls included) is the mean wavevector, phase slips counted; its error,
    per Cartesian component, is that of a weighted mean of gradients whose noise is correlated as the
    derivative of the lock-in's phase noise (:func:`_mean_gradient_error`): such a mean telescopes, so
    the spread over the number of sigma-patches (used before) made it about three times too large.

    Returns (local (k,2), local_err (k,), mean (k,2), mean_err (k,), presence (k,), amplitude (k,)).
    """
    from ._grid import Grid, choose_step

    q = np.atleast_2d(q)
    k = len(q)
    allq = q if basis is None else np.vstack([q, basis])
    # On the decimated grid (the lock-in is band-limited): the samples are the full-resolution values.
    grid = Grid(np.shape(image), pixel_size_pair(pixel), choose_step(sigma_nm, pixel, np.shape(image)))
    dy, dx = pixel = grid.coarse_pixel_nm
    a = lockin(image, allq, sigma_nm=sigma_nm, pixel_size_nm=grid.pixel_size_nm, mask=mask, step=grid.step)
    if a.ndim == 2:
        a = a[None]
    amp = amplitude(a[:k])
    grad = phase_gradient(a, pixel_size_nm=pixel)
    if basis is not None:
        coef = q @ np.linalg.inv(basis)
        grad = grad[:, :k] - np.einsum("jb,abrc->ajrc", coef, grad[:, k:])
    trusted = grid.sample(trusted_mask(np.shape(image), sigma_nm=sigma_nm, pixel_size_nm=grid.pixel_size_nm,
                                       mask=mask))
    local, local_err = np.full((k, 2), np.nan), np.full(k, np.nan)
    mean, mean_err = np.full((k, 2), np.nan), np.full(k, np.nan)
    presence, amp_med = np.zeros(k), np.zeros(k)
    for j in range(k):
        ok = trusted & np.isfinite(amp[j]) & np.all(np.isfinite(grad[:, j]), axis=0)
        where = ok & (amp[j] > threshold)
        presence[j] = where.sum() / max(ok.sum(), 1)
        if where.sum() < 16:
            continue
        amp_med[j] = float(np.median(amp[j][where]))
        # The local wavevector from the strongly ordered pixels (wall cores have a reduced amplitude).
        strong = where & (amp[j] >= 0.5 * amp_med[j])
        gx, gy = grad[0, j][strong], grad[1, j][strong]
        centre, spread, kept = _trimmed_centre(gx, gy)
        local[j] = q[j] + centre
        # The centre's error per axis from its simulated noise model (the sigma-patch count overstates
        # it: _trimmed_centre_error), combined over both axes.
        err = _trimmed_centre_error(strong, sigma_nm, pixel, spread)
        # Too few samples to simulate: the spread of one sample, the most it can be.
        local_err[j] = math.sqrt(2) * (err if math.isfinite(err) else spread)
        gx, gy = grad[0, j][where], grad[1, j][where]
        w = amp[j][where] ** 2
        mg = np.array([np.sum(w * gx), np.sum(w * gy)]) / w.sum()
        sd = np.array([math.sqrt(np.sum(w * (v - m_) ** 2) / w.sum()) for v, m_ in ((gx, mg[0]), (gy, mg[1]))])
        mean[j] = q[j] + mg
        mean_err[j] = _mean_gradient_error(np.where(where, amp[j] ** 2, 0.0), sd, sigma_nm, (dy, dx))
    return local, local_err, mean, mean_err, presence, amp_med


def _wavevector_fit(image, q, *, sigma_nm, pixel, mask=None, clip=4.0, noise_var=None):
    """Wavevectors refined by a plane through the unwrapped lock-in phase, with their 2 x 2 covariances.

    Near a wavevector q0 the lock-in phase of a wave q is phi(r) = (q - q0).r + phi0 + noise, so
    weighted least squares of the unwrapped phase on (1, x, y), weights |A|^2 (the inverse phase-noise
    variance), gives q - q0. For a tone in white noise this attains the Cramér–Rao bound,
    var(q_x) = 24 s^2 / (t^2 N L_x^2) for a wave of amplitude t over N pixels spanning L_x, noise s
    per pixel (Rife & Boorstyn 1974, in two dimensions; derived), which a centre of the local phase
    gradients does not (about 4x its spread, measured). Pixels whose weighted residual is more than
    ``clip`` robust spreads out (creep, a tip change, a defect) are left out, in three passes.

    Covariance: the phase noise of the lock-in is correlated between pixels d apart as
    exp(-d^2 / (4 sigma^2)) (derived), so Cov = v (X'X)^-1 X'RX (X'X)^-1 in the weighted variables
    X = |A| (1, x, y), with the scale v measured from the residuals, whose expectation under that
    correlation is v (N - tr((X'X)^-1 X'RX)). The residuals hold the phase noise measured in the image
    and any smooth phase the plane cannot follow (drift), so a drifted frame gets a larger error. A
    small frame holds few independent patches and v is then itself uncertain: with ``noise_var``, the
    variance of one component of the lock-in measured at empty wavevectors (many more patches), v is
    that floor unless the residuals exceed it significantly (a misfit: drift, creep).

    Returns (q (k, 2), cov (k, 2, 2)); NaN where a wavevector has too few trusted pixels.

    References
    ----------
    .. [1] D. C. Rife and R. R. Boorstyn, "Single-tone parameter estimation from discrete-time
       observations", IEEE Trans. Inf. Theory 20, 591 (1974). doi:10.1109/TIT.1974.1055282
    """
    from scipy import ndimage
    from skimage.restoration import unwrap_phase

    from ._grid import Grid, choose_step

    q = np.atleast_2d(np.asarray(q, float))
    grid = Grid(np.shape(image), pixel_size_pair(pixel), choose_step(sigma_nm, pixel, np.shape(image)))
    dy, dx = grid.coarse_pixel_nm
    a = lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=grid.pixel_size_nm, mask=mask, step=grid.step)
    if a.ndim == 2:
        a = a[None]
    trusted = grid.sample(trusted_mask(np.shape(image), sigma_nm=sigma_nm, pixel_size_nm=grid.pixel_size_nm,
                                       mask=mask))
    rows, cols = np.mgrid[: a.shape[1], : a.shape[2]]
    corr_px = (math.sqrt(2) * sigma_nm / dy, math.sqrt(2) * sigma_nm / dx)
    norm = 4 * math.pi * sigma_nm**2 / (dy * dx)  # sum over pixels of exp(-d^2 / 4 sigma^2)
    out_q = np.full(q.shape, np.nan)
    out_cov = np.full((len(q), 2, 2), np.nan)
    for j, aj in enumerate(a):
        amp = np.abs(aj)
        use = trusted & np.isfinite(amp)
        if use.sum() < 16:
            continue
        use &= amp > 0.3 * np.median(amp[use])
        # One connected region: the unwrapped phase of separate pieces may differ by 2 pi.
        regions, count = ndimage.label(use)
        if count == 0:
            continue
        use = regions == (np.argmax(np.bincount(regions.ravel())[1:]) + 1)
        if use.sum() < 16:
            continue
        phase = unwrap_phase(np.ma.array(np.angle(np.where(use, aj, 1.0)), mask=~use)).filled(0.0)
        y = rows * dy
        x = cols * dx
        x0, y0 = x[use].mean(), y[use].mean()
        keep = use.copy()
        for _ in range(3):
            r_, c_ = np.nonzero(keep)
            w = amp[r_, c_]
            design = w[:, None] * np.stack([np.ones(r_.size), x[r_, c_] - x0, y[r_, c_] - y0], axis=1)
            beta, *_ = np.linalg.lstsq(design, w * phase[r_, c_], rcond=None)
            resid_all = amp * (phase - beta[0] - beta[1] * (x - x0) - beta[2] * (y - y0))
            spread = 1.4826 * float(np.median(np.abs(resid_all[keep])))
            new_keep = use & (np.abs(resid_all) <= clip * max(spread, 1e-300))
            if np.array_equal(new_keep, keep) or new_keep.sum() < 16:
                break
            keep = new_keep
        r_, c_ = np.nonzero(keep)
        w = amp[r_, c_]
        design = w[:, None] * np.stack([np.ones(r_.size), x[r_, c_] - x0, y[r_, c_] - y0], axis=1)
        beta, *_ = np.linalg.lstsq(design, w * phase[r_, c_], rcond=None)
        resid = w * phase[r_, c_] - design @ beta
        smoothed = np.empty_like(design)
        plane = np.zeros(amp.shape)
        for col in range(3):
            plane[r_, c_] = design[:, col]
            smoothed[:, col] = norm * ndimage.gaussian_filter(plane, corr_px, mode="constant")[r_, c_]
        try:
            inv = np.linalg.inv(design.T @ design)
        except np.linalg.LinAlgError:
            continue
        xrx = design.T @ smoothed
        dof = r_.size - float(np.trace(inv @ xrx))
        if not dof > 0:
            continue
        v = float(resid @ resid) / dof
        if noise_var is not None and np.isfinite(noise_var) and noise_var > 0:
            # The residual variance of a correlated field has about N dy dx / (2 pi sigma^2) degrees of
            # freedom (sum of rho^2, derived): above the noise floor by 3 of its standard errors it holds
            # a misfit (drift) and is kept; otherwise the better-measured floor is used.
            n_eff = max(r_.size * dy * dx / (2 * math.pi * sigma_nm**2), 1.0)
            v = v if v > noise_var * (1 + 3 * math.sqrt(2 / n_eff)) else float(noise_var)
        cov = v * inv @ xrx @ inv
        out_q[j] = q[j] + beta[1:]
        out_cov[j] = cov[1:, 1:]
    return out_q, out_cov


def _lattice_uncertainty(kind, q, cov):
    """1 sigma errors of |G| (relative) and of the orientation (rad) of an ideal lattice fitted to Bragg vectors.

    Each measured vector's covariance is split into its radial and tangential variance; |G| is their
    radially weighted mean and the orientation the tangentially weighted mean angle (modulo 60 or 90
    degrees), each with the statistical error 1 / sqrt(sum of weights). The disagreement between the
    peaks, chi^2 of the ideal lattice with 2n - 2 degrees of freedom (a distortion, a drift the
    lock-in phase cannot tell from the lattice), scales both errors by the Birge ratio sqrt(chi^2 / dof)
    (R. T. Birge, Phys. Rev. 40, 207 (1932)) when it is significant (:func:`_birge`).

    Returns (relative error of |G|, orientation error in rad, chi^2, dof).
    """
    q = np.asarray(q, float)
    cov = np.asarray(cov, float)
    lengths = np.hypot(q[:, 0], q[:, 1])
    u = q / lengths[:, None]
    t = np.stack([-u[:, 1], u[:, 0]], axis=1)
    var_r = np.einsum("ni,nij,nj->n", u, cov, u)
    var_a = np.einsum("ni,nij,nj->n", t, cov, t) / lengths**2
    w_r, w_a = 1 / var_r, 1 / var_a
    g = float(np.sum(w_r * lengths) / np.sum(w_r))
    fold = 6 if kind == "hexagonal" else 4
    ang = np.arctan2(q[:, 1], q[:, 0])
    centre = float(np.angle(np.sum(w_a * np.exp(1j * fold * ang))) / fold)
    dev = (ang - centre + np.pi / fold) % (2 * np.pi / fold) - np.pi / fold
    mean_dev = float(np.sum(w_a * dev) / np.sum(w_a))
    chi2 = float(np.sum(w_r * (lengths - g) ** 2) + np.sum(w_a * (dev - mean_dev) ** 2))
    dof = 2 * len(q) - 2
    birge = _birge(chi2, dof)
    return birge / math.sqrt(float(np.sum(w_r))) / g, birge / math.sqrt(float(np.sum(w_a))), chi2, dof


def _birge(chi2, dof, level=0.05):
    """Scale factor of statistical errors for a disagreement among measurements: sqrt(chi^2 / dof) when chi^2
    exceeds its upper ``level`` quantile (the spread is then not noise), else 1.

    Scaling whenever chi^2 / dof > 1 (the usual rule) inflates errors that are right by about 10 % on
    average for 2 to 4 degrees of freedom (derived: E[sqrt(max(1, chi^2 / dof))]), which the coverage
    tests see; gated at 5 % the inflation acts only where the peaks disagree beyond their noise.
    """
    from scipy.stats import chi2 as chi2_dist

    if dof <= 0 or not math.isfinite(chi2):
        return 1.0
    return math.sqrt(chi2 / dof) if chi2 > chi2_dist.ppf(1 - level, dof) else 1.0


def _basis_weights(kind, n_measured):
    """Rows: the weights of the measured Bragg vectors in the fitted basis (b1, b2) (least squares of fourier)."""
    if kind == "hexagonal" and n_measured == 3:
        # b = pinv(C) m with C = [[1, 0], [0, 1], [-1, -1]] (G1 = b1, G2 = b2, G3 = -(b1 + b2)): derived.
        return np.array([[2.0, -1.0, -1.0], [-1.0, 2.0, -1.0]]) / 3
    return np.eye(2, n_measured)


def _order_q_err(coefficients, lattice_reading):
    """1 sigma per Cartesian component of q = h G1 + k G2 from the errors of the Bragg vectors.

    A commensurate wavevector is exact in units of the lattice; its absolute error is that of the
    basis: q = sum_j w_j m_j over the measured Bragg vectors m_j (the least-squares basis of the
    lattice fit), so var = sum_j w_j^2 e_j^2 per component, e_j their errors (derived). Without
    measured errors (a lattice given by the user, or not refined) the error comes from the lattice
    constant and orientation alone, |q| sqrt((da / a)^2 + dtheta^2) / sqrt(2), zero for a given lattice.
    """
    coefficients = np.atleast_2d(np.asarray(coefficients, float))
    lat = lattice_reading.lattice
    if lat is None:
        return np.zeros(len(coefficients))
    err = lattice_reading.bragg_err_rad_per_nm
    if err is not None and np.all(np.isfinite(err)):
        weights = coefficients @ _basis_weights(lat.kind, len(err))
        return np.sqrt(weights**2 @ np.asarray(err, float) ** 2)
    rel = lat.a_err_nm / lat.a_nm if lat.a_nm else 0.0
    rot = math.radians(lat.angle_err_deg)
    rel, rot = (rel if math.isfinite(rel) else 0.0), (rot if math.isfinite(rot) else 0.0)
    q_abs = np.hypot(*(coefficients @ order_basis(lat)).T)
    return q_abs * math.sqrt((rel**2 + rot**2) / 2)


def _noise_threshold(image, q, *, sigma_nm, pixel, mask, avoid, false_alarm):
    from .order import noise_floor

    from ._grid import choose_step

    try:
        # On the decimated grid: the samples are the full-resolution values (same statistics, fewer pixels).
        return noise_floor(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel, avoid_q=avoid, mask=mask,
                           false_alarm=false_alarm, step=choose_step(sigma_nm, pixel, np.shape(image))).threshold
    except InputError:
        return 0.0


# --------------------------------------------------------------------------------------
# Families
# --------------------------------------------------------------------------------------


def _group_families(q, bin_q):
    """Indices of q grouped into triples that close (q_a +- q_b +- q_c = 0, equal lengths), then the rest singly.
    Returns a list of (indices, signs)."""
    n = len(q)
    qa = np.hypot(*q.T)
    used = set()
    groups = []
    order = list(range(n))
    for i in order:
        if i in used:
            continue
        found = None
        for j in order:
            if j <= i or j in used or abs(qa[j] / qa[i] - 1) > 0.05:
                continue
            for m in order:
                if m in (i, j) or m in used or abs(qa[m] / qa[i] - 1) > 0.05:
                    continue
                for s1 in (1, -1):
                    for s2 in (1, -1):
                        r = np.hypot(*(q[i] + s1 * q[j] + s2 * q[m]))
                        if r <= max(2 * bin_q, 0.03 * qa[i]) and (found is None or r < found[0]):
                            found = (r, (i, j, m), (1, s1, s2))
        if found is not None:
            groups.append((list(found[1]), list(found[2])))
            used.update(found[1])
    for i in order:
        if i not in used:
            groups.append(([i], [1]))
    return groups


def _aliases(q, pixel):
    """q and its images shifted by the sampling lattice (2 pi / dx, 2 pi / dy): a peak beyond Nyquist folds back."""
    dy, dx = pixel
    sx, sy = 2 * math.pi / dx, 2 * math.pi / dy
    return [q + (i * sx, j * sy) for i in (-1, 0, 1) for j in (-1, 0, 1)]


def _is_moire_combination(q, bragg, second_bragg, inv, tol, pixel=None):
    """Whether q = n1 k1 + n2 k2 + G (|n| <= 3, G a bottom lattice vector) with k_j = G_j - G'_j the moiré
    (or the alias of such a point beyond the Nyquist limit)."""
    if pixel is not None:
        return any(_is_moire_combination(v, bragg, second_bragg, inv, tol) for v in _aliases(q, pixel))
    k = []
    for g in bragg[:2]:
        d = [g - s * t for t in second_bragg for s in (1, -1)]
        k.append(min(d, key=lambda v: np.hypot(*v)))
    basis = bragg[:2]
    for n1 in range(-3, 4):
        for n2 in range(-3, 4):
            if n1 == 0 and n2 == 0:
                continue
            r = q - n1 * k[0] - n2 * k[1]
            f = r @ inv
            if np.hypot(*((f - np.round(f)) @ basis)) <= tol:
                return True
    return False


def _on_a_streak(q, all_q, bin_q):
    """Whether q is an integer multiple (2..12) of a shorter detected peak along the same line: the
    harmonics of a one-dimensional feature (a step edge, a line artefact), not an order of its own."""
    qa = float(np.hypot(*q))
    for v in all_q:
        va = float(np.hypot(*v))
        if va < 1e-9 or va > 0.5 * qa:
            continue
        for sgn in (1, -1):
            n = round(qa / va)
            if 2 <= n <= 12 and np.hypot(*(q - sgn * n * v)) <= max(2 * bin_q, 0.5 * n * bin_q):
                return True
    return False


def _is_combination(f, fundamentals, tol_frac, basis):
    """Whether fractional point f is an integer combination (|c| <= 2, at most two terms) of fundamentals
    plus a lattice vector."""
    cands = [np.zeros(2)]
    for a in fundamentals:
        for c in (1, -1, 2, -2, 3, -3):
            cands.append(c * a)
    for i, a in enumerate(fundamentals):
        for b in fundamentals[i + 1:]:
            for c1 in (1, -1):
                for c2 in (1, -1):
                    cands.append(c1 * a + c2 * b)
    for c in cands[1:]:
        d = f - c
        if np.hypot(*((d - np.round(d)) @ basis)) <= tol_frac:
            return True
    return False


def read_order(image, *, pixel_size_nm, lattice_reading, mask=None, peaks=None, leakage=0.01, false_alarm=1e-3,
               max_determinant=MAX_DETERMINANT, max_families=2, given_q=None, given_superlattice=None,
               anisotropy_threshold=0.5):
    """Read every peak family of a (drift-corrected) image against its lattice.

    For each order peak that is not a Bragg peak, a harmonic of the lattice, a
    second atomic lattice or a combination of stronger order peaks, the local
    wavevector q_loc = q + <grad phi> (the trimmed mean over strongly ordered pixels,
    relative to the local lattice) is measured by
    lock-in with its standard error s (phase-gradient spread over the number of
    independent sigma-patches). The order is commensurate when a rational point
    of the Bragg basis with denominator up to ``max_determinant`` lies within
    3 s (plus a small calibration floor) of q_loc, the smallest such denominator
    winning; otherwise it is incommensurate at q_loc +- s. The frame-mean
    wavevector (walls included) gives the mean incommensurability of
    commensurate patches separated by phase slips and the discommensuration
    spacing 2 pi / |dq| (McMillan 1976). Peaks are grouped into families that
    close (Q1 + Q2 + Q3 = 0); a commensurate family is named by its supercell
    matrix M (A_super = M A, |det M| variants, the chirality of a rotated
    cell). A family whose components dominate in different places is stripes.

    Parameters
    ----------
    image : (row, col) ndarray
        The drift-corrected image (NaN-free).
    pixel_size_nm : (float, float)
        Pixel size (row, col) in nm.
    lattice_reading : LatticeReading
        From :func:`find_lattice` (its lattice may be None).
    mask : ndarray of bool, optional
        Untrusted pixels.
    peaks : list of Peak, optional
        Peaks of ``image`` (found here when omitted).
    leakage, false_alarm : float
        Lock-in leakage bound and per-pixel false-alarm rate of "order present".
    max_determinant : int
        Largest number of translational variants searched.
    max_families : int
        Largest number of order families kept (two chiralities of one supercell, or a CDW and its mirror).
    given_q : (k, 2) array_like, optional
        The user's order wavevectors (skips the search; still tested for commensurability).
    given_superlattice : str, optional
        The user's superlattice name ("3x3", "sqrt13xsqrt13R13.9" ...).
    anisotropy_threshold : float
        Anisotropy for the stripe test (docs/methods.md §6).

    Returns
    -------
    OrderResult

    References
    ----------
    .. [1] W. L. McMillan, Phys. Rev. B 14, 1496 (1976). doi:10.1103/PhysRevB.14.1496
    .. [2] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> from domains.fourier import Lattice
    >>> lat = Lattice.from_params("hexagonal", 0.34, 0.0)
    >>> y, x = np.mgrid[:256, :256] * 0.05
    >>> img = sum(np.cos(g[0] * x + g[1] * y) + 2 * np.cos((g[0] * x + g[1] * y) / 3) for g in lat.bragg)
    >>> res = read_order(img, pixel_size_nm=(0.05, 0.05), lattice_reading=LatticeReading(lat, True, "given"))
    >>> res.kind, res.families[0].name, res.families[0].variants
    ('commensurate', '3x3', 9)
    """
    from .fourier import _canonical, find_peaks

    pixel = tuple(float(p) for p in pixel_size_nm)
    image = np.asarray(image)
    shape = image.shape
    bin_q = _bin(shape, pixel)
    reasons = list(lattice_reading.reasons)
    lat = lattice_reading.lattice
    if peaks is None:
        peaks = find_peaks(image, pixel_size_nm=pixel, mask=mask, max_peaks=60)
    peaks = [replace(p, q=_canonical(p.q, p.q_err)) for p in peaks]
    if lat is None:
        return _read_unresolved(image, pixel, mask, lattice_reading, peaks, reasons, leakage, false_alarm,
                                given_q, anisotropy_threshold)
    basis = order_basis(lat)
    inv = np.linalg.inv(basis)
    bragg = np.asarray(lat.bragg, float)
    gmin = float(np.min(np.hypot(*bragg.T)))
    tol_b = max(2 * bin_q, 0.03 * gmin)
    second = lattice_reading.second
    second_bragg = None if second is None else np.asarray(second.bragg, float)
    roled = []
    candidates = []
    for p in peaks:
        f = p.q @ inv
        if min(np.min(np.hypot(*(bragg - p.q).T)), np.min(np.hypot(*(bragg + p.q).T))) <= tol_b:
            roled.append(replace(p, role="bragg", hk=tuple(map(float, f))))
            continue
        if second_bragg is not None and min(np.min(np.hypot(*(second_bragg - p.q).T)),
                                            np.min(np.hypot(*(second_bragg + p.q).T))) <= 2 * bin_q:
            roled.append(replace(p, role="second_lattice", hk=tuple(map(float, f))))
            continue
        if any(np.hypot(*((fa - np.round(fa)) @ basis)) <= max(2 * bin_q, 4 * p.q_err)
               for fa in (v @ inv for v in _aliases(p.q, pixel))):
            # A lattice harmonic, or its alias folded back from beyond the Nyquist limit.
            roled.append(replace(p, role="harmonic", hk=tuple(map(float, f))))
            continue
        if second_bragg is not None and _is_moire_combination(p.q, bragg, second_bragg, inv, max(2 * bin_q, 4 * p.q_err),
                                                              pixel):
            roled.append(replace(p, role="moire", hk=tuple(map(float, f))))
            continue
        near_g = any(abs(p.q_abs_rad_per_nm / np.hypot(*g) - 1) < 0.1 and _angle_between_deg(p.q, g) < 10 for g in bragg)
        if near_g:
            roled.append(replace(p, role="second_lattice", hk=tuple(map(float, f))))
            continue
        candidates.append(replace(p, hk=tuple(map(float, f))))
        roled.append(None)
    if given_q is not None:
        cand_q = np.atleast_2d(np.asarray(given_q, float))
    else:
        # Fundamentals: strongest first; a combination of stronger fundamentals (not an equal-length partner
        # of a triple) is a harmonic.
        candidates.sort(key=lambda p: -p.power)
        fundamentals, fund_q = [], []
        all_q = np.array([p.q for p in peaks]).reshape(-1, 2)
        for p in candidates:
            if p.q_abs_rad_per_nm > 1.05 * gmin:
                continue
            if _on_a_streak(p.q, all_q, bin_q):
                continue
            f = np.asarray(p.hk)
            partners = [a for a, qq in zip(fundamentals, fund_q)
                        if abs(np.hypot(*qq) / p.q_abs_rad_per_nm - 1) > 0.05]
            if partners and _is_combination(f, partners, max(2 * bin_q, 4 * p.q_err), basis):
                continue
            fundamentals.append(f)
            fund_q.append(p.q)
            if len(fundamentals) >= 3 * max_families + 2:
                break
        cand_q = np.array(fund_q).reshape(-1, 2)
        # Order peaks a hundred times weaker (in power) than the weakest Bragg peak are mixing products
        # (two layers, steps, a nonlinear response), not an order of their own: a CDW a tenth of the atomic
        # corrugation is the faintest one read (common practice, no source).
        bragg_power = [p.power for p, r in zip(peaks, roled) if r is not None and r.role == "bragg"]
        if bragg_power and len(cand_q):
            floor_power = 0.01 * min(bragg_power)
            power_of = {tuple(p.q): p.power for p in candidates}
            strong_enough = np.array([power_of.get(tuple(c), np.inf) >= floor_power for c in cand_q])
            if not strong_enough.all():
                reasons.append(f"{int((~strong_enough).sum())} candidate order peak(s) are over 100 times weaker "
                               "than the Bragg peaks: mixing products, not order")
                cand_q = cand_q[strong_enough]
    if given_superlattice is not None:
        from .fourier import _superlattice_override

        sup = _superlattice_override(given_superlattice, lat)
        cand_q = np.asarray(sup.q, float)
        reasons.append(f"superlattice {given_superlattice} given by the user")
    # Candidates within 15 % of |q| of a stronger one are the speckle of a peak split by domains, or
    # sidebands: the lock-in at the stronger one measures the same wave.
    kept = []
    for qq in cand_q:
        if not any(min(np.hypot(*(qq - k_)), np.hypot(*(qq + k_))) < 0.15 * np.hypot(*k_) for k_ in kept):
            kept.append(qq)
    cand_q = np.array(kept).reshape(-1, 2)
    moire_cands = [qq for qq in cand_q if np.hypot(*qq) < MOIRE_MAX_FRACTION * gmin]
    order_cands = np.array([qq for qq in cand_q if np.hypot(*qq) >= MOIRE_MAX_FRACTION * gmin]).reshape(-1, 2)
    families = []
    stripes = False
    sigma_test = None
    if len(order_cands):
        # The width is set by the strong peaks (weak ones nearby are the tails of a domain pattern's spectrum).
        cand_power = np.array([max((p.power for p in peaks if np.hypot(*(p.q - c)) < 1e-9), default=0.0)
                               for c in order_cands])
        strong_cands = order_cands[cand_power >= 0.05 * cand_power.max()] if cand_power.max() > 0 else order_cands
        all_peaks = np.vstack([strong_cands, bragg] + ([second_bragg] if second_bragg is not None else []))
        # Twice the leakage bound: the test wants a low-noise gradient more than resolution (domains are
        # larger than a few sigma), and the background near q = 0 must not ripple the phase.
        sigma_test, _ = choose_sigma(all_peaks, leakage=leakage)
        sigma_test = min(max(2 * sigma_test, 3 * max(pixel)), min(shape[0] * pixel[0], shape[1] * pixel[1]) / 10)
        threshold = _noise_threshold(image, order_cands, sigma_nm=sigma_test, pixel=pixel, mask=mask,
                                     avoid=np.vstack([bragg, order_cands]), false_alarm=false_alarm)
        local, local_err, mean, mean_err, presence, amp_med = _wavevector_stats(
            image, order_cands, sigma_nm=sigma_test, pixel=pixel, mask=mask, threshold=threshold, basis=basis)
        # Re-centre once where the first guess was off by more than a fraction of the lock-in's reach.
        off = np.hypot(*(local - order_cands).T) > 0.3 / sigma_test
        if np.any(off & np.isfinite(local[:, 0])):
            again = np.where(off[:, None] & np.isfinite(local), local, order_cands)
            l2, le2, m2, me2, pr2, am2 = _wavevector_stats(image, again, sigma_nm=sigma_test, pixel=pixel, mask=mask,
                                                            threshold=threshold, basis=basis)
            for arr, new in ((local, l2), (local_err, le2), (mean, m2), (mean_err, me2), (presence, pr2),
                             (amp_med, am2)):
                arr[off] = new[off]
        present = np.isfinite(local[:, 0]) & (presence >= 0.05)
        if not present.all():
            reasons.append(f"{int((~present).sum())} candidate order peak(s) carry order over less than 5 % of "
                           "the frame: ignored (noise, scan artefacts)")
        verdicts = []
        for j in np.flatnonzero(present):
            ql, se = local[j], local_err[j]
            f_loc = ql @ inv
            calib = 0.0  # measured relative to the local lattice: no calibration error enters
            radius = N_SIGMA * math.hypot(se, calib) + SYSTEMATIC_FRACTION * float(np.hypot(*ql))
            hits = _fractions_near(f_loc, basis, radius, max_determinant)
            if hits:
                dist, c, d = min(hits, key=lambda h: h[2])
                verdicts.append((j, "commensurate", c @ basis, c, math.hypot(se, calib)))
            else:
                verdicts.append((j, "incommensurate", ql, f_loc, se))
        # A peak split into speckle by domains gives several candidates that read as one wavevector.
        unique = []
        for v in verdicts:
            same = False
            for u in unique:
                for sgn in (1, -1):
                    d = np.hypot(*(sgn * v[2] - u[2]))
                    if d <= N_SIGMA * math.hypot(v[4], u[4]) + SYSTEMATIC_FRACTION * np.hypot(*v[2]) + 1e-9:
                        same = True
            if not same:
                unique.append(v)
        verdicts = unique
        # Members added by the orbit's symmetry (after these) were not measured: they have no mean
        # wavevector of their own (their candidate index is the measured member's).
        n_measured = len(verdicts)
        if lat.kind == "hexagonal":
            verdicts = _complete_orbits(verdicts, basis, bin_q)
        vq = np.array([v[2] for v in verdicts]).reshape(-1, 2)
        groups = _group_families(vq, bin_q)
        strength = []
        for idx, signs in groups:
            strength.append(float(np.mean([amp_med[verdicts[i][0]] for i in idx])))
        ordered_groups = [g for _, g in sorted(zip(strength, groups), key=lambda t: -t[0])]
        # Keep the families that form complete sets first (triple-q), then singles, up to max_families
        # (singles of one orientation each are gathered as one stripe family below).
        # A family far weaker than the strongest (a tenth of its amplitude) is a side effect of it or of the
        # scan (step edges, mixing), not a second order (common practice, no source).
        top_strength = max(strength) if strength else 0.0
        strength_of = {id(g): st for st, g in zip(strength, groups)}
        weak = [g for g in ordered_groups if strength_of[id(g)] < 0.1 * top_strength]
        if weak:
            reasons.append(f"{len(weak)} order family(ies) below a tenth of the strongest one's amplitude: ignored")
            ordered_groups = [g for g in ordered_groups if strength_of[id(g)] >= 0.1 * top_strength]
        triples = [g for g in ordered_groups if len(g[0]) == 3][:max_families]
        singles = [g for g in ordered_groups if len(g[0]) < 3]
        if second is not None and not triples and singles:
            # Two atomic layers mix into many lone peaks; only a closed triple-q set is an order of its own.
            reasons.append(f"{len(singles)} lone peak(s) beside two atomic lattices: mixing products of the layers")
            singles = []
        chosen = triples if triples else singles[:3]
        for idx, signs in chosen:
            js = [verdicts[i][0] for i in idx]
            kinds = {verdicts[i][1] for i in idx}
            qs = np.array([s * verdicts[i][2] for i, s in zip(idx, signs)])
            errs = np.array([verdicts[i][4] for i in idx])
            if len(idx) == 3 and [verdicts[i][1] for i in idx].count("commensurate") == 2:
                # A triple-q wave closes (Q1 + Q2 + Q3 = 0): two exact members fix the third exactly.
                odd = next(i for i in idx if verdicts[i][1] != "commensurate")
                exact = -sum(s_ * verdicts[i][3] for i, s_ in zip(idx, signs) if i != odd)
                s_odd = signs[idx.index(odd)]
                q_exact = s_odd * exact @ basis
                measured = verdicts[odd][2]
                if np.hypot(*(q_exact - measured)) <= 0.05 * np.hypot(*measured):
                    verdicts[odd] = (verdicts[odd][0], "commensurate", q_exact, s_odd * exact, verdicts[odd][4])
                    qs = np.array([s_ * verdicts[i][2] for i, s_ in zip(idx, signs)])
                    kinds = {"commensurate"}
                    reasons.append("a triple-q order closes (Q1 + Q2 + Q3 = 0): its third wavevector is fixed by "
                                   "the two commensurate ones")
            if kinds == {"commensurate"}:
                coef = np.array([s * verdicts[i][3] for i, s in zip(idx, signs)])
                m_mat, name, nvar, chir = supercell_name(coef, lat)
                det_mean = np.array([s * (mean[j] - verdicts[i][2]) if i < n_measured else (math.nan, math.nan)
                                     for i, j, s in zip(idx, js, signs)])
                det_err = np.array([mean_err[j] if i < n_measured else math.nan for i, j in zip(idx, js)])
                ok = np.isfinite(det_err)
                dq = float(np.mean(np.hypot(*det_mean[ok].T))) if ok.any() else 0.0
                sig = (np.hypot(*det_mean[ok].T)
                       > N_SIGMA * np.hypot(det_err[ok], SYSTEMATIC_FRACTION * np.hypot(*qs[ok].T)))
                spacing = float(2 * math.pi / dq) if ok.any() and sig.all() and dq > 0 else None
                # Exact in units of the lattice: the absolute error is the basis's, propagated.
                errs = _order_q_err(coef, lattice_reading)
                families.append(OrderFamily("commensurate", qs, errs, coef, m_mat, name, nvar, chir, det_mean, det_err,
                                            spacing, presence[js], lat))
                txt = (f"order peaks at {', '.join(_frac_text(c) for c in coef)} of (G1, G2): commensurate {name} "
                       f"({nvar} translational variants): the local wavevector lies within "
                       f"{N_SIGMA:g} standard errors of the rational point")
                if spacing is not None:
                    txt += (f"; the frame-mean wavevector departs from it by {dq:.3g} rad/nm: commensurate patches "
                            f"separated by phase slips (discommensurations every {spacing:.3g} nm, McMillan 1976)")
                reasons.append(txt)
            else:
                coef = qs @ inv
                spacing = []
                for qq in qs:
                    hits = _fractions_near(qq @ inv, basis, 0.2 * np.hypot(*qq), 6)
                    if hits:
                        c = min(hits, key=lambda h: h[0])[1]
                        dq = float(np.hypot(*(qq - c @ basis)))
                        if dq > 1e-9:
                            spacing.append(2 * math.pi / dq)
                disc = float(np.mean(spacing)) if spacing else None
                # Measured relative to the local lattice (errs: both axes combined): per component, with
                # the basis's own error added.
                errs = np.hypot(errs / math.sqrt(2), _order_q_err(coef, lattice_reading))
                families.append(OrderFamily("incommensurate", qs, errs, coef, None, "incommensurate", 1, 0, None, None,
                                            disc, presence[js]))
                reasons.append("order peaks at " + ", ".join(f"({c[0]:.4f}, {c[1]:.4f})" for c in coef)
                               + " of (G1, G2): incommensurate; the local wavevector is more than "
                               f"{N_SIGMA:g} standard errors from every fraction with denominator up to "
                               f"{max_determinant}" + (f" (discommensuration spacing {disc:.3g} nm)" if disc else ""))
        if len(families) > 1 and not triples:
            # Singles of different orientations: one stripe family (orientational domains).
            fam = families
            families = [OrderFamily(
                "commensurate" if all(f.kind == "commensurate" for f in fam) else "incommensurate",
                np.concatenate([f.q_rad_per_nm for f in fam]), np.concatenate([f.q_err_rad_per_nm for f in fam]),
                None if any(f.coefficients is None for f in fam) else np.concatenate([f.coefficients for f in fam]),
                fam[0].supercell, " / ".join(dict.fromkeys(f.name for f in fam)), max(f.variants for f in fam), 0,
                None, None, fam[0].discommensuration_nm, np.concatenate([f.presence for f in fam]), lat)]
        if families:
            stripes = _unidirectional(image, families, pixel, mask, leakage, false_alarm, anisotropy_threshold)
            if stripes:
                reasons.append("locally one order component dominates (anisotropy above "
                               f"{anisotropy_threshold:g} in most ordered pixels): unidirectional stripes in "
                               "orientational domains")
    moire_q, from_bragg = None, None
    if second is not None:
        from_bragg, moire_q = _moire_from_layers(lat, second, moire_cands, bin_q, lattice_reading.to_material)
        reasons.append("two atomic lattices: a moiré " + (f"with twist {from_bragg['twist_deg']:.4g} deg "
                                                         f"from the Bragg peaks" if from_bragg else ""))
    elif len(moire_cands) >= 2 and not families:
        moire_q = _moire_triplet(np.array(moire_cands), bin_q)
        if moire_q is not None:
            reasons.append("a low-|q| hexagonal triplet that is no fraction of the lattice: a moiré")
    if families:
        kinds = {f.kind for f in families}
        kind = "stripes" if stripes else ("commensurate" if kinds == {"commensurate"} else "incommensurate")
    elif moire_q is not None:
        kind = "moire"
    else:
        kind = "none"
        reasons.append("no order peak beyond the lattice")
    # Roles of the peaks, for the peak table.
    final = []
    oq = [] if not families else np.concatenate([f.q_rad_per_nm for f in families])
    for p, r in zip(peaks, roled):
        if r is not None:
            final.append(r)
            continue
        role = "harmonic"
        for qq in oq:
            if min(np.hypot(*(p.q - qq)), np.hypot(*(p.q + qq))) <= max(3 * bin_q, 0.03 * np.hypot(*qq)):
                role = "superlattice" if kind in ("commensurate", "stripes") and families[0].kind == "commensurate" \
                    else "incommensurate"
        if moire_q is not None:
            for qq in moire_q:
                if min(np.hypot(*(p.q - qq)), np.hypot(*(p.q + qq))) <= max(2 * bin_q, 0.1 * np.hypot(*qq)):
                    role = "moire"
        final.append(replace(p, role=role))
    return OrderResult(kind, lattice_reading, tuple(families), stripes, moire_q, from_bragg, tuple(final),
                       tuple(reasons), sigma_test)


def _complete_orbits(verdicts, basis, bin_q):
    """Add the missing members of each commensurate wavevector's three-fold orbit (Q, R120 Q, R240 Q).

    A triple-q CDW on a hexagonal lattice has all three; a weak member can miss the peak list. Stripes
    in three orientations have them too, each in its own domains (their lock-in then shows which).
    Measured (incommensurate) wavevectors are not completed.
    """
    rot = np.array([[-0.5, -math.sqrt(3) / 2], [math.sqrt(3) / 2, -0.5]])
    inv = np.linalg.inv(basis)
    out = list(verdicts)
    for v in verdicts:
        if v[1] != "commensurate":
            continue
        for turn in (rot, rot @ rot):
            # Rotate in the material's regular frame: the fraction rotates as an integer map of (G1, G2).
            g_turned = np.array([turn @ basis[0], turn @ basis[1]]) @ inv  # G_i rotated, in (G1, G2)
            g_turned = np.round(g_turned)
            c = v[3] @ g_turned
            q = c @ basis
            if any(min(np.hypot(*(q - u[2])), np.hypot(*(q + u[2]))) <= max(2 * bin_q, 1e-9) for u in out):
                continue
            out.append((v[0], "commensurate", q, c, v[4]))
    return out


def _frac_text(c):
    return "(" + ", ".join(str(Fraction(float(v)).limit_denominator(64)) for v in c) + ")"


def _unidirectional(image, families, pixel, mask, leakage, false_alarm, anisotropy_threshold):
    """Whether one component dominates locally in most ordered pixels (stripes), per docs/methods.md §6."""
    from .order import orientation_order

    q = np.concatenate([f.q_rad_per_nm for f in families])
    if len(q) < 2:
        return True
    sigma, _ = choose_sigma(q, leakage=leakage)
    sigma = min(max(sigma, 1.5 * max(pixel)), min(image.shape[0] * pixel[0], image.shape[1] * pixel[1]) / 8)
    from ._grid import choose_step

    step = choose_step(sigma, pixel, image.shape)  # the decimated grid: samples of the full-resolution field
    a = lockin(image, q, sigma_nm=sigma, pixel_size_nm=pixel, mask=mask, step=step)
    trusted = trusted_mask(image.shape, sigma_nm=sigma, pixel_size_nm=pixel, mask=mask)[::step, ::step]
    thr = _noise_threshold(image, q, sigma_nm=sigma, pixel=pixel, mask=mask, avoid=q, false_alarm=false_alarm)
    o = orientation_order(a, threshold=thr, anisotropy_threshold=anisotropy_threshold)
    where = o.ordered & trusted
    if len(families) > 1 and all(len(f.q_rad_per_nm) == 3 for f in families):
        # Two triple-q families (two chiralities): dominance of one family is a chiral domain, not a stripe.
        return False
    # Common practice, no source: unidirectional when most ordered pixels are dominated by one component.
    return bool(where.sum() > 0 and np.mean(o.anisotropy[where] >= anisotropy_threshold) > 0.6)


def _moire_triplet(q, bin_q):
    groups = _group_families(q, bin_q)
    for idx, signs in groups:
        if len(idx) == 3:
            return np.array([s * q[i] for i, s in zip(idx, signs)])
    return None


def _moire_from_layers(lat, second, moire_cands, bin_q, to_material=None):
    """Moiré wavevectors k_j = G_bottom,j - G_top,j (the sign of domains.moire) and the twist/heterostrain they
    imply (docs/methods.md §9).

    Twist and heterostrain are computed in the material's frame (the slow-axis drift undone)."""
    from .moire import twist_strain_from_wavevectors

    g_bot_img = np.asarray(lat.bragg_measured if lat.bragg_measured is not None else lat.bragg, float)
    g_top_img = np.asarray(second.bragg_measured if second.bragg_measured is not None else second.bragg, float)
    dmat = np.eye(2) if to_material is None else to_material
    g_bot, g_top = g_bot_img @ dmat, g_top_img @ dmat
    # Match each bottom vector to the nearest top vector (with sign).
    matched = []
    for g in g_bot:
        d = [np.hypot(*(g - s * t)) for t in g_top for s in (1, -1)]
        m = int(np.argmin(d))
        matched.append((1, -1)[m % 2] * g_top[m // 2])
    matched = np.array(matched)
    k = g_bot - matched  # K = G_layer1 - G_layer2 (domains.moire convention)
    info = {}
    try:
        res = twist_strain_from_wavevectors(k, g_bot)
        info = {"twist_deg": abs(res.theta_deg), "heterostrain_percent": abs(res.strain_percent),
                "heterostrain_angle_deg": res.strain_angle_deg}
    except InputError as err:
        info = {"note": f"twist from the Bragg peaks failed: {err}"}
    info["mismatch"] = float(np.mean(np.hypot(*g_bot.T)) / np.mean(np.hypot(*g_top.T)) - 1)
    info["k_rad_per_nm"] = k.tolist()
    info["period_nm"] = float(np.mean(4 * math.pi / (math.sqrt(3) * np.hypot(*k.T))))
    # Back to the image frame for the lock-ins.
    k = k @ np.linalg.inv(dmat)
    # Prefer the measured moiré peaks where they match k (sharper than a Bragg difference).
    moire_q = k.copy()
    for j, kj in enumerate(k):
        for c in moire_cands:
            for s in (1, -1):
                if np.hypot(*(s * c - kj)) < max(2 * bin_q, 0.15 * np.hypot(*kj)):
                    moire_q[j] = s * c
    return info, moire_q


def _read_unresolved(image, pixel, mask, lattice_reading, peaks, reasons, leakage, false_alarm, given_q,
                     anisotropy_threshold):
    """No atomic lattice: a low-|q| triplet is a moiré (or an order of unknown lattice)."""
    from .fourier import _canonical

    qset = lattice_reading.unresolved_set_q
    bin_q = _bin(image.shape, pixel)
    moire_q = None
    if qset is not None and len(qset) == 3:
        moire_q = _moire_triplet(np.asarray(qset), bin_q)
    kind = "moire" if moire_q is not None else "none"
    if moire_q is not None:
        reasons.append("a hexagonal set of peaks with no atomic lattice beneath: read as a moiré (or a superlattice "
                       "of unresolved atoms: give a_nm to index it)")
    final = []
    for p in peaks:
        role = "unindexed"
        if moire_q is not None and any(min(np.hypot(*(p.q - qq)), np.hypot(*(p.q + qq))) <= 2 * bin_q for qq in moire_q):
            role = "moire"
        final.append(replace(p, q=_canonical(p.q), role=role))
    return OrderResult(kind, lattice_reading, (), False, moire_q, None, tuple(final), tuple(reasons), None)


def slow_axis_drift_fit(bragg, kind="hexagonal"):
    """Lattice constant and orientation of a regular lattice seen through a drift along the slow scan axis.

    Thermal drift and creep accumulate with time, that is with the scan row: the image
    is r_img = D r with D = [[1, s], [0, 1 + e]] (a shear s and a stretch e per unit of
    y). Bragg vectors transform as G_img = D^-T G, so G = D^T G_img; s and e are the
    values that make the three (or two) Bragg vectors regular again (equal lengths),
    which fixes a and the orientation without knowing the drift (derived).

    Parameters
    ----------
    bragg : (3, 2) or (2, 2) array_like
        Measured Bragg vectors (qx, qy), rad/nm; hexagonal triplets sum to zero.
    kind : {"hexagonal", "square"}

    Returns
    -------
    a_nm : float
    angle_deg : float
        Direction of the first real-space lattice vector (hexagonal: in [-30, 30)).
    shear, stretch : float
        s and e of D.

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> from domains._lattice import bragg_vectors
    >>> g = bragg_vectors("hexagonal", 0.336, 7.0)
    >>> D = np.array([[1, 0.01], [0, 1.012]])
    >>> a, ang, s, e = slow_axis_drift_fit(g @ np.linalg.inv(D))   # G_img = D^-T G
    >>> round(a, 6), round(ang, 4), round(s, 5), round(e, 5)
    (0.336, 7.0, 0.01, 0.012)
    """
    from scipy.optimize import least_squares

    g = np.asarray(bragg, float)
    if kind == "hexagonal" and len(g) == 2:
        g = np.vstack([g, -(g[0] + g[1])])

    def true(params):
        sh, st = params
        dt = np.array([[1.0, 0.0], [sh, 1.0 + st]])
        return g @ dt.T

    def resid(params):
        v = true(params)
        lengths = np.hypot(*v.T)
        out = list(lengths[1:] / lengths[0] - 1)
        if kind == "square":
            out.append(v[0] @ v[1] / (lengths[0] * lengths[1]))
        return out

    sol = least_squares(resid, [0.0, 0.0], xtol=1e-14, ftol=1e-14)
    sh, st = (float(v) for v in sol.x)
    v = true(sol.x)
    glen = float(np.mean(np.hypot(*v.T)))
    if kind == "hexagonal":
        a_nm = 4 * math.pi / (math.sqrt(3) * glen)
        b_ang = np.degrees(np.arctan2(v[:, 1], v[:, 0]))
        mean_b = math.degrees(np.angle(np.mean(np.exp(6j * np.radians(b_ang)))) / 6)
        angle = (mean_b + 30.0 + 30.0) % 60.0 - 30.0
    else:
        a_nm = 2 * math.pi / glen
        b_ang = np.degrees(np.arctan2(v[:, 1], v[:, 0]))
        mean_b = math.degrees(np.angle(np.mean(np.exp(4j * np.radians(b_ang)))) / 4)
        angle = (mean_b + 45.0) % 90.0 - 45.0
    return float(a_nm), float(angle), sh, st
