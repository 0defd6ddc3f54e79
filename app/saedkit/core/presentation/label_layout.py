"""Placing text labels so that they never overlap (pure geometry, in any 2-D pixel frame).

Used by the screen overlays and the plots to keep ring, reflection and
profile labels apart: each label has a short list of candidate places, tried
in order; the first that overlaps no label already placed, no obstacle and
stays inside the bounds is taken. A label with no free place is left out
(labels thin out when they are crowded, e.g. at low zoom), and the caller can
tell which were left out.

Boxes are ``(x0, y0, x1, y1)`` with ``x0 < x1`` and ``y0 < y1``, in a frame
where y may grow up or down (only overlaps matter).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Iterable, Sequence

from saedkit.core.errors import InputError

__all__ = ["PlacedLabel", "place_labels", "ring_label_places", "boxes_overlap", "LEADER_STEPS_PX"]

#: Radial distances (px) beyond the first place at which a ring label is tried with a leader line.
LEADER_STEPS_PX = (18.0, 36.0)


@dataclass(frozen=True)
class PlacedLabel:
    """Where one label went.

    Attributes
    ----------
    index : int
        Position of the label in the input.
    box : tuple of float
        ``(x0, y0, x1, y1)`` of the label.
    anchor_xy : tuple of float
        The point the label belongs to (on its ring, at its marker).
    leader : bool
        True when the label stands off its anchor and wants a leader line.
    """

    index: int
    box: tuple[float, float, float, float]
    anchor_xy: tuple[float, float]
    leader: bool

    def to_dict(self) -> dict:
        return {"index": self.index, "box": list(self.box), "anchor_xy": list(self.anchor_xy),
                "leader": self.leader}


def boxes_overlap(a: Sequence[float], b: Sequence[float], *, gap_px: float = 0.0) -> bool:
    """True when boxes ``a`` and ``b`` (x0, y0, x1, y1) overlap or come closer than ``gap_px``."""
    return not (a[2] + gap_px <= b[0] or b[2] + gap_px <= a[0] or a[3] + gap_px <= b[1] or b[3] + gap_px <= a[1])


def _inside(box, bounds) -> bool:
    return bounds is None or (box[0] >= bounds[0] and box[1] >= bounds[1] and box[2] <= bounds[2]
                              and box[3] <= bounds[3])


def place_labels(places: Sequence[Sequence[tuple[tuple[float, float, float, float], tuple[float, float], bool]]],
                 *, bounds: Sequence[float] | None = None, obstacles: Iterable[Sequence[float]] = (),
                 gap_px: float = 1.0) -> list[PlacedLabel | None]:
    """Choose one free place for each label, in the order given (earlier labels have priority).

    Parameters
    ----------
    places : sequence
        For each label, its candidate places in order of preference, each
        ``(box, anchor_xy, leader)``.
    bounds : (x0, y0, x1, y1), optional
        Every placed box lies inside (the visible area); None: anywhere.
    obstacles : iterable of boxes
        Areas no label may cover (markers, a legend, the scale bar).
    gap_px : float
        Smallest free space between two labels.

    Returns
    -------
    list of PlacedLabel or None
        One entry per label; None where no place was free (the label is left out).
    """
    if gap_px < 0 or not math.isfinite(gap_px):
        raise InputError(f"gap_px must be a finite number ≥ 0, got {gap_px!r}")
    if bounds is not None and (len(bounds) != 4 or not bounds[0] < bounds[2] or not bounds[1] < bounds[3]):
        raise InputError(f"bounds must be (x0, y0, x1, y1) with x0 < x1 and y0 < y1, got {bounds!r}")
    taken: list[tuple[float, float, float, float]] = [tuple(map(float, o)) for o in obstacles]
    n_obstacles = len(taken)
    out: list[PlacedLabel | None] = []
    for i, options in enumerate(places):
        chosen = None
        for box, anchor, leader in options:
            box = tuple(float(v) for v in box)
            if not all(math.isfinite(v) for v in box) or not _inside(box, bounds):
                continue
            if any(boxes_overlap(box, t, gap_px=gap_px if k >= n_obstacles else 0.0) for k, t in enumerate(taken)):
                continue
            chosen = PlacedLabel(i, box, (float(anchor[0]), float(anchor[1])), bool(leader))
            break
        if chosen is not None:
            taken.append(chosen.box)
        out.append(chosen)
    return out


def ring_label_places(centre_xy: Sequence[float], radius_px: float, size_wh: Sequence[float], *,
                      ring_number: int = 0, angles_deg: Sequence[float] | None = None,
                      leader_steps_px: Sequence[float] = LEADER_STEPS_PX,
                      point_at=None) -> list[tuple[tuple[float, float, float, float], tuple[float, float], bool]]:
    """Candidate places of a ring's label: just outside the ring at several azimuths, then farther out.

    Successive rings start on alternate sides (right, left, …) and step
    round, so close rings (e.g. Au 400/331/420/422) do not pile up on one
    side; when every place next to the ring is taken, the label stands off
    radially with a leader line.

    Parameters
    ----------
    centre_xy : (x, y)
        Centre of the rings (same frame as the boxes).
    radius_px : float
        Radius of the ring in that frame.
    size_wh : (width, height)
        Size of the label box.
    ring_number : int
        Position of the ring in the list (sets the starting side).
    angles_deg : sequence of float, optional
        Azimuths to try (from +x towards +y); default a fan on both sides.
    point_at : callable, optional
        ``point_at(angle_deg, radius) -> (x, y)``, for rings drawn with a
        distortion; default a circle about ``centre_xy``.

    Returns
    -------
    list of (box, anchor_xy, leader)
    """
    w, h = float(size_wh[0]), float(size_wh[1])
    if not (w > 0 and h > 0):
        raise InputError(f"size_wh must be two positive numbers, got {tuple(size_wh)!r}")
    cx, cy = float(centre_xy[0]), float(centre_xy[1])
    if angles_deg is None:
        right = [-30.0, -15.0, -45.0, 0.0, -60.0, 15.0, 30.0, -75.0, 45.0]
        fan = [a for pair in zip(right, [180.0 - a for a in right]) for a in pair]
        shift = 7.0 * (ring_number // 2 % 4)  # rings of the same side step round
        if ring_number % 2:
            fan = fan[1:] + fan[:1]
        angles_deg = [a - shift if math.cos(math.radians(a)) >= 0 else a + shift for a in fan]

    def at(a, r):
        if point_at is not None:
            return point_at(a, r)
        t = math.radians(a)
        return cx + r * math.cos(t), cy + r * math.sin(t)

    out = []
    for extra, leader in [(0.0, False)] + [(float(s), True) for s in leader_steps_px]:
        for a in angles_deg:
            ax, ay = at(a, radius_px)
            px, py = at(a, radius_px + extra + 3.0)
            c, s = math.cos(math.radians(a)), math.sin(math.radians(a))
            # the box sits outward of its point: left edge on the right side, right edge on the left side, …
            x0 = px if c > 0.2 else (px - w if c < -0.2 else px - w / 2)
            y0 = py if s > 0.2 else (py - h if s < -0.2 else py - h / 2)
            out.append(((x0, y0, x0 + w, y0 + h), (ax, ay), leader))
    return out
