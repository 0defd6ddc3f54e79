"""SearchPanel: find spots, search zone axes, the ranked candidates and the chosen one measured against predicted."""

from __future__ import annotations

import math

import numpy as np
from typing import Any

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QAbstractItemView,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHeaderView,
    QLabel,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
)

from saedkit.core.crystallography.crystal import format_indices
from saedkit.gui.icons import icon

from saedkit.gui.panels._common import INDICES_ROLE, IndicesDelegate, _Panel, _ispin, _pct, _spin


class SearchPanel(_Panel):
    """Find spots, then search the zone axes of the ticked phases; the ranked candidates."""

    COLUMNS = ["#", "phase", "zone", "score", "Δd (%)", "Δangle (°)", "rotation (°)", "K (px·Å)", "spots"]
    COMPARE_COLUMNS = ["spot", "hkl", "d meas. (Å)", "d pred. (Å)", "Δd (%)", "∠g₁ meas. (°)", "∠g₁ pred. (°)",
                       "Δ∠ (°)"]

    def __init__(self, ctx, parent=None) -> None:
        super().__init__(ctx, parent)
        lay = QVBoxLayout(self)
        spots_box = QGroupBox("Spots")
        sf = QGridLayout(spots_box)
        self.min_snr = _spin(1.0, 1000.0, 5.0, 0.5, 1)
        self.find_button = QPushButton(icon("find-spots"), "Find spots")
        self.clear_button = QPushButton("Clear")
        sf.addWidget(QLabel("Smallest S/N"), 0, 0)
        sf.addWidget(self.min_snr, 0, 1)
        sf.addWidget(self.find_button, 1, 0)
        sf.addWidget(self.clear_button, 1, 1)
        self.spot_count = QLabel("")
        sf.addWidget(self.spot_count, 2, 0, 1, 2)
        lay.addWidget(spots_box)

        tol_box = QGroupBox("Search")
        tf = QFormLayout(tol_box)
        self.d_tol = _spin(0.1, 20.0, 2.5, 0.1, 2, " %")
        self.angle_tol = _spin(0.1, 20.0, 2.0, 0.1, 2, " °")
        self.max_index = _ispin(1, 30, 10)
        self.top = _ispin(1, 100, 10)
        tf.addRow("Spacing tolerance", self.d_tol)
        tf.addRow("Angle tolerance", self.angle_tol)
        tf.addRow("Largest index", self.max_index)
        tf.addRow("Candidates kept", self.top)
        self.search_button = QPushButton(icon("search"), "Search zone axes")
        tf.addRow("", self.search_button)
        lay.addWidget(tol_box)

        self.table = QTableWidget(0, len(self.COLUMNS))
        self.table.setHorizontalHeaderLabels(self.COLUMNS)
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setStretchLastSection(True)
        self.table.setItemDelegateForColumn(2, IndicesDelegate("[]", self.table))
        self.table.setMinimumHeight(150)
        lay.addWidget(self.table, 1)
        self.compare_label = QLabel("Chosen candidate, measured against predicted (angles to the shortest g₁):")
        self.compare_label.setWordWrap(True)
        lay.addWidget(self.compare_label)
        self.compare = QTableWidget(0, len(self.COMPARE_COLUMNS))
        self.compare.setHorizontalHeaderLabels(self.COMPARE_COLUMNS)
        self.compare.verticalHeader().setVisible(False)
        self.compare.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.compare.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.compare.setItemDelegateForColumn(1, IndicesDelegate("()", self.compare))
        self.compare.setMinimumHeight(120)
        lay.addWidget(self.compare, 1)
        self.compare_label.hide()
        self.compare.hide()
        self.notes = QLabel("")
        self.notes.setWordWrap(True)
        self.notes.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        lay.addWidget(self.notes)

        self.find_button.clicked.connect(lambda: self.ctx.guard(self.ctx.find_spots))
        self.clear_button.clicked.connect(lambda: self.ctx.guard(lambda: self.session and self.session.clear_spots()))
        self.search_button.clicked.connect(lambda: self.ctx.guard(self.ctx.search))
        self.table.itemSelectionChanged.connect(self._row_chosen)
        for w in (self.min_snr, self.d_tol, self.angle_tol):
            w.valueChanged.connect(self._settings_edited)
        for w in (self.max_index, self.top):
            w.valueChanged.connect(self._settings_edited)

    def _settings_edited(self, *_: Any) -> None:
        if self._updating or self.session is None:
            return
        st = self.session.settings
        new = dict(min_snr=self.min_snr.value(), d_tolerance_pct=self.d_tol.value(),
                   angle_tolerance_deg=self.angle_tol.value(), max_index=self.max_index.value(),
                   top=self.top.value())
        changes = {k: v for k, v in new.items() if getattr(st, k) != v}
        if changes:
            self.ctx.guard(lambda: self.session.set_settings(label="Change search settings", **changes))

    def _row_chosen(self) -> None:
        if self._updating or self.session is None:
            return
        rows = {i.row() for i in self.table.selectedIndexes()}
        if len(rows) == 1:
            row = rows.pop()
            if self.session.match is not None and row != self.session.chosen_candidate:
                self.ctx.guard(lambda: self.session.choose_candidate(row))

    def refresh(self) -> None:
        s = self.session
        self._updating = True
        try:
            self.setEnabled(s is not None)
            if s is None:
                self.table.setRowCount(0)
                self.notes.setText("")
                self.spot_count.setText("")
                return
            st = s.settings
            self.min_snr.setValue(st.min_snr)
            self.d_tol.setValue(st.d_tolerance_pct)
            self.angle_tol.setValue(st.angle_tolerance_deg)
            self.max_index.setValue(st.max_index)
            self.top.setValue(st.top)
            n_auto = sum(1 for o in s.spot_origins if o == "auto")
            self.spot_count.setText(f"{len(s.spots)} spots ({n_auto} found, {len(s.spots) - n_auto} placed by hand)")
            m = s.match
            cands = [] if m is None else list(m.candidates)
            self.table.setRowCount(len(cands))
            for i, c in enumerate(cands):
                zone = c.zone_four_index if c.zone_four_index is not None else c.zone
                vals = [str(i + 1), c.phase, format_indices(zone, brackets="[]"), f"{c.score:.3f}",
                        f"{c.d_error_pct:.2f}", f"{c.angle_error_deg:.2f}", f"{c.in_plane_rotation_deg:.1f}",
                        f"{c.camera_constant_px_A:.1f}", f"{c.n_explained}/{c.n_spots}"]
                for j, v in enumerate(vals):
                    item = QTableWidgetItem(v)
                    if j == 2:
                        item.setData(INDICES_ROLE, tuple(int(x) for x in zone))
                    if j not in (1, 2):
                        item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                    self.table.setItem(i, j, item)
            if cands:
                self.table.selectRow(min(s.chosen_candidate, len(cands) - 1))
            notes = []
            if m is not None:
                if not s.match_current:
                    notes.append("⚠ The spots, centre or calibration changed after this search: search again.")
                if not cands:
                    notes.append("No zone axis of the ticked phases explains these spots within the tolerances.")
                notes += list(m.notes)
                c = s.candidate
                if c is not None:
                    notes += list(c.notes)
            self.notes.setText("\n".join(notes))
            self._show_comparison(s)
        finally:
            self._updating = False

    def comparison_rows(self, s) -> list[tuple]:
        """Measured against predicted for the chosen candidate: one row per indexed spot.

        (spot number, hkl, d measured, d predicted, Δd %, angle to g₁ measured, predicted, Δangle), with g₁
        the shortest indexed g; angles from the centre (measured) and from the candidate's grid (predicted).
        """
        c = None if s is None else s.candidate
        if c is None or s.centre is None:
            return []
        lat = s.match.lattice
        c0 = np.asarray(lat.centre_xy if lat is not None else (s.centre.x, s.centre.y), float)
        pred = {tuple(int(v) for v in p.hkl): p for p in c.predicted}
        sxy = s.spots_xy
        rows = []
        for sp in c.spots:
            if sp.hkl is None or tuple(sp.hkl) not in pred:
                continue
            p = pred[tuple(sp.hkl)]
            number = int(np.argmin(np.hypot(*(sxy - [sp.x, sp.y]).T))) + 1 if len(sxy) else 0
            rows.append([number, tuple(sp.hkl), sp.d_A, p.d_A, sp.d_error_pct,
                         np.array([sp.x, sp.y]) - c0, np.array([p.x, p.y]) - c0])
        if not rows:
            return []
        ref = min(rows, key=lambda r: float(np.hypot(*r[5])))
        out = []
        for r in rows:
            am = _angle_between(r[5], ref[5])
            ap = _angle_between(r[6], ref[6])
            out.append((r[0], r[1], r[2], r[3], r[4], am, ap, am - ap))
        return sorted(out, key=lambda r: r[0])

    def _show_comparison(self, s) -> None:
        rows = self.comparison_rows(s)
        self.compare.setRowCount(len(rows))
        for i, (n, hkl, dm, dp, dd, am, ap, da) in enumerate(rows):
            vals = [str(n), format_indices(hkl), f"{dm:.4f}", f"{dp:.4f}", _pct(dd), f"{am:.1f}", f"{ap:.1f}",
                    f"{da:+.1f}"]
            for j, v in enumerate(vals):
                item = QTableWidgetItem(v)
                if j == 1:
                    item.setData(INDICES_ROLE, tuple(int(x) for x in hkl))
                else:
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                self.compare.setItem(i, j, item)
        self.compare_label.setVisible(bool(rows))
        self.compare.setVisible(bool(rows))


def _angle_between(a, b) -> float:
    """Angle between two vectors, degrees (0–180)."""
    na, nb = float(np.hypot(*a)), float(np.hypot(*b))
    if na == 0 or nb == 0:
        return 0.0
    return math.degrees(math.acos(max(-1.0, min(1.0, float(np.dot(a, b)) / (na * nb)))))
