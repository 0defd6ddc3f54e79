"""Overlay layers drawn over the pattern, each a separate QGraphicsItem.

Markers and labels keep their size on screen at any zoom: each layer maps its
scene points (image pixels, x = column, y = row) to the device with numpy
and paints in device coordinates. A layer can be shown or hidden on its own.

Colours and shapes (saedkit's own):

- centre: amber ring with a gapped cross;
- spots: teal circles (found automatically), rose diamonds (placed by hand);
- predicted grid of the chosen candidate: lime squares whose size follows the
  kinematic intensity, dotted for reflections that are kinematically
  forbidden; (hkl) labels with overbars;
- rings: dashed orange ellipses with their (hkl) and d;
- distortion: lilac major axis (solid) and minor axis (dotted);
- ruler: pale yellow line with a small read-out box;
- mask: translucent blue over the excluded pixels.
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np
from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QBrush, QColor, QFont, QFontMetricsF, QImage, QPainter, QPainterPath, QPen, QPolygonF, QTransform
from PySide6.QtWidgets import QGraphicsItem

from saedkit.core.presentation.marker_style import MARKER_COLOURS

__all__ = [
    "COLOURS",
    "CentreLayer",
    "SpotLayer",
    "PredictedLayer",
    "RingLayer",
    "EllipseLayer",
    "MeasureLayer",
    "StrokeLayer",
    "MaskLayer",
    "ImageLayer",
    "draw_indices",
    "map_points",
]

COLOURS = {
    **{k: QColor(v) for k, v in MARKER_COLOURS.items()},  # the one style shared with the report
    "spot_selected": QColor("#ffffff"),
    "mask": QColor(70, 115, 255, 105),
    "stroke": QColor(90, 140, 255, 120),
    "label_back": QColor(10, 14, 20, 175),
}


def map_points(t: QTransform, xy: np.ndarray) -> np.ndarray:
    """Map (N, 2) scene points to device coordinates with a QTransform."""
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    x, y = xy[:, 0], xy[:, 1]
    if t.isAffine():
        dx = t.m11() * x + t.m21() * y + t.m31()
        dy = t.m12() * x + t.m22() * y + t.m32()
        return np.stack([dx, dy], axis=1)
    out = np.empty_like(xy)
    for i, (a, b) in enumerate(xy):
        p = t.map(QPointF(a, b))
        out[i] = (p.x(), p.y())
    return out


def _label_font(size: float = 8.5, bold: bool = False) -> QFont:
    f = QFont()
    f.setPointSizeF(size)
    f.setBold(bold)
    return f


def indices_size(painter: QPainter, idx: Sequence[int], *, brackets: str = "") -> tuple[float, float]:
    """(width, height) in device pixels of :func:`draw_indices` with the painter's font."""
    fm = QFontMetricsF(painter.font())
    parts = [str(abs(int(v))) for v in idx]
    sep = " " if any(abs(int(v)) > 9 for v in idx) else ""
    total = sum(fm.horizontalAdvance(p) for p in parts) + (fm.horizontalAdvance(sep) * (len(parts) - 1) if sep else 0.0)
    if brackets:
        total += fm.horizontalAdvance(brackets[0]) + fm.horizontalAdvance(brackets[1])
    return total + 4, fm.height() + 3.0


def draw_indices(painter: QPainter, x: float, y: float, idx: Sequence[int], *, brackets: str = "",
                 colour: QColor | None = None, background: bool = True) -> QRectF:
    """Draw Miller indices with overbars for negative ones, top-left at (x, y) in device pixels.

    Returns the rectangle drawn.
    """
    fm = QFontMetricsF(painter.font())
    parts = [str(abs(int(v))) for v in idx]
    sep = " " if any(abs(int(v)) > 9 for v in idx) else ""
    widths = [fm.horizontalAdvance(p) for p in parts]
    sep_w = fm.horizontalAdvance(sep) if sep else 0.0
    open_w = fm.horizontalAdvance(brackets[0]) if brackets else 0.0
    close_w = fm.horizontalAdvance(brackets[1]) if brackets else 0.0
    total = open_w + sum(widths) + sep_w * (len(parts) - 1) + close_w
    bar_gap = 2.0
    h = fm.height() + bar_gap
    rect = QRectF(x, y, total + 4, h + 1)
    if background:
        painter.fillRect(rect, COLOURS["label_back"])
    pen = QPen(colour or QColor("white"))
    pen.setWidthF(1.0)
    painter.setPen(pen)
    base = y + bar_gap + fm.ascent()
    cx = x + 2
    if brackets:
        painter.drawText(QPointF(cx, base), brackets[0])
        cx += open_w
    for v, p, w in zip(idx, parts, widths):
        painter.drawText(QPointF(cx, base), p)
        if int(v) < 0:
            yb = base - fm.ascent() + 0.5
            painter.drawLine(QPointF(cx + 0.5, yb), QPointF(cx + w - 0.5, yb))
        cx += w + sep_w
    if brackets:
        painter.drawText(QPointF(cx - sep_w, base), brackets[1])
    return rect


