"""Comparing zone-axis candidates: grids drawn with the calibration's K, flicking through them by keyboard."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from saedkit.core.crystallography.library import find_phase  # noqa: E402
from saedkit.core.detection.centre import manual_centre  # noqa: E402
from saedkit.core.imageio import write_tiff  # noqa: E402
from saedkit.core.simulation.simulate import simulate_spot_pattern  # noqa: E402

K_TRUE = 250.0


@pytest.fixture(scope="module")
def cu_file(tmp_path_factory):
    img, truth = simulate_spot_pattern(find_phase("Cu"), (0, 0, 1), shape=(384, 384), camera_constant_px_A=K_TRUE,
                                       rotation_deg=12.0, rng=np.random.default_rng(11))
    path = tmp_path_factory.mktemp("cand") / "cu_001.tif"
    write_tiff(path, img, voltage_kv=200.0)
    return path, truth


def test_grid_drawn_with_the_calibration_k_and_candidates_flicked(window, open_pattern, cu_file, qtbot):
    path, truth = cu_file
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.2))
    k_cal = K_TRUE * 1.02  # a calibration 2 % off: the grid must show it
    window.use_camera_constant(k_cal, 0.5)
    s.set_phases(["Cu", "Ni", "Al"])
    s.set_settings(d_tolerance_pct=6.0)  # wide: Ni (a 2.5 % smaller than Cu) is a candidate too
    window.find_spots()
    window.search()
    cand = s.candidate
    assert cand is not None and len(s.match.candidates) >= 2, window.notices
    layer = window.view.predicted_layer
    c0 = np.asarray(s.match.lattice.centre_xy if s.match.lattice is not None else (s.centre.x, s.centre.y))
    d = np.array([p.d_A for p in cand.predicted])
    r_drawn = np.hypot(*(layer.xy - c0).T)
    # camera equation R·d = K (textbook) with the calibration's K, no distortion in this calibration
    assert np.allclose(r_drawn * d, k_cal, rtol=1e-9)
    # on request, the matcher's own (fitted) grid
    window.act_fitted_grid.setChecked(True)
    fitted = np.array([(p.x, p.y) for p in cand.predicted])
    assert np.allclose(layer.xy, fitted)
    window.act_fitted_grid.setChecked(False)
    # ] and [ flick through the candidates and back; each redraws its grid
    first = s.chosen_candidate
    window.act_next_candidate.trigger()
    assert s.chosen_candidate == (first + 1) % len(s.match.candidates)
    second = s.candidate
    assert len(layer.xy) == len(second.predicted)
    window.act_prev_candidate.trigger()
    assert s.chosen_candidate == first
    assert "]" in window.act_next_candidate.toolTip()
