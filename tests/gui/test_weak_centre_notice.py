"""The measurement table says when the centre is weak and when spots are saturated (real detector frames)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui


def test_weak_centre_and_saturated_spots_are_named_beside_the_numbers(window, open_pattern, tmp_path):
    from saedkit.core.detection.centre import CentreResult
    from saedkit.core.detection.spots import Spot
    from saedkit.core.imageio import write_tiff

    path = tmp_path / "n.tif"
    write_tiff(path, np.random.default_rng(2).poisson(20, (96, 96)).astype(np.uint16))
    s = open_pattern(path)
    s.set_centre(CentreResult(48.0, 47.0, 2.0, 2.0, "brightest-region", 0, 0.2, ("weak",)))
    spot = Spot(30.0, 40.0, 1.0, 1.0, np.nan, np.nan, np.nan, np.nan, np.nan, np.nan, method="click")
    s.add_spot(dataclasses.replace(spot, saturated=True))
    text = window.measurements_panel.summary.text()
    assert "weak: confidence 0.20" in text and "1 saturated" in text
    s.set_centre(CentreResult(48.0, 47.0, 0.1, 0.1, "direct-beam", 1, 0.95, ()))
    assert "weak" not in window.measurements_panel.summary.text()
