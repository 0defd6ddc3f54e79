"""The pattern view: the image as one pixmap item, the overlay layers, zoom, pan and tools.

Scene coordinates are image pixels with the convention of the whole program:
x = column, y = row, the centre of the top-left pixel at (0, 0). The pixmap
is placed at (−0.5, −0.5) so that a pixel's centre sits on its integer
coordinate.
"""

from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import QPointF, QRectF, Qt, Signal
from PySide6.QtGui import QColor, QFont, QFontMetricsF, QPainter, QPen, QTransform
from PySide6.QtWidgets import QGraphicsScene, QGraphicsView

from saedkit.gui._compat import emit

from saedkit.core.errors import SaedkitError
from saedkit.gui.display import calculate_colour_table
from saedkit.gui.overlays import (
    CentreLayer,
    ImageLayer,
    EllipseLayer,
    MaskLayer,
    MeasureLayer,
    PredictedLayer,
    RingLayer,
    SpotLayer,
    StrokeLayer,
)

__all__ = ["PatternView", "LAYER_NAMES", "calculate_argb_image"]


def calculate_argb_image(image8: np.ndarray, colour_table) -> np.ndarray:
    """The 32-bit screen pixels of an 8-bit image through a colour table (numpy only; safe in a worker)."""
    return _apply_lut(np.asarray(colour_table, dtype=np.uint32), np.ascontiguousarray(image8, dtype=np.uint8))


def _apply_lut(lut: np.ndarray, image8: np.ndarray) -> np.ndarray:
    """0xFFRRGGBB pixels of an 8-bit image through a 256-colour table (threads for big images)."""
    out = np.empty(image8.shape, dtype=np.uint32)
    if image8.size < 1_000_000:
        np.take(lut, image8, out=out)
        return out
    from saedkit.gui.display import _pool

    edges = np.linspace(0, image8.shape[0], 9).astype(int)
    futures = [_pool().submit(np.take, lut, image8[a:b], None, out[a:b]) for a, b in zip(edges[:-1], edges[1:])]
    for f in futures:
        f.result()
    return out

#: Overlay layers the user can show or hide, with their menu text.
LAYER_NAMES = {
    "centre": "Centre",
    "spots": "Spots",
    "labels": "Spot and grid labels",
    "predicted": "Predicted grid",
    "rings": "Rings",
    "ellipse": "Distortion axes",
    "scale_bar": "Scale bar (nm⁻¹)",
    "mask": "Mask",
}

_MIN_SCALE, _MAX_SCALE = 0.02, 64.0


