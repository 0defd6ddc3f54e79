"""Atomic file writes: write to a temporary file beside the target, then rename.

A crash during a write can never leave a half-written file in place of a good
one: the rename is atomic on POSIX and Windows (``os.replace``).

Temporary files are named ``.<target name>.<pid>.<random>.tmp``. A process
killed mid-write leaves its temporary file behind; the next write of the same
target removes such leftovers when the process that wrote them is no longer
running, or when they are older than :data:`STALE_AFTER_S` (only files of
exactly this pattern, never anything else in the folder).
"""

from __future__ import annotations

import os
import re
import tempfile
import time
from pathlib import Path
from typing import Callable

__all__ = ["write_bytes_atomic", "write_text_atomic", "write_with_atomic", "remove_stale_temp_files",
           "STALE_AFTER_S"]

#: A temporary file of this pattern older than this (seconds) is a leftover whatever its process.
STALE_AFTER_S = 3600.0


def _temp_pattern(target_name: str) -> re.Pattern:
    # mkstemp's random part is 8 characters of [a-z0-9_]; saedkit 0.1 wrote no pid
    return re.compile(r"\." + re.escape(target_name) + r"\.(?:(\d+)\.)?[A-Za-z0-9_]{8}\.tmp")


def _pid_running(pid: int) -> bool:
    if pid == os.getpid():
        return True
    if os.name == "nt":  # pragma: no cover - no cheap check on Windows: rely on the age
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True
    return True


def remove_stale_temp_files(path: str | os.PathLike, *, now: float | None = None) -> list[Path]:
    """Remove the temporary files an interrupted atomic write of ``path`` left behind.

    Parameters
    ----------
    path : str or path
        The target file (its folder is searched).
    now : float, optional
        The current time (seconds since the epoch), for tests.

    Returns
    -------
    list of Path
        The files removed.
    """
    target = Path(path)
    pattern = _temp_pattern(target.name)
    now = time.time() if now is None else now
    removed: list[Path] = []
    try:
        entries = list(os.scandir(target.parent))
    except OSError:
        return removed
    for entry in entries:
        m = pattern.fullmatch(entry.name)
        if m is None:
            continue
        try:
            if not entry.is_file(follow_symlinks=False):
                continue
            age = now - entry.stat(follow_symlinks=False).st_mtime
            pid = int(m.group(1)) if m.group(1) else None
            if age > STALE_AFTER_S or (pid is not None and not _pid_running(pid)):
                os.unlink(entry.path)
                removed.append(Path(entry.path))
        except OSError:
            continue
    return removed


def write_with_atomic(path: str | os.PathLike, writer: Callable[[str], None]) -> Path:
    """Call ``writer(tmp_path)`` to write a temporary file, then move it onto ``path``.

    The temporary file lives in the target's folder (same file system), and is
    removed when ``writer`` raises (or by the next write, when the process is
    killed).
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    remove_stale_temp_files(target)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.{os.getpid()}.", suffix=".tmp", dir=target.parent)
    os.close(fd)
    # mkstemp makes the file private (0600); give it the permissions a plain open() would
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)
    try:
        writer(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return target


def write_bytes_atomic(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically."""

    def _write(tmp: str) -> None:
        with open(tmp, "wb") as fh:
            fh.write(data)

    return write_with_atomic(path, _write)


def write_text_atomic(path: str | os.PathLike, text: str, *, encoding: str = "utf-8") -> Path:
    """Write ``text`` to ``path`` atomically."""
    return write_bytes_atomic(path, text.encode(encoding))
