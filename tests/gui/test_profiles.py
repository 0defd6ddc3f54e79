"""Line and azimuthal profiles: the core functions against scipy, and the Profile tool end to end."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.ndimage import map_coordinates

from saedkit.core.detection.profiles import calculate_azimuthal_profile, calculate_line_profile


def _image():
    yy, xx = np.mgrid[0:120, 0:140]
    return np.sin(xx / 7.0) * 50 + np.cos(yy / 5.0) * 30 + 0.2 * xx * yy / 10 + 200


def test_line_profile_matches_scipy_and_marks_the_spots():
    img = _image()
    a, b = (10.3, 15.7), (120.2, 90.1)
    prof = calculate_line_profile(img, a, b, spots_xy=[[65.0, 53.0], [30.0, 100.0]], near_px=3.0)
    # the same samples computed here: 1-px steps along the line, bilinear (scipy.ndimage.map_coordinates)
    length = math.hypot(b[0] - a[0], b[1] - a[1])
    t = prof.distance_px
    assert t[0] == 0 and t[-1] == pytest.approx(length) and np.allclose(np.diff(t[:-1]), 1.0)
    x = a[0] + t * (b[0] - a[0]) / length
    y = a[1] + t * (b[1] - a[1]) / length
    expected = map_coordinates(img, [y, x], order=1)
    assert np.allclose(prof.intensity, expected, atol=1e-9)
    # the spot at (65, 53) is on the line (perpendicular distance < 3 px); the other is far from it
    u = np.array([b[0] - a[0], b[1] - a[1]]) / length
    v = np.array([65.0 - a[0], 53.0 - a[1]])
    assert abs(v @ np.array([-u[1], u[0]])) < 3
    assert list(prof.spot_index) == [0] and prof.spot_distance_px[0] == pytest.approx(v @ u)
    # a masked pixel gives a gap
    mask = np.zeros(img.shape, bool)
    mask[int(round(y[20])), int(round(x[20]))] = True
    assert np.isnan(calculate_line_profile(img, a, b, mask=mask).intensity[20])


def test_azimuthal_profile_of_a_ring_with_a_bright_arc():
    yy, xx = np.mgrid[0:200, 0:200]
    cx, cy = 101.0, 98.0
    r = np.hypot(xx - cx, yy - cy)
    phi = np.degrees(np.arctan2(yy - cy, xx - cx))
    # a ring at R = 60 px, twice as bright between 30° and 90°
    img = 10 + 100 * np.exp(-0.5 * ((r - 60) / 4.0) ** 2) * np.where((phi > 30) & (phi < 90), 2.0, 1.0)
    prof = calculate_azimuthal_profile(img, (cx, cy), 60.0, width_px=0.0, n_bins=72)
    assert len(prof.angle_deg) == 72 and prof.angle_deg[0] == pytest.approx(-177.5)
    # on the ring's crest the value is 10 + 100 (× 2 on the arc), read directly off the formula above
    inside = (prof.angle_deg > 40) & (prof.angle_deg < 80)
    outside = (prof.angle_deg < 20) | (prof.angle_deg > 100)
    assert np.allclose(prof.intensity[inside], 210, rtol=0.03)
    assert np.allclose(prof.intensity[outside], 110, rtol=0.03)


@pytest.mark.gui
def test_profile_tool_end_to_end(window, open_pattern, tmp_path):
    pytest.importorskip("PySide6")
    from saedkit.core.detection.centre import manual_centre
    from saedkit.core.imageio import write_tiff

    img = _image().astype(np.float32)
    path = tmp_path / "smooth.tif"
    write_tiff(path, img)
    s = open_pattern(path)
    window.set_tool("profile")
    tool = window.tools["profile"]
    from PySide6.QtCore import Qt

    tool.press((10.0, 20.0), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    tool.move((100.0, 80.0), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    tool.release((100.0, 80.0), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    prof = window.line_profile
    assert not window.docks["profile"].isHidden()
    assert np.allclose(window.profile_plot.y, prof.intensity)
    length = math.hypot(90.0, 60.0)
    t = prof.distance_px
    x, y = 10 + t * 90 / length, 20 + t * 60 / length
    assert np.allclose(prof.intensity, map_coordinates(img.astype(float), [y, x], order=1), atol=1e-3)
    # double-click on a ring: the azimuthal profile round the centre through that point
    s.set_centre(manual_centre(70.0, 60.0))
    tool.double_click((70.0 + 30.0, 60.0), Qt.KeyboardModifier.NoModifier)
    az = window.azimuthal_profile
    assert az.radius_px == pytest.approx(30.0) and window.profile_plot.x_name == "azimuth (°)"
    assert "Ctrl+7" in window.tool_actions["profile"].toolTip()
