"""Tools: what a click on the pattern does. One tool is active at a time.

Each tool gets scene (image) coordinates from the view and edits the session
through the main window (``ctx``): the tools hold no science, they call
``snap_to_spot``, ``manual_centre``, ``mask_disc`` / ``mask_polygon`` and the
session's measurement functions. ``click(xy)`` is a press and a release at
the same place, for scripts and tests.
"""

from __future__ import annotations

import math

import numpy as np
from PySide6.QtCore import Qt

from saedkit.core.detection.centre import manual_centre
from saedkit.core.errors import SaedkitError
from saedkit.gui.panels import fmt_pm

__all__ = ["Tool", "PanTool", "CentreTool", "SpotTool", "RulerTool", "MaskTool", "ProfileTool", "TOOL_CLASSES"]

_HIT_PX = 9.0  # how close (screen pixels) a click must be to a marker to grab it

LEFT = Qt.MouseButton.LeftButton
RIGHT = Qt.MouseButton.RightButton
NO_MOD = Qt.KeyboardModifier.NoModifier


def _has(mods, flag) -> bool:
    return bool(mods & flag)


class Tool:
    """Base class: ignores everything."""

    name = "tool"
    title = "Tool"
    hint = ""
    pans = False
    cursor = Qt.CursorShape.ArrowCursor

    def __init__(self, ctx) -> None:
        self.ctx = ctx

    @property
    def view(self):
        return self.ctx.view

    @property
    def session(self):
        return self.ctx.session

    def activate(self) -> None:
        self.view.viewport().setCursor(self.cursor)

    def deactivate(self) -> None:
        pass

    def press(self, xy, button, mods) -> bool:
        return False

    def move(self, xy, buttons, mods) -> None:
        pass

    def release(self, xy, button, mods) -> bool:
        return False

    def double_click(self, xy, mods) -> bool:
        return False

    def key(self, key, mods) -> bool:
        return False

    def leave(self) -> None:
        pass

    def click(self, xy, *, button=LEFT, mods=NO_MOD) -> None:
        """A press and release at ``xy`` (scene coordinates)."""
        self.press(xy, button, mods)
        self.release(xy, button, mods)

    def _inside(self, xy) -> bool:
        shape = self.view.shape
        if shape is None:
            return False
        rows, cols = shape
        return -0.5 <= xy[0] <= cols - 0.5 and -0.5 <= xy[1] <= rows - 0.5

    def _nearest_spot(self, xy) -> int | None:
        s = self.session
        if s is None or not s.spots:
            return None
        pts = s.spots_xy
        d = np.hypot(*(pts - np.asarray(xy, float)).T)
        i = int(np.argmin(d))
        return i if d[i] * self.view.scale_factor() <= _HIT_PX else None


class PanTool(Tool):
    """Drag to pan; wheel to zoom."""

    name = "pan"
    title = "Pan"
    hint = "Drag to move the pattern; wheel to zoom around the cursor."
    pans = True
    cursor = Qt.CursorShape.OpenHandCursor


