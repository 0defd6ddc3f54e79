"""Detector masks: the pixels of one camera that are always excluded (gaps, dead or hot pixels, a fixed
beam stop), kept in a file and applied to every pattern recorded with that camera.

A detector mask file is a compressed NumPy archive (``.saedmask.npz``) holding
``mask`` (bool, rows × cols) and ``camera`` (a name). The program keeps one
file per camera name and image size in ``<data dir>/detector_masks/``.
"""

from __future__ import annotations

import io
import os
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from saedkit.core._atomic import write_bytes_atomic
from saedkit.core.errors import ImageReadError, InputError

__all__ = ["DetectorMask", "MASK_SUFFIX", "write_detector_mask", "read_detector_mask", "detector_mask_path",
           "find_detector_mask"]

MASK_SUFFIX = ".saedmask.npz"


@dataclass(frozen=True)
class DetectorMask:
    """A camera's fixed mask: ``mask`` True where pixels are excluded."""

    camera: str
    mask: np.ndarray = field(repr=False)

    @property
    def shape(self) -> tuple[int, int]:
        return tuple(int(v) for v in self.mask.shape)

    @property
    def n_excluded(self) -> int:
        return int(np.count_nonzero(self.mask))

    def to_dict(self) -> dict:
        return {"camera": self.camera, "shape": list(self.shape), "n_excluded": self.n_excluded}


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name.strip()) or "camera"


def detector_mask_path(folder: str | os.PathLike, camera: str, shape) -> Path:
    """Where the mask of ``camera`` for images of ``shape`` (rows, cols) lives in ``folder``."""
    rows, cols = (int(v) for v in shape)
    return Path(folder) / f"{_safe(camera)}_{cols}x{rows}{MASK_SUFFIX}"


def write_detector_mask(path: str | os.PathLike, mask, *, camera: str) -> Path:
    """Write a detector mask file (atomically). ``mask``: 2-D, True where excluded."""
    m = np.asarray(mask)
    if m.ndim != 2 or m.size == 0:
        raise InputError(f"mask must be a non-empty 2-D array, got shape {m.shape}")
    if not str(camera).strip():
        raise InputError("camera must be a non-empty name")
    buf = io.BytesIO()
    np.savez_compressed(buf, mask=m.astype(bool), camera=np.array(str(camera)))
    return write_bytes_atomic(path, buf.getvalue())


def read_detector_mask(path: str | os.PathLike) -> DetectorMask:
    """Read a detector mask file written by :func:`write_detector_mask`."""
    p = Path(path)
    try:
        with np.load(p, allow_pickle=False) as z:
            mask = np.asarray(z["mask"], bool)
            camera = str(z["camera"])
    except FileNotFoundError:
        raise ImageReadError(f"{p}: detector mask file not found") from None
    except (OSError, KeyError, ValueError) as exc:
        raise ImageReadError(f"{p}: not a saedkit detector mask file ({exc})") from None
    if mask.ndim != 2:
        raise ImageReadError(f"{p}: the mask is not 2-D (shape {mask.shape})")
    return DetectorMask(camera, mask)


def find_detector_mask(folder: str | os.PathLike, shape) -> DetectorMask | None:
    """The newest detector mask in ``folder`` for images of ``shape`` (rows, cols), or None."""
    rows, cols = (int(v) for v in shape)
    d = Path(folder)
    if not d.is_dir():
        return None
    found = sorted(d.glob(f"*_{cols}x{rows}{MASK_SUFFIX}"), key=lambda f: f.stat().st_mtime, reverse=True)
    for f in found:
        try:
            m = read_detector_mask(f)
        except ImageReadError:
            continue
        if m.shape == (rows, cols):
            return m
    return None
