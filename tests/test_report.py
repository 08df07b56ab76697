"""The report: domain ids and colours on the map, integer count ticks, human table cells, curves with units.

Every synthetic input is built here from arrays whose truth is known by construction.
"""

import re

import numpy as np
import pytest

from domains import report
from domains._palette import DEFECT_LABELS, DOMAIN_PALETTE, label_adjacency, label_colours


def _checkerboard_labels(n_rows=3, n_cols=4, cell=12, wall=True):
    """Rectangular domains 1..n_rows*n_cols in a grid of cells, with one-pixel walls (0) between them."""
    labels = np.zeros((n_rows * cell, n_cols * cell), np.int32)
    for i in range(n_rows):
        for j in range(n_cols):
            labels[i * cell:(i + 1) * cell, j * cell:(j + 1) * cell] = i * n_cols + j + 1
    if wall:
        labels[::cell, :] = 0
        labels[:, ::cell] = 0
        labels[0, :] = labels[1, :]  # the frame edge is not a wall
        labels[:, 0] = labels[:, 1]
    return labels


def test_adjacency_of_a_grid_of_cells_across_walls():
    labels = _checkerboard_labels()
    graph = label_adjacency(labels)
    # derived: cell (i, j) touches (i±1, j) and (i, j±1) across the one-pixel walls; diagonal cells meet
    # only at a corner and count as neighbours only if the nearest-label fill makes them share an edge.
    for i in range(3):
        for j in range(4):
            me = i * 4 + j + 1
            for di, dj in ((1, 0), (-1, 0), (0, 1), (0, -1)):
                if 0 <= i + di < 3 and 0 <= j + dj < 4:
                    assert (i + di) * 4 + (j + dj) + 1 in graph[me]  # derived: edge-sharing cells
            far = [(i + 2) * 4 + j + 1] if i + 2 < 3 else []
            assert not set(far) & graph[me]  # derived: cells two rows apart never touch


def test_colouring_is_proper_for_every_pair_of_adjacent_labels():
    rng = np.random.default_rng(4)
    # A Voronoi map of 40 random seeds: domains of irregular shape with many neighbours each.
    seeds = rng.uniform(0, 120, size=(40, 2))
    rows, cols = np.mgrid[0:120, 0:120]
    distance = (rows[..., None] - seeds[:, 0]) ** 2 + (cols[..., None] - seeds[:, 1]) ** 2
    labels = np.argmin(distance, axis=-1).astype(np.int32) + 1
    colours = label_colours(labels)
    # Adjacency counted directly on the label image (no wall here): horizontal and vertical pixel pairs.
    pairs = set()
    for a, b in ((labels[:, :-1], labels[:, 1:]), (labels[:-1, :], labels[1:, :])):
        cut = a != b
        pairs |= {tuple(sorted(p)) for p in zip(a[cut].tolist(), b[cut].tolist())}
    assert len(pairs) > 40  # derived: a planar Voronoi map of 40 cells has more edges than cells
    for p, q in pairs:
        assert colours[p] != colours[q], (p, q)  # derived: a proper colouring of the adjacency graph
    assert set(colours.values()) <= set(DOMAIN_PALETTE)  # common practice, no source: one shared palette


def test_domain_figure_writes_one_id_per_domain_at_a_point_inside_it():
    labels = _checkerboard_labels()
    walls = labels == 0
    pixel = 0.1
    topo = np.sin(np.arange(labels.size).reshape(labels.shape) / 3.0)
    defects = [{"x_nm": 1.2, "y_nm": 1.2, "winding": 1}, {"x_nm": 2.4, "y_nm": 1.2, "winding": -1}]
    fig = report.domain_figure(topo, labels, walls, pixel_size_nm=pixel, defects=defects,
                               states={1: "3x3 m=(0,0)"}, as_figure=True)
    try:
        ax = fig.axes[0]
        ids = {t.get_text(): t.get_position() for t in ax.texts if (t.get_gid() or "").startswith("domain-id-")}
        # derived: twelve cells, labelled 1..12, one text each
        assert sorted(ids, key=int) == [str(v) for v in range(1, 13)]
        for text, (x, y) in ids.items():
            row, col = int(round(y / pixel)), int(round(x / pixel))
            assert labels[row, col] == int(text)  # derived: the id sits inside its own domain
        legend = [t.get_text() for t in ax.get_legend().get_texts()]
        assert "1: 3x3 m=(0,0)" in legend  # derived: the state name given for domain 1
        assert f"{DEFECT_LABELS[1]} (1)" in legend and f"{DEFECT_LABELS[-1]} (1)" in legend  # derived: one of each
        assert "wall" in legend  # derived: the map has walls
    finally:
        import matplotlib.pyplot as plt

        plt.close(fig)


