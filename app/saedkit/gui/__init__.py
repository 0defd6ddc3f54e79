"""The saedkit desktop program (PySide6): a thin layer over :mod:`saedkit.core`.

This is the only part of saedkit that imports Qt. Start it with
``saedkit gui [FILE]`` (or ``saedkit`` alone), or from Python::

    from saedkit.gui import run
    run("pattern.tif")
"""

from __future__ import annotations

__all__ = ["run", "MainWindow"]


def __getattr__(name: str):
    if name == "run":
        from saedkit.gui.app import run

        return run
    if name == "MainWindow":
        from saedkit.gui.main_window import MainWindow

        return MainWindow
    raise AttributeError(f"module 'saedkit.gui' has no attribute {name!r}")
