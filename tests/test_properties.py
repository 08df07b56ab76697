"""Property-based tests (hypothesis): linearity and translation of the lock-in, origin independence of the
commensurate variants, rotation of Fourier peaks, and round trips of sidecars and configurations.

Every example is reproducible: ``derandomize=True`` and no example database, so CI draws the same inputs
on every run. Images are small (64-128 px) so that the whole file stays fast on two cores.
"""

import contextlib
import io
import json
import math
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from scipy import ndimage

import domains
from domains import lockin, phase, trusted_mask
from domains.cli import main
from domains.fourier import find_peaks
from domains.io import load_scan, save_scan
from domains.order import commensurate_order, variant_templates
from domains.pipeline import Config, load_config

EPS32 = float(np.finfo(np.float32).eps)


def reproducible(max_examples):
    """Hypothesis settings for CI: fixed examples, no deadline (a cold FFT plan is slow once), no database."""
    return settings(max_examples=max_examples, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def wrap(angle):
    """Angle wrapped to (-pi, pi]."""
    return np.angle(np.exp(1j * np.asarray(angle)))


def same_partition(labels_a, labels_b):
    """True when two label maps cut the image into the same regions, up to a one-to-one relabelling."""
    pairs = set(zip(labels_a.ravel().tolist(), labels_b.ravel().tolist()))
    return len(pairs) == len(np.unique(labels_a)) == len(np.unique(labels_b))


# --------------------------------------------------------------------------- 1. lock-in linearity


@st.composite
def linear_case(draw):
    rows = draw(st.sampled_from([64, 96, 128]))
    cols = draw(st.sampled_from([64, 96, 128]))
    dy = draw(st.floats(0.02, 0.2))
    dx = draw(st.one_of(st.just(dy), st.floats(0.02, 0.2)))
    # Wavevectors within Nyquist (pi / pixel), one or two of them, as fractions of the limit.
    fractions = draw(st.lists(st.tuples(st.floats(-0.95, 0.95), st.floats(-0.95, 0.95)), min_size=1, max_size=2))
    q = np.array([[fx * np.pi / dx, fy * np.pi / dy] for fx, fy in fractions])
    sigma_px = draw(st.floats(1.0, 5.0))
    # Coefficients exact in float32 (the image is formed in float32) and not so small that a I underflows.
    coefficient = st.one_of(st.just(0.0), st.floats(2**-10, 5, width=32), st.floats(-5, -(2**-10), width=32))
    a = draw(coefficient)
    b = draw(coefficient)
    scale1 = draw(st.floats(1e-2, 1e2))
    scale2 = draw(st.floats(1e-2, 1e2))
    masked = draw(st.sampled_from(["none", "block", "block+speckle"]))
    seed = draw(st.integers(0, 2**31 - 1))
    return rows, cols, dy, dx, q, sigma_px, a, b, scale1, scale2, masked, seed


@reproducible(100)
@given(linear_case())
def test_lockin_is_linear(case):
    rows, cols, dy, dx, q, sigma_px, a, b, scale1, scale2, masked, seed = case
    rng = np.random.default_rng(seed)
    image1 = (scale1 * rng.standard_normal((rows, cols))).astype(np.float32)
    image2 = (scale2 * rng.standard_normal((rows, cols)) + scale2).astype(np.float32)
    mask = None
    if masked != "none":
        mask = np.zeros((rows, cols), bool)
        r0, c0 = rng.integers(0, rows - 16), rng.integers(0, cols - 16)
        mask[r0 : r0 + rng.integers(1, 16), c0 : c0 + rng.integers(1, 40)] = True
        if masked == "block+speckle":
            mask |= rng.random((rows, cols)) < 0.05
    sigma_nm = sigma_px * min(dy, dx)

    def demodulate(image):
        return lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=(dy, dx), mask=mask)

    mixed = np.float32(a) * image1 + np.float32(b) * image2
    combined = demodulate(mixed)
    parts = a * demodulate(image1).astype(np.complex128) + b * demodulate(image2).astype(np.complex128)
    # common practice, no source: float32 in gives complex64 out (the documented dtype contract).
    assert combined.dtype == np.complex64
    # derived: the NaN pixels (too little valid weight) depend on the mask only, not on the image.
    assert np.array_equal(np.isfinite(combined), np.isfinite(parts))
    finite = np.isfinite(combined)
    assert finite.any()  # common practice, no source: a mask never hides a whole 64 px frame from the filter
    # The normaliser of the normalised convolution, G * (valid pixels), zero outside the frame (docs/methods.md §1);
    # rounding errors of the numerator are divided by it.
    valid = np.ones((rows, cols)) if mask is None else (~mask).astype(float)
    weight = ndimage.gaussian_filter(valid, (sigma_nm / dy, sigma_nm / dx), mode="constant", truncate=6)
    weight = np.broadcast_to(weight, combined.shape)
    size = abs(a) * float(np.abs(image1).max()) + abs(b) * float(np.abs(image2).max())
    # derived: the lock-in is linear in the image, A[a I1 + b I2] = a A[I1] + b A[I2], for a fixed mask.
    # The only difference is float32 round-off: forming a I1 + b I2 and the FFTs, whose error grows as
    # eps * log2(N) of the input's size (from memory: Higham, Accuracy and Stability of Numerical
    # Algorithms, 2002, ch. 24), divided by the normaliser near masked pixels and edges.
    tolerance = EPS32 * math.log2(rows * cols) * size / weight[finite]
    error = np.abs(combined.astype(np.complex128) - parts)[finite]
    assert np.all(error <= tolerance), float(np.max(error - tolerance))