def _draw_text_box(painter: QPainter, x: float, y: float, lines: Sequence[str], colour: QColor) -> QRectF:
    fm = QFontMetricsF(painter.font())
    w = max((fm.horizontalAdvance(s) for s in lines), default=0.0) + 8
    h = fm.height() * len(lines) + 6
    rect = QRectF(x, y, w, h)
    painter.fillRect(rect, COLOURS["label_back"])
    painter.setPen(QPen(colour))
    for i, s in enumerate(lines):
        painter.drawText(QPointF(x + 4, y + 3 + fm.ascent() + i * fm.height()), s)
    return rect


class _ScreenLayer(QGraphicsItem):
    """Base: paints in device coordinates over a large scene rectangle."""

    def __init__(self, z: float) -> None:
        super().__init__()
        self.setZValue(z)
        self._bounds = QRectF(-1e5, -1e5, 2e5, 2e5)
        self.setAcceptedMouseButtons(Qt.MouseButton.NoButton)

    def set_image_rect(self, rect: QRectF) -> None:
        self.prepareGeometryChange()
        m = max(rect.width(), rect.height())
        self._bounds = rect.adjusted(-m, -m, m, m)

    def boundingRect(self) -> QRectF:  # noqa: N802 - Qt API
        return self._bounds

    def paint(self, painter: QPainter, option, widget=None) -> None:
        t = painter.worldTransform()
        device = painter.viewport() if widget is None else QRectF(widget.rect())
        painter.save()
        painter.resetTransform()
        painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        painter.setRenderHint(QPainter.RenderHint.TextAntialiasing, True)
        try:
            self.draw(painter, t, QRectF(device).adjusted(-40, -40, 40, 40))
        finally:
            painter.restore()

    def draw(self, painter: QPainter, t: QTransform, device: QRectF) -> None:  # pragma: no cover - abstract
        raise NotImplementedError

    @staticmethod
    def _scale(t: QTransform) -> float:
        return math.hypot(t.m11(), t.m12())


class CentreLayer(_ScreenLayer):
    """The pattern centre."""

    def __init__(self) -> None:
        super().__init__(6)
        self.xy: tuple[float, float] | None = None

    def set_centre(self, xy: tuple[float, float] | None) -> None:
        self.xy = None if xy is None else (float(xy[0]), float(xy[1]))
        self.update()

    def draw(self, painter, t, device):
        if self.xy is None:
            return
        (x, y), = map_points(t, np.array([self.xy]))
        c = COLOURS["centre"]
        shadow = QPen(QColor(0, 0, 0, 160), 3.6)
        pen = QPen(c, 1.8)
        for p in (shadow, pen):
            painter.setPen(p)
            painter.setBrush(Qt.BrushStyle.NoBrush)
            painter.drawEllipse(QPointF(x, y), 9.0, 9.0)
            for dx, dy in ((1, 0), (-1, 0), (0, 1), (0, -1)):
                painter.drawLine(QPointF(x + 4 * dx, y + 4 * dy), QPointF(x + 15 * dx, y + 15 * dy))


