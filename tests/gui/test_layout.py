"""Room for the pattern: the default layout, the table on demand, pattern only, the layout remembered."""

from __future__ import annotations

import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui


def _window(qtbot, w=1600, h=1000):
    from saedkit.gui.main_window import MainWindow

    win = MainWindow(synchronous=True)
    qtbot.addWidget(win)
    win.resize(w, h)
    win.show()
    qtbot.waitExposed(win)
    qtbot.wait(20)
    return win


def test_default_layout_gives_the_pattern_most_of_the_width(qtbot):
    win = _window(qtbot)
    assert win.width() == 1600
    assert win.view.width() >= 0.60 * win.width(), (win.view.width(), win.width())
    # every step is still one click away: a tab of the one panel column
    shown = [d for d in win.docks.values() if not d.isHidden()]
    assert {"calibration", "search", "phases", "ring_phases", "display"} <= {k for k, d in win.docks.items()
                                                                             if d in shown}
    assert win.docks["measurements"].isHidden()
    win.act_table.trigger()  # Ctrl+T
    assert not win.docks["measurements"].isHidden()
    assert win.view.width() >= 0.60 * win.width()


def test_pattern_only_and_back(qtbot):
    win = _window(qtbot)
    before = win.view.width()
    win.act_pattern_only.trigger()  # F11
    qtbot.wait(20)
    assert all(d.isHidden() for d in win.docks.values())
    assert win.view.width() > before and win.view.width() >= 0.95 * win.width()
    win.act_pattern_only.trigger()
    qtbot.wait(20)
    assert not win.docks["calibration"].isHidden()
    assert win.act_pattern_only.shortcut().toString() == "F11"


def test_the_layout_is_remembered_in_the_config_folder(qtbot, tmp_path):
    import os
    from pathlib import Path

    win = _window(qtbot)
    win.docks["display"].hide()
    win.act_table.trigger()
    win.close()
    ini = Path(os.environ["SAEDKIT_CONFIG_DIR"]) / "saedkit.ini"
    assert ini.is_file() and "window" in ini.read_text()
    win2 = _window(qtbot)
    assert win2.docks["display"].isHidden() and not win2.docks["measurements"].isHidden()
