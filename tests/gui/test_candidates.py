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
    # measured against predicted for the chosen one: d against the Cu spacings a/√(h²+k²+l²) (textbook), the
    # angles against those of the (hkl) themselves in a cubic crystal (textbook: cos φ = h₁·h₂ / |h₁||h₂|)
    rows = window.search_panel.comparison_rows(s)
    assert len(rows) >= 4 and window.search_panel.compare.rowCount() == len(rows)
    a_cu = 3.6150  # Å (REFERENCES.md)
    ref = min(rows, key=lambda r: -r[2])[1]  # the largest d: the shortest g
    for n, hkl, d_meas, d_pred, dd, ang_meas, ang_pred, dang in rows:
        assert d_pred == pytest.approx(a_cu / np.sqrt(np.dot(hkl, hkl)), rel=1e-3)
        assert d_meas == pytest.approx(d_pred, rel=0.025)  # the calibration is 2 % off
        cos = np.dot(hkl, ref) / np.sqrt(np.dot(hkl, hkl) * np.dot(ref, ref))
        assert ang_pred == pytest.approx(np.degrees(np.arccos(np.clip(cos, -1, 1))), abs=0.05)
        assert abs(dang) < 1.5
        assert 1 <= n <= len(s.spots)


def test_uncertainties_show_two_significant_figures_of_sigma():
    from saedkit.gui.panels import fmt_pm, fmt_sigma

    # rounding rule for reported uncertainties: σ to two significant figures, the value to the same place
    # (common practice)
    assert fmt_pm(2.34567, 0.0123) == "2.346 ± 0.012"
    assert fmt_pm(380.123, 0.00041) == "380.12300 ± 0.00041"
    assert fmt_pm(1234.5, 37.0) == "1234 ± 37" and fmt_pm(1234.5, 370.0) == "1230 ± 370"
    assert fmt_pm(1.5, 0.0, 3) == "1.500"
    assert fmt_sigma(0.00412) == "0.0041" and fmt_sigma(1.26) == "1.3" and fmt_sigma(25.4) == "25"
