"""RingPhasesPanel: the phases that explain the rings of a polycrystalline film."""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QAbstractItemView,
    QCheckBox,
    QFormLayout,
    QGroupBox,
    QHeaderView,
    QLabel,
    QPushButton,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
)

from saedkit.gui._compat import emit

from saedkit.core.crystallography.crystal import format_indices
from saedkit.gui.icons import icon

from saedkit.gui.panels._common import INDICES_ROLE, IndicesDelegate, _Panel, _pct, _spin, fmt_pm


class RingPhasesPanel(_Panel):
    """Rank the phases that explain the rings of a polycrystalline film; the rings of the chosen row.

    The panel keeps which row is chosen (a view choice, not an edit); the
    ring overlay labels the rings with that row's (hkl).
    """

    COLUMNS = ["#", "phase(s)", "score", "rings\nexplained %", "strong\nrings seen %", "Δd %"]
    RING_COLUMNS = ["d (Å)", "hkl", "phase", "Δd (%)"]

    chosen_changed = Signal(int)

    def __init__(self, ctx, parent=None) -> None:
        super().__init__(ctx, parent)
        self._chosen = 0
        lay = QVBoxLayout(self)
        box = QGroupBox("Identify phases from rings")
        form = QFormLayout(box)
        self.source = QLabel("")
        self.source.setWordWrap(True)
        self.camera = QLabel("")
        self.camera.setWordWrap(True)
        self.d_tol = _spin(0.1, 10.0, 1.5, 0.1, 2, " %")
        self.d_tol.setToolTip("Largest relative difference between a measured and a tabulated ring spacing")
        self.mixtures = QCheckBox("also pairs of phases")
        self.mixtures.setChecked(True)
        self.identify_button = QPushButton(icon("search"), "Identify phases")
        self.identify_button.setToolTip("Fit the rings, turn their radii into d with the camera constant and "
                                        "rank the phases (F8)")
        form.addRow("Phases", self.source)
        form.addRow("Camera constant", self.camera)
        form.addRow("Spacing tolerance", self.d_tol)
        form.addRow("", self.mixtures)
        form.addRow("", self.identify_button)
        lay.addWidget(box)

        self.table = QTableWidget(0, len(self.COLUMNS))
        self.table.setHorizontalHeaderLabels(self.COLUMNS)
        tips = {3: "Share of the measured ring intensity that the phase(s) explain",
                4: "Of the phase's strong rings inside the measured range, the share that is seen",
                5: "RMS relative error of the explained rings' spacings"}
        for j, tip in tips.items():
            self.table.horizontalHeaderItem(j).setToolTip(tip)
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        self.table.horizontalHeader().setSectionResizeMode(1, QHeaderView.ResizeMode.Stretch)
        self.table.setMinimumHeight(140)
        lay.addWidget(self.table, 1)
        self.rings_label = QLabel("")
        lay.addWidget(self.rings_label)
        self.rings = QTableWidget(0, len(self.RING_COLUMNS))
        self.rings.setHorizontalHeaderLabels(self.RING_COLUMNS)
        self.rings.setItemDelegateForColumn(1, IndicesDelegate("()", self.rings))
        self.rings.verticalHeader().setVisible(False)
        self.rings.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.rings.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        self.rings.setMinimumHeight(140)
        lay.addWidget(self.rings, 1)
        self.notes = QLabel("")
        self.notes.setWordWrap(True)
        self.notes.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        lay.addWidget(self.notes)

        self.identify_button.clicked.connect(lambda: self.ctx.guard(self.ctx.identify_phases))
        self.table.itemSelectionChanged.connect(self._row_chosen)

    # -- what the window reads --------------------------------------------- #

    def tolerance_pct(self) -> float:
        return float(self.d_tol.value())

    def use_mixtures(self) -> bool:
        return self.mixtures.isChecked()

    def chosen_row(self) -> int:
        """Index of the chosen candidate (0 = best)."""
        return self._chosen

    def choose_row(self, row: int) -> None:
        self.table.selectRow(int(row))

    # -- showing ------------------------------------------------------------- #

    def _row_chosen(self) -> None:
        if self._updating:
            return
        rows = {i.row() for i in self.table.selectedIndexes()}
        if len(rows) != 1:
            return
        row = rows.pop()
        if row != self._chosen:
            self._chosen = row
            self._show_rings()
            emit(self.chosen_changed, row)

    def refresh(self) -> None:
        s = self.session
        self._updating = True
        try:
            self.setEnabled(s is not None)
            if s is None:
                self._chosen = 0
                self.source.setText("")
                self.camera.setText("")
                self.table.setRowCount(0)
                self._show_rings()
                return
            if s.phases:
                names = [p.split("/")[-1] for p in s.phases]
                self.source.setText("the ticked ones: " + ", ".join(names))
            else:
                self.source.setText("none ticked: the whole built-in library")
            k, sk, _, source = s.camera_constant
            if source == "calibration":
                self.camera.setText(f"K = {fmt_pm(k, sk, 2)} px·Å")
                self.camera.setStyleSheet("")
            else:
                self.camera.setText("none yet: calibrate on a standard or type K in the Camera constant panel")
                self.camera.setStyleSheet("color: #e0a030;")
            pid = s.phase_id
            cands = [] if pid is None else list(pid.candidates)
            self._chosen = min(self._chosen, max(len(cands) - 1, 0))
            self.table.setRowCount(len(cands))
            for i, c in enumerate(cands):
                vals = [str(i + 1), " + ".join(p.split("/")[-1] for p in c.phases), f"{c.score:.3f}",
                        f"{100 * c.fraction_explained:.0f}", f"{100 * c.fraction_seen:.0f}", _pct(c.d_error_pct)]
                for j, v in enumerate(vals):
                    item = QTableWidgetItem(v)
                    if j != 1:
                        item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                    self.table.setItem(i, j, item)
            if cands:
                self.table.selectRow(self._chosen)
            self._show_rings()
        finally:
            self._updating = False

    def _show_rings(self) -> None:
        s = self.session
        pid = None if s is None else s.phase_id
        cands = [] if pid is None else list(pid.candidates)
        if not cands:
            self.rings.setRowCount(0)
            self.rings_label.setText("")
            self.notes.setText("" if pid is None else
                               "No phase explains these rings within the tolerance: check the camera "
                               "constant, widen the tolerance or add phases.")
            return
        c = cands[min(self._chosen, len(cands) - 1)]
        self.rings_label.setText(f"Rings of #{min(self._chosen, len(cands) - 1) + 1} "
                                 f"({' + '.join(p.split('/')[-1] for p in c.phases)}):")
        self.rings.setRowCount(len(c.matches))
        for i, m in enumerate(c.matches):
            vals = [f"{m.d_A:.4f}", "—" if m.hkl is None else format_indices(m.hkl),
                    "not explained" if m.phase is None else m.phase.split("/")[-1], _pct(m.d_error_pct)]
            for j, v in enumerate(vals):
                item = QTableWidgetItem(v)
                if j == 1 and m.hkl is not None:
                    item.setData(INDICES_ROLE, tuple(int(x) for x in m.hkl))
                if j in (0, 3):
                    item.setTextAlignment(Qt.AlignmentFlag.AlignRight | Qt.AlignmentFlag.AlignVCenter)
                self.rings.setItem(i, j, item)
        self.notes.setText("\n".join(self._notes(s, pid, cands)))

    @staticmethod
    def _notes(s, pid, cands) -> list[str]:
        notes = []
        best = cands[0]
        # single phases that also explain every ring the best one explains: ring spacings alone cannot tell
        # them apart (lattice parameters closer than the tolerance, e.g. Au and Al, 0.7 %)
        alike = [c for c in cands[1:] if len(c.phases) == 1 and len(best.phases) == 1
                 and c.fraction_explained >= best.fraction_explained - 1e-9 and c.fraction_seen >= best.fraction_seen
                 - 1e-9]
        if alike:
            names = ", ".join(f"{c.phases[0]} (Δd {_pct(c.d_error_pct)} %)" for c in alike)
            notes.append(f"Also consistent with every ring: {names}. Phases this close are told apart only with "
                         "an accurate camera constant (a standard recorded under the same conditions) or other "
                         "evidence, such as the composition.")
        # d = K / R for every ring, so d·R of the first ring is the K the identification used
        ring_fit = s.ring_fit
        k, _, _, source = s.camera_constant
        same = (source == "calibration" and ring_fit is not None and len(ring_fit.rings) == len(pid.d_A)
                and abs(pid.d_A[0] * ring_fit.rings[0].radius_px - k) <= 1e-6 * k)
        if not same:
            notes.append("⚠ The camera constant or the rings changed after this identification: identify again.")
        return notes
