"""Putting layer data tuples into a viewer: add a layer, or update the one of the same name in place."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import napari
    import napari.layers

# Properties refreshed when a layer is updated in place; visibility, opacity and the
# colour map stay as the user left them.
_UPDATED = ("scale", "translate", "metadata", "contrast_limits")


def put_layer(viewer: "napari.viewer.Viewer", data: Any, kwargs: dict, layer_type: str) -> "napari.layers.Layer":
    """Add ``(data, kwargs, layer_type)`` to ``viewer``, or update the layer of the same name and type.

    Points layers are replaced rather than updated, because their per-point
    colours and features must change together with their coordinates.

    Returns
    -------
    napari.layers.Layer
        The layer now holding the data.
    """
    import napari.layers

    kinds = {"image": napari.layers.Image, "labels": napari.layers.Labels, "points": napari.layers.Points}
    name = kwargs.get("name")
    if name is not None and name in viewer.layers:
        layer = viewer.layers[name]
        if isinstance(layer, kinds[layer_type]) and layer_type != "points" and layer.ndim == len(data.shape):
            layer.data = data
            for key in _UPDATED:
                if key in kwargs:
                    setattr(layer, key, kwargs[key])
            if layer_type == "image" and "contrast_limits" not in kwargs:
                layer.reset_contrast_limits()
            return layer
        viewer.layers.remove(layer)
    return getattr(viewer, f"add_{layer_type}")(data, **kwargs)
