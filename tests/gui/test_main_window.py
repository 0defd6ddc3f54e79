"""The desktop program, headless: open, click, find, search, calibrate, undo, save, errors, screenshot."""

from __future__ import annotations

import importlib.util
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from PySide6.QtCore import QPointF, Qt  # noqa: E402
from PySide6.QtWidgets import QApplication, QFileDialog  # noqa: E402

from saedkit.core.detection.centre import manual_centre  # noqa: E402
from saedkit.core.imageio import write_tiff  # noqa: E402
from saedkit.core.crystallography.library import find_phase  # noqa: E402
from saedkit.core.simulation.render import BeamStop  # noqa: E402
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern  # noqa: E402

REPO = Path(__file__).resolve().parents[2]
K_SI = 380.0


@pytest.fixture(scope="module")
def si_file(tmp_path_factory):
    """Si [011] (384 px, beam stop) with its truth: the right answer is a <011> zone of Si."""
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(384, 384), camera_constant_px_A=K_SI,
                                       rotation_deg=23.0, beam_stop=BeamStop(angle_deg=110.0),
                                       rng=np.random.default_rng(404))
    path = tmp_path_factory.mktemp("gui") / "si_011.tif"
    write_tiff(path, img, voltage_kv=200.0)
    return path, truth


def test_click_near_a_spot_gives_a_row_with_the_right_d(window, open_pattern, qtbot, si_file):
    path, truth = si_file
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.2))
    window.use_camera_constant(K_SI, 0.5)
    window.set_tool("spot")
    r = np.hypot(*(truth.xy - truth.centre_xy).T)
    i = int(np.argmax(np.where((r > 60) & ~truth.forbidden, truth.snr, -1)))
    x, y = truth.xy[i]
    # a real mouse click 2.5 px off the spot, through the view
    view = window.view
    view.centerOn(x, y)
    pos = view.mapFromScene(QPointF(x + 2.0, y - 1.5))
    qtbot.mouseClick(view.viewport(), Qt.MouseButton.LeftButton, pos=pos)
    rows = window.measurements_panel.model.rows
    assert len(rows) == 1 and rows[0].origin == "manual"
    # snapped to the refined centre, and d within 1 % of the simulated truth (camera equation, DESIGN.md)
    assert math.hypot(rows[0].x - x, rows[0].y - y) < 0.5
    assert rows[0].d_A == pytest.approx(truth.d_A[i], rel=0.01)
    assert rows[0].d_sigma_A > 0
    text = window.measurements_panel.table_text(selected_only=False)
    assert text.splitlines()[0].startswith("#\tfrom\tx (px)") and len(text.splitlines()) == 2


def test_find_spots_and_search_si_011(window, open_pattern, si_file):
    path, truth = si_file
    s = open_pattern(path)
    assert s.mask.any()  # the automatic mask found the beam stop
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.3))
    window.use_camera_constant(K_SI, 0.5)
    s.set_phases(["Si", "Cu", "Fe"])
    window.find_spots()
    assert len(s.spots) >= 6
    window.search()
    best = s.candidate
    assert best is not None, window.notices
    # the right phase and zone family first: Si <011> (equivalent directions by cubic symmetry)
    assert best.phase == "Si" and sorted(abs(v) for v in best.zone) == [0, 1, 1]
    layer = window.view.predicted_layer
    assert layer.count >= 8 and layer.isVisible()
    labels = window.view.spot_layer.labels
    assert any(isinstance(lab, tuple) for lab in labels)  # spots carry their (hkl)
    assert window.search_panel.table.rowCount() == len(s.match.candidates)
    hkl_rows = [m.hkl for m in window.measurements_panel.model.rows]
    assert sum(h is not None for h in hkl_rows) >= len(hkl_rows) - 1
    # hiding and showing the grid
    window.set_layer_visible("predicted", False)
    assert not layer.isVisible() and not window.layer_actions["predicted"].isChecked()


def test_calibrate_on_a_gold_ring_pattern(window, open_pattern, tmp_path):
    k_true = 300.0
    img, truth = simulate_ring_pattern(find_phase("Au"), shape=(512, 512), camera_constant_px_A=k_true,
                                       beam_stop=BeamStop(angle_deg=70.0), rng=np.random.default_rng(8))
    path = tmp_path / "au.tif"
    write_tiff(path, img, voltage_kv=200.0)
    s = open_pattern(path)
    window.calibrate()
    cal = s.calibration
    assert cal is not None, window.notices
    # the simulated camera constant comes back within 0.2 % (the brief's target; Au a = 4.0782 Å,
    # Maeland & Flanagan 1964)
    assert cal.camera_constant_px_A == pytest.approx(k_true, rel=0.002)
    assert window.view.ring_layer.count >= 3
    assert window.calibration_panel.table.rowCount() == len(cal.rings) >= 3
    assert s.centre is not None and s.centre.method != "manual"


