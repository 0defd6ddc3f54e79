"""The program's own SVG icons (drawn for saedkit), loaded as scalable QIcons.

The icons are package data in ``saedkit/gui/icons/`` (so an installed
saedkit finds them); the repository keeps the same files in ``icons/``.
"""

from __future__ import annotations

from functools import lru_cache
from importlib import resources
from pathlib import Path

from PySide6.QtGui import QIcon

__all__ = ["icon", "icon_path", "ICON_NAMES"]

ICON_NAMES = (
    "open", "save", "pan", "centre", "spot", "measure", "mask", "search", "calibrate", "export",
    "fit", "actual-size", "find-spots", "undo", "redo", "saedkit",
)


def icon_path(name: str) -> Path | None:
    """Path of icon ``name`` (package data first, then the repository's ``icons/``), or None."""
    ref = resources.files("saedkit.gui") / "icons" / f"{name}.svg"
    if ref.is_file():
        return Path(str(ref))
    repo = Path(__file__).resolve().parents[3] / "icons" / f"{name}.svg"
    return repo if repo.is_file() else None


@lru_cache(maxsize=None)
def icon(name: str) -> QIcon:
    """The QIcon of ``name`` (an empty icon when the file is missing)."""
    path = icon_path(name)
    return QIcon(str(path)) if path is not None else QIcon()
