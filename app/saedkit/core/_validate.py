"""Small input validators that name the argument, the value and what was expected."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from saedkit.core.errors import InputError


def check_positive(name: str, value: Any) -> float:
    """Return ``value`` as a float, or raise if it is not finite and > 0."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise InputError(f"{name} must be a finite number > 0, got {value!r}")
    return v


def check_finite(name: str, value: Any) -> float:
    """Return ``value`` as a float, or raise if it is not finite."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v):
        raise InputError(f"{name} must be finite, got {value!r}")
    return v


def finite_or_none(x: Any) -> float | None:
    """``x`` as a float, or None when it is missing or not finite (JSON has no NaN)."""
    if x is None:
        return None
    v = float(x)
    return v if math.isfinite(v) else None


def check_in_range(name: str, value: Any, lo: float, hi: float) -> float:
    """Return ``value`` as a float, or raise if it is outside ``[lo, hi]``."""
    v = check_finite(name, value)
    if not lo <= v <= hi:
        raise InputError(f"{name} must be between {lo} and {hi}, got {value!r}")
    return v


def check_image_2d(name: str, image: Any) -> np.ndarray:
    """Return ``image`` as a 2-D array, or raise naming its shape."""
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise InputError(f"{name} must be 2-D, got shape {arr.shape}")
    if arr.shape[0] < 8 or arr.shape[1] < 8:
        raise InputError(f"{name} must be at least 8x8 pixels, got shape {arr.shape}")
    return arr


def check_points_xy(name: str, points: Any) -> np.ndarray:
    """Return ``points`` as an (N, 2) float array of [x, y], or raise."""
    arr = np.asarray(points, dtype=float)
    if arr.ndim == 1 and arr.size == 0:
        arr = arr.reshape(0, 2)
    if arr.ndim != 2 or arr.shape[1] != 2:
        raise InputError(f"{name} must have shape (N, 2) of [x, y], got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be finite")
    return arr


def check_xy(name: str, point: Any) -> np.ndarray:
    """Return one point ``[x, y]`` as a float array of shape (2,), or raise."""
    arr = np.asarray(point, dtype=float)
    if arr.shape != (2,) or not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be a finite point [x, y], got {point!r}")
    return arr
