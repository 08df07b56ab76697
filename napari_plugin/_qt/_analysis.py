"""The analysis dock widget: run the whole chain on a topograph layer and show domains, walls and defects."""

from __future__ import annotations

from typing import TYPE_CHECKING

from magicgui.widgets import ComboBox, Container, FloatSpinBox, Label, PushButton, Select

from .. import _widgets as model
from ._common import put_layer

if TYPE_CHECKING:
    import napari
    import napari.layers


class AnalysisWidget(Container):
    """Run :func:`domains.pipeline.analyze` on a topograph layer (and dI/dV map layers).

    The topograph and the maps come from image layers with a pixel size in nm
    (those opened by this plugin carry channel and bias in their metadata; only
    layers with a bias are offered as maps). The overrides are the order kind,
    the superlattice (e.g. "3x3") and sigma (0 = automatic). **Run** analyses in
    a worker thread, so the viewer stays responsive, then adds the domain
    labels, the walls, the defects (red +1, blue -1), the amplitude and phase
    maps and the drift magnitude over the topograph, and writes a short
    summary below the button.

    Parameters
    ----------
    napari_viewer : napari.viewer.Viewer
        Injected by napari.
    """

    def __init__(self, napari_viewer: "napari.viewer.Viewer"):
        from domains.pipeline import ORDER_KINDS

        self._viewer = napari_viewer
        self._topography = ComboBox(label="topograph", choices=self._topography_choices)
        self._maps = Select(label="dI/dV maps", choices=self._map_choices)
        self._order = ComboBox(label="order", choices=list(ORDER_KINDS), value="auto")
        self._superlattice = ComboBox(label="superlattice", choices=list(model.SUPERLATTICE_CHOICES), value="auto")
        self._sigma = FloatSpinBox(label="σ (nm, 0 = auto)", value=0.0, min=0.0, max=1e5, step=0.001)
        self._sigma.step = 0.05
        self._run_button = PushButton(text="Run")
        self._status = Label(value="")
        super().__init__(widgets=[self._topography, self._maps, self._order, self._superlattice, self._sigma,
                                  self._run_button, self._status])
        self._worker = None
        self._running_on: napari.layers.Image | None = None
        self.last_analysis = None
        self._run_button.changed.connect(self.run)
        self._topography.changed.connect(self._maps.reset_choices)
        self._viewer.layers.events.inserted.connect(self.reset_choices)
        self._viewer.layers.events.removed.connect(self.reset_choices)

    # ----------------------------------------------------------------- state for callers and tests

    @property
    def busy(self) -> bool:
        """True while an analysis runs."""
        return self._worker is not None

    @property
    def status(self) -> str:
        """The summary or the last message."""
        return str(self._status.value)

    def set_options(self, *, topography=None, maps=None, order=None, superlattice=None, sigma_nm=None) -> None:
        """Set the controls (layers or layer names); None leaves a control as it is."""
        self.reset_choices()
        if topography is not None:
            self._topography.value = self._viewer.layers[topography] if isinstance(topography, str) else topography
        if maps is not None:
            self._maps.value = [self._viewer.layers[m] if isinstance(m, str) else m for m in maps]
        if order is not None:
            self._order.value = order
        if superlattice is not None:
            self._superlattice.value = superlattice
        if sigma_nm is not None:
            self._sigma.value = float(sigma_nm)

    # ----------------------------------------------------------------- callbacks

    def _image_layers(self):
        import napari.layers

        return [layer for layer in self._viewer.layers
                if isinstance(layer, napari.layers.Image) and layer.ndim == 2 and not layer.rgb
                and (layer.metadata or {}).get(model.META_KEY, {}).get("kind", "scan") == "scan"]

    def _topography_choices(self, widget=None):
        return [(layer.name, layer) for layer in self._image_layers()]

    def _map_choices(self, widget=None):
        topo = self._topography.value if hasattr(self, "_topography") else None
        # A map is a layer with a bias that is not a topograph (raw or levelled): only dI/dV and current maps.
        return [(layer.name, layer) for layer in self._image_layers()
                if layer is not topo and layer.metadata.get(model.META_KEY, {}).get("bias_V") is not None
                and layer.metadata.get(model.META_KEY, {}).get("channel") != "topography"]

    def run(self, *_) -> None:
        """Start the analysis in a worker thread with the current choices."""
        from napari.qt.threading import create_worker

        from domains import InputError
        from domains.pipeline import analyze

        if self.busy:
            self._status.value = "An analysis is already running."
            return
        topo_layer = self._topography.value
        if topo_layer is None:
            self._status.value = "No topograph layer (a 2-D image with a pixel size in nm)."
            return
        try:
            topography = model.scan_from_layer(topo_layer, channel="topography")
            maps = [model.scan_from_layer(layer, channel="conductance") for layer in self._maps.value]
            config = model.analysis_config(order=self._order.value, superlattice=self._superlattice.value,
                                           sigma_nm=self._sigma.value)
        except InputError as err:
            self._status.value = f"Cannot run: {err}"
            return
        worker = create_worker(analyze, topography, maps=maps, config=config, progress=False, _start_thread=False)
        worker.returned.connect(self._on_result)
        worker.errored.connect(self._on_error)
        worker.finished.connect(self._on_finished)
        self._worker = worker
        self._running_on = topo_layer
        self._run_button.enabled = False
        self._status.value = f"Analysing {topo_layer.name}..."
        worker.start()

    def _on_finished(self, *_):
        self._worker = None
        self._run_button.enabled = True

    def _on_error(self, err):
        self._status.value = f"Analysis failed: {type(err).__name__}: {err}"

    def _on_result(self, analysis) -> None:
        """Show an :class:`domains.pipeline.Analysis` over the layer it was computed from."""
        self.show_analysis(analysis, self._running_on)

    def show_analysis(self, analysis, layer: "napari.layers.Image | None" = None) -> None:
        """Add the layers of ``analysis`` over ``layer`` and write its summary."""
        self.last_analysis = analysis
        source = layer.name if layer is not None else "analysis"
        translate = tuple(layer.translate[-2:]) if layer is not None else None
        for data, kwargs, kind in model.analysis_layer_data(analysis, source=source, translate=translate):
            put_layer(self._viewer, data, kwargs, kind)
        self._status.value = model.summary_text(analysis.summary)
