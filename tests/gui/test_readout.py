"""The cursor read-out and the magnifier, against the camera equation R·d = K."""

from __future__ import annotations

import math

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from PySide6.QtCore import QPointF  # noqa: E402

from saedkit.core.detection.centre import manual_centre  # noqa: E402
from saedkit.core.imageio import write_tiff  # noqa: E402


@pytest.fixture
def ramp_file(tmp_path):
    img = (np.add.outer(np.arange(240) * 3, np.arange(260)) % 4000 + 100).astype(np.uint16)
    path = tmp_path / "ramp.tif"
    write_tiff(path, img)
    return path, img


def test_readout_at_a_known_pixel(window, open_pattern, ramp_file, qtbot):
    path, img = ramp_file
    s = open_pattern(path)
    s.set_centre(manual_centre(100.0, 100.0))
    window.use_camera_constant(400.0, 0.0)
    text = window.readout_text(160.0, 180.0)
    # a 60-80-100 triangle: R = 100 px; d = K/R = 4 Å (camera equation); |g| = 1/d = 2.5 nm⁻¹;
    # azimuth atan2(80, 60) = 53.13° from +x towards +y
    assert "R 100.0 px" in text and "d 4.0000 Å" in text and "|g| 2.500 nm⁻¹" in text
    assert f"φ {math.degrees(math.atan2(80, 60)):.1f}°" in text
    assert f"I {float(img[180, 160]):.5g}" in text and "x   160.0" in text and "y   180.0" in text
    # through the mouse, in the status bar, with the magnifier beside the cursor
    window.act_magnifier.setChecked(True)
    window.view.fit()
    pos = window.view.mapFromScene(QPointF(160.0, 180.0))
    qtbot.mouseMove(window.view.viewport(), pos)
    qtbot.waitUntil(lambda: "d 4.0" in window.readout.text() or "R " in window.readout.text(), timeout=2000)
    assert not window.magnifier.isHidden()
    mx, my = window.magnifier.xy
    # the magnifier's middle pixel is the screen pixel under the cursor
    shown = window.view.image_item._buffer[int(round(my)), int(round(mx))]
    c = window.magnifier.centre_colour()
    assert (c.red(), c.green(), c.blue()) == ((shown >> 16) & 255, (shown >> 8) & 255, shown & 255)
    assert not window.magnifier.geometry().contains(pos)  # beside the cursor, not under it
    window.act_magnifier.setChecked(False)
    assert window.magnifier.isHidden()
    assert window.readout_text(-5.0, 10.0) == ""