class SpotLayer(_ScreenLayer):
    """Spots: found automatically (circles) or placed by hand (diamonds), with labels."""

    def __init__(self) -> None:
        super().__init__(5)
        self.xy = np.zeros((0, 2))
        self.origins: list[str] = []
        self.labels: list = []  # per spot: None, a str, or an (h, k, l) tuple
        self.selected: int | None = None
        self.dragging: tuple[int, float, float] | None = None  # index, x, y
        self.show_labels = True

    def set_spots(self, xy: np.ndarray, origins: Sequence[str], labels: Sequence | None = None) -> None:
        self.xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        self.origins = list(origins)
        self.labels = list(labels) if labels is not None else [None] * len(self.xy)
        if self.selected is not None and self.selected >= len(self.xy):
            self.selected = None
        self.update()

    def set_selected(self, index: int | None) -> None:
        self.selected = index
        self.update()

    def set_dragging(self, index: int | None, x: float = 0.0, y: float = 0.0) -> None:
        self.dragging = None if index is None else (index, x, y)
        self.update()

    def draw(self, painter, t, device):
        if len(self.xy) == 0:
            return
        xy = self.xy.copy()
        if self.dragging is not None and 0 <= self.dragging[0] < len(xy):
            xy[self.dragging[0]] = self.dragging[1:]
        dev = map_points(t, xy)
        painter.setFont(_label_font(8.0))
        r = 6.5
        for i, (x, y) in enumerate(dev):
            if not device.contains(QPointF(x, y)):
                continue
            manual = i < len(self.origins) and self.origins[i] == "manual"
            colour = COLOURS["spot_manual"] if manual else COLOURS["spot_auto"]
            width = 1.6
            if i == self.selected:
                painter.setPen(QPen(COLOURS["spot_selected"], 3.4))
                self._shape(painter, x, y, r + 2.5, manual)
            painter.setPen(QPen(QColor(0, 0, 0, 150), width + 1.6))
            self._shape(painter, x, y, r, manual)
            painter.setPen(QPen(colour, width))
            self._shape(painter, x, y, r, manual)
            if self.show_labels:
                lab = self.labels[i] if i < len(self.labels) else None
                if isinstance(lab, tuple):
                    draw_indices(painter, x + r + 2, y - r - 12, lab, colour=colour)
                elif lab:
                    _draw_text_box(painter, x + r + 2, y - r - 12, [str(lab)], colour)

    @staticmethod
    def _shape(painter, x, y, r, manual):
        painter.setBrush(Qt.BrushStyle.NoBrush)
        if manual:
            poly = QPolygonF([QPointF(x, y - r * 1.2), QPointF(x + r * 1.2, y), QPointF(x, y + r * 1.2),
                              QPointF(x - r * 1.2, y)])
            painter.drawPolygon(poly)
        else:
            painter.drawEllipse(QPointF(x, y), r, r)


class PredictedLayer(_ScreenLayer):
    """The predicted reflections of the chosen zone-axis candidate."""

    def __init__(self) -> None:
        super().__init__(4)
        self.xy = np.zeros((0, 2))
        self.hkl: list[tuple[int, int, int]] = []
        self.intensity = np.zeros(0)
        self.forbidden = np.zeros(0, bool)
        self.centre_xy: tuple[float, float] | None = None
        self.show_labels = True
        self.labelled_elsewhere = np.zeros(0, bool)  # reflections whose measured spot carries the label

    def set_predicted(self, xy, hkl, intensity, forbidden, centre_xy=None, labelled_elsewhere=None) -> None:
        self.xy = np.asarray(xy, dtype=float).reshape(-1, 2)
        self.hkl = [tuple(int(v) for v in h) for h in hkl]
        self.intensity = np.clip(np.asarray(intensity, dtype=float).reshape(-1), 0, 1)
        self.forbidden = np.asarray(forbidden, dtype=bool).reshape(-1)
        self.centre_xy = centre_xy
        n = len(self.xy)
        self.labelled_elsewhere = (np.zeros(n, bool) if labelled_elsewhere is None
                                   else np.asarray(labelled_elsewhere, bool).reshape(-1))
        self.update()

    @property
    def count(self) -> int:
        return len(self.xy)

    def draw(self, painter, t, device):
        n = len(self.xy)
        if n == 0:
            return
        dev = map_points(t, self.xy)
        # label only when the grid is open enough on screen
        label_ok = self.show_labels
        if label_ok and n > 1:
            c = dev.mean(axis=0)
            r = np.hypot(*(dev - c).T)
            r = r[r > 1.0]
            label_ok = r.size > 0 and float(r.min()) >= 30.0
        painter.setFont(_label_font(7.5))
        colour = COLOURS["predicted"]
        for i in range(n):
            x, y = dev[i]
            if not device.contains(QPointF(x, y)):
                continue
            half = 3.0 + 5.0 * math.sqrt(float(self.intensity[i]))
            forb = bool(self.forbidden[i])
            pen = QPen(COLOURS["forbidden"] if forb else colour, 1.4)
            if forb:
                pen.setStyle(Qt.PenStyle.DotLine)
            painter.setBrush(Qt.BrushStyle.NoBrush)
            painter.setPen(QPen(QColor(0, 0, 0, 140), 3.0))
            painter.drawRect(QRectF(x - half, y - half, 2 * half, 2 * half))
            painter.setPen(pen)
            painter.drawRect(QRectF(x - half, y - half, 2 * half, 2 * half))
            if label_ok and not (i < len(self.labelled_elsewhere) and self.labelled_elsewhere[i]):
                draw_indices(painter, x - 10, y + half + 2, self.hkl[i],
                             colour=COLOURS["forbidden"] if forb else colour)