def test_undo_redo_from_the_edit_menu(window, open_pattern, si_file):
    path, truth = si_file
    s = open_pattern(path)
    assert not window.act_undo.isEnabled()
    window.set_tool("spot")
    x, y = truth.xy[int(np.argmax(truth.snr))]
    window.tools["spot"].click((x + 1, y + 1))
    assert len(s.spots) == 1 and window.act_undo.isEnabled() and "Add spot" in window.act_undo.text()
    window.act_undo.trigger()
    assert len(s.spots) == 0 and window.view.spot_layer.xy.shape == (0, 2)
    window.act_redo.trigger()
    assert len(s.spots) == 1 and len(window.measurements_panel.model.rows) == 1
    # the standard shortcuts are bound
    from PySide6.QtGui import QKeySequence

    assert QKeySequence(QKeySequence.StandardKey.Undo) in window.act_undo.shortcuts()
    assert QKeySequence("Ctrl+Shift+Z") in window.act_redo.shortcuts()


def test_mask_brush_polygon_and_ruler(window, open_pattern, si_file):
    path, truth = si_file
    s = open_pattern(path)
    before = int(s.mask.sum())
    window.set_tool("mask")
    tool = window.tools["mask"]
    tool.radius_px = 5
    tool.press((40, 40), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    tool.move((60, 40), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    tool.release((60, 40), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    painted = int(s.mask.sum()) - before
    assert 250 < painted < 400  # a 20 px stroke of a 5 px disc: ~ 20·10 + π·25
    window.opt_mask_mode.setCurrentText("polygon")
    for p in ((300, 40), (340, 40), (340, 80)):
        tool.click(p)
    tool.double_click((340, 80), Qt.KeyboardModifier.NoModifier)
    assert int(s.mask.sum()) - before - painted > 700  # a right triangle of legs 40: 800 px
    window.undo()
    window.undo()
    assert int(s.mask.sum()) == before
    # the ruler across the centre: half the g, −g distance
    window.use_camera_constant(K_SI, 0.0)
    s.set_centre(manual_centre(truth.centre_xy[0] + 3, truth.centre_xy[1] - 2))  # a poor centre on purpose
    hkl = {tuple(h): p for h, p in zip(truth.hkl.tolist(), truth.xy)}
    a, b = hkl[(1, 1, -1)], hkl[(-1, -1, 1)]
    window.set_tool("ruler")
    window.opt_friedel.setChecked(True)
    ruler = window.tools["ruler"]
    ruler.click(tuple(a))
    ruler.click(tuple(b))
    m = window.ruler_result
    assert m is not None and m.kind == "friedel"
    # the Friedel pair cancels the centre error: d(111) of Si = 3.1356 Å (a = 5.431 Å, NIST SRM 640f)
    assert m.d_A == pytest.approx(find_phase("Si").calculate_d_A((1, 1, 1)), rel=0.005)
    assert "Ruler" in window.measurements_panel.ruler.text()


def test_save_close_and_reopen_the_session(open_pattern, qtbot, window, si_file, tmp_path, monkeypatch):
    path, truth = si_file
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.25))
    window.use_camera_constant(K_SI, 0.5)
    s.set_phases(["Si", "Ni"])
    window.find_spots()
    window.search()
    s.choose_candidate(0)
    window.set_tool("mask")
    window.tools["mask"].click((20, 20))
    target = tmp_path / "kept.saedkit.json"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", staticmethod(lambda *a, **k: (str(target), "")))
    window.act_save.trigger()
    assert target.is_file() and not s.is_modified and not window.isWindowModified()
    before = s.to_record()
    window.close()

    from saedkit.gui.main_window import MainWindow

    w2 = MainWindow(synchronous=True)
    qtbot.addWidget(w2)
    w2.open_path(target, confirm=False)
    t = w2.session
    after = t.to_record()
    for key in ("mask", "centre", "spots", "spot_origins", "calibration", "phases", "match", "chosen_candidate",
                "settings"):
        assert after[key] == before[key], key
    assert w2.view.predicted_layer.count == window.view.predicted_layer.count > 0
    assert w2.phases_panel.checked() == ["Si", "Ni"]
    assert len(w2.measurements_panel.model.rows) == len(s.spots)


def test_a_corrupt_file_gives_a_message_and_the_window_lives(window, tmp_path):
    bad = tmp_path / "broken.tif"
    bad.write_bytes(b"II*\x00" + b"\x00" * 50)
    window.open_path(bad, confirm=False)
    assert window.session is None
    level, text = window.notices[-1]
    assert level == "error" and "broken.tif" in text
    assert window.isVisible() and window.notice.isVisible()
    # a failed action is a message too
    window.guard(window.search)
    assert window.notices[-1][0] == "error" and "open a pattern" in window.notices[-1][1]
    # an unexpected exception reaches the window, not the process
    window.report_exception(RuntimeError("boom"), "Traceback: boom")
    assert "RuntimeError: boom" in window.notices[-1][1]


def test_a_search_without_candidates_says_so(window, open_pattern, si_file):
    path, truth = si_file
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.3))
    window.use_camera_constant(K_SI * 1.3, 0.5)  # a wrong K: nothing fits within 1 %
    s.set_phases(["Cu"])
    window.find_spots()
    s.set_settings(d_tolerance_pct=1.0, angle_tolerance_deg=1.0)
    window.search()
    assert s.match is not None and not s.match.candidates
    assert window.notices[-1][0] == "warning" and "No zone axis" in window.notices[-1][1]


