"""Geometry of a zone-axis pattern: which reflections lie in a zone and where they appear.

For a zone axis [uvw] the zero-order Laue zone (ZOLZ) holds the reflections
with ``h·u = 0`` (Weiss zone law); they lie in the reciprocal-lattice plane
normal to the beam. saedkit places that plane on the detector with an
orthonormal frame ``(e1, e2)`` normal to the zone axis, an in-plane rotation
θ and the camera constant K::

    offset_px = K · Rot(θ) · [g·e1, g·e2]

``e1`` is the projection of the Cartesian axis least parallel to the zone
axis, and ``e2 = û × e1`` — so a zone and its opposite [ūv̄w̄] give mirror
images, as viewing a crystal from the other side does.
"""

from __future__ import annotations

import numpy as np

from saedkit.core.crystallography.crystal import Phase, UnitCell
from saedkit.core.errors import CrystalError
from saedkit.core.crystallography.structure_factors import ReflectionTable, calculate_reflections

__all__ = [
    "calculate_zone_frame",
    "calculate_zone_reflections",
    "calculate_pattern_offsets_array",
    "rotation_matrix_2d",
    "calculate_excitation_error_array",
]


def rotation_matrix_2d(angle_deg: float) -> np.ndarray:
    """2x2 rotation by ``angle_deg`` (from +x towards +y in image coordinates)."""
    t = np.deg2rad(angle_deg)
    return np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])


