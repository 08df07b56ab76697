"""napari plugin of cdw-domains: readers, synthetic sample scenes and dock widgets over the ``domains`` core.

The plugin computes nothing itself: it turns what ``domains`` returns into
layers with physical scale (nm, rad/nm) and lets a user pick wavevectors, tune
the lock-in width and run the analysis. Importing this package imports neither
napari nor Qt; the dock widgets (``LockinWidget``, ``AnalysisWidget``,
``DomainsTableWidget``) load them
when first used.
"""

from ._reader import get_reader, read_bundle_layers, read_scan_layers, scan_layer_data
from ._sample_data import cdw_scene, moire_scene, stripe_scene
from ._widgets import analysis_layer_data, lockin_layer_data, spectrum_layer_data

__all__ = [
    "AnalysisWidget",
    "DomainsTableWidget",
    "LockinWidget",
    "analysis_layer_data",
    "cdw_scene",
    "get_reader",
    "lockin_layer_data",
    "moire_scene",
    "read_bundle_layers",
    "read_scan_layers",
    "scan_layer_data",
    "spectrum_layer_data",
    "stripe_scene",
]


def __getattr__(name):
    # The widgets need Qt; import them only when asked for.
    if name in ("AnalysisWidget", "DomainsTableWidget", "LockinWidget"):
        from . import _qt

        return getattr(_qt, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
