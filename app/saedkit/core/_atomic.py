"""Atomic file writes: write to a temporary file beside the target, then rename.

A crash during a write can never leave a half-written file in place of a good
one: the rename is atomic on POSIX and Windows (``os.replace``).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Callable

__all__ = ["write_bytes_atomic", "write_text_atomic", "write_with_atomic"]


def write_with_atomic(path: str | os.PathLike, writer: Callable[[str], None]) -> Path:
    """Call ``writer(tmp_path)`` to write a temporary file, then move it onto ``path``.

    The temporary file lives in the target's folder (same file system), and is
    removed when ``writer`` raises.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
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
