"""The napari plugin: manifest, readers, sample data, the two widgets in a real viewer, a screenshot, the example.

The ``domains`` core is the reference: a layer the plugin shows must hold what
the core returns for the same inputs.
"""

import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("PyQt6")
napari = pytest.importorskip("napari")

import domains  # noqa: E402
from domains.io import save_scan, write_bundle  # noqa: E402
from domains.pipeline import make_scene  # noqa: E402
from napari_plugin import _reader, _sample_data, _widgets  # noqa: E402
from domains._palette import DOMAIN_PALETTE, WALL_COLOUR, label_colours, rgba  # noqa: E402
from napari_plugin._qt import AnalysisWidget, DomainsTableWidget, LockinWidget  # noqa: E402

pytestmark = pytest.mark.gui

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "viewer_session.py"


@pytest.fixture(scope="module")
def cdw():
    return make_scene("cdw")


@pytest.fixture(scope="module")
def small_cdw():
    """A 256 x 256 CDW scene: the widgets' tests need its physics, not the full-size frame."""
    from domains.synth import cdw_scene

    return cdw_scene(shape=(256, 256), n_domains=3, rng=2)


def _add_scene(viewer, scene, title="CDW"):
    _add(viewer, _reader.scan_layer_data(scene.topography, name=f"{title} topography"))
    for scan in scene.maps:
        _add(viewer, _reader.scan_layer_data(scan, name=f"{title} dI/dV {scan.bias_V:+.2f} V"))


def _add(viewer, layer_data):
    data, kwargs, kind = layer_data
    return getattr(viewer, f"add_{kind}")(data, **kwargs)


def _canonical(q):
    """Each (qx, qy) flipped into the half-plane qy > 0 (or qy = 0, qx > 0), rows sorted by angle."""
    q = np.asarray(q, float).reshape(-1, 2).copy()
    flip = (q[:, 1] < 0) | ((q[:, 1] == 0) & (q[:, 0] < 0))
    q[flip] *= -1
    return q[np.argsort(np.arctan2(q[:, 1], q[:, 0]))]


# --------------------------------------------------------------------------- manifest


def test_manifest_is_valid_and_every_python_name_imports():
    import npe2
    from npe2.manifest.utils import import_python_name

    manifest = npe2.PluginManifest.from_distribution("cdw-domains")
    manifest.validate_imports()
    # validate_imports may stop at the first nested model; import each name as well.
    for command in manifest.contributions.commands:
        assert command.python_name, command.id
        assert callable(import_python_name(command.python_name)), command.python_name
    reader = manifest.contributions.readers[0]
    assert reader.accepts_directories
    assert {"*.npy", "*.npz", "*.tif", "*.tiff", "*.h5", "*.hdf5", "*.zarr", "*.txt", "*.csv"} <= set(
        reader.filename_patterns)
    assert {s.key for s in manifest.contributions.sample_data} == {"cdw", "stripes", "moire"}
    assert len(manifest.contributions.widgets) == 3  # derived: lock-in, analysis, domains table


# --------------------------------------------------------------------------- plain functions


def test_reader_reads_a_saved_scene_with_its_pixel_size(tmp_path, cdw):
    topo_path = save_scan(cdw.topography, tmp_path / "topography.npy")
    map_path = save_scan(cdw.maps[1], tmp_path / "map.npy")

    reader = _reader.get_reader(str(topo_path))
    assert callable(reader)
    [(data, kwargs, kind)] = reader(str(topo_path))
    assert kind == "image"
    np.testing.assert_array_equal(np.asarray(data), cdw.topography.data)
    assert kwargs["scale"] == pytest.approx(cdw.topography.pixel_size_nm)
    assert kwargs["units"] == ("nm", "nm") and kwargs["axis_labels"] == ("y", "x")
    assert "topography" in kwargs["name"]
    lo, hi = kwargs["contrast_limits"]
    assert np.nanmin(data) <= lo < hi <= np.nanmax(data)

    [(_, map_kwargs, _)] = _reader.get_reader([str(map_path)])([str(map_path)])
    assert map_kwargs["name"] == "map conductance +0.25 V"
    assert map_kwargs["metadata"]["domains"]["bias_V"] == pytest.approx(0.25)


