"""The Qt binding must not corrupt the interpreter while the pattern is redrawn.

PySide6 6.12.0 on Python < 3.12 drops one reference to ``None`` on every
drawing call that returns nothing; a few hundred redraws of the demo later
the interpreter aborts with "none_dealloc" and the user's work since the last
autosave is gone. pyproject.toml excludes those versions; these tests make a
build that slipped through (or a new release with the same fault) fail here
rather than on a user's screen.
"""

from __future__ import annotations

import sys

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from PySide6.QtWidgets import QApplication  # noqa: E402

from saedkit.core.detection.centre import manual_centre  # noqa: E402
from saedkit.core.crystallography.library import find_phase  # noqa: E402
from saedkit.core.simulation.render import BeamStop  # noqa: E402
from saedkit.core.simulation.simulate import simulate_spot_pattern  # noqa: E402
from saedkit.core.imageio import write_tiff  # noqa: E402


def _version_tuple(text: str) -> tuple[int, ...]:
    return tuple(int(p) for p in text.split(".")[:3] if p.isdigit())


def test_the_installed_binding_is_not_a_known_bad_one():
    import PySide6

    # the fault was seen with PySide6 6.12.0 on Python 3.11 (none with 6.11.3, none on Python 3.12)
    if sys.version_info < (3, 12):
        assert _version_tuple(PySide6.__version__) < (6, 12), (
            f"PySide6 {PySide6.__version__} on Python {sys.version.split()[0]} corrupts the reference "
            "count of None; pyproject.toml pins PySide6-Essentials < 6.12 there")


def test_hundreds_of_redraws_keep_the_reference_count_of_none(window, open_pattern, tmp_path):
    # a spot pattern with its overlays (spots, labels, predicted grid): every layer paints on each redraw
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(384, 384), camera_constant_px_A=380.0,
                                       rotation_deg=23.0, beam_stop=BeamStop(angle_deg=110.0),
                                       rng=np.random.default_rng(404))
    path = tmp_path / "si_011.tif"
    write_tiff(path, img, voltage_kv=200.0)
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.3))
    window.use_camera_constant(380.0, 0.5)
    s.set_phases(["Si"])
    window.find_spots()
    window.search()
    assert s.candidate is not None and len(s.spots) >= 6, window.notices
    view = window.view
    app = QApplication.instance()

    def redraw_pairs(n: int) -> None:
        for _ in range(n):
            view.zoom_by(1.25)
            view.viewport().repaint()
            view.zoom_by(1 / 1.25)
            view.viewport().repaint()
            app.processEvents()

    redraw_pairs(5)  # caches, fonts and glyphs settle first
    before = sys.getrefcount(None)
    for done in range(1, 151):
        redraw_pairs(1)
        lost = before - sys.getrefcount(None)
        # a healthy binding leaves the count where it was (a few references come and go with caches);
        # the faulty one loses hundreds per redraw: stop before the interpreter aborts
        assert lost < 50, f"None lost {lost} references over {2 * done} redraws"
    assert view.paint_count >= 300
