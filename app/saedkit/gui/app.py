"""Starting the desktop program: the QApplication, the exception hook, the first window."""

from __future__ import annotations

import os
import sys
import traceback
from pathlib import Path

__all__ = ["run", "make_application", "install_excepthook"]


def make_application(argv: list[str] | None = None):
    """The QApplication (created once), with high-DPI icons and the program's names."""
    from PySide6.QtCore import QCoreApplication, Qt
    from PySide6.QtWidgets import QApplication

    app = QApplication.instance()
    if app is None:
        QCoreApplication.setAttribute(Qt.ApplicationAttribute.AA_DontShowIconsInMenus, False)
        app = QApplication(list(argv) if argv is not None else [sys.argv[0]])
    app.setApplicationName("saedkit")
    app.setOrganizationName("saedkit")
    app.setApplicationDisplayName("saedkit")
    from saedkit import __version__

    app.setApplicationVersion(__version__)
    from saedkit.gui.icons import icon

    app.setWindowIcon(icon("saedkit"))
    return app


def install_excepthook(window) -> None:
    """Show an unexpected exception in the window instead of letting the program die."""
    previous = sys.excepthook

    def hook(exc_type, exc, tb):
        if issubclass(exc_type, KeyboardInterrupt):
            previous(exc_type, exc, tb)
            return
        text = "".join(traceback.format_exception(exc_type, exc, tb))
        try:
            window.report_exception(exc, text)
        except Exception:  # noqa: BLE001 - the hook must never raise
            previous(exc_type, exc, tb)

    sys.excepthook = hook


def run(path: str | os.PathLike | None = None, *, demo: bool = False, synchronous: bool = False,
        exec_loop: bool = True) -> int:
    """Open the desktop program (optionally on a file or the demo session); returns the exit status."""
    app = make_application()
    from saedkit.gui.main_window import MainWindow

    window = MainWindow(synchronous=synchronous)
    install_excepthook(window)
    window.show()
    if path is not None:
        window.guard(lambda: window.open_path(Path(path), confirm=False))
    elif demo:
        window.guard(lambda: window.open_demo("session"))
    else:
        window.offer_recovery()
    if not exec_loop:
        return 0
    return app.exec()
