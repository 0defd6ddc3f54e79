"""What the panels share: the Miller-index delegate, number formats, spin boxes, the panel base."""

from __future__ import annotations

import math

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QStyle,
    QStyledItemDelegate,
    QStyleOptionViewItem,
    QApplication,
    QDoubleSpinBox,
    QSpinBox,
    QWidget,
)

from saedkit.gui.overlays import draw_indices

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

def _pct(v) -> str:
    """A percentage with two decimals ("0.00", never "-0.00"); a dash when unknown."""
    if v is None or not math.isfinite(v):
        return "—"
    return "0.00" if abs(v) < 0.005 else f"{v:.2f}"
