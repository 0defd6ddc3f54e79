"""The marker legend: a small key in the corner of the pattern, listing only the marks on show."""

from __future__ import annotations

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPainter, QPen, QPolygonF
from PySide6.QtWidgets import QWidget

from saedkit.core.presentation.marker_style import MARKER_COLOURS, MARKER_LEGEND

__all__ = ["MarkerLegend"]


class MarkerLegend(QWidget):
    """A key of the overlay marks, a child of the view's viewport (bottom-right corner)."""

    def __init__(self, parent: QWidget) -> None:
        super().__init__(parent)
        self.setAttribute(Qt.WidgetAttribute.WA_TransparentForMouseEvents, True)
        self.kinds: list[str] = []
        self._font = QFont()
        self._font.setPointSizeF(8.0)
        self.hide()

    def set_kinds(self, kinds) -> None:
        """Show the entries of ``kinds`` (keys of MARKER_COLOURS), in the legend's order; none hides it."""
        wanted = set(kinds)
        self.kinds = [k for k, _, _ in MARKER_LEGEND if k in wanted]
        fm = QFontMetricsF(self._font)
        texts = [t for k, _, t in MARKER_LEGEND if k in wanted]
        w = 30 + max((fm.horizontalAdvance(t) for t in texts), default=0) + 8
        h = 6 + len(texts) * (fm.height() + 3)
        self.resize(int(w), int(h))
        self.place()
        self.setVisible(bool(self.kinds))
        self.update()

    def place(self) -> None:
        """Bottom-right corner (the scale bar has the bottom-left one)."""
        par = self.parentWidget()
        self.move(max(par.width() - self.width() - 8, 0), max(par.height() - self.height() - 8, 0))

    def entries(self) -> list[str]:
        return [t for k, _, t in MARKER_LEGEND if k in self.kinds]

    def paintEvent(self, event) -> None:  # noqa: N802
        p = QPainter(self)
        try:
            p.setRenderHint(QPainter.RenderHint.Antialiasing, True)
            p.fillRect(self.rect(), QColor(10, 14, 20, 190))
            p.setFont(self._font)
            fm = QFontMetricsF(self._font)
            y = 4.0
            for kind, shape, text in MARKER_LEGEND:
                if kind not in self.kinds:
                    continue
                col = QColor(MARKER_COLOURS[kind])
                cy = y + fm.height() / 2 + 1
                pen = QPen(col, 1.4)
                if shape in ("dotted square",):
                    pen.setStyle(Qt.PenStyle.DotLine)
                if shape == "dashed ring":
                    pen.setStyle(Qt.PenStyle.DashLine)
                p.setPen(pen)
                p.setBrush(Qt.BrushStyle.NoBrush)
                if shape in ("circle", "dashed ring"):
                    p.drawEllipse(QPointF(14, cy), 5, 5)
                elif shape == "diamond":
                    p.drawPolygon(QPolygonF([QPointF(14, cy - 6), QPointF(20, cy), QPointF(14, cy + 6),
                                             QPointF(8, cy)]))
                elif shape in ("square", "dotted square"):
                    p.drawRect(QRectF(9, cy - 5, 10, 10))
                elif shape == "centre":
                    p.drawEllipse(QPointF(14, cy), 4, 4)
                    p.drawLine(QPointF(6, cy), QPointF(9, cy))
                    p.drawLine(QPointF(19, cy), QPointF(22, cy))
                else:  # tint
                    c = QColor(col)
                    c.setAlpha(140)
                    p.fillRect(QRectF(8, cy - 5, 12, 10), c)
                p.setPen(QColor("#e8eef4"))
                p.drawText(QPointF(28, y + fm.ascent() + 1), text)
                y += fm.height() + 3
        finally:
            p.end()
