"""The desktop program logs an unexpected exception to a file and stays usable (issue 14)."""

from __future__ import annotations

import sys

import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui


@pytest.fixture
def window(qtbot):
    from saedkit.gui.main_window import MainWindow

    w = MainWindow(synchronous=True)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def test_unexpected_exception_is_logged_shown_and_the_window_lives(window, tmp_path, monkeypatch):
    from saedkit.gui.app import error_log_path, install_excepthook

    monkeypatch.setattr(sys, "excepthook", sys.excepthook)  # restored after the test
    monkeypatch.setattr(sys, "stderr", sys.stderr)
    install_excepthook(window)
    log = error_log_path()
    assert log.parent == tmp_path / "saedkit-logs"  # SAEDKIT_LOG_DIR (set by the shared conftest)
    try:
        raise ZeroDivisionError("a bug in a slot")
    except ZeroDivisionError:
        sys.excepthook(*sys.exc_info())
    text = log.read_text()
    assert "ZeroDivisionError: a bug in a slot" in text and "saedkit " in text and "Python " in text
    assert "Traceback" in text and "test_gui_error_log.py" in text
    level, message = window.notices[-1]
    assert level == "error" and "ZeroDivisionError" in message
    # a background task's failure goes the same way
    window.report_exception(KeyError("from a task"), None)
    assert log.read_text().count("=" * 72) == 2
    # an expected failure is only shown, not logged
    from saedkit.core.errors import InputError

    window.report_exception(InputError("a bad value"))
    assert window.notices[-1] == ("error", "a bad value") or "a bad value" in window.notices[-1][1]
    assert log.read_text().count("=" * 72) == 2
    # and the window still works
    assert window.isVisible()
    window.guard(window.search)
    assert window.notices[-1][0] == "error"


def test_log_folder_that_cannot_be_written_never_raises(monkeypatch, tmp_path):
    from saedkit.gui.app import log_exception

    blocker = tmp_path / "file"
    blocker.write_text("x")
    monkeypatch.setenv("SAEDKIT_LOG_DIR", str(blocker / "sub"))
    assert log_exception(RuntimeError("x")) is None
