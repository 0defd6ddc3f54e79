"""The radial profile plot: labels of dense rings apart, an axis in d (Å) or |g| (nm⁻¹), a resizable height."""

from __future__ import annotations

import math

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

A_AU = 4.0782  # Å, gold (REFERENCES.md)
AU_RINGS = [(1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1), (2, 2, 2), (4, 0, 0), (3, 3, 1), (4, 2, 0), (4, 2, 2)]
K = 300.0  # px·Å


def _plot(qtbot, width=380):
    from saedkit.gui.plot import ProfilePlot

    plot = ProfilePlot()
    qtbot.addWidget(plot)
    plot.resize(width, 220)
    r = np.linspace(20, 400, 800)
    radii = [K * math.sqrt(sum(v * v for v in h)) / A_AU for h in AU_RINGS]  # R = K/d, d = a/√(h²+k²+l²)
    y = 10 + sum(100 * np.exp(-0.5 * ((r - R) / 1.5) ** 2) for R in radii)
    plot.set_data(r, y, [(R, h, None) for R, h in zip(radii, AU_RINGS)])
    return plot, r


def _overlap(a, b):
    return min(a[2], b[2]) > max(a[0], b[0]) and min(a[3], b[3]) > max(a[1], b[1])


def test_profile_labels_do_not_overlap(qtbot):
    plot, _ = _plot(qtbot)
    plot.grab()
    boxes = [b.box for b in plot.label_boxes if b is not None]
    assert len(boxes) >= 6  # most rings keep their label, the rest are left out rather than overlapping
    assert not any(_overlap(boxes[i], boxes[j]) for i in range(len(boxes)) for j in range(i + 1, len(boxes)))


@pytest.mark.parametrize("axis", ["d (Å)", "|g| (nm⁻¹)"])
def test_profile_axis_in_d_or_g(qtbot, axis):
    plot, r = _plot(qtbot)
    plot.set_axis(axis, K)
    plot.grab()
    assert len(plot.tick_labels) >= 3
    x0, x1 = r.min(), r.max()
    left, width = 40.0, plot.width() - 48.0  # the plot frame's margins
    for x, text in plot.tick_labels:
        radius = x0 + (x - left) / width * (x1 - x0)
        v = float(text)
        # camera equation R·d = K; |g| = 1/d, in nm⁻¹ = 10/d(Å)
        expected = K / radius if axis.startswith("d") else 10 * radius / K
        assert v == pytest.approx(expected, rel=2e-3), (text, radius)


def test_profile_height_is_resizable(window):
    panel = window.calibration_panel
    sp = panel.splitter
    assert sp.widget(0) is panel.plot and not sp.childrenCollapsible()
    total = sum(sp.sizes())
    sp.setSizes([total - 60, 60])
    assert sp.sizes()[0] > 200 or panel.plot.height() > 0
    assert [panel.plot_axis.itemText(i) for i in range(panel.plot_axis.count())] == ["R (px)", "d (Å)", "|g| (nm⁻¹)"]
