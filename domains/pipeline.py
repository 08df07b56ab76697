"""The whole analysis from a configuration: level, peaks, drift, lock-in, order, segment, measure, compare, bundle."""

from __future__ import annotations

import math
import tomllib
from fractions import Fraction
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path

import numpy as np

from . import _refine, report
from ._errors import InputError
from ._grid import Grid, choose_step
from ._progress import progress as _progress
from ._lockin import amplitude, choose_sigma, lockin, trusted_mask
from ._scan import Scan

ORDER_KINDS = ("auto", "commensurate", "stripes", "moire", "none")


@dataclass
class Config:
    """Analysis parameters. ``None`` means: choose automatically (and report the choice).

    Attributes
    ----------
    level_order : int
        Order of the polynomial background removed (1 = plane).
    line_method : str or None
        Scan-line offset removal: "auto" (jumps first; then Hann-weighted line means unless an order
        peak lies within 3 bins of the qy axis), None, "median", "mean", "hann" or "difference"
        (see :func:`domains.level.line_offsets`).
    lattice : dict or None
        Override of the atomic lattice: ``{"kind": "hexagonal", "a_nm": 0.34, "angle_deg": 8.0}``.
    superlattice : str or None
        Override of the superlattice: "3x3", "2x2", ..., or "none".
    q_rad_per_nm : list or None
        Explicit order wavevectors [[qx, qy], ...] in rad/nm (skips peak detection for the order).
    order : str
        "auto", "commensurate", "stripes", "moire" or "none".
    sigma_nm : float or None
        Lock-in width for the order maps; default from the leakage bound (docs/methods.md §1).
    leakage : float
        Largest leakage of a neighbouring peak allowed by the automatic sigma.
    drift : bool
        Correct drift from the Bragg peaks (Lawler–Fujita) when a lattice is resolved.
    drift_sigma_nm : float or None
        Lock-in width for the drift field; default the narrowest that keeps the strong peaks near a
        Bragg peak, and a second layer's Bragg peaks, below ``leakage`` (docs/methods.md §9).
    false_alarm : float
        Probability per pixel that noise alone passes the "order present" threshold.
    confidence : float or None
        Score a pixel needs to seed a domain; default cos(pi / 2n) for an n x n CDW
        (halfway between a variant's centre and its cell boundary), and the
        anisotropy threshold for stripes.
    anisotropy_threshold : float
        Smallest anisotropy for a stripe orientation (docs/methods.md §6).
    min_domain_area_nm2 : float or None
        Smallest domain kept; default the area of a disc of radius 2 sigma (the resolution).
    a_nm : float or None
        Atomic lattice constant for a moiré whose atoms are not resolved.
    twist_tolerance_deg : float or None
        Twist range of one twist domain; default from the twist uncertainty.
    grid_step : int or None
        Decimation step (input pixels) of the grid on which the order, domains, walls and
        defects are computed; default the lock-in's lossless step, at most sigma / 2
        (:func:`domains._grid.choose_step`); 1 computes everything at full resolution.
    """

    level_order: int = 1
    line_method: str | None = "auto"
    lattice: dict | None = None
    superlattice: str | None = None
    q_rad_per_nm: list | None = None
    order: str = "auto"
    sigma_nm: float | None = None
    leakage: float = 0.01
    drift: bool = True
    drift_sigma_nm: float | None = None
    false_alarm: float = 1e-3
    confidence: float | None = None
    anisotropy_threshold: float = 0.5
    min_domain_area_nm2: float | None = None
    a_nm: float | None = None
    twist_tolerance_deg: float | None = None
    grid_step: int | None = None

    def validate(self, where="configuration"):
        """Raise InputError on values that are out of range or contradict each other."""
        if self.order not in ORDER_KINDS:
            raise InputError(f"{where}: order must be one of {ORDER_KINDS}, got {self.order!r}")
        if self.line_method not in (None, "auto", "median", "mean", "hann", "difference"):
            raise InputError(f"{where}: line_method must be auto, median, mean, hann, difference or none, "
                             f"got {self.line_method!r}")
        from ._checks import config_values

        # Types, ranges, names, the lattice table and the wavevector list (no image needed).
        config_values(self, where)
        sup = (self.superlattice or "").lower()
        if self.order == "none" and sup not in ("", "none"):
            raise InputError(f"{where}: order = 'none' contradicts superlattice = {self.superlattice!r}")
        if self.order == "commensurate" and sup in ("none", "incommensurate"):
            raise InputError(f"{where}: order = 'commensurate' contradicts superlattice = {self.superlattice!r}")
        if self.q_rad_per_nm is not None and sup not in ("", "none"):
            raise InputError(f"{where}: give either q_rad_per_nm or superlattice, not both "
                             f"(q fixes the order's wavevectors, superlattice derives them from the lattice)")
        if self.lattice is not None:
            if not isinstance(self.lattice, dict) or "kind" not in self.lattice:
                raise InputError(f"{where}: lattice must be a table with kind, a_nm, angle_deg; got {self.lattice!r}")
            if self.lattice["kind"] == "square" and sup.startswith("sqrt3"):
                raise InputError(f"{where}: a sqrt3 x sqrt3 superlattice needs a hexagonal lattice, not a square one")
        if self.order == "moire" and self.lattice is not None and self.lattice.get("kind") == "square":
            raise InputError(f"{where}: the moiré analysis needs a hexagonal lattice")
        return self


def load_config(path) -> Config:
    """Read a TOML configuration file into a :class:`Config` (unknown keys are an error).

    Parameters
    ----------
    path : str or Path
        A TOML file with the :class:`Config` fields as top-level keys (or under ``[analysis]``).

    Returns
    -------
    Config

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     p = Path(d) / "c.toml"
    ...     _ = p.write_text('superlattice = "3x3"\\nsigma_nm = 0.5\\n')
    ...     load_config(p).sigma_nm
    0.5
    """
    path = Path(path)
    if not path.is_file():
        what = "is a folder" if path.is_dir() else "not found"
        if path.is_symlink() and not path.exists():
            what = "is a symbolic link that leads nowhere (or a link loop)"
        raise InputError(f"{path}: configuration file {what}; expected a TOML file (--config)")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not valid TOML: {' '.join(str(err).split())}") from None
    except OSError as err:
        raise InputError(f"{path}: cannot read the configuration file ({err.strerror})") from None
    data = data.get("analysis", data)
    if not isinstance(data, dict):
        raise InputError(f"{path}: [analysis] must be a table of parameters, got {data!r}")
    known = {f.name for f in fields(Config)}
    unknown = sorted(set(data) - known)
    if unknown:
        raise InputError(f"{path}: unknown key(s) {', '.join(unknown)}; known keys: {', '.join(sorted(known))}")
    if data.get("line_method") == "none":
        data["line_method"] = None
    try:
        return Config(**data).validate(str(path))
    except TypeError as err:
        raise InputError(f"{path}: {err}") from None


@dataclass
class Analysis:
    """Everything one run found: numbers, maps, tables and the choices made (data only).

    The report's figures are drawn from it afterwards (:func:`domains.present.present`,
    called by :func:`write_analysis`) from ``views``: images already reduced for drawing and
    the result objects the figures show.
    """

    config: Config
    summary: dict
    maps: dict
    tables: dict
    notes: list = field(default_factory=list)
    choices: dict = field(default_factory=dict)
    #: Wall-clock seconds spent in each named step (benchmarks read it; not part of the summary).
    timings: dict = field(default_factory=dict)
    #: What the figures are drawn from (small arrays, result objects); not written to the bundle as such.
    views: dict = field(default_factory=dict)
    #: A lazy run's scratch folder (domains._scratch.Scratch) its lazy maps read from; removed with the Analysis.
    scratch: object = field(default=None, repr=False)


def _materialise(scan: Scan) -> Scan:
    if scan.is_lazy:
        return scan.with_data(np.asarray(scan.data.compute()))
    return scan


def analyze(topography: Scan, *, maps=(), grid: Scan | None = None, config: Config | None = None, progress=True):
    """Run the whole chain on one topograph (and its maps and grid); return an :class:`Analysis`.

    Steps: level → spectrum and lattice indexing → drift (Lawler–Fujita) → lock-in
    at the order's wavevectors → order (translational variants or stripe
    orientation) → domains, walls, defects → tables and summary → bias
    comparison (maps, grid) → moiré maps (when a moiré is found). The figures are drawn afterwards
    from the result (:func:`domains.present.present`, when the bundle is written).

    Parameters
    ----------
    topography : Scan
        The topograph (2-D).
    maps : sequence of Scan
        Conductance maps of the same area, one per bias.
    grid : Scan, optional
        A spectroscopic grid (energy, row, col) on the same pixel grid.
    config : Config, optional
        Parameters; defaults choose everything automatically.
    progress : bool
        Show a progress bar.

    Returns
    -------
    Analysis

    Examples
    --------
    >>> from domains.synth import cdw_scene
    >>> scene = cdw_scene(shape=(192, 192), n_domains=2, rng=3)
    >>> result = analyze(scene.topography, progress=False)
    >>> result.summary["superlattice"]["order"], result.summary["domains"]["count"]
    ('3x3', 2)
    """
    from ._checks import scans_for_analysis

    config = (config or Config()).validate()
    # The same checks the command line makes before any work (one home for them).
    scans_for_analysis(topography, maps, grid)
    # The topograph stays lazy into levelling (run chunk by chunk, on a cluster when one is in use).
    return _run(topography, [_materialise(m) for m in maps], grid, config, progress)


def _component_names(prefix, k):
    return [f"{prefix}_{j + 1}" for j in range(k)]


#: Largest side of the in-memory overview of a lazy topograph (its central crop) from which the
#: peaks, the lattice and the order are read.
OVERVIEW_PX = 2048


def _central_crop(image, mask, size=OVERVIEW_PX):
    """The central ``size`` x ``size`` (at most) window of a lazy image, in memory (float64), and its mask."""
    ny, nx = image.shape
    h, w = min(ny, size), min(nx, size)
    r0, c0 = (ny - h) // 2, (nx - w) // 2
    crop = np.asarray(image[r0:r0 + h, c0:c0 + w].compute(), dtype=float)
    return crop, (None if mask is None else np.asarray(mask[r0:r0 + h, c0:c0 + w], bool))


