"""A magnifier that follows the cursor over the pattern: the screen pixels around it, enlarged."""

from __future__ import annotations

import numpy as np
from PySide6.QtCore import QPoint, QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QImage, QPainter, QPen
from PySide6.QtWidgets import QWidget

__all__ = ["Magnifier"]


class Magnifier(QWidget):
    """A square window, a child of the view's viewport, showing ``span_px`` × ``span_px`` image pixels.

    The pixels are those on screen (display mapping and colours as shown),
    enlarged without smoothing, with a cross hair on the pixel under the
    cursor. It sits beside the cursor and moves to the other side near an edge.
    """

    def __init__(self, parent: QWidget, *, span_px: int = 15, side_px: int = 150) -> None:
        super().__init__(parent)
        self.span_px = int(span_px) | 1  # odd: the cursor's pixel in the middle
        self.setFixedSize(side_px, side_px)
        self.setAttribute(Qt.WidgetAttribute.WA_TransparentForMouseEvents, True)
        self.crop: np.ndarray | None = None  # uint32 0xAARRGGBB, span × span
        self.xy = (0.0, 0.0)
        self.hide()

    def show_at(self, argb: np.ndarray | None, step: int, xy: tuple[float, float], cursor: QPoint) -> None:
        """Show the screen pixels of ``argb`` (every ``step``-th image pixel) around image point ``xy``."""
        if argb is None:
            self.hide()
            return
        n = self.span_px
        half = n // 2
        col, row = int(round(xy[0] / step)), int(round(xy[1] / step))
        rows, cols = argb.shape
        crop = np.zeros((n, n), np.uint32)
        crop.fill(0xFF14181D)  # the view's background outside the image
        r0, c0 = row - half, col - half
        rs, cs = max(r0, 0), max(c0, 0)
        re, ce = min(r0 + n, rows), min(c0 + n, cols)
        if rs < re and cs < ce:
            crop[rs - r0:re - r0, cs - c0:ce - c0] = argb[rs:re, cs:ce]
        self.crop = crop
        self.xy = (float(xy[0]), float(xy[1]))
        par = self.parentWidget()
        x, y = cursor.x() + 24, cursor.y() + 24
        if x + self.width() > par.width():
            x = cursor.x() - 24 - self.width()
        if y + self.height() > par.height():
            y = cursor.y() - 24 - self.height()
        self.move(max(x, 0), max(y, 0))
        self.show()
        self.raise_()
        self.update()

    def centre_colour(self) -> QColor | None:
        """The colour of the cursor's pixel as shown in the magnifier."""
        if self.crop is None:
            return None
        v = int(self.crop[self.span_px // 2, self.span_px // 2])
        return QColor((v >> 16) & 255, (v >> 8) & 255, v & 255)

    def paintEvent(self, event) -> None:  # noqa: N802
        if self.crop is None:
            return
        p = QPainter(self)
        try:
            n = self.span_px
            img = QImage(self.crop.data, n, n, 4 * n, QImage.Format.Format_ARGB32)
            p.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform, False)
            p.drawImage(QRectF(0, 0, self.width(), self.height()), img, QRectF(0, 0, n, n))
            cell = self.width() / n
            mid = (n // 2) * cell
            p.setPen(QPen(QColor(255, 255, 255, 200), 1.0))
            p.drawRect(QRectF(mid, mid, cell, cell))
            p.setPen(QPen(QColor("#ffb627"), 1.5))
            p.drawRect(QRectF(0.5, 0.5, self.width() - 1, self.height() - 1))
            p.setPen(QColor("#e8eef4"))
            p.fillRect(QRectF(0, self.height() - 16, self.width(), 16), QColor(10, 14, 20, 190))
            p.drawText(QPointF(4, self.height() - 4), f"×{cell:.0f}   x {self.xy[0]:.0f}  y {self.xy[1]:.0f}")
        finally:
            p.end()
