"""Result types of the 2-D lattice finder and the zone-axis matcher."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from saedkit.core._validate import finite_or_none

__all__ = ["Lattice2D", "IndexedSpot", "PredictedSpot", "HolzRing", "ZoneTilt", "OrientationRelationship",
           "ZoneCandidate", "MatchResult"]


@dataclass(frozen=True)
class Lattice2D:
    """The 2-D reciprocal lattice that a spot pattern lies on.

    ``g1_px`` and ``g2_px`` are the reduced basis (shortest, then the next
    shortest non-collinear vector, angle between 60° and 90°) in ideal
    (ellipse-corrected) pixel offsets; each spot ``i`` is at
    ``centre + D·(m_i g1 + n_i g2)`` with integer ``indices[i] = (m_i, n_i)``.
    """

    centre_xy: tuple[float, float]
    centre_sigma_px: tuple[float, float]
    g1_px: tuple[float, float]
    g2_px: tuple[float, float]
    g1_sigma_px: float
    g2_sigma_px: float
    indices: np.ndarray = field(repr=False)  # (N, 2) int; rows of outliers are (0, 0)
    inliers: np.ndarray = field(repr=False)  # (N,) bool
    residual_rms_px: float = 0.0
    camera_constant_px_A: float | None = None  # when calibrated: gives d1, d2

    @property
    def r1_px(self) -> float:
        return float(np.hypot(*self.g1_px))

    @property
    def r2_px(self) -> float:
        return float(np.hypot(*self.g2_px))

    @property
    def angle_deg(self) -> float:
        g1, g2 = np.array(self.g1_px), np.array(self.g2_px)
        c = g1 @ g2 / (np.linalg.norm(g1) * np.linalg.norm(g2))
        return float(np.degrees(np.arccos(np.clip(c, -1, 1))))

    @property
    def d1_A(self) -> float | None:
        return None if self.camera_constant_px_A is None else self.camera_constant_px_A / self.r1_px

    @property
    def d2_A(self) -> float | None:
        return None if self.camera_constant_px_A is None else self.camera_constant_px_A / self.r2_px

    def to_dict(self) -> dict:
        return {
            "centre_px": list(self.centre_xy), "centre_sigma_px": list(self.centre_sigma_px),
            "g1_px": list(self.g1_px), "g2_px": list(self.g2_px),
            "r1_px": self.r1_px, "r2_px": self.r2_px, "angle_deg": self.angle_deg,
            "d1_A": None if self.d1_A is None else finite_or_none(self.d1_A),
            "d2_A": None if self.d2_A is None else finite_or_none(self.d2_A),
            "n_indexed": int(np.sum(self.inliers)), "n_spots": int(len(self.inliers)),
            "residual_rms_px": finite_or_none(self.residual_rms_px),
        }


@dataclass(frozen=True)
class IndexedSpot:
    """A measured spot with the (hkl) a candidate gives it."""

    x: float
    y: float
    hkl: tuple[int, int, int] | None  # None: not explained by this candidate
    d_A: float  # measured spacing (with the candidate's or the given camera constant)
    d_sigma_A: float
    d_error_pct: float | None  # (measured − predicted)/predicted, %
    position_error_px: float | None
    forbidden: bool = False  # kinematically forbidden, explained by double diffraction
    d_stat_sigma_A: float = float("nan")  # statistical and systematic parts of d_sigma_A (set by the measurement)
    d_sys_sigma_A: float = float("nan")

    def to_dict(self) -> dict:
        return {
            "x": self.x, "y": self.y, "hkl": None if self.hkl is None else list(self.hkl),
            "d_A": finite_or_none(self.d_A), "d_sigma_A": finite_or_none(self.d_sigma_A),
            "d_stat_sigma_A": finite_or_none(self.d_stat_sigma_A), "d_sys_sigma_A": finite_or_none(self.d_sys_sigma_A),
            "d_error_pct": None if self.d_error_pct is None else finite_or_none(self.d_error_pct),
            "position_error_px": None if self.position_error_px is None else finite_or_none(self.position_error_px),
            "double_diffraction": self.forbidden,
        }


@dataclass(frozen=True)
class PredictedSpot:
    """A reflection of the candidate's zero-order Laue zone, placed on the image."""

    x: float
    y: float
    hkl: tuple[int, int, int]
    d_A: float
    intensity: float  # kinematic, relative to the strongest (0–1)
    forbidden: bool = False  # kinematically forbidden (could appear by double diffraction)

    def to_dict(self) -> dict:
        return {"x": self.x, "y": self.y, "hkl": list(self.hkl), "d_A": self.d_A,
                "intensity": self.intensity, "forbidden": self.forbidden}


