"""Shared GUI fixtures: a synchronous main window, shown headless."""

import pytest


@pytest.fixture(autouse=True)
def _no_blocking_dialogs(monkeypatch):
    """Modal questions answer 'Discard'/'Yes' at once so closing a window never blocks."""
    from PySide6.QtWidgets import QMessageBox

    monkeypatch.setattr(QMessageBox, "question",
                        staticmethod(lambda *a, **k: QMessageBox.StandardButton.Discard))


@pytest.fixture
def window(qtbot):
    from saedkit.gui.main_window import MainWindow

    w = MainWindow(synchronous=True)
    qtbot.addWidget(w)
    w.resize(1200, 800)
    w.show()
    qtbot.waitExposed(w)
    return w


@pytest.fixture
def open_pattern(window):
    """Open a file in the window without dialogs; returns the new session."""

    def _open(path):
        window.open_path(path, confirm=False)
        assert window.session is not None, window.notices
        return window.session

    return _open
