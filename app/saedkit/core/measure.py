"""The one measurement: positions (± σ) and a camera model → R, d ± σ, |g| and azimuth.

Every number of a spot or ring that saedkit reports — the record's ``spots``,
the zone candidates' spots, the CSV and PDF tables, the desktop program's
table, the command line — comes from :func:`measure_positions` (spots) or
:func:`measure_radii` (rings), so the same spot shows the same d ± σ everywhere.

The uncertainty of d has two parts, kept apart and added in quadrature:

- statistical: the spot's and the centre's position uncertainties, projected
  on the radial direction through the ellipse correction, and the fit's σ of K;
- systematic: the reproducibility of K (:mod:`saedkit.core.calibration.camera`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from saedkit.core._validate import finite_or_none
from saedkit.core.calibration.camera import CameraTerms, camera_terms
from saedkit.core.distortion import NO_DISTORTION
from saedkit.core.errors import InputError

__all__ = ["Measurements", "measure_positions", "measure_radii", "calculate_d_log_slope_array"]


@dataclass(frozen=True, eq=False)
class Measurements:
    """Whole-array measurements of N points (spots) or radii (rings).

    All arrays have shape (N,); a value that cannot be had (no centre, no
    camera, the centre itself) is NaN.

    Attributes
    ----------
    radius_px, radius_sigma_px : ndarray
        Ideal (ellipse-corrected) distance from the centre and its σ.
    angle_deg : ndarray
        Azimuth of the observed offset, degrees from +x towards +y (NaN for rings).
    d_A : ndarray
        Spacing from the camera equation (exact or small-angle, as the camera says).
    d_stat_sigma_A, d_sys_sigma_A, d_sigma_A : ndarray
        Statistical, systematic (reproducibility of K) and total σ of d.
    g_per_nm, g_stat_sigma_per_nm, g_sys_sigma_per_nm, g_sigma_per_nm : ndarray
        ``|g| = 1/d`` in nm⁻¹ with the same three uncertainty parts.
    camera : CameraTerms or None
        The camera model the spacings used.
    """

    radius_px: np.ndarray
    radius_sigma_px: np.ndarray
    angle_deg: np.ndarray
    d_A: np.ndarray
    d_stat_sigma_A: np.ndarray
    d_sys_sigma_A: np.ndarray
    d_sigma_A: np.ndarray
    g_per_nm: np.ndarray
    g_stat_sigma_per_nm: np.ndarray
    g_sys_sigma_per_nm: np.ndarray
    g_sigma_per_nm: np.ndarray
    camera: CameraTerms | None = None

    def __len__(self) -> int:
        return len(self.radius_px)

    def row(self, i: int) -> dict:
        """The JSON-ready measurement of point ``i`` (None for missing values)."""
        keys = ("radius_px", "radius_sigma_px", "angle_deg", "d_A", "d_stat_sigma_A", "d_sys_sigma_A",
                "d_sigma_A", "g_per_nm", "g_stat_sigma_per_nm", "g_sys_sigma_per_nm", "g_sigma_per_nm")
        return {k: finite_or_none(float(getattr(self, k)[i])) for k in keys}


def calculate_d_log_slope_array(q_per_A, *, exact: bool, wavelength_A: float | None) -> np.ndarray:
    """``|d ln d / d ln q|`` of the camera equation, where ``q = R/K``.

    Small-angle form (``d = 1/q``): 1. Exact form ``q = tan(2θ)/λ``,
    ``d = λ / (2 sin θ)``: ``½·cot θ · λq / (1 + (λq)²)``, which tends to 1 at
    small angles.
    """
    q = np.asarray(q_per_A, dtype=float)
    if not exact:
        return np.ones_like(q)
    t = np.arctan(q * wavelength_A)  # 2θ
    with np.errstate(invalid="ignore", divide="ignore"):
        return 0.5 / np.tan(t / 2) * (q * wavelength_A) / (1 + (q * wavelength_A) ** 2)


def _spacing(q: np.ndarray, terms: CameraTerms) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        if not terms.exact:
            return 1.0 / q
        lam = float(terms.wavelength_A)
        return lam / (2.0 * np.sin(np.arctan(q * lam) / 2.0))


def _from_radii(R: np.ndarray, sR: np.ndarray, angle: np.ndarray, camera) -> Measurements:
    nan = np.full(R.shape, np.nan)
    if camera is None:
        return Measurements(R, sR, angle, nan, nan, nan, nan, nan, nan, nan, nan, None)
    t = camera_terms(camera)
    K = t.camera_constant_px_A
    ok = np.isfinite(R) & (R > 0)
    Rs = np.where(ok, R, np.nan)
    q = Rs / K
    d = _spacing(q, t)
    slope = calculate_d_log_slope_array(q, exact=t.exact, wavelength_A=t.wavelength_A)
    sR0 = np.where(np.isfinite(sR), sR, 0.0)
    # d depends on R/K: relative σ of d = slope · relative σ of (R/K)
    rel_stat = slope * np.hypot(sR0 / Rs, t.stat_sigma_px_A / K)
    rel_sys = slope * (t.sys_sigma_px_A / K)
    d_stat, d_sys = d * rel_stat, d * rel_sys
    d_tot = np.hypot(d_stat, d_sys)
    g = 10.0 / d  # nm⁻¹
    return Measurements(R, sR, angle, d, d_stat, d_sys, d_tot, g, g * rel_stat, g * rel_sys,
                        g * np.hypot(rel_stat, rel_sys), t)


def _per_axis(name: str, value, n: int) -> np.ndarray:
    s = np.asarray(0.0 if value is None else value, dtype=float)
    if s.ndim == 0:
        s = np.full((n, 2), float(s))
    elif s.shape == (2,) and n != 2:
        s = np.broadcast_to(s, (n, 2))
    elif s.shape == (n,):
        s = np.column_stack([s, s])
    if s.shape != (n, 2):
        raise InputError(f"{name} must be a number, (N,) or (N, 2) with N = {n}, got shape {s.shape}")
    s = np.where(np.isfinite(s), s, 0.0)
    if np.any(s < 0):
        raise InputError(f"{name} must be >= 0")
    return s


def measure_positions(xy, sigma_xy=None, centre_xy=None, centre_sigma_xy=None, camera=None) -> Measurements:
    """Measure spots about the centre: radius, azimuth, d and |g| with statistical, systematic and total σ.

    Parameters
    ----------
    xy : (N, 2) array
        Spot positions [x, y], pixels.
    sigma_xy : float, (N,) or (N, 2) array, optional
        Their standard uncertainties [σx, σy], pixels (default 0).
    centre_xy : [x, y], optional
        The pattern centre; without it every value is NaN.
    centre_sigma_xy : [σx, σy], optional
        The centre's uncertainty, added to each spot's in quadrature.
    camera : CameraModel, optional
        Any calibration (fitted, saved, entered); without one d and |g| are NaN.

    Returns
    -------
    Measurements

    Notes
    -----
    Ideal offset ``v = D⁻¹(p − c)`` (ellipse ``D``), ``R = |v|``; the camera
    equation ``R = K·q`` with ``q = 1/d`` (small angle, ``R·d = λL``) or
    ``q = tan(2θ)/λ`` (exact). ``σ_R² = uᵀD⁻¹ C D⁻ᵀu`` with ``C`` the sum of
    the spot's and the centre's covariances and ``u`` the radial unit vector;
    ``σ_d,stat/d = s·√((σ_R/R)² + (σ_K/K)²)``, ``σ_d,sys/d = s·r`` with ``r``
    the reproducibility and ``s = |d ln d/d ln q|`` (1 in the small-angle
    form). First-order propagation (ISO 25498:2018 practice).

    Examples
    --------
    >>> from saedkit.core.calibration.camera import EnteredCalibration
    >>> m = measure_positions([[300.0, 100.0]], 0.0, [100.0, 100.0], camera=EnteredCalibration(500.0))
    >>> float(m.d_A[0]), round(float(m.d_sys_sigma_A[0]), 4)
    (2.5, 0.025)
    """
    p = np.asarray(xy, dtype=float).reshape(-1, 2)
    n = len(p)
    s = _per_axis("sigma_xy", sigma_xy, n)
    if centre_xy is None:
        nan = np.full(n, np.nan)
        return _from_radii(nan, nan, nan, camera)
    c = np.asarray(centre_xy, dtype=float).reshape(2)
    cs = _per_axis("centre_sigma_xy", centre_sigma_xy, 1)[0]
    ellipse = NO_DISTORTION if camera is None else camera_terms(camera).ellipse
    dinv = ellipse.inverse_matrix
    off = p - c
    ideal = off @ dinv.T
    R = np.hypot(ideal[:, 0], ideal[:, 1]) if n else np.zeros(0)
    var = s**2 + cs**2  # (N, 2): diagonal covariance per point
    with np.errstate(invalid="ignore", divide="ignore"):
        u = ideal / R[:, None]
    grad = u @ dinv  # dR/dp = uᵀD⁻¹
    sR = np.sqrt(grad[:, 0] ** 2 * var[:, 0] + grad[:, 1] ** 2 * var[:, 1]) if n else np.zeros(0)
    sR = np.where(R > 0, sR, np.nan)
    angle = np.degrees(np.arctan2(off[:, 1], off[:, 0])) if n else np.zeros(0)
    return _from_radii(R, sR, angle, camera)


def measure_radii(radius_px, radius_sigma_px=None, camera=None) -> Measurements:
    """Spacings of rings (or reflections) at ideal radii: d and |g| with their σ parts.

    Parameters
    ----------
    radius_px : (N,) array
        Ideal (ellipse-corrected) radii, pixels.
    radius_sigma_px : float or (N,) array, optional
        Their standard uncertainties.
    camera : CameraModel, optional

    Returns
    -------
    Measurements
        ``angle_deg`` is NaN.
    """
    R = np.asarray(radius_px, dtype=float).reshape(-1)
    sR = np.broadcast_to(np.asarray(np.nan if radius_sigma_px is None else radius_sigma_px, float), R.shape).copy()
    return _from_radii(R, sR, np.full(R.shape, math.nan), camera)