@dataclass(frozen=True)
class HolzRing:
    """A higher-order Laue-zone ring found among the spots off the zero-order net.

    The Ewald sphere cuts the first populated reciprocal-lattice layer above
    the zero-order zone (spacing H along the zone axis) in a ring of radius
    ``G = sqrt(2kH − H²) ≈ sqrt(2H/λ)``; the measured radius gives H, which
    checks the zone and the cell (``H = N/|[uvw]|``).
    """

    radius_px: float
    radius_sigma_px: float
    n_spots: int
    predicted_radius_px: float
    layer_spacing_per_A: float  # measured H
    predicted_layer_spacing_per_A: float
    layer_spacing_error_pct: float  # (measured − predicted)/predicted

    def to_dict(self) -> dict:
        return {"radius_px": finite_or_none(self.radius_px), "radius_sigma_px": finite_or_none(self.radius_sigma_px),
                "n_spots": self.n_spots, "predicted_radius_px": finite_or_none(self.predicted_radius_px),
                "layer_spacing_per_A": finite_or_none(self.layer_spacing_per_A),
                "predicted_layer_spacing_per_A": finite_or_none(self.predicted_layer_spacing_per_A),
                "layer_spacing_error_pct": finite_or_none(self.layer_spacing_error_pct)}


@dataclass(frozen=True)
class ZoneTilt:
    """How far the beam is off the zone axis, from the Laue circle of the excited spots.

    The excited zero-order spots lie near a circle through the undiffracted
    beam (the Laue circle); its centre is at ``k·sin τ`` from the pattern
    centre, towards the side where the spots are bright, for a tilt τ.
    """

    laue_centre_xy: tuple[float, float]
    tilt_mrad: float
    tilt_deg: float
    azimuth_deg: float  # image direction from the pattern centre to the Laue-circle centre
    method: str  # "intensities" or "positions"

    def to_dict(self) -> dict:
        return {"laue_centre_px": [finite_or_none(v) for v in self.laue_centre_xy],
                "tilt_mrad": finite_or_none(self.tilt_mrad), "tilt_deg": finite_or_none(self.tilt_deg),
                "azimuth_deg": finite_or_none(self.azimuth_deg), "method": self.method}


@dataclass(frozen=True)
class OrientationRelationship:
    """Parallel planes and directions of two lattices seen in one pattern.

    ``(plane_1) ∥ (plane_2)`` are the pair of low-index reflections of the
    two zero-order zones closest to parallel in the image (deviation
    ``plane_deviation_deg``); ``[direction_1] ∥ [direction_2]`` are the two
    zone axes (both along the beam).
    """

    phase_1: str
    phase_2: str
    plane_1: tuple[int, int, int]
    plane_2: tuple[int, int, int]
    direction_1: tuple[int, int, int]
    direction_2: tuple[int, int, int]
    plane_deviation_deg: float
    rotation_deg: float  # in-plane angle from the first lattice's grid to the second's

    def to_dict(self) -> dict:
        return {"phase_1": self.phase_1, "phase_2": self.phase_2, "plane_1": list(self.plane_1),
                "plane_2": list(self.plane_2), "direction_1": list(self.direction_1),
                "direction_2": list(self.direction_2), "plane_deviation_deg": finite_or_none(self.plane_deviation_deg),
                "rotation_deg": finite_or_none(self.rotation_deg)}


