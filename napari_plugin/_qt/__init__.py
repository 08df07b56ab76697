"""The dock widgets (magicgui containers on Qt); what they compute lives in :mod:`napari_plugin._widgets`."""

from ._analysis import AnalysisWidget
from ._lockin import LockinWidget
from ._table import DomainsTableWidget

__all__ = ["AnalysisWidget", "DomainsTableWidget", "LockinWidget"]