def test_reader_declines_without_raising(tmp_path, caplog):
    bare = tmp_path / "bare.npy"
    np.save(bare, np.zeros((8, 8)))  # no sidecar: no pixel size
    (tmp_path / "notes.json").write_text("{not json")
    np.save(tmp_path / "notes.npy", np.zeros((8, 8)))  # a sidecar that is not JSON
    (tmp_path / "picture.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    for path in (bare, tmp_path / "notes.npy", tmp_path / "picture.png", tmp_path / "missing.npy", tmp_path,
                 [str(bare), str(bare)], 42, None):
        assert _reader.get_reader(path if not isinstance(path, Path) else str(path)) is None
    # The bare file is declined with the reason: its pixel size is missing (common practice, no source:
    # a reader that refuses says why).
    caplog.clear()
    from napari.utils.notifications import notification_manager

    before = len(notification_manager.records)
    with caplog.at_level("WARNING", logger="napari_plugin._reader"):
        assert _reader.get_reader(str(bare)) is None
    assert "bare.npy" in caplog.text and "pixel size is missing" in caplog.text and "bare.json" in caplog.text
    assert any("pixel size is missing" in str(n.message) for n in notification_manager.records[before:])


def test_reader_lays_out_a_grid_along_bias(tmp_path):
    energies = np.array([-0.2, -0.1, 0.0, 0.1])
    grid = domains.Scan(np.random.default_rng(0).normal(size=(4, 16, 16)), pixel_size_nm=0.1,
                        channel="conductance", energies_V=energies)
    path = save_scan(grid, tmp_path / "grid.npy")
    [(data, kwargs, kind)] = _reader.get_reader(str(path))(str(path))
    assert data.shape == (4, 16, 16)
    assert kwargs["axis_labels"] == ("bias", "y", "x")
    assert kwargs["scale"] == pytest.approx((0.1, 0.1, 0.1))
    assert kwargs["translate"] == pytest.approx((-0.2, 0.0, 0.0))
    assert kwargs["units"] == ("V", "nm", "nm")


