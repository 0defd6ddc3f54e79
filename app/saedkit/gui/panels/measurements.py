"""MeasurementsPanel and MeasurementModel: the measurement table."""

from __future__ import annotations

import math

from typing import Any

from PySide6.QtCore import QAbstractTableModel, QModelIndex, QSortFilterProxyModel, Qt, Signal
from PySide6.QtGui import QKeySequence, QShortcut
from PySide6.QtWidgets import (
    QAbstractItemView,
    QApplication,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QTableView,
    QVBoxLayout,
)

from saedkit.gui._compat import emit

from saedkit.core.crystallography.crystal import format_indices

from saedkit.gui.panels._common import INDICES_ROLE, IndicesDelegate, _Panel, fmt_pm, fmt_sigma


class MeasurementModel(QAbstractTableModel):
    """The spots as measured about the centre (one SpotMeasurement per row)."""

    COLUMNS = ["#", "from", "x (px)", "y (px)", "R (px)", "d (Å)", "σd (Å)", "|g| (nm⁻¹)", "angle (°)",
               "hkl", "intensity", "S/N"]

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.rows: list = []
        self.four_index = False

    def set_rows(self, rows, *, four_index: bool = False) -> None:
        self.beginResetModel()
        self.rows = list(rows)
        self.four_index = four_index
        self.endResetModel()

    def shown_hkl(self, m):
        """The row's (hkl), as (hkil) for a hexagonal candidate; None when not indexed."""
        if m.hkl is None:
            return None
        if self.four_index:
            h, k, l = m.hkl
            return (h, k, -(h + k), l)
        return tuple(m.hkl)

    def rowCount(self, parent=QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else len(self.rows)

    def columnCount(self, parent=QModelIndex()) -> int:  # noqa: N802
        return 0 if parent.isValid() else len(self.COLUMNS)

    def headerData(self, section, orientation, role=Qt.ItemDataRole.DisplayRole):  # noqa: N802
        if role == Qt.ItemDataRole.DisplayRole and orientation == Qt.Orientation.Horizontal:
            return self.COLUMNS[section]
        return None

    def raw(self, m, col: int):
        """The sortable value of a cell."""
        return [m.index + 1, m.origin, m.x, m.y, m.radius_px, m.d_A, m.d_sigma_A, m.g_per_nm, m.angle_deg,
                "" if m.hkl is None else format_indices(self.shown_hkl(m)), m.intensity, m.snr][col]

    def text(self, m, col: int) -> str:
        v = self.raw(m, col)
        if col in (0,):
            return str(v)
        if col in (1, 9):
            return v or "—"
        if v is None or (isinstance(v, float) and not math.isfinite(v)):
            return "—"
        fmt = {2: ".2f", 3: ".2f", 4: ".2f", 5: ".4f", 6: ".4f", 7: ".3f", 8: ".1f", 10: ".4g", 11: ".1f"}[col]
        return f"{v:{fmt}}"

    def data(self, index, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid():
            return None
        m = self.rows[index.row()]
        col = index.column()
        if role == Qt.ItemDataRole.DisplayRole:
            return self.text(m, col)
        if role == INDICES_ROLE and col == 9:
            return self.shown_hkl(m)
        if role == Qt.ItemDataRole.UserRole:
            v = self.raw(m, col)
            if isinstance(v, float) and not math.isfinite(v):
                return float("inf")
            return v
        if role == Qt.ItemDataRole.TextAlignmentRole and col not in (1, 9):
            return int(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
        return None


class MeasurementsPanel(_Panel):
    """The measurement table (sortable; Ctrl+C copies the selected rows, or all, as tab-separated text)."""

    spot_selected = Signal(object)  # spot index or None

    def __init__(self, ctx, parent=None) -> None:
        super().__init__(ctx, parent)
        lay = QVBoxLayout(self)
        self.summary = QLabel("")
        self.summary.setWordWrap(True)
        lay.addWidget(self.summary)
        self.ruler = QLabel("")
        self.ruler.setWordWrap(True)
        self.ruler.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.ruler.setStyleSheet("color: #e6d65a;")
        lay.addWidget(self.ruler)
        self.model = MeasurementModel(self)
        self.proxy = QSortFilterProxyModel(self)
        self.proxy.setSourceModel(self.model)
        self.proxy.setSortRole(Qt.ItemDataRole.UserRole)
        self.view = QTableView()
        self.view.setModel(self.proxy)
        self.view.setSortingEnabled(True)
        self.view.sortByColumn(0, Qt.SortOrder.AscendingOrder)
        self.view.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.view.verticalHeader().setVisible(False)
        self.view.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.view.setAlternatingRowColors(True)
        self.view.setItemDelegateForColumn(9, IndicesDelegate("()", self.view))
        lay.addWidget(self.view, 1)
        row = QHBoxLayout()
        self.copy_button = QPushButton("Copy table")
        self.copy_button.setToolTip("Copy the whole table as tab-separated text (Ctrl+C in the table copies the "
                                    "selected rows, or all when none is selected)")
        row.addStretch(1)
        row.addWidget(self.copy_button)
        lay.addLayout(row)
        self.copy_button.clicked.connect(lambda: self.copy(selected_only=False))
        sc = QShortcut(QKeySequence(QKeySequence.StandardKey.Copy), self.view)
        sc.setContext(Qt.ShortcutContext.WidgetWithChildrenShortcut)
        sc.activated.connect(lambda: self.copy(selected_only=True))
        self.view.selectionModel().selectionChanged.connect(self._selection)

    def refresh(self) -> None:
        s = self.session
        if s is None:
            self.model.set_rows([])
            self.summary.setText("")
            return
        rows = s.measurements()
        cand = s.candidate
        self.model.set_rows(rows, four_index=cand is not None and cand.zone_four_index is not None)
        k, sk, _, source = s.camera_constant
        if source == "calibration":
            ktxt = f"K = {fmt_pm(k, sk, 2)} px·Å (calibration)"
        elif source == "candidate":
            ktxt = f"K = {fmt_pm(k, sk, 2)} px·Å (refined by the chosen candidate; not calibrated)"
        else:
            ktxt = "no camera constant: spacings need a calibration"
        ctxt = "no centre" if s.centre is None else f"centre ({s.centre.x:.2f}, {s.centre.y:.2f}) ± " \
            f"({fmt_sigma(s.centre.sigma_x)}, {fmt_sigma(s.centre.sigma_y)}) px, {s.centre.method}"
        conf = getattr(s.centre, "confidence", 1.0) if s.centre is not None else 1.0
        if conf < 0.5:  # the centre chain flags a weak centre instead of refusing: say so where the numbers are
            ctxt += f" (weak: confidence {conf:.2f}; check it or set it by hand)"
        n_sat = sum(bool(getattr(sp, "saturated", False)) for sp in s.spots)
        sat = f" ({n_sat} saturated: positions kept, intensities are lower bounds)" if n_sat else ""
        self.summary.setText(f"{len(rows)} spots{sat} · {ctxt} · {ktxt}")

    def _selection(self, *_: Any) -> None:
        rows = self.view.selectionModel().selectedRows()
        if len(rows) == 1:
            src = self.proxy.mapToSource(rows[0])
            emit(self.spot_selected, self.model.rows[src.row()].index)
        else:
            emit(self.spot_selected, None)

    def select_spot(self, index: int | None) -> None:
        sm = self.view.selectionModel()
        sm.blockSignals(True)
        try:
            self.view.clearSelection()
            if index is not None and 0 <= index < len(self.model.rows):
                proxy_index = self.proxy.mapFromSource(self.model.index(index, 0))
                self.view.selectRow(proxy_index.row())
                self.view.scrollTo(proxy_index)
        finally:
            sm.blockSignals(False)
        self.view.viewport().update()

    def selected_rows(self) -> list[int]:
        """Rows (in the shown order) with a selected cell."""
        return sorted({i.row() for i in self.view.selectionModel().selectedIndexes()})

    def table_text(self, *, selected_only: bool = True) -> str:
        """The table (rows in their shown order) as tab-separated text with a header line."""
        rows = self.selected_rows() if selected_only else []
        if not rows:
            rows = list(range(self.proxy.rowCount()))
        cols = range(self.model.columnCount())
        lines = ["\t".join(MeasurementModel.COLUMNS)]
        for r in rows:
            m = self.model.rows[self.proxy.mapToSource(self.proxy.index(r, 0)).row()]
            lines.append("\t".join(self.model.text(m, c) for c in cols))
        return "\n".join(lines) + "\n"

    def copy(self, *, selected_only: bool = False) -> str:
        """Copy the table (the selected rows with ``selected_only`` when some are selected); say which."""
        n_selected = len(self.selected_rows()) if selected_only else 0
        text = self.table_text(selected_only=selected_only)
        QApplication.clipboard().setText(text)
        n = text.count(chr(10)) - 1
        what = (f"the {n} selected row{'s' if n != 1 else ''}" if n_selected
                else f"the whole table ({n} row{'s' if n != 1 else ''})")
        self.ctx.show_status(f"Copied {what} as tab-separated text.")
        return text

    def show_ruler(self, lines) -> None:
        self.ruler.setText("" if not lines else "Ruler: " + " · ".join(lines))