def test_label_position_of_a_non_convex_domain_falls_inside_it():
    # An L-shaped domain: its centroid lies in the notch, outside the domain (derived: centroid of an L).
    labels = np.full((40, 40), 2, np.int32)
    labels[:, :10] = 1
    labels[30:, :] = 1
    x, y = report.domain_label_positions(labels, pixel_size_nm=1.0)[1]
    assert labels[int(round(y)), int(round(x))] == 1  # derived: the label is placed inside the L


def test_histogram_count_ticks_are_integers():
    import matplotlib.pyplot as plt

    for values in ([12.5, 30.1, 31.0], [1, 2, 2, 3, 3, 3]):
        fig = report.histogram_figure(values, xlabel="area (nm²)", title="t", as_figure=True)
        try:
            ax = fig.axes[0]
            fig.canvas.draw()
            ticks = ax.get_yticks()
            assert len(ticks) >= 2
            assert np.allclose(ticks, np.round(ticks))  # derived: a count is a whole number
            if all(float(v).is_integer() for v in values):
                xticks = ax.get_xticks()
                assert np.allclose(xticks, np.round(xticks))  # derived: the values themselves are counts
        finally:
            plt.close(fig)


def test_tables_use_human_words_and_one_value_per_cell():
    rows = [{"domain": 1, "touches_edge": True, "phase": [1.8, -1.6, -0.4], "width": None, "shift": -0.0},
            {"domain": 2, "touches_edge": False, "phase": "0.0;119.4;-119.8", "width": float("nan"), "shift": -1e-9}]
    page = report.html_table(["domain", "touches_edge", "phase", "width", "shift"], rows)
    cells = re.findall(r"<td>(.*?)</td>", page)
    # derived: the rows above, in words
    assert cells == ["1", "yes", "1.8, -1.6, -0.4", "–", "0", "2", "no", "0, 119.4, -119.8", "–", "-1e-09"]
    columns, split = report.split_list_columns(["domain", "phase"], rows)
    assert columns == ["domain", "phase_1", "phase_2", "phase_3"]  # derived: three components
    assert split[1]["phase_2"] == pytest.approx(119.4)  # derived: second packed value


def test_rendered_report_has_no_python_words_or_negative_zero(tmp_path):
    labels = _checkerboard_labels(2, 2)
    png = report.domain_figure(np.zeros(labels.shape), labels, labels == 0, pixel_size_nm=0.2)
    curves = [("domain 1", [-0.25, 0.25], [1.0, 1.0], [0.01, 0.01]),
              ("domain 2", [-0.25, 0.25], [1.005, 0.995], [0.01, 0.01])]
    (tmp_path / "figures").mkdir()
    (tmp_path / "figures" / "domains.png").write_bytes(png)
    (tmp_path / "figures" / "conductance.png").write_bytes(
        report.curves_figure(curves, xlabel="bias (V)", ylabel="mean conductance", units="nS", title="t"))
    summary = {"order_kind": "commensurate", "moire": None, "truth": {"flag": True, "other": False},
               "phases_deg": [0.0, -0.0, 120.0], "offset": -0.00001, "zero": -0.0}
    rows = [{"domain": 1, "touches_edge": True, "width_nm": None, "delta_phi_deg": "1.8;-1.6;-0.4", "x": -0.0}]
    page = report.render_html(title="test", summary=summary, parameters={"sigma_nm": None, "flag": False},
                              sections=[("Domains", [("domains", "Domains."), ("conductance", "Conductance."),
                                                     (None, report.html_table(list(rows[0]), rows))])],
                              headline={"domains": 4})
    (tmp_path / "report.html").write_text(page, encoding="utf-8")
    text = re.sub(r"<[^>]+>", " ", page)  # the words a reader sees
    for word in (r"\bNone\b", r"\bTrue\b", r"\bFalse\b", r"\bnan\b", r"-0\.0000", r"-0(?![.\d])"):
        assert not re.search(word, text), word  # common practice, no source: no Python words in a report
    assert "1.8;-1.6" not in text  # derived: packed cells are split for reading
    for name in re.findall(r"src='(figures/[^']+)'", page):
        assert (tmp_path / name).read_bytes()[:4] == b"\x89PNG"  # derived: every figure the page names exists


