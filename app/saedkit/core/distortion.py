"""Elliptical distortion of a diffraction pattern (projector-lens astigmatism).

An ideal offset ``v`` from the pattern centre appears on the detector at
``D·v`` with::

    D = Rot(phi) · diag(1 + e/2, 1 - e/2) · Rot(-phi)

where ``e`` is the ellipticity ((major - minor) / mean) and ``phi`` the angle
of the major axis in degrees, measured from +x towards +y (image rows down).
A circle of radius ``R`` becomes an ellipse with semi-axes ``R(1 ± e/2)``,
whose mean is ``R``: that is why the ring radius reported by saedkit is the
mean of the semi-axes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from saedkit.core._validate import check_finite, check_in_range

__all__ = ["Ellipse", "NO_DISTORTION"]


@dataclass(frozen=True)
class Ellipse:
    """Elliptical distortion ``(e, phi)`` of the pattern.

    Parameters
    ----------
    ellipticity : float
        ``(major - minor) / mean`` of the semi-axes, dimensionless; 0 is none.
    major_axis_deg : float
        Angle of the major axis from +x towards +y, degrees, in [0, 180).

    Examples
    --------
    >>> Ellipse(0.02, 30.0).distort_array([[100.0, 0.0]]).round(3)
    array([[100.5  ,   0.866]])
    """

    ellipticity: float = 0.0
    major_axis_deg: float = 0.0

    def __post_init__(self) -> None:
        check_in_range("ellipticity", self.ellipticity, -0.5, 0.5)
        phi = check_finite("major_axis_deg", self.major_axis_deg)
        e = float(self.ellipticity)
        # keep e >= 0 by turning the axis 90 degrees; keep phi in [0, 180)
        if e < 0:
            e, phi = -e, phi + 90.0
        object.__setattr__(self, "ellipticity", e)
        object.__setattr__(self, "major_axis_deg", float(phi % 180.0))

    @property
    def matrix(self) -> np.ndarray:
        """The 2x2 matrix ``D`` that maps an ideal offset to the observed one."""
        phi = np.deg2rad(self.major_axis_deg)
        c, s = np.cos(phi), np.sin(phi)
        rot = np.array([[c, -s], [s, c]])
        scale = np.diag([1 + self.ellipticity / 2, 1 - self.ellipticity / 2])
        return rot @ scale @ rot.T

    @property
    def inverse_matrix(self) -> np.ndarray:
        """The matrix ``D⁻¹`` that maps an observed offset to the ideal one."""
        return np.linalg.inv(self.matrix)

    def distort_array(self, offsets_xy: np.ndarray) -> np.ndarray:
        """Map ideal offsets (N, 2) ``[dx, dy]`` to observed offsets."""
        v = np.asarray(offsets_xy, dtype=float)
        return v @ self.matrix.T

    def correct_array(self, offsets_xy: np.ndarray) -> np.ndarray:
        """Map observed offsets (N, 2) ``[dx, dy]`` back to ideal offsets."""
        v = np.asarray(offsets_xy, dtype=float)
        return v @ self.inverse_matrix.T

    @property
    def components(self) -> tuple[float, float]:
        """``(e·cos 2φ, e·sin 2φ)``: smooth through e = 0, the form least-squares fits use."""
        two_phi = 2.0 * np.deg2rad(self.major_axis_deg)
        return float(self.ellipticity * np.cos(two_phi)), float(self.ellipticity * np.sin(two_phi))

    @classmethod
    def from_components(cls, p1: float, p2: float) -> "Ellipse":
        """The ellipse with components ``(e·cos 2φ, e·sin 2φ) = (p1, p2)``."""
        e = float(np.hypot(p1, p2))
        phi = 0.5 * float(np.degrees(np.arctan2(p2, p1))) if e > 0 else 0.0
        return cls(e, phi)

    @property
    def is_identity(self) -> bool:
        """True when the distortion is zero."""
        return self.ellipticity == 0.0

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return {"ellipticity": self.ellipticity, "major_axis_deg": self.major_axis_deg}


NO_DISTORTION = Ellipse(0.0, 0.0)