def find_order(topography: Scan, config: Config | None = None, *, on_step=None, lazy=True):
    """Level, index the spectrum, correct drift and index again: what order the image holds.

    The first three steps of :func:`analyze`, also what ``domains peaks`` shows: the
    lattice from the levelled image, the Lawler–Fujita drift field from its Bragg peaks,
    then the superlattice (commensurate by phase flatness, or incommensurate), stripes
    or a moiré, from the straightened image.

    Parameters
    ----------
    topography : Scan
        A 2-D image, in memory or dask-backed.
    config : Config, optional
        Parameters (defaults: automatic).
    on_step : callable, optional
        Called after each step (progress).
    lazy : bool
        Keep a dask-backed topograph lazy (float64 blocks): the peaks, the lattice and the
        order are then read from its central crop of at most :data:`OVERVIEW_PX` squared
        pixels, and ``image`` and ``corrected`` are dask arrays; the drift is corrected chunk by
        chunk (:func:`domains.drift.correct_drift` of a dask image). False: the
        levelled image is computed first, as for an in-memory topograph.

    Returns
    -------
    dict
        ``image`` (levelled), ``mask``, ``spec`` (the indexing, with peak roles),
        ``drift`` (a :class:`domains.drift.DriftResult` or None), ``corrected`` (the
        straightened image), ``notes``, ``choices``, ``lazy`` (whether ``image`` and
        ``corrected`` are dask arrays) and ``scratch`` (for a lazy run, the
        :class:`domains._scratch.Scratch` folder the levelled image was computed into, else None).

    Examples
    --------
    >>> from domains.synth import cdw_scene
    >>> found = find_order(cdw_scene(shape=(192, 192), n_domains=2, rng=3).topography)
    >>> found["spec"]["order_kind"], found["spec"]["superlattice_summary"]["order"]
    ('commensurate', '3x3')
    """
    from . import drift as drift_mod
    from .level import level, line_offsets

    config = (config or Config()).validate()
    step = on_step or (lambda *args, **kwargs: None)
    pixel = topography.pixel_size_nm
    notes, choices = [], {}

    # 1. Level: background plane and scan-line offsets (the mask travels along).
    # The warning about per-line levelling becomes a note (the peaks tell whether it matters).
    first_lines = "difference" if config.line_method == "auto" else config.line_method
    levelled = level(topography, order=config.level_order, lines=first_lines, warn=False)
    from ._scan import _is_dask

    lazy = bool(lazy) and _is_dask(levelled.data)
    mask = levelled.mask
    if _is_dask(mask):
        mask = np.asarray(mask.compute(), bool)
    if lazy:
        # Float64 blocks, as the in-memory run; the spectrum is read from the central crop.
        image = levelled.data.astype(float)
        view, view_mask = _central_crop(image, mask)
        notes.append(f"Lazy run: peaks, lattice and order read from the central {view.shape[0]} x {view.shape[1]} "
                     "pixels; lock-in, domains and maps from the whole image chunk by chunk.")
    else:
        image = np.asarray(levelled.data, dtype=float)
        view, view_mask = image, mask
    found_in_level = (levelled.metadata or {}).get("level")
    del levelled  # only its data as ``image`` (float64) is read from here: a float32 copy need not stay
    if found_in_level and found_in_level.get("note"):
        notes.append("Levelling: " + found_in_level["note"])
        choices["level_findings"] = found_in_level
    step("peaks and lattice")

    # 2. Peaks and the atomic lattice (the finest complete set of peaks, not the strongest).
    from . import fourier
    from ._read_order import find_lattice, read_order

    peaks = fourier.find_peaks(view, pixel_size_nm=pixel, mask=view_mask, max_peaks=60)
    reading = find_lattice(peaks, shape=view.shape, pixel_size_nm=pixel, given=config.lattice, a_nm=config.a_nm)
    near_axis = _peaks_near_qy_axis(peaks, view.shape, pixel)
    line_method = first_lines
    if config.line_method == "auto":
        if near_axis:
            notes.append(f"Dense scan-line offsets were left in: {len(near_axis)} peak(s) lie within 3 frequency "
                         "bins of the qy axis, where removing line offsets would delete them (docs/methods.md §7).")
        else:
            # No order near the qy axis: Hann-weighted line means remove the offsets and leave every peak.
            image, _ = line_offsets(image, method="hann", mask=mask, warn=False)
            line_method = "difference, then hann"
            view, view_mask = _central_crop(image, mask) if lazy else (image, mask)
    elif config.line_method in ("median", "mean", "hann") and near_axis:
        notes.append(f"Per-line {config.line_method} levelling removed modulations along y; "
                     f"{len(near_axis)} peak(s) lie near the qy axis and may be weakened.")
    choices["level"] = {"order": config.level_order, "line_method": line_method}
    if reading.lattice is not None and reading.source == "found":
        reading = _refine_lattice(view, pixel, view_mask, reading, peaks)
    scratch = None
    if lazy:
        # The levelled image is read by every drift pass, the crops and the lock-ins: computed once into
        # a scratch store (domains._scratch), not recomputed from the input on every read.
        from ._scratch import Scratch, checkpoint

        scratch = Scratch()
        image = checkpoint(image, scratch, "levelled")
    step("drift and order")

    # 3. Drift (Lawler–Fujita) from the Bragg peaks.
    drift_result = None
    corrected = image
    if config.drift and reading.lattice is not None and reading.resolved:
        lattice_q = np.asarray(reading.lattice.bragg, float)
        second_q = None if reading.second is None else np.asarray(reading.second.bragg, float)
        drift_sigma = config.drift_sigma_nm or _drift_sigma(peaks, lattice_q, config.leakage, pixel, second=second_q)
        drift_sigma = min(drift_sigma, 0.2 * min(image.shape[0] * pixel[0], image.shape[1] * pixel[1]))
        layer_leak = _other_layer_leakage(lattice_q, second_q, drift_sigma)
        # (1e-6: at the chosen width the leakage equals the allowance, up to rounding.)
        if config.drift_sigma_nm is None and layer_leak > config.leakage * (1 + 1e-6):
            # The frame is too small for a lock-in that keeps the other layer out: its Bragg peak would
            # enter the drift field as a displacement with the moiré's period (docs/methods.md §9).
            why = (f"the other layer's Bragg peaks, a moiré wavevector away, leak {layer_leak:.2g} into a drift "
                   f"lock-in of sigma = {drift_sigma:.3g} nm, the widest this frame allows (above {config.leakage:g})")
            notes.append(f"Drift was not corrected: it cannot be told apart from the moiré here ({why}).")
            choices["drift"] = {"sigma_nm": None, "corrected": False, "note": why}
        else:
            # Residual Bragg phase below 0.03 rad: the tolerance of Lawler-Fujita's own test (docs/methods.md §2).
            drift_result = drift_mod.correct_drift(image, lattice_q, sigma_nm=drift_sigma, pixel_size_nm=pixel,
                                                   mask=mask, tol_rad=0.03)
            corrected = drift_result.corrected
            mask = drift_result.mask
            if lazy:
                # Corrected chunk by chunk (the field on its decimated grid); the lazy run keeps its mask in
                # memory (booleans), and reads the order from the straightened central crop.
                mask = np.asarray(mask, dtype=bool)
                view, view_mask = _central_crop(corrected, mask)
            choices["drift"] = {"sigma_nm": drift_sigma, "iterations": drift_result.iterations,
                                "converged": drift_result.converged, "note": drift_result.note}
            if second_q is not None:
                choices["drift"]["other_layer_leakage"] = layer_leak
    elif reading.lattice is None or not reading.resolved:
        notes.append("No atomic lattice resolved: drift was not corrected.")
    # 4. What every other peak means, on the straightened image (drift smears peaks into sidebands).
    if lazy:
        fill, fill_mask = np.where(np.isfinite(view), view, np.nanmean(view)), view_mask
    else:
        fill = corrected if np.isfinite(corrected).all() else np.where(np.isfinite(corrected), corrected, np.nanmean(corrected))
        fill_mask = mask
    sup = (config.superlattice or "").lower()
    result = read_order(fill, pixel_size_nm=pixel, lattice_reading=reading, mask=fill_mask,
                        peaks=None if drift_result is not None else peaks, leakage=config.leakage,
                        false_alarm=config.false_alarm, given_q=config.q_rad_per_nm,
                        given_superlattice=None if sup in ("", "none") else config.superlattice,
                        anisotropy_threshold=config.anisotropy_threshold)
    spec = _spec_from_order(result, fill, pixel, fill_mask, config)
    if reading.lattice is None and spec["order_kind"] in ("none", "moire") and spec["moire_q"] is None:
        # No atoms resolved and no closed triplet among the peaks: look for a moiré triplet directly.
        from . import moire

        try:
            spec["moire_q"] = np.asarray(moire.find_moire_q(view, pixel_size_nm=pixel, mask=view_mask))
            spec["result"].moire_q = spec["moire_q"]
            spec["order_kind"] = "moire"
            from dataclasses import replace as _replace

            def near(p):
                return any(min(np.hypot(*(p.q - k)), np.hypot(*(p.q + k))) <= 0.1 * np.hypot(*k) for k in spec["moire_q"])

            spec["result"].peaks = [_replace(p, role="moire") if near(p) else p for p in spec["result"].peaks]
            spec["superlattice_summary"]["reasons"] = spec["superlattice_summary"].get("reasons", []) + [
                "no closed set of peaks, but a moiré triplet among the low-|q| peaks (atoms not resolved)"]
        except InputError:
            pass
    choices["spectrum"] = spec["choices"]
    notes += spec["notes"]
    # The peak finder keeps the polar cells of its noise floor per spectrum shape (about 13 bytes a
    # pixel); the spectrum is read now, so they go before the lock-in and the domains need the memory.
    fourier._CELLS_CACHE.clear()
    step("lock-in")
    return {"image": image, "mask": mask, "spec": spec, "drift": drift_result, "corrected": corrected,
            "notes": notes, "choices": choices, "lazy": lazy, "scratch": scratch}


def index_image(image, *, pixel_size_nm, mask=None, config=None):
    """The indexed spectrum of one image as the whole analysis settles it (see :func:`find_order`).

    Parameters
    ----------
    image : (row, col) ndarray
        The image.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : ndarray of bool, optional
        Untrusted pixels.
    config : Config, optional
        Parameters.

    Returns
    -------
    domains.fourier.SpectrumResult
        Peaks with their final roles; ``superlattice`` and ``moire_q`` as decided.

    Examples
    --------
    >>> from domains.synth import cdw_scene
    >>> scene = cdw_scene(shape=(192, 192), n_domains=2, rng=3)
    >>> index_image(scene.topography.data, pixel_size_nm=0.056).superlattice.order
    '3x3'
    """
    scan = Scan(np.asarray(image), pixel_size_nm=pixel_size_nm, mask=mask, source="<image>")
    return find_order(scan, config)["spec"]["result"]


