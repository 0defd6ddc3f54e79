"""The small faults a new user meets: recovery, redo keys, choices kept, messages, wheel, numbering, copy."""

from __future__ import annotations

import os
import subprocess
import sys
import time

import numpy as np
import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from PySide6.QtCore import QPoint, QPointF, Qt  # noqa: E402
from PySide6.QtGui import QKeySequence, QWheelEvent  # noqa: E402
from PySide6.QtWidgets import QApplication  # noqa: E402

from saedkit.core.crystallography.library import find_phase  # noqa: E402
from saedkit.core.detection.centre import manual_centre  # noqa: E402
from saedkit.core.detection.spots import Spot  # noqa: E402
from saedkit.core.imageio import write_tiff  # noqa: E402
from saedkit.core.simulation.simulate import simulate_spot_pattern  # noqa: E402

K_PX_A = 380.0


@pytest.fixture(scope="module")
def two_files(tmp_path_factory):
    """Two small Si [011] patterns (256 px) as TIFF files, with the truth of the first."""
    folder = tmp_path_factory.mktemp("faults")
    out = []
    for n, rot in enumerate((15.0, 40.0)):
        img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(256, 256), camera_constant_px_A=K_PX_A,
                                           rotation_deg=rot, rng=np.random.default_rng(7 + n))
        path = folder / f"si_{n}.tif"
        write_tiff(path, img, voltage_kv=200.0)
        out.append((path, truth))
    return out


def _dead_pid() -> int:
    return int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                              capture_output=True, text=True).stdout)


def test_redo_keys_are_unambiguous_and_work(window, open_pattern, two_files, qtbot):
    s = open_pattern(two_files[0][0])
    keys = [k.toString(QKeySequence.SequenceFormat.PortableText) for k in window.act_redo.shortcuts()]
    assert "Ctrl+Y" in keys and "Ctrl+Shift+Z" in keys and len(keys) == len(set(keys))
    # no other action of the window holds one of these keys (that is what makes Qt call them ambiguous)
    for a in window.actions():
        if a is not window.act_redo:
            others = {k.toString(QKeySequence.SequenceFormat.PortableText) for k in a.shortcuts()}
            assert not others & set(keys), a.text()
    window.activateWindow()
    qtbot.waitUntil(lambda: QApplication.activeWindow() is window, timeout=2000)
    for key, mods in ((Qt.Key.Key_Y, Qt.KeyboardModifier.ControlModifier),
                      (Qt.Key.Key_Z, Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.ShiftModifier)):
        s.set_centre(manual_centre(100.0, 101.0))
        assert s.undo() and s.centre is None or s.centre.x != 100.0
        qtbot.keyClick(window.view, key, mods)
        assert s.centre is not None and s.centre.x == 100.0, key


def test_recovery_offers_the_newest_not_a_discarded_session(window, open_pattern, two_files, qtbot):
    from saedkit.core.workflow.session import autosave_path, find_leftover_autosave
    from saedkit.gui.main_window import MainWindow

    (a, _), (b, _) = two_files
    s = open_pattern(a)
    s.set_centre(manual_centre(50.5, 60.5))
    assert window.autosave() and autosave_path().is_file()
    open_pattern(b)  # the changes to a are discarded: their autosave goes with them
    assert not autosave_path().exists()
    s2 = window.session
    s2.set_centre(manual_centre(77.5, 88.5))
    assert window.autosave()
    # an older crash left another session behind; this run "crashes" now
    older = autosave_path(_dead_pid())
    newer = autosave_path(_dead_pid())
    older.write_bytes(autosave_path().read_bytes().replace(b"77.5", b"11.5"))
    autosave_path().rename(newer)
    past = time.time() - 3600
    os.utime(older, (past, past))
    assert find_leftover_autosave() == newer
    w2 = MainWindow(synchronous=True)
    qtbot.addWidget(w2)
    w2.resize(1000, 700)
    w2.show()
    w2.offer_recovery()
    buttons = {b.text(): b for b in w2.notice.findChildren(type(w2.notice.close_button)) if b.text()}
    assert {"Recover", "Discard"} <= set(buttons)
    # readable: the button's text and its face differ strongly in lightness (WCAG contrast ≥ 4.5, common practice)
    img = buttons["Recover"].grab().toImage()

    def luminance(c):  # WCAG 2 relative luminance of an sRGB colour (W3C)
        lin = [v / 12.92 if v <= 0.04045 else ((v + 0.055) / 1.055) ** 2.4 for v in (c.redF(), c.greenF(), c.blueF())]
        return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]

    lum = [luminance(img.pixelColor(x, y)) for x in range(0, img.width(), 2) for y in range(0, img.height(), 2)]
    face = float(np.median(lum))
    ink = max(lum, key=lambda v: abs(v - face))
    lo, hi = sorted((face, ink))
    assert (hi + 0.05) / (lo + 0.05) >= 4.5
    buttons["Recover"].click()
    assert w2.session is not None and w2.session.centre.x == 77.5