def calculate_zone_frame(cell: UnitCell, uvw) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Orthonormal Cartesian frame (e1, e2, û) of a zone axis.

    Raises
    ------
    CrystalError
        For the null direction [000].
    """
    u = np.asarray(uvw, dtype=float)
    if not np.any(u):
        raise CrystalError("zone axis [000] is not a direction")
    uc = cell.direct_basis @ u
    uhat = uc / np.linalg.norm(uc)
    axis = np.eye(3)[int(np.argmin(np.abs(uhat)))]
    e1 = axis - (axis @ uhat) * uhat
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(uhat, e1)
    return e1, e2, uhat


def calculate_zone_reflections(phase: Phase, uvw, *, g_max_per_A: float, laue_zone: int = 0,
                               voltage_kv: float | None = None,
                               table: ReflectionTable | None = None) -> ReflectionTable:
    """Reflections of Laue zone ``laue_zone`` (``h·u = N``) with |g| ≤ g_max.

    Pass a precomputed ``table`` (from :func:`calculate_reflections`) to reuse it.
    """
    t = table if table is not None else calculate_reflections(phase, g_max_per_A=g_max_per_A, voltage_kv=voltage_kv)
    u = np.asarray(uvw, dtype=np.int64)
    keep = (t.hkl @ u == laue_zone) & (t.g_per_A <= g_max_per_A * (1 + 1e-12))
    return t.select(keep)


def calculate_pattern_offsets_array(cell: UnitCell, uvw, hkl, *, camera_constant_px_A: float,
                                    rotation_deg: float = 0.0) -> np.ndarray:
    """Detector offsets (N, 2) [dx, dy] in pixels of reflections ``hkl`` in zone ``uvw``.

    Reflections outside the zero-order zone are projected onto its plane.
    """
    e1, e2, _ = calculate_zone_frame(cell, uvw)
    g = np.atleast_2d(np.asarray(hkl, float)) @ cell.reciprocal_basis.T  # (N, 3) Cartesian Å⁻¹
    xy = np.stack([g @ e1, g @ e2], axis=1) * camera_constant_px_A
    return xy @ rotation_matrix_2d(rotation_deg).T


def calculate_excitation_error_array(cell: UnitCell, uvw, hkl, *, wavelength_A: float) -> np.ndarray:
    """Excitation error s_g (Å⁻¹) of each reflection with the beam exactly along the zone axis.

    For g in the ZOLZ the Ewald sphere (radius 1/λ) lies below the plane by
    ``s ≈ −λ g²/2``; a Laue-zone offset ``g·û`` adds to it.
    """
    _, _, uhat = calculate_zone_frame(cell, uvw)
    g = np.atleast_2d(np.asarray(hkl, float)) @ cell.reciprocal_basis.T
    k = 1.0 / wavelength_A
    kvec = k * uhat
    # s = (k² − |k + g|²) / (2|k + g|) ≈ −(2k·g + g²)/(2k)
    kg = g + kvec
    return (k**2 - np.sum(kg * kg, axis=1)) / (2 * np.linalg.norm(kg, axis=1))


def calculate_orientation_matrix(cell_a: UnitCell, plane_a, direction_a, cell_b: UnitCell, plane_b,
                                 direction_b) -> np.ndarray:
    """Rotation that makes plane (hkl)_b ∥ (hkl)_a and direction [uvw]_b ∥ [uvw]_a.

    Returns the 3×3 matrix ``R`` that maps Cartesian vectors of crystal b
    (its ``direct_basis`` frame) into the Cartesian frame of crystal a. The
    direction should lie in the plane in each crystal (as in the usual
    statements of an orientation relationship); when it does not, the
    direction is made normal to the plane first.

    Raises
    ------
    CrystalError
        When a direction is parallel to its plane normal.
    """
    def triad(cell: UnitCell, hkl, uvw) -> np.ndarray:
        n = cell.reciprocal_basis @ np.asarray(hkl, float)
        d = cell.direct_basis @ np.asarray(uvw, float)
        n = n / np.linalg.norm(n)
        d = d - (d @ n) * n
        if np.linalg.norm(d) < 1e-9:
            raise CrystalError(f"direction {tuple(uvw)} is parallel to the normal of plane {tuple(hkl)}")
        d = d / np.linalg.norm(d)
        return np.column_stack([n, d, np.cross(n, d)])

    return triad(cell_a, plane_a, direction_a) @ triad(cell_b, plane_b, direction_b).T


def calculate_holz_radius_per_A(cell: UnitCell, uvw, *, wavelength_A: float, layer_spacing_per_A: float | None = None
                                ) -> float:
    """Radius |G| (Å⁻¹, in the zone plane) of the first-order Laue-zone ring of zone [uvw].

    The Ewald sphere (radius k = 1/λ) cuts the reciprocal-lattice layer at
    height ``H`` above the zero-order zone in a circle of radius
    ``G = sqrt(2kH − H²) ≈ sqrt(2H/λ)``. ``H`` defaults to ``1/|[uvw]|``,
    the inverse length of the direct-lattice vector u·a + v·b + w·c; a
    centred cell whose first populated layer is the second one needs
    ``layer_spacing_per_A`` given (see
    :func:`calculate_holz_layer_spacing_per_A`).
    """
    H = layer_spacing_per_A if layer_spacing_per_A is not None else 1.0 / cell.calculate_direction_length_A(uvw)
    k = 1.0 / wavelength_A
    return float(np.sqrt(max(2 * k * H - H * H, 0.0)))


def calculate_holz_layer_spacing_per_A(phase: Phase, uvw) -> float:
    """Spacing H (Å⁻¹) between the zero-order zone and the first populated Laue zone of [uvw].

    ``H = N/|[uvw]|`` with N the smallest ``|h·u| > 0`` that holds a
    reflection allowed by the lattice centring (N = 1 for a primitive
    lattice; fcc [011] has N = 2: a/2[011] is a lattice vector).
    """
    u = np.asarray(uvw, dtype=np.int64)
    length = phase.cell.calculate_direction_length_A(u)
    r = np.arange(-4, 5)
    h = np.stack(np.meshgrid(r, r, r, indexing="ij"), -1).reshape(-1, 3)
    layer = np.abs(h @ u)
    ok = (layer > 0) & ~phase.is_centring_absent_array(h)
    n = int(layer[ok].min()) if ok.any() else 1
    return float(n / length)