# --------------------------------------------------------------------------- 2. translation


def aliased_distance(m1, m2, n):
    """Distance in bins between two wavevectors on an n-point periodic grid (aliases n bins apart are one)."""
    d = np.asarray(m1, dtype=float) - np.asarray(m2, dtype=float)
    d = (d + n / 2) % n - n / 2
    return float(np.hypot(*d))


@st.composite
def translation_case(draw):
    n = draw(st.sampled_from([96, 128]))
    pixel = draw(st.floats(0.03, 0.1))
    sigma_px = draw(st.floats(3.0, 4.0))
    # A wave periodic in the frame: whole numbers of periods along both axes, so np.roll is an exact shift.
    # Each component n/8 to 3n/8 bins: then -q, taken modulo the grid's period 2 pi / pixel (on a pixel grid
    # -q and -q + 2 pi / pixel are one wave), stays at least sqrt(2) n / 4 bins from q, and
    # sigma |q - (-q)| >= 6.6 keeps the conjugate term out of the lock-in (leak exp(-6.6^2 / 2) < 4e-10).
    component = st.integers(n // 8, 3 * n // 8).flatmap(lambda k: st.sampled_from([k, -k]))
    m = draw(st.tuples(component, component))
    shift = draw(st.tuples(st.integers(-n, n), st.integers(-n, n)))
    phi = draw(st.floats(-np.pi, np.pi))
    return n, pixel, sigma_px, m, shift, phi


@reproducible(100)
@given(translation_case())
def test_translation_shifts_the_lockin_phase(case):
    n, pixel, sigma_px, m, (d_row, d_col), phi = case
    sigma_nm = sigma_px * pixel
    # derived: the premise stated in translation_case (aliased distance of -q from q, in units of 1 / sigma).
    assert sigma_px * aliased_distance(m, [-m[0], -m[1]], n) * 2 * np.pi / n >= 6.6
    q = 2 * np.pi * np.array(m, dtype=float) / (n * pixel)  # (qx, qy): m[0] periods along x, m[1] along y
    y, x = np.mgrid[:n, :n] * pixel
    image = np.cos(q[0] * x + q[1] * y + phi)
    shifted = np.roll(image, (d_row, d_col), axis=(0, 1))  # shifted(r) = image(r - d)
    before = lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel)
    after = lockin(shifted, q, sigma_nm=sigma_nm, pixel_size_nm=pixel)
    # Pixels 4.5 sigma from every edge: the normalised filter's edge term of the conjugate wave is there below
    # exp(-4.5^2 / 2) / (sqrt(2 pi) sigma dk) < 3e-6 of its amplitude for sigma dk >= 6.6 (derived: Gaussian
    # tail at a straight edge).
    inside = trusted_mask((n, n), sigma_nm=sigma_nm, pixel_size_nm=pixel, margin_sigma=4.5)
    assert inside.sum() > 0  # derived: 4.5 sigma <= 18 px from each edge of a >= 96 px frame leaves pixels
    d_nm = np.array([d_col * pixel, d_row * pixel])  # (x, y) of the shift
    change = wrap(phase(after) - phase(before) + q @ d_nm)
    # derived: I'(r) = I(r - d) turns cos(q.r + phi) into cos(q.r + phi - q.d), so arg A shifts by -q.d
    # everywhere; the edge term and the leak above bound the difference well below 1e-4 rad.
    assert np.max(np.abs(change[inside])) < 1e-4
    # derived: a translation leaves the amplitude 2|A| = 1 of the locked wave unchanged.
    assert np.allclose(2 * np.abs(after[inside]), 1.0, atol=1e-4)