def test_curves_agreement_and_units():
    import matplotlib.pyplot as plt

    # derived: |1.00 - 1.01| = 0.01 < 2 * sqrt(0.01² + 0.01²) = 0.028, so the two curves agree
    same = [("a", [0.1, 0.2], [1.00, 2.0], [0.01, 0.02]), ("b", [0.1, 0.2], [1.01, 2.0], [0.01, 0.02])]
    assert not report.differs_within_errors(same)
    # derived: |1.00 - 1.10| = 0.1 > 0.028
    assert report.differs_within_errors(same + [("c", [0.1], [1.10], [0.01])])
    fig = report.curves_figure(same, xlabel="bias (V)", ylabel="mean conductance", units="nS", title="t",
                               as_figure=True)
    try:
        ax = fig.axes[0]
        assert ax.get_ylabel() == "mean conductance (nS)"  # derived: the units given
        assert any(t.get_gid() == "same-within-errors" for t in ax.texts)  # derived: the curves agree
    finally:
        plt.close(fig)


# --------------------------------------------------------------------------- figures from reduced arrays


def test_downsample_block_mean_matches_scikit_image_block_reduce():
    from skimage.measure import block_reduce

    rng = np.random.default_rng(1)
    image = rng.normal(size=(2048, 1536)).astype(np.float32)
    small, f = report.downsample(image, how="mean", max_px=1024)
    assert f == 2 and small.shape == (1024, 768)  # derived: ceil(2048 / 1024) = 2 on both axes
    assert small.dtype == np.float32  # common practice, no source: float32 kept
    # reference library: scikit-image block_reduce with the mean; float32 rounding of a 4-pixel sum
    np.testing.assert_allclose(small, block_reduce(image, (2, 2), np.mean), rtol=0, atol=1e-6)


def test_downsample_partial_blocks_and_nan():
    image = np.arange(25.0).reshape(5, 5)
    image[0, 0] = np.nan
    small, f = report.downsample(image, how="mean", max_px=2)
    assert f == 3 and small.shape == (2, 2)  # derived: ceil(5 / 2) = 3, two blocks per side
    # derived: block (0, 0) holds rows 0-2, cols 0-2 without the NaN; block (1, 1) holds rows 3-4, cols 3-4
    assert small[0, 0] == pytest.approx(np.mean([1, 2, 5, 6, 7, 10, 11, 12]))
    assert small[1, 1] == pytest.approx(np.mean([18, 19, 23, 24]))


def test_downsample_labels_take_the_block_mode():
    from scipy import stats

    rng = np.random.default_rng(2)
    labels = rng.integers(0, 4, size=(96, 96)).astype(np.int32)
    small, f = report.downsample(labels, how="mode", max_px=24)
    assert f == 4  # derived: 96 / 24
    blocks = labels.reshape(24, 4, 24, 4).transpose(0, 2, 1, 3).reshape(24, 24, 16)
    # reference library: scipy.stats.mode (ties go to the smallest value, as documented for ours)
    np.testing.assert_array_equal(small, stats.mode(blocks, axis=-1, keepdims=False).mode)