def test_autosave_and_recovery(open_pattern, qtbot, window, si_file):
    from saedkit.core.workflow.session import autosave_path, find_leftover_autosave
    from saedkit.gui.main_window import MainWindow

    path, truth = si_file
    s = open_pattern(path)
    assert not window.autosave()  # nothing changed yet
    s.set_centre(manual_centre(100.5, 99.5))
    assert window.autosave() and autosave_path().is_file()
    assert not window.autosave()  # no change since
    assert window._autosave_timer.interval() <= 60_000
    # pretend this run crashed: its autosave now belongs to a process that has ended
    dead = int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                              capture_output=True, text=True).stdout)
    autosave_path().rename(autosave_path(dead))
    assert find_leftover_autosave() == autosave_path(dead)
    w2 = MainWindow(synchronous=True)
    qtbot.addWidget(w2)
    w2.offer_recovery()
    assert not w2.notice.isHidden() and "Recover" in w2.notices[-1][1]
    w2._recover(autosave_path(dead))
    assert w2.session.centre.x == 100.5 and w2.session.is_modified
    assert find_leftover_autosave() is None


def test_display_changes_keep_the_image(window, open_pattern, si_file):
    from saedkit.gui.display import DisplaySettings

    path, _ = si_file
    open_pattern(path)
    panel = window.display_panel
    img_before = window.view._image8.copy()
    panel.colour.setCurrentText("ember")  # only the colour table changes
    assert np.array_equal(window.view._image8, img_before)
    panel.mapping.setCurrentText("linear")
    assert not np.array_equal(window.view._image8, img_before)
    window._display_changed(DisplaySettings(mapping="gamma", gamma=0.3), True)  # a slider preview
    assert window.view._image8.shape == img_before.shape  # 384 px needs no subsampling
    view = window.view
    view.fit()
    anchor = QPointF(view.viewport().width() * 0.3, view.viewport().height() * 0.6)
    before = view.mapToScene(anchor.toPoint())
    view.zoom_by(2.0, anchor_view=anchor)  # as the wheel does: the point under the cursor stays put
    after = view.mapToScene(anchor.toPoint())
    assert abs(before.x() - after.x()) < 1.5 and abs(before.y() - after.y()) < 1.5
    view.actual_size()
    assert window.view.scale_factor() == pytest.approx(1.0)


def test_screenshot_of_the_window(tmp_path):
    spec = importlib.util.spec_from_file_location("make_screenshot", REPO / "tools" / "make_screenshot.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    out = mod.make_screenshot(tmp_path / "shot.png", simulated=True, size=(1300, 850))
    from PySide6.QtGui import QImage

    img = QImage(str(out))
    assert not img.isNull() and img.width() >= 1200 and img.height() >= 800
    assert out.stat().st_size > 50_000  # a real picture, not a blank window
    assert QApplication.instance() is not None


def test_icons_are_package_data_and_match_the_repository():
    from saedkit.gui.icons import ICON_NAMES, icon, icon_path

    for name in ICON_NAMES:
        p = icon_path(name)
        assert p is not None and "saedkit/gui/icons" in p.as_posix(), name
        assert not icon(name).isNull(), name
        repo_copy = REPO / "icons" / f"{name}.svg"
        assert repo_copy.read_bytes() == p.read_bytes(), name


def test_gui_command_imports_no_qt_until_it_runs():
    code = ("import sys\nfrom saedkit.cli import build_parser\n"
            "a = build_parser().parse_args(['gui', 'x.tif'])\n"
            "assert a.func.__module__ == 'saedkit._commands.gui'\n"
            "assert 'PySide6' not in sys.modules, 'Qt imported'\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr


def test_export_report_writes_the_bundle(window, open_pattern, si_file, tmp_path, monkeypatch):
    path, truth = si_file
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.3))
    window.use_camera_constant(K_SI, 0.5)
    window.find_spots()
    # the report folder is named in the dialog and made when missing (with its missing parents)
    out = tmp_path / "not yet" / "si_011_report"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", staticmethod(lambda *a, **k: (str(out), "")))
    window.act_export.trigger()
    level, text = window.notices[-1]
    assert level == "success", text
    written = {p.suffix for p in out.iterdir()}
    assert {".csv", ".json", ".png", ".pdf"} <= written