class PatternView(QGraphicsView):
    """Shows a pattern with its overlays and passes mouse and key events to the current tool.

    Signals
    -------
    cursor_moved(float x, float y)
        Scene (image) coordinates under the mouse.
    cursor_left()
    view_changed()
        Zoom or scroll changed.
    files_dropped(list)
        Paths dropped on the view.
    """

    cursor_moved = Signal(float, float)
    cursor_left = Signal()
    view_changed = Signal()
    files_dropped = Signal(list)

    def __init__(self, parent=None) -> None:
        super().__init__(parent)
        self.setObjectName("patternView")
        scene = QGraphicsScene(self)
        self.setScene(scene)
        self.setBackgroundBrush(QColor("#14181d"))
        self.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform, False)
        self.setViewportUpdateMode(QGraphicsView.ViewportUpdateMode.FullViewportUpdate)
        self.setTransformationAnchor(QGraphicsView.ViewportAnchor.AnchorUnderMouse)
        self.setResizeAnchor(QGraphicsView.ViewportAnchor.AnchorViewCenter)
        self.setMouseTracking(True)
        self.setAcceptDrops(True)
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.setOptimizationFlag(QGraphicsView.OptimizationFlag.DontAdjustForAntialiasing, True)

        self.image_item = ImageLayer(0)
        scene.addItem(self.image_item)
        self.mask_layer = MaskLayer()
        self.ring_layer = RingLayer()
        self.ellipse_layer = EllipseLayer()
        self.predicted_layer = PredictedLayer()
        self.spot_layer = SpotLayer()
        self.centre_layer = CentreLayer()
        self.measure_layer = MeasureLayer()
        self.stroke_layer = StrokeLayer()
        self.layers = {
            "mask": self.mask_layer, "rings": self.ring_layer, "ellipse": self.ellipse_layer,
            "predicted": self.predicted_layer, "spots": self.spot_layer, "centre": self.centre_layer,
            "measure": self.measure_layer, "stroke": self.stroke_layer,
        }
        for item in self.layers.values():
            scene.addItem(item)
        self.visible = {name: True for name in LAYER_NAMES}
        self.visible["ellipse"] = False
        self.ellipse_layer.setVisible(False)

        self.shape: tuple[int, int] | None = None
        self._lut = np.zeros(256, np.uint32)
        self._image8: np.ndarray | None = None
        self._image_step = 1
        self.tool = None
        self._pan_from: QPointF | None = None
        self.camera_constant_px_A: float | None = None  # for the reciprocal-space scale bar
        self.first_paint_done = False
        self.paint_count = 0

    # -- image ---------------------------------------------------------------- #

    def set_image8(self, image8: np.ndarray, colour_table: list[int], *, step: int = 1,
                   shape: tuple[int, int] | None = None, argb: np.ndarray | None = None) -> None:
        """Show an 8-bit image (every ``step``-th pixel of the pattern) with a colour table.

        ``argb``: the same image already through the colour table
        (:func:`calculate_argb_image`, e.g. computed in a worker).
        """
        arr = np.ascontiguousarray(image8, dtype=np.uint8)
        rows, cols = arr.shape
        self._image8 = arr
        self._image_step = step
        self._lut = np.asarray(colour_table, dtype=np.uint32)
        if argb is None or argb.shape != arr.shape:
            argb = _apply_lut(self._lut, arr)
        self.image_item.set_argb(argb, step=step)
        new_shape = tuple(shape) if shape is not None else (rows * step, cols * step)
        if new_shape != self.shape:
            self.shape = new_shape
            rect = self.image_rect()
            # room around the image, so that zooming keeps the point under the cursor in place
            self.scene().setSceneRect(rect.adjusted(-rect.width(), -rect.height(), rect.width(), rect.height()))
            for layer in self.layers.values():
                if hasattr(layer, "set_image_rect"):
                    layer.set_image_rect(rect)

    def set_colour_table(self, colour_table: list[int], *, argb: np.ndarray | None = None) -> None:
        """Change the colour map without recomputing the 8-bit image."""
        if self._image8 is None:
            return
        self._lut = np.asarray(colour_table, dtype=np.uint32)
        if argb is None or argb.shape != self._image8.shape:
            argb = _apply_lut(self._lut, self._image8)
        self.image_item.set_argb(argb, step=self._image_step)

    @property
    def image8(self) -> np.ndarray | None:
        """The 8-bit screen image shown (before the colour table)."""
        return self._image8

    def clear_image(self) -> None:
        self.image_item.set_argb(None)
        self._image8 = None
        self.shape = None

    def image_rect(self) -> QRectF:
        if self.shape is None:
            return QRectF()
        rows, cols = self.shape
        return QRectF(-0.5, -0.5, cols, rows)

    # -- visibility -------------------------------------------------------------- #

    def set_layer_visible(self, name: str, visible: bool) -> None:
        self.visible[name] = bool(visible)
        if name == "labels":
            self.spot_layer.show_labels = visible
            self.predicted_layer.show_labels = visible
            self.ring_layer.show_labels = visible
            self.viewport().update()
        elif name == "scale_bar":
            self.viewport().update()
        elif name in self.layers:
            self.layers[name].setVisible(visible)

    def is_layer_visible(self, name: str) -> bool:
        if name in ("labels", "scale_bar"):
            return self.visible[name]
        return self.layers[name].isVisible()

    # -- zoom ------------------------------------------------------------------ #

    def scale_factor(self) -> float:
        t = self.transform()
        return math.hypot(t.m11(), t.m12())

    def fit(self) -> None:
        """Fit the whole image in the window."""
        if self.shape is None:
            return
        self.fitInView(self.image_rect(), Qt.AspectRatioMode.KeepAspectRatio)
        emit(self.view_changed)

    def actual_size(self) -> None:
        """One image pixel per screen pixel, around the view's centre."""
        centre = self.mapToScene(self.viewport().rect().center())
        self.setTransform(QTransform())
        self.centerOn(centre)
        emit(self.view_changed)

    def zoom_by(self, factor: float, *, anchor_view: QPointF | None = None) -> None:
        """Zoom by ``factor`` keeping the scene point under ``anchor_view`` (viewport pixels; default centre) fixed."""
        s = self.scale_factor()
        factor = min(max(factor, _MIN_SCALE / s), _MAX_SCALE / s)
        if anchor_view is None:
            anchor_view = QPointF(self.viewport().rect().center())
        scene_pt = self.mapToScene(anchor_view.toPoint())
        old = self.transformationAnchor()
        self.setTransformationAnchor(QGraphicsView.ViewportAnchor.NoAnchor)
        self.scale(factor, factor)
        moved = QPointF(self.mapFromScene(scene_pt)) - anchor_view
        self.horizontalScrollBar().setValue(self.horizontalScrollBar().value() + int(round(moved.x())))
        self.verticalScrollBar().setValue(self.verticalScrollBar().value() + int(round(moved.y())))
        self.setTransformationAnchor(old)
        emit(self.view_changed)

    def wheelEvent(self, event) -> None:  # noqa: N802 - Qt API
        delta = event.angleDelta().y() or event.angleDelta().x()
        if delta == 0:
            return
        self.zoom_by(1.2 ** (delta / 120.0), anchor_view=event.position())
        event.accept()

    def scrollContentsBy(self, dx: int, dy: int) -> None:  # noqa: N802 - Qt API
        super().scrollContentsBy(dx, dy)
        emit(self.view_changed)

    def screen_distance(self, a_xy, b_xy) -> float:
        """Distance on screen (device pixels) between two scene points."""
        return math.hypot(a_xy[0] - b_xy[0], a_xy[1] - b_xy[1]) * self.scale_factor()

    # -- events ----------------------------------------------------------------- #

    def _tool_call(self, fn, *args):
        """Run a tool's handler; an expected failure becomes a message in the window."""
        try:
            return fn(*args)
        except SaedkitError as exc:
            ctx = getattr(self.tool, "ctx", None)
            if ctx is not None and hasattr(ctx, "notify"):
                ctx.notify(str(exc), "error")
                return True
            raise

    def _scene_xy(self, event) -> tuple[float, float]:
        p = self.mapToScene(event.position().toPoint())
        return p.x(), p.y()

    def mousePressEvent(self, event) -> None:  # noqa: N802
        if event.button() == Qt.MouseButton.MiddleButton or (
                event.button() == Qt.MouseButton.LeftButton and self.tool is not None and self.tool.pans):
            self._pan_from = event.position()
            self.viewport().setCursor(Qt.CursorShape.ClosedHandCursor)
            event.accept()
            return
        if self.tool is not None and self.shape is not None:
            if self._tool_call(self.tool.press, self._scene_xy(event), event.button(), event.modifiers()):
                event.accept()
                return
        super().mousePressEvent(event)

    def mouseMoveEvent(self, event) -> None:  # noqa: N802
        if self._pan_from is not None:
            d = event.position() - self._pan_from
            self._pan_from = event.position()
            self.horizontalScrollBar().setValue(self.horizontalScrollBar().value() - int(round(d.x())))
            self.verticalScrollBar().setValue(self.verticalScrollBar().value() - int(round(d.y())))
            event.accept()
            return
        xy = self._scene_xy(event)
        if self.shape is not None:
            emit(self.cursor_moved, *xy)
        if self.tool is not None and self.shape is not None:
            self._tool_call(self.tool.move, xy, event.buttons(), event.modifiers())
        super().mouseMoveEvent(event)

    def mouseReleaseEvent(self, event) -> None:  # noqa: N802
        if self._pan_from is not None:
            self._pan_from = None
            self.viewport().setCursor(self.tool.cursor if self.tool is not None else Qt.CursorShape.ArrowCursor)
            event.accept()
            return
        if self.tool is not None and self.shape is not None:
            if self._tool_call(self.tool.release, self._scene_xy(event), event.button(), event.modifiers()):
                event.accept()
                return
        super().mouseReleaseEvent(event)

    def mouseDoubleClickEvent(self, event) -> None:  # noqa: N802
        if self.tool is not None and self.shape is not None and event.button() == Qt.MouseButton.LeftButton:
            if self._tool_call(self.tool.double_click, self._scene_xy(event), event.modifiers()):
                event.accept()
                return
        super().mouseDoubleClickEvent(event)

    def keyPressEvent(self, event) -> None:  # noqa: N802
        if self.tool is not None and self._tool_call(self.tool.key, event.key(), event.modifiers()):
            event.accept()
            return
        super().keyPressEvent(event)

    def leaveEvent(self, event) -> None:  # noqa: N802
        emit(self.cursor_left)
        if self.tool is not None:
            self.tool.leave()
        super().leaveEvent(event)

    def dragEnterEvent(self, event) -> None:  # noqa: N802
        if event.mimeData().hasUrls():
            event.acceptProposedAction()
        else:
            super().dragEnterEvent(event)

    def dragMoveEvent(self, event) -> None:  # noqa: N802
        if event.mimeData().hasUrls():
            event.acceptProposedAction()
        else:
            super().dragMoveEvent(event)

    def dropEvent(self, event) -> None:  # noqa: N802
        paths = [u.toLocalFile() for u in event.mimeData().urls() if u.isLocalFile()]
        if paths:
            event.acceptProposedAction()
            emit(self.files_dropped, paths)
        else:
            super().dropEvent(event)

    def paintEvent(self, event) -> None:  # noqa: N802
        super().paintEvent(event)
        self.paint_count += 1
        if self.shape is not None:
            self.first_paint_done = True

    # -- the scale bar -------------------------------------------------------------- #

    def drawForeground(self, painter: QPainter, rect: QRectF) -> None:  # noqa: N802
        if not self.visible.get("scale_bar") or not self.camera_constant_px_A or self.shape is None:
            return
        k = float(self.camera_constant_px_A)
        scale = self.scale_factor()
        # |g| in nm⁻¹ → pixels: R = K·g (g in Å⁻¹) = K·g_nm/10
        px_per_nm_inv = k / 10.0 * scale
        if px_per_nm_inv <= 0:
            return
        choice = None
        for g in (0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50):
            if 60 <= g * px_per_nm_inv <= 220:
                choice = g
                break
        if choice is None:
            choice = min((0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50), key=lambda g: abs(g * px_per_nm_inv - 120))
        length = choice * px_per_nm_inv
        painter.save()
        painter.resetTransform()
        painter.setRenderHint(QPainter.RenderHint.Antialiasing, True)
        vp = self.viewport().rect()
        x0, y0 = vp.left() + 18, vp.bottom() - 22
        font = QFont()
        font.setPointSizeF(9)
        painter.setFont(font)
        text = f"{choice:g} nm⁻¹"
        fm = QFontMetricsF(font)
        box = QRectF(x0 - 8, y0 - fm.height() - 10, max(length, fm.horizontalAdvance(text)) + 16, fm.height() + 22)
        painter.fillRect(box, QColor(10, 14, 20, 170))
        painter.setPen(QPen(QColor("white"), 3))
        painter.drawLine(QPointF(x0, y0), QPointF(x0 + length, y0))
        painter.setPen(QPen(QColor("white"), 1.5))
        painter.drawLine(QPointF(x0, y0 - 5), QPointF(x0, y0 + 5))
        painter.drawLine(QPointF(x0 + length, y0 - 5), QPointF(x0 + length, y0 + 5))
        painter.drawText(QPointF(x0, y0 - 7), text)
        painter.restore()
        self.scale_bar_nm_inv = choice

    def set_colours_from_name(self, name: str, invert: bool) -> None:
        self.set_colour_table(calculate_colour_table(name, invert=invert))
