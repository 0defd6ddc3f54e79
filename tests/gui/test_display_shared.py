"""One look: the exported pattern uses the screen's display mapping and colours."""

from __future__ import annotations

import numpy as np
import pytest

from saedkit.core.presentation.display import DisplaySettings, calculate_display_image
from saedkit.report.figures import calculate_display_array


@pytest.mark.parametrize("settings", [DisplaySettings(), DisplaySettings(mapping="gamma", gamma=0.4, high_pct=99.5),
                                      DisplaySettings(mapping="linear", low_pct=2.0)])
def test_report_levels_equal_the_screen_levels(settings):
    rng = np.random.default_rng(8)
    data = rng.poisson(40, (80, 90)).astype(np.float32)
    data[40:43, 40:43] = 6e4
    mask = np.zeros(data.shape, bool)
    mask[:5] = True
    screen, _ = calculate_display_image(data, settings, mask=mask)
    report = calculate_display_array(data, mask, settings=settings)
    # the screen rounds the same levels to 8 bits (± 0.5 level) after quantising t to 65 536 steps, which the
    # steepest curve (log, slope 2000/ln 2001 ≈ 263 at t = 0) turns into at most 263·255/65535 ≈ 1.02 levels
    assert np.max(np.abs(report * 255 - screen.astype(float))) <= 0.5 + 1.03


@pytest.mark.gui
def test_export_uses_the_colours_on_screen(window, open_pattern, tmp_path, monkeypatch):
    pytest.importorskip("PySide6")
    from PySide6.QtGui import QImage
    from PySide6.QtWidgets import QFileDialog

    from saedkit.core.imageio import write_tiff

    path = tmp_path / "p.tif"
    data = np.random.default_rng(3).poisson(50, (160, 160)).astype(np.uint16)
    write_tiff(path, data)
    open_pattern(path)
    window.display_panel.colour.setCurrentText("ember")
    out = tmp_path / "rep"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", staticmethod(lambda *a, **k: (str(out), "")))
    window.export_report()
    png = next(out.glob("*.png"))
    img = QImage(str(png))
    # a warm colour map: somewhere in the pattern red clearly exceeds blue (a grey map has red = blue)
    cols = [img.pixelColor(x, y) for x in range(0, img.width(), 7) for y in range(0, img.height(), 7)]
    assert max(c.red() - c.blue() for c in cols) > 40