class CentreTool(Tool):
    """Click the direct beam to set the centre there (refined on the beam), or Shift+click three points of a ring."""

    name = "centre"
    title = "Centre"
    hint = "Click the direct beam to centre on it (refined to its middle; Alt+click: exactly there), or " \
           "Shift+click three points on one ring; drag the centre marker to move it. Automatic centring: Analyse menu."
    cursor = Qt.CursorShape.CrossCursor

    def __init__(self, ctx) -> None:
        super().__init__(ctx)
        self._drag = False
        self.ring_points: list[tuple[float, float]] = []

    def deactivate(self) -> None:
        self._clear_ring_points()

    def _clear_ring_points(self) -> None:
        self.ring_points = []
        self.view.stroke_layer.set_state(polygon=np.zeros((0, 2)))

    def press(self, xy, button, mods) -> bool:
        if button != LEFT or self.session is None or not self._inside(xy):
            return False
        if _has(mods, Qt.KeyboardModifier.ShiftModifier):
            return True
        self._drag = True
        self.view.centre_layer.set_centre(xy)
        return True

    def move(self, xy, buttons, mods) -> None:
        if self._drag and buttons & LEFT:
            self.view.centre_layer.set_centre(xy)

    def release(self, xy, button, mods) -> bool:
        if button != LEFT or self.session is None:
            return False
        if _has(mods, Qt.KeyboardModifier.ShiftModifier) and not self._drag:
            self._add_ring_point(xy)
            return True
        if not self._drag:
            return False
        self._drag = False
        if not self._inside(xy):
            self.ctx.refresh_overlays()
            return True
        self._clear_ring_points()
        exact = _has(mods, Qt.KeyboardModifier.AltModifier)
        beam = None if exact else self.ctx.find_beam_at(xy)
        if beam is not None:
            self.session.set_centre(manual_centre(float(beam.x), float(beam.y), sigma_px=max(
                0.1, float(np.nan_to_num(math.hypot(beam.sigma_x, beam.sigma_y) / math.sqrt(2), nan=0.5)))),
                label="Centre on the direct beam")
            self.ctx.show_status(f"Centre on the direct beam: ({beam.x:.2f}, {beam.y:.2f}) px.")
        else:
            self.session.set_centre(manual_centre(float(xy[0]), float(xy[1]), sigma_px=1.0), label="Set centre by hand")
        return True

    def _add_ring_point(self, xy) -> None:
        self.ring_points.append((float(xy[0]), float(xy[1])))
        self.view.stroke_layer.set_state(polygon=np.array(self.ring_points))
        n = len(self.ring_points)
        if n < 3:
            self.ctx.show_status(f"Ring point {n} of 3: Shift+click {3 - n} more on the same ring.")
            return
        from saedkit.core.detection.ring_points import calculate_circle_through_points

        pts, self.ring_points = self.ring_points, []
        self.view.stroke_layer.set_state(polygon=np.zeros((0, 2)))
        circle = calculate_circle_through_points(pts)
        self.session.set_centre(manual_centre(circle.x, circle.y, sigma_px=1.0), label="Centre from three ring points")
        self.ctx.show_status(f"Centre from three points on a ring: ({circle.x:.2f}, {circle.y:.2f}) px, "
                             f"R = {circle.radius_px:.1f} px.")

    def key(self, key, mods) -> bool:
        if key == Qt.Key.Key_Escape and self.ring_points:
            self._clear_ring_points()
            return True
        return False


class SpotTool(Tool):
    """Click near a spot to add it (snapped to its refined centre); drag to move; right-click to delete."""

    name = "spot"
    title = "Spot"
    hint = ("Click near a spot to add it at its refined centre (Shift: exactly where you click). "
            "Drag a spot to move it, right-click or Delete to remove it.")
    cursor = Qt.CursorShape.CrossCursor

    def __init__(self, ctx) -> None:
        super().__init__(ctx)
        self._drag_index: int | None = None
        self._moved = False
        self._press_xy = None

    def press(self, xy, button, mods) -> bool:
        if self.session is None or not self._inside(xy):
            return False
        hit = self._nearest_spot(xy)
        if button == RIGHT:
            if hit is not None:
                self.session.delete_spot(hit)
                self.ctx.select_spot(None)
            return True
        if button != LEFT:
            return False
        self._press_xy = xy
        self._moved = False
        if hit is not None:
            self._drag_index = hit
            self.ctx.select_spot(hit)
        return True

    def move(self, xy, buttons, mods) -> None:
        if self._drag_index is not None and buttons & LEFT:
            if self._press_xy is not None and self.view.screen_distance(xy, self._press_xy) > 2:
                self._moved = True
            if self._moved:
                self.view.spot_layer.set_dragging(self._drag_index, *xy)

    def release(self, xy, button, mods) -> bool:
        if button != LEFT or self._press_xy is None:
            return False
        self._press_xy = None
        exact = _has(mods, Qt.KeyboardModifier.ShiftModifier)
        if self._drag_index is not None:
            i, self._drag_index = self._drag_index, None
            self.view.spot_layer.set_dragging(None)
            if self._moved and self._inside(xy):
                spot = self.ctx.find_spot_at(xy, exact=exact, exclude=i)
                if spot is not None:
                    self.session.move_spot(i, spot)
                    self.ctx.select_spot(i)
            return True
        spot = self.ctx.find_spot_at(xy, exact=exact)
        if spot is None:
            r = self.session.settings.snap_radius_px
            self.ctx.notify(f"No spot found within {r:g} px of ({xy[0]:.1f}, {xy[1]:.1f}). "
                            "Shift-click places a spot exactly where you click.", "warning")
            return True
        i = self.session.add_spot(spot, origin="manual", label="Add spot")
        self.ctx.select_spot(i)
        return True

    def key(self, key, mods) -> bool:
        if key in (Qt.Key.Key_Delete, Qt.Key.Key_Backspace) and self.session is not None:
            i = self.ctx.selected_spot
            if i is not None and 0 <= i < len(self.session.spots):
                self.session.delete_spot(i)
                self.ctx.select_spot(None)
                return True
        return False


