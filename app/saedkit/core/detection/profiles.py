"""Intensity profiles read off a pattern: along a line between two points, and round a ring.

Pure numpy/scipy. Intensities are interpolated bilinearly between pixel
centres (x = column, y = row, pixel centres on integer coordinates); samples
whose nearest pixel is masked, or that fall off the image, are NaN.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError

__all__ = ["LineProfile", "AzimuthalProfile", "calculate_line_profile", "calculate_azimuthal_profile"]


@dataclass(frozen=True)
class LineProfile:
    """Intensity along a straight line.

    Attributes
    ----------
    start_xy, end_xy : (float, float)
        Ends of the line, image pixels.
    distance_px : ndarray
        Distance of each sample from ``start_xy`` (1-px steps, both ends included).
    intensity : ndarray
        Bilinear intensity at each sample (NaN where masked or outside).
    spot_distance_px : ndarray
        Where the given spots within ``near_px`` of the line project onto it.
    spot_index : ndarray
        Index (from 0, in the given spot list) of each of those spots.
    """

    start_xy: tuple[float, float]
    end_xy: tuple[float, float]
    distance_px: np.ndarray = field(repr=False)
    intensity: np.ndarray = field(repr=False)
    spot_distance_px: np.ndarray = field(repr=False)
    spot_index: np.ndarray = field(repr=False)

    @property
    def length_px(self) -> float:
        return float(math.hypot(self.end_xy[0] - self.start_xy[0], self.end_xy[1] - self.start_xy[1]))

    def to_dict(self) -> dict:
        return {"start_xy": list(self.start_xy), "end_xy": list(self.end_xy),
                "distance_px": self.distance_px.tolist(),
                "intensity": [None if not math.isfinite(v) else float(v) for v in self.intensity],
                "spot_distance_px": self.spot_distance_px.tolist(), "spot_index": self.spot_index.tolist()}


@dataclass(frozen=True)
class AzimuthalProfile:
    """Mean intensity round a ring (a band of ``width_px`` about ``radius_px``), against azimuth.

    ``angle_deg`` runs from −180° to 180° (from +x towards +y); the ring is
    drawn with the distortion ``ellipse`` (ideal radius ``radius_px``).
    """

    centre_xy: tuple[float, float]
    radius_px: float
    width_px: float
    angle_deg: np.ndarray = field(repr=False)
    intensity: np.ndarray = field(repr=False)

    def to_dict(self) -> dict:
        return {"centre_xy": list(self.centre_xy), "radius_px": self.radius_px, "width_px": self.width_px,
                "angle_deg": self.angle_deg.tolist(),
                "intensity": [None if not math.isfinite(v) else float(v) for v in self.intensity]}


def _sample(data: np.ndarray, xy: np.ndarray, mask: np.ndarray | None) -> np.ndarray:
    """Bilinear values at points ``xy`` (N, 2); NaN off the image or on masked pixels."""
    from scipy.ndimage import map_coordinates

    rows, cols = data.shape
    x, y = xy[:, 0], xy[:, 1]
    vals = map_coordinates(np.asarray(data, float), [y, x], order=1, mode="nearest")
    off = (x < -0.5) | (x > cols - 0.5) | (y < -0.5) | (y > rows - 0.5)
    vals = np.where(off, np.nan, vals)
    if mask is not None:
        r = np.clip(np.rint(y).astype(int), 0, rows - 1)
        c = np.clip(np.rint(x).astype(int), 0, cols - 1)
        vals = np.where(np.asarray(mask, bool)[r, c], np.nan, vals)
    return vals


def _check(data, mask) -> np.ndarray:
    arr = np.asarray(data)
    if arr.ndim != 2 or arr.size == 0:
        raise InputError(f"data must be a non-empty 2-D image, got shape {arr.shape}")
    if mask is not None and np.shape(mask) != arr.shape:
        raise InputError(f"mask must have the image's shape {arr.shape}, got {np.shape(mask)}")
    return arr


def _point(name: str, xy) -> tuple[float, float]:
    try:
        x, y = (float(v) for v in xy)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a point [x, y], got {xy!r}") from None
    if not (math.isfinite(x) and math.isfinite(y)):
        raise InputError(f"{name} must be finite, got {xy!r}")
    return x, y


def calculate_line_profile(data, start_xy, end_xy, *, mask=None, spots_xy=None,
                           near_px: float = 3.0) -> LineProfile:
    """Intensity along the line from ``start_xy`` to ``end_xy``, with the spots near it.

    Parameters
    ----------
    data : (rows, cols) array
    start_xy, end_xy : [x, y]
        Ends of the line, image pixels; they must differ.
    mask : bool array, optional
        True where pixels are excluded (their samples are NaN).
    spots_xy : (N, 2) array, optional
        Spot positions; those within ``near_px`` of the segment are reported
        by their distance along it.
    near_px : float
        Largest distance of a spot from the line to be shown on it.

    Returns
    -------
    LineProfile
    """
    arr = _check(data, mask)
    a, b = _point("start_xy", start_xy), _point("end_xy", end_xy)
    length = math.hypot(b[0] - a[0], b[1] - a[1])
    if length < 1.0:
        raise InputError(f"the line from {a} to {b} is shorter than 1 px: drag farther")
    n = int(math.floor(length)) + 1
    t = np.arange(n, dtype=float)
    if t[-1] < length:
        t = np.append(t, length)
    u = np.array([(b[0] - a[0]) / length, (b[1] - a[1]) / length])
    xy = np.asarray(a) + t[:, None] * u
    vals = _sample(arr, xy, mask)
    sd = np.zeros(0)
    si = np.zeros(0, int)
    if spots_xy is not None and len(spots_xy):
        p = np.asarray(spots_xy, float).reshape(-1, 2) - np.asarray(a)
        along = p @ u
        across = np.abs(p @ np.array([-u[1], u[0]]))
        near = (across <= float(near_px)) & (along >= 0) & (along <= length)
        si = np.flatnonzero(near)
        sd = along[near]
    return LineProfile(a, b, t, vals, sd, si)


def calculate_azimuthal_profile(data, centre_xy, radius_px: float, *, width_px: float = 3.0, n_bins: int = 360,
                                ellipse: Ellipse | None = None, mask=None) -> AzimuthalProfile:
    """Mean intensity round the ring of ideal radius ``radius_px`` about ``centre_xy``, in ``n_bins`` azimuths.

    Each bin averages the samples of its azimuth at radii from
    ``radius_px − width_px/2`` to ``radius_px + width_px/2`` (1-px steps), the
    ring drawn with the distortion ``ellipse``; masked samples are left out
    (a bin with none left is NaN).
    """
    arr = _check(data, mask)
    c = _point("centre_xy", centre_xy)
    r0 = float(radius_px)
    w = float(width_px)
    if not (math.isfinite(r0) and r0 > 0):
        raise InputError(f"radius_px must be a positive number, got {radius_px!r}")
    if not (math.isfinite(w) and 0 <= w < 2 * r0):
        raise InputError(f"width_px must be ≥ 0 and less than the ring's diameter, got {width_px!r}")
    if int(n_bins) < 4:
        raise InputError(f"n_bins must be at least 4, got {n_bins!r}")
    ell = ellipse or NO_DISTORTION
    ang = np.linspace(-180.0, 180.0, int(n_bins), endpoint=False) + 180.0 / int(n_bins)
    radii = np.arange(-w / 2, w / 2 + 1e-9, 1.0) + r0 if w >= 1 else np.array([r0])
    t = np.radians(ang)
    unit = np.stack([np.cos(t), np.sin(t)], axis=1)
    vals = []
    for r in radii:
        xy = np.asarray(c) + ell.distort_array(unit * r)
        vals.append(_sample(arr, xy, mask))
    stack = np.array(vals)
    with np.errstate(invalid="ignore"):
        counts = np.sum(np.isfinite(stack), axis=0)
        mean = np.where(counts > 0, np.nansum(stack, axis=0) / np.maximum(counts, 1), np.nan)
    return AzimuthalProfile(c, r0, w, ang, mean)
