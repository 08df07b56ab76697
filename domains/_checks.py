"""Input checks shared by every step: numbers, wavevectors within the Nyquist limit, configuration values."""

from __future__ import annotations

import math
import re

import numpy as np

from ._errors import InputError


def positive(value, name) -> float:
    """``value`` as a finite positive float, or an InputError naming ``name``.

    Examples
    --------
    >>> positive("0.5", "sigma_nm")
    0.5
    """
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be positive (and finite), got {value!r}")
    return value


def within_nyquist(q, pixel_size, name="q"):
    """Raise an InputError naming ``name`` if any wavevector (qx, qy) lies beyond the Nyquist limit.

    Parameters
    ----------
    q : (k, 2) array
        Wavevectors in rad/nm.
    pixel_size : (float, float)
        (dy, dx) in nm; the limit is |qx| <= pi / dx, |qy| <= pi / dy.
    name : str
        Name used in the message.

    Examples
    --------
    >>> within_nyquist(np.array([[1.0, 0.0]]), (0.1, 0.1))
    """
    dy, dx = pixel_size
    nyquist = np.array([math.pi / dx, math.pi / dy])
    over = np.any(np.abs(q) > nyquist * (1 + 1e-12), axis=1)
    if np.any(over):
        raise InputError(
            f"{name} = {np.asarray(q)[over][0].tolist()} rad/nm lies beyond the Nyquist limit "
            f"(|qx| <= {nyquist[0]:.4g}, |qy| <= {nyquist[1]:.4g} rad/nm for this pixel size)"
        )


# --------------------------------------------------------------------------- configuration values

_SUPERCELL = re.compile(r"(\d+)x(\d+)")
_ROOT_CELL = re.compile(r"sqrt(\d+)xsqrt(\d+)r(-?\d+(?:\.\d*)?)")
_LATTICE_KINDS = ("hexagonal", "square", "oblique")
_LATTICE_KEYS = ("kind", "a_nm", "angle_deg", "a2_nm", "gamma_deg")


