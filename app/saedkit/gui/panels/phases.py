"""PhasesPanel: the phases the zone-axis search may consider."""

from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QHBoxLayout,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QVBoxLayout,
)

from saedkit.gui.panels._common import _Panel


class PhasesPanel(_Panel):
    """Candidate phases for the zone-axis search: the built-in library, CIF files, typed cells."""

    def __init__(self, ctx, parent=None) -> None:
        super().__init__(ctx, parent)
        from saedkit.core.crystallography.library import list_library

        lay = QVBoxLayout(self)
        lay.addWidget(QLabel("Tick the phases the search may consider:"))
        self.list = QListWidget()
        for entry, phase in list_library():
            a = phase.cell.a
            extra = f", c = {phase.cell.c:.4f}" if abs(phase.cell.c - a) > 1e-6 else ""
            item = QListWidgetItem(f"{entry.name}   {phase.space_group.hm.replace(' ', '')}   a = {a:.4f}{extra} Å")
            item.setData(Qt.ItemDataRole.UserRole, entry.name)
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setCheckState(Qt.CheckState.Unchecked)
            item.setToolTip(f"{entry.role}\n{phase.source or ''}".strip())
            self.list.addItem(item)
        lay.addWidget(self.list, 1)
        row = QHBoxLayout()
        self.add_cif = QPushButton("Add CIF…")
        self.new_phase = QPushButton("New from cell…")
        row.addWidget(self.add_cif)
        row.addWidget(self.new_phase)
        lay.addLayout(row)
        self.list.itemChanged.connect(self._changed)
        self.add_cif.clicked.connect(lambda: self.ctx.guard(self.ctx.add_cif_phase))
        self.new_phase.clicked.connect(lambda: self.ctx.guard(self.ctx.new_phase_from_cell))

    def keys(self) -> list[str]:
        return [self.list.item(i).data(Qt.ItemDataRole.UserRole) for i in range(self.list.count())]

    def checked(self) -> list[str]:
        return [self.list.item(i).data(Qt.ItemDataRole.UserRole) for i in range(self.list.count())
                if self.list.item(i).checkState() == Qt.CheckState.Checked]

    def add_phase_item(self, key: str, text: str, *, checked: bool = True) -> None:
        if key in self.keys():
            item = self.list.item(self.keys().index(key))
        else:
            item = QListWidgetItem(text)
            item.setData(Qt.ItemDataRole.UserRole, key)
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setToolTip(key)
            self._updating = True
            try:
                self.list.addItem(item)
            finally:
                self._updating = False
        item.setCheckState(Qt.CheckState.Checked if checked else Qt.CheckState.Unchecked)

    def set_checked(self, keys) -> None:
        for k in keys:
            self.add_phase_item(k, k.split("/")[-1], checked=True)

    def _changed(self, item) -> None:
        if self._updating or self.session is None:
            return
        self.ctx.guard(lambda: self.session.set_phases(self.checked()))

    def refresh(self) -> None:
        s = self.session
        self._updating = True
        try:
            chosen = set(s.phases) if s is not None else set()
            for k in chosen - set(self.keys()):
                item = QListWidgetItem(k.split("/")[-1] + " — CIF")
                item.setData(Qt.ItemDataRole.UserRole, k)
                item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
                item.setToolTip(k)
                self.list.addItem(item)
            for i in range(self.list.count()):
                it = self.list.item(i)
                on = it.data(Qt.ItemDataRole.UserRole) in chosen
                it.setCheckState(Qt.CheckState.Checked if on else Qt.CheckState.Unchecked)
            self.setEnabled(s is not None)
        finally:
            self._updating = False
