"""The lock-in dock widget: pick wavevectors on the power spectrum, tune sigma, watch amplitude and phase.

The spectrum lives in its own viewer (world axes qy, qx in rad/nm): placed in
the main viewer it would share world coordinates with the real-space layers
(nm), and napari would then drop the units of every layer.
"""

from __future__ import annotations

import weakref
from typing import TYPE_CHECKING

import numpy as np
from magicgui.widgets import CheckBox, ComboBox, Container, FloatSpinBox, Label, PushButton

from .. import _widgets as model
from ._common import put_layer

if TYPE_CHECKING:
    import napari
    import napari.layers

#: Markers of the picked wavevectors: green, so they stand out from the
#: role colours of the detected peaks.
_PICK_COLOR = "#33ff4d"


def _close_viewer(ref):
    viewer = ref()
    if viewer is not None:
        try:
            viewer.close()
        except RuntimeError:  # its Qt window is already gone
            pass


class LockinWidget(Container):
    """Spatial lock-in at wavevectors picked on the power spectrum of an image layer.

    - **Show spectrum**: the log10 power spectrum of the chosen image in rad/nm,
      in a spectrum viewer, with the peaks found by
      :func:`domains.fourier.analyze_spectrum` (rings coloured by role) and an
      editable points layer ``q picks`` holding the wavevectors to demodulate
      (at first the superlattice's, or the moiré's). Click to add a q, select
      and delete to remove one, drag to move it.
    - **σ (nm)**: lock-in width; with *automatic* ticked it follows
      :func:`domains.choose_sigma` for the picked q and the detected peaks.
      Choosing a layer of an analysis (e.g. a bundle's topograph) sets the σ
      that analysis used and unticks *automatic*.
    - **Demodulate**: ``domains.lockin`` at each picked q; adds or updates the
      layers ``amplitude qj (<image>)`` (2|A|) and ``phase qj (<image>)``
      (arg A) over the image, with its pixel size. Once made, they follow
      every change of sigma or of the picks.

    Parameters
    ----------
    napari_viewer : napari.viewer.Viewer
        The viewer holding the real-space layers (injected by napari).
    spectrum_viewer : napari.viewer.Viewer, optional
        Where to show the spectrum; by default a second viewer is opened on
        the first "Show spectrum" and closed with this widget.
    """

    def __init__(self, napari_viewer: "napari.viewer.Viewer", spectrum_viewer: "napari.viewer.Viewer | None" = None):
        self._viewer = napari_viewer
        self._spectrum_viewer = spectrum_viewer
        self._image = ComboBox(label="image", choices=self._image_choices)
        self._show_button = PushButton(text="Show spectrum")
        # step 0.001 first: magicgui derives the number of decimals from the step.
        self._sigma = FloatSpinBox(label="σ (nm)", value=1.0, min=0.001, max=1e5, step=0.001)
        self._sigma.step = 0.05
        self._auto = CheckBox(text="automatic σ", value=True)
        self._demod_button = PushButton(text="Demodulate")
        self._status = Label(value="Choose an image, then Show spectrum.")
        super().__init__(widgets=[self._image, self._show_button, self._sigma, self._auto, self._demod_button,
                                  self._status])
        self._source: napari.layers.Image | None = None
        self._spectrum: napari.layers.Image | None = None
        self._picks: napari.layers.Points | None = None
        self._result = None
        self._worker = None
        self._made: list[str] = []
        self._setting_sigma = False
        self._show_button.changed.connect(self.show_spectrum)
        self._demod_button.changed.connect(self.demodulate)
        self._sigma.changed.connect(self._on_sigma_changed)
        self._auto.changed.connect(self._on_auto_changed)
        self._image.changed.connect(self._on_image_changed)
        self._on_image_changed(self._image.value)
        # napari connects reset_choices for docked widgets; this covers undocked use too.
        self._viewer.layers.events.inserted.connect(self.reset_choices)
        self._viewer.layers.events.removed.connect(self.reset_choices)

    # ----------------------------------------------------------------- state for callers and tests

    @property
    def busy(self) -> bool:
        """True while the peak search runs in its thread."""
        return self._worker is not None

    @property
    def sigma_nm(self) -> float:
        """The lock-in width in nm."""
        return float(self._sigma.value)

    @sigma_nm.setter
    def sigma_nm(self, value: float):
        self._auto.value = False
        self._sigma.value = float(value)

    @property
    def status(self) -> str:
        """The text of the status line."""
        return str(self._status.value)

    @property
    def spectrum_viewer(self) -> "napari.viewer.Viewer | None":
        return self._spectrum_viewer

    @property
    def spectrum_result(self):
        """The :class:`domains.fourier.SpectrumResult` of the last peak search, or None."""
        return self._result

    def picked_q(self) -> np.ndarray:
        """The picked wavevectors (qx, qy) in rad/nm, shape (k, 2)."""
        if self._picks is None:
            return np.zeros((0, 2))
        return model.points_to_q(self._picks.data, scale=self._picks.scale, translate=self._picks.translate)

    def set_q(self, q) -> None:
        """Replace the picked wavevectors by ``q`` ((k, 2), (qx, qy) in rad/nm); needs a shown spectrum."""
        if self._picks is None:
            raise RuntimeError("Show the spectrum first: the picks live on it")
        # The data event of the points layer updates sigma and the maps (see _on_picks_data).
        self._picks.data = model.q_to_points(q, scale=self._picks.scale, translate=self._picks.translate)
        self._picks.face_color = _PICK_COLOR

    # ----------------------------------------------------------------- callbacks

    def _image_choices(self, widget=None):
        import napari.layers

        return [(layer.name, layer) for layer in self._viewer.layers
                if isinstance(layer, napari.layers.Image) and layer.ndim == 2 and not layer.rgb
                and (layer.metadata or {}).get(model.META_KEY, {}).get("kind") not in ("lockin",)]

    def _on_image_changed(self, layer=None) -> None:
        """An image from an analysis (a bundle) brings the σ that analysis used, with "automatic" unticked."""
        meta = (getattr(layer, "metadata", None) or {}).get(model.META_KEY) or {}
        sigma = meta.get("analysis_sigma_nm")
        if sigma is None or self._made:
            return
        self._setting_sigma = True
        try:
            self._auto.value = False
            self._sigma.value = float(sigma)
        finally:
            self._setting_sigma = False
        self._status.value = f"σ = {float(sigma):.3g} nm, as in the analysis of {layer.name}; Show spectrum next."

    def _ensure_spectrum_viewer(self) -> "napari.viewer.Viewer":
        if self._spectrum_viewer is None:
            import napari

            show = bool(self.native.window().isVisible())
            self._spectrum_viewer = napari.Viewer(title="cdw-domains: spectrum (rad/nm)", show=show)
            # Close the spectrum window with this widget; the callback holds no reference to self.
            self.native.destroyed.connect(lambda *_, ref=weakref.ref(self._spectrum_viewer): _close_viewer(ref))
        return self._spectrum_viewer

    def show_spectrum(self, *_) -> None:
        """Show the log power spectrum of the chosen image and start the peak search in a thread."""
        from domains import InputError

        layer = self._image.value
        if layer is None:
            self._status.value = "No 2-D image layer to transform."
            return
        try:
            pixel = model.layer_pixel_size(layer)
            image = np.asarray(layer.data)
            mask = (layer.metadata or {}).get(model.META_KEY, {}).get("mask")
            data, kwargs, kind = model.spectrum_layer_data(image, pixel_size_nm=pixel, mask=mask,
                                                           name=f"spectrum of {layer.name}")
        except InputError as err:
            self._status.value = f"Cannot transform: {err}"
            return
        viewer = self._ensure_spectrum_viewer()
        if self._source is not layer:
            self._clear_spectrum_layers()
        self._source = layer
        self._spectrum = put_layer(viewer, data, kwargs, kind)
        if self._picks is None or self._picks not in viewer.layers:
            self._picks = viewer.add_points(
                np.zeros((0, 2)), ndim=2, name=f"q picks ({layer.name})", scale=kwargs["scale"],
                translate=kwargs["translate"], units=kwargs["units"], axis_labels=kwargs["axis_labels"],
                face_color=_PICK_COLOR, border_color="black", size=6.0, symbol="cross",
                metadata={model.META_KEY: {"kind": "q_picks"}},
            )
            self._picks.current_face_color = _PICK_COLOR
            self._picks.events.data.connect(self._on_picks_data)
        viewer.reset_view()
        self._status.value = "Searching for peaks..."
        self._start_peak_search(image, pixel, mask)

    def _start_peak_search(self, image, pixel, mask):
        from napari.qt.threading import create_worker

        from domains.pipeline import index_image

        # The core's own indexing (drift-corrected, commensurability by phase flatness), so the
        # picks are the wavevectors the full analysis would use.
        worker = create_worker(index_image, image, pixel_size_nm=pixel, mask=mask, _start_thread=False)
        worker.returned.connect(self._on_peaks)
        worker.errored.connect(self._on_peak_error)
        worker.finished.connect(self._on_worker_finished)
        self._worker = worker
        worker.start()

    def _on_worker_finished(self, *_):
        self._worker = None

    def _on_peak_error(self, err):
        self._status.value = f"Peak search failed: {err}. Pick q by clicking on the spectrum."

    def _on_peaks(self, result) -> None:
        self._result = result
        if self._spectrum is None or self._spectrum_viewer is None:
            return
        data, kwargs, kind = model.peaks_layer_data(result, scale=self._spectrum.scale,
                                                    translate=self._spectrum.translate,
                                                    name=f"detected peaks ({self._source.name})")
        put_layer(self._spectrum_viewer, data, kwargs, kind)
        # The picks stay on top, so clicks land on them.
        layers = self._spectrum_viewer.layers
        layers.move(layers.index(self._picks), len(layers))
        layers.selection.active = self._picks
        if len(self._picks.data) == 0:
            q = model.default_q(result)
            if len(q):
                self.set_q(q)
        self._picks.mode = "add"
        order = result.superlattice.order if result.superlattice is not None else None
        lattice = result.lattice.kind if result.lattice is not None else "no lattice"
        self._status.value = (f"{len(result.peaks)} peaks: {lattice}, order {order or 'none'}; "
                              f"{len(self._picks.data)} q picked.")
        self._update_auto_sigma()

    def _on_picks_data(self, event=None) -> None:
        action = getattr(event, "action", None)
        if action is not None and str(action) not in ("added", "removed", "changed"):
            return  # mid-drag or about to change: wait for the final position
        self._picks_changed()

    def _picks_changed(self) -> None:
        self._update_auto_sigma()
        if self._made:
            self.demodulate()

    def _other_q(self) -> np.ndarray:
        if self._result is None:
            return np.zeros((0, 2))
        return np.array([p.q for p in self._result.peaks if p.role in model._NEIGHBOUR_ROLES]).reshape(-1, 2)

    def _update_auto_sigma(self) -> bool:
        """Set sigma by the automatic rule (if ticked); True if it changed. Does not demodulate."""
        q = self.picked_q()
        if not self._auto.value or not len(q) or self._source is None:
            return False
        try:
            sigma = model.auto_sigma(q, other_q=self._other_q(), pixel_size_nm=model.layer_pixel_size(self._source),
                                     shape=self._source.data.shape)
        except ValueError as err:
            self._status.value = f"No automatic σ: {err}"
            return False
        before = self.sigma_nm
        self._setting_sigma = True
        try:
            self._sigma.value = sigma
        finally:
            self._setting_sigma = False
        return self.sigma_nm != before

    def _on_sigma_changed(self, *_) -> None:
        if self._setting_sigma:
            return  # set by the automatic rule; whoever set it demodulates once
        self._auto.value = False  # a width typed by the user is kept
        if self._made:
            self.demodulate()

    def _on_auto_changed(self, value) -> None:
        if value and self._update_auto_sigma() and self._made:
            self.demodulate()

    def demodulate(self, *_) -> None:
        """Add or update amplitude and phase layers at every picked q, with the current sigma."""
        from domains import InputError

        layer = self._source or self._image.value
        q = self.picked_q()
        if layer is None or not len(q):
            self._status.value = "Pick at least one q on the spectrum first."
            return
        try:
            pixel = model.layer_pixel_size(layer)
            mask = (layer.metadata or {}).get(model.META_KEY, {}).get("mask")
            layers = model.lockin_layer_data(layer.data, q, sigma_nm=self.sigma_nm, pixel_size_nm=pixel, mask=mask,
                                             source=layer.name, translate=tuple(layer.translate[-2:]))
        except InputError as err:
            self._status.value = f"Lock-in failed: {err}"
            return
        names = []
        for data, kwargs, kind in layers:
            put_layer(self._viewer, data, kwargs, kind)
            names.append(kwargs["name"])
        for stale in set(self._made) - set(names):
            if stale in self._viewer.layers:
                self._viewer.layers.remove(stale)
        self._made = names
        periods = ", ".join(f"{2 * np.pi / np.hypot(*qj):.3g}" for qj in q)
        self._status.value = f"Demodulated {len(q)} q (periods {periods} nm) with σ = {self.sigma_nm:.3g} nm."

    def _clear_spectrum_layers(self) -> None:
        viewer = self._spectrum_viewer
        if viewer is None:
            return
        for layer in list(viewer.layers):
            if (layer.metadata or {}).get(model.META_KEY, {}).get("kind") in ("spectrum", "detected_peaks", "q_picks"):
                viewer.layers.remove(layer)
        self._picks = None
        self._spectrum = None
        self._result = None
        self._made = []
