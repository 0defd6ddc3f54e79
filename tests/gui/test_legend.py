"""One look: a legend of the marks on screen, in the colours the report uses too."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui


def test_legend_lists_the_marks_on_show_in_the_report_colours(window, open_pattern, tmp_path):
    from saedkit.core.detection.centre import manual_centre
    from saedkit.core.detection.spots import Spot
    from saedkit.core.imageio import write_tiff
    from saedkit.core.presentation.marker_style import MARKER_COLOURS
    from saedkit.gui.overlays import COLOURS as SCREEN
    from saedkit.report.figures import COLOURS as REPORT

    path = tmp_path / "n.tif"
    write_tiff(path, np.random.default_rng(1).poisson(20, (128, 128)).astype(np.uint16))
    s = open_pattern(path)
    # opening finds a centre (the centre chain never refuses, it flags a weak one) and masks the
    # detector's border: the legend lists exactly the marks on show, here at most those two
    assert window.legend.isHidden() or set(window.legend.entries()) <= {"centre", "masked pixels"}

    def marks():
        return [e for e in window.legend.entries() if e != "masked pixels"]
    s.set_centre(manual_centre(64.0, 64.0))
    s.add_spot(Spot(30.0, 40.0, 1.0, 1.0, np.nan, np.nan, np.nan, np.nan, np.nan, np.nan, method="click"))
    assert not window.legend.isHidden()
    assert marks() == ["centre", "spot (placed by hand)"]
    window.set_layer_visible("centre", False)
    assert marks() == ["spot (placed by hand)"]
    window.act_legend.setChecked(False)
    assert window.legend.isHidden()
    # screen and report draw each mark in the same colour
    assert SCREEN["spot_manual"].name() == MARKER_COLOURS["spot_manual"]
    for report_key, kind in (("spot", "spot_auto"), ("grid", "predicted"), ("forbidden", "forbidden"),
                             ("centre", "centre"), ("ring", "rings"), ("ellipse", "ellipse")):
        assert REPORT[report_key] == SCREEN[kind].name(), report_key
