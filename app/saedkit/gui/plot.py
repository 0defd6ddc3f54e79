"""A small QPainter plot of a radial profile with the assigned rings and their residuals."""

from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import QPointF, QRectF, QSize, Qt
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPainter, QPen, QPolygonF
from PySide6.QtWidgets import QSizePolicy, QWidget

from saedkit.gui.overlays import draw_indices, indices_size

#: What the horizontal axis shows: radius (px), spacing d (Å) or |g| (nm⁻¹), the last two with K.
AXES = ("R (px)", "d (Å)", "|g| (nm⁻¹)")

__all__ = ["ProfilePlot", "CurvePlot", "AXES"]


def _nice_ticks(lo: float, hi: float, n: int = 6) -> list[float]:
    """About ``n`` round numbers (1, 2, 5 × 10ᵏ steps) between ``lo`` and ``hi``."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return []
    raw = (hi - lo) / max(n, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= 0.7 * raw)
    first = math.ceil(lo / step) * step
    out = []
    v = first
    while v <= hi + 1e-9 * step:
        out.append(round(v, 10))
        v += step
    return out


class _DarkPlot(QWidget):
    """What the plots share: painting on the dark face in the small font, and a message when empty."""

    def paintEvent(self, event) -> None:  # noqa: N802
        p = QPainter(self)
        try:
            self._paint(p)
        finally:
            p.end()

    def _paint(self, p: QPainter) -> None:
        raise NotImplementedError

    def _start(self, p: QPainter) -> QFontMetricsF:
        p.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        p.fillRect(self.rect(), QColor("#1b2027"))
        font = QFont()
        font.setPointSizeF(7.5)
        p.setFont(font)
        return QFontMetricsF(font)

    def _say(self, p: QPainter, message: str) -> None:
        w, h = self.width(), self.height()
        p.setPen(QColor("#9aa7b4"))
        p.drawText(QRectF(8, 8, w - 16, h - 16), Qt.AlignmentFlag.AlignCenter | Qt.TextFlag.TextWordWrap, message)


class ProfilePlot(_DarkPlot):
    """Intensity against radius (log scale), ring positions with (hkl), residual bars underneath.

    Call :meth:`set_data` with the profile and the rings; ``rings`` is a list
    of ``(radius_px, hkl or None, residual_pct or None)``.
    """

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Preferred)
        self.setMinimumHeight(120)
        self.radius = np.zeros(0)
        self.intensity = np.zeros(0)
        self.rings: list[tuple[float, tuple | None, float | None]] = []
        self.message = "No radial profile yet: fit the rings of a calibration pattern."
        self.axis = AXES[0]
        self.camera_constant_px_A: float | None = None
        self.label_boxes: list = []  # PlacedLabel of the ring labels last drawn (None where left out)
        self.tick_labels: list[tuple[float, str]] = []  # (x on the widget, text) of the axis ticks last drawn

    def set_axis(self, axis: str, camera_constant_px_A: float | None = None) -> None:
        """Show the horizontal axis as R (px), d (Å) or |g| (nm⁻¹); d and |g| need K (R·d = K)."""
        if axis not in AXES:
            raise ValueError(f"axis must be one of {AXES}, got {axis!r}")
        self.axis = axis
        self.camera_constant_px_A = camera_constant_px_A if camera_constant_px_A and camera_constant_px_A > 0 else None
        self.update()

    def _ticks(self, x0: float, x1: float) -> list[tuple[float, str]]:
        """(radius px, text) of the axis ticks in the chosen unit."""
        k = self.camera_constant_px_A
        unit = self.axis if k is not None else AXES[0]
        if unit == AXES[0]:
            vals = _nice_ticks(x0, x1)
            return [(v, f"{v:g}") for v in vals]
        if unit == AXES[2]:  # |g| = 1/d, d = K/R: |g| (nm⁻¹) = 10·R/K
            vals = _nice_ticks(10 * x0 / k, 10 * x1 / k)
            return [(v * k / 10, f"{v:g}") for v in vals]
        # d = K/R crowds at small R: take evenly spaced radii, round their d to two significant figures and
        # put each tick exactly where that round d falls
        out = []
        for r in _nice_ticks(max(x0, 1e-9), x1):
            if r <= 0:
                continue
            d = k / r
            d_round = float(f"{d:.2g}")
            if d_round > 0 and all(abs(d_round - v) > 1e-12 for _, t in out for v in [float(t)]):
                out.append((k / d_round, f"{d_round:g}"))
        return out

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

    def _paint(self, p: QPainter) -> None:
        fm = self._start(p)
        w, h = self.width(), self.height()
        if self.radius.size < 2:
            self._say(p, self.message)
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
        # ring markers, with (hkl) labels in up to three rows above the plot, never overlapping (left out if crowded)
        from saedkit.core.presentation.label_layout import place_labels

        places = []
        for r, hkl, _ in self.rings:
            if hkl is None or not (x0 <= r <= x1):
                places.append([])
                continue
            xr = mx(r)
            lw, lh = indices_size(p, hkl)
            rows = [1.0 + k * (lh - 3) for k in range(3)]
            places.append([((xr - lw / 2 + dx, y, xr + lw / 2 + dx, y + lh - 3), (xr, plot.top()), k > 0 or dx != 0)
                           for k, y in enumerate(rows) for dx in (0.0, lw / 2 + 1, -lw / 2 - 1)])
        self.label_boxes = place_labels(places, bounds=(0, 0, w, plot.top()), gap_px=1.0)
        ring_col = QColor("#ff8f4a")
        for (r, hkl, _), lab in zip(self.rings, self.label_boxes):
            if not (x0 <= r <= x1):
                continue
            xr = mx(r)
            p.setPen(QPen(ring_col, 1, Qt.PenStyle.DashLine))
            p.drawLine(QPointF(xr, plot.top()), QPointF(xr, plot.bottom()))
            if lab is not None:
                bx0, by0, bx1, by1 = lab.box
                if lab.leader:
                    p.setPen(QPen(ring_col, 0.8))
                    p.drawLine(QPointF(xr, plot.top()), QPointF(min(max(xr, bx0), bx1), by1))
                draw_indices(p, bx0, by0 - 1, hkl, colour=ring_col, background=False)
        # profile
        p.setPen(QPen(QColor("#cfe3f5"), 1.2))
        poly = QPolygonF([QPointF(mx(a), my(b)) for a, b in zip(self.radius, yy)])
        p.drawPolyline(poly)
        # axes labels
        p.setPen(QColor("#9aa7b4"))
        unit = self.axis if self.camera_constant_px_A is not None else AXES[0]
        self.tick_labels = []
        last_right = -1e9
        uw = fm.horizontalAdvance(unit)
        limit = plot.right() - uw - 6  # the unit's name closes the row of ticks
        for r_tick, text in self._ticks(x0, x1):
            if not (x0 <= r_tick <= x1):
                continue
            xt = mx(r_tick)
            tw = fm.horizontalAdvance(text)
            p.drawLine(QPointF(xt, plot.bottom()), QPointF(xt, plot.bottom() + 3))
            if xt - tw / 2 > last_right + 4 and xt + tw / 2 <= limit:
                p.drawText(QPointF(xt - tw / 2, plot.bottom() + fm.ascent() + 3), text)
                self.tick_labels.append((xt, text))
                last_right = xt + tw / 2
        p.drawText(QPointF(plot.right() - uw, plot.bottom() + fm.ascent() + 3), unit)
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


class CurvePlot(_DarkPlot):
    """A plain curve (a line or an azimuthal profile) with marked positions (the spots on the line).

    Call :meth:`set_curve` with x, y (NaN gaps allowed), the axis name, and
    ``marks``: a list of (x, text) drawn as vertical ticks with their text.
    """

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Expanding)
        self.setMinimumHeight(120)
        self.x = np.zeros(0)
        self.y = np.zeros(0)
        self.x_name = ""
        self.title = ""
        self.marks: list[tuple[float, str]] = []
        self.message = "Drag with the Profile tool for a line profile; double-click on a ring for its azimuthal profile."
        self.mark_boxes: list = []

    def sizeHint(self) -> QSize:  # noqa: N802
        return QSize(320, 200)

    def set_curve(self, x, y, *, x_name: str, title: str = "", marks=()) -> None:
        self.x = np.asarray(x, float).reshape(-1)
        self.y = np.asarray(y, float).reshape(-1)
        self.x_name = x_name
        self.title = title
        self.marks = [(float(a), str(t)) for a, t in marks]
        self.update()

    def _paint(self, p: QPainter) -> None:
        from saedkit.core.presentation.label_layout import place_labels

        fm = self._start(p)
        w, h = self.width(), self.height()
        ok = np.isfinite(self.x) & np.isfinite(self.y)
        if ok.sum() < 2:
            self._say(p, self.message)
            return
        plot = QRectF(46.0, 30.0, w - 54.0, h - 30.0 - 22.0)
        x0, x1 = float(self.x[ok].min()), float(self.x[ok].max())
        lo, hi = float(self.y[ok].min()), float(self.y[ok].max())
        if not hi > lo:
            hi = lo + 1.0
        sx = plot.width() / max(x1 - x0, 1e-9)
        sy = plot.height() / (hi - lo)

        def mx(v):
            return plot.left() + (v - x0) * sx

        def my(v):
            return plot.bottom() - (v - lo) * sy

        p.setPen(QPen(QColor("#56606b"), 1))
        p.drawRect(plot)
        col = QColor("#2fd3c4")
        places = []
        for xm, text in self.marks:
            if not (x0 <= xm <= x1):
                places.append([])
                continue
            tw = fm.horizontalAdvance(text) + 4
            places.append([((mx(xm) - tw / 2 + dx, y, mx(xm) + tw / 2 + dx, y + fm.height()), (mx(xm), plot.top()),
                            dx != 0 or k > 0) for k, y in enumerate((2.0, 2.0 + fm.height()))
                           for dx in (0.0, tw / 2 + 1, -tw / 2 - 1)])
        self.mark_boxes = place_labels(places, bounds=(0, 0, w, plot.top()), gap_px=1.0)
        for (xm, text), lab in zip(self.marks, self.mark_boxes):
            if not (x0 <= xm <= x1):
                continue
            p.setPen(QPen(col, 1, Qt.PenStyle.DashLine))
            p.drawLine(QPointF(mx(xm), plot.top()), QPointF(mx(xm), plot.bottom()))
            if lab is not None:
                p.setPen(col)
                p.drawText(QPointF(lab.box[0] + 2, lab.box[1] + fm.ascent()), text)
        p.setPen(QPen(QColor("#cfe3f5"), 1.2))
        seg: list[QPointF] = []
        for a, b, good in zip(self.x, self.y, ok):
            if good:
                seg.append(QPointF(mx(a), my(b)))
            elif seg:
                p.drawPolyline(QPolygonF(seg))
                seg = []
        if seg:
            p.drawPolyline(QPolygonF(seg))
        p.setPen(QColor("#9aa7b4"))
        last = -1e9
        for v in _nice_ticks(x0, x1):
            xt = mx(v)
            text = f"{v:g}"
            tw = fm.horizontalAdvance(text)
            p.drawLine(QPointF(xt, plot.bottom()), QPointF(xt, plot.bottom() + 3))
            if xt - tw / 2 > last + 4 and xt + tw / 2 < plot.right() - fm.horizontalAdvance(self.x_name) - 6:
                p.drawText(QPointF(xt - tw / 2, plot.bottom() + fm.ascent() + 3), text)
                last = xt + tw / 2
        p.drawText(QPointF(plot.right() - fm.horizontalAdvance(self.x_name), plot.bottom() + fm.ascent() + 3),
                   self.x_name)
        p.drawText(QPointF(2, plot.top() + fm.ascent()), f"{hi:.4g}")
        p.drawText(QPointF(2, plot.bottom()), f"{lo:.4g}")
        if self.title:
            p.drawText(QPointF(plot.left(), h - 4), self.title)
