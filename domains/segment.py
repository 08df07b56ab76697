"""Cut an order-parameter field into domains, domain walls and topological defects."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, optimize, special
from scipy.spatial import cKDTree
from skimage.segmentation import watershed

from ._checks import positive
from ._errors import InputError
from ._scan import pixel_size_pair


@dataclass
class Segmentation:
    """Domains and walls on the pixel grid.

    Attributes
    ----------
    labels : (row, col) int32
        Domain labels 1..N; 0 on the thin walls and where there is no order.
    grown : (row, col) int32
        Labels before the walls were cut out (every ordered pixel belongs to a domain).
    walls : (row, col) bool
        One-pixel-thin walls between two domains.
    state : dict
        Label -> the state (variant index or orientation) of that domain.
    islands : int
        Connected regions of one state smaller than ``min_area_nm2``, left unassigned
        and then absorbed by their neighbours.
    parameters : dict
        Every threshold used, with its origin.
    """

    labels: np.ndarray
    grown: np.ndarray
    walls: np.ndarray
    state: dict
    islands: int
    parameters: dict = field(default_factory=dict)


def segment_states(state, confidence, ordered, *, pixel_size_nm, min_area_nm2, confidence_threshold, trusted=None,
                   bridge_nm=0.0):
    """Domains as connected regions of one state, grown through the uncertain zones between them.

    1. Cores: ordered pixels whose state is confident (``confidence >=
       confidence_threshold``). 2. Connected cores of one state (8-connected) are
    domain seeds; seeds smaller than ``min_area_nm2`` are islands and dropped.
    3. The seeds grow over the remaining ordered pixels by watershed on
    ``-confidence``, so uncertain pixels join the domain they resemble most and
    the seeds meet where the confidence is lowest (the walls). 4. A one-pixel
    wall is drawn where two grown domains touch.

    Parameters
    ----------
    state : (row, col) int
        State of each pixel (variant index, orientation), negative = none.
    confidence : (row, col) float
        How sure that state is (higher is surer).
    ordered : (row, col) bool
        Where any order is present.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    min_area_nm2 : float
        Smallest domain area kept.
    confidence_threshold : float
        Confidence needed for a domain core.
    trusted : (row, col) bool, optional
        Where the lock-in is reliable; seeds come only from there, and growth
        reaches the rest of the ordered pixels.
    bridge_nm : float
        Gaps in ``ordered`` narrower than about twice this are bridged before growing:
        at a pi phase slip the amplitude falls to zero (docs/methods.md §5), and the wall
        between the two domains must still be drawn. A morphological closing with a
        disc of this radius in pixels (of the smaller pixel side), computed by
        :func:`disc_closing` (distance transforms: cost and memory independent of
        the radius).

    Returns
    -------
    Segmentation

    Examples
    --------
    >>> state = np.zeros((20, 20), int); state[:, 10:] = 1
    >>> conf = np.ones((20, 20)); conf[:, 9:11] = 0.2
    >>> seg = segment_states(state, conf, np.ones((20, 20), bool), pixel_size_nm=0.1,
    ...                      min_area_nm2=0.1, confidence_threshold=0.5)
    >>> int(seg.labels.max()), int(seg.walls.sum())
    (2, 20)
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    state = np.asarray(state)
    # Memory: float32 confidence stays float32 (a copy, -inf where NaN), masks are bool, labels int32.
    confidence = np.array(confidence, dtype=np.float32 if np.asarray(confidence).dtype == np.float32 else float)
    np.nan_to_num(confidence, copy=False, nan=-np.inf)
    ordered = np.asarray(ordered, dtype=bool)
    if not (state.shape == confidence.shape == ordered.shape):
        raise InputError(f"state, confidence and ordered differ in shape: {state.shape}, {confidence.shape}, {ordered.shape}")
    core = state >= 0
    core &= ordered
    core &= confidence >= np.float64(confidence_threshold)   # compared in float64, as given
    if trusted is not None:
        core &= trusted
    min_pixels = max(1, int(math.ceil(min_area_nm2 / (dy * dx))))
    seeds = np.zeros(state.shape, dtype=np.int32)
    seed_state = {}
    islands = 0
    next_label = 1
    eight = np.ones((3, 3), bool)
    for s in np.unique(state[core]):
        regions, count = ndimage.label(core & (state == s), structure=eight, output=np.int32)
        sizes = np.bincount(regions.ravel(), minlength=count + 1)
        keep = np.nonzero(sizes[1:] >= min_pixels)[0] + 1
        islands += count - keep.size
        # One lookup relabels every kept region at once (a loop of full-frame masks costs N x regions);
        # the regions of different states are disjoint, so they add into the seeds.
        lut = np.zeros(count + 1, dtype=np.int32)
        lut[keep] = np.arange(next_label, next_label + keep.size, dtype=np.int32)
        np.take(lut, regions, out=regions, mode="clip")
        seeds += regions
        for label in range(next_label, next_label + keep.size):
            seed_state[label] = int(s)
        next_label += keep.size
        del regions
    del core
    if next_label == 1:
        empty = np.zeros(state.shape, dtype=np.int32)
        return Segmentation(empty, empty, np.zeros(state.shape, bool), {}, islands,
                            {"min_area_nm2": min_area_nm2, "confidence_threshold": confidence_threshold})
    # Flooding order: -confidence, with the lowest finite confidence where there is none (in place).
    bad = ~np.isfinite(confidence)
    confidence[bad] = confidence[~bad].min(initial=0.0)
    del bad
    np.negative(confidence, out=confidence)
    reach = ordered
    if bridge_nm > 0:
        radius = max(1, int(round(bridge_nm / min(dy, dx))))
        reach = ordered | disc_closing(ordered, radius)
    grown = watershed(confidence, markers=seeds, mask=reach).astype(np.int32, copy=False)
    del seeds, confidence, reach
    walls = thin_walls(grown)
    labels = np.where(walls, np.int32(0), grown)
    params = {"min_area_nm2": float(min_area_nm2), "confidence_threshold": float(confidence_threshold),
              "bridge_nm": float(bridge_nm)}
    return Segmentation(labels, grown, walls, seed_state, islands, params)