# --------------------------------------------------------------------------- 3. origin of the CDW phase


@st.composite
def domain_case(draw):
    rows = draw(st.sampled_from([48, 64]))
    cols = draw(st.sampled_from([48, 64]))
    count = draw(st.integers(2, 3))
    variants = draw(st.lists(st.integers(0, 8), min_size=count, max_size=count, unique=True))
    # Domain boundaries: straight lines through the frame at random angles.
    cuts = draw(st.lists(st.tuples(st.floats(0.2, 0.8), st.floats(0.2, 0.8), st.floats(0, np.pi)),
                         min_size=count - 1, max_size=count - 1))
    offset = draw(st.tuples(st.floats(-np.pi, np.pi), st.floats(-np.pi, np.pi), st.floats(-np.pi, np.pi)))
    common = draw(st.booleans())
    noise_rad = draw(st.floats(0.0, 0.3))
    seed = draw(st.integers(0, 2**31 - 1))
    return rows, cols, variants, cuts, offset, common, noise_rad, seed


@reproducible(60)
@given(domain_case())
def test_global_phase_offset_leaves_the_partition(case):
    rows, cols, variants, cuts, offset, common, noise_rad, seed = case
    _, templates = variant_templates(3)
    r, c = np.mgrid[:rows, :cols]
    truth = np.zeros((rows, cols), int)
    for index, (fr, fc, angle) in enumerate(cuts, start=1):
        side = (r - fr * rows) * np.cos(angle) - (c - fc * cols) * np.sin(angle) > 0
        truth[side] = index
    regions = np.unique(truth)
    assume(len(regions) == len(variants) and min(np.sum(truth == k) for k in regions) >= 40)
    rng = np.random.default_rng(seed)
    noise = noise_rad * rng.uniform(-1, 1, (3, rows, cols))
    amplitude_ = 1.0 + 0.2 * rng.random((3, rows, cols))
    pattern = templates[np.array(variants)[truth]].transpose(2, 0, 1)  # (3, row, col) template phases
    phi0 = np.full(3, offset[0]) if common else np.array(offset)

    def order_of(extra):
        fields = amplitude_ * np.exp(1j * (pattern + extra[:, None, None] + noise))
        return commensurate_order(fields, 3).variant

    reference = order_of(np.zeros(3))
    moved = order_of(phi0)
    # derived: each component's phase noise (< 0.3 rad) stays well inside its variant's cell, whose half-width
    # is pi / 3 per component (docs/methods.md §5), so the variants recover the drawn domains.
    assert same_partition(reference, truth)
    # derived: the global offset is estimated and removed before quantising, so a constant phase added to
    # the components (the same for all three, or one per component) only relabels the variants.
    assert same_partition(moved, reference)