class RingLayer(_ScreenLayer):
    """Rings (ideal radius, drawn with the distortion) with their labels."""

    def __init__(self) -> None:
        super().__init__(2)
        self.centre_xy: tuple[float, float] | None = None
        self.radii = np.zeros(0)
        self.labels: list = []  # (hkl or None, d_A or None)
        self.ellipticity = 0.0
        self.major_axis_deg = 0.0
        self.show_labels = True
        self.placed: list = []  # PlacedLabel (device px) of the last drawing, None where left out

    def set_rings(self, centre_xy, radii, labels, ellipticity: float = 0.0, major_axis_deg: float = 0.0) -> None:
        self.centre_xy = None if centre_xy is None else (float(centre_xy[0]), float(centre_xy[1]))
        self.radii = np.asarray(radii, dtype=float).reshape(-1)
        self.labels = list(labels)
        self.ellipticity = float(ellipticity)
        self.major_axis_deg = float(major_axis_deg)
        self.update()

    @property
    def count(self) -> int:
        return 0 if self.centre_xy is None else len(self.radii)

    def _ring_points(self, r: float, n: int = 240) -> np.ndarray:
        a = np.linspace(0, 2 * np.pi, n + 1)
        e, phi = self.ellipticity, math.radians(self.major_axis_deg)
        u = np.stack([r * (1 + e / 2) * np.cos(a), r * (1 - e / 2) * np.sin(a)], axis=1)
        c, s = math.cos(phi), math.sin(phi)
        rot = np.array([[c, -s], [s, c]])
        return u @ rot.T + np.array(self.centre_xy)

    def draw(self, painter, t, device):
        if self.centre_xy is None or len(self.radii) == 0:
            return
        pen = QPen(COLOURS["rings"], 1.3)
        pen.setStyle(Qt.PenStyle.DashLine)
        painter.setFont(_label_font(8.0))
        for r in self.radii:
            pts = map_points(t, self._ring_points(r))
            painter.setBrush(Qt.BrushStyle.NoBrush)
            painter.setPen(pen)
            painter.drawPolyline(QPolygonF([QPointF(x, y) for x, y in pts]))
        self.placed = []
        if not self.show_labels:
            return
        self.placed = self._place_labels(painter, t, device.adjusted(40, 40, -40, -40))
        col = COLOURS["rings"]
        for lab in self.placed:
            if lab is None:
                continue
            hkl, d = self.labels[lab.index]
            x0, y0, x1, y1 = lab.box
            if lab.leader:
                painter.setPen(QPen(col, 0.9))
                near = (min(max(lab.anchor_xy[0], x0), x1), min(max(lab.anchor_xy[1], y0), y1))
                painter.drawLine(QPointF(*lab.anchor_xy), QPointF(*near))
            if hkl is not None:
                rect = draw_indices(painter, x0, y0, hkl, colour=col)
                if d is not None:
                    _draw_text_box(painter, rect.right() + 1, y0, [f"{d:.4f} Å"], col)
            elif d is not None:
                _draw_text_box(painter, x0, y0, [f"{d:.4f} Å"], col)

    def _label_size(self, painter, i: int) -> tuple[float, float]:
        hkl, d = self.labels[i]
        w = h = 0.0
        if hkl is not None:
            iw, ih = indices_size(painter, hkl)
            w, h = iw + 1, ih
        if d is not None:
            fm = QFontMetricsF(painter.font())
            w += fm.horizontalAdvance(f"{d:.4f} Å") + 8
            h = max(h, fm.height() + 6)
        return w, h

    def _place_labels(self, painter, t, bounds: QRectF) -> list:
        """Non-overlapping places of the ring labels in device pixels (inner rings first); None: left out."""
        from saedkit.core.presentation.label_layout import place_labels, ring_label_places

        cx, cy = self.centre_xy
        c_dev = map_points(t, np.array([[cx, cy]]))[0]
        e, phi = self.ellipticity, math.radians(self.major_axis_deg)
        rot = np.array([[math.cos(phi), -math.sin(phi)], [math.sin(phi), math.cos(phi)]])
        scale = self._scale(t)
        places = []
        for i, r in enumerate(self.radii):
            if i >= len(self.labels) or self.labels[i] == (None, None):
                places.append([])
                continue

            def point_at(a_deg, r_dev, r=r):
                # the point of the drawn (distorted) ring at azimuth a, pushed out to r_dev on screen
                a = math.radians(a_deg)
                v = rot @ np.array([math.cos(a), math.sin(a)])
                u = np.linalg.solve(rot, v)  # direction in the ellipse's own frame
                k = r / math.hypot(u[0] / (1 + e / 2), u[1] / (1 - e / 2))
                on = map_points(t, np.array([[cx + k * v[0], cy + k * v[1]]]))[0]
                off = on - c_dev
                n = float(np.hypot(*off)) or 1.0
                return tuple(on + off / n * (r_dev - r * scale))

            places.append(ring_label_places((c_dev[0], c_dev[1]), r * scale, self._label_size(painter, i),
                                            ring_number=i, point_at=point_at))
        return place_labels(places, bounds=(bounds.left(), bounds.top(), bounds.right(), bounds.bottom()),
                            gap_px=2.0)