def test_downsample_keeps_one_pixel_walls_and_wraps_phases():
    walls = np.zeros((3000, 3000), bool)
    walls[np.arange(3000), np.arange(3000)] = True  # a one-pixel diagonal wall
    walls[:, 1777] = True  # a one-pixel vertical wall
    small, f = report.downsample(walls, how="max")
    assert f == 3 and small.shape == (1000, 1000)  # derived: ceil(3000 / 1024) = 3
    assert small[np.arange(1000), np.arange(1000)].all()  # derived: every block on the diagonal holds a wall pixel
    assert small[:, 1777 // 3].all()  # derived: the column of blocks holding column 1777
    # Phases near ±pi: a plain mean would give 0 (the opposite side of the circle), the circular mean ±pi.
    phase = np.where(np.indices((8, 8)).sum(axis=0) % 2 == 0, np.pi - 0.01, -np.pi + 0.01)
    small, _ = report.downsample(phase, how="phase", max_px=4)
    assert np.all(np.abs(np.abs(small) - np.pi) < 1e-6)  # derived: mean of exp(i(pi - e)) and exp(i(-pi + e))


def test_image_figures_draw_at_most_1024_pixels_on_the_physical_frame():
    import matplotlib.pyplot as plt

    shape, pixel = (2100, 1500), (0.02, 0.03)
    image = np.random.default_rng(3).normal(size=shape)
    labels = np.ones(shape, np.int32)
    labels[:, 700:] = 2
    walls = np.zeros(shape, bool)
    walls[:, 700] = True
    for fig in (report.image_figure(image, pixel_size_nm=pixel, title="t", as_figure=True),
                report.image_figure(image, pixel_size_nm=pixel, title="t", cmap="twilight", as_figure=True),
                report.domain_figure(image, labels, walls, pixel_size_nm=pixel, as_figure=True)):
        try:
            ax = fig.axes[0]
            for im in ax.get_images():
                assert max(im.get_array().shape[:2]) <= report.FIGURE_MAX_PX  # issue 10: reduced arrays
            # derived: x spans cols x 0.03 nm, y spans rows x 0.02 nm (y downwards)
            assert ax.get_xlim() == pytest.approx((0, 1500 * 0.03))
            assert ax.get_ylim() == pytest.approx((2100 * 0.02, 0))
        finally:
            plt.close(fig)


def test_split_column_names_keep_the_unit_last():
    rows = [{"type": "A", "domains": "1;4;6", "q_rad_per_nm": [[1.0, 2.0], [3.0, -4.0]], "shift_nm": [0.5, None]},
            {"type": "B", "domains": "2", "q_rad_per_nm": None, "shift_nm": None}]
    columns, split = report.split_list_columns(["type", "domains", "q_rad_per_nm", "shift_nm"], rows)
    # derived: three members at most, two wavevectors of two components, two shifts
    assert columns == ["type", "member_1", "member_2", "member_3", "q1_x_rad_per_nm", "q1_y_rad_per_nm",
                       "q2_x_rad_per_nm", "q2_y_rad_per_nm", "shift_1_nm", "shift_2_nm"]
    assert split[0]["q2_y_rad_per_nm"] == -4.0 and split[0]["member_3"] == 6  # derived: the rows above
    assert split[1]["member_1"] == 2 and split[1]["member_2"] is None  # derived: one member, then empty cells
    assert all(split[1][c] is None for c in columns[4:])  # derived: no wavevector, no shift in row 2


def test_conductance_figure_units_error_bars_and_caption_name_the_domains_that_differ():
    import matplotlib.pyplot as plt
    from matplotlib.container import ErrorbarContainer

    from domains import compare

    # Two equal halves; at -0.30 V domain 1 is 0.2 pA/V brighter than domain 2, at +0.30 V they are equal.
    labels = np.ones((128, 128), np.int32)
    labels[:, 64:] = 2
    rng = np.random.default_rng(5)
    maps = {-0.3: 1.0 + 0.2 * (labels == 1) + rng.normal(0, 0.02, labels.shape),
            0.3: 1.5 + rng.normal(0, 0.02, labels.shape)}
    contrast = compare.domain_electronic_contrast(maps, labels, pixel_size_nm=0.1, sigma_nm=0.4, units="pA/V",
                                                  normalisation="none")
    caption = report.conductance_caption(contrast)
    # derived: equal areas, so the contrasts to the frame are +0.1 and -0.1 pA/V at -0.30 V, 0 at +0.30 V
    assert "domain 1 brighter at −0.30 V by 0.1" in caption
    assert "domain 2 darker at −0.30 V by 0.1" in caption
    assert "+0.30 V" not in caption  # derived: the map at +0.30 V is the same in both domains
    fig = report.conductance_figure(contrast, as_figure=True)
    try:
        ax = fig.axes[0]
        assert ax.get_ylabel() == "contrast to the frame (pA/V)"  # derived: the maps' units given
        bars = [c for c in ax.containers if isinstance(c, ErrorbarContainer)]
        assert len(bars) == 2 and all(c.has_yerr for c in bars)  # derived: one series with error bars per domain
        assert not any(t.get_gid() == "no-difference" for t in ax.texts)  # derived: the domains differ
    finally:
        plt.close(fig)
    same = compare.domain_electronic_contrast({-0.3: 1.0 + rng.normal(0, 0.02, labels.shape)}, labels,
                                              pixel_size_nm=0.1, sigma_nm=0.4, units="nS", normalisation="none")
    # synthetic truth: no contrast; at alpha = 0.01 over 2 tests a false call has probability <= 0.01
    assert "No domain differs from the frame" in report.conductance_caption(same)
