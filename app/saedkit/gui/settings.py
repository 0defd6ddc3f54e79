"""The program's stored settings: preferences, recent files, display choices (QSettings).

The settings live in an INI file ``saedkit.ini`` in ``$SAEDKIT_CONFIG_DIR``
when that is set (tests point it at a temporary folder), else where Qt keeps
an application's settings on the platform.
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

from PySide6.QtCore import QSettings

from saedkit.core.errors import InputError
from saedkit.core.workflow.session import SessionSettings
from saedkit.gui.display import DisplaySettings

__all__ = ["app_settings", "read_preferences", "write_preferences", "recent_files", "add_recent_file",
           "remove_recent_file", "read_display", "write_display", "MAX_RECENT"]

MAX_RECENT = 10


def app_settings() -> QSettings:
    """The QSettings object (INI file under ``$SAEDKIT_CONFIG_DIR`` when set)."""
    folder = os.environ.get("SAEDKIT_CONFIG_DIR")
    if folder:
        Path(folder).mkdir(parents=True, exist_ok=True)
        return QSettings(str(Path(folder) / "saedkit.ini"), QSettings.Format.IniFormat)
    return QSettings(QSettings.Format.IniFormat, QSettings.Scope.UserScope, "saedkit", "saedkit")


def _coerce(value, like):
    if value is None:
        return like
    if isinstance(like, bool):
        return str(value).lower() in ("1", "true", "yes")
    if isinstance(like, int):
        return int(float(value))
    if isinstance(like, float):
        return float(value)
    return str(value)


def read_preferences() -> SessionSettings:
    """Defaults for new sessions (voltage, pixel size, tolerances, ...)."""
    s = app_settings()
    base = SessionSettings()
    values = {}
    for f in dataclasses.fields(SessionSettings):
        key = f"preferences/{f.name}"
        if not s.contains(key):
            continue
        raw = s.value(key)
        default = getattr(base, f.name)
        try:
            if f.name == "pixel_size_um":
                values[f.name] = None if raw in (None, "", "none", 0, "0") else float(raw)
            else:
                values[f.name] = _coerce(raw, default)
        except (TypeError, ValueError):
            continue
    try:
        return SessionSettings(**{**dataclasses.asdict(base), **values})
    except InputError:
        return base


def write_preferences(prefs: SessionSettings) -> None:
    s = app_settings()
    for k, v in prefs.to_dict().items():
        s.setValue(f"preferences/{k}", "" if v is None else v)
    s.sync()


def recent_files() -> list[str]:
    value = app_settings().value("recent/files", [])
    if isinstance(value, str):
        value = [value] if value else []
    return [str(v) for v in (value or [])][:MAX_RECENT]


def add_recent_file(path: str | os.PathLike) -> list[str]:
    p = str(Path(path).resolve())
    files = [f for f in recent_files() if f != p]
    files.insert(0, p)
    files = files[:MAX_RECENT]
    s = app_settings()
    s.setValue("recent/files", files)
    s.sync()
    return files


def remove_recent_file(path: str) -> list[str]:
    files = [f for f in recent_files() if f != str(path)]
    s = app_settings()
    s.setValue("recent/files", files)
    s.sync()
    return files


def read_display() -> DisplaySettings:
    s = app_settings()
    base = DisplaySettings()
    values = {}
    for f in dataclasses.fields(DisplaySettings):
        key = f"display/{f.name}"
        if s.contains(key):
            try:
                values[f.name] = _coerce(s.value(key), getattr(base, f.name))
            except (TypeError, ValueError):
                pass
    try:
        return DisplaySettings(**{**dataclasses.asdict(base), **values})
    except ValueError:
        return base


def write_display(d: DisplaySettings) -> None:
    s = app_settings()
    for k, v in dataclasses.asdict(d).items():
        s.setValue(f"display/{k}", v)
    s.sync()
