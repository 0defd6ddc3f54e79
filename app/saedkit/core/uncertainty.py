"""First-order propagation of position and camera-constant uncertainties to radii and d-spacings.

Shared by the session's measurement table, the ruler and the report's table,
which measure one point (or one pair) at a time and must tolerate missing
values: they return NaN where a value cannot be had, and never raise.
The whole-array versions for calibrated points are in
:mod:`saedkit.core.calibration.calibrate`.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["calculate_radius_sigmas", "calculate_d_sigma"]


def calculate_radius_sigmas(v_obs, cov_obs, dinv) -> tuple[np.ndarray, float, float, float]:
    """Ideal offset, its length, and its radial and tangential standard uncertainties.

    Parameters
    ----------
    v_obs : (2,) array
        Observed offset [dx, dy] from the centre (or between two points), pixels.
    cov_obs : (2, 2) array
        Its covariance, pixels² (the point's and the centre's added).
    dinv : (2, 2) array
        The inverse ellipse matrix D⁻¹ (identity without distortion).

    Returns
    -------
    v, r, sigma_radial, sigma_tangential
        ``v = D⁻¹·v_obs``, ``r = |v|``, and the covariance ``D⁻¹ C D⁻ᵀ``
        projected on the radial and tangential directions (NaN at r = 0).
    """
    v = dinv @ np.asarray(v_obs, float)
    r = float(np.hypot(*v))
    cov = dinv @ np.asarray(cov_obs, float) @ dinv.T
    if r == 0:
        return v, 0.0, math.nan, math.nan
    u = v / r
    t = np.array([-u[1], u[0]])
    return v, r, float(np.sqrt(u @ cov @ u)), float(np.sqrt(t @ cov @ t))


def calculate_d_sigma(r: float, sigma_r: float, k: float | None, sigma_k: float | None) -> tuple[float, float]:
    """``d = K / R`` and ``σ_d/d = √((σ_K/K)² + (σ_R/R)²)``; NaN without K or at R = 0.

    A missing σ_K counts as 0; a non-finite σ_R is left out.
    """
    if k is None or not (math.isfinite(k) and r > 0):
        return math.nan, math.nan
    d = k / r
    rel = math.hypot((sigma_k or 0.0) / k if k else 0.0, sigma_r / r if math.isfinite(sigma_r) else 0.0)
    return d, d * rel