def _is_number(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def number(value, name, *, low=None, high=None, low_open=True, high_open=True, where="configuration") -> float:
    """``value`` as a finite float within (low, high), or an InputError naming ``where`` and ``name``.

    Strings and booleans are not numbers here (a TOML ``"0.5"`` or ``true`` is a mistake).

    Parameters
    ----------
    value : object
        The value received.
    name : str
        The option's name, used in the message.
    low, high : float, optional
        Bounds; open (excluded) unless ``low_open`` / ``high_open`` is False.
    where : str
        The file or place the value came from.

    Returns
    -------
    float

    Examples
    --------
    >>> number(0.01, "leakage", low=0, high=1)
    0.01
    >>> number("0.5", "sigma_nm", low=0)
    Traceback (most recent call last):
    ...
    domains._errors.InputError: configuration: sigma_nm must be a number greater than 0, got '0.5'
    """
    parts = []
    if low is not None:
        parts.append(f"greater than {low:g}" if low_open else f"at least {low:g}")
    if high is not None:
        parts.append(f"less than {high:g}" if high_open else f"at most {high:g}")
    expected = f"{where}: {name} must be a number" + (" " + " and ".join(parts) if parts else "")
    if not _is_number(value) or not math.isfinite(float(value)):
        raise InputError(f"{expected}, got {value!r}")
    value = float(value)
    if low is not None and (value <= low if low_open else value < low):
        raise InputError(f"{expected}, got {value!r}")
    if high is not None and (value >= high if high_open else value > high):
        raise InputError(f"{expected}, got {value!r}")
    return value


def superlattice_name(name, *, lattice_kind=None, where="configuration"):
    """Check a superlattice name: "none", "NxM" (N, M >= 1) or "sqrtNxsqrtNR<angle>".

    Parameters
    ----------
    name : str or None
        The name received.
    lattice_kind : str, optional
        The lattice's kind when it is known; root cells exist for sqrt3 (hexagonal) and sqrt2 (square).
    where : str
        The file or place the value came from.

    Returns
    -------
    str or None
        The name as given.

    Examples
    --------
    >>> superlattice_name("3x3")
    '3x3'
    >>> superlattice_name("3by3")
    Traceback (most recent call last):
    ...
    domains._errors.InputError: configuration: superlattice must be 'none', 'NxM' (e.g. '3x3', '4x1') or 'sqrtNxsqrtNR<angle>' (e.g. 'sqrt13xsqrt13R13.9', 'sqrt3xsqrt3R30', 'sqrt2xsqrt2R45'), got '3by3'
    """
    if name is None:
        return None
    expected = (f"{where}: superlattice must be 'none', 'NxM' (e.g. '3x3', '4x1') or 'sqrtNxsqrtNR<angle>' "
                f"(e.g. 'sqrt13xsqrt13R13.9', 'sqrt3xsqrt3R30', 'sqrt2xsqrt2R45'), got {name!r}")
    if not isinstance(name, str):
        raise InputError(expected)
    text = name.replace(" ", "").replace("×", "x").replace("√", "sqrt").lower()
    if text == "none":
        return name
    match = _SUPERCELL.fullmatch(text)
    if match:
        if int(match.group(1)) < 1 or int(match.group(2)) < 1 or text == "1x1":
            raise InputError(f"{where}: superlattice {name!r}: both factors must be at least 1, not both 1")
        return name
    match = _ROOT_CELL.fullmatch(text)
    if not match or match.group(1) != match.group(2):
        raise InputError(expected)
    n, angle = int(match.group(1)), abs(float(match.group(3)))
    # A sqrt(N) x sqrt(N) R theta cell of a hexagonal lattice has N = h^2 + hk + k^2 and
    # theta = atan(sqrt(3) k / (2h + k)) (docs/methods.md §8); sqrt2 x sqrt2 R45 is the square one.
    hexagonal = any(h * h + h * k + k * k == n and abs(math.degrees(math.atan2(math.sqrt(3) * k, 2 * h + k)) - angle) < 0.2
                    for h in range(1, 8) for k in range(0, h + 1))
    if not hexagonal and not (n == 2 and abs(angle - 45) < 0.2):
        raise InputError(f"{where}: superlattice {name!r}: no sqrt(N) x sqrt(N) R theta cell has N = {n} and "
                         f"theta = {angle:g} deg (hexagonal: N = h^2 + hk + k^2, theta = atan(sqrt(3) k / (2h + k)), "
                         "e.g. sqrt13xsqrt13R13.9; square: sqrt2xsqrt2R45)")
    needs = "hexagonal" if hexagonal else "square"
    if lattice_kind is not None and lattice_kind != needs:
        raise InputError(f"{where}: superlattice {name!r} needs a {needs} lattice, the lattice table says {lattice_kind!r}")
    return name


def lattice_table(table, *, where="configuration") -> dict:
    """Check a ``lattice`` table: kind, a_nm (and angle_deg; a2_nm and gamma_deg for oblique).

    Parameters
    ----------
    table : dict
        The table received.
    where : str
        The file or place the value came from.

    Returns
    -------
    dict
        The table as given.

    Examples
    --------
    >>> lattice_table({"kind": "hexagonal", "a_nm": 0.34})["kind"]
    'hexagonal'
    >>> lattice_table({"kind": "hexagonal"})
    Traceback (most recent call last):
    ...
    domains._errors.InputError: configuration: lattice needs a_nm (nm), got {'kind': 'hexagonal'}
    """
    if not isinstance(table, dict):
        raise InputError(f"{where}: lattice must be a table with kind, a_nm and angle_deg, got {table!r}")
    unknown = sorted(set(table) - set(_LATTICE_KEYS))
    if unknown:
        raise InputError(f"{where}: lattice has unknown key(s) {', '.join(map(str, unknown))}; "
                         f"allowed: {', '.join(_LATTICE_KEYS)}")
    if table.get("kind") not in _LATTICE_KINDS:
        raise InputError(f"{where}: lattice kind must be one of {', '.join(_LATTICE_KINDS)}, got {table.get('kind')!r}")
    if "a_nm" not in table:
        raise InputError(f"{where}: lattice needs a_nm (nm), got {table!r}")
    number(table["a_nm"], "lattice a_nm", low=0, where=where)
    if "angle_deg" in table:
        number(table["angle_deg"], "lattice angle_deg", where=where)
    if table["kind"] == "oblique":
        for key in ("a2_nm", "gamma_deg"):
            if key not in table:
                raise InputError(f"{where}: an oblique lattice needs a2_nm and gamma_deg, got {table!r}")
        number(table["a2_nm"], "lattice a2_nm", low=0, where=where)
        number(table["gamma_deg"], "lattice gamma_deg", low=0, high=180, where=where)
    else:
        extra = [key for key in ("a2_nm", "gamma_deg") if key in table]
        if extra:
            raise InputError(f"{where}: {', '.join(extra)} only apply to an oblique lattice, not a {table['kind']} one")
    return table


def wavevector_list(q, *, name="q_rad_per_nm", where="configuration") -> np.ndarray:
    """Check a list of wavevectors [[qx, qy], ...] in rad/nm: finite numbers, none zero.

    Parameters
    ----------
    q : list
        The value received.
    name : str
        The option's name, used in the message.
    where : str
        The file or place the value came from.

    Returns
    -------
    (k, 2) ndarray

    Examples
    --------
    >>> wavevector_list([[6.0, 0.0], [-3.0, 5.2]]).shape
    (2, 2)
    >>> wavevector_list([6.0, 0.0, 1.0])
    Traceback (most recent call last):
    ...
    domains._errors.InputError: configuration: q_rad_per_nm must be a list of [qx, qy] pairs in rad/nm, got [6.0, 0.0, 1.0]
    """
    expected = f"{where}: {name} must be a list of [qx, qy] pairs in rad/nm, got {q!r}"
    if not isinstance(q, (list, tuple, np.ndarray)) or len(q) == 0:
        raise InputError(expected)
    rows = [q] if len(q) == 2 and all(_is_number(v) for v in q) else list(q)
    if not all(isinstance(r, (list, tuple, np.ndarray)) and len(r) == 2 and all(_is_number(v) for v in r)
               for r in rows):
        raise InputError(expected)
    array = np.asarray(rows, dtype=float)
    if not np.all(np.isfinite(array)):
        raise InputError(f"{where}: {name} must hold finite numbers, got {q!r}")
    if np.any(np.hypot(array[:, 0], array[:, 1]) == 0):
        raise InputError(f"{where}: {name} holds a zero wavevector, which has no period; got {q!r}")
    return array


def config_values(config, where="configuration"):
    """Check every field of a :class:`domains.pipeline.Config` that needs no image; raise InputError.

    Types (numbers are numbers, not strings or booleans), ranges, names (order,
    line method, superlattice), the lattice table and the wavevector list.

    Parameters
    ----------
    config : Config
        The configuration.
    where : str
        The file it came from, named in every message.

    Returns
    -------
    Config
        The same object.

    Examples
    --------
    >>> from domains.pipeline import Config
    >>> config_values(Config(sigma_nm=True), "run.toml")
    Traceback (most recent call last):
    ...
    domains._errors.InputError: run.toml: sigma_nm must be a number greater than 0, got True
    """
    from .level import _MAX_ORDER

    level_order = config.level_order
    if isinstance(level_order, bool) or not isinstance(level_order, (int, np.integer)) \
            or not 0 <= level_order <= _MAX_ORDER:
        raise InputError(f"{where}: level_order must be an integer from 0 to {_MAX_ORDER}, got {level_order!r}")
    if not isinstance(config.drift, bool):
        raise InputError(f"{where}: drift must be true or false, got {config.drift!r}")
    for name in ("sigma_nm", "drift_sigma_nm", "min_domain_area_nm2", "a_nm", "twist_tolerance_deg"):
        value = getattr(config, name)
        if value is not None:
            number(value, name, low=0, where=where)
    number(config.leakage, "leakage", low=0, high=1, where=where)
    number(config.false_alarm, "false_alarm", low=0, high=1, where=where)
    number(config.anisotropy_threshold, "anisotropy_threshold", low=0, high=1, high_open=False, where=where)
    if config.confidence is not None:
        number(config.confidence, "confidence", low=0, high=1, high_open=False, where=where)
    step = config.grid_step
    if step is not None and (isinstance(step, bool) or not isinstance(step, (int, np.integer)) or step < 1):
        raise InputError(f"{where}: grid_step must be a positive integer number of pixels (1: full resolution), "
                         f"got {step!r}")
    kind = None
    if config.lattice is not None:
        kind = lattice_table(config.lattice, where=where)["kind"]
    superlattice_name(config.superlattice, lattice_kind=kind, where=where)
    if config.q_rad_per_nm is not None:
        wavevector_list(config.q_rad_per_nm, where=where)
    return config


def config_for_image(config, shape, pixel_size_nm, where="configuration"):
    """Check the configuration against one image's size and pixel: sigma within the frame, q within Nyquist.

    Parameters
    ----------
    config : Config
        A configuration that passed :func:`config_values`.
    shape : (int, int)
        (rows, cols) of the image.
    pixel_size_nm : (float, float)
        (dy, dx) in nm.
    where : str
        The configuration file, named in every message.

    Examples
    --------
    >>> from domains.pipeline import Config
    >>> config_for_image(Config(sigma_nm=20.0), (64, 64), (0.05, 0.05), "run.toml")
    Traceback (most recent call last):
    ...
    domains._errors.InputError: run.toml: sigma_nm = 20 nm is larger than half the frame (3.2 x 3.2 nm); at most 1.6 nm
    """
    dy, dx = pixel_size_nm
    height, width = shape[0] * dy, shape[1] * dx
    half = min(height, width) / 2
    for name in ("sigma_nm", "drift_sigma_nm"):
        value = getattr(config, name)
        if value is not None and value > half:
            raise InputError(f"{where}: {name} = {value:g} nm is larger than half the frame "
                             f"({height:.4g} x {width:.4g} nm); at most {half:.4g} nm")
    if config.q_rad_per_nm is not None:
        within_nyquist(wavevector_list(config.q_rad_per_nm, where=where), pixel_size_nm, name=f"{where}: q_rad_per_nm")
    if config.lattice is not None:
        from .fourier import Lattice

        lattice = Lattice.from_params(config.lattice["kind"], config.lattice["a_nm"],
                                      config.lattice.get("angle_deg", 0.0), a2_nm=config.lattice.get("a2_nm"),
                                      gamma_deg=config.lattice.get("gamma_deg"))
        try:
            within_nyquist(np.asarray(lattice.bragg, float), pixel_size_nm, name="a Bragg peak")
        except InputError as err:
            raise InputError(f"{where}: lattice a_nm = {config.lattice['a_nm']:g} nm is not resolved with "
                             f"{max(dy, dx):g} nm pixels: {err}") from None
    return config


# --------------------------------------------------------------------------- inputs of one analysis

#: Smallest image side (pixels) an analysis accepts: a spectrum and a lock-in need several periods
#: and a trusted interior away from the frame (common practice, no source).
MIN_SIDE_PIXELS = 32

#: Smallest fraction of usable pixels (finite and not masked) an analysis accepts.
MIN_USABLE_FRACTION = 0.5


def usable_image(scan, *, role="image"):
    """Raise an InputError naming the file if an image is too small or mostly unusable.

    Parameters
    ----------
    scan : Scan
        A 2-D image or a 3-D grid (its image shape is checked).
    role : str
        What the scan is, for the message ("topograph", "map", "grid").

    Returns
    -------
    Scan
        The same scan.

    Examples
    --------
    >>> import numpy as np
    >>> from domains import Scan
    >>> usable_image(Scan(np.zeros((16, 16)), pixel_size_nm=0.05, source="tiny.npy"))
    Traceback (most recent call last):
    ...
    domains._errors.InputError: tiny.npy: the image is 16 x 16 pixels; an analysis needs at least 32 x 32
    """
    rows, cols = scan.shape[-2:]
    if min(rows, cols) < MIN_SIDE_PIXELS:
        raise InputError(f"{scan.source}: the {role} is {rows} x {cols} pixels; an analysis needs at least "
                         f"{MIN_SIDE_PIXELS} x {MIN_SIDE_PIXELS}")
    if scan.mask is not None:
        usable = 1.0 - float(np.mean(scan.mask))
        if usable < MIN_USABLE_FRACTION:
            raise InputError(f"{scan.source}: only {100 * usable:.0f}% of the {role}'s pixels are usable "
                             f"(the rest are NaN, inf or masked); at least {100 * MIN_USABLE_FRACTION:.0f}% must be")
    return scan


def scans_for_analysis(topography, maps=(), grid=None):
    """Check that a topograph, its maps and its grid can be analysed together; raise InputError if not.

    Everything here is read from shapes, pixel sizes and sidecar values: no computation.
    The topograph is a 2-D image large enough to analyse; each map is a 2-D image of the
    same shape and pixel size with a bias of its own; the grid is 3-D with slices of
    the topograph's shape and pixel size.

    Parameters
    ----------
    topography : Scan
    maps : sequence of Scan
    grid : Scan, optional

    Examples
    --------
    >>> import numpy as np
    >>> from domains import Scan
    >>> topo = Scan(np.zeros((32, 32)), pixel_size_nm=0.05, source="t.npy")
    >>> maps = [Scan(np.zeros((32, 32)), pixel_size_nm=0.05, bias_V=0.2, source=n) for n in ("a.npy", "b.npy")]
    >>> scans_for_analysis(topo, maps)
    Traceback (most recent call last):
    ...
    domains._errors.InputError: b.npy: bias_V = 0.2 V is also the bias of a.npy; each map needs a bias of its own
    """
    if topography.is_grid:
        raise InputError(f"{topography.source}: the topograph must be a 2-D image, got a 3-D array "
                         f"{tuple(topography.shape)}; give grids with --grid")
    usable_image(topography, role="topograph")
    seen = {}
    for m in maps:
        if m.is_grid:
            raise InputError(f"{m.source}: a map must be a 2-D image, got shape {tuple(m.shape)}; give grids with --grid")
        if m.shape != topography.shape:
            raise InputError(f"{m.source}: shape {m.shape} differs from the topograph's {topography.shape}")
        if not np.allclose(m.pixel_size_nm, topography.pixel_size_nm, rtol=1e-6):
            raise InputError(f"{m.source}: pixel size {m.pixel_size_nm} nm differs from the topograph's "
                             f"{topography.pixel_size_nm} nm")
        if m.bias_V is None:
            raise InputError(f"{m.source}: the map has no bias; give bias_V in its sidecar")
        if m.bias_V in seen:
            raise InputError(f"{m.source}: bias_V = {m.bias_V:g} V is also the bias of {seen[m.bias_V]}; "
                             "each map needs a bias of its own")
        seen[m.bias_V] = m.source
        usable_image(m, role="map")
    if grid is not None:
        if not grid.is_grid:
            raise InputError(f"{grid.source}: --grid needs a 3-D array (energy, row, col), got shape {tuple(grid.shape)}")
        if tuple(grid.shape[1:]) != tuple(topography.shape):
            raise InputError(f"{grid.source}: grid slices {tuple(grid.shape[1:])} differ from the topograph's "
                             f"{tuple(topography.shape)}")
        if not np.allclose(grid.pixel_size_nm, topography.pixel_size_nm, rtol=1e-6):
            raise InputError(f"{grid.source}: pixel size {grid.pixel_size_nm} nm differs from the topograph's "
                             f"{topography.pixel_size_nm} nm")
        energies = np.asarray(grid.energies_V, float)
        if len(np.unique(energies)) != len(energies):
            raise InputError(f"{grid.source}: energies_V repeats a bias; each slice needs its own, "
                             f"got {energies.tolist()}")
        usable_image(grid, role="grid")