def _run(topography: Scan, maps, grid, config: Config, progress: bool) -> Analysis:
    from . import _chunkseg, _coarse, measure, order, segment
    from . import drift as drift_mod

    pixel = topography.pixel_size_nm
    bar = _progress(8, progress)
    # A dask-backed topograph stays lazy when nothing else (maps, a grid) needs it in memory.
    found = find_order(topography, config, on_step=bar, lazy=not maps and grid is None)
    image, mask, spec, drift_result = found["image"], found["mask"], found["spec"], found["drift"]
    corrected, notes, choices = found["corrected"], found["notes"], found["choices"]
    lazy = found["lazy"]
    scratch = None  # a lazy run's scratch folder (domains._scratch)
    lattice_q = spec["bragg_q"]
    # The same drift field straightens every map of the scan.
    # Maps keep their float32 (a float32 map stays float32 through the drift correction; 7 digits are far
    # beyond the precision of a conductance map); other types become float64.
    corrected_maps = [np.asarray(m.data, np.float32 if np.asarray(m.data).dtype == np.float32 else float)
                      for m in maps]
    u = None
    if drift_result is not None:
        # The drift field on its own decimated grid (it is smooth on the scale of its sigma): no full-size copy.
        u = drift_result.u_coarse_nm
        u_pixel = [pixel[0] * drift_result.step, pixel[1] * drift_result.step]
        if corrected_maps:
            stacked = np.stack(corrected_maps)
            corrected_maps = None  # one copy of the maps at a time
            corrected_maps = list(drift_mod.correct_channels(stacked, drift_result, pixel_size_nm=pixel))
            del stacked

    order_q = spec["order_q"]
    kind = spec["order_kind"]
    sigma_nm, sigma_reason = _choose_sigma(config, order_q, lattice_q, spec["moire_q"], image.shape, pixel)
    choices["sigma_nm"] = {"value": sigma_nm, "why": sigma_reason}

    # The decimated analysis grid (docs/methods.md §1): lock-in fields are band-limited, so the order,
    # domains, walls and defects are computed on samples every `step` pixels and brought back.
    grid_ = Grid(image.shape, tuple(pixel), config.grid_step or choose_step(sigma_nm, pixel, image.shape))
    # Isolated masked scan lines (glitches filled from their neighbours) do not cut the field: the lock-in
    # bridges them. Only masked regions several pixels thick (step edges, user masks) make pixels untrusted.
    if lazy:
        import dask.array as da

        from ._scratch import checkpoint

        trusted_c, trusted_fraction = _refine.trusted_on_grid(grid_, sigma_nm, pixel, _thick(mask))
        # The straightened image is read by every lock-in, the noise floor and the bundle: computed once
        # into a scratch store, not recomputed from the input store on every read.
        scratch = found["scratch"]  # made by find_order for every lazy run
        corrected = checkpoint(corrected, scratch, "corrected")
        finite_mean = float(da.nanmean(corrected).compute())
        fill = da.where(da.isfinite(corrected), corrected, finite_mean)
    else:
        trusted = trusted_mask(image.shape, sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=_thick(mask))
        trusted_c, trusted_fraction = grid_.sample(trusted), float(trusted.mean())
        fill = corrected if np.isfinite(corrected).all() else np.where(np.isfinite(corrected), corrected, np.nanmean(corrected))
    summary = {
        "input": {"source": topography.source, "shape": list(image.shape), "pixel_size_nm": list(pixel),
                  "channel": topography.channel, "bias_V": topography.bias_V, "setpoint_A": topography.setpoint_A},
        "lattice": spec["lattice_summary"],
        "superlattice": spec["superlattice_summary"],
        "order_kind": kind,
        "moire": None,
        "domains": None,
        "defects": None,
        "bias_comparison": None,
        "drift": _drift_summary(drift_result),
        "sigma_nm": sigma_nm,
        "trusted_fraction": trusted_fraction,
    }
    out_maps = {}
    tables = {}
    # What the report's pictures are drawn from after the run (domains.present): small arrays and result objects.
    views = {}
    attrs = {"pixel_size_nm": list(pixel)}
    shown, shown_pixel = _overview(image, pixel) if lazy else (image, pixel)
    background = _small(shown, shown_pixel)
    views["topography"] = (*background, topography.metadata.get("units", ""))
    # From here on only the reduced image is kept; the straightened image is `fill`.
    shape, image, shown, found, corrected = image.shape, None, None, None, None
    views["spectrum"] = (spec["power"], _marked_peaks(spec["result"]))
    if u is not None:
        out_maps["displacement/ux"] = (u[0].astype(np.float32), {**attrs, "pixel_size_nm": u_pixel, "units": "nm"})
        out_maps["displacement/uy"] = (u[1].astype(np.float32), {**attrs, "pixel_size_nm": u_pixel, "units": "nm"})
        views["drift"] = _small(np.hypot(u[0], u[1]), u_pixel)
    bar("order and noise floor")

    if lazy:
        chunks = _refine.tile_chunks(shape)
        labels = da.zeros(shape, np.int32, chunks=chunks)
        walls = da.zeros(shape, bool, chunks=chunks)
    else:
        labels = np.zeros(shape, np.int32)
        walls = np.zeros(shape, bool)
    fields_used = None
    step_, pc = grid_.step, grid_.coarse_pixel_nm
    choices["grid"] = {"step_px": step_, "pixel_size_nm": list(pc), "shape": list(grid_.coarse_shape),
                       "why": "given" if config.grid_step else "the lock-in's lossless step, at most sigma / 2"}
    if kind in ("commensurate", "stripes", "incommensurate"):
        names = _component_names("cdw" if kind != "stripes" else "stripe", len(order_q))
        if lazy:
            # The coarse fields of a lazy run stay on dask (complex64), stored once in the scratch folder;
            # everything up to the input-grid labels is computed from them chunk by chunk (domains._coarse).
            a_order = _coarse.order_fields(fill, order_q, sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=mask,
                                           step=step_, scratch=scratch)
        else:
            a_order = np.asarray(lockin(fill, order_q, sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=mask, step=step_))
        floor = order.noise_floor(fill, order_q, sigma_nm=sigma_nm, pixel_size_nm=pixel,
                                  avoid_q=lattice_q if lattice_q is not None else (), mask=mask, trusted=trusted_c,
                                  false_alarm=config.false_alarm, step=step_, scratch=scratch)
        choices["order_threshold"] = {"value": floor.threshold, "rayleigh_scale": floor.rayleigh_scale,
                                      "false_alarm_per_pixel": floor.false_alarm,
                                      "why": "Rayleigh tail of the lock-in amplitude measured at empty wavevectors"}
        bar("domains and walls")
        min_area = config.min_domain_area_nm2 or math.pi * (2 * sigma_nm) ** 2
        reading = spec["reading"]
        families = list(reading.families) or [None]
        groups, family_names, start = [], [], 0
        for fam in families:
            size = len(order_q) if fam is None else len(fam.q_rad_per_nm)
            if kind == "stripes":
                # Each stripe direction is a family of its own (orientational domains).
                groups += [[start + j] for j in range(size)]
                family_names += [f"q{start + j + 1}" for j in range(size)]
            else:
                groups.append(list(range(start, start + size)))
                family_names.append("ordered" if fam is None else fam.name)
            start += size
        commensurate = kind in ("commensurate", "stripes") and spec["coefficients"] is not None and all(
            f is not None and f.kind == "commensurate" for f in families)
        coefficients = np.asarray(spec["coefficients"], float) if commensurate else None
        bragg_phase = None
        if drift_result is not None and commensurate:
            # After correction the Bragg phase is a small residual: safe to scale by the coefficients.
            # (A lazy run samples its spline chunk by chunk.)
            bragg_phase = (drift_result.residual_phase_points if lazy
                           else np.nan_to_num(grid_.sample(drift_result.residual_phase_points)))
        if lazy:
            state = _coarse.family_order_chunked(a_order, groups, step=step_, coefficients=coefficients,
                                                 bragg_phase=bragg_phase, threshold=floor.threshold, trusted=trusted_c,
                                                 anisotropy_threshold=config.anisotropy_threshold,
                                                 family_names=family_names, scratch=scratch)
        else:
            state = order.family_order(a_order, groups, coefficients=coefficients, bragg_phase=bragg_phase,
                                       threshold=floor.threshold, trusted=trusted_c,
                                       anisotropy_threshold=config.anisotropy_threshold, family_names=family_names)
        confidence = config.confidence or (order.variant_confidence(coefficients) if commensurate else 0.5)
        segment_states = _chunkseg.segment_states_chunked if lazy else segment.segment_states
        seg = segment_states(state.state, state.score, state.ordered, pixel_size_nm=pc,
                             min_area_nm2=min_area, confidence_threshold=confidence, trusted=trusted_c,
                             bridge_nm=2 * sigma_nm)
        fields_used = state.fields
        state_names = {lab: state.names[v] for lab, v in seg.state.items()}
        choices["variant_offset_rad"] = [o.tolist() for o in state.offsets_rad]
        choices["confidence"] = {"value": confidence, "why": "given" if config.confidence else (
            "halfway from a variant's template to the boundary with its nearest neighbour" if commensurate
            else "dominance of one family")}
        if kind == "incommensurate":
            notes.append("Incommensurate order: no translational variants; regions show where order is present.")
        tip_rows = (choices.get("level_findings") or {}).get("tip_change_rows") or []
        if tip_rows and drift_result is not None:
            seg, merged = _merge_across_tip_changes(seg, grid_.coarse_rows(tip_rows), sigma_nm / pc[0], state.names)
            if merged:
                notes.append(f"{merged} domain boundary(ies) lying along a tip-change row were merged: a lateral "
                             "jump of the tip shifts the lattice by a vector the drift correction can only know "
                             "modulo a lattice translation, which reads as a change of variant (docs/methods.md §5).")
                state_names = {lab: state.names[v] for lab, v in seg.state.items()}
        choices["segmentation"] = {**seg.parameters, "islands_dropped": seg.islands,
                                   "min_area_why": "disc of radius 2 sigma (the resolution)" if config.min_domain_area_nm2 is None else "given"}
        bar("measure and maps")
        labels_c, walls_c = seg.labels, seg.walls
        amp = amplitude(a_order)
        # A winding counts only where its own component carries order (stripes: not where it is absent).
        defects = []
        phase_defects = _chunkseg.phase_defects_chunked if lazy else segment.phase_defects
        confirms = _coarse.loop_confirms_lazy if lazy else _refine.loop_confirms
        for j in range(len(a_order)):
            # |fields_used| is |A| = amplitude / 2: the same threshold on that scale.
            found_j = phase_defects(fields_used[j:j + 1], pixel_size_nm=pc,
                                    ordered=(amp[j] > floor.threshold) & trusted_c, sigma_nm=sigma_nm,
                                    amplitude_threshold=floor.threshold / 2)
            if step_ > 1:
                found_j = [d for d in found_j if confirms(fields_used[j], d, pc, floor.threshold / 2)]
            # Rows and columns on the input grid (positions in nm are the same on both grids).
            defects += [{**d, "component": j, "row": d["row"] * step_, "col": d["col"] * step_} for d in found_j]
        wall_table = measure.wall_table_chunked if lazy else measure.wall_table
        wall_rows = wall_table(seg.grown, walls_c, pixel_size_nm=pc, fields=fields_used, sigma_nm=sigma_nm,
                               trusted=trusted_c)

        # The state's score at input pixels from the fields interpolated between samples (band-limited).
        score_at = _refine.order_score_at(
            a_order, step_, groups=groups, coefficients=coefficients, threshold=floor.threshold,
            anisotropy_threshold=config.anisotropy_threshold, family_names=family_names, offsets_rad=state.offsets_rad,
            bragg_residual=drift_result.residual_phase_points if bragg_phase is not None else None)
        labels, walls = _refine.to_input_grid(grid_, seg, score_at, confidence, lazy=lazy)
        if lazy:
            # The refined labels (walls as -1) are read by the measurement and the bundle: computed once.
            code = checkpoint(da.where(walls, -1, labels), scratch, "labels")
            labels, walls = da.maximum(code, 0), code < 0
        # Areas, centroids and edge contact from the input-grid labels; amplitudes and phases from the samples.
        if lazy:
            domain_rows, shown_labels, shown_walls = _refine.domain_table_chunked(
                labels, walls, pixel_size_nm=pixel, state_names=state_names, amplitude=amp, fields=fields_used,
                sample_labels=labels_c, every=report._block_factor(shape, report.FIGURE_MAX_PX))
        else:
            domain_rows = measure.domain_table(labels, pixel_size_nm=pixel, state_names=state_names, amplitude=amp,
                                               fields=fields_used, sample_labels=labels_c)
            shown_labels, shown_walls = labels, walls
        tables["domains"] = (measure.DOMAIN_COLUMNS, domain_rows)
        tables["walls"] = (measure.WALL_COLUMNS, wall_rows)
        summary["domains"] = measure.domain_summary(domain_rows, wall_rows, defects=defects)
        summary["defects"] = {"count": len(defects), "positive": sum(d["winding"] > 0 for d in defects),
                              "negative": sum(d["winding"] < 0 for d in defects), "list": defects}
        if not domain_rows:
            notes.append("Order was found but no domain passed the thresholds.")
        for name, a_j in zip(names, a_order):
            # On the decimated grid, with its own pixel size (sample (i, j) on input pixel (step i, step j)).
            out_maps[f"amplitude/{name}"] = (amplitude(a_j).astype(np.float32), {**attrs, "pixel_size_nm": list(pc), "units": topography.metadata.get("units", "image units")})
            out_maps[f"phase/{name}"] = (np.angle(a_j).astype(np.float32), {**attrs, "pixel_size_nm": list(pc), "units": "rad"})
        bar("bias comparison and moiré")
        small = _coarse.small_lazy if lazy else _small
        views["order"] = {"names": names, "units": topography.metadata.get("units", ""),
                          "amplitude": small(amp.mean(axis=0), pc),
                          "phase": small(np.angle(fields_used[0]), pc, how="phase")}
        views["domains"] = _domain_view(background, shown_labels, shown_walls, shown_pixel)
    else:
        bar("bias comparison and moiré", n=3)
    # The image the labels belong to (levelled, drift-corrected), so a viewer shows the bundle on its own.
    if lazy and kind in ("moire", "none"):
        # The moiré maps are not lazy yet: the image is computed here.
        fill, lazy = np.asarray(fill.compute()), False
        notes.append("Lazy run: the moiré maps need the whole image in memory (it was computed there).")
    out_maps["topography"] = (fill.astype(np.float32), {**attrs, "units": topography.metadata.get("units", "nm")})
    out_maps["labels"] = (labels.astype(np.int32, copy=False), {**attrs, "units": "label"})
    out_maps["walls"] = (walls.astype(bool, copy=False), {**attrs, "units": "bool"})

    if maps and kind in ("commensurate", "stripes", "incommensurate"):
        # `fill` is the straightened topograph with its NaN filled, as the bias comparison needs it.
        _bias_step(summary, tables, views, fill, corrected_maps, maps, labels, order_q, sigma_nm,
                   pixel, lattice_q, mask)
        # After the bias step has freed its filled copies of the maps.
        _electronic_types_step(summary, tables, views, maps, corrected_maps, labels, order_q, sigma_nm, pixel, mask)
    if grid is not None and kind in ("commensurate", "stripes", "incommensurate"):
        _grid_step(summary, tables, views, grid, labels, order_q, sigma_nm, pixel, mask)
    if kind in ("moire", "none"):
        _moire_step(summary, out_maps, tables, views, choices, notes, fill, spec, pixel, mask, config)
        if summary["moire"] is not None:
            summary["order_kind"] = "moire"
            summary["superlattice"]["note"] = "a moiré pattern, not a superlattice of the atomic lattice"
        elif kind == "none":
            notes.append("No superlattice found: no CDW or stripe peaks beyond the lattice.")
    bar("done")
    bar.close()
    summary["choices"] = choices
    summary["notes"] = notes
    return Analysis(config, summary, out_maps, tables, notes, choices, timings=dict(bar.times), views=views,
                    scratch=scratch)