def _distance_compare(features_off, radius, *, greater=False, sampling=None):
    """``distance_transform_edt(features_off, sampling) <= radius`` (``> radius`` with ``greater``).

    The same float64 distances as scipy's (from the integer offsets of the feature transform,
    times the sampling, squared, summed, square-rooted), computed in row blocks: the full-frame
    float64 distances and index grids scipy builds (about 40 bytes per pixel) are never held,
    only the int32 feature transform (8 bytes per pixel). ``features_off`` must hold a False pixel.
    """
    shape = features_off.shape
    ft = np.empty((len(shape),) + shape, np.int32)
    ndimage.distance_transform_edt(features_off, sampling=sampling, return_distances=False, return_indices=True,
                                   indices=ft)
    out = np.empty(shape, bool)
    scale = None if sampling is None else np.broadcast_to(np.asarray(sampling, float), (2,))
    cols = np.arange(shape[1])
    block = max(1, (1 << 18) // max(1, shape[1]))
    for r0 in range(0, shape[0], block):
        r1 = min(r0 + block, shape[0])
        d_row = (ft[0, r0:r1] - np.arange(r0, r1)[:, None]).astype(np.float64)
        d_col = (ft[1, r0:r1] - cols).astype(np.float64)
        if scale is not None:
            d_row *= scale[0]
            d_col *= scale[1]
        np.multiply(d_row, d_row, out=d_row)
        np.multiply(d_col, d_col, out=d_col)
        d_row += d_col
        np.sqrt(d_row, out=d_row)
        if greater:
            np.greater(d_row, radius, out=out[r0:r1])
        else:
            np.less_equal(d_row, radius, out=out[r0:r1])
    return out


def _disc_dilation(mask, radius_px):
    """Dilation by the disc {|offset| <= radius_px} (pixel units); pixels outside the frame are False."""
    if not mask.any():
        return np.zeros(mask.shape, dtype=bool)
    # distance from every pixel to the nearest True pixel of the frame
    return _distance_compare(~mask, radius_px)


def _disc_erosion(mask, radius_px):
    """Erosion by the disc {|offset| <= radius_px}; pixels outside the frame count as False."""
    if not mask.any():
        return np.zeros(mask.shape, dtype=bool)
    # A one-pixel False frame makes the outside count: every outside pixel within the
    # radius has a frame pixel at least as close (clamp each coordinate to the frame).
    padded = np.pad(mask, 1, mode="constant", constant_values=False)
    return _distance_compare(padded, radius_px, greater=True)[1:-1, 1:-1]


def disc_closing(mask, radius_px, *, edge="replicate"):
    """Morphological closing by a disc, from two Euclidean distance transforms.

    Dilation by the disc D_r = {(i, j) integer: i^2 + j^2 <= r^2} is the set of
    pixels whose distance to the nearest True pixel is <= r; erosion keeps the
    pixels whose distance to the nearest False pixel is > r; closing is the
    dilation followed by the erosion. Each step costs one exact distance
    transform, O(N) in time and memory whatever r, where a structuring element
    of (2r + 1)^2 pixels costs O(N r^2). The result equals
    ``scipy.ndimage.binary_closing`` with the same disc, computed on the mask
    padded as below (exactly, pixel for pixel).

    Parameters
    ----------
    mask : (row, col) bool
        The region to close.
    radius_px : float
        Disc radius in pixels.
    edge : {"replicate", "zero"}
        Frame convention. ``"replicate"`` (the segmentation's): the mask is first
        extended by ``ceil(radius_px)`` pixels repeating its edge values (as
        ``numpy.pad(mode="edge")``), so a region touching the frame is not eroded
        there, then closed with everything beyond that margin False, then cropped.
        ``"zero"``: outside the frame is False for both steps (scipy's
        ``binary_closing`` with ``border_value=0``), so regions are eroded where
        they touch the frame.

    Returns
    -------
    (row, col) bool

    Examples
    --------
    >>> m = np.zeros((9, 9), bool); m[:, :4] = True; m[:, 5:] = True
    >>> int(disc_closing(m, 1).sum())      # the one-pixel gap is bridged
    81
    >>> int(disc_closing(m, 1, edge="zero")[0].sum())   # the first row meets the frame: eroded
    0
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim != 2:
        raise InputError(f"mask must be 2-D (row, col), got shape {mask.shape}")
    if not radius_px >= 0:
        raise InputError(f"radius_px must be >= 0, got {radius_px!r}")
    if edge not in ("replicate", "zero"):
        raise InputError(f"edge must be 'replicate' or 'zero', got {edge!r}")
    if edge == "replicate":
        pad = int(math.ceil(radius_px))
        closed = _disc_erosion(_disc_dilation(np.pad(mask, pad, mode="edge"), radius_px), radius_px)
        return closed[pad: pad + mask.shape[0], pad: pad + mask.shape[1]]
    return _disc_erosion(_disc_dilation(mask, radius_px), radius_px)


def thin_walls(grown):
    """One-pixel walls: pixels with a 4-neighbour of a different, larger, nonzero label.

    Parameters
    ----------
    grown : (row, col) int
        Labels with no gaps between domains.

    Returns
    -------
    (row, col) bool

    Examples
    --------
    >>> g = np.ones((3, 4), int); g[:, 2:] = 2
    >>> thin_walls(g).astype(int).tolist()
    [[0, 1, 0, 0], [0, 1, 0, 0], [0, 1, 0, 0]]
    """
    walls = np.zeros(grown.shape, dtype=bool)
    for axis in (0, 1):
        a = np.moveaxis(grown, axis, 0)
        w = np.moveaxis(walls, axis, 0)
        edge = (a[:-1] > 0) & (a[1:] > 0) & (a[:-1] != a[1:])
        w[:-1] |= edge & (a[:-1] < a[1:])
        w[1:] |= edge & (a[1:] < a[:-1])
    return walls


def wall_segments(grown, walls):
    """Pairs of domains that meet, with the wall pixels between each pair, split into connected segments.

    Parameters
    ----------
    grown : (row, col) int
        Labels with no gaps between domains.
    walls : (row, col) bool
        Thin walls (see :func:`thin_walls`).

    Returns
    -------
    list of (int, int, ndarray of bool)
        (domain a, domain b, pixels of that segment), a < b.

    Examples
    --------
    >>> g = np.ones((3, 4), int); g[:, 2:] = 2
    >>> [(a, b, int(m.sum())) for a, b, m in wall_segments(g, thin_walls(g))]
    [(1, 2, 3)]
    """
    grown = np.asarray(grown)
    segments = []
    for a, b, (r0, c0), crop in _wall_segment_crops(grown, walls):
        pixels = np.zeros(grown.shape, dtype=bool)
        pixels[r0: r0 + crop.shape[0], c0: c0 + crop.shape[1]] = crop
        segments.append((a, b, pixels))
    return segments


def _wall_segment_crops(grown, walls):
    """The segments of :func:`wall_segments`, in the same order, each as its own bounding box.

    Yields (a, b, (row0, col0), crop): ``crop`` is the segment's pixels in the box whose
    top-left pixel is (row0, col0). Memory is O(N) for the frame plus the boxes, not a
    full-frame mask per segment.
    """
    grown = np.asarray(grown)
    walls = np.asarray(walls, dtype=bool)
    # Each wall pixel's pair: its own label and the smallest larger neighbouring label across the wall.
    other = np.zeros(grown.shape, dtype=np.int64)
    for shift in ((0, 1), (1, 0), (0, -1), (-1, 0)):
        neighbour = np.roll(grown, shift, axis=(0, 1))
        if shift[0] == 1:
            neighbour[0] = 0
        if shift[0] == -1:
            neighbour[-1] = 0
        if shift[1] == 1:
            neighbour[:, 0] = 0
        if shift[1] == -1:
            neighbour[:, -1] = 0
        better = walls & (neighbour > grown) & ((other == 0) | (neighbour < other))
        other[better] = neighbour[better]
        del neighbour, better
    index = np.flatnonzero(walls & (other > 0))
    if index.size == 0:
        return
    pair_a = grown.ravel()[index].astype(np.int64)
    pair_b = other.ravel()[index]
    del other
    order = np.lexsort((index, pair_b, pair_a))
    index, pair_a, pair_b = index[order], pair_a[order], pair_b[order]
    starts = np.flatnonzero(np.r_[True, (np.diff(pair_a) != 0) | (np.diff(pair_b) != 0)])
    stops = np.r_[starts[1:], index.size]
    eight = np.ones((3, 3))
    for start, stop in zip(starts, stops):
        rows, cols = np.divmod(index[start:stop], grown.shape[1])
        r0, c0 = int(rows.min()), int(cols.min())
        box = np.zeros((int(rows.max()) - r0 + 1, int(cols.max()) - c0 + 1), dtype=bool)
        box[rows - r0, cols - c0] = True
        # Components are numbered in raster order, in the box as in the full frame.
        regions, count = ndimage.label(box, structure=eight)
        for region, where in enumerate(ndimage.find_objects(regions), start=1):
            crop = regions[where] == region
            yield int(pair_a[start]), int(pair_b[start]), (r0 + where[0].start, c0 + where[1].start), crop


def skeleton_length_nm(pixels, pixel_size_nm):
    """Length of a thin curve of pixels: orthogonal links count one step, diagonal links sqrt(2) steps.

    Diagonal links already bridged by two orthogonal links are not counted twice.

    Parameters
    ----------
    pixels : (row, col) bool
        The curve.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.

    Returns
    -------
    float
        Length in nm (a single pixel has length one pixel).

    Examples
    --------
    >>> line = np.eye(5, dtype=bool)
    >>> round(skeleton_length_nm(line, 1.0), 3)   # 4 diagonal steps plus one pixel
    6.657
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    p = np.asarray(pixels, dtype=bool)
    horizontal = p[:, :-1] & p[:, 1:]
    vertical = p[:-1] & p[1:]
    diag = p[:-1, :-1] & p[1:, 1:]
    anti = p[:-1, 1:] & p[1:, :-1]
    # A diagonal link whose corner pixels are also in the curve is already walked orthogonally.
    corner_d = p[:-1, 1:] | p[1:, :-1]
    corner_a = p[:-1, :-1] | p[1:, 1:]
    length = horizontal.sum() * dx + vertical.sum() * dy
    length += ((diag & ~corner_d).sum() + (anti & ~corner_a).sum()) * math.hypot(dx, dy)
    return float(length + min(dx, dy)) if p.any() else 0.0


def wall_profile_fit(fields, grown, a, b, *, sigma_nm, pixel_size_nm, segment=None, reach_sigma=4.0, trusted=None):
    """Wall width and position from a forward model: a step convolved with the lock-in filter.

    Across a wall between domains with complex order parameters P_j and Q_j,
    the lock-in field is modelled as A_j(s) = (1 - S(s)) P_j + S(s) Q_j with
    S(s) = [1 + erf((s - s0) / (sqrt(2) W))] / 2 and s the signed distance to
    the wall. An intrinsic wall that is a Gaussian-smoothed step of width w,
    seen through the Gaussian lock-in of width sigma, has W = sqrt(w^2 +
    sigma^2) exactly, for any phase jump, because the model is linear in S; the
    amplitude dip to |cos(dphi/2)| and the phase ramp both follow from it (docs/methods.md §5).
    Subtracting sigma in quadrature from the width of the phase or amplitude
    profile alone would be wrong for large jumps, which is why the complex
    profile is fitted.

    The signed distance s is taken to the a|b boundary drawn at sub-pixel precision through the
    labels smoothed over sigma (:data:`WALL_LINE_SMOOTHING_SIGMA`), not to the nearest pixel of the
    other domain: on a coarse grid the latter follows the staircase of a tilted wall and narrows the
    fitted profile by up to 7 %.

    Errors (1 sigma, statistical): the least-squares covariance in its sandwich form for the lock-in's
    correlated noise, (J^T J)^-1 J^T R J (J^T J)^-1 v, with R the correlation of the lock-in of white
    noise between two pixels d apart, exp(-d^2 / (4 sigma^2)), in both the real and the imaginary
    part, and v the noise variance of each component measured from its own residuals (their
    expectation under that correlation, N - tr((J^T J)^-1 J^T R J), as the degrees of freedom). It is
    the covariance of the least-squares estimate under that noise [1]; the residuals include any
    misfit of the model (a wall that is not a smoothed step; near a sharp wall, the other components'
    steps leaking into a component's band), which then counts as noise. Checked by coverage over
    noise realisations on the decimated grid (tests/test_errors_coverage.py).

    Parameters
    ----------
    fields : (k, row, col) complex ndarray
        Lock-in fields (drift-free relative fields for a CDW).
    grown : (row, col) int
        Labels with no gaps between domains.
    a, b : int
        The two domains.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size of ``fields`` in nm (the coarse pixel on a decimated grid).
    segment : (row, col) bool, optional
        Restrict the fit to pixels near this wall segment.
    reach_sigma : float
        Use pixels up to this many W (initially sigma) from the wall.
    trusted : (row, col) bool, optional
        Pixels where the lock-in is reliable (:func:`domains.trusted_mask`); only these are
        fitted. Near the frame edge the lock-in averages fewer pixels, its noise is larger than
        the model of the errors assumes.

    Returns
    -------
    dict
        ``width_nm`` (intrinsic w = sqrt(W^2 - sigma^2), 0 when W <= sigma),
        ``width_nm_err`` (1 sigma, W dW / w), ``resolved`` (W - sigma > 2 dW, dW the
        standard error of W), ``width_nm_upper_limit`` (sqrt((W + 2 dW)^2 - sigma^2), the
        one-sided limit at the same level: what to report when not resolved),
        ``total_width_nm`` (W) and ``total_width_nm_err`` (dW),
        ``offset_nm`` (s0), ``phase_jump_deg`` (arg Q_j P_j* per component) and
        ``phase_jump_deg_err`` (1 sigma each), ``n_pixels``.

    References
    ----------
    .. [1] G. A. F. Seber and C. J. Wild, *Nonlinear Regression* (Wiley, 1989), §2.1: the
       covariance of a least-squares estimate under correlated errors (from memory).

    Examples
    --------
    >>> from scipy.special import erf
    >>> y, x = np.mgrid[:40, :60] * 0.1
    >>> s = 0.5 * (1 + erf((x - 3.0) / (np.sqrt(2) * np.hypot(0.3, 0.5))))
    >>> f = ((1 - s) + s * np.exp(2j * np.pi / 3))[None]
    >>> grown = np.where(x < 3.0, 1, 2)
    >>> fit = wall_profile_fit(f, grown, 1, 2, sigma_nm=0.5, pixel_size_nm=0.1)
    >>> round(fit["width_nm"], 3), fit["phase_jump_deg"]
    (0.3, [120.0])
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    fields = np.asarray(fields)
    grown = np.asarray(grown)
    if segment is not None:
        segment = np.asarray(segment, dtype=bool)
        rows, cols = np.nonzero(segment)
        if rows.size:
            r0, c0 = int(rows.min()), int(cols.min())
            crop = segment[r0: int(rows.max()) + 1, c0: int(cols.max()) + 1]
            return _profile_fit_near(fields, grown, a, b, crop, (r0, c0), sigma_nm=sigma_nm, dy=dy, dx=dx,
                                     reach_sigma=reach_sigma, trusted=trusted)
    return _profile_fit(fields, grown, a, b, segment, sigma_nm=sigma_nm, dy=dy, dx=dx, reach_sigma=reach_sigma,
                        trusted=None if trusted is None else np.asarray(trusted, dtype=bool))


def _profile_fit_near(fields, grown, a, b, crop, corner, *, sigma_nm, dy, dx, reach_sigma, trusted=None):
    """:func:`wall_profile_fit` near one segment, computed in a window around it (same result).

    The fit uses pixels within D = 1.5 reach_sigma sigma of the segment. Each segment
    pixel lies in a and has a 4-neighbour in b (or the reverse), so the nearest pixel of
    the other domain from any used pixel lies within 2 D + one pixel of the segment: a
    window of the segment's box grown by that much gives the full-frame distances exactly.
    """
    margin = int(math.ceil((2 * 1.5 * reach_sigma * sigma_nm + max(dy, dx)) / min(dy, dx))) + 2
    r0, c0 = corner
    window = (slice(max(r0 - margin, 0), r0 + crop.shape[0] + margin),
              slice(max(c0 - margin, 0), c0 + crop.shape[1] + margin))
    sub_grown = grown[window]
    segment = np.zeros(sub_grown.shape, dtype=bool)
    wr, wc = r0 - window[0].start, c0 - window[1].start
    segment[wr: wr + crop.shape[0], wc: wc + crop.shape[1]] = crop
    return _profile_fit(fields[(slice(None),) + window], sub_grown, a, b, segment, sigma_nm=sigma_nm, dy=dy, dx=dx,
                        reach_sigma=reach_sigma, trusted=None if trusted is None else np.asarray(trusted, bool)[window])


#: Smoothing of the domain indicator before the wall line is drawn through it, in units of sigma
#: (at least 1.5 pixels): removes the staircase of a tilted wall on the pixel grid and the pixel-scale
#: wiggle of the labels, keeps the wall's real shape on scales above the lock-in's resolution. Measured
#: on a 3x3 CDW wall on the sigma / 2 grid (80 noise draws): widths +0.003 nm off at 1 sigma, +0.009 nm
#: at 2 sigma, where the smoothed labels bend near the frame edge.
WALL_LINE_SMOOTHING_SIGMA = 1.0


def _signed_distance(in_a, in_b, dy, dx, smooth_nm, where=None, max_nm=np.inf):
    """Signed distance (nm) to the a|b boundary drawn at sub-pixel precision, negative in a.

    Pixels farther than ``max_nm`` from the boundary get NaN: the nearest-sample search is then
    bounded (a k-d tree of samples along a line, queried from far away, visits most of its leaves:
    minutes for a wall across a 1500^2 window).

    The boundary is the half level of the smoothed fraction of b among a and b pixels (marching
    squares), sampled every tenth of a pixel; a pixel's distance is to the nearest sample. A distance
    taken to the nearest pixel of the other domain instead (Euclidean distance transform) follows the
    staircase of a tilted wall: it compresses s by up to 7 % near the wall (measured at 17 to 30
    degrees), and the fitted width with it. Computed at the a and b pixels of ``where`` (default:
    all of them), NaN elsewhere.
    """
    from skimage.measure import find_contours

    sigma_px = (max(smooth_nm / dy, 1.5), max(smooth_nm / dx, 1.5))
    either = in_a | in_b
    # Filtered straight from the masks into float64 (no float copies of them); the same values.
    frac = ndimage.gaussian_filter(in_b, sigma_px, output=np.float64, mode="constant")
    den = ndimage.gaussian_filter(either, sigma_px, output=np.float64, mode="constant")
    with np.errstate(invalid="ignore", divide="ignore"):
        np.divide(frac, den, out=frac)
    frac[~(either & (den > 0))] = np.nan
    del den
    points = []
    for line in find_contours(frac, 0.5):
        if len(line) < 2:
            points.append(line)
            continue
        seg = np.diff(line, axis=0)
        count = np.maximum(1, np.ceil(np.hypot(*seg.T) / 0.1)).astype(int)
        t = np.concatenate([np.arange(c) / c for c in count])
        start = np.repeat(line[:-1], count, axis=0)
        points.append(start + t[:, None] * np.repeat(seg, count, axis=0))
        points.append(line[-1:])
    del frac
    if not points:
        return None
    points = np.vstack(points) * (dy, dx)
    query = either if where is None else either & where
    if np.isfinite(max_nm):
        # Only pixels near the boundary are asked (a Euclidean distance transform from the a|b pixel
        # edges, exact to a pixel; the smoothed boundary lies within the smoothing width of them).
        edge = (in_a & ndimage.binary_dilation(in_b)) | (in_b & ndimage.binary_dilation(in_a))
        if edge.any():
            reach = max_nm + 2 * smooth_nm + 2 * max(dy, dx)
            query &= _distance_compare(~edge, reach, sampling=(dy, dx))
    rows, cols = np.nonzero(query)
    dist, _ = cKDTree(points).query(np.stack([rows * dy, cols * dx], axis=1), distance_upper_bound=max_nm)
    s = np.full(in_a.shape, np.nan)
    s[rows, cols] = np.where(np.isfinite(dist), np.where(in_a[rows, cols], -dist, dist), np.nan)
    return s


#: Largest log of the profile width (nm) tried by the wall fit: math.exp overflows above 709.78.
_LOG_W_MAX = 700.0


def _profile_fit(fields, grown, a, b, segment, *, sigma_nm, dy, dx, reach_sigma, trusted=None):
    in_a, in_b = grown == a, grown == b
    nan_fit = {"width_nm": math.nan, "width_nm_err": math.nan, "width_nm_upper_limit": math.nan, "resolved": False,
               "total_width_nm": math.nan, "total_width_nm_err": math.nan, "offset_nm": math.nan,
               "phase_jump_deg": [], "phase_jump_deg_err": [], "n_pixels": 0}
    # The pixels that can enter the fit, before the distances: those are then computed there only.
    near = in_a | in_b
    for f in fields:
        near &= np.isfinite(f)
    if trusted is not None:
        near &= trusted
    if segment is not None:
        near &= _distance_compare(~segment, reach_sigma * sigma_nm * 1.5, sampling=(dy, dx))
    # Only pixels within the fit's reach need a distance: the wall pixels (|s| <= reach sigma) and the
    # domains' cores next to them, all within 1.5 reach sigma of the segment; twice that, plus the
    # smoothing and two pixels, bounds the distance from those pixels to the drawn boundary.
    smooth = WALL_LINE_SMOOTHING_SIGMA * sigma_nm
    s = _signed_distance(in_a, in_b, dy, dx, smooth, where=near,
                         max_nm=3 * reach_sigma * sigma_nm + 3 * smooth + 2 * max(dy, dx))
    if s is None:
        return nan_fit
    near &= np.isfinite(s)
    far = (np.abs(s) > 2.5 * sigma_nm) & near
    near_wall = near & (np.abs(s) <= reach_sigma * sigma_nm)
    core_a, core_b = far & in_a, far & in_b
    if core_a.sum() < 4 or core_b.sum() < 4 or near_wall.sum() < 8:
        return {**nan_fit, "n_pixels": int(near_wall.sum())}
    k = len(fields)
    p0 = np.array([f[core_a].mean() for f in fields])
    q0 = np.array([f[core_b].mean() for f in fields])
    sv_all = s[near_wall]
    data_all = np.stack([f[near_wall] for f in fields])
    # Neighbouring pixels are nearly the same measurement (correlated over the filter):
    # a regular subsample of a few thousand keeps the fit fast and loses nothing.
    stride = max(1, sv_all.size // 3000)
    sv, data = sv_all[::stride], data_all[:, ::stride]

    def unpack(params):
        p = params[2: 2 + k] + 1j * params[2 + k: 2 + 2 * k]
        q = params[2 + 2 * k: 2 + 3 * k] + 1j * params[2 + 3 * k:]
        return params[0], params[1], p, q

    def residual(params):
        s0, log_w, p, q = unpack(params)
        # log W capped where exp overflows (a diverging trial step; the fit moves back from it)
        step = 0.5 * (1 + special.erf((sv - s0) / (math.sqrt(2) * math.exp(min(log_w, _LOG_W_MAX)))))
        diff = (data - ((1 - step) * p[:, None] + step * q[:, None])).ravel()
        return np.concatenate([diff.real, diff.imag])

    # The domain values P, Q are fitted with the profile: core means taken near a wide wall are biased.
    start = np.concatenate([[0.0, math.log(sigma_nm * 1.1)], p0.real, p0.imag, q0.real, q0.imag])
    fit = optimize.least_squares(residual, x0=start, method="lm")
    s0, log_w, p, q = unpack(fit.x)
    if not log_w < _LOG_W_MAX:
        # the fit ran away to an infinitely wide profile: no wall to measure
        return {**nan_fit, "n_pixels": int(near_wall.sum())}
    total = math.exp(log_w)
    cov = _profile_covariance(fields, near_wall, s, s0, total, p, q, sigma_nm=sigma_nm, dy=dy, dx=dx)
    total_err = total * math.sqrt(max(cov[1, 1], 0.0)) if cov is not None else math.nan
    intrinsic = math.sqrt(max(total**2 - sigma_nm**2, 0.0))
    # d w / d W = W / w; when w -> 0 the error of w is bounded by sqrt(2 W dW).
    width_err = total * total_err / intrinsic if intrinsic > total_err else math.sqrt(2 * total * total_err)
    resolved = bool(total - sigma_nm > 2 * total_err)
    # One-sided upper limit at the same 2-standard-error level as the resolution test.
    upper = math.sqrt(max((total + 2 * total_err) ** 2 - sigma_nm**2, 0.0)) if math.isfinite(total_err) else math.nan
    jumps = np.degrees(np.angle(q * np.conj(p)))
    jump_err = np.full(k, math.nan)
    if cov is not None:
        for j in range(k):
            # arg Q_j - arg P_j: gradient of arg z is (-Im z, Re z) / |z|^2 in (Re z, Im z).
            grad = np.zeros(len(fit.x))
            grad[[2 + j, 2 + k + j]] = np.array([p[j].imag, -p[j].real]) / max(abs(p[j]) ** 2, 1e-300)
            grad[[2 + 2 * k + j, 2 + 3 * k + j]] = np.array([-q[j].imag, q[j].real]) / max(abs(q[j]) ** 2, 1e-300)
            jump_err[j] = math.degrees(math.sqrt(max(grad @ cov @ grad, 0.0)))
    return {
        "width_nm": intrinsic,
        "width_nm_err": width_err,
        "width_nm_upper_limit": upper,
        "resolved": resolved,
        "total_width_nm": total,
        "total_width_nm_err": total_err,
        "offset_nm": float(s0),
        "phase_jump_deg": [round(float(j), 2) for j in jumps],
        "phase_jump_deg_err": [round(float(e), 2) for e in jump_err],
        "n_pixels": int(near_wall.sum()),
    }


def _profile_covariance(fields, used, s, s0, width, p, q, *, sigma_nm, dy, dx):
    """Covariance of the wall-profile parameters (s0, log W, Re P, Im P, Re Q, Im Q) under correlated noise.

    The lock-in of white noise is a complex Gaussian field whose real and imaginary parts are
    independent, each with correlation rho(d) = exp(-d^2 / (4 sigma^2)) between two pixels d apart
    (G_sigma convolved with itself, derived). For least squares with Jacobian J and residual
    covariance v R, Cov = v (J^T J)^-1 (J^T R J) (J^T J)^-1 (the sandwich form); R J is a Gaussian
    filter of each Jacobian column over the pixels used. The noise variance v is measured from the
    residuals, with the expectation E[RSS] = v (N - tr((J^T J)^-1 J^T R J)) of correlated data.

    The Jacobian is sparse: the residual block of component j and part (real or imaginary) depends
    on s0, log W and one part each of P_j and Q_j only. Each block's four columns are built,
    filtered and reduced to J^T J and J^T R J in turn, so memory is a few values per pixel used,
    not the (2k, pixels, 2 + 4k) Jacobian.
    """
    k = len(fields)
    rows, cols = np.nonzero(used)
    u = (s[rows, cols] - s0) / width
    step = 0.5 * (1 + special.erf(u / math.sqrt(2)))
    bump = np.exp(-0.5 * u**2) / math.sqrt(2 * math.pi)
    n = rows.size
    n_par = 2 + 4 * k
    corr_px = (math.sqrt(2) * sigma_nm / dy, math.sqrt(2) * sigma_nm / dx)
    # Sum over pixels of exp(-d^2 / (4 sigma^2)): the unit-sum Gaussian filter times 4 pi sigma^2 / (dy dx).
    norm = 4 * math.pi * sigma_nm**2 / (dy * dx)
    plane = np.zeros(used.shape)
    jtj = np.zeros((n_par, n_par))
    jrj = np.zeros((k, n_par, n_par))     # J^T R J of each component's two blocks
    rss = np.zeros(k)
    jac = np.empty((n, 4))
    smoothed = np.empty((n, 4))
    for j in range(k):
        jump = q[j] - p[j]
        d_s0 = -bump / width * jump
        d_logw = -bump * u * jump
        r = fields[j][rows, cols] - (p[j] + step * jump)
        for part, take in ((0, np.real), (1, np.imag)):
            # columns s0, log W, (Re or Im) P_j, (Re or Im) Q_j
            where = [0, 1, 2 + part * k + j, 2 + 2 * k + part * k + j]
            rss[j] += float(np.sum(take(r) ** 2))
            jac[:, 0] = take(d_s0)
            jac[:, 1] = take(d_logw)
            jac[:, 2] = 1 - step
            jac[:, 3] = step
            for c in range(4):
                column = jac[:, c]
                if not np.any(column):
                    smoothed[:, c] = 0.0
                    continue
                plane[rows, cols] = column
                smoothed[:, c] = norm * ndimage.gaussian_filter(plane, corr_px, mode="constant")[rows, cols]
                plane[rows, cols] = 0.0
            index = np.ix_(where, where)
            jtj[index] += jac.T @ jac
            jrj[j][index] += jac.T @ smoothed
        del d_s0, d_logw, r
    try:
        inv = np.linalg.inv(jtj)
    except np.linalg.LinAlgError:
        return None
    # One noise variance per component (real and imaginary parts together): near a sharp wall the
    # lock-in of one component picks up the others' steps (their spectra reach its band), a misfit
    # that is largest in a component that does not jump and must not inflate the others' errors.
    middle = np.zeros_like(jtj)
    for j in range(k):
        dof = 2 * n - float(np.trace(inv @ jrj[j]))
        if not dof > 0:
            return None
        middle += rss[j] / dof * jrj[j]
    return inv @ middle @ inv


def _wrap(angle):
    """Angle wrapped to [-pi, pi)."""
    return np.remainder(angle + np.pi, 2 * np.pi) - np.pi


def _disc_fraction(mask, radius_px):
    """Fraction of True pixels within the disc {i^2 + j^2 <= r^2} around each pixel; outside the frame is False.

    The disc sum is an FFT convolution (cost independent of r) of integers, rounded
    back to integers, so it equals the direct sum exactly.
    """
    from scipy.signal import fftconvolve  # imported here: scipy.signal is slow to import

    r = int(radius_px)
    disc = (np.hypot(*np.mgrid[-r: r + 1, -r: r + 1]) <= r).astype(float)
    counts = np.rint(fftconvolve(mask.astype(float), disc, mode="same"))
    return counts / disc.sum()


def phase_defects(fields, *, pixel_size_nm, ordered, sigma_nm, min_ordered_fraction=None, amplitude_threshold=None,
                  loop_radius_nm=None):
    """Topological defects: phase windings of +-2 pi enclosed by a loop of significant order.

    Candidates are the 2 x 2 plaquettes whose four wrapped phase differences,
    walked counter-clockwise in the (x, y) plane (x along columns, y along rows),
    sum to +-2 pi. At a defect core the amplitude goes to zero (Mesaros et al.
    2011), so the core itself cannot be tested; the rule looks at a loop around
    it instead. A candidate counts only if

    1. every pixel of the closed loop of radius ``loop_radius_nm`` (a circle in
       nm, default 2 sigma) around the plaquette centre lies in the frame, is
       ``ordered``, has a finite field and, when ``amplitude_threshold`` is given,
       |field| >= ``amplitude_threshold`` on every loop pixel and on the straight
       segments joining their values (a sign flip of the order between two loop
       pixels, a pi phase slip, passes through zero there);
    2. the phase winds along that loop, (1/2 pi) sum of the wrapped differences
       between successive loop pixels, by a nonzero integer of the candidate's sign
       (a noise-made +-1 pair inside the loop cancels and is not counted);
    3. with ``min_ordered_fraction`` given, at least that fraction of the pixels
       within the loop radius is ordered (the pre-loop rule; off by default).

    Accepted candidates of one component and one sign closer than the loop radius
    to each other are one defect (a core split by noise into several plaquettes),
    reported at their mean position with the winding of the loop around the member
    nearest that mean; two like-signed defects closer than the loop radius are
    therefore reported as one of winding +-2. A scene without phase windings, or
    with windings only where the order is not significant, gives no defect.

    Parameters
    ----------
    fields : (k, row, col) or (row, col) complex ndarray
        Lock-in fields (one defect list per component).
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    ordered : (row, col) or (k, row, col) bool
        Where order is present (e.g. amplitude above the noise floor), for all
        components or one mask per component. A mask shared by several
        components (order of any kind present) does not say that a given
        component is significant: pass ``amplitude_threshold`` (or per-component
        masks), or windings of an absent component's noise are counted.
    sigma_nm : float
        Lock-in width, nm.
    min_ordered_fraction : float, optional
        Extra rule: fraction of ordered pixels needed within the loop radius.
    amplitude_threshold : float or sequence of float, optional
        Smallest |field| allowed on the loop, in the units of |fields| (one value,
        or one per component), e.g. a multiple of the lock-in noise floor.
    loop_radius_nm : float, optional
        Radius of the test loop; by default 2 sigma (at least 1.5 pixels), where a
        defect's amplitude has recovered (the core is about sigma wide).

    Returns
    -------
    list of dict
        ``component``, ``winding`` (+-1, or +-2... when unresolved), ``x_nm``,
        ``y_nm``, ``row``, ``col``, ``loop_radius_nm``, ``loop_min_amplitude``
        (smallest |field| on the loop).

    References
    ----------
    .. [1] A. Mesaros et al., "Topological defects coupling smectic modulations
       to intra-unit-cell nematicity in cuprates", Science 333, 426 (2011).
       doi:10.1126/science.1201082

    Examples
    --------
    >>> y, x = np.mgrid[:41, :41] * 0.1
    >>> vortex = np.exp(1j * np.arctan2(y - 2.05, x - 2.05))[None]
    >>> d = phase_defects(vortex, pixel_size_nm=0.1, ordered=np.ones((41, 41), bool), sigma_nm=0.3)
    >>> [(e["winding"], round(e["x_nm"], 2), round(e["y_nm"], 2)) for e in d]
    [(1, 2.05, 2.05)]
    >>> weak = 0.01 * vortex     # the same winding where the order is below a threshold of 0.1
    >>> phase_defects(weak, pixel_size_nm=0.1, ordered=np.ones((41, 41), bool), sigma_nm=0.3,
    ...               amplitude_threshold=0.1)
    []
    """
    dy, dx = pixel_size_pair(pixel_size_nm)
    fields = np.asarray(fields)
    if fields.ndim == 2:
        fields = fields[None]
    if fields.ndim != 3:
        raise InputError(f"fields must be (k, row, col) or (row, col), got shape {fields.shape}")
    ordered = np.asarray(ordered, dtype=bool)
    if ordered.shape == fields.shape[1:]:
        ordered = np.broadcast_to(ordered, fields.shape)
    elif ordered.shape != fields.shape:
        raise InputError(f"ordered shape {ordered.shape} differs from the fields' {fields.shape[1:]} (or {fields.shape})")
    radius_nm, thresholds, offsets = _loop_geometry(dy, dx, sigma_nm, loop_radius_nm, amplitude_threshold,
                                                    len(fields))
    n_rows, n_cols = fields.shape[1:]
    defects = []
    for j, f in enumerate(fields):
        phi = np.angle(f)
        # (r, c) -> (r, c+1) -> (r+1, c+1) -> (r+1, c): +x, +y, -x, -y.
        plaquette = _plaquette_windings(phi)
        rows, cols = np.nonzero(plaquette)
        wind = plaquette[rows, cols]
        del plaquette
        good = np.isfinite(f) & ordered[j] & (np.abs(f) >= thresholds[j])
        fraction = None
        if min_ordered_fraction is not None:
            fraction = _disc_fraction(ordered[j], max(1, int(round(radius_nm / min(dy, dx)))))
        accepted = []
        chunk = max(256, 2_000_000 // len(offsets))   # candidates per pass: ~16 MB per (chunk, loop) array
        for start in range(0, rows.size, chunk):
            r, c, w = rows[start: start + chunk], cols[start: start + chunk], wind[start: start + chunk]
            # The plaquette centre is (r + 0.5, c + 0.5); the loop is drawn around it.
            lr = r[:, None] + offsets[:, 0]
            lc = c[:, None] + offsets[:, 1]
            inside = np.all((lr >= 0) & (lr < n_rows) & (lc >= 0) & (lc < n_cols), axis=1)
            lr, lc, r, c, w = lr[inside], lc[inside], r[inside], c[inside], w[inside]
            accepted.extend(zip(*_loop_test(f, phi, good, fraction, lr, lc, r, c, w, min_ordered_fraction,
                                             thresholds[j])))
        defects.extend(_merge_windings(accepted, j, radius_nm, dy, dx))
    return defects


def _loop_geometry(dy, dx, sigma_nm, loop_radius_nm, amplitude_threshold, k):
    """The test loop of :func:`phase_defects`: its radius in nm (default 2 sigma, at least 1.5 pixels), the
    amplitude threshold of each of the k components, and the loop's pixel offsets."""
    sigma_nm = positive(sigma_nm, "sigma_nm")
    radius_nm = 2 * sigma_nm if loop_radius_nm is None else positive(loop_radius_nm, "loop_radius_nm")
    radius_nm = max(radius_nm, 1.5 * max(dy, dx))
    thresholds = np.broadcast_to(np.asarray(-np.inf if amplitude_threshold is None else amplitude_threshold,
                                            dtype=float), (k,))
    return radius_nm, thresholds, _loop_offsets(radius_nm / dy, radius_nm / dx)


def _plaquette_windings(phi):
    """The winding (int8) of every plaquette (r, c) -> (r, c+1) -> (r+1, c+1) -> (r+1, c) of a phase map."""
    total = _wrap(phi[:-1, 1:] - phi[:-1, :-1]) + _wrap(phi[1:, 1:] - phi[:-1, 1:]) \
        + _wrap(phi[1:, :-1] - phi[1:, 1:]) + _wrap(phi[:-1, :-1] - phi[1:, :-1])
    return np.rint(np.nan_to_num(total) / (2 * np.pi)).astype(np.int8)


def _loop_test(f, phi, good, fraction, lr, lc, r, c, w, min_ordered_fraction, threshold):
    """The candidates of :func:`phase_defects` (plaquettes (r, c) of winding w, loop pixels lr, lc) whose loop
    passes rules 1 and 2 there: (rows, cols, loop windings, smallest |field| along the loop)."""
    ok = np.all(good[lr, lc], axis=1)
    if min_ordered_fraction is not None:
        ok &= (fraction[r, c] >= min_ordered_fraction) & (fraction[r + 1, c + 1] >= min_ordered_fraction)
    lr, lc, r, c, w = lr[ok], lc[ok], r[ok], c[ok], w[ok]
    # Between two loop pixels the field runs along the straight segment joining their values (it is
    # smooth on the scale sigma, many pixels): its smallest modulus there is the loop's between them.
    # A wall where the order flips sign (a pi phase slip) crosses the loop through |field| = 0
    # between pixels whose own amplitudes pass the threshold, and the noise then decides the sign of
    # each pi step: a line of +-1 "windings" along every such wall unless this is checked.
    z = f[lr, lc]
    step = np.roll(z, -1, axis=1) - z
    t = np.clip(-np.real(z * np.conj(step)) / np.maximum(np.abs(step) ** 2, np.finfo(float).tiny), 0.0, 1.0)
    segment_min = np.abs(z + t * step).min(axis=1)
    ok = segment_min >= threshold
    lr, lc, r, c, w, segment_min = lr[ok], lc[ok], r[ok], c[ok], w[ok], segment_min[ok]
    loop_phase = phi[lr, lc]
    loop_wind = np.rint(_wrap(np.roll(loop_phase, -1, axis=1) - loop_phase).sum(axis=1) / (2 * np.pi)).astype(int)
    keep = (loop_wind != 0) & (np.sign(loop_wind) == np.sign(w))
    return r[keep], c[keep], loop_wind[keep], segment_min[keep]


def _loop_offsets(radius_rows, radius_cols):
    """Integer (row, col) offsets from a plaquette's top-left pixel of a closed 8-connected loop.

    The loop follows the ellipse of semi-axes (radius_rows, radius_cols) pixels (a
    circle in nm) centred on the plaquette centre (+0.5, +0.5), counter-clockwise
    in (x, y); successive pixels are 8-neighbours and the four plaquette pixels
    lie inside.
    """
    steps = int(math.ceil(8 * math.pi * max(radius_rows, radius_cols))) + 8
    angle = np.linspace(0, 2 * np.pi, steps, endpoint=False)
    rr = np.floor(0.5 + radius_rows * np.sin(angle) + 0.5).astype(int)
    cc = np.floor(0.5 + radius_cols * np.cos(angle) + 0.5).astype(int)
    points = np.stack([rr, cc], axis=1)
    change = np.any(points != np.roll(points, 1, axis=0), axis=1)
    return points[change]


def _merge_windings(accepted, component, radius_nm, dy, dx):
    """One defect per group of like-signed accepted plaquettes closer than the loop radius."""
    if not accepted:
        return []
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    rows = np.array([a[0] for a in accepted], float) + 0.5
    cols = np.array([a[1] for a in accepted], float) + 0.5
    winding = np.array([a[2] for a in accepted])
    loop_min = np.array([a[3] for a in accepted], float)
    points = np.stack([rows * dy, cols * dx], axis=1)
    # Single linkage over the pairs closer than the radius and of one sign.
    pairs = cKDTree(points).query_pairs(radius_nm, output_type="ndarray")
    pairs = pairs[np.sign(winding[pairs[:, 0]]) == np.sign(winding[pairs[:, 1]])]
    size = len(accepted)
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(size, size))
    count, group = connected_components(graph, directed=False)
    members = np.bincount(group, minlength=count)
    mean_row = np.bincount(group, weights=rows, minlength=count) / members
    mean_col = np.bincount(group, weights=cols, minlength=count) / members
    low = np.full(count, np.inf)
    np.minimum.at(low, group, loop_min)
    # The member nearest its group's mean gives the group's loop winding.
    distance = np.hypot(rows - mean_row[group], cols - mean_col[group])
    by_group = np.lexsort((distance, group))
    first = by_group[np.r_[True, np.diff(group[by_group]) != 0]]
    central = np.empty(count, dtype=int)
    central[group[first]] = first
    defects = []
    for g in np.lexsort((mean_col, mean_row)):
        r, c = float(mean_row[g]), float(mean_col[g])
        defects.append({"component": component, "winding": int(winding[central[g]]),
                        "x_nm": c * dx, "y_nm": r * dy, "row": r, "col": c,
                        "loop_radius_nm": float(radius_nm), "loop_min_amplitude": float(low[g])})
    return defects


def __getattr__(name):
    # The chunk-by-chunk (dask) versions live in domains._chunkseg, imported on first use.
    if name in ("segment_states_chunked", "phase_defects_chunked"):
        from . import _chunkseg

        return getattr(_chunkseg, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