class EllipseLayer(_ScreenLayer):
    """The elliptical distortion: major (solid) and minor (dotted) axes through the centre."""

    def __init__(self) -> None:
        super().__init__(3)
        self.centre_xy: tuple[float, float] | None = None
        self.length_px = 0.0
        self.ellipticity = 0.0
        self.major_axis_deg = 0.0

    def set_ellipse(self, centre_xy, length_px: float, ellipticity: float, major_axis_deg: float) -> None:
        self.centre_xy = None if centre_xy is None else (float(centre_xy[0]), float(centre_xy[1]))
        self.length_px = float(length_px)
        self.ellipticity = float(ellipticity)
        self.major_axis_deg = float(major_axis_deg)
        self.update()

    def draw(self, painter, t, device):
        if self.centre_xy is None or self.length_px <= 0 or self.ellipticity <= 0:
            return
        cx, cy = self.centre_xy
        phi = math.radians(self.major_axis_deg)
        L = self.length_px
        major = np.array([[cx - L * math.cos(phi), cy - L * math.sin(phi)],
                          [cx + L * math.cos(phi), cy + L * math.sin(phi)]])
        minor = np.array([[cx + L * math.sin(phi), cy - L * math.cos(phi)],
                          [cx - L * math.sin(phi), cy + L * math.cos(phi)]])
        a, b = map_points(t, major)
        c, d = map_points(t, minor)
        col = COLOURS["ellipse"]
        painter.setPen(QPen(col, 1.4))
        painter.drawLine(QPointF(*a), QPointF(*b))
        pen = QPen(col, 1.2)
        pen.setStyle(Qt.PenStyle.DotLine)
        painter.setPen(pen)
        painter.drawLine(QPointF(*c), QPointF(*d))
        painter.setFont(_label_font(8.0))
        _draw_text_box(painter, b[0] + 4, b[1] + 4,
                       [f"e = {100 * self.ellipticity:.2f} %", f"major axis {self.major_axis_deg:.1f}°"], col)