def test_drop_readout_recent_files_preferences_and_a_typed_phase(window, si_file):
    from PySide6.QtCore import QMimeData, QPoint, QUrl
    from PySide6.QtGui import QDropEvent

    from saedkit.core.crystallography.crystal import make_phase
    from saedkit.core.workflow.session import SessionSettings
    from saedkit.gui import settings as app_prefs

    path, truth = si_file
    mime = QMimeData()
    mime.setUrls([QUrl.fromLocalFile(str(path))])
    ev = QDropEvent(QPoint(10, 10), Qt.DropAction.CopyAction, mime, Qt.MouseButton.LeftButton,
                    Qt.KeyboardModifier.NoModifier)
    window.view.dropEvent(ev)
    s = window.session
    assert s is not None and Path(s.image.source_path) == path
    assert app_prefs.recent_files()[0] == str(path.resolve())
    # the cursor read-out gives d and |g| once a centre and K are known (R·d = K, DESIGN.md)
    s.set_centre(manual_centre(*truth.centre_xy))
    window.use_camera_constant(K_SI)
    x, y = truth.centre_xy[0] + 100.0, truth.centre_xy[1]
    window._cursor_moved(x, y)
    text = window.readout.text()
    assert "R 100.0 px" in text and f"d {K_SI / 100:.4f} Å" in text and "nm⁻¹" in text
    # preferences are kept in the settings file under SAEDKIT_CONFIG_DIR
    prefs = SessionSettings(voltage_kv=300.0, pixel_size_um=14.0, d_tolerance_pct=1.5, max_index=6)
    app_prefs.write_preferences(prefs)
    assert app_prefs.read_preferences() == prefs
    # a phase typed in from its cell is kept as a CIF and ticked
    ni3al = make_phase("Ni3Al", (3.572,) * 3 + (90.0,) * 3, "P m -3 m",
                       [("Al", 0, 0, 0), ("Ni", 0, 0.5, 0.5)])
    cif = window.add_typed_phase(ni3al)
    assert Path(cif).is_file() and cif in s.phases
    assert find_phase(cif).calculate_d_A((1, 0, 0)) == pytest.approx(3.572)


def test_a_session_whose_image_moved_can_be_pointed_at_it(window, open_pattern, si_file, tmp_path, monkeypatch):
    import shutil

    path, truth = si_file
    img = tmp_path / "moved_away.tif"
    shutil.copy(path, img)
    s = open_pattern(img)
    s.set_centre(manual_centre(50, 60))
    sess = s.save(tmp_path / "m.saedkit.json")
    window.set_session(None)
    new_home = tmp_path / "elsewhere"
    new_home.mkdir()
    img.rename(new_home / "renamed.tif")
    window.open_path(sess, confirm=False)
    assert window.session is None and "was not found" in window.notices[-1][1]
    monkeypatch.setattr(QFileDialog, "getOpenFileName",
                        staticmethod(lambda *a, **k: (str(new_home / "renamed.tif"), "")))
    window.open_session_file(sess, image_path=new_home / "renamed.tif")
    assert window.session is not None and window.session.centre.x == 50


def test_calibration_panel_shows_camera_length_with_total_sigma(window, open_pattern, tmp_path):
    import re

    img, _ = simulate_ring_pattern(find_phase("Au"), shape=(512, 512), camera_constant_px_A=300.0,
                                   beam_stop=BeamStop(angle_deg=70.0), rng=np.random.default_rng(8))
    path = tmp_path / "au_px.tif"
    write_tiff(path, img, pixel_size_um=14.0, voltage_kv=200.0)
    s = open_pattern(path)
    window.calibrate()
    assert s.calibration is not None, window.notices
    text = window.calibration_panel.result.text()
    m = re.search(r"camera length L = ([0-9.]+) ± ([0-9.]+) mm", text)
    assert m, text
    L, sL = float(m.group(1)), float(m.group(2))
    # L = K·p/λ with λ(200 kV) = 0.025079 Å (relativistic electron wavelength, from memory of the
    # standard tables): 300 px·Å × 0.014 mm/px / 0.025079 Å ≈ 167.5 mm
    assert L == pytest.approx(300.0 * 0.014 / 0.025079, rel=0.003)
    # the total σ carries the 1 % default reproducibility of K (common practice), not only the fit's σ
    assert 0.008 * L <= sL <= 0.03 * L
