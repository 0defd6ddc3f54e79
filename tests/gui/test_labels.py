"""Labels never overlap: dense gold rings on screen, the layout helper, the ruler's read-out at the edge."""

from __future__ import annotations

import math

import numpy as np
import pytest

from saedkit.core.presentation.label_layout import boxes_overlap, place_labels, ring_label_places

A_AU = 4.0782  # Å, gold lattice parameter (REFERENCES.md)
DENSE = [(4, 0, 0), (3, 3, 1), (4, 2, 0), (4, 2, 2)]


def _d(hkl):  # cubic: d = a / √(h² + k² + l²) (textbook)
    return A_AU / math.sqrt(sum(v * v for v in hkl))


def _no_overlap(boxes):
    for i in range(len(boxes)):
        for j in range(i + 1, len(boxes)):
            a, b = boxes[i], boxes[j]
            # independent check of the intersection of two axis-aligned boxes
            if min(a[2], b[2]) > max(a[0], b[0]) and min(a[3], b[3]) > max(a[1], b[1]):
                return False
    return True


def test_dense_ring_labels_are_all_placed_apart():
    k = 400.0  # px·Å; R = K / d (camera equation)
    radii = [k / _d(h) for h in DENSE]  # 392, 428, 439, 480 px: as close as 400/331/420/422 are
    places = [ring_label_places((600.0, 600.0), r, (92.0, 16.0), ring_number=i) for i, r in enumerate(radii)]
    placed = place_labels(places, bounds=(0, 0, 1200, 1200), gap_px=2.0)
    assert all(p is not None for p in placed)
    assert _no_overlap([p.box for p in placed])
    # each label touches its own ring: its anchor lies on the ring
    for p, r in zip(placed, radii):
        assert math.hypot(p.anchor_xy[0] - 600, p.anchor_xy[1] - 600) == pytest.approx(r)
    # crowded (small bounds): labels are left out rather than overlapping
    crowded = place_labels(places, bounds=(560, 0, 1200, 620), gap_px=2.0)
    kept = [p.box for p in crowded if p is not None]
    assert _no_overlap(kept) and all(560 <= b[0] and b[2] <= 1200 for b in kept)


def test_boxes_overlap_and_bad_input():
    from saedkit.core.errors import InputError

    assert boxes_overlap((0, 0, 10, 10), (5, 5, 15, 15)) and not boxes_overlap((0, 0, 10, 10), (10, 0, 20, 10))
    with pytest.raises(InputError):
        place_labels([], gap_px=-1)
    with pytest.raises(InputError):
        ring_label_places((0, 0), 10, (0, 5))


@pytest.mark.gui
def test_ring_labels_on_screen_do_not_overlap(window, open_pattern, tmp_path):
    pytest.importorskip("PySide6")
    from saedkit.core.imageio import write_tiff

    rng = np.random.default_rng(3)
    path = tmp_path / "noise.tif"
    write_tiff(path, rng.poisson(20, (512, 512)).astype(np.uint16))
    open_pattern(path)
    k = 200.0
    radii = [k / _d(h) for h in DENSE]  # 196–240 px on a 512-px image
    layer = window.view.ring_layer
    layer.set_rings((256.0, 256.0), radii, [(h, _d(h)) for h in DENSE], 0.01, 30.0)
    for zoom in (None, 0.5):
        if zoom is None:
            window.view.fit()
        else:
            window.view.zoom_by(zoom)
        window.view.viewport().grab()  # paints the layers
        boxes = [p.box for p in layer.placed if p is not None]
        assert _no_overlap(boxes)
        vp = window.view.viewport().rect()
        assert all(b[0] >= 0 and b[1] >= 0 and b[2] <= vp.width() and b[3] <= vp.height() for b in boxes)
        if zoom is None:
            assert len(boxes) == len(DENSE)  # at fit, every ring keeps its label


@pytest.mark.gui
def test_the_ruler_read_out_stays_inside_the_view(window, open_pattern, tmp_path):
    from saedkit.core.imageio import write_tiff

    path = tmp_path / "noise.tif"
    write_tiff(path, np.random.default_rng(4).poisson(20, (256, 256)).astype(np.uint16))
    open_pattern(path)
    window.view.fit()
    layer = window.view.measure_layer
    layer.set_points((100.0, 100.0), (255.0, 255.0), lines=["a rather long ruler read-out line", "second line"])
    window.view.viewport().grab()
    r = layer.label_rect
    vp = window.view.viewport().rect()
    assert r is not None and r.left() >= 0 and r.top() >= 0 and r.right() <= vp.width() and r.bottom() <= vp.height()