class MeasureLayer(_ScreenLayer):
    """The ruler: two points, the line between them and the read-out."""

    def __init__(self) -> None:
        super().__init__(7)
        self.a: tuple[float, float] | None = None
        self.b: tuple[float, float] | None = None
        self.centre: tuple[float, float] | None = None
        self.friedel = False
        self.lines: list[str] = []
        self.label_rect: QRectF | None = None  # the read-out box as last drawn (device px)

    def set_points(self, a, b=None, *, lines: Sequence[str] = (), centre=None, friedel: bool = False) -> None:
        self.a = None if a is None else (float(a[0]), float(a[1]))
        self.b = None if b is None else (float(b[0]), float(b[1]))
        self.lines = list(lines)
        self.centre = None if centre is None else (float(centre[0]), float(centre[1]))
        self.friedel = friedel
        self.update()

    def clear(self) -> None:
        self.set_points(None)

    def draw(self, painter, t, device):
        if self.a is None:
            return
        col = COLOURS["measure"]
        pts = [self.a] + ([self.b] if self.b is not None else [])
        dev = map_points(t, np.array(pts))
        painter.setBrush(Qt.BrushStyle.NoBrush)
        if len(dev) == 2:
            if not self.friedel and self.centre is not None:
                c = map_points(t, np.array([self.centre]))[0]
                pen = QPen(col, 1.0)
                pen.setStyle(Qt.PenStyle.DashLine)
                painter.setPen(pen)
                painter.drawLine(QPointF(*c), QPointF(*dev[0]))
                painter.drawLine(QPointF(*c), QPointF(*dev[1]))
            painter.setPen(QPen(QColor(0, 0, 0, 150), 3.2))
            painter.drawLine(QPointF(*dev[0]), QPointF(*dev[1]))
            painter.setPen(QPen(col, 1.6))
            painter.drawLine(QPointF(*dev[0]), QPointF(*dev[1]))
            if self.friedel:
                m = dev.mean(axis=0)
                painter.drawLine(QPointF(m[0] - 5, m[1] - 5), QPointF(m[0] + 5, m[1] + 5))
                painter.drawLine(QPointF(m[0] - 5, m[1] + 5), QPointF(m[0] + 5, m[1] - 5))
        painter.setPen(QPen(col, 1.6))
        for x, y in dev:
            painter.drawLine(QPointF(x - 7, y), QPointF(x + 7, y))
            painter.drawLine(QPointF(x, y - 7), QPointF(x, y + 7))
        self.label_rect = None
        if self.lines and len(dev) == 2:
            painter.setFont(_label_font(8.5))
            fm = QFontMetricsF(painter.font())
            w = max(fm.horizontalAdvance(s) for s in self.lines) + 8
            h = fm.height() * len(self.lines) + 6
            inner = device.adjusted(40, 40, -40, -40)
            x, y = dev[1][0] + 10, dev[1][1] + 10
            # never clipped by the view's edge: flip to the other side of the point, then keep inside
            if x + w > inner.right():
                x = dev[1][0] - 10 - w
            if y + h > inner.bottom():
                y = dev[1][1] - 10 - h
            x = min(max(x, inner.left()), inner.right() - w)
            y = min(max(y, inner.top()), inner.bottom() - h)
            self.label_rect = _draw_text_box(painter, x, y, self.lines, col)


class StrokeLayer(_ScreenLayer):
    """Live preview of a mask edit: the brush stroke, the brush outline, a polygon being drawn."""

    def __init__(self) -> None:
        super().__init__(8)
        self.stroke = np.zeros((0, 2))
        self.radius_px = 0.0
        self.cursor: tuple[float, float] | None = None
        self.polygon = np.zeros((0, 2))
        self.erase = False

    def set_state(self, *, stroke=None, radius_px=None, cursor=None, polygon=None, erase=None) -> None:
        if stroke is not None:
            self.stroke = np.asarray(stroke, float).reshape(-1, 2)
        if radius_px is not None:
            self.radius_px = float(radius_px)
        if polygon is not None:
            self.polygon = np.asarray(polygon, float).reshape(-1, 2)
        if erase is not None:
            self.erase = bool(erase)
        self.cursor = cursor
        self.update()

    def draw(self, painter, t, device):
        scale = self._scale(t)
        col = QColor(255, 120, 120, 130) if self.erase else COLOURS["stroke"]
        if len(self.stroke):
            dev = map_points(t, self.stroke)
            pen = QPen(col, max(1.0, 2 * self.radius_px * scale))
            pen.setCapStyle(Qt.PenCapStyle.RoundCap)
            pen.setJoinStyle(Qt.PenJoinStyle.RoundJoin)
            painter.setPen(pen)
            if len(dev) == 1:
                painter.drawPoint(QPointF(*dev[0]))
            else:
                painter.drawPolyline(QPolygonF([QPointF(x, y) for x, y in dev]))
        if self.cursor is not None and self.radius_px > 0 and not len(self.polygon):
            c = map_points(t, np.array([self.cursor]))[0]
            painter.setPen(QPen(QColor("white"), 1.0, Qt.PenStyle.DashLine))
            painter.setBrush(Qt.BrushStyle.NoBrush)
            r = self.radius_px * scale
            painter.drawEllipse(QPointF(*c), r, r)
        if len(self.polygon):
            pts = self.polygon if self.cursor is None else np.vstack([self.polygon, [self.cursor]])
            dev = map_points(t, pts)
            painter.setPen(QPen(QColor("white"), 1.2, Qt.PenStyle.DashLine))
            painter.setBrush(QBrush(col))
            painter.drawPolygon(QPolygonF([QPointF(x, y) for x, y in dev]))
            painter.setBrush(QBrush(QColor("white")))
            for x, y in map_points(t, self.polygon):
                painter.drawEllipse(QPointF(x, y), 2.5, 2.5)