def _overview(image, pixel):
    """Every k-th pixel of a lazy image in memory (k brings the longer side to at most
    :data:`domains.report.FIGURE_MAX_PX`), and its pixel size."""
    k = report._block_factor(image.shape, report.FIGURE_MAX_PX)
    return np.asarray(image[::k, ::k].compute()), (pixel[0] * k, pixel[1] * k)


def _small(array, pixel, how="mean"):
    """``array`` reduced for drawing (:func:`domains.report.downsample`) and its pixel size (nm)."""
    small, f = report.downsample(np.asarray(array), how=how)
    return small, (pixel[0] * f, pixel[1] * f)


def _domain_view(image, labels, walls, pixel, id_labels=None):
    """What a domain figure is drawn from: the image, labels and walls reduced for drawing, with the
    colours and the id positions of the full labels (so that they are the viewer's). ``image`` may be
    given already reduced, as ``(reduced image, its pixel size)``."""
    from ._palette import label_colours

    labels = np.asarray(labels)
    small_image, small_pixel = image if isinstance(image, tuple) else _small(image, pixel)
    return {"image": small_image, "pixel": small_pixel,
            "labels": report.downsample(labels, how="mode")[0],
            "walls": report.downsample(np.asarray(walls, bool), how="max")[0],
            "colours": label_colours(labels) if labels.size else {},
            "positions": report.domain_label_positions(labels if id_labels is None else id_labels,
                                                       pixel_size_nm=pixel)}


def _variant_of(name):
    """(family, (m1, m2)) from a state name "3x3 m=(1,2)", or None."""
    import re

    found = re.fullmatch(r"(.*) m=\((-?\d+),(-?\d+)\)", name or "")
    return None if not found else (found.group(1), (int(found.group(2)), int(found.group(3))))


def _merge_across_tip_changes(seg, tip_rows, sigma_px, names):
    """Merge domains whose common boundary runs along a tip-change row (see the note where it is called).

    A lateral tip jump moves everything below the row by the same lattice translation, so every
    false boundary along the row shows the same change of variant; a true wall that happens to lie
    along the row has its own. Only pairs with the most common change (by boundary length) merge.

    The merges are collected as a relabelling table read from two rows per tip change, so a lazy
    segmentation (dask labels, grown and walls) is merged chunk by chunk and stays lazy.
    """
    from dataclasses import replace as _replace

    from . import segment

    lazy = hasattr(seg.grown, "dask")
    ny = seg.grown.shape[0]
    # lut[original label] = label after the merges so far (grown[grown == lb] = la, as a table)
    lut = np.arange(int(seg.grown.max()) + 1, dtype=np.asarray(seg.grown[:1, :1]).dtype)
    reach = int(math.ceil(3 * sigma_px)) + 1
    merged = 0
    for r in tip_rows:
        above, below = r - reach - 1, r + reach
        if above < 0 or below >= ny:
            continue
        a, b = lut[np.asarray(seg.grown[above])], lut[np.asarray(seg.grown[below])]
        pairs = {}
        for la, lb in zip(a, b):
            if la > 0 and lb > 0 and la != lb:
                pairs[(la, lb)] = pairs.get((la, lb), 0) + 1
        candidates = []
        for (la, lb), n in pairs.items():
            width_a = int(np.sum(a == la))
            width_b = int(np.sum(b == lb))
            # The boundary between them is this row over most of their width there.
            if n >= 0.8 * min(width_a, width_b) and n >= 2 * reach:
                va, vb = _variant_of(names[seg.state[la]]), _variant_of(names[seg.state[lb]])
                if va is None or vb is None or va[0] != vb[0]:
                    continue
                candidates.append((la, lb, n, (vb[1][0] - va[1][0], vb[1][1] - va[1][1])))
        if not candidates:
            continue
        weight = {}
        for *_, n, jump in candidates:
            weight[jump] = weight.get(jump, 0) + n
        common = max(weight, key=weight.get)
        if sum(1 for c in candidates if c[3] == common) < 2:
            continue  # no jump shared by two boundaries: a wall that happens to lie along the row
        for la, lb, n, jump in candidates:
            if jump == common:
                lut[lut == lb] = la
                merged += 1
    if not merged:
        return seg, 0
    if lazy:
        import dask.array as da

        grown = seg.grown.map_blocks(lambda g: lut[g], dtype=lut.dtype)
        walls = da.map_overlap(segment.thin_walls, grown, depth=1, boundary="none", dtype=bool)
        labels = da.where(walls, 0, grown)
        labels = da.where(seg.labels > 0, labels, 0)
        present = np.unique(da.unique(labels).compute())
    else:
        grown = lut[seg.grown]
        walls = segment.thin_walls(grown)
        labels = np.where(walls, 0, grown)
        labels = np.where(seg.labels > 0, labels, 0)
        present = np.unique(labels)
    # Renumber 1..N in the order of first appearance.
    ids = [int(v) for v in present if v > 0]
    remap = np.zeros(len(lut), np.int32)
    for new, old in enumerate(ids, start=1):
        remap[old] = new
    state = {int(remap[old]): seg.state[old] for old in ids if old in seg.state}
    if lazy:
        return _replace(seg, labels=labels.map_blocks(lambda x: remap[x], dtype=np.int32),
                        grown=grown.map_blocks(lambda x: remap[x], dtype=np.int32),
                        walls=walls & (seg.grown > 0), state=state), merged
    return _replace(seg, labels=remap[labels], grown=remap[grown], walls=walls & (seg.grown > 0),
                    state=state), merged


def _thick(mask, width_px=5):
    """The parts of a mask at least ``width_px`` pixels thick (thin lines removed), or None."""
    if mask is None:
        return None
    from scipy import ndimage

    mask = np.asarray(mask, bool)
    return ndimage.binary_opening(mask, structure=np.ones((width_px, width_px), bool))


def _drift_sigma(peaks, bragg, leakage, pixel, second=None):
    """Lock-in width for the drift field: as small as the leakage of the peaks that matter allows.

    Only peaks near a Bragg peak and not much weaker than it (power above 5 % of the weakest Bragg
    peak's) can bias its phase; weak speckle far from it does not. A small width follows piezo creep,
    which changes over a few nm at the top of a frame. Peaks within 2 % of |G| are the Bragg peak
    itself (and sidebands of the drift being measured), except the Bragg peaks ``second`` of the
    other layer of a bilayer: they sit a moiré wavevector |K| ≈ θ|G| away (under 2 % of |G| below
    a twist of 1.15°) and must be kept out, else the drift field carries the moiré.
    """
    qs = np.array([p.q for p in peaks]).reshape(-1, 2)
    power = np.array([p.power for p in peaks])
    near = [int(np.argmin(np.minimum(np.hypot(*(qs - g).T), np.hypot(*(qs + g).T)))) for g in bragg]
    weakest = float(np.min(power[near])) if len(near) else 0.0
    strong = qs[(power >= 0.05 * weakest)]
    nearest = np.inf
    for g in bragg:
        cand = np.concatenate([strong, -strong, [[0.0, 0.0]]])
        d = np.hypot(*(cand - g).T)
        d = d[d > 0.02 * np.hypot(*g)]  # the Bragg peak itself (and its refined twin)
        if d.size:
            nearest = min(nearest, float(d.min()))
        if second is not None:
            nearest = min(nearest, float(np.min(np.hypot(*(np.vstack([second, -second]) - g).T))))
    sigma = math.sqrt(2 * math.log(1 / leakage)) / nearest if np.isfinite(nearest) else 8 * max(pixel)
    # At least two lattice periods and four pixels: fewer atoms under the window leave the phase noisy.
    period = 2 * math.pi / float(np.min(np.hypot(*np.asarray(bragg).T)))
    return max(sigma, 2 * period, 4 * max(pixel))


def _other_layer_leakage(bragg, second, sigma_nm):
    """Weight exp(-σ²Δk²/2) with which a drift lock-in of width σ at ``bragg`` passes the nearest
    Bragg peak of the other layer ``second`` (0 without a second layer; docs/methods.md §1)."""
    if second is None:
        return 0.0
    others = np.vstack([second, -second])
    dk = min(float(np.min(np.hypot(*(others - g).T))) for g in np.asarray(bragg, float))
    return float(math.exp(-0.5 * (sigma_nm * dk) ** 2))


def _choose_sigma(config, order_q, lattice_q, moire_q, shape, pixel):
    if config.sigma_nm:
        return float(config.sigma_nm), "given"
    peaks = [q for q in (order_q, lattice_q, moire_q) if q is not None and len(q)]
    if not peaks:
        sigma = 8 * max(pixel)
        return sigma, "no peaks: 8 pixels"
    sigma, nearest = choose_sigma(np.vstack(peaks), leakage=config.leakage)
    why = (f"leakage of the nearest peak (dk = {nearest:.4g} rad/nm) below {config.leakage:g}: "
           f"sigma = sqrt(2 ln(1/leakage)) / dk (docs/methods.md §1)")
    floor = 1.5 * max(pixel)
    if sigma < floor:
        sigma, why = floor, why + f"; raised to 1.5 pixels ({floor:.3g} nm)"
    ceiling = min(shape[0] * pixel[0], shape[1] * pixel[1]) / 8
    if sigma > ceiling:
        sigma, why = ceiling, why + f"; capped at 1/8 of the frame ({ceiling:.3g} nm): peaks this close are not resolved"
    return float(sigma), why


