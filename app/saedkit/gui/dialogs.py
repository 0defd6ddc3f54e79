"""Dialogs and the in-window notice bar."""

from __future__ import annotations

from PySide6.QtCore import QEvent, QObject, Qt, QTimer, Signal
from PySide6.QtWidgets import (
    QCheckBox,
    QDialog,
    QDialogButtonBox,
    QDoubleSpinBox,
    QFormLayout,
    QFrame,
    QHBoxLayout,
    QLabel,
    QLineEdit,
    QMessageBox,
    QPlainTextEdit,
    QPushButton,
    QSpinBox,
    QVBoxLayout,
    QWidget,
)

from saedkit.gui._compat import emit

from saedkit.core.errors import CrystalError
from saedkit.core.workflow.session import SessionSettings

__all__ = ["NoticeBar", "PreferencesDialog", "NewPhaseDialog", "SaveCalibrationDialog", "parse_sites"]

_LEVEL_STYLE = {
    "info": ("#1f3a4d", "#cfe8ff", "ℹ"),
    "success": ("#1f4030", "#cff5dc", "✓"),
    "warning": ("#4d3d12", "#ffeab0", "⚠"),
    "error": ("#4d1a1a", "#ffd4d4", "✖"),
}


class NoticeBar(QFrame):
    """A dismissible message strip above the pattern, with optional action buttons.

    Never blocks: the program keeps running while a notice is shown.
    """

    closed = Signal()

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setObjectName("noticeBar")
        lay = QHBoxLayout(self)
        lay.setContentsMargins(10, 5, 6, 5)
        self.symbol = QLabel()
        self.text = QLabel()
        self.text.setWordWrap(True)
        self.text.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.buttons = QHBoxLayout()
        self.close_button = QPushButton("✕")
        self.close_button.setFlat(True)
        self.close_button.setFixedWidth(28)
        self.close_button.setToolTip("Dismiss")
        self.close_button.setObjectName("noticeClose")
        lay.addWidget(self.symbol)
        lay.addWidget(self.text, 1)
        lay.addLayout(self.buttons)
        lay.addWidget(self.close_button)
        self.close_button.clicked.connect(self.dismiss)
        self._timer = QTimer(self)
        self._timer.setSingleShot(True)
        self._timer.timeout.connect(self.dismiss)
        self.level = ""
        self.hide()

    def show_notice(self, text: str, level: str = "info", *, actions=(), timeout_ms: int = 0) -> None:
        """Show ``text``; ``actions`` is a sequence of (button text, callable)."""
        back, fore, sym = _LEVEL_STYLE.get(level, _LEVEL_STYLE["info"])
        self.level = level
        # action buttons: dark text on the light colour of the level, so they read on every style
        self.setStyleSheet(f"#noticeBar {{ background: {back}; border-bottom: 1px solid rgba(0,0,0,80); }}"
                           f"#noticeBar QLabel {{ color: {fore}; }}"
                           f"#noticeBar QPushButton {{ color: {back}; background: {fore}; border: 1px solid {fore};"
                           f" border-radius: 3px; padding: 3px 12px; font-weight: bold; }}"
                           f"#noticeBar QPushButton:hover {{ background: #ffffff; }}"
                           f"#noticeBar QPushButton#noticeClose {{ color: {fore}; background: transparent;"
                           f" border: none; padding: 0; }}")
        self.symbol.setText(sym)
        self.text.setText(text)
        while self.buttons.count():
            w = self.buttons.takeAt(0).widget()
            if w is not None:
                w.deleteLater()
        for label, fn in actions:
            b = QPushButton(label)
            b.clicked.connect(lambda _=False, f=fn: (self.dismiss(), f()))
            self.buttons.addWidget(b)
        self.show()
        self._place()
        self.raise_()
        self._timer.stop()
        if timeout_ms:
            self._timer.start(timeout_ms)

    def attach_to(self, host: QWidget) -> None:
        """Float over the top edge of ``host`` (a child of it, resized with it): the host's content never moves."""
        self._host = host
        host.installEventFilter(self)
        self._place()

    def _place(self) -> None:
        host = getattr(self, "_host", None)
        if host is None:
            return
        width = host.width()
        m = self.layout().contentsMargins()
        others = self.symbol.sizeHint().width() + self.close_button.sizeHint().width() + self.buttons.sizeHint().width()
        avail = max(width - others - m.left() - m.right() - 4 * self.layout().spacing(), 80)
        text_h = self.text.heightForWidth(avail) if self.text.hasHeightForWidth() else self.text.sizeHint().height()
        button_h = max(self.close_button.sizeHint().height(), self.buttons.sizeHint().height())
        self.setGeometry(0, 0, width, max(text_h, button_h, 20) + m.top() + m.bottom())

    def eventFilter(self, obj: QObject, event: QEvent) -> bool:  # noqa: N802
        if obj is getattr(self, "_host", None) and event.type() == QEvent.Type.Resize:
            self._place()
        return False

    def dismiss(self) -> None:
        self._timer.stop()
        self.hide()
        emit(self.closed)