class RulerTool(Tool):
    """Click two spots: their distance and angle, or a Friedel pair (g, −g) across the centre."""

    name = "ruler"
    title = "Ruler"
    hint = ("Click two spots. 'Across the centre' treats them as g and −g and measures half their "
            "distance, which cancels any error of the centre.")
    cursor = Qt.CursorShape.CrossCursor

    def __init__(self, ctx) -> None:
        super().__init__(ctx)
        self.friedel = False
        self.points: list[tuple[float, float, float, float]] = []  # x, y, sigma_x, sigma_y
        self.result = None

    def deactivate(self) -> None:
        self.clear()

    def clear(self) -> None:
        self.points = []
        self.result = None
        self.view.measure_layer.clear()

    def set_friedel(self, on: bool) -> None:
        self.friedel = bool(on)
        if len(self.points) == 2:
            self._measure()

    def _point_at(self, xy, mods):
        hit = self._nearest_spot(xy)
        if hit is not None:
            s = self.session.spots[hit]
            return float(s.x), float(s.y), float(s.sigma_x), float(s.sigma_y)
        spot = self.ctx.find_spot_at(xy, exact=_has(mods, Qt.KeyboardModifier.ShiftModifier), quiet=True)
        if spot is not None:
            return float(spot.x), float(spot.y), float(spot.sigma_x), float(spot.sigma_y)
        return float(xy[0]), float(xy[1]), 1.0, 1.0

    def press(self, xy, button, mods) -> bool:
        return button == LEFT and self.session is not None and self._inside(xy)

    def release(self, xy, button, mods) -> bool:
        if button != LEFT or self.session is None or not self._inside(xy):
            return False
        if len(self.points) >= 2:
            self.points = []
            self.result = None
        self.points.append(self._point_at(xy, mods))
        if len(self.points) == 1:
            p = self.points[0]
            self.view.measure_layer.set_points(p[:2])
            self.ctx.show_ruler(None)
        else:
            self._measure()
        return True

    def move(self, xy, buttons, mods) -> None:
        if len(self.points) == 1:
            self.view.measure_layer.set_points(self.points[0][:2], xy)

    def key(self, key, mods) -> bool:
        if key == Qt.Key.Key_Escape:
            self.clear()
            self.ctx.show_ruler(None)
            return True
        return False

    def _measure(self) -> None:
        a, b = self.points
        s = self.session
        try:
            m = s.measure_pair(a[:2], b[:2], friedel=self.friedel, a_sigma_px=a[2:], b_sigma_px=b[2:])
        except SaedkitError as exc:
            self.ctx.notify(str(exc), "error")
            return
        self.result = m
        lines = describe_pair(m)
        centre = None if s.centre is None else (s.centre.x, s.centre.y)
        self.view.measure_layer.set_points(a[:2], b[:2], lines=lines, centre=centre, friedel=self.friedel)
        self.ctx.show_ruler(m)


def _pm(v: float, s: float, fmt: str) -> str:
    """'v ± s' with the decimals of ``fmt`` or more, so that s shows two significant digits."""
    if not math.isfinite(v):
        return "—"
    return fmt_pm(v, s, int(fmt.strip(".f")))