def _drift_summary(result):
    if result is None:
        return None
    u = np.hypot(*result.u_coarse_nm)  # the samples of the smooth field (its decimated grid)
    return {
        "max_displacement_nm": float(np.nanmax(u)),
        "rms_displacement_nm": float(np.sqrt(np.nanmean(u**2))),
        "residual_phase_rms_rad": [float(v) for v in result.residual_rms_rad],
        "residual_phase_max_rad": [float(v) for v in result.residual_max_rad],
        "phase_sum_rms_rad": result.phase_sum_rms_rad,
        "sigma_nm": result.sigma_nm,
        "converged": bool(result.converged),
        "note": result.note,
    }


def write_analysis(analysis: Analysis, out, *, command_line, inputs, overwrite=False):
    """Write an :class:`Analysis` as the result bundle of docs/bundle.md (atomically) and return its path.

    Parameters
    ----------
    analysis : Analysis
        The result of :func:`analyze`.
    out : str or Path
        Bundle folder.
    command_line : list of str
        The command that produced it (for the provenance record).
    inputs : list of str
        Input files (hashed into the provenance record).
    overwrite : bool
        Replace an existing bundle.

    Returns
    -------
    Path
        The bundle folder.
    """
    from .io import json_safe, provenance, write_bundle
    from .present import present

    shown = present(analysis)
    html = report.render_html(title="Domain analysis", summary=_report_summary(analysis.summary),
                              sections=shown.sections, parameters={**asdict(analysis.config),
                                                                      "automatic choices": analysis.choices},
                              notes=analysis.notes, headline=_headline(analysis.summary))
    prov = provenance(command_line=command_line, parameters=json_safe(asdict(analysis.config)), inputs=inputs)
    # One value per CSV cell: list columns become one column per component, the unit last in the name.
    tables = {name: report.split_list_columns(*table) for name, table in analysis.tables.items()}
    maps = dict(analysis.maps)
    type_map = report.electronic_type_map(analysis.summary, maps.get("labels"))
    if type_map is not None:
        maps["electronic_types"] = type_map
    return write_bundle(out, summary=analysis.summary, provenance=prov, tables=tables, maps=maps,
                        figures=shown.figures, report_html=html, overwrite=overwrite)


def _pm(value, error, unit="", digits=4):
    """'v ± e unit': e to two significant digits and v to the same last decimal (``digits``
    significant digits without an error), so the printed v is no coarser than its error."""
    if value is None or not np.isfinite(value):
        return "–"
    if error is None or not np.isfinite(error) or error <= 0:
        return f"{value:.{digits}g} {unit}".strip()
    places = 1 - int(math.floor(math.log10(error)))  # decimals of e's second significant digit (< 0: tens ...)
    v, e = round(value, places) or 0.0, round(error, places)  # 'or 0.0': no negative zero
    if places <= 0:
        return f"{v:.0f} ± {e:.0f} {unit}".strip()
    return f"{v:.{places}f} ± {e:.{places}f} {unit}".strip()


def _headline(summary):
    """The numbers a reader wants first, with their uncertainties and units."""
    rows = {"input": f"{summary['input']['source']}, {summary['input']['shape'][0]} x {summary['input']['shape'][1]} "
                     f"pixels of {summary['input']['pixel_size_nm'][1]:g} nm"}
    lattice = summary.get("lattice")
    if lattice:
        rows["lattice"] = (f"{lattice['kind']}, a = {_pm(lattice['a_nm'], lattice['a_nm_err'], 'nm')}, "
                           f"angle {_pm(lattice['angle_deg'], lattice['angle_deg_err'], 'deg')}")
    rows["order"] = f"{summary['order_kind']}" + (f" ({summary['superlattice']['order']})"
                                                  if summary["superlattice"].get("order") else "")
    drift = summary.get("drift")
    if drift:
        rows["drift removed"] = (f"up to {drift['max_displacement_nm']:.3g} nm; residual Bragg phase "
                                 f"{max(drift['residual_phase_rms_rad']):.2g} rad rms")
    domains = summary.get("domains")
    if domains:
        rows["domains"] = (f"{domains['count']} ({domains['count_touching_edge']} cut by the frame), mean area "
                           f"{_pm(domains['area_nm2_mean'], domains['area_nm2_mean_err'], 'nm²')}")
        width = _pm(domains['wall_width_nm_mean'], domains['wall_width_nm_mean_err'], 'nm')
        limit = domains.get("wall_width_nm_upper_limit")
        if limit is not None and np.isfinite(limit) and domains.get("wall_width_count_unresolved"):
            width = (f"{width} ({domains['wall_width_count_resolved']} resolved); " if domains.get("wall_width_count_resolved")
                     else "") + f"below {limit:.2g} nm ({domains['wall_width_count_unresolved']} narrower than the lock-in resolves)"
        n_walls = domains["wall_count"]
        text = f"{n_walls} segment{'' if n_walls == 1 else 's'}, {domains['wall_length_nm']:.4g} nm in all"
        # Walls between twist domains are not fitted (their width is the maps' resolution): no width then.
        rows["walls"] = text + (f", width {width}" if width != "–" else ", width not measured")
    defects = summary.get("defects")
    if defects:
        rows["defects"] = f"{defects['count']} ({defects['positive']} with winding +1, {defects['negative']} with -1)"
    bias = summary.get("bias_comparison")
    if bias:
        for pair in bias["pairs"]:
            verdicts = [d["verdict"]["verdict"] for d in pair["domains"]]
            counts = ", ".join(f"{verdicts.count(v)} {v}" for v in sorted(set(verdicts)))
            rows[f"contrast {pair['bias_1_V']:+.2f} V vs {pair['bias_2_V']:+.2f} V"] = counts + " (domains)"
    types = summary.get("electronic_types")
    if types and types.get("sentences"):
        rows["electronic types"] = types["sentences"][0]
    moire = summary.get("moire")
    if moire:
        rows.update(_moire_headline(moire))
    rows["lock-in width σ"] = f"{summary['sigma_nm']:.3g} nm (spatial resolution)"
    return rows


def _report_summary(summary):
    # The full lists (defects, per-domain verdicts) live in summary.json; the page shows the headline numbers.
    return {k: v for k, v in summary.items() if k not in ("choices", "notes")}


def analyze_files(topo, *, maps=(), grid=None, pixel_size_nm=None, config=None, out, scheduler=None,
                  overwrite=False, command_line=("domains", "analyze"), progress=True):
    """Load the files, analyse them, write the bundle; what ``domains analyze`` does.

    Parameters
    ----------
    topo : str
        Topograph path (``file.h5:/dataset`` allowed).
    maps : sequence of str
        Conductance maps, one per bias.
    grid : str, optional
        Spectroscopic grid.
    pixel_size_nm : float, optional
        Overrides the sidecars.
    config : str or Path or Config, optional
        TOML file or a Config.
    out : str or Path
        Bundle folder.
    scheduler : str, optional
        Where the dask graphs run: the address of a running dask.distributed
        scheduler (``tcp://HOST:PORT``), or ``local:N`` to start N worker processes
        on 127.0.0.1 for this run (closed at its end). With a scheduler every input
        file is opened lazily, whatever its size, so that the workers read it.
    overwrite : bool
        Replace an existing bundle.
    command_line : sequence of str
        For the provenance record.
    progress : bool
        Show progress bars.

    Returns
    -------
    Path
        The bundle folder.
    """
    import contextlib

    from ._checks import config_for_image, scans_for_analysis
    from .io import LAZY_THRESHOLD_BYTES, _log_notes, check_output_location, load_scan, output_lock

    # Every check that needs no computation comes first: configuration, output location, inputs.
    if isinstance(config, Config):
        cfg, where = config.validate(), "configuration"
    elif config is not None:
        cfg, where = load_config(config), str(config)
    else:
        cfg, where = Config(), "configuration"
    if scheduler is not None:
        from ._cluster import parse_scheduler

        parse_scheduler(scheduler)  # a bad value fails before any file is read
    out = check_output_location(out, overwrite=overwrite)
    # With a scheduler the files are opened lazily whatever their size: the workers read them.
    lazy = {"lazy_threshold_bytes": 0 if scheduler is not None else LAZY_THRESHOLD_BYTES}
    topography = load_scan(topo, pixel_size_nm=pixel_size_nm, **lazy)
    map_scans = [load_scan(m, pixel_size_nm=pixel_size_nm, channel="conductance", **lazy) for m in maps]
    grid_scan = load_scan(grid, pixel_size_nm=pixel_size_nm, channel="conductance", **lazy) if grid else None
    scans_for_analysis(topography, map_scans, grid_scan)
    config_for_image(cfg, topography.shape, topography.pixel_size_nm, where)
    with contextlib.ExitStack() as stack:
        if scheduler is not None:
            from ._cluster import scheduler_client

            # The client is the default scheduler of every dask computation until the run ends.
            stack.enter_context(scheduler_client(scheduler))
        # The lock on --out is held from here to the end: a second run on the same folder fails at once.
        with output_lock(out) as stale:
            _log_notes(stale)
            out = check_output_location(out, overwrite=overwrite)  # again, now that no one else can write it
            try:
                result = analyze(topography, maps=map_scans, grid=grid_scan, config=cfg, progress=progress)
            except InputError as err:
                # A problem found only during the analysis: say which input it concerns.
                message = str(err)
                if not any(str(name) in message for name in [topo, *maps, grid] if name):
                    message = f"{topo}: {message} (found during the analysis; no bundle was written)"
                raise InputError(message) from err
            inputs = [topo, *maps] + ([grid] if grid else [])
            with _progress(1, progress, first="writing the bundle"):  # a lazy run's maps are computed here
                return write_analysis(result, out, command_line=list(command_line), inputs=inputs, overwrite=overwrite)


def make_scene(kind, *, seed=7):
    """The built-in synthetic scenes by name: "cdw", "cdw2x2", "stripes", "moire", "plain" (no order).

    Returns
    -------
    domains.synth.Scene

    Examples
    --------
    >>> make_scene("stripes", seed=1).kind
    'stripes'
    """
    from . import synth

    if kind == "cdw":
        return synth.cdw_scene(rng=seed)
    if kind == "cdw2x2":
        return synth.cdw_scene(n=2, a_nm=0.36, rng=seed)
    if kind == "plain":
        return synth.cdw_scene(n=None, rng=seed)
    if kind == "stripes":
        return synth.stripe_scene(rng=seed)
    if kind == "moire":
        return synth.moire_scene(rng=seed)
    raise InputError(f"unknown scene {kind!r}; choose one of cdw, cdw2x2, stripes, moire, plain")


def write_scene(kind, out, *, seed=7, overwrite=False):
    """Write a synthetic scene in the input format: .npy files with sidecars, and the truth.

    Files: ``topography.npy`` (+ ``.json``), ``map_<bias>V.npy`` (+ ``.json``) per
    bias, ``truth.json`` and ``truth_labels.npy``.

    Parameters
    ----------
    kind : str
        Scene name (see :func:`make_scene`).
    out : str or Path
        Folder (created).
    seed : int
        Random seed.
    overwrite : bool
        Replace existing files.

    Returns
    -------
    list of Path
        The files written.
    """
    import json

    from .io import json_safe, save_scan

    from .io import check_output_location

    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out}: exists and is not a folder")
    if not out.exists():
        check_output_location(out)
    truth = out / "truth.json"
    labels = out / "truth_labels.npy"

    def refuse_existing(paths):
        for path in paths:
            if not overwrite and (path.exists() or path.is_symlink()):
                raise InputError(f"--out {out}: {path.name} exists; give --overwrite to replace the scene's files")

    refuse_existing([out / "topography.npy", out / "topography.json", truth, labels])  # before the work
    sc = make_scene(kind, seed=seed)
    names = [f"map_{m.bias_V:+.2f}V" for m in sc.maps] + ["topography"]
    refuse_existing([out / f"{n}{ext}" for n in names for ext in (".npy", ".json", ".mask.npy")])
    out.mkdir(parents=True, exist_ok=True)
    written = [save_scan(sc.topography, out / "topography.npy", overwrite=overwrite)]
    for m in sc.maps:
        written.append(save_scan(m, out / f"map_{m.bias_V:+.2f}V.npy", overwrite=overwrite))
    truth.write_text(json.dumps(json_safe({"kind": sc.kind, "seed": seed, **sc.truth}), indent=2))
    np.save(labels, sc.truth_maps["labels"])
    return written + [truth, labels]


