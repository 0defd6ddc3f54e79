"""The centre of a ring from points clicked on it (pure geometry)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from saedkit.core.errors import FitError, InputError

__all__ = ["CircleThroughPoints", "calculate_circle_through_points"]


@dataclass(frozen=True)
class CircleThroughPoints:
    """The circle through (or, for more than three, closest to) points on a ring.

    ``rms_px`` is the RMS distance of the points from the circle (0 for three points).
    """

    x: float
    y: float
    radius_px: float
    rms_px: float
    n_points: int

    def to_dict(self) -> dict:
        return {"x": self.x, "y": self.y, "radius_px": self.radius_px, "rms_px": self.rms_px,
                "n_points": self.n_points}


def calculate_circle_through_points(points_xy) -> CircleThroughPoints:
    """The circle through three points [x, y] (exact), or the algebraic least-squares circle of more.

    Solves x² + y² + D·x + E·y + F = 0 for (D, E, F); the centre is
    (−D/2, −E/2) and the radius √(D²/4 + E²/4 − F).

    Raises
    ------
    InputError
        Fewer than three points, or points that are not finite.
    FitError
        The points lie on a line (no circle passes through them).
    """
    p = np.asarray(points_xy, float)
    if p.ndim != 2 or p.shape[1] != 2 or len(p) < 3:
        raise InputError(f"points_xy must hold at least three points [x, y], got shape {p.shape}")
    if not np.all(np.isfinite(p)):
        raise InputError("points_xy must be finite")
    shift = p.mean(axis=0)
    q = p - shift  # better conditioned
    scale = float(np.max(np.hypot(*q.T))) or 1.0
    a = np.column_stack([q / scale, np.ones(len(q))])
    b = -np.sum((q / scale) ** 2, axis=1)
    # collinear points: the smallest singular value of the centred coordinates vanishes
    sv = np.linalg.svd(q / scale, compute_uv=False)
    if sv[-1] < 1e-9 * max(sv[0], 1e-300):
        raise FitError("the points lie on a straight line: click three points spread round the ring")
    sol, *_ = np.linalg.lstsq(a, b, rcond=None)
    d, e, f = sol
    cx, cy = -d / 2, -e / 2
    r2 = cx * cx + cy * cy - f
    if not r2 > 0:
        raise FitError("no circle passes through these points")
    r = math.sqrt(r2) * scale
    centre = np.array([cx, cy]) * scale + shift
    rms = float(np.sqrt(np.mean((np.hypot(*(p - centre).T) - r) ** 2)))
    return CircleThroughPoints(float(centre[0]), float(centre[1]), float(r), rms, int(len(p)))