def describe_pair(m) -> list[str]:
    """Read-out lines of a PairMeasurement."""
    if m.kind == "friedel":
        lines = [f"g, −g:  R = {_pm(m.radius_px, m.radius_sigma_px, '.2f')} px"]
        if math.isfinite(m.d_A):
            lines.append(f"d = {_pm(m.d_A, m.d_sigma_A, '.4f')} Å   |g| = {10 / m.d_A:.3f} nm⁻¹")
        lines.append(f"direction {m.angle_deg:.2f}°")
        return lines
    lines = [f"distance {m.distance_px:.2f} px"]
    if math.isfinite(m.angle_deg):
        lines.append(f"angle between g₁ and g₂: {_pm(m.angle_deg, m.angle_sigma_deg, '.2f')}°")
    if math.isfinite(m.radii_px[0]):
        lines.append(f"R₁ = {m.radii_px[0]:.2f} px, R₂ = {m.radii_px[1]:.2f} px")
    if math.isfinite(m.d_each_A[0]):
        lines.append(f"d₁ = {_pm(m.d_each_A[0], m.d_each_sigma_A[0], '.4f')} Å, "
                     f"d₂ = {_pm(m.d_each_A[1], m.d_each_sigma_A[1], '.4f')} Å")
    if math.isfinite(m.d_A):
        lines.append(f"spacing of g₁ − g₂: {_pm(m.d_A, m.d_sigma_A, '.4f')} Å")
    return lines


