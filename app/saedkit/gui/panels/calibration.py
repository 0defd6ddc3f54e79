"""CalibrationPanel: fit a ring standard, the calibration library, a known camera constant."""

from __future__ import annotations

import math

from typing import Any

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QPushButton,
    QSplitter,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
)

from saedkit.core.crystallography.crystal import format_indices
from saedkit.gui.icons import icon
from saedkit.gui.plot import AXES as PLOT_AXES, ProfilePlot

from saedkit.gui.panels._common import INDICES_ROLE, IndicesDelegate, _Panel, _signed, _spin, fmt_pm, fmt_sigma


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
        from saedkit.core.calibration.camera import camera_terms

        t = camera_terms(cal)  # one reader of K and its σ (statistical, reproducibility, total)
        k, total = t.camera_constant_px_A, t.total_sigma_px_A
        lines = [f"<b>K = {fmt_pm(k, total, 2)} px·Å</b>" + (f" ({100 * total / k:.2g} %)" if k else ""),
                 f"fit {fmt_sigma(t.stat_sigma_px_A)} px·Å, reproducibility {t.reproducibility_pct:.2g} %"]
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
            # value ± total σ from the calibration itself (one home: the camera model's figure)
            lines.append(f"camera length L = {fmt_pm(cl, getattr(cal, 'camera_length_sigma_mm', None), 1)} mm")
        q = getattr(cal, "quality", None)
        if q:
            lines.append(f"quality: {q}")
        for w in getattr(cal, "warnings", ()) or ():
            lines.append(f"<span style='color:#e0a030'>⚠ {w}</span>")
        self.result.setText("<br>".join(lines))
        # enough decimals for two significant figures of σ (never "± 0.00")
        sig = float(t.stat_sigma_px_A or 0.0)  # the known-K fields take the statistical part; the reproducibility is its own term
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
