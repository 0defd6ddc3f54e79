"""Setting the centre by hand: a click on the direct beam, three points on a ring."""

from __future__ import annotations

import math

import numpy as np
import pytest

from saedkit.core.errors import FitError, InputError
from saedkit.core.detection.ring_points import calculate_circle_through_points


def test_circle_through_three_points_is_exact():
    cx, cy, r = 120.3, 130.7, 50.0
    pts = [(cx + r * math.cos(math.radians(a)), cy + r * math.sin(math.radians(a))) for a in (10, 130, 250)]
    c = calculate_circle_through_points(pts)  # circumcentre of a triangle (closed form)
    assert (c.x, c.y, c.radius_px) == pytest.approx((cx, cy, r), abs=1e-9) and c.rms_px < 1e-9
    with pytest.raises(FitError):
        calculate_circle_through_points([(0, 0), (1, 1), (2, 2)])
    with pytest.raises(InputError):
        calculate_circle_through_points([(0, 0), (1, 1)])


@pytest.mark.gui
def test_centre_tool_on_the_beam_and_by_three_ring_points(window, open_pattern, tmp_path):
    pytest.importorskip("PySide6")
    from PySide6.QtCore import Qt

    from saedkit.core.imageio import write_tiff

    yy, xx = np.mgrid[0:200, 0:220]
    bx, by = 103.4, 97.8
    beam = 3000 * np.exp(-0.5 * ((xx - bx) ** 2 + (yy - by) ** 2) / 2.5 ** 2)
    ring = 200 * np.exp(-0.5 * ((np.hypot(xx - bx, yy - by) - 60) / 2.0) ** 2)
    img = (50 + beam + ring + np.random.default_rng(5).normal(0, 3, xx.shape)).astype(np.float32)
    path = tmp_path / "beam.tif"
    write_tiff(path, img)
    s = open_pattern(path)
    window.set_tool("centre")
    tool = window.tools["centre"]
    left, none = Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier
    tool.press((bx + 3.0, by - 2.5), left, none)
    tool.release((bx + 3.0, by - 2.5), left, none)
    # refined onto the beam's middle (the Gaussian's centre, drawn above)
    assert math.hypot(s.centre.x - bx, s.centre.y - by) < 0.3
    # three Shift+clicks on the ring: the centre of the circle through them
    shift = Qt.KeyboardModifier.ShiftModifier
    pts = [(bx + 60 * math.cos(math.radians(a)), by + 60 * math.sin(math.radians(a))) for a in (-20, 100, 200)]
    for p in pts:
        tool.press(p, left, shift)
        tool.release(p, left, shift)
    assert (s.centre.x, s.centre.y) == pytest.approx((bx, by), abs=1e-6)
    assert s.undo_label == "Centre from three ring points"