class PreferencesDialog(QDialog):
    """Defaults for new sessions."""

    def __init__(self, prefs: SessionSettings, parent=None, *, can_apply: bool = False) -> None:
        super().__init__(parent)
        self.setWindowTitle("Preferences")
        form = QFormLayout()
        self.voltage = self._d(10, 3000, prefs.voltage_kv, 10, 1, " kV")
        self.pixel = self._d(0, 2000, prefs.pixel_size_um or 0.0, 0.5, 2, " µm")
        self.pixel.setSpecialValueText("unknown")
        self.d_tol = self._d(0.1, 20, prefs.d_tolerance_pct, 0.1, 2, " %")
        self.angle_tol = self._d(0.1, 20, prefs.angle_tolerance_deg, 0.1, 2, " °")
        self.max_index = QSpinBox()
        self.max_index.setRange(1, 30)
        self.max_index.setValue(prefs.max_index)
        self.top = QSpinBox()
        self.top.setRange(1, 100)
        self.top.setValue(prefs.top)
        self.min_snr = self._d(1, 1000, prefs.min_snr, 0.5, 1, "")
        self.snap = self._d(1, 200, prefs.snap_radius_px, 1, 1, " px")
        self.standard = QLineEdit(prefs.standard)
        form.addRow("Accelerating voltage", self.voltage)
        form.addRow("Detector pixel size", self.pixel)
        form.addRow("Spacing tolerance", self.d_tol)
        form.addRow("Angle tolerance", self.angle_tol)
        form.addRow("Largest zone index", self.max_index)
        form.addRow("Candidates kept", self.top)
        form.addRow("Smallest spot S/N", self.min_snr)
        form.addRow("Snap search radius", self.snap)
        form.addRow("Calibration standard", self.standard)
        self.apply_now = QCheckBox("Also apply to the open pattern")
        self.apply_now.setChecked(can_apply)
        self.apply_now.setEnabled(can_apply)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(self.apply_now)
        lay.addWidget(buttons)

    @staticmethod
    def _d(lo, hi, v, step, dec, suffix) -> QDoubleSpinBox:
        w = QDoubleSpinBox()
        w.setRange(lo, hi)
        w.setDecimals(dec)
        w.setSingleStep(step)
        w.setValue(v)
        w.setSuffix(suffix)
        return w

    def result_settings(self) -> SessionSettings:
        return SessionSettings(
            voltage_kv=self.voltage.value(), pixel_size_um=self.pixel.value() or None,
            d_tolerance_pct=self.d_tol.value(), angle_tolerance_deg=self.angle_tol.value(),
            max_index=self.max_index.value(), top=self.top.value(), min_snr=self.min_snr.value(),
            snap_radius_px=self.snap.value(), standard=self.standard.text().strip() or "Au")


def parse_sites(text: str) -> list[tuple]:
    """Atom sites from text, one per line: ``element x y z [occupancy [B]]``."""
    sites = []
    for n, line in enumerate(text.splitlines(), 1):
        line = line.split("#")[0].strip()
        if not line:
            continue
        parts = line.replace(",", " ").split()
        if len(parts) < 4:
            raise CrystalError(f"site line {n}: give 'element x y z', got {line!r}")
        try:
            nums = [float(_fraction(p)) for p in parts[1:]]
        except ValueError:
            raise CrystalError(f"site line {n}: x y z must be numbers, got {line!r}") from None
        sites.append((parts[0], *nums[:5]))
    return sites