def _write_small_bundle(folder, shape=(40, 48), pixel=(0.05, 0.04)):
    rng = np.random.default_rng(1)
    labels = np.zeros(shape, np.int32)
    labels[:, : shape[1] // 2 - 1] = 1
    labels[:, shape[1] // 2 + 1:] = 2
    walls = labels == 0
    ux, uy = rng.normal(size=shape).astype(np.float32), rng.normal(size=shape).astype(np.float32)
    attrs = {"pixel_size_nm": list(pixel)}
    maps = {
        "labels": (labels, {**attrs, "units": "label"}),
        "walls": (walls, {**attrs, "units": "bool"}),
        "amplitude/cdw_1": (rng.random(shape).astype(np.float32), {**attrs, "units": "nm"}),
        "phase/cdw_1": (rng.uniform(-math.pi, math.pi, shape).astype(np.float32), {**attrs, "units": "rad"}),
        "displacement/ux": (ux, {**attrs, "units": "nm"}),
        "displacement/uy": (uy, {**attrs, "units": "nm"}),
        "twist_deg": (np.full(shape, 1.1, np.float32), {**attrs, "units": "deg"}),
    }
    defects = [{"component": 0, "winding": 1, "x_nm": 0.4, "y_nm": 0.5, "row": 10, "col": 10},
               {"component": 1, "winding": -1, "x_nm": 1.2, "y_nm": 1.0, "row": 20, "col": 30}]
    summary = {"domains": {"count": 2}, "defects": {"count": 2, "positive": 1, "negative": 1, "list": defects}}
    path = write_bundle(folder, summary=summary, provenance={"command_line": "test"}, maps=maps,
                        tables={"domains": (["label"], [{"label": 1}, {"label": 2}])})
    return path, maps, defects


def test_bundle_reader_makes_maps_labels_walls_and_defects(tmp_path):
    path, maps, defects = _write_small_bundle(tmp_path / "result")
    assert _reader.get_reader(str(path)) is not None
    assert _reader.get_reader(str(path / "summary.json")) is not None
    layers = {kw["name"]: (data, kw, kind) for data, kw, kind in _reader.get_reader(str(path))(str(path))}
    suffix = ""
    # This bundle has neither a topograph map nor an input file or scene to make one from.
    assert set(layers) == {name + suffix for name in (
        "domains", "walls", "amp cdw_1", "phase cdw_1", "drift |u|", "twist angle", "defects", "domain ids")}
    for data, kwargs, kind in layers.values():
        assert kwargs["scale"] == pytest.approx((0.05, 0.04))
        assert kwargs["units"] == ("nm", "nm")
    data, kwargs, kind = layers["domains" + suffix]
    assert kind == "labels" and data.dtype == np.int32
    assert kwargs["metadata"]["domains"]["table"]["rows"] == [{"label": 1}, {"label": 2}]  # derived: the CSV
    np.testing.assert_array_equal(data, maps["labels"][0])
    _, ids_kwargs, _ = layers["domain ids" + suffix]
    assert sorted(ids_kwargs["features"]["domain"]) == [1, 2]  # derived: two domains, one id each
    data, kwargs, kind = layers["walls" + suffix]
    assert kind == "labels"
    np.testing.assert_array_equal(data.astype(bool), maps["walls"][0])
    data, kwargs, kind = layers["phase cdw_1" + suffix]
    assert kwargs["colormap"] == "twilight" and kwargs["contrast_limits"] == pytest.approx((-math.pi, math.pi))
    data, kwargs, kind = layers["drift |u|" + suffix]
    np.testing.assert_allclose(data, np.hypot(maps["displacement/ux"][0], maps["displacement/uy"][0]), rtol=1e-6)
    data, kwargs, kind = layers["defects" + suffix]
    assert kind == "points"
    np.testing.assert_allclose(data, [[0.5 / 0.05, 0.4 / 0.04], [1.0 / 0.05, 1.2 / 0.04]])
    colors = np.asarray(kwargs["face_color"])
    assert colors[0][0] > colors[0][2] and colors[1][2] > colors[1][0]  # +1 red, -1 blue

    # Large maps stay lazy, backed by the zarr store.
    lazy = _reader.read_bundle_layers(path, lazy_threshold_bytes=0)
    assert all(type(data).__module__.startswith("dask") for data, _, kind in lazy if kind != "points")


def test_bundle_with_electronic_types_gets_a_types_layer_in_the_report_colours(tmp_path):
    from domains import report

    path, maps, _ = _write_small_bundle(tmp_path / "plain")
    labels = maps["labels"][0]
    summary = {"electronic_types": {"types": [{"type": "A", "domains": [2]}, {"type": "B", "domains": [1]}]}}
    types = report.electronic_type_map(summary, maps["labels"])
    folder = write_bundle(tmp_path / "typed", summary=summary, provenance={"command_line": "test"},
                          maps={**maps, "electronic_types": types})
    layers = _reader.read_bundle_layers(folder)
    names = [kw["name"] for _, kw, _ in layers]
    # Order, bottom first: domains, then the types, then the walls (common practice, no source).
    assert names.index("domains") < names.index("electronic types") < names.index("walls")
    data, kwargs, kind = layers[names.index("electronic types")]
    assert kind == "labels" and kwargs["visible"] is False  # derived: present, hidden on open
    # derived: domain 2 is type A (1), domain 1 type B (2), walls and unassigned pixels 0
    np.testing.assert_array_equal(data, np.select([labels == 2, labels == 1], [1, 2], 0))
    assert list(kwargs["features"]["type"]) == ["A", "B"] and list(kwargs["features"]["index"]) == [1, 2]
    # The report's type figure colours the same map with the same function (domains.report.domain_figure).
    expected = label_colours(np.asarray(data))
    assert {k: kwargs["colormap"][k] for k in expected} == expected  # derived: one palette, one colouring
    assert len(set(expected.values())) == 2  # derived: the two types touch, so they differ


def test_sample_data_are_the_packages_synthetic_scenes(cdw):
    layers = _sample_data.cdw_scene()
    assert [kw["name"] for _, kw, _ in layers] == ["CDW topography", "CDW topography (levelled)", "CDW dI/dV -0.25 V",
                                                   "CDW dI/dV +0.25 V"]
    np.testing.assert_array_equal(layers[0][0], cdw.topography.data)
    assert layers[0][1]["scale"] == pytest.approx(cdw.topography.pixel_size_nm)
    stripes = _sample_data.stripe_scene()
    assert stripes[0][1]["name"] == "stripes topography"
    try:
        moire = _sample_data.moire_scene()
    except NotImplementedError as err:  # the core may not provide this scene yet
        assert "moire" in str(err)
    else:
        assert moire[0][1]["units"] == ("nm", "nm")


def test_spectrum_coordinates_are_wavevectors_in_rad_per_nm(cdw):
    topo = cdw.topography
    data, kwargs, kind = _widgets.spectrum_layer_data(topo.data, pixel_size_nm=topo.pixel_size_nm)
    ny, nx = topo.shape
    assert kwargs["scale"] == pytest.approx((2 * np.pi / (ny * topo.pixel_size_nm[0]),
                                             2 * np.pi / (nx * topo.pixel_size_nm[1])))
    assert kwargs["axis_labels"] == ("qy", "qx")
    # The truth's CDW wavevector, placed as a point and read back, lands on a spectral peak.
    q_true = np.asarray(cdw.truth["q_cdw_rad_per_nm"])
    points = _widgets.q_to_points(q_true, scale=kwargs["scale"], translate=kwargs["translate"])
    np.testing.assert_allclose(_widgets.points_to_q(points, scale=kwargs["scale"], translate=kwargs["translate"]),
                               q_true)
    median = np.median(data)
    for row, col in np.rint(points).astype(int):
        assert data[row - 1: row + 2, col - 1: col + 2].max() > median + 3  # 1000 x the median power


# --------------------------------------------------------------------------- widgets in a viewer


def test_lockin_widget_picks_q_on_the_spectrum_and_matches_the_core(make_napari_viewer, qtbot, small_cdw):
    cdw = small_cdw
    viewer = make_napari_viewer()
    spectrum_viewer = make_napari_viewer()
    _add_scene(viewer, cdw)
    widget = LockinWidget(viewer, spectrum_viewer=spectrum_viewer)
    viewer.window.add_dock_widget(widget, name="Lock-in")
    widget.reset_choices()
    widget._image.value = viewer.layers["CDW topography"]
    topo = cdw.topography
    pixel = topo.pixel_size_nm

    widget.show_spectrum()
    qtbot.waitUntil(lambda: not widget.busy, timeout=60000)
    spectrum = spectrum_viewer.layers["spectrum of CDW topography"]
    assert tuple(spectrum.axis_labels) == ("qy", "qx")
    np.testing.assert_allclose(spectrum.scale, 2 * np.pi / (np.array(topo.shape) * np.array(pixel)))
    assert "detected peaks (CDW topography)" in spectrum_viewer.layers
    # The default picks are the superlattice's: the scene's CDW wavevectors within a frequency bin.
    q_true = np.asarray(cdw.truth["q_cdw_rad_per_nm"])
    np.testing.assert_allclose(_canonical(widget.picked_q()), _canonical(q_true), atol=spectrum.scale[0])
    expected_sigma = _widgets.auto_sigma(widget.picked_q(), other_q=widget._other_q(), pixel_size_nm=pixel,
                                         shape=topo.shape)
    assert widget.sigma_nm == pytest.approx(expected_sigma, abs=1e-3)

    # Pick the first CDW wavevector exactly and demodulate.
    widget.set_q(q_true[:1])
    q = widget.picked_q()
    np.testing.assert_allclose(q, q_true[:1], atol=1e-9)
    widget.demodulate()
    amp_layer = viewer.layers["amplitude q1 (CDW topography)"]
    phase_layer = viewer.layers["phase q1 (CDW topography)"]
    assert amp_layer.data.shape == topo.shape
    np.testing.assert_allclose(amp_layer.scale, pixel)
    np.testing.assert_allclose(phase_layer.scale, pixel)
    assert phase_layer.colormap.name == "twilight"
    a = domains.lockin(topo.data, q[0], sigma_nm=widget.sigma_nm, pixel_size_nm=pixel, mask=topo.mask)
    np.testing.assert_allclose(amp_layer.data, domains.amplitude(a), rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(phase_layer.data, domains.phase(a), atol=1e-9)
    # The CDW amplitude is the scene's (about 2 x 0.012 nm ... up to the domain walls), not noise.
    assert np.nanmedian(amp_layer.data) > 0.005

    # A new sigma updates the layers in place.
    widget.sigma_nm = 0.8
    assert viewer.layers["amplitude q1 (CDW topography)"] is amp_layer
    a = domains.lockin(topo.data, q[0], sigma_nm=0.8, pixel_size_nm=pixel, mask=topo.mask)
    np.testing.assert_allclose(amp_layer.data, domains.amplitude(a), rtol=1e-6, atol=1e-9)
    assert amp_layer.metadata["domains"]["sigma_nm"] == pytest.approx(0.8)

    # Ticking "automatic" again brings back the automatic width, and the maps follow.
    widget._auto.value = True
    sigma = _widgets.auto_sigma(q, other_q=widget._other_q(), pixel_size_nm=pixel, shape=topo.shape)
    assert widget.sigma_nm == pytest.approx(sigma, abs=1e-3)
    a = domains.lockin(topo.data, q[0], sigma_nm=widget.sigma_nm, pixel_size_nm=pixel, mask=topo.mask)
    np.testing.assert_allclose(amp_layer.data, domains.amplitude(a), rtol=1e-6, atol=1e-9)
    widget.sigma_nm = 0.8

    # Two picks make two pairs of layers; going back to one removes the second pair.
    widget.set_q(q_true[:2])
    assert "amplitude q2 (CDW topography)" in viewer.layers
    widget.set_q(q_true[1:2])
    assert "amplitude q2 (CDW topography)" not in viewer.layers
    a = domains.lockin(topo.data, widget.picked_q()[0], sigma_nm=0.8, pixel_size_nm=pixel, mask=topo.mask)
    np.testing.assert_allclose(viewer.layers["amplitude q1 (CDW topography)"].data, domains.amplitude(a), rtol=1e-6,
                               atol=1e-9)


def _fake_analysis(scan):
    """An Analysis built from core pieces only, to test the display path without the full pipeline."""
    from domains.pipeline import Analysis, Config

    shape = scan.shape
    labels = np.ones(shape, np.int32)
    labels[:, shape[1] // 2:] = 2
    walls = np.zeros(shape, bool)
    walls[:, shape[1] // 2 - 1: shape[1] // 2 + 1] = True
    labels[walls] = 0
    attrs = {"pixel_size_nm": list(scan.pixel_size_nm)}
    q = np.array([[6.65, -2.69]])
    a = domains.lockin(scan.data, q[0], sigma_nm=0.5, pixel_size_nm=scan.pixel_size_nm)
    maps = {"labels": (labels, {**attrs, "units": "label"}), "walls": (walls, {**attrs, "units": "bool"}),
            "amplitude/cdw_1": (domains.amplitude(a).astype(np.float32), {**attrs, "units": "nm"}),
            "phase/cdw_1": (domains.phase(a).astype(np.float32), {**attrs, "units": "rad"})}
    summary = {"superlattice": {"order": "3x3"}, "domains": {"count": 2, "area_nm2_mean": 400.0},
               "defects": {"count": 1, "positive": 1, "negative": 0,
                           "list": [{"component": 0, "winding": 1, "x_nm": 3.0, "y_nm": 4.0}]},
               "sigma_nm": 0.5}
    return Analysis(Config(), summary, maps, {})


def test_analysis_widget_shows_an_analysis_over_its_layer(make_napari_viewer, small_cdw):
    cdw = small_cdw
    viewer = make_napari_viewer()
    _add_scene(viewer, cdw)
    widget = AnalysisWidget(viewer)
    viewer.window.add_dock_widget(widget, name="Domain analysis")
    widget.set_options(topography="CDW topography", maps=["CDW dI/dV -0.25 V", "CDW dI/dV +0.25 V"],
                       superlattice="3x3", sigma_nm=0.5)
    # Only layers with a bias are offered as maps, never the topograph itself.
    assert {layer.name for layer in widget._maps.choices} == {"CDW dI/dV -0.25 V", "CDW dI/dV +0.25 V"}
    # A levelled copy of the topograph has a bias too, but it is no dI/dV map (common practice, no source).
    from domains.level import level

    _add(viewer, _reader.scan_layer_data(level(cdw.topography, order=1, lines="difference", warn=False),
                                         name="CDW topography (levelled)"))
    widget.reset_choices()
    assert "CDW topography (levelled)" not in {layer.name for layer in widget._maps.choices}
    config = _widgets.analysis_config(order=widget._order.value, superlattice=widget._superlattice.value,
                                      sigma_nm=widget._sigma.value)
    assert (config.superlattice, config.sigma_nm) == ("3x3", 0.5)

    analysis = _fake_analysis(cdw.topography)
    widget.show_analysis(analysis, viewer.layers["CDW topography"])
    suffix = " (CDW topography)"
    for name, kind in (("domains", napari.layers.Labels), ("walls", napari.layers.Labels),
                       ("amp cdw_1", napari.layers.Image), ("phase cdw_1", napari.layers.Image),
                       ("defects", napari.layers.Points)):
        layer = viewer.layers[name + suffix]
        assert isinstance(layer, kind), name
        np.testing.assert_allclose(layer.scale, cdw.topography.pixel_size_nm)
    np.testing.assert_array_equal(viewer.layers["domains" + suffix].data, analysis.maps["labels"][0])
    assert "2 domains" in widget.status and "3x3" in widget.status

    # Bad overrides are reported, not raised.
    widget.set_options(order="none", superlattice="3x3")
    widget.run()
    assert not widget.busy and widget.status.startswith("Cannot run")


def test_analysis_widget_runs_the_pipeline_in_a_thread(make_napari_viewer, qtbot):
    from domains.pipeline import analyze
    from domains.synth import cdw_scene

    scene = cdw_scene(shape=(160, 160), n_domains=2, rng=3)
    viewer = make_napari_viewer()
    _add(viewer, _reader.scan_layer_data(scene.topography, name="small topography"))
    widget = AnalysisWidget(viewer)
    viewer.window.add_dock_widget(widget, name="Domain analysis")
    widget.set_options(topography="small topography")
    widget.run()
    assert widget.busy
    # The reference run of the core goes on while the widget's worker thread runs.
    reference = analyze(scene.topography, progress=False)
    qtbot.waitUntil(lambda: not widget.busy, timeout=120000)
    assert not widget.status.startswith("Analysis failed"), widget.status
    labels = viewer.layers["domains (small topography)"]
    np.testing.assert_array_equal(labels.data, reference.maps["labels"][0])
    np.testing.assert_allclose(labels.scale, scene.topography.pixel_size_nm)
    count = (reference.summary.get("domains") or {}).get("count", 0)
    assert f"{count} domains" in widget.status
    assert ("walls (small topography)" in viewer.layers) and widget.last_analysis is not None


def test_viewer_open_uses_the_reader(make_napari_viewer, tmp_path):
    path, _, _ = _write_small_bundle(tmp_path / "bundle")
    viewer = make_napari_viewer()
    added = viewer.open(str(path), plugin="cdw-domains")
    assert {layer.name for layer in added} >= {"domains", "walls", "defects"}
    assert isinstance(viewer.layers["defects"], napari.layers.Points)
    np.testing.assert_allclose(viewer.layers["domains"].scale, (0.05, 0.04))


def test_screenshot_of_the_cdw_scene_is_not_blank(make_napari_viewer, tmp_path):
    import imageio.v3 as iio

    # A fresh shown viewer: with Mesa's software OpenGL, removing several image layers
    # from a shown canvas and then drawing new ones can crash the process (in vispy's
    # glDrawArrays), so this test only adds layers.
    viewer = make_napari_viewer(show=True)
    for layer_data in _sample_data.cdw_scene():
        _add(viewer, layer_data)
    viewer.reset_view()
    shot = viewer.screenshot(canvas_only=True, flash=False)
    assert shot.ndim == 3 and shot.shape[2] == 4
    assert np.var(shot[..., :3].astype(float)) > 0
    iio.imwrite(tmp_path / "cdw_scene.png", shot)
    assert (tmp_path / "cdw_scene.png").stat().st_size > 0


# --------------------------------------------------------------------------- a bundle, ready on open


@pytest.fixture(scope="module")
def demo_bundle(tmp_path_factory):
    """The bundle of the built-in CDW demo (the whole pipeline: made once for this module)."""
    from domains.pipeline import run_demo

    report_path = run_demo(tmp_path_factory.mktemp("demo") / "b", scene="cdw", progress=False)
    return report_path.parent


def test_moire_sample_offers_no_topograph_as_a_map(make_napari_viewer):
    viewer = make_napari_viewer()
    try:
        layers = _sample_data.moire_scene()
    except NotImplementedError as err:  # the core may not provide this scene yet
        assert "moire" in str(err)
        return
    for layer_data in layers:
        _add(viewer, layer_data)
    widget = AnalysisWidget(viewer)
    widget.set_options(topography=layers[1][1]["name"])
    # derived: the moiré scene has topographs only (raw and levelled), so no dI/dV map to offer
    assert [layer.name for layer in widget._maps.choices] == []


def test_bundle_opens_ready_to_read_and_the_table_selects_domains(make_napari_viewer, qtbot, demo_bundle):
    import imageio.v3 as iio
    from qtpy.QtCore import Qt

    from domains.io import read_bundle

    bundle = read_bundle(demo_bundle)
    viewer = make_napari_viewer(show=True)
    viewer.open(str(demo_bundle), plugin="cdw-domains")
    names = [layer.name for layer in viewer.layers]
    # Order, bottom first (common practice, no source: the image under its overlays).
    assert names[0] == "topography"
    assert names.index("topography") < names.index("domains") < names.index("walls")
    assert names.index("walls") < names.index("defects")
    components = [key for key, _ in bundle.maps["amplitude"].members()]
    assert len(components) == 3  # derived: a 3x3 CDW of a triangular lattice has three wavevectors
    for c in components:
        assert f"amp {c}" in names and f"phase {c}" in names
        assert not viewer.layers[f"amp {c}"].visible and not viewer.layers[f"phase {c}"].visible
    for name in ("topography", "domains", "walls", "defects"):
        assert viewer.layers[name].visible, name
    # Short unique names without doubled words (common practice, no source).
    assert len(set(names)) == len(names)
    for name in names:
        words = name.split()
        assert len(words) == len(set(words)) and len(name) <= 16, name
    # The topograph is the scene's (levelled), on the maps' grid.
    topo = viewer.layers["topography"]
    assert topo.data.shape == bundle.maps["labels"].shape
    np.testing.assert_allclose(topo.scale, bundle.summary["input"]["pixel_size_nm"])
    # The domains: translucent, in the shared palette, neighbours distinct; walls black.
    domains_layer = viewer.layers["domains"]
    assert domains_layer.opacity <= 0.5  # common practice, no source: the topograph shows through
    labels = np.asarray(domains_layer.data)
    expected = label_colours(labels)
    for label, colour in expected.items():
        np.testing.assert_allclose(domains_layer.colormap.map(label), rgba(colour), atol=1e-6)  # derived: palette
    assert set(expected.values()) <= set(DOMAIN_PALETTE)
    np.testing.assert_allclose(viewer.layers["walls"].colormap.map(1), rgba(WALL_COLOUR), atol=1e-6)
    # The electronic types: between the domains and the walls, hidden, each domain's pixels of its type
    # in domain_contrast.csv (1 for A, ...), in the colours the report's type figure uses.
    assert names.index("domains") < names.index("electronic types") < names.index("walls")
    types_layer = viewer.layers["electronic types"]
    assert not types_layer.visible
    type_number = {row["type"]: n for n, row in enumerate(bundle.tables["types"], start=1)}
    type_map = np.asarray(types_layer.data)
    for row in bundle.tables["domain_contrast"]:
        assert np.all(type_map[labels == row["domain"]] == type_number[row["type"]])  # derived: the CSV
    assert np.all(type_map[labels == 0] == 0)  # derived: walls belong to no type
    for number, colour in label_colours(type_map).items():
        np.testing.assert_allclose(types_layer.colormap.map(number), rgba(colour), atol=1e-6)  # derived: palette

    # The lock-in widget shows the sigma of the analysis, not an automatic one.
    lockin = LockinWidget(viewer)
    viewer.window.add_dock_widget(lockin, name="Lock-in")
    lockin.reset_choices()
    assert lockin._image.value is topo
    # derived: summary.json sigma_nm, shown with the widget's 3 decimals
    assert lockin.sigma_nm == pytest.approx(bundle.summary["sigma_nm"], abs=5e-4)
    assert not lockin._auto.value

    # The domains table lists domains.csv; a click on a row shows that domain alone.
    table = DomainsTableWidget(viewer)
    dock = viewer.window.add_dock_widget(table, name="Domains table", area="right")
    qtbot.waitUntil(dock.isVisible, timeout=2000)
    rows = bundle.tables["domains"]
    assert table.table.rowCount() == len(rows)  # derived: one row per line of domains.csv
    header = [table.table.horizontalHeaderItem(j).text() for j in range(table.table.columnCount())]
    assert header == bundle.columns["domains"]
    viewer.reset_view()
    shot = viewer.screenshot(canvas_only=False, flash=False)
    iio.imwrite("/tmp/viewer.png", shot)
    assert np.var(shot[..., :3].astype(float)) > 0  # common practice, no source: not a blank picture
    row = len(rows) - 1
    item = table.table.item(row, 0)
    table.table.scrollToItem(item)
    qtbot.mouseClick(table.table.viewport(), Qt.MouseButton.LeftButton,
                     pos=table.table.visualItemRect(item).center())
    assert domains_layer.selected_label == rows[row]["domain"]  # derived: the clicked row's domain column
    assert domains_layer.show_selected_label


# --------------------------------------------------------------------------- the example


def test_example_session_runs_headless():
    env = {**os.environ, "DOMAINS_EXAMPLE_HEADLESS": "1"}
    done = subprocess.run([sys.executable, str(EXAMPLE)], env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "amplitude q1 (CDW topography)" in done.stdout


def test_example_session_says_so_when_napari_is_missing():
    code = ("import runpy, sys; sys.modules['napari'] = None; "
            f"runpy.run_path({str(EXAMPLE)!r}, run_name='__main__')")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60,
                          env={**os.environ, "DOMAINS_EXAMPLE_HEADLESS": "1"})
    assert done.returncode == 0, done.stderr[-2000:]
    assert "napari is not installed" in done.stdout


def test_maps_on_a_decimated_grid_keep_ids_and_defects_on_the_input_grid(tmp_path):
    # The analysis writes amplitude, phase and drift on decimated grids (their own pixel_size_nm) and labels
    # on the input grid; domain ids and defects are in input pixels, so they take the labels' scale.
    shape, pixel, step = (40, 48), (0.05, 0.04), 4
    labels = np.zeros(shape, np.int32)
    labels[:, :23] = 1
    labels[:, 25:] = 2
    coarse = (shape[0] // step, shape[1] // step)
    coarse_attrs = {"pixel_size_nm": [pixel[0] * step, pixel[1] * step]}
    maps = {  # "amplitude" first: the reader must not take the first map's grid for the whole bundle
        "amplitude/cdw_1": (np.ones(coarse, np.float32), {**coarse_attrs, "units": "nm"}),
        "labels": (labels, {"pixel_size_nm": list(pixel), "units": "label"}),
        "walls": (labels == 0, {"pixel_size_nm": list(pixel), "units": "bool"}),
    }
    defects = [{"component": 0, "winding": 1, "x_nm": 0.4, "y_nm": 0.5, "row": 10, "col": 10}]
    summary = {"domains": {"count": 2}, "defects": {"count": 1, "positive": 1, "negative": 0, "list": defects}}
    path = write_bundle(tmp_path / "b", summary=summary, provenance={"command_line": "test"}, maps=maps, tables={})
    layers = {kw["name"]: (data, kw, kind) for data, kw, kind in _reader.read_bundle_layers(path)}
    assert layers["amp cdw_1"][1]["scale"] == pytest.approx((0.2, 0.16))  # derived: step x pixel
    for name in ("domains", "domain ids", "defects"):
        assert layers[name][1]["scale"] == pytest.approx(pixel), name  # derived: the input grid
    ids, _, _ = layers["domain ids"]
    # derived: each id lies inside its own domain (columns 0-22 and 25-47 in input pixels)
    cols = dict(zip(layers["domain ids"][1]["features"]["domain"], ids[:, 1]))
    assert cols[1] < 23 and cols[2] >= 25