# --------------------------------------------------------------------------- 4. rotation


@st.composite
def rotation_case(draw):
    n = draw(st.sampled_from([64, 96, 128]))
    pixel = draw(st.floats(0.02, 0.2))
    count = draw(st.integers(1, 3))
    # Whole periods in the frame (bin centres), away from the origin, the axes' Nyquist bins and each other.
    bins = draw(st.lists(st.tuples(st.integers(-n // 2 + 2, n // 2 - 2), st.integers(1, n // 2 - 2)),
                         min_size=count, max_size=count))
    amplitudes = draw(st.lists(st.floats(0.7, 1.5), min_size=count, max_size=count))
    turns = draw(st.integers(1, 3))
    seed = draw(st.integers(0, 2**31 - 1))
    return n, pixel, bins, amplitudes, turns, seed


def _canonical(q):
    """The +q/-q representative in find_peaks's half-plane (qy > 0, or qy = 0 and qx > 0), as bins."""
    q = np.asarray(q, dtype=float)
    return -q if (q[1] < 0 or (q[1] == 0 and q[0] < 0)) else q


@reproducible(80)
@given(rotation_case())
def test_rotating_the_image_rotates_its_peaks(case):
    n, pixel, bins, amplitudes, turns, seed = case
    bins = [np.array(b, dtype=float) for b in bins]
    # Peaks at least 6 bins from the origin and from each other (and from each other's mirror): the
    # detector's 5 x 5 local maximum and 3-bin centre disc then see each one alone.
    assume(all(np.hypot(*b) >= 6 for b in bins))
    assume(all(min(np.hypot(*(p - o)), np.hypot(*(p + o))) >= 6 for i, p in enumerate(bins) for o in bins[:i]))
    bin_q = 2 * np.pi / (n * pixel)
    y, x = np.mgrid[:n, :n] * pixel
    rng = np.random.default_rng(seed)
    image = 0.05 * rng.standard_normal((n, n))
    for b, amp in zip(bins, amplitudes):
        image += amp * np.cos(bin_q * (b[0] * x + b[1] * y) + rng.uniform(-np.pi, np.pi))
    rotated = np.rot90(image, turns)
    # derived: np.rot90 (k = 1) puts old (row, col) = (j, N-1-i) at new (i, j), so with x = col, y = row,
    # qx x_old + qy y_old = qy x_new - qx y_new + const: (qx, qy) -> (qy, -qx), applied k times.
    expected = []
    for b in bins:
        q = b * bin_q
        for _ in range(turns):
            q = np.array([q[1], -q[0]])
        expected.append(_canonical(q))
    # derived: the noise power of a bin is exponentially distributed, so with false_alarm = 1e-6 a noise peak
    # appears in one image in a million; the drawn waves stand ~1e5 above the floor (rms noise 0.05).
    found = [_canonical(p.q) for p in find_peaks(rotated, pixel_size_nm=pixel, false_alarm=1e-6)]
    assert len(found) == len(expected), (found, expected)
    for q in expected:
        # common practice, no source: +q and -q are one peak; Hann interpolation places a bin-centred wave
        # within a fraction of a bin, and we ask for one bin.
        distance = min(min(np.hypot(*(f - q)), np.hypot(*(f + q))) for f in found)
        assert distance <= bin_q, (q, found)


# --------------------------------------------------------------------------- 5. sidecars and configurations

_finite = dict(allow_nan=False, allow_infinity=False)
pixel_sizes = st.one_of(st.floats(1e-4, 1e3, **_finite), st.integers(1, 10))
# JSON null means "not given" for every optional key.
sidecars = st.fixed_dictionaries(
    {"pixel_size_nm": st.one_of(pixel_sizes, st.lists(pixel_sizes, min_size=1, max_size=2))},
    optional={
        "channel": st.one_of(st.none(), st.sampled_from(domains.io.CHANNELS)),
        "bias_V": st.one_of(st.none(), st.floats(-100, 100, **_finite), st.integers(-10, 10)),
        "setpoint_A": st.one_of(st.none(), st.floats(-1e-3, -1e-15, **_finite), st.floats(1e-15, 1e-3, **_finite)),
        "comment": st.text(max_size=20),
    },
)


energy_lists = st.lists(st.floats(-5, 5, **_finite), min_size=1, max_size=4, unique=True)


@reproducible(100)
@given(sidecars, st.booleans(), st.one_of(st.none(), energy_lists))
def test_sidecar_round_trip(sidecar, masked, energies):
    with tempfile.TemporaryDirectory() as folder:
        folder = Path(folder)
        data = np.arange(12 * 10, dtype=np.float32).reshape(12, 10)
        if energies is not None:  # a spectroscopic grid (energy, row, col) with one bias per slice
            data = np.stack([data + k for k in range(len(energies))])
        np.save(folder / "scan.npy", data)
        content = dict(sidecar)
        if energies is not None:
            content["energies_V"] = energies
        if masked:
            mask = np.zeros((12, 10), bool)
            mask[3:5, 2:7] = True
            np.save(folder / "scan.mask.npy", mask)
            content["mask"] = "scan.mask.npy"
        (folder / "scan.json").write_text(json.dumps(content), encoding="utf-8")
        first = load_scan(folder / "scan.npy")
        saved = save_scan(first, folder / "again.npy")
        second = load_scan(saved)
        size = sidecar["pixel_size_nm"]
        if isinstance(size, list) and len(size) == 1:
            size = size[0]
        expected_pixel = (size, size) if not isinstance(size, list) else tuple(size)
        for scan in (first, second):
            # common practice, no source: a sidecar's metadata are read back exactly as written (JSON keeps
            # a float's shortest repr, so equality is exact).
            assert scan.pixel_size_nm == expected_pixel
            assert scan.channel == (sidecar.get("channel") or "topography")
            assert scan.bias_V == sidecar.get("bias_V")
            assert scan.setpoint_A == sidecar.get("setpoint_A")
            assert (scan.energies_V is None) if energies is None else (scan.energies_V.tolist() == energies)
            assert {k: v for k, v in scan.metadata.items() if k != "sidecar_path"} == (
                {"comment": sidecar["comment"]} if "comment" in sidecar else {})
            assert np.array_equal(scan.data, data)  # common practice, no source: the data are not modified
            assert (scan.mask is not None and bool(scan.mask[3, 2]) and int(scan.mask.sum()) == 10) if masked \
                else scan.mask is None
        # common practice, no source: save_scan writes a sidecar that reads back to the same fields.
        written = json.loads(saved.with_suffix(".json").read_text(encoding="utf-8"))
        assert written["pixel_size_nm"] == (size if not isinstance(size, list) or size[0] != size[1] else size[0])


def toml_value(value):
    """A TOML literal for a Python value (strings, numbers, booleans, lists, tables), no outside writer."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        text = repr(value)
        return text if ("." in text or "e" in text or "n" in text) else text + ".0"
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a TOML basic string
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k} = {toml_value(v)}" for k, v in value.items()) + "}"
    raise TypeError(value)


def toml_text(table):
    return "".join(f"{key} = {toml_value(value)}\n" for key, value in table.items())


positive = st.one_of(st.floats(1e-3, 1e2, **_finite), st.integers(1, 100))  # TOML integers are numbers too
fraction = st.floats(1e-6, 0.999, **_finite)


@st.composite
def valid_config(draw):
    """A random subset of Config's keys with values load_config must accept (and their consistency rules)."""
    table = {}
    lattice_kind = None
    if draw(st.booleans()):
        lattice_kind = draw(st.sampled_from(["hexagonal", "square", "oblique"]))
        lattice = {"kind": lattice_kind, "a_nm": draw(positive)}
        if draw(st.booleans()):
            lattice["angle_deg"] = draw(st.floats(-180, 180, **_finite))
        if lattice_kind == "oblique":
            lattice["a2_nm"] = draw(positive)
            lattice["gamma_deg"] = draw(st.floats(1, 179, **_finite))
        table["lattice"] = lattice
    orders = ["auto", "commensurate", "stripes", "none"] + ([] if lattice_kind in ("square", "oblique") else ["moire"])
    order = draw(st.sampled_from(orders))
    if draw(st.booleans()) or order != "auto":
        table["order"] = order
    if order != "none":
        choice = draw(st.sampled_from(["nothing", "superlattice", "q"]))
        if choice == "superlattice":
            names = ["3x3", "2x2", "4x1", "2x1"]
            if lattice_kind in (None, "hexagonal"):
                names.append("sqrt3xsqrt3R30")
            if lattice_kind in (None, "square"):
                names.append("sqrt2xsqrt2R45")
            if order != "commensurate":
                names.append("none")
            table["superlattice"] = draw(st.sampled_from(names))
        elif choice == "q":
            pair = st.tuples(st.floats(0.5, 20, **_finite), st.floats(-20, 20, **_finite)).map(list)
            table["q_rad_per_nm"] = draw(st.lists(pair, min_size=1, max_size=3))
    if draw(st.booleans()):
        table["level_order"] = draw(st.integers(0, 8))
    if draw(st.booleans()):
        table["line_method"] = draw(st.sampled_from(["auto", "median", "mean", "hann", "difference", "none"]))
    for key in ("sigma_nm", "drift_sigma_nm", "min_domain_area_nm2", "a_nm", "twist_tolerance_deg"):
        if draw(st.booleans()):
            table[key] = draw(positive)
    for key in ("leakage", "false_alarm"):
        if draw(st.booleans()):
            table[key] = draw(fraction)
    for key in ("confidence", "anisotropy_threshold"):
        if draw(st.booleans()):
            table[key] = draw(st.floats(1e-6, 1.0, **_finite))
    if draw(st.booleans()):
        table["drift"] = draw(st.booleans())
    return table


@reproducible(200)
@given(valid_config(), st.booleans())
def test_valid_config_loads_to_the_same_values(table, under_analysis):
    text = toml_text(table)
    if under_analysis:
        text = "[analysis]\n" + text
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "run.toml"
        path.write_text(text, encoding="utf-8")
        config = load_config(path)
    defaults = Config()
    for key in Config.__dataclass_fields__:
        if key in table:
            expected = None if (key == "line_method" and table[key] == "none") else table[key]
        else:
            expected = getattr(defaults, key)
        # common practice, no source: a configuration file's values arrive unchanged (TOML keeps floats exactly),
        # and keys not in the file keep their defaults.
        assert getattr(config, key) == expected, (key, getattr(config, key), expected)


# One corruption each; every one breaks a documented rule of Config (types, ranges, names, unknown keys).
CORRUPTIONS = {
    "string for a number": lambda v: ("sigma_nm", str(v)),
    "negative sigma": lambda v: ("sigma_nm", -abs(v) - 1e-3),
    "zero sigma": lambda v: ("drift_sigma_nm", 0.0),
    "negative area": lambda v: ("min_domain_area_nm2", -abs(v) - 1e-3),
    "boolean for a number": lambda v: ("a_nm", True),
    "list for a number": lambda v: ("twist_tolerance_deg", [v]),
    "leakage above 1": lambda v: ("leakage", 1.0 + abs(v)),
    "negative false alarm": lambda v: ("false_alarm", -abs(v) - 1e-3),
    "confidence above 1": lambda v: ("confidence", 1.0 + abs(v) + 1e-3),
    "anisotropy string": lambda v: ("anisotropy_threshold", "0.5"),
    "fractional level order": lambda v: ("level_order", abs(v) + 0.5),
    "negative level order": lambda v: ("level_order", -1 - int(abs(v))),
    "string level order": lambda v: ("level_order", "1"),
    "drift as a string": lambda v: ("drift", "yes"),
    "drift as a number": lambda v: ("drift", 1),
    "unknown order": lambda v: ("order", "diagonal"),
    "order as a number": lambda v: ("order", 3),
    "unknown line method": lambda v: ("line_method", "plane"),
    "malformed superlattice": lambda v: ("superlattice", "3by3"),
    "superlattice as a number": lambda v: ("superlattice", 3),
    "q as a flat triple": lambda v: ("q_rad_per_nm", [v, 0.0, 1.0]),
    "zero wavevector": lambda v: ("q_rad_per_nm", [[0.0, 0.0]]),
    "q as strings": lambda v: ("q_rad_per_nm", [["1.0", "2.0"]]),
    "lattice without a_nm": lambda v: ("lattice", {"kind": "hexagonal"}),
    "negative lattice constant": lambda v: ("lattice", {"kind": "square", "a_nm": -abs(v) - 1e-3}),
    "unknown lattice kind": lambda v: ("lattice", {"kind": "kagome", "a_nm": abs(v) + 0.1}),
    "lattice as a string": lambda v: ("lattice", "hexagonal"),
    "NaN sigma": lambda v: ("sigma_nm", math.nan),
    "infinite leakage": lambda v: ("leakage", math.inf),
    "infinite wavevector": lambda v: ("q_rad_per_nm", [[math.inf, v]]),
    "NaN lattice constant": lambda v: ("lattice", {"kind": "hexagonal", "a_nm": math.nan}),
    "level order too high": lambda v: ("level_order", 9 + int(v)),
    "empty wavevector list": lambda v: ("q_rad_per_nm", []),
    "wavevectors nested too deep": lambda v: ("q_rad_per_nm", [[[v, 0.0]]]),
    "superlattice factor zero": lambda v: ("superlattice", "0x3"),
    "root cell that does not exist": lambda v: ("superlattice", "sqrt5xsqrt5R26.6"),
    "unknown lattice key": lambda v: ("lattice", {"kind": "square", "a_nm": abs(v) + 0.1, "b_nm": 1.0}),
    "oblique lattice without gamma": lambda v: ("lattice", {"kind": "oblique", "a_nm": 0.3, "a2_nm": 0.4}),
    "analysis not a table": lambda v: ("analysis", v),
    "unknown key": lambda v: ("sigma", abs(v) + 0.1),
    "misspelt key": lambda v: ("sigma_mn", abs(v) + 0.1),
}


@st.composite
def invalid_config(draw):
    table = draw(valid_config())
    name = draw(st.sampled_from(sorted(CORRUPTIONS)))
    key, value = CORRUPTIONS[name](draw(st.floats(0.01, 50, **_finite)))
    table[key] = value
    return name, table


@pytest.fixture(scope="module")
def topography(tmp_path_factory):
    """A tiny valid topography (three waves 120 degrees apart, 48 px, with its sidecar) for the command line."""
    folder = tmp_path_factory.mktemp("props-cli")
    y, x = np.mgrid[:48, :48] * 0.1
    angles = (0.2, 0.2 + 2 * np.pi / 3, 0.2 + 4 * np.pi / 3)
    image = sum(np.cos(6.0 * (np.cos(t) * x + np.sin(t) * y)) for t in angles)
    np.save(folder / "topo.npy", image.astype(np.float32))
    (folder / "topo.json").write_text(json.dumps({"pixel_size_nm": 0.1}), encoding="utf-8")
    return folder / "topo.npy"


@reproducible(200)
@given(invalid_config())
def test_invalid_config_exits_2_with_one_line(topography, case):
    name, table = case
    with tempfile.TemporaryDirectory() as folder:
        config_path = Path(folder) / "bad.toml"
        config_path.write_text(toml_text(table), encoding="utf-8")
        out = Path(folder) / "out"
        stderr, stdout = io.StringIO(), io.StringIO()
        with contextlib.redirect_stderr(stderr), contextlib.redirect_stdout(stdout):
            status = main(["analyze", str(topography), "--config", str(config_path), "--out", str(out)])
        message = stderr.getvalue()
        # docs/README.md contract (command line): bad input exits 2 with a one-line message naming the file,
        # and no traceback; nothing is written.
        assert status == 2, (name, table, status, message)
        assert message.count("\n") == 1 and message.endswith("\n"), (name, message)
        assert "Traceback" not in message, (name, message)
        assert str(config_path) in message, (name, message)
        assert not out.exists(), name


# One corruption each of a sidecar; every one breaks a rule of docs/README.md's sidecar contract.
SIDECAR_CORRUPTIONS = {
    "negative pixel": lambda v: {"pixel_size_nm": -v},
    "zero pixel": lambda v: {"pixel_size_nm": 0.0},
    "pixel as a string": lambda v: {"pixel_size_nm": f"{v} nm"},
    "pixel as a boolean": lambda v: {"pixel_size_nm": True},
    "three pixel sizes": lambda v: {"pixel_size_nm": [v, v, v]},
    "nested pixel size": lambda v: {"pixel_size_nm": [[v, v]]},
    "pair with a negative": lambda v: {"pixel_size_nm": [v, -v]},
    "pixel as a table": lambda v: {"pixel_size_nm": {"row": v}},
    "unknown channel": lambda v: {"channel": "height"},
    "channel as a number": lambda v: {"channel": v},
    "bias as a string": lambda v: {"bias_V": f"{v} V"},
    "bias as a boolean": lambda v: {"bias_V": False},
    "bias as a list": lambda v: {"bias_V": [v]},
    "setpoint as a string": lambda v: {"setpoint_A": str(v)},
    "energies on an image": lambda v: {"energies_V": [v, v + 1]},
    "missing mask file": lambda v: {"mask": "nowhere.npy"},
    "mask as a number": lambda v: {"mask": v},
}


@st.composite
def invalid_sidecar(draw):
    table = draw(sidecars)
    name = draw(st.sampled_from(sorted(SIDECAR_CORRUPTIONS)))
    table.update(SIDECAR_CORRUPTIONS[name](draw(st.floats(0.01, 1.0, **_finite))))
    return name, table


@reproducible(60)
@given(invalid_sidecar())
def test_invalid_sidecar_exits_2_with_one_line(topography, case):
    name, sidecar = case
    with tempfile.TemporaryDirectory() as folder:
        image = Path(folder) / "topo.npy"
        np.save(image, np.load(topography))
        (Path(folder) / "topo.json").write_text(json.dumps(sidecar), encoding="utf-8")
        stderr, stdout = io.StringIO(), io.StringIO()
        with contextlib.redirect_stderr(stderr), contextlib.redirect_stdout(stdout):
            status = main(["peaks", str(image)])
        message = stderr.getvalue()
        # docs/README.md contract (sidecar, command line): a malformed sidecar is bad input, exit 2 with one line
        # on stderr that names the image, and no traceback.
        assert status == 2, (name, sidecar, status, message)
        assert message.count("\n") == 1 and message.endswith("\n"), (name, message)
        assert "Traceback" not in message, (name, message)
        assert str(image) in message, (name, message)
        assert stdout.getvalue() == "", (name, stdout.getvalue())