@dataclass(frozen=True)
class ZoneCandidate:
    """One explanation of a spot pattern: a phase seen along a zone axis."""

    phase: str
    zone: tuple[int, int, int]
    zone_four_index: tuple[int, int, int, int] | None
    score: float  # 0–1, higher is better
    d_error_pct: float  # RMS relative spacing error of the indexed spots
    angle_error_deg: float  # RMS angle error of the indexed spots around the centre
    in_plane_rotation_deg: float
    camera_constant_px_A: float  # refined (or the given one, when calibrated)
    camera_constant_sigma_px_A: float
    fraction_explained: float
    n_explained: int
    n_spots: int
    n_missing_strong: int
    residual_px: float
    spots: tuple[IndexedSpot, ...] = field(repr=False)
    predicted: tuple[PredictedSpot, ...] = field(repr=False)
    basis_hkl: tuple[tuple[int, int, int], tuple[int, int, int]] = ((0, 0, 0), (0, 0, 0))
    notes: tuple[str, ...] = ()
    holz: HolzRing | None = None  # a HOLZ ring among the spots this candidate leaves unexplained
    tilt: ZoneTilt | None = None  # beam tilt off the zone axis (from the Laue circle)
    n_double_diffraction: int = 0  # spots indexed as forbidden but reachable by double diffraction

    def to_dict(self) -> dict:
        return {
            "phase": self.phase, "zone": list(self.zone),
            "zone_four_index": None if self.zone_four_index is None else list(self.zone_four_index),
            "score": finite_or_none(self.score), "d_error_pct": finite_or_none(self.d_error_pct),
            "angle_error_deg": finite_or_none(self.angle_error_deg),
            "in_plane_rotation_deg": finite_or_none(self.in_plane_rotation_deg),
            "camera_constant_px_A": finite_or_none(self.camera_constant_px_A),
            "camera_constant_sigma_px_A": finite_or_none(self.camera_constant_sigma_px_A),
            "fraction_explained": finite_or_none(self.fraction_explained), "n_explained": self.n_explained,
            "n_spots": self.n_spots, "n_missing_strong": self.n_missing_strong,
            "residual_px": finite_or_none(self.residual_px),
            "basis_hkl": [list(h) for h in self.basis_hkl],
            "spots": [s.to_dict() for s in self.spots],
            "predicted": [p.to_dict() for p in self.predicted],
            "notes": list(self.notes),
            "holz": None if self.holz is None else self.holz.to_dict(),
            "tilt": None if self.tilt is None else self.tilt.to_dict(),
            "n_double_diffraction": self.n_double_diffraction,
        }


@dataclass(frozen=True)
class MatchResult:
    """Ranked zone-axis candidates for one spot pattern."""

    candidates: tuple[ZoneCandidate, ...]
    lattice: Lattice2D | None
    calibrated: bool
    n_pairs_examined: int
    phases: tuple[str, ...]
    tolerances: dict = field(default_factory=dict)
    notes: tuple[str, ...] = ()
    second: ZoneCandidate | None = None  # a second lattice among the spots the best leaves unexplained
    orientation_relationship: OrientationRelationship | None = None  # between best and second

    @property
    def best(self) -> ZoneCandidate | None:
        return self.candidates[0] if self.candidates else None

    def to_dict(self) -> dict:
        return {
            "calibrated": self.calibrated, "phases": list(self.phases),
            "n_pairs_examined": self.n_pairs_examined, "tolerances": dict(self.tolerances),
            "lattice": None if self.lattice is None else self.lattice.to_dict(),
            "candidates": [c.to_dict() for c in self.candidates],
            "notes": list(self.notes),
            "second": None if self.second is None else self.second.to_dict(),
            "orientation_relationship": (None if self.orientation_relationship is None
                                         else self.orientation_relationship.to_dict()),
        }
