"""Keyboard-first work: every tool and step has a key, shown in its tooltip and menu, and on the sheet."""

from __future__ import annotations

import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from PySide6.QtGui import QKeySequence  # noqa: E402


def _menu(window, title):
    for a in window.menuBar().actions():
        if a.text().replace("&", "") == title:
            return a.menu()
    raise AssertionError(title)


def test_every_step_and_tool_has_a_key_in_its_tooltip(window):
    for title in ("Tools", "Analyse"):
        for a in _menu(window, title).actions():
            if a.isSeparator() or a.menu() is not None:
                continue
            keys = a.shortcut().toString(QKeySequence.SequenceFormat.NativeText)
            assert keys, a.text()
            assert keys in a.toolTip(), (a.text(), a.toolTip())
    # no key is bound twice (Qt would call it ambiguous and do nothing)
    seen = {}
    for a in window.findChildren(type(window.act_open)):
        for k in a.shortcuts():
            text = k.toString(QKeySequence.SequenceFormat.PortableText)
            assert text not in seen or seen[text] is a, (text, a.text(), seen[text].text())
            seen[text] = a


def test_the_shortcut_sheet_lists_the_menus(window):
    window.act_shortcuts.trigger()
    rows = window.shortcut_rows()
    table = window.shortcut_sheet.findChild(type(window.search_panel.table))
    assert table.rowCount() == len(rows)
    by_command = {r[1]: r[2] for r in rows}
    assert by_command["Find spots"] == "F5" and by_command["Search zone axes"] == "F6"
    assert "Ctrl+Y" in by_command["Redo"].replace("Ctrl+Shift+Z", "") or "Ctrl+Y" in by_command["Redo"]
    assert by_command["Profile"] == "Ctrl+7" and by_command["Pattern only"] == "F11"
    window.shortcut_sheet.close()