def run_demo(out, *, scene="cdw", seed=7, overwrite=True, command_line=("domains", "demo"), progress=True):
    """Analyse a built-in scene and write its bundle; returns the path of the report.

    Parameters
    ----------
    out : str or Path
        Bundle folder.
    scene : {"cdw", "stripes", "moire"}
        Which scene.
    seed : int
        Random seed of the scene.
    overwrite : bool
        Replace an existing bundle.
    command_line : sequence of str
        For the provenance record.
    progress : bool
        Show a progress bar.

    Returns
    -------
    Path
        ``out/report.html``.
    """
    import tempfile

    from .io import _log_notes, check_output_location, output_lock, save_scan

    if scene not in ("cdw", "stripes", "moire"):
        raise InputError(f"--scene must be one of cdw, stripes, moire, got {scene!r}")
    # The output location is checked, and locked, before the scene is made and analysed.
    out = check_output_location(out, overwrite=overwrite)
    with output_lock(out) as stale:
        _log_notes(stale)
        out = check_output_location(out, overwrite=overwrite)
        name = scene
        sc = make_scene(name, seed=seed)
        # The moiré scene does not resolve the atoms: as a user would, state the layers' lattice constant.
        config = Config(a_nm=sc.truth["a_nm"]) if sc.kind == "moire" else Config()
        result = analyze(sc.topography, maps=sc.maps, config=config, progress=progress)
        result.summary["truth"] = {"scene": name, "seed": seed,
                                   **{k: v for k, v in sc.truth.items() if k != "domains"}}
        with tempfile.TemporaryDirectory() as tmp:
            # The scene is written as input files too, so that the provenance record hashes real inputs.
            inputs = [str(save_scan(sc.topography, Path(tmp) / "topography.npy"))]
            inputs += [str(save_scan(m, Path(tmp) / f"map_{m.bias_V:+.2f}V.npy")) for m in sc.maps]
            bundle = write_analysis(result, out, command_line=list(command_line), inputs=inputs, overwrite=overwrite)
    return Path(bundle) / "report.html"


def _bias_step(summary, tables, views, topo, corrected_maps, map_scans, labels, order_q, sigma_nm, pixel, bragg_q,
               mask):
    from . import compare

    maps = {float(s.bias_V): np.where(np.isfinite(m), m, np.nanmean(m)) for s, m in zip(map_scans, corrected_maps)}
    if len(maps) != len(map_scans):
        raise InputError("two maps have the same bias: " + ", ".join(s.source for s in map_scans))
    # The maps come from the same scan as the topograph (same pixel grid, same drift, already
    # corrected): registering an inverted-contrast map could pick a wrong lattice translation.
    result = compare.compare_biases(np.where(np.isfinite(topo), topo, np.nanmean(topo)), maps, labels, order_q,
                                    sigma_nm=sigma_nm, pixel_size_nm=pixel, bragg_q=bragg_q, mask=mask,
                                    register_maps=False)
    summary["bias_comparison"] = result.summary()
    # Units in the header: the map's values and amplitudes carry the unit of the maps' sidecar.
    units = (map_scans[0].metadata or {}).get("units") or "arb. units"
    token = "".join(ch if ch.isalnum() else "_" for ch in units).strip("_") or "value"

    def with_unit(name):
        import re

        found = re.fullmatch(r"((?:amplitude_(?:q\d+|total))|map_mean)(_se)?", name)
        return name if not found else f"{found.group(1)}_{token}{found.group(2) or ''}"

    rows = [{with_unit(k): v for k, v in r.items()} for r in result.contrast_rows()]
    columns = list(rows[0]) if rows else ["domain", "bias_V"]
    tables["contrast"] = (columns, rows)
    views["bias"] = {"n_components": len(order_q), "unit_token": token,
                     "units": (map_scans[0].metadata or {}).get("units")}


def _electronic_types_step(summary, tables, views, map_scans, corrected_maps, labels, order_q, sigma_nm, pixel,
                           mask):
    """Which domains differ electronically: per-domain contrast with errors at every bias, and types.

    Maps taken at other setpoints are scaled to one setpoint (or to their frame mean when a setpoint is
    unknown); contrasts are free of scan-line offsets (domains.compare.domain_electronic_contrast), and
    domains are grouped into types while their differences are not significant
    (domains.compare.electronic_types).
    """
    from . import compare

    maps = {float(sc.bias_V): np.asarray(m, float) for sc, m in zip(map_scans, corrected_maps)}
    setpoints = [sc.setpoint_A for sc in map_scans]
    units = (map_scans[0].metadata or {}).get("units", "arb. units")
    norm = compare.default_normalisation(setpoints)
    try:
        ec = compare.domain_electronic_contrast(maps, labels, pixel_size_nm=pixel, sigma_nm=sigma_nm, units=units,
                                                mask=mask, normalisation=norm,
                                                setpoints_A=setpoints if norm == "setpoint" else None, q=order_q)
        types = compare.electronic_types(ec)
    except InputError as err:
        summary["electronic_types"] = {"note": f"not measured: {err}"}
        return
    summary["electronic_types"] = types.to_summary()
    rows = types.rows()
    if rows:
        tables["types"] = (list(rows[0]), rows)
    drows = types.domain_rows()
    if drows:
        tables["domain_contrast"] = (list(drows[0]), drows)
    # A map coloured by type: what the report's types figure and the viewer's types layer show.
    lut = np.zeros(int(labels.max()) + 1, np.int32)
    for i, members in enumerate(types.types):
        lut[list(members)] = i + 1
    views["electronic"] = {"contrast": ec, "types": types,
                           "map": _domain_view(corrected_maps[0], lut[labels], labels == 0, pixel, id_labels=labels)}


def _grid_step(summary, tables, views, grid, labels, order_q, sigma_nm, pixel, mask):
    """Per-domain order amplitude across the grid's energies, and the domains' electronic types with their mean
    spectra and the energies where the types differ (domains.compare.grid_fingerprints, grid_electronic_contrast,
    electronic_types). One pass over the grid serves both: a dask grid is computed a few slices at a time, each
    slice reduced and dropped; the labels' geometry is computed once for every slice."""
    from . import compare

    units = (grid.metadata or {}).get("units", "arb. units")
    fp, ec = compare._grid_analysis(grid.data, grid.energies_V, labels, order_q, sigma_nm=sigma_nm,
                                    pixel_size_nm=pixel, mask=mask, units=units, progress=True)
    rows = fp.rows()
    tables["fingerprint"] = (list(rows[0]) if rows else ["domain", "energy_V"], rows)
    peaks = compare.fingerprint_peaks(fp)
    summary["grid"] = {"source": grid.source, "energies_V": [float(e) for e in grid.energies_V],
                       "peak_energy_V": peaks if isinstance(peaks, (dict, list)) else str(peaks)}
    views["grid"] = {"fingerprints": fp, "types": None, "units": units}
    try:
        if isinstance(ec, InputError):
            raise ec
        types = compare.electronic_types(ec)
    except InputError as err:
        summary["grid"]["electronic_types"] = {"note": f"not measured: {err}"}
    else:
        summary["grid"]["electronic_types"] = types.to_summary()
        u = ec.unit_token
        empty = ["type_a", "type_b", "quantity", "bias_V", f"difference_{u}", f"difference_{u}_se", "z", "p",
                 "significant"]  # one type: a header row and no rows
        for name, table, columns in (("grid_types", types.rows(per_bias=False), None),
                                     ("type_spectra", types.spectrum_rows(), None),
                                     ("type_differences", types.difference_rows(), empty)):
            if table or columns:
                tables[name] = (list(table[0]) if table else columns, table)
        views["grid"]["types"] = types


