"""A small QPainter plot of a radial profile with the assigned rings and their residuals."""

from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import QPointF, QRectF, QSize, Qt
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPainter, QPen, QPolygonF
from PySide6.QtWidgets import QSizePolicy, QWidget

from saedkit.gui.overlays import draw_indices

__all__ = ["ProfilePlot"]


class ProfilePlot(QWidget):
    """Intensity against radius (log scale), ring positions with (hkl), residual bars underneath.

    Call :meth:`set_data` with the profile and the rings; ``rings`` is a list
    of ``(radius_px, hkl or None, residual_pct or None)``.
    """

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Preferred)
        self.setMinimumHeight(170)
        self.radius = np.zeros(0)
        self.intensity = np.zeros(0)
        self.rings: list[tuple[float, tuple | None, float | None]] = []
        self.message = "No radial profile yet: fit the rings of a calibration pattern."

    def sizeHint(self) -> QSize:  # noqa: N802
        return QSize(320, 220)

    def set_data(self, radius_px, intensity, rings, *, message: str = "") -> None:
        r = np.asarray(radius_px, float).reshape(-1)
        i = np.asarray(intensity, float).reshape(-1)
        ok = np.isfinite(r) & np.isfinite(i)
        self.radius, self.intensity = r[ok], i[ok]
        self.rings = list(rings)
        self.message = message
        self.update()

    def clear(self, message: str = "") -> None:
        self.set_data([], [], [], message=message or "No radial profile yet: fit the rings of a calibration pattern.")

    def paintEvent(self, event) -> None:  # noqa: N802
        p = QPainter(self)
        try:
            self._paint(p)
        finally:
            p.end()

    def _paint(self, p: QPainter) -> None:
        p.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        p.fillRect(self.rect(), QColor("#1b2027"))
        font = QFont()
        font.setPointSizeF(7.5)
        p.setFont(font)
        fm = QFontMetricsF(font)
        w, h = self.width(), self.height()
        if self.radius.size < 2:
            p.setPen(QColor("#9aa7b4"))
            p.drawText(QRectF(8, 8, w - 16, h - 16), Qt.AlignmentFlag.AlignCenter | Qt.TextFlag.TextWordWrap,
                       self.message)
            return
        has_res = any(r[2] is not None and math.isfinite(r[2]) for r in self.rings)
        left, right, top = 40.0, 8.0, 30.0
        bottom = 44.0 if has_res else 22.0
        res_h = 30.0 if has_res else 0.0
        plot = QRectF(left, top, w - left - right, h - top - bottom - res_h)
        x0, x1 = float(self.radius.min()), float(self.radius.max())
        y = self.intensity
        pos = y[y > 0]
        use_log = pos.size > 0 and pos.max() / max(np.percentile(pos, 5), 1e-12) > 30
        yy = np.log10(np.clip(y, pos.min() if pos.size else 1e-12, None)) if use_log else y
        lo, hi = float(np.percentile(yy, 1)), float(yy.max())
        if not hi > lo:
            hi = lo + 1
        sx = plot.width() / max(x1 - x0, 1e-9)
        sy = plot.height() / (hi - lo)

        def mx(x):
            return plot.left() + (x - x0) * sx

        def my(v):
            return plot.bottom() - (min(max(v, lo), hi) - lo) * sy

        p.setPen(QPen(QColor("#56606b"), 1))
        p.drawRect(plot)
        # ring markers
        for i, (r, hkl, _) in enumerate(self.rings):
            if not (x0 <= r <= x1):
                continue
            xr = mx(r)
            pen = QPen(QColor("#ff8f4a"), 1, Qt.PenStyle.DashLine)
            p.setPen(pen)
            p.drawLine(QPointF(xr, plot.top()), QPointF(xr, plot.bottom()))
            if hkl is not None:
                draw_indices(p, xr - 8, 1 + (i % 2) * 10, hkl, colour=QColor("#ff8f4a"), background=False)
        # profile
        p.setPen(QPen(QColor("#cfe3f5"), 1.2))
        poly = QPolygonF([QPointF(mx(a), my(b)) for a, b in zip(self.radius, yy)])
        p.drawPolyline(poly)
        # axes labels
        p.setPen(QColor("#9aa7b4"))
        p.drawText(QPointF(plot.left(), plot.bottom() + fm.ascent() + 2), f"{x0:.0f}")
        txt = f"{x1:.0f} px"
        p.drawText(QPointF(plot.right() - fm.horizontalAdvance(txt), plot.bottom() + fm.ascent() + 2), txt)
        p.save()
        p.translate(12, plot.center().y())
        p.rotate(-90)
        label = "log₁₀ intensity" if use_log else "intensity"
        p.drawText(QPointF(-fm.horizontalAdvance(label) / 2, 0), label)
        p.restore()
        if not has_res:
            return
        # residual bars, %
        band = QRectF(plot.left(), plot.bottom() + fm.height() + 6, plot.width(), res_h)
        res = [abs(r[2]) for r in self.rings if r[2] is not None and math.isfinite(r[2])]
        top_pct = max(max(res), 0.05)
        p.setPen(QPen(QColor("#56606b"), 1))
        mid = band.center().y()
        p.drawLine(QPointF(band.left(), mid), QPointF(band.right(), mid))
        for r, _, pct in self.rings:
            if pct is None or not math.isfinite(pct) or not (x0 <= r <= x1):
                continue
            xr = mx(r)
            hgt = (pct / top_pct) * band.height() / 2
            p.fillRect(QRectF(xr - 2.5, mid - max(hgt, 0), 5, abs(hgt)), QColor("#ffb627"))
        p.setPen(QColor("#9aa7b4"))
        p.drawText(QPointF(2, mid + fm.ascent() / 2), f"±{top_pct:.2g}%")
