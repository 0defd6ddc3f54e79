"""The rotation axis of a rotation (3D electron diffraction) series, from how long spots last.

During a rotation by ω about an axis â in the detector plane, a reciprocal
lattice point g keeps its component along â, while its other two components,
of length ``r = √(|g|² − (g·â)²)``, turn about â. It is seen while it stays
within the relrod half-width ``s`` of the (nearly flat) Ewald sphere, that is
for an angular window ``Δω ≈ 2s / r``, and it is seen at a distance ``≈ r``
from the axis line on the detector. Spots far from the axis flash for a frame
or two; spots near it last many frames: the number of frames a spot lasts,
``L``, is inversely proportional to its distance from the axis line,
``L·|p·n̂| ≈ const`` with ``n̂`` the in-plane normal of the axis.

:func:`find_rotation_axis` links spots from frame to frame into tracks, and
finds the axis direction that makes ``log L + log |p·n̂|`` most nearly
constant over the tracks (a one-parameter search; tracks cut by the start or
end of the series are left out).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from saedkit.core.errors import InputError

__all__ = ["RotationAxis", "find_rotation_axis", "link_spot_tracks"]


@dataclass(frozen=True)
class RotationAxis:
    """The rotation axis direction in the detector plane.

    Attributes
    ----------
    angle_deg : float
        Direction of the axis, degrees from +x towards +y, in [0, 180).
    sigma_deg : float
        Half-width of the search's minimum (where the residual rises by its
        own standard error), a rough standard uncertainty.
    n_tracks : int
        Tracks used (spots seen in consecutive frames, not cut by the series' ends).
    """

    angle_deg: float
    sigma_deg: float
    n_tracks: int

    def to_dict(self) -> dict:
        return {"rotation_axis_deg": self.angle_deg, "rotation_axis_sigma_deg": self.sigma_deg,
                "n_tracks": self.n_tracks}


def link_spot_tracks(spots_per_frame: Sequence, *, link_px: float = 2.0) -> list[tuple[int, int, np.ndarray]]:
    """Link spots seen at the same place in consecutive frames.

    Parameters
    ----------
    spots_per_frame : sequence of (n_i, 2) arrays or None
        Spot offsets ``[x, y]`` from the centre, frame by frame; None for a
        frame that was not measured.
    link_px : float
        Largest move of a spot from one frame to the next.

    Returns
    -------
    list of (first_frame, last_frame, mean_offset_xy)
    """
    tracks: list[list] = []  # [first, last, sum_xy, n, last_xy]
    open_: list[int] = []
    for f, xy in enumerate(spots_per_frame):
        if xy is None:  # a frame not measured ends every track
            open_ = []
            continue
        xy = np.asarray(xy, float).reshape(-1, 2)
        used = set()
        still = []
        for t in open_:
            last = tracks[t][4]
            if len(xy):
                d = np.hypot(*(xy - last).T)
                d[list(used)] = np.inf
                j = int(np.argmin(d))
                if d[j] <= link_px:
                    used.add(j)
                    tracks[t][1] = f
                    tracks[t][2] = tracks[t][2] + xy[j]
                    tracks[t][3] += 1
                    tracks[t][4] = xy[j]
                    still.append(t)
        for j in range(len(xy)):
            if j not in used:
                tracks.append([f, f, xy[j].copy(), 1, xy[j]])
                still.append(len(tracks) - 1)
        open_ = still
    return [(a, b, s / n) for a, b, s, n, _ in tracks]


def find_rotation_axis(spots_per_frame: Sequence, *, link_px: float = 2.0, min_radius_px: float = 3.0,
                       step_deg: float = 0.25) -> RotationAxis | None:
    """The rotation axis direction of a rotation series from its spots' lifetimes.

    Parameters
    ----------
    spots_per_frame : sequence of (n_i, 2) arrays or None
        Spot offsets ``[x, y]`` from the pattern centre, frame by frame (the
        direct beam excluded or within ``min_radius_px`` of the centre);
        None for a frame that was not measured (tracks touching it are left out).
    link_px : float
        Largest frame-to-frame move of one spot.
    min_radius_px : float
        Spots closer to the centre are ignored.
    step_deg : float
        Step of the search over directions.

    Returns
    -------
    RotationAxis or None
        None when fewer than 8 tracks are available.
    """
    if not (isinstance(step_deg, (int, float)) and 0 < step_deg <= 5):
        raise InputError(f"step_deg must be a number in (0, 5], got {step_deg!r}")
    n_frames = len(spots_per_frame)
    measured = [f is not None for f in spots_per_frame]
    tracks = link_spot_tracks(spots_per_frame, link_px=link_px)
    # a track that touches the series' ends or an unmeasured frame may have lasted longer: left out
    keep = [(b - a + 1, p) for a, b, p in tracks
            if a > 0 and b < n_frames - 1 and measured[a - 1] and measured[b + 1] and np.hypot(*p) >= min_radius_px]
    if len(keep) < 8:
        return None
    L = np.array([k for k, _ in keep], float)
    p = np.array([q for _, q in keep], float)
    phis = np.arange(0.0, 180.0, step_deg)
    n = np.stack([-np.sin(np.deg2rad(phis)), np.cos(np.deg2rad(phis))], axis=1)  # normals of the axis
    dist = np.abs(p @ n.T)  # (tracks, directions)
    resid = np.log(L)[:, None] + np.log(np.maximum(dist, 0.5))
    cost = resid.var(axis=0)
    k = int(np.argmin(cost))
    # rough uncertainty: the directions whose cost is within the cost's standard error of the minimum
    se = cost[k] * math.sqrt(2.0 / max(len(L) - 1, 1))
    near = phis[cost <= cost[k] + se]
    spread = np.abs(((near - phis[k] + 90.0) % 180.0) - 90.0)
    return RotationAxis(float(phis[k]), float(max(spread.max(), step_deg / 2)), len(L))
