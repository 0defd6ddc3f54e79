"""One centre, one ellipticity and one radius per ring, fitted to points on the rings."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from saedkit.core._validate import check_points_xy, check_positive, check_xy
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import FitError, InputError
from saedkit.core.detection.radial_profile import _MAD_TO_SIGMA


# --------------------------------------------------------------------------- concentric ellipses


@dataclass(frozen=True)
class EllipseFit:
    """One centre, one distortion and one radius per ring, fitted to ring points.

    Parameters
    ----------
    centre : CentreResult
        Common centre (method ``"rings"``) with its standard uncertainty.
    ellipse : Ellipse
        Common distortion ``(e, phi)``.
    ellipticity_sigma : float
        Standard uncertainty of ``e``.
    major_axis_sigma_deg : float
        Standard uncertainty of ``phi`` (large when ``e`` is near 0).
    radius_px : (M,) ndarray
        Ideal radius of each ring (mean of its semi-axes), pixels.
    radius_sigma_px : (M,) ndarray
        Their standard uncertainties.
    residual_rms_px : float
        RMS of ``|D⁻¹(p − c)| − R`` over the points kept.
    n_points : int
        Points kept.
    n_rejected : int
        Points rejected as outliers.
    inliers : tuple of (N_i,) bool arrays
        Which points of each ring were kept.
    """

    centre: CentreResult
    ellipse: Ellipse
    ellipticity_sigma: float
    major_axis_sigma_deg: float
    radius_px: np.ndarray = field(repr=False)
    radius_sigma_px: np.ndarray = field(repr=False)
    residual_rms_px: float = 0.0
    n_points: int = 0
    n_rejected: int = 0
    inliers: tuple = field(default=(), repr=False)

    def to_dict(self) -> dict:
        """JSON-ready record."""
        out = self.centre.to_dict()
        out["ellipse"] = {
            **self.ellipse.to_dict(),
            "ellipticity_sigma": float(self.ellipticity_sigma),
            "major_axis_sigma_deg": float(self.major_axis_sigma_deg),
        }
        out["radius_px"] = [float(r) for r in self.radius_px]
        out["radius_sigma_px"] = [float(s) for s in self.radius_sigma_px]
        out["residual_rms_px"] = float(self.residual_rms_px)
        out["n_points"] = int(self.n_points)
        out["n_rejected"] = int(self.n_rejected)
        return out


def _ellipse_residuals(params, pts, ring, w_sqrt, n_rings, fit_ellipse):
    cx, cy = params[0], params[1]
    if fit_ellipse:
        p1, p2 = params[2], params[3]
        radii = params[4:]
    else:
        p1 = p2 = 0.0
        radii = params[2:]
    det = 1.0 - 0.25 * (p1 * p1 + p2 * p2)
    # D = I + ½[[p1, p2], [p2, -p1]];  D⁻¹ = [[1 - p1/2, -p2/2], [-p2/2, 1 + p1/2]] / det
    m00, m01, m11 = (1.0 - 0.5 * p1) / det, -0.5 * p2 / det, (1.0 + 0.5 * p1) / det
    vx = pts[:, 0] - cx
    vy = pts[:, 1] - cy
    qx = m00 * vx + m01 * vy
    qy = m01 * vx + m11 * vy
    rho = np.hypot(qx, qy)
    res = (rho - radii[ring]) * w_sqrt
    # Jacobian
    n = len(pts)
    n_par = len(params)
    jac = np.zeros((n, n_par))
    rho_safe = np.where(rho > 0, rho, 1.0)
    # dq/dc = -D⁻¹  ->  drho/dc = -(D⁻¹ q)/rho  (D⁻¹ symmetric)
    jac[:, 0] = -(m00 * qx + m01 * qy) / rho_safe
    jac[:, 1] = -(m01 * qx + m11 * qy) / rho_safe
    if fit_ellipse:
        # dD⁻¹/dp = -D⁻¹ (dD/dp) D⁻¹ ; dq/dp = -D⁻¹ (dD/dp) q
        for j, dd in ((2, (0.5, 0.0, -0.5)), (3, (0.0, 0.5, 0.0))):
            a00, a01, a11 = dd
            tx = a00 * qx + a01 * qy
            ty = a01 * qx + a11 * qy
            dqx = -(m00 * tx + m01 * ty)
            dqy = -(m01 * tx + m11 * ty)
            jac[:, j] = (qx * dqx + qy * dqy) / rho_safe
        r0 = 4
    else:
        r0 = 2
    jac[np.arange(n), r0 + ring] = -1.0
    jac *= w_sqrt[:, None]
    return res, jac


def fit_concentric_ellipses(
    ring_points: Sequence,
    *,
    centre_guess_xy,
    weights: Sequence | None = None,
    fit_ellipse: bool = True,
    outlier_sigma: float | None = None,
) -> EllipseFit:
    """Fit concentric, equally distorted ellipses to points on several rings.

    Parameters
    ----------
    ring_points : sequence of (N_i, 2) arrays
        Points ``[x, y]`` on each ring, observed image coordinates.
    centre_guess_xy : [x, y]
        Starting centre, pixels.
    weights : sequence of (N_i,) arrays, optional
        Weight of each point, ``1/σ²`` with σ the radial uncertainty; equal by default.
    fit_ellipse : bool
        If False the rings are fitted as circles (``e = 0``).
    outlier_sigma : float, optional
        Reject points whose normalised residual exceeds this many robust
        standard deviations (median absolute deviation), and refit, until
        none is rejected.

    Returns
    -------
    EllipseFit

    Raises
    ------
    InputError
        If the points or weights have the wrong shape.
    FitError
        If there are too few points, or they do not constrain the fit.

    Notes
    -----
    Parameters ``(cx, cy, p1, p2, R_1 … R_M)`` with ``p1 = e·cos 2φ`` and
    ``p2 = e·sin 2φ`` (no singularity at ``e = 0``), so that
    ``D = I + ½[[p1, p2], [p2, −p1]]``. Residuals ``|D⁻¹(p − c)| − R_i``,
    minimised by :func:`scipy.optimize.least_squares` with the analytic
    Jacobian ``J``. Covariance ``s²(JᵀWJ)⁻¹`` with ``s²`` the reduced χ²;
    the uncertainties of ``e`` and ``φ`` follow from ``p1, p2`` by first-order
    propagation.

    Examples
    --------
    >>> t = np.linspace(0, 2 * np.pi, 40, endpoint=False)
    >>> ell = Ellipse(0.02, 30.0)
    >>> rings = [[50.0, 60.0] + ell.distort_array(r * np.c_[np.cos(t), np.sin(t)]) for r in (80, 120)]
    >>> fit = fit_concentric_ellipses(rings, centre_guess_xy=[52.0, 58.0])
    >>> round(fit.ellipse.ellipticity, 4), round(fit.ellipse.major_axis_deg, 2)
    (0.02, 30.0)
    """
    c0 = check_xy("centre_guess_xy", centre_guess_xy)
    if isinstance(ring_points, np.ndarray) and ring_points.ndim == 2:
        ring_points = [ring_points]
    rings = [check_points_xy(f"ring_points[{i}]", p) for i, p in enumerate(ring_points)]
    n_rings = len(rings)
    if n_rings == 0:
        raise FitError("fit_concentric_ellipses needs at least one ring of points, got none")
    if weights is None:
        wts = [np.ones(len(p)) for p in rings]
    else:
        if len(weights) != n_rings:
            raise InputError(f"weights must have one array per ring ({n_rings}), got {len(weights)}")
        wts = []
        for i, (p, w) in enumerate(zip(rings, weights)):
            w = np.asarray(w, dtype=float).ravel()
            if w.shape != (len(p),) or not np.all(np.isfinite(w)) or np.any(w < 0):
                raise InputError(
                    f"weights[{i}] must be {len(p)} finite non-negative numbers, got shape {w.shape}"
                )
            wts.append(w)
    for i, p in enumerate(rings):
        if len(p) < 3:
            raise FitError(f"ring {i} has {len(p)} points; each ring needs at least 3")
    if outlier_sigma is not None:
        outlier_sigma = check_positive("outlier_sigma", outlier_sigma)

    pts = np.concatenate(rings)
    ring = np.concatenate([np.full(len(p), i) for i, p in enumerate(rings)])
    w_all = np.concatenate(wts)
    w_all = w_all / np.mean(w_all[w_all > 0]) if np.any(w_all > 0) else w_all
    n_ell = 2 if fit_ellipse else 0
    n_par = 2 + n_ell + n_rings
    r_start = np.array([np.mean(np.hypot(*(p - c0).T)) for p in rings])
    params = np.concatenate([c0, np.zeros(n_ell), r_start])
    keep = w_all > 0
    n_rejected = 0
    for _ in range(8):
        if np.count_nonzero(keep) <= n_par:
            raise FitError(
                f"too few points for a ring fit: {np.count_nonzero(keep)} kept for {n_par} parameters"
            )
        for i in range(n_rings):
            if np.count_nonzero(keep & (ring == i)) < 2:
                raise FitError(f"ring {i} has fewer than 2 usable points after outlier rejection")
        p_k, r_k, ws_k = pts[keep], ring[keep], np.sqrt(w_all[keep])

        def fun(x):
            return _ellipse_residuals(x, p_k, r_k, ws_k, n_rings, fit_ellipse)[0]

        def jac(x):
            return _ellipse_residuals(x, p_k, r_k, ws_k, n_rings, fit_ellipse)[1]

        sol = optimize.least_squares(fun, params, jac=jac, method="lm", xtol=1e-12, ftol=1e-12)
        if not np.all(np.isfinite(sol.x)):
            raise FitError("ring ellipse fit did not converge")
        params = sol.x
        if fit_ellipse and math.hypot(params[2], params[3]) > 0.5:
            raise FitError(
                f"ring fit gives an implausible ellipticity {math.hypot(params[2], params[3]):.3f} (> 0.5)"
            )
        if outlier_sigma is None:
            break
        res_all, _ = _ellipse_residuals(params, pts, ring, np.sqrt(w_all), n_rings, fit_ellipse)
        med = np.median(res_all[keep])
        mad = _MAD_TO_SIGMA * np.median(np.abs(res_all[keep] - med))
        if not mad > 0:
            break
        new_keep = (w_all > 0) & (np.abs(res_all - med) <= outlier_sigma * mad)
        if np.array_equal(new_keep, keep):
            break
        keep = new_keep
    n_rejected = int(np.count_nonzero((w_all > 0) & ~keep))

    res, jmat = _ellipse_residuals(params, pts[keep], ring[keep], np.sqrt(w_all[keep]), n_rings, fit_ellipse)
    n = len(res)
    dof = n - n_par
    s2 = float(np.sum(res**2) / dof) if dof > 0 else float("nan")
    jtj = jmat.T @ jmat
    if np.linalg.matrix_rank(jtj) < n_par:
        raise FitError("the ring points do not constrain the centre, ellipse and radii (degenerate geometry)")
    cov = np.linalg.inv(jtj) * s2
    sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    if fit_ellipse:
        p1, p2 = params[2], params[3]
        ellipse = Ellipse.from_components(p1, p2)
        e = ellipse.ellipticity
        c22 = cov[2:4, 2:4]
        if e > 0:
            ge = np.array([p1, p2]) / e
            gphi = 0.5 * np.array([-p2, p1]) / e**2  # radians
            sig_e = float(np.sqrt(max(ge @ c22 @ ge, 0.0)))
            sig_phi = float(np.degrees(np.sqrt(max(gphi @ c22 @ gphi, 0.0))))
        else:
            sig_e = float(np.sqrt(max(np.trace(c22) / 2.0, 0.0)))
            sig_phi = 90.0
        # an ellipticity within two of its sigmas of 0 has no defined axis
        # (the first-order propagation above no longer holds)
        if e <= 2.0 * sig_e:
            sig_phi = 90.0
        sig_phi = min(sig_phi, 90.0)
        radii, sig_r = params[4:], sig[4:]
    else:
        ellipse = NO_DISTORTION
        sig_e, sig_phi = 0.0, 0.0
        radii, sig_r = params[2:], sig[2:]
    w_sqrt = np.sqrt(w_all[keep])
    raw = res / np.where(w_sqrt > 0, w_sqrt, 1.0)
    rms = float(np.sqrt(np.mean(raw**2)))
    centre = CentreResult(float(params[0]), float(params[1]), float(sig[0]), float(sig[1]), "rings", n_rings)
    bounds = np.cumsum([0] + [len(p) for p in rings])
    inliers = tuple(keep[bounds[i] : bounds[i + 1]].copy() for i in range(n_rings))
    return EllipseFit(
        centre=centre,
        ellipse=ellipse,
        ellipticity_sigma=sig_e,
        major_axis_sigma_deg=sig_phi,
        radius_px=np.asarray(radii, float),
        radius_sigma_px=np.asarray(sig_r, float),
        residual_rms_px=rms,
        n_points=int(n),
        n_rejected=n_rejected,
        inliers=inliers,
    )