def _refine_lattice(image, pixel, mask, reading, peaks):
    """The lattice fitted again to its Bragg wavevectors measured by lock-in where the lattice is regular.

    The local wavevector q + grad(theta) is first taken at the centre of its distribution over the
    frame (trimmed mean), not the frame average: piezo creep in the first lines, a tip change or a step
    distorts part of the frame and would bias the average. From there a plane through the unwrapped
    lock-in phase, with the pixels far off it left out, gives each Bragg vector at the Cramér–Rao
    precision and its covariance from the phase noise measured in the image
    (:func:`domains._read_order._wavevector_fit`). The errors of a and of the orientation follow from
    those covariances, scaled up by the disagreement of the Bragg peaks with an ideal lattice
    (:func:`domains._read_order._lattice_uncertainty`); the errors of the measured Bragg vectors are kept
    (``bragg_err_rad_per_nm``) for the superlattice's wavevectors.
    """
    from dataclasses import replace

    from . import fourier
    from ._read_order import _lattice_uncertainty, _wavevector_fit, _wavevector_stats

    lat = reading.lattice
    measured = np.asarray(lat.bragg_measured if lat.bragg_measured is not None else lat.bragg, float)
    allq = np.array([p.q for p in peaks]).reshape(-1, 2)
    sigma, _ = choose_sigma(np.vstack([measured, allq]) if len(allq) else measured, leakage=0.01)
    sigma = min(max(2 * sigma, 3 * max(pixel)), min(image.shape[0] * pixel[0], image.shape[1] * pixel[1]) / 10)
    fill = np.where(np.isfinite(image), image, np.nanmean(image))
    # The plane fit needs only the Bragg peaks kept apart from their own nearest neighbours (twice the
    # 1 % leakage width): a narrower lock-in than the one above leaves more of the frame trusted and
    # more independent patches to measure the noise on.
    others = np.vstack([measured, -measured, allq, -allq, np.zeros((1, 2))]) if len(allq) else \
        np.vstack([measured, -measured, np.zeros((1, 2))])
    nearest = min(float(np.min(d[d > 1e-6 * np.hypot(*g)])) for g in measured
                  for d in [np.hypot(*(others - g).T)])
    sigma_fit = min(max(2 * math.sqrt(2 * math.log(100)) / nearest, 3 * max(pixel)), sigma)
    try:
        from .order import noise_floor

        floor = noise_floor(fill, measured, sigma_nm=sigma_fit, pixel_size_nm=pixel, mask=mask,
                            avoid_q=allq if len(allq) else (), step=choose_step(sigma_fit, pixel, fill.shape))
        noise_var = (floor.rayleigh_scale / 2) ** 2  # 2|A| of noise is Rayleigh: each component has sd scale / 2
    except InputError:
        noise_var = None

    def measure(q_start):
        """Bragg vectors (canonical), their 2 x 2 covariances, isotropic 1 sigma per component, and the
        statistical covariances alone (without the quadrant spread)."""
        local, err, *_ = _wavevector_stats(fill, q_start, sigma_nm=sigma, pixel=pixel, mask=mask, threshold=0.0)
        if not np.all(np.isfinite(local)):
            return None
        q_fit, cov = _wavevector_fit(fill, local, sigma_nm=sigma_fit, pixel=pixel, mask=mask, noise_var=noise_var)
        bad = ~np.all(np.isfinite(q_fit), axis=1) | ~np.all(np.isfinite(cov.reshape(len(cov), -1)), axis=1)
        # Where the plane fit failed, the centre of the gradients with its own (isotropic) error.
        q_fit[bad] = local[bad]
        cov[bad] = (np.asarray(err, float)[bad] ** 2 / 2)[:, None, None] * np.eye(2)
        stat = cov.copy()
        cov = cov + _quadrant_spread(fill, q_fit, sigma_fit, pixel, mask, noise_var)
        signs = np.array([1.0 if np.allclose(fourier._canonical(v), v) else -1.0 for v in q_fit])
        return signs[:, None] * q_fit, cov, np.sqrt(np.trace(cov, axis1=1, axis2=2) / 2), stat

    def in_matched_order(refined, q_can, values):
        """``values`` (one per measured vector) in the order of ``refined.bragg_measured``."""
        index = [int(np.argmin([min(np.hypot(*(m - v)), np.hypot(*(m + v))) for v in q_can]))
                 for m in np.asarray(refined.bragg_measured, float)]
        return np.asarray(values)[index]

    def closure_scaled(refined, e_matched):
        """Errors of the matched vectors, scaled up when a hexagonal set does not close (G1 + G2 + G3 = 0)."""
        if refined.kind != "hexagonal" or len(e_matched) != 3:
            return e_matched
        from ._read_order import _birge

        closure = np.sum(np.asarray(refined.bragg_measured, float), axis=0)
        chi2 = float(closure @ closure) / float(np.sum(e_matched**2))  # two components, 2 degrees of freedom
        return e_matched * _birge(chi2, 2)

    first = measure(measured)
    if first is None:
        return reading
    q_can, cov, e_iso, cov_stat = first
    refined = fourier._fit_lattice(lat.kind, q_can, e_iso)
    if refined.kind in ("hexagonal", "square") and len(q_can) >= 2:
        rel, rot, _, _ = _lattice_uncertainty(refined.kind, q_can, cov)
        refined = replace(refined, a_err_nm=refined.a_nm * rel, angle_err_deg=math.degrees(rot))
    e_matched = closure_scaled(refined, in_matched_order(refined, q_can, e_iso))
    if reading.second is not None:
        # The other layer of a bilayer, measured the same way (its peaks sit a moiré wavevector away).
        sec = reading.second
        q2 = np.asarray(sec.bragg_measured if sec.bragg_measured is not None else sec.bragg, float)
        second = measure(q2)
        if second is not None:
            q2_can, cov2, e2, _ = second
            refined2 = fourier._fit_lattice(sec.kind, q2_can, e2)
            if refined2.kind in ("hexagonal", "square") and len(q2_can) >= 2:
                rel2, rot2, _, _ = _lattice_uncertainty(refined2.kind, q2_can, cov2)
                refined2 = replace(refined2, a_err_nm=refined2.a_nm * rel2, angle_err_deg=math.degrees(rot2))
            reading = replace(reading, second=refined2)
    if refined.kind in ("hexagonal", "square"):
        # Drift and creep stretch and shear the frame along the slow scan axis; the lattice constant and
        # orientation are those of the regular lattice behind that distortion (slow_axis_drift_fit).
        from ._read_order import slow_axis_drift_fit

        g = np.asarray(refined.bragg_measured, float)
        a_nm, angle, shear, stretch = slow_axis_drift_fit(g, refined.kind)
        # Only a significant distortion is undone: the lengths of the Bragg vectors must disagree beyond
        # their statistical errors (chi-square with 2 degrees of freedom above 13.8, p < 0.001), else the
        # fit would turn measurement noise into a drift. (Not beyond the quadrant spread: a creep makes
        # that spread itself.)
        lengths = np.hypot(*g.T)
        e_len = in_matched_order(refined, q_can, np.sqrt(np.einsum(
            "ni,nij,nj->n", q_can / np.hypot(*q_can.T)[:, None], cov_stat, q_can / np.hypot(*q_can.T)[:, None])))
        w = 1 / np.maximum(e_len, 1e-12) ** 2
        centre = np.sum(w * lengths) / np.sum(w)
        chi2 = float(np.sum(w * (lengths - centre) ** 2))
        if max(abs(shear), abs(stretch)) < 0.1 and chi2 > 13.8:
            # The distortion model takes up the disagreement of the peaks: the error of a and of the
            # orientation is the spread of its fit over redraws of the vectors within their errors.
            rng = np.random.default_rng(0)
            draws = [slow_axis_drift_fit(g + rng.normal(0, 1, g.shape) * e_matched[:, None], refined.kind)[:2]
                     for _ in range(64)]
            a_err = float(np.std([d[0] for d in draws], ddof=1))
            angle_err = float(np.std([(d[1] - angle + 30) % 60 - 30 for d in draws], ddof=1))
            refined = replace(refined, a_nm=a_nm, a_err_nm=max(a_err, 1e-12), angle_deg=angle,
                              angle_err_deg=max(angle_err, 1e-9))
            reading = replace(reading, slow_axis=(shear, stretch), reasons=reading.reasons + (
                f"the Bragg vectors differ in length beyond their errors (chi2 = {chi2:.3g}): a and the "
                f"orientation undo a slow-axis drift distortion (shear {shear:+.4f}, stretch {stretch:+.4f}): "
                f"a = {a_nm:.5g} nm",))
    return replace(reading, lattice=refined, bragg_err_rad_per_nm=e_matched)


