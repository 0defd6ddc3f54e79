"""The step panels (docks): display, calibration, phases, zone-axis search, phases from rings, measurements.

Panels show the session and send edits back through the main window
(``ctx``); they compute nothing themselves.
"""

from __future__ import annotations

import math

import numpy as np
from typing import Any

from PySide6.QtCore import QAbstractTableModel, QModelIndex, QSortFilterProxyModel, Qt, Signal
from PySide6.QtGui import QKeySequence, QShortcut
from PySide6.QtWidgets import (
    QStyle,
    QStyledItemDelegate,
    QStyleOptionViewItem,
    QAbstractItemView,
    QApplication,
    QCheckBox,
    QComboBox,
    QDoubleSpinBox,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QSlider,
    QSplitter,
    QSpinBox,
    QTableView,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from saedkit.gui._compat import emit

from saedkit.core.crystallography.crystal import format_indices
from saedkit.gui.display import COLOUR_MAPS, MAPPINGS, DisplaySettings
from saedkit.gui.icons import icon
from saedkit.gui.overlays import draw_indices
from saedkit.gui.plot import AXES as PLOT_AXES, ProfilePlot
from saedkit.gui.view import LAYER_NAMES

#: Item-data role holding a Miller-index tuple, drawn with overbars by IndicesDelegate.
INDICES_ROLE = int(Qt.ItemDataRole.UserRole) + 1


class IndicesDelegate(QStyledItemDelegate):
    """Draws Miller indices with real overbars (the text form stays for copying)."""

    def __init__(self, brackets: str = "()", parent=None) -> None:
        super().__init__(parent)
        self.brackets = brackets

    def paint(self, painter, option, index) -> None:
        idx = index.data(INDICES_ROLE)
        if idx is None:
            super().paint(painter, option, index)
            return
        opt = QStyleOptionViewItem(option)
        self.initStyleOption(opt, index)
        opt.text = ""
        style = opt.widget.style() if opt.widget is not None else QApplication.style()
        style.drawControl(QStyle.ControlElement.CE_ItemViewItem, opt, painter, opt.widget)
        painter.save()
        painter.setFont(opt.font)
        selected = bool(opt.state & QStyle.StateFlag.State_Selected)
        colour = opt.palette.highlightedText().color() if selected else opt.palette.text().color()
        fm_h = painter.fontMetrics().height() + 2
        draw_indices(painter, opt.rect.left() + 3, opt.rect.center().y() - fm_h / 2, idx,
                     brackets=self.brackets, colour=colour, background=False)
        painter.restore()

__all__ = ["DisplayPanel", "CalibrationPanel", "PhasesPanel", "SearchPanel", "RingPhasesPanel",
           "MeasurementsPanel", "MeasurementModel", "fmt_pm", "fmt_sigma"]


def fmt_pm(v, s, digits: int = 4) -> str:
    """'v ± s' with two significant figures of s and v rounded to the same place (never "± 0.00").

    ``digits``: decimals of v when s is unknown or zero.
    """
    if v is None or not math.isfinite(v):
        return "—"
    if s is None or not math.isfinite(s) or s <= 0:
        return f"{v:.{digits}f}"
    d = min(max(1 - int(math.floor(math.log10(s))), 0), 10)
    if d == 0:  # σ ≥ 10: two significant figures by rounding to tens, hundreds, …
        step = 10 ** (int(math.floor(math.log10(s))) - 1)
        return f"{round(v / step) * step:.0f} ± {round(s / step) * step:.0f}"
    return f"{v:.{d}f} ± {s:.{d}f}"


def _signed(v, decimals: int = 3) -> str:
    """A signed residual ("+0.001", "0.000" rather than "-0.000"); a dash when unknown."""
    if v is None or not math.isfinite(v):
        return "—"
    text = f"{v:+.{decimals}f}"
    return text[1:] if float(text) == 0 else text


def fmt_sigma(s) -> str:
    """An uncertainty with two significant figures ("0.0041", "1.3", "25")."""
    if s is None or not math.isfinite(s):
        return "—"
    if s == 0:
        return "0"
    d = max(1 - int(math.floor(math.log10(abs(s)))), 0)
    return f"{s:.{d}f}" if d else f"{float(f'{s:.2g}'):.0f}"


def _spin(lo: float, hi: float, value: float, step: float, decimals: int, suffix: str = "") -> QDoubleSpinBox:
    w = QDoubleSpinBox()
    w.setRange(lo, hi)
    w.setDecimals(decimals)
    w.setSingleStep(step)
    w.setValue(value)
    w.setKeyboardTracking(False)
    if suffix:
        w.setSuffix(suffix)
    return w


def _ispin(lo: int, hi: int, value: int) -> QSpinBox:
    w = QSpinBox()
    w.setRange(lo, hi)
    w.setValue(value)
    w.setKeyboardTracking(False)
    return w


class _Panel(QWidget):
    def __init__(self, ctx, parent=None) -> None:
        super().__init__(parent)
        self.ctx = ctx
        self._updating = False

    @property
    def session(self):
        return self.ctx.session


# --------------------------------------------------------------------------- display


class DisplayPanel(_Panel):
    """Intensity mapping, limits, colour map, and which overlays are shown.

    Signals
    -------
    display_changed(DisplaySettings, bool preview)
        ``preview`` is True while a slider is being dragged.
    layer_toggled(str, bool)
    """

    display_changed = Signal(object, bool)
    layer_toggled = Signal(str, bool)

    def __init__(self, ctx, settings: DisplaySettings, parent=None) -> None:
        super().__init__(ctx, parent)
        self.settings = settings
        form = QFormLayout()
        self.mapping = QComboBox()
        self.mapping.addItems([m for m in MAPPINGS])
        self.mapping.setCurrentText(settings.mapping)
        self.gamma = QSlider(Qt.Orientation.Horizontal)
        self.gamma.setRange(10, 200)
        self.gamma.setValue(int(round(settings.gamma * 100)))
        self.gamma_label = QLabel(f"{settings.gamma:.2f}")
        grow = QHBoxLayout()
        grow.addWidget(self.gamma, 1)
        grow.addWidget(self.gamma_label)
        self.low = _spin(0.0, 50.0, settings.low_pct, 0.1, 2, " %")
        self.high = _spin(50.0, 100.0, settings.high_pct, 0.01, 3, " %")
        self.colour = QComboBox()
        self.colour.addItems(list(COLOUR_MAPS))
        self.colour.setCurrentText(settings.colour_map)
        self.invert = QCheckBox("dark spots on light")
        self.invert.setChecked(settings.invert)
        form.addRow("Curve", self.mapping)
        form.addRow("Gamma", grow)
        form.addRow("Black at", self.low)
        form.addRow("White at", self.high)
        form.addRow("Colours", self.colour)
        form.addRow("", self.invert)
        self.limits_label = QLabel("")
        self.limits_label.setStyleSheet("color: #8794a1;")
        form.addRow("Limits", self.limits_label)
        box = QGroupBox("Overlays")
        grid = QGridLayout(box)
        self.layer_boxes: dict[str, QCheckBox] = {}
        for i, (name, text) in enumerate(LAYER_NAMES.items()):
            cb = QCheckBox(text)
            cb.setChecked(name != "ellipse")
            cb.toggled.connect(lambda on, n=name: emit(self.layer_toggled, n, on))
            grid.addWidget(cb, i // 2, i % 2)
            self.layer_boxes[name] = cb
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(box)
        lay.addStretch(1)
        self.mapping.currentTextChanged.connect(lambda _: self._emit(False))
        self.gamma.sliderMoved.connect(lambda _: self._emit(True))
        self.gamma.sliderReleased.connect(lambda: self._emit(False))
        self.gamma.valueChanged.connect(self._gamma_value)
        self.low.valueChanged.connect(lambda _: self._emit(False))
        self.high.valueChanged.connect(lambda _: self._emit(False))
        self.colour.currentTextChanged.connect(lambda _: self._emit(False))
        self.invert.toggled.connect(lambda _: self._emit(False))
        self._sync_enabled()

    def _gamma_value(self, v: int) -> None:
        self.gamma_label.setText(f"{v / 100:.2f}")
        if not self.gamma.isSliderDown():
            self._emit(False)

    def _sync_enabled(self) -> None:
        self.gamma.setEnabled(self.mapping.currentText() == "gamma")

    def current(self) -> DisplaySettings:
        low, high = self.low.value(), self.high.value()
        if high <= low:
            high = min(100.0, low + 0.1)
        return DisplaySettings(mapping=self.mapping.currentText(), gamma=self.gamma.value() / 100.0,
                               low_pct=low, high_pct=high, colour_map=self.colour.currentText(),
                               invert=self.invert.isChecked())

    def _emit(self, preview: bool) -> None:
        if self._updating:
            return
        self._sync_enabled()
        new = self.current()
        if new == self.settings and not preview:
            return
        self.settings = new
        emit(self.display_changed, new, preview)

    def show_limits(self, lo: float, hi: float) -> None:
        self.limits_label.setText(f"{lo:.5g} – {hi:.5g}")

    def set_layer_checked(self, name: str, on: bool) -> None:
        cb = self.layer_boxes.get(name)
        if cb is not None and cb.isChecked() != on:
            cb.setChecked(on)


# --------------------------------------------------------------------------- calibration


class CalibrationPanel(_Panel):
    """Camera-constant calibration: fit the rings of a standard, use a saved one, or type K."""

    def __init__(self, ctx, parent=None) -> None:
        super().__init__(ctx, parent)
        from saedkit.core.crystallography.library import LIBRARY

        lay = QVBoxLayout(self)
        fit_box = QGroupBox("Fit a ring standard")
        form = QFormLayout(fit_box)
        self.standard = QComboBox()
        standards = [e for e in LIBRARY if "ring standard" in e.role] + [e for e in LIBRARY if "ring standard" not in e.role]
        for e in standards:
            self.standard.addItem(e.name, e.name)
        self.standard.addItem("CIF file…", "")
        self.voltage = _spin(10.0, 3000.0, 200.0, 10.0, 1, " kV")
        self.pixel = _spin(0.0, 2000.0, 0.0, 0.5, 2, " µm")
        self.pixel.setSpecialValueText("unknown")
        self.fit_button = QPushButton(icon("calibrate"), "Fit rings")
        self.fit_button.setToolTip("Fit the rings of this pattern, assign them to the standard and find K")
        form.addRow("Standard", self.standard)
        form.addRow("Voltage", self.voltage)
        form.addRow("Pixel size", self.pixel)
        form.addRow("", self.fit_button)
        lay.addWidget(fit_box)

        self.result = QLabel("Not calibrated.")
        self.result.setWordWrap(True)
        self.result.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        lay.addWidget(self.result)
        self.plot = ProfilePlot()
        self.plot_axis = QComboBox()
        self.plot_axis.addItems(list(PLOT_AXES))
        self.plot_axis.setToolTip("Horizontal axis of the radial profile: radius, d-spacing or |g| "
                                  "(the last two with the camera constant, R·d = K)")
        self.plot_axis.currentTextChanged.connect(lambda _t: self._apply_plot_axis())
        axis_row = QHBoxLayout()
        axis_row.addWidget(QLabel("Profile against"))
        axis_row.addWidget(self.plot_axis, 1)
        lay.addLayout(axis_row)
        self.table = QTableWidget(0, 5)
        self.table.setHorizontalHeaderLabels(["hkl", "d (Å)", "R (px)", "ΔR (px)", "ΔR (%)"])
        self.table.setItemDelegateForColumn(0, IndicesDelegate("()", self.table))
        self.table.verticalHeader().setVisible(False)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.Stretch)
        # the profile and the ring table share a splitter: drag the handle to make the plot taller
        self.splitter = QSplitter(Qt.Orientation.Vertical)
        self.splitter.addWidget(self.plot)
        self.splitter.addWidget(self.table)
        self.splitter.setChildrenCollapsible(False)
        self.splitter.setStretchFactor(0, 1)
        self.splitter.setSizes([220, 140])
        self.splitter.setMinimumHeight(300)
        lay.addWidget(self.splitter, 1)

        lib_box = QGroupBox("Calibration library")
        lib_lay = QGridLayout(lib_box)
        self.library = QComboBox()
        self.apply_button = QPushButton("Apply")
        self.save_button = QPushButton("Save current…")
        self.delete_button = QPushButton("Delete")
        lib_lay.addWidget(self.library, 0, 0, 1, 3)
        lib_lay.addWidget(self.apply_button, 1, 0)
        lib_lay.addWidget(self.save_button, 1, 1)
        lib_lay.addWidget(self.delete_button, 1, 2)
        lay.addWidget(lib_box)

        k_box = QGroupBox("Known camera constant")
        k_lay = QFormLayout(k_box)
        self.k_value = _spin(1.0, 1e6, 1000.0, 1.0, 2, " px·Å")
        self.k_sigma = _spin(0.0, 1e5, 0.0, 0.1, 2, " px·Å")
        self.k_sigma.setPrefix("± ")
        self.k_button = QPushButton("Use this K")
        k_lay.addRow("K", self.k_value)
        k_lay.addRow("uncertainty", self.k_sigma)
        k_lay.addRow("", self.k_button)
        lay.addWidget(k_box)
        lay.addStretch(1)

        self.fit_button.clicked.connect(lambda: self.ctx.guard(self.ctx.calibrate))
        self.apply_button.clicked.connect(lambda: self.ctx.guard(self._apply_saved))
        self.save_button.clicked.connect(lambda: self.ctx.guard(self.ctx.save_calibration_to_library))
        self.delete_button.clicked.connect(lambda: self.ctx.guard(self._delete_saved))
        self.k_button.clicked.connect(lambda: self.ctx.guard(
            lambda: self.ctx.use_camera_constant(self.k_value.value(), self.k_sigma.value())))
        self.voltage.valueChanged.connect(self._settings_edited)
        self.pixel.valueChanged.connect(self._settings_edited)
        self.standard.activated.connect(lambda i: self.ctx.guard(lambda: self._standard_chosen(i)))
        self.refresh_library()

    def _standard_chosen(self, index: int) -> None:
        if self.standard.itemData(index) == "":
            path = self.ctx.ask_open_cif()
            if path:
                self.standard.insertItem(index, path.split("/")[-1], path)
                self.standard.setCurrentIndex(index)
            else:
                self.standard.setCurrentIndex(0)
        self._settings_edited()

    def standard_key(self) -> str:
        return self.standard.currentData() or self.standard.itemData(0)

    def _settings_edited(self, *_: Any) -> None:
        if self._updating or self.session is None:
            return
        px = self.pixel.value() or None
        st = self.session.settings
        changes = {}
        if abs(self.voltage.value() - st.voltage_kv) > 1e-9:
            changes["voltage_kv"] = self.voltage.value()
        if px != st.pixel_size_um:
            changes["pixel_size_um"] = px
        if self.standard_key() and self.standard_key() != st.standard:
            changes["standard"] = self.standard_key()
        if changes:
            self.ctx.guard(lambda: self.session.set_settings(label="Change calibration settings", **changes))

    def _apply_saved(self) -> None:
        name = self.library.currentData()
        if name:
            self.ctx.apply_saved_calibration(name)

    def _delete_saved(self) -> None:
        name = self.library.currentData()
        if name:
            self.ctx.delete_saved_calibration(name)

    def refresh_library(self) -> None:
        names = self.ctx.calibration_names()
        current = self.library.currentData()
        self.library.clear()
        if not names:
            self.library.addItem("(no saved calibrations)", "")
        for n in names:
            self.library.addItem(n, n)
        if current in names:
            self.library.setCurrentIndex(names.index(current))
        has = bool(names)
        self.apply_button.setEnabled(has)
        self.delete_button.setEnabled(has)

    def refresh(self) -> None:
        s = self.session
        self._updating = True
        try:
            enabled = s is not None
            for w in (self.fit_button, self.apply_button, self.k_button, self.save_button):
                w.setEnabled(enabled)
            if s is None:
                self.result.setText("Open a pattern first.")
                self.plot.clear()
                self.table.setRowCount(0)
                return
            st = s.settings
            self.voltage.setValue(st.voltage_kv)
            self.pixel.setValue(st.pixel_size_um or 0.0)
            i = self.standard.findData(st.standard)
            if i < 0 and st.standard:
                self.standard.insertItem(self.standard.count() - 1, st.standard.split("/")[-1], st.standard)
                i = self.standard.findData(st.standard)
            if i >= 0:
                self.standard.setCurrentIndex(i)
            self._show_calibration(s.calibration, s.ring_fit)
            self.save_button.setEnabled(s.calibration is not None)
        finally:
            self._updating = False

    def _show_calibration(self, cal, ring_fit) -> None:
        if cal is None:
            self.result.setText("Not calibrated: fit the rings of a standard, apply a saved calibration "
                                "or enter a known camera constant. Spacings are shown once K is known.")
            self.table.setRowCount(0)
            self._show_profile(None, ring_fit)
            return
        k = float(cal.camera_constant_px_A)
        sk = getattr(cal, "camera_constant_sigma_px_A", None)
        rel = getattr(cal, "camera_constant_rel_sigma", None)
        if rel is None and sk is not None and k:
            rel = sk / k
        lines = [f"<b>K = {fmt_pm(k, sk, 2)} px·Å</b>" + (f" ({100 * rel:.2g} %)" if rel is not None else "")]
        source = type(cal).__name__
        name = getattr(cal, "name", None)
        if source == "EnteredCalibration":
            lines.append("entered by hand")
        elif name:
            lines.append(f"from the library: {name}")
        else:
            lines.append("fitted on this pattern")
        ell = getattr(cal, "ellipse", None)
        if ell is not None and ell.ellipticity > 0:
            lines.append(f"distortion e = {100 * ell.ellipticity:.2f} % at {ell.major_axis_deg:.1f}°")
        elif source == "EnteredCalibration":
            lines.append("no distortion correction")
        cl = getattr(cal, "camera_length_mm", None)
        if cl:
            lines.append(f"camera length L = {cl:.1f} mm")
        q = getattr(cal, "quality", None)
        if q:
            lines.append(f"quality: {q}")
        for w in getattr(cal, "warnings", ()) or ():
            lines.append(f"<span style='color:#e0a030'>⚠ {w}</span>")
        self.result.setText("<br>".join(lines))
        # enough decimals for two significant figures of σ (never "± 0.00")
        sig = float(sk or 0.0)
        dec = min(max(2, 1 - int(math.floor(math.log10(sig)))), 6) if sig > 0 else 2
        self.k_sigma.setDecimals(dec)
        self.k_value.setDecimals(dec)
        self.k_value.setValue(k)
        self.k_sigma.setValue(sig)
        rings = list(getattr(cal, "rings", ()) or ())
        self.table.setRowCount(len(rings))
        for i, r in enumerate(rings):
            hkl = getattr(r, "hkl", None)
            vals = [format_indices(hkl) if hkl is not None else "—",
                    f"{getattr(r, 'd_A', math.nan):.4f}", f"{getattr(r, 'radius_px', math.nan):.2f}",
                    _signed(getattr(r, 'residual_px', math.nan)), _signed(getattr(r, 'residual_pct', math.nan))]
            for j, v in enumerate(vals):
                item = QTableWidgetItem(v)
                if j == 0 and hkl is not None:
                    item.setData(INDICES_ROLE, tuple(int(x) for x in hkl))
                self.table.setItem(i, j, item)
        self._show_profile(cal, ring_fit)

    def _show_profile(self, cal, ring_fit) -> None:
        profile = getattr(cal, "profile", None) if cal is not None else None
        if profile is None and ring_fit is not None:
            profile = ring_fit.profile
        if profile is None:
            self.plot.clear("No radial profile: this calibration was not fitted on this pattern."
                            if cal is not None else "")
            return
        rings = []
        if cal is not None and getattr(cal, "rings", None):
            for r in cal.rings:
                rings.append((float(r.radius_px), getattr(r, "hkl", None), getattr(r, "residual_pct", None)))
        elif ring_fit is not None:
            rings = [(float(r.radius_px), None, None) for r in ring_fit.rings]
        self.plot.set_data(profile.radius_px, profile.intensity, rings)
        self._apply_plot_axis()

    def _apply_plot_axis(self) -> None:
        s = self.session
        k = None
        if s is not None:
            k_val, _, _, source = s.camera_constant
            k = k_val if source != "none" and math.isfinite(k_val) else None
        self.plot.set_axis(self.plot_axis.currentText(), k)


# --------------------------------------------------------------------------- phases


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


# --------------------------------------------------------------------------- search


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


# --------------------------------------------------------------------------- phases from rings


def _pct(v) -> str:
    """A percentage with two decimals ("0.00", never "-0.00"); a dash when unknown."""
    if v is None or not math.isfinite(v):
        return "—"
    return "0.00" if abs(v) < 0.005 else f"{v:.2f}"


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


# --------------------------------------------------------------------------- measurements


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
        self.summary.setText(f"{len(rows)} spots · {ctxt} · {ktxt}")

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
