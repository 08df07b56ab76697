"""The domains table dock widget: the rows of ``domains.csv``; clicking a row shows that domain alone."""

from __future__ import annotations

from typing import TYPE_CHECKING

from qtpy.QtWidgets import QCheckBox, QComboBox, QLabel, QTableWidget, QTableWidgetItem, QVBoxLayout, QWidget

from domains.report import format_cell

from .._reader import META_KEY

if TYPE_CHECKING:
    import napari
    import napari.layers

__all__ = ["DomainsTableWidget"]


class DomainsTableWidget(QWidget):
    """A table of the domains of a labels layer opened from a bundle (or made by the analysis widget).

    The table is the layer's ``metadata["domains"]["table"]`` (the rows of
    ``domains.csv``). Clicking a row selects its domain in the labels layer
    (``selected_label``) and shows it alone (``show_selected_label``); untick
    *only the selected domain* to see all domains again.

    Parameters
    ----------
    napari_viewer : napari.viewer.Viewer
        Injected by napari.
    """

    def __init__(self, napari_viewer: "napari.viewer.Viewer"):
        super().__init__()
        self._viewer = napari_viewer
        self._layers = QComboBox()
        self._only = QCheckBox("only the selected domain")
        self._only.setChecked(True)
        self._table = QTableWidget()
        self._table.setEditTriggers(QTableWidget.EditTrigger.NoEditTriggers)
        self._table.setSelectionBehavior(QTableWidget.SelectionBehavior.SelectRows)
        self._table.setSelectionMode(QTableWidget.SelectionMode.SingleSelection)
        self._table.setMinimumHeight(160)
        self._status = QLabel("")
        layout = QVBoxLayout(self)
        for widget in (self._layers, self._only, self._table, self._status):
            layout.addWidget(widget)
        self._rows: list[dict] = []
        self._table.cellClicked.connect(lambda row, _col: self.select_row(row))
        self._layers.currentIndexChanged.connect(lambda *_: self.refresh_table())
        self._only.toggled.connect(self._on_only_toggled)
        self._viewer.layers.events.inserted.connect(self.refresh_layers)
        self._viewer.layers.events.removed.connect(self.refresh_layers)
        self.refresh_layers()

    # ----------------------------------------------------------------- state for callers and tests

    @property
    def layer(self) -> "napari.layers.Labels | None":
        """The labels layer whose domains are listed."""
        name = self._layers.currentText()
        return self._viewer.layers[name] if name and name in self._viewer.layers else None

    @property
    def table(self) -> QTableWidget:
        return self._table

    @property
    def status(self) -> str:
        return self._status.text()

    # ----------------------------------------------------------------- callbacks

    def _candidates(self):
        import napari.layers

        return [layer for layer in self._viewer.layers if isinstance(layer, napari.layers.Labels)
                and ((layer.metadata or {}).get(META_KEY) or {}).get("table")]

    def refresh_layers(self, *_) -> None:
        """Offer every labels layer that carries a domains table; the newest is chosen."""
        names = [layer.name for layer in self._candidates()]
        current = self._layers.currentText()
        self._layers.blockSignals(True)
        self._layers.clear()
        self._layers.addItems(names)
        if names:
            self._layers.setCurrentText(current if current in names else names[-1])
        self._layers.blockSignals(False)
        self.refresh_table()

    def refresh_table(self) -> None:
        """Fill the table from the chosen layer's ``domains.csv`` rows."""
        layer = self.layer
        table = ((layer.metadata or {}).get(META_KEY) or {}).get("table") if layer is not None else None
        self._table.clear()
        if not table:
            self._rows = []
            self._table.setRowCount(0)
            self._table.setColumnCount(0)
            self._status.setText("Open a result bundle (or run the analysis) to list its domains.")
            return
        columns = list(table.get("columns") or (list(table["rows"][0]) if table.get("rows") else []))
        self._rows = list(table.get("rows") or [])
        self._table.setColumnCount(len(columns))
        self._table.setHorizontalHeaderLabels(columns)
        self._table.setRowCount(len(self._rows))
        for i, row in enumerate(self._rows):
            for j, column in enumerate(columns):
                self._table.setItem(i, j, QTableWidgetItem(format_cell(row.get(column))))
        self._table.resizeColumnsToContents()
        self._status.setText(f"{len(self._rows)} domains in layer '{layer.name}'; click a row to show one.")

    def select_row(self, row: int) -> None:
        """Select the domain of table row ``row`` in the labels layer."""
        layer = self.layer
        if layer is None or not 0 <= row < len(self._rows):
            return
        domain = self._rows[row].get("domain")
        if domain is None:
            self._status.setText("This table has no 'domain' column.")
            return
        layer.selected_label = int(domain)
        layer.show_selected_label = self._only.isChecked()
        self._table.selectRow(row)
        self._viewer.layers.selection.active = layer
        self._status.setText(f"Domain {int(domain)} selected in layer '{layer.name}'.")

    def _on_only_toggled(self, checked: bool) -> None:
        layer = self.layer
        if layer is not None:
            layer.show_selected_label = bool(checked) and bool(self._table.selectedItems())

