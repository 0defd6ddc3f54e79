"""DisplayPanel: intensity mapping, limits, colours and the overlay switches."""

from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import (
    QCheckBox,
    QComboBox,
    QFormLayout,
    QGridLayout,
    QGroupBox,
    QHBoxLayout,
    QLabel,
    QSlider,
    QVBoxLayout,
)

from saedkit.gui._compat import emit

from saedkit.gui.display import COLOUR_MAPS, MAPPINGS, DisplaySettings
from saedkit.gui.view import LAYER_NAMES

from saedkit.gui.panels._common import _Panel, _spin


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