def _quadrant_spread(image, q, sigma_nm, pixel, mask, noise_var, level=0.05):
    """Covariance (k, 2, 2) that a non-uniform distortion adds to each frame-wide wavevector.

    Each wavevector is measured again in the four quadrants of the frame
    (:func:`domains._read_order._wavevector_fit`). When they disagree beyond their own errors (chi^2
    with 6 degrees of freedom above its upper ``level`` quantile: drift, creep), the frame value,
    roughly their mean, is uncertain by their spread over sqrt(2) (the 2 x 2 sample covariance of the
    quadrant values over 2: a drift that mostly rotates the lattice adds to the angle, not to a); otherwise 0. A block jackknife
    would divide by sqrt(4), taking the quadrants as independent samples of the distortion; a drift
    smooth on the scale of the frame makes them correlated, and over 60 drifted lattices (128 and 160
    px, wavelengths 0.8-3 frames) sqrt(4) left the angle's 2-sigma coverage at 87 %, sqrt(2) gave
    93-97 % [measured]. A distortion uniform over the frame (a piezo calibration, a constant creep)
    leaves no spread and is not included: no single image shows it.
    """
    from scipy.stats import chi2 as chi2_dist

    from ._read_order import _wavevector_fit

    rows, cols = image.shape
    halves = [(slice(0, rows // 2), slice(0, cols // 2)), (slice(0, rows // 2), slice(cols // 2, cols)),
              (slice(rows // 2, rows), slice(0, cols // 2)), (slice(rows // 2, rows), slice(cols // 2, cols))]
    values, covs = [], []
    for part in halves:
        try:
            v, c = _wavevector_fit(image[part], q, sigma_nm=sigma_nm, pixel=pixel,
                                   mask=None if mask is None else np.asarray(mask)[part], noise_var=noise_var)
        except InputError:
            return np.zeros((len(q), 2, 2))
        values.append(v)
        covs.append(c)
    values, covs = np.array(values), np.array(covs)  # (4, k, 2), (4, k, 2, 2)
    extra = np.zeros((len(q), 2, 2))
    for j in range(len(q)):
        good = np.all(np.isfinite(values[:, j]), axis=1) & np.all(np.isfinite(covs[:, j].reshape(4, -1)), axis=1)
        if good.sum() < 3:
            continue
        v, c = values[good, j], covs[good, j]
        w = np.linalg.inv(c)
        centre = np.linalg.solve(w.sum(axis=0), np.einsum("bij,bj->i", w, v))
        d = v - centre
        chi2 = float(np.einsum("bi,bij,bj->", d, w, d))
        dof = 2 * (len(v) - 1)
        if chi2 > chi2_dist.ppf(1 - level, dof):
            extra[j] = d.T @ d / (len(v) - 1) / 2  # sample covariance / 2 (see above)
    return extra


def _spec_from_order(result, image, pixel, mask, config):
    """The order step's verdict in the form the rest of the run reads (and the user's overrides applied)."""
    from . import fourier

    lattice = result.lattice.lattice
    bragg_q = None if lattice is None else np.asarray(lattice.bragg, float)
    order_q = result.order_q
    coefficients = result.coefficients
    kind = result.kind
    notes = []
    if config.order != "auto":
        wanted = config.order
        if wanted in ("commensurate", "stripes") and order_q is None:
            raise InputError(f"order = {wanted!r} but no superlattice peak was found; give superlattice or q_rad_per_nm")
        if wanted == "commensurate" and (lattice is None or any(f.kind != "commensurate" for f in result.families)):
            raise InputError("order = 'commensurate' but the order's wavevectors are not fractions of the Bragg "
                             "vectors (or no lattice is resolved); give lattice = {kind, a_nm, angle_deg}")
        kind = wanted
    if kind == "stripes" and order_q is not None and len(order_q) < 2:
        notes.append("Only one stripe direction found: a single orientational domain.")
    moire_q = result.moire_q_rad_per_nm
    sup = None
    if result.families:
        fam = result.families
        commensurate = all(f.kind == "commensurate" for f in fam)
        summary = result.to_summary()
        coefs = [tuple(Fraction(float(c)).limit_denominator(64) if commensurate else float(c) for c in row)
                 for row in (coefficients if coefficients is not None else np.zeros((len(order_q), 2)))]
        sup = fourier.Superlattice(summary["order"], commensurate, order_q,
                                   np.concatenate([f.q_err_rad_per_nm for f in fam]), coefs,
                                   fam[0].supercell, int(fam[0].variants) if commensurate else None, None,
                                   "; ".join(r for r in result.reasons if r.startswith("order peaks")))
    spectrum = fourier.SpectrumResult(list(result.peaks), lattice, sup,
                                      np.zeros((0, 2)) if moire_q is None else np.asarray(moire_q), tuple(pixel),
                                      tuple(image.shape))
    lattice_summary = None if lattice is None else {
        "kind": lattice.kind, "a_nm": lattice.a_nm, "a_nm_err": lattice.a_err_nm, "angle_deg": lattice.angle_deg,
        "angle_deg_err": lattice.angle_err_deg, "q_bragg_rad_per_nm": bragg_q.tolist(),
        "q_bragg_abs_rad_per_nm": lattice.q_bragg_rad_per_nm, "resolved": bool(result.lattice.resolved),
        "source": result.lattice.source}
    superlattice_summary = result.to_summary()
    superlattice_summary["kind"] = kind
    to_material = result.lattice.to_material
    if not np.allclose(to_material, np.eye(2)):
        # Wavevectors in the frame of the undistorted material (the slow-axis drift undone); the
        # image-frame values the lock-ins used are kept beside them.
        if lattice_summary is not None:
            lattice_summary["q_bragg_image_rad_per_nm"] = lattice_summary["q_bragg_rad_per_nm"]
            lattice_summary["q_bragg_rad_per_nm"] = (bragg_q @ to_material).tolist()
            lattice_summary["slow_axis_distortion"] = {"shear": result.lattice.slow_axis[0],
                                                      "stretch": result.lattice.slow_axis[1]}
        if order_q is not None:
            superlattice_summary["q_image_rad_per_nm"] = superlattice_summary["q_rad_per_nm"]
            superlattice_summary["q_rad_per_nm"] = (np.asarray(order_q) @ to_material).tolist()
    if kind in ("none", "moire"):
        superlattice_summary["order"] = None
    if kind == "none":
        superlattice_summary["note"] = "no superlattice found"
    power, qx, qy = fourier.power_spectrum(image, pixel_size_nm=pixel, mask=mask)
    # Kept for the spectrum figure only (a log colour scale): float32, half the memory of the run's copy.
    power = (power.astype(np.float32), qx, qy)
    choices = {"lattice": result.lattice.source,
               "lattice_resolved": bool(result.lattice.resolved),
               "spectrum_of": "drift-corrected image" if result.lattice.resolved else "levelled image",
               "superlattice": "given" if config.superlattice or config.q_rad_per_nm is not None else (
                   "found" if result.families else "none found"),
               "order": f"{kind} ({'given' if config.order != 'auto' else 'automatic'})",
               "peaks_found": len(result.peaks),
               "reasons": list(result.reasons),
               "commensurability_test": (f"local wavevector (trimmed mean of q + grad phi relative to the local lattice, lock-in "
                                         f"sigma {result.sigma_test_nm:.3g} nm) within 3 standard errors of a "
                                         "fraction of the Bragg basis with denominator up to 16"
                                         if result.sigma_test_nm else None)}
    if not result.lattice.resolved:
        notes.append("Atomic lattice not resolved: " + "; ".join(result.lattice.reasons))
    return {"result": spectrum, "reading": result, "bragg_q": bragg_q, "order_q": order_q, "moire_q": moire_q,
            "order_kind": kind, "coefficients": coefficients, "lattice_summary": lattice_summary,
            "superlattice_summary": superlattice_summary, "power": power, "notes": notes, "choices": choices}


def _marked_peaks(result, unindexed=12):
    """Peaks to mark on the spectrum figure: every indexed one, else the strongest unindexed ones."""
    known = ("bragg", "superlattice", "incommensurate", "moire", "second_lattice")
    marked = [(p.q[0], p.q[1], p.role) for p in result.peaks if p.role in known]
    if not marked:
        marked = [(p.q[0], p.q[1], "unindexed") for p in result.peaks[:unindexed]]
    return marked


def _peaks_near_qy_axis(peaks, shape, pixel, bins=3):
    """Peaks within ``bins`` frequency bins of the qy axis (line offsets live on that axis)."""
    width_bin = 2 * np.pi / (shape[1] * pixel[1])
    return [p for p in peaks if abs(p.q[0]) < bins * width_bin]


def _moire_step(summary, out_maps, tables, views, choices, notes, image, spec, pixel, mask, config):
    """Local period, twist and heterostrain of a moiré, and its twist-angle domains."""
    from . import measure, moire

    lattice = spec["result"].lattice
    moire_q = spec["moire_q"]
    if (moire_q is None or len(moire_q) < 2) and lattice is not None and config.order != "moire":
        # With the atoms resolved, a moiré shows as a second lattice in the spectrum's indexing;
        # low-|q| peaks of a single lattice are drift sidebands or harmonics, not a moiré.
        return None
    if moire_q is None or len(moire_q) < 2:
        try:
            moire_q = moire.find_moire_q(image, pixel_size_nm=pixel, mask=mask)
        except InputError:
            if config.order == "moire":
                raise InputError("order = 'moire' but no moiré triplet was found in the spectrum") from None
            return None
    bragg_q = None if lattice is None else np.asarray(lattice.bragg, float)
    attrs = {"pixel_size_nm": list(pixel)}
    if bragg_q is None and config.a_nm is None:
        wavelengths = moire.moire_wavelengths(np.asarray(moire_q, float)[:3])
        summary["moire"] = {"mode": "period only", "period_nm": float(np.mean(wavelengths)),
                            "wavelengths_nm": [float(w) for w in wavelengths], "twist_deg": None,
                            "twist_deg_std": None, "heterostrain_percent": None,
                            "moire_q_rad_per_nm": np.asarray(moire_q).tolist(),
                            "note": "atoms not resolved: give the lattice constant a_nm for the twist angle"}
        notes.append("Moiré found, atoms not resolved: give a_nm (the layers' lattice constant) to map the twist.")
        return None
    try:
        maps = moire.moire_maps(image, np.asarray(moire_q, float)[:3], pixel_size_nm=pixel, a_nm=config.a_nm,
                                bragg_q=bragg_q, mask=mask)
    except InputError as err:
        # A frame of only a few moiré periods: the maps' own lock-in width does not fit. The twist from the
        # two layers' Bragg peaks (atoms resolved) still stands; say why the maps are missing.
        reading = spec.get("reading")
        from_bragg = None if reading is None else reading.moire_from_bragg
        summary["moire"] = {"mode": "from Bragg peaks only", "from_bragg_peaks": from_bragg,
                            "period_nm": None if not from_bragg else from_bragg.get("period_nm"),
                            "twist_deg": None if not from_bragg else from_bragg.get("twist_deg"),
                            "twist_deg_std": None,
                            "heterostrain_percent": None if not from_bragg else from_bragg.get("heterostrain_percent"),
                            "note": f"no twist maps: {err}"}
        notes.append(f"Moiré maps not made ({err}); twist and heterostrain from the two layers' Bragg peaks.")
        return None
    # The moiré's own lock-in sets the resolution and the trusted region of everything below.
    summary["sigma_nm"] = maps.sigma_nm
    summary["trusted_fraction"] = float(maps.trusted.mean())
    choices["sigma_nm"] = {"value": maps.sigma_nm, "why": "the moiré lock-in's width: leakage of the nearest moiré "
                           "peak or the DC term below 0.2 % (domains.moire.moire_maps)"}
    valid = np.ones(image.shape, bool) if mask is None else ~np.asarray(mask, bool)
    twist = moire.twist_domains(maps.twist_deg, pixel_size_nm=pixel, tolerance_deg=config.twist_tolerance_deg,
                                twist_err_deg=maps.twist_deg_err, resolution_nm=maps.sigma_nm,
                                min_area_nm2=config.min_domain_area_nm2, trusted=maps.trusted, valid=valid)
    fields = moire.moire_fields(maps, twist)
    summary["moire"] = {**maps.summary, **fields.summary, "twist_domains": len(twist.table),
                        "twist_tolerance_deg": twist.tolerance_deg, "twist_tolerance_from": twist.tolerance_source}
    notes.extend(fields.notes)
    reading = spec.get("reading")
    if reading is not None and reading.moire_from_bragg:
        # With both layers' atoms resolved: the same twist and heterostrain from the two Bragg lattices.
        summary["moire"]["from_bragg_peaks"] = reading.moire_from_bragg
        mismatch = reading.moire_from_bragg.get("mismatch")
        if mismatch is not None and abs(mismatch) > 0.002 and reading.moire_from_bragg.get("twist_deg") is not None:
            # The twist maps invert the moiré for two layers of one lattice constant; with a lattice mismatch
            # (Yankowitz et al. 2012) the mismatch reads as strain there, so the Bragg-peak values are quoted.
            for key in ("twist_deg", "heterostrain_percent", "period_nm"):
                summary["moire"][f"{key}_maps"] = summary["moire"].get(key)
                summary["moire"][f"{key}_err_maps"] = summary["moire"].get(f"{key}_err")
                summary["moire"][key] = reading.moire_from_bragg.get(key)
                # the maps' error does not belong to the Bragg-peak value
                summary["moire"][f"{key}_err"] = reading.moire_from_bragg.get(f"{key}_err")
            summary["moire"]["lattice_mismatch"] = abs(mismatch)
            notes.append(f"Lattice mismatch of {100 * abs(mismatch):.2f} %: twist, heterostrain and period are "
                         "quoted from the two layers' Bragg peaks; the twist maps assume equal lattice constants.")
    choices["moire"] = {"mode": maps.mode, "sigma_nm": maps.sigma_nm, "twist_tolerance_deg": twist.tolerance_deg,
                        "twist_tolerance_from": twist.tolerance_source}
    labels = twist.labels.astype(np.int32)
    walls = np.asarray(twist.walls, bool)
    out_maps["labels"] = (labels, {**attrs, "units": "label"})
    out_maps["walls"] = (walls, {**attrs, "units": "bool"})
    out_maps["twist_deg"] = (maps.twist_deg.astype(np.float32), {**attrs, "units": "deg"})
    out_maps["moire/twist_deg_err"] = (maps.twist_deg_err.astype(np.float32), {**attrs, "units": "deg"})
    out_maps["moire/period_nm"] = (maps.period_nm.astype(np.float32), {**attrs, "units": "nm"})
    out_maps["moire/heterostrain_percent"] = (maps.heterostrain_percent.astype(np.float32), {**attrs, "units": "%"})
    out_maps["moire/heterostrain_angle_deg"] = (maps.heterostrain_angle_deg.astype(np.float32),
                                                {**attrs, "units": "deg"})
    state = {int(r["id"]): f"twist {r['twist_deg']:.4g} deg" for r in fields.table}
    rows = measure.domain_table(labels, pixel_size_nm=pixel, state_names=state, amplitude=maps.amplitude)
    # Boundaries between twist domains are walls: counted, with their lengths (their width is the maps' resolution).
    wall_rows = measure.wall_table(twist.grown, walls, pixel_size_nm=pixel)
    tables["domains"] = (measure.DOMAIN_COLUMNS, rows)
    tables["walls"] = (measure.WALL_COLUMNS, wall_rows)
    twist_columns = list(fields.table[0]) if fields.table else ["id"]
    tables["twist_domains"] = (twist_columns, fields.table)
    summary["domains"] = measure.domain_summary(rows, wall_rows)
    views["moire"] = {"mode": maps.mode, "sigma_nm": maps.sigma_nm, "twist_deg": _small(maps.twist_deg, pixel),
                      "heterostrain_percent": _small(maps.heterostrain_percent, pixel),
                      "domains": _domain_view(image, labels, walls, pixel)}
    return maps


def _moire_headline(moire):
    """Headline rows for a moiré: one value with its error where a quantity is uniform, its modes or spread where not."""
    from .moire import _with_error

    rows = {}
    keys = (("moiré period", "period_nm", "nm"), ("twist angle", "twist_deg", "deg"),
            ("heterostrain", "heterostrain_percent", "%"))
    for name, key, unit in keys:
        value = moire.get(key)
        if value is None:
            continue
        kind = moire.get(f"{key}_distribution", "uniform")
        if kind == "multimodal":
            levels = moire.get(f"{key}_levels") or []
            text = "multimodal: " + ", ".join(f"{_with_error(lv['value'], lv['err'], ' ' + unit)} "
                                              f"({100 * lv['area_fraction']:.0f} %)" for lv in levels)
            text += f"; median {moire[f'{key}_median']:.4g}, IQR {moire[f'{key}_q25']:.4g}–{moire[f'{key}_q75']:.4g} {unit}"
        elif kind == "varies":
            text = (f"varies: median {moire[f'{key}_median']:.4g} {unit}, IQR {moire[f'{key}_q25']:.4g}–"
                    f"{moire[f'{key}_q75']:.4g} {unit} (no single value)")
        else:
            err = moire.get(f"{key}_err")
            text = _with_error(value, err, " " + unit) if err is not None else _pm(value, None, unit)
        if key == "twist_deg" and moire.get("twist_domains") is not None:
            text += f" ({moire['twist_domains']} twist domains)"
        if key == "heterostrain_percent" and kind == "uniform" and moire.get("heterostrain_angle_deg") is not None:
            err = moire.get("heterostrain_percent_err")
            if err is not None and np.isfinite(err) and value < 2 * err:
                # A magnitude within two errors of zero: its axis means nothing.
                text += " (consistent with zero; axis undetermined)"
            else:
                axis_err = moire.get("heterostrain_angle_deg_err")
                text += " along " + (_with_error(moire["heterostrain_angle_deg"], axis_err, " deg") if axis_err is not None
                                     else _pm(moire["heterostrain_angle_deg"], None, "deg", 3))
        rows[name] = text
    return rows