class MaskTool(Tool):
    """Edit the mask: paint or erase with a disc brush, or draw a polygon."""

    name = "mask"
    title = "Mask"
    hint = ("Paint excluded pixels with the brush (Ctrl or 'Erase' to include them again); "
            "[ and ] change the brush size. In polygon mode click the corners and double-click "
            "or press Enter to close; Esc cancels.")
    cursor = Qt.CursorShape.CrossCursor

    def __init__(self, ctx) -> None:
        super().__init__(ctx)
        self.mode = "brush"  # or "polygon"
        self.radius_px = 12.0
        self.erase = False
        self._stroke: list[tuple[float, float]] = []
        self._stroke_erase = False
        self._polygon: list[tuple[float, float]] = []

    def deactivate(self) -> None:
        self._stroke = []
        self._polygon = []
        self.view.stroke_layer.set_state(stroke=np.zeros((0, 2)), polygon=np.zeros((0, 2)), cursor=None)

    def set_mode(self, mode: str) -> None:
        self.mode = mode
        self.deactivate()

    def _erasing(self, mods) -> bool:
        return self.erase != _has(mods, Qt.KeyboardModifier.ControlModifier)

    def press(self, xy, button, mods) -> bool:
        if button != LEFT or self.session is None:
            return False
        if self.mode == "brush":
            self._stroke = [tuple(xy)]
            self._stroke_erase = self._erasing(mods)
            self.view.stroke_layer.set_state(stroke=self._stroke, radius_px=self.radius_px, cursor=tuple(xy),
                                             erase=self._stroke_erase)
        return True

    def move(self, xy, buttons, mods) -> None:
        layer = self.view.stroke_layer
        if self.mode == "brush":
            if self._stroke and buttons & LEFT:
                last = self._stroke[-1]
                step = max(self.radius_px / 3.0, 0.5)
                dist = math.hypot(xy[0] - last[0], xy[1] - last[1])
                if dist >= step:
                    n = int(dist // step)
                    for k in range(1, n + 1):
                        f = k * step / dist
                        self._stroke.append((last[0] + f * (xy[0] - last[0]), last[1] + f * (xy[1] - last[1])))
                layer.set_state(stroke=self._stroke, radius_px=self.radius_px, cursor=tuple(xy))
            else:
                layer.set_state(radius_px=self.radius_px, cursor=tuple(xy), erase=self._erasing(mods))
        else:
            layer.set_state(polygon=self._polygon, radius_px=0, cursor=tuple(xy) if self._polygon else None,
                            erase=self._erasing(mods))

    def release(self, xy, button, mods) -> bool:
        if button != LEFT or self.session is None:
            return False
        if self.mode == "brush":
            if not self._stroke:
                return True
            pts, self._stroke = self._stroke, []
            self.view.stroke_layer.set_state(stroke=np.zeros((0, 2)), cursor=tuple(xy))
            self.ctx.paint_mask(pts, self.radius_px, erase=self._stroke_erase)
            return True
        self._polygon.append((float(xy[0]), float(xy[1])))
        self.view.stroke_layer.set_state(polygon=self._polygon, radius_px=0, cursor=tuple(xy),
                                         erase=self._erasing(mods))
        return True

    def double_click(self, xy, mods) -> bool:
        if self.mode != "polygon":
            return False
        self._close_polygon(mods)
        return True

    def _close_polygon(self, mods=NO_MOD) -> None:
        # a double-click also delivered a press/release: drop the duplicate corner
        pts = []
        for p in self._polygon:
            if not pts or math.hypot(p[0] - pts[-1][0], p[1] - pts[-1][1]) > 0.5:
                pts.append(p)
        self._polygon = []
        self.view.stroke_layer.set_state(polygon=np.zeros((0, 2)), cursor=None)
        if len(pts) < 3:
            self.ctx.notify("A polygon needs at least three corners.", "warning")
            return
        self.ctx.fill_mask_polygon(pts, erase=self._erasing(mods))

    def key(self, key, mods) -> bool:
        if key in (Qt.Key.Key_Return, Qt.Key.Key_Enter) and self.mode == "polygon" and self._polygon:
            self._close_polygon(mods)
            return True
        if key == Qt.Key.Key_Escape:
            self.deactivate()
            return True
        if key == Qt.Key.Key_Backspace and self._polygon:
            self._polygon.pop()
            self.view.stroke_layer.set_state(polygon=self._polygon, cursor=None)
            return True
        if key == Qt.Key.Key_BracketLeft:
            self.ctx.set_brush_radius(max(1.0, self.radius_px / 1.25))
            return True
        if key == Qt.Key.Key_BracketRight:
            self.ctx.set_brush_radius(min(500.0, self.radius_px * 1.25))
            return True
        return False

    def leave(self) -> None:
        self.view.stroke_layer.set_state(cursor=None)


class ProfileTool(Tool):
    """Drag a line: the intensity along it, with the spots on it; double-click on a ring: its azimuthal profile."""

    name = "profile"
    title = "Profile"
    hint = ("Drag from one point to another for the intensity along the line (spots on it marked); "
            "double-click on a ring for the intensity round it. Esc clears.")
    cursor = Qt.CursorShape.CrossCursor

    def __init__(self, ctx) -> None:
        super().__init__(ctx)
        self.start: tuple[float, float] | None = None

    def deactivate(self) -> None:
        self.start = None

    def press(self, xy, button, mods) -> bool:
        if button != LEFT or self.session is None or not self._inside(xy):
            return False
        self.start = (float(xy[0]), float(xy[1]))
        self.view.measure_layer.set_points(self.start)
        return True

    def move(self, xy, buttons, mods) -> None:
        if self.start is not None and buttons & LEFT:
            self.view.measure_layer.set_points(self.start, xy)

    def release(self, xy, button, mods) -> bool:
        if self.start is None or button != LEFT:
            return False
        a, self.start = self.start, None
        if math.hypot(xy[0] - a[0], xy[1] - a[1]) < 2.0:
            return True  # a click, not a drag (a double-click follows, or nothing)
        self.ctx.guard(lambda: self.ctx.show_line_profile(a, (float(xy[0]), float(xy[1]))))
        return True

    def double_click(self, xy, mods) -> bool:
        if self.session is None or not self._inside(xy):
            return False
        self.ctx.guard(lambda: self.ctx.show_azimuthal_profile((float(xy[0]), float(xy[1]))))
        return True

    def key(self, key, mods) -> bool:
        if key == Qt.Key.Key_Escape:
            self.start = None
            self.view.measure_layer.clear()
            return True
        return False


TOOL_CLASSES = (PanTool, CentreTool, SpotTool, RulerTool, MaskTool, ProfileTool)