def _fraction(text: str) -> float:
    if "/" in text:
        a, b = text.split("/", 1)
        return float(a) / float(b)
    return float(text)


class NewPhaseDialog(QDialog):
    """A phase typed in: name, cell, space group (Hermann–Mauguin symbol or number), sites."""

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setWindowTitle("New phase from a cell")
        form = QFormLayout()
        self.name = QLineEdit()
        self.name.setPlaceholderText("e.g. gamma-prime Ni3Al")
        self.cell = []
        row = QHBoxLayout()
        for label, v, suffix in (("a", 4.0, " Å"), ("b", 4.0, " Å"), ("c", 4.0, " Å"),
                                 ("α", 90.0, "°"), ("β", 90.0, "°"), ("γ", 90.0, "°")):
            w = QDoubleSpinBox()
            w.setRange(0.1, 200.0 if suffix == " Å" else 179.9)
            w.setDecimals(5 if suffix == " Å" else 3)
            w.setValue(v)
            w.setSuffix(suffix)
            w.setToolTip(label)
            self.cell.append(w)
            row.addWidget(w)
        self.space_group = QLineEdit("F m -3 m")
        self.sites = QPlainTextEdit("Ni 0 0 0")
        self.sites.setPlaceholderText("element x y z [occupancy [B]] per line, e.g.\nNi 0 1/2 1/2\nAl 0 0 0")
        self.sites.setFixedHeight(90)
        form.addRow("Name", self.name)
        form.addRow("Cell a b c α β γ", row)
        form.addRow("Space group", self.space_group)
        form.addRow("Sites", self.sites)
        self.error = QLabel("")
        self.error.setStyleSheet("color: #e05050;")
        self.error.setWordWrap(True)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self._try_accept)
        buttons.rejected.connect(self.reject)
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(self.error)
        lay.addWidget(buttons)
        self.phase = None

    def build(self):
        from saedkit.core.crystallography.crystal import make_phase

        sites = parse_sites(self.sites.toPlainText())
        return make_phase(self.name.text().strip(), [w.value() for w in self.cell],
                          self.space_group.text().strip(), sites, source="typed in by the user")

    def _try_accept(self) -> None:
        try:
            self.phase = self.build()
        except CrystalError as exc:
            self.error.setText(str(exc))
            return
        self.accept()


class SaveCalibrationDialog(QDialog):
    """Name and describe a calibration before it goes into the library."""

    def __init__(self, parent=None, *, name: str = "", nominal_mm: float = 0.0) -> None:
        super().__init__(parent)
        self.setWindowTitle("Save the calibration to the library")
        form = QFormLayout()
        self.name = QLineEdit(name)
        self.name.setPlaceholderText("e.g. 200 kV, CL 600 mm, bin 1")
        self.instrument = QLineEdit()
        self.nominal = QDoubleSpinBox()
        self.nominal.setRange(0.0, 100000.0)
        self.nominal.setDecimals(1)
        self.nominal.setSuffix(" mm")
        self.nominal.setSpecialValueText("not given")
        self.nominal.setValue(nominal_mm)
        self.binning = QSpinBox()
        self.binning.setRange(1, 16)
        self.overwrite = QCheckBox("Replace a saved calibration of the same name")
        form.addRow("Name", self.name)
        form.addRow("Instrument", self.instrument)
        form.addRow("Nominal camera length", self.nominal)
        form.addRow("Binning", self.binning)
        buttons = QDialogButtonBox(QDialogButtonBox.StandardButton.Ok | QDialogButtonBox.StandardButton.Cancel)
        buttons.accepted.connect(self.accept)
        buttons.rejected.connect(self.reject)
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(self.overwrite)
        lay.addWidget(buttons)


def show_details(parent: QWidget | None, title: str, text: str, details: str) -> None:
    """A message box with the full details (e.g. a traceback)."""
    box = QMessageBox(parent)
    box.setIcon(QMessageBox.Icon.Critical)
    box.setWindowTitle(title)
    box.setText(text)
    box.setDetailedText(details)
    box.setStandardButtons(QMessageBox.StandardButton.Close)
    box.open()