class ImageLayer(QGraphicsItem):
    """A 32-bit image drawn straight from a numpy buffer (no QPixmap conversion).

    Pixel ``(col, row)`` of the buffer covers the scene square centred on
    ``(col·step, row·step)``; the buffer is kept alive with the QImage.
    Drawn without smoothing, so the cost of a paint follows the screen area,
    not the image size.
    """

    def __init__(self, z: float) -> None:
        super().__init__()
        self.setZValue(z)
        self.setAcceptedMouseButtons(Qt.MouseButton.NoButton)
        self._qimage: QImage | None = None
        self._buffer: np.ndarray | None = None
        self._rect = QRectF()

    def set_argb(self, argb: np.ndarray | None, *, step: int = 1, opaque: bool = True) -> None:
        """Show a (rows, cols) uint32 0xAARRGGBB array (premultiplied when not opaque); None clears."""
        self.prepareGeometryChange()
        if argb is None:
            self._qimage, self._buffer, self._rect = None, None, QRectF()
            self.update()
            return
        buf = np.ascontiguousarray(argb, dtype=np.uint32)
        rows, cols = buf.shape
        fmt = QImage.Format.Format_RGB32 if opaque else QImage.Format.Format_ARGB32_Premultiplied
        self._qimage = QImage(buf.data, cols, rows, buf.strides[0], fmt)
        self._buffer = buf
        self._rect = QRectF(-0.5 * step, -0.5 * step, cols * step, rows * step)
        self.update()

    @property
    def qimage(self) -> QImage | None:
        return self._qimage

    def boundingRect(self) -> QRectF:  # noqa: N802
        return self._rect

    def paint(self, painter: QPainter, option, widget=None) -> None:
        if self._qimage is None:
            return
        painter.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform, False)
        painter.drawImage(self._rect, self._qimage)


class MaskLayer(ImageLayer):
    """The excluded pixels, tinted translucent blue."""

    def __init__(self) -> None:
        super().__init__(1)
        self.n_masked = 0
        self._argb: np.ndarray | None = None

    def adopt_buffer(self, buffer: np.ndarray) -> None:
        """Take a (rows, cols) uint32 buffer prepared elsewhere (e.g. paged in by a worker) for the next mask."""
        if buffer.dtype == np.uint32 and buffer.flags.c_contiguous and buffer.ndim == 2:
            self._argb = buffer

    def set_mask(self, mask: np.ndarray | None) -> None:
        if mask is None or not mask.any():
            self.set_argb(None)
            self.n_masked = 0
            return
        c = COLOURS["mask"]
        a = c.alpha() / 255.0
        premultiplied = ((c.alpha() << 24) | (int(c.red() * a) << 16) | (int(c.green() * a) << 8)
                         | int(c.blue() * a))
        m8 = np.ascontiguousarray(mask).view(np.uint8)
        # reuse the buffer of the last mask (a fresh 4096² ARGB buffer costs more in page faults than to fill)
        if self._argb is None or self._argb.shape != m8.shape:
            self._argb = np.empty(m8.shape, dtype=np.uint32)
        np.multiply(m8, np.uint32(premultiplied), out=self._argb, dtype=np.uint32)
        self.set_argb(self._argb, opaque=False)
        self.n_masked = int(np.count_nonzero(mask))


def path_from_points(xy: np.ndarray) -> QPainterPath:
    """A polyline path through scene points."""
    path = QPainterPath()
    for i, (x, y) in enumerate(np.asarray(xy, float).reshape(-1, 2)):
        if i == 0:
            path.moveTo(x, y)
        else:
            path.lineTo(x, y)
    return path