def test_choices_kept_and_old_messages_cleared(window, open_pattern, two_files):
    (a, _), (b, _) = two_files
    s = open_pattern(a)
    s.set_phases(["Si", "Cu"])
    window.search_panel.d_tol.setValue(1.7)
    assert s.settings.d_tolerance_pct == 1.7
    window.notify("A warning about the first file.", "warning")
    top_left = window.view.mapToGlobal(QPoint(0, 0))
    assert not window.notice.isHidden()
    # the notice floats over the view: the view (and the image in it) does not move
    assert window.view.mapToGlobal(QPoint(0, 0)) == top_left and window.notice.parent() is window.view
    s2 = open_pattern(b)
    assert window.notice.isHidden()
    assert tuple(s2.phases) == ("Si", "Cu") and s2.settings.d_tolerance_pct == 1.7
    assert not s2.is_modified
    assert window.search_panel.d_tol.value() == 1.7


def test_the_wheel_over_an_unfocused_drop_down_scrolls_the_panel(window, open_pattern, two_files):
    open_pattern(two_files[0][0])
    combo = window.calibration_panel.standard
    before = combo.currentIndex()
    centre = QPointF(combo.rect().center())
    ev = QWheelEvent(centre, QPointF(combo.mapToGlobal(combo.rect().center())), QPoint(0, -120), QPoint(0, -120),
                     Qt.MouseButton.NoButton, Qt.KeyboardModifier.NoModifier, Qt.ScrollPhase.NoScrollPhase, False)
    QApplication.sendEvent(combo, ev)
    assert combo.currentIndex() == before
    combo.setFocus()
    combo.clearFocus()
    assert combo.focusPolicy() == Qt.FocusPolicy.StrongFocus


def test_spot_numbers_copy_and_find_spots_keeps_hand_placed(window, open_pattern, two_files, tmp_path):
    from saedkit.report.tables import read_measurements_csv, write_measurements_csv

    path, truth = two_files[0]
    s = open_pattern(path)
    s.set_centre(manual_centre(*truth.centre_xy, sigma_px=0.3))
    window.use_camera_constant(K_PX_A, 0.5)
    s.add_spot(Spot(20.0, 20.0, 1.0, 1.0, np.nan, np.nan, np.nan, np.nan, np.nan, np.nan, method="click"))
    window.find_spots()
    assert sum(o == "manual" for o in s.spot_origins) == 1
    assert "placed by hand" in window.statusBar().currentMessage()
    n = len(s.spots)
    assert n >= 4
    # the same numbers on screen, in the table and in the CSV: 1 … n
    panel = window.measurements_panel
    shown = [panel.model.text(m, 0) for m in panel.model.rows]
    assert shown == [str(i) for i in range(1, n + 1)]
    table = read_measurements_csv(write_measurements_csv(s.to_analysis(), tmp_path / "m.csv"))
    assert [r["index"] for r in table.rows if r["feature"] == "spot"] == list(range(1, n + 1))
    # one row selected: the button copies the whole table, Ctrl+C the selection, and each says which
    sm = panel.view.selectionModel()
    sm.select(panel.proxy.index(2, 0), sm.SelectionFlag.ClearAndSelect | sm.SelectionFlag.Rows)
    panel.copy_button.click()
    text = QApplication.clipboard().text()
    assert text.count("\n") == n + 1 and "whole table" in window.statusBar().currentMessage()
    text = panel.copy(selected_only=True)
    assert text.count("\n") == 2 and "1 selected row" in window.statusBar().currentMessage()
