"""Starting the desktop program: the QApplication, the exception hook, the first window."""

from __future__ import annotations

import os
import sys
import traceback
from pathlib import Path

__all__ = ["run", "make_application", "install_excepthook", "log_dir", "error_log_path", "log_exception"]

#: The error log is moved to ``errors.log.1`` when it grows beyond this many bytes.
_LOG_MAX_BYTES = 1_000_000


def log_dir() -> Path:
    """The folder of the program's log files: ``SAEDKIT_LOG_DIR`` or the platform's user log folder."""
    env = os.environ.get("SAEDKIT_LOG_DIR")
    if env:
        return Path(env).expanduser()
    import platformdirs

    return Path(platformdirs.user_log_dir("saedkit"))


def error_log_path() -> Path:
    """``<log dir>/errors.log``, where unexpected exceptions of the desktop program are written."""
    return log_dir() / "errors.log"


def log_exception(exc: BaseException, text: str | None = None, *, context: dict | None = None) -> Path | None:
    """Append an unexpected exception with what is needed to report it to :func:`error_log_path`.

    Parameters
    ----------
    exc : BaseException
    text : str, optional
        The formatted traceback (made from ``exc`` when missing).
    context : dict, optional
        What the program was doing (the open file, the window's last notice).

    Returns
    -------
    Path or None
        The log file, or None when it cannot be written (logging never raises).
    """
    import datetime as _dt
    import platform

    from saedkit import __version__

    tb = text or "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
    try:
        from PySide6 import __version__ as qt_version
    except ImportError:  # pragma: no cover
        qt_version = "?"
    lines = [
        "=" * 72,
        f"time: {_dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')}",
        f"saedkit {__version__}; Python {platform.python_version()}; PySide6 {qt_version}; "
        f"{platform.platform()}",
        f"error: {type(exc).__name__}: {' '.join(str(exc).split())[:500]}",
    ]
    for key, value in (context or {}).items():
        lines.append(f"{key}: {value}")
    lines.append(tb.rstrip("\n"))
    path = error_log_path()
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        if path.exists() and path.stat().st_size > _LOG_MAX_BYTES:
            os.replace(path, path.with_name(path.name + ".1"))
        with open(path, "a", encoding="utf-8") as fh:
            fh.write("\n".join(lines) + "\n")
    except OSError:
        return None
    return path


def _window_context(window) -> dict:
    ctx: dict = {}
    session = getattr(window, "session", None)
    if session is not None:
        image = getattr(session, "image", None)
        ctx["image"] = getattr(image, "source_path", None)
        ctx["session file"] = getattr(session, "path", None)
    notices = getattr(window, "notices", None)
    if notices:
        ctx["last notice"] = notices[-1]
    return ctx


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
    """Show an unexpected exception in the window instead of letting the program die, and log it.

    Every unexpected exception — from the event loop (``sys.excepthook``) or
    from a background task (the window's ``report_exception``) — is appended
    to :func:`error_log_path` with the version, platform and the open file;
    the window's message then names the log file.
    """
    previous = sys.excepthook
    show = window.report_exception

    def report(exc: BaseException, tb: str | None = None) -> None:
        from saedkit.core.errors import SaedkitError

        if isinstance(exc, SaedkitError):
            show(exc, tb)
            return
        text = tb or "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        logged = log_exception(exc, text, context=_window_context(window))
        if logged is not None:
            text = f"{text.rstrip()}\n\n(written to the error log {logged})"
        show(exc, text)

    window.report_exception = report

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
