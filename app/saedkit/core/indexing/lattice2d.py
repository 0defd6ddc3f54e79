"""The 2-D reciprocal lattice of a spot pattern.

The spots of a zone-axis pattern lie on a plane lattice through the
undiffracted beam: ``p_i = c + D·(m_i g1 + n_i g2)``. Given spot positions
and a rough centre this module finds a reduced basis (g1, g2), gives every
spot its integer indices (m, n), and refines the basis and the centre by
linear least squares over all indexed spots. Missing spots do no harm;
extra spots (dust, a second grain) become outliers; a small linear
distortion is absorbed by the free basis.

The search uses as candidate basis vectors the spot offsets from the centre
and the differences between spots (which do not depend on the centre), and
keeps the pair that indexes the most spots within a tolerance, the larger
cell winning near-ties (a sub-cell indexes everything a cell does).

References
----------
.. [1] J. W. Edington, *Practical Electron Microscopy in Materials Science*,
   Van Nostrand Reinhold (1976), ch. 2 (indexing spot patterns).
"""

from __future__ import annotations

import math

import numpy as np

from saedkit.core._validate import check_points_xy, check_xy
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import FitError
from saedkit.core.indexing.matching_types import Lattice2D

__all__ = ["find_lattice_2d", "reduce_basis_2d"]


def reduce_basis_2d(g1: np.ndarray, g2: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lagrange–Gauss reduction of a plane-lattice basis.

    Returns (g1', g2', T) with |g1'| ≤ |g2'|, the angle between them in
    [60°, 90°], and the integer matrix T with [g1', g2'] = [g1, g2]·T.
    """
    a, b = np.array(g1, float), np.array(g2, float)
    T = np.eye(2, dtype=int)
    for _ in range(100):
        if a @ a > b @ b:
            a, b = b, a
            T = T[:, ::-1]
        mu = int(np.round((a @ b) / (a @ a)))
        if mu == 0:
            break
        b = b - mu * a
        T = T.copy()
        T[:, 1] -= mu * T[:, 0]
    if a @ b < 0:  # make the angle acute (≤ 90°)
        b = -b
        T = T.copy()
        T[:, 1] *= -1
    return a, b, T


def _index(v: np.ndarray, g1: np.ndarray, g2: np.ndarray):
    B = np.column_stack([g1, g2])
    mn = np.linalg.solve(B, v.T).T
    mn_r = np.round(mn)
    res = np.linalg.norm(v - mn_r @ B.T, axis=1)
    return mn_r.astype(int), res


def _candidate_vectors(v: np.ndarray, max_spots: int = 30, max_vectors: int = 14) -> np.ndarray:
    order = np.argsort(np.linalg.norm(v, axis=1))[:max_spots]
    w = v[order]
    diffs = (w[:, None, :] - w[None, :, :]).reshape(-1, 2)
    cand = np.vstack([w, diffs])
    lens = np.linalg.norm(cand, axis=1)
    radii = np.sort(np.linalg.norm(v, axis=1))
    min_len = 0.6 * radii[min(2, len(radii) - 1)]
    cand = cand[lens >= min_len]
    # one of ± each, then merge near-duplicates
    flip = (cand[:, 0] < 0) | ((cand[:, 0] == 0) & (cand[:, 1] < 0))
    cand[flip] *= -1
    cand = cand[np.argsort(np.linalg.norm(cand, axis=1))]
    kept = np.empty((max_vectors, 2))
    n = 0
    for c in cand:
        tol = 0.04 * math.hypot(c[0], c[1]) + 0.5
        if n == 0 or np.min(np.hypot(kept[:n, 0] - c[0], kept[:n, 1] - c[1])) > tol:
            kept[n] = c
            n += 1
            if n == len(kept):
                break
    return kept[:n]


def _refine(p_ideal: np.ndarray, mn: np.ndarray, w: np.ndarray):
    """Least squares of p = c + m g1 + n g2 over inliers: returns c, g1, g2, residuals, covariance."""
    n = len(p_ideal)
    A = np.zeros((2 * n, 6))
    A[0::2, 0] = 1
    A[1::2, 1] = 1
    A[0::2, 2] = mn[:, 0]
    A[1::2, 3] = mn[:, 0]
    A[0::2, 4] = mn[:, 1]
    A[1::2, 5] = mn[:, 1]
    y = p_ideal.reshape(-1)
    ww = np.repeat(w, 2)
    sol, *_ = np.linalg.lstsq(A * ww[:, None], y * ww, rcond=None)
    r = (y - A @ sol).reshape(-1, 2)
    dof = max(2 * n - 6, 1)
    s2 = float(np.sum((r * w[:, None]) ** 2) / dof)
    try:
        cov = np.linalg.inv((A * ww[:, None]).T @ (A * ww[:, None])) * s2
    except np.linalg.LinAlgError:
        cov = np.full((6, 6), np.nan)
    return sol[0:2], sol[2:4], sol[4:6], np.linalg.norm(r, axis=1), cov


def find_lattice_2d(
    spots_xy,
    centre_xy,
    *,
    ellipse: Ellipse = NO_DISTORTION,
    weights=None,
    tolerance_frac: float = 0.12,
    refine_centre: bool = True,
    camera_constant_px_A: float | None = None,
    min_cell_area_px2: float | None = None,
) -> Lattice2D:
    """Find the plane lattice of a spot pattern and index every spot on it.

    Parameters
    ----------
    spots_xy : (N, 2) array
        Spot positions [x, y] in pixels (N ≥ 3).
    centre_xy : [x, y]
        The pattern centre (a rough value is enough when ``refine_centre``).
    ellipse : Ellipse
        Distortion corrected before the search (from a calibration).
    weights : (N,) array, optional
        Relative weights in the refinement (e.g. from the spot position
        uncertainty); default equal.
    tolerance_frac : float
        A spot is indexed when it lies within this fraction of the shorter
        basis vector of a lattice point.
    refine_centre : bool
        Fit the centre together with the basis (the undiffracted beam is the
        lattice origin); otherwise keep it fixed.
    camera_constant_px_A : float, optional
        Stored in the result so that it can report d1 and d2.
    min_cell_area_px2 : float, optional
        Consider only cells at least this large (ideal px²): the lattice of
        one of two overlapping patterns (a twin) when their spots together
        fill a common sub-cell.

    Returns
    -------
    Lattice2D
        With the basis and the centre in ideal (ellipse-corrected) pixels
        relative to the original image; ``indices`` and ``inliers`` per spot.

    Raises
    ------
    FitError
        With fewer than three spots or when no two independent lattice
        vectors explain at least three spots.
    """
    p = check_points_xy("spots_xy", spots_xy)
    c0 = check_xy("centre_xy", centre_xy)
    if len(p) < 3:
        raise FitError(f"need at least 3 spots to find a lattice, got {len(p)}")
    w = np.ones(len(p)) if weights is None else np.asarray(weights, float)
    Dinv = ellipse.inverse_matrix
    p_ideal = (p - c0) @ Dinv.T  # offsets relative to the rough centre, ideal frame
    cands = _candidate_vectors(p_ideal, max_vectors=14 if min_cell_area_px2 is None else 24)
    if len(cands) < 2:
        raise FitError("the spots do not span a plane lattice (too few distinct vectors)")

    # Cells are compared by their Friedel-paired inliers (spots m,n and −m,−n both indexed): a stray
    # spot (dust, a second grain) rarely has a partner, so a sub-cell that catches one by chance
    # does not beat the true cell, while a sub-cell whose extra points hold real Friedel pairs
    # (superlattice or double-diffraction rows) does. A larger cell that keeps every pair wins (a
    # sub-cell indexes everything its cell does); cells of similar size compare on the paired count
    # plus a quarter for each unpaired inlier.
    best = None
    for i in range(len(cands)):
        for j in range(i + 1, len(cands)):
            a, b = cands[i], cands[j]
            cross = abs(a[0] * b[1] - a[1] * b[0])
            if cross < 0.2 * np.linalg.norm(a) * np.linalg.norm(b):  # nearly collinear
                continue
            a_r, b_r, _ = reduce_basis_2d(a, b)
            if min_cell_area_px2 is not None and abs(a_r[0] * b_r[1] - a_r[1] * b_r[0]) < min_cell_area_px2:
                continue
            tol = tolerance_frac * np.linalg.norm(a_r)
            mn, res = _index(p_ideal, a_r, b_r)
            ok = (res < tol) & np.any(mn != 0, axis=1)
            n_ok = int(ok.sum())
            seen = {tuple(v) for v in mn[ok].tolist()}
            n_pairs = sum(1 for v in mn[ok].tolist() if (-v[0], -v[1]) in seen)
            score = n_pairs + 0.25 * (n_ok - n_pairs)
            area = abs(a_r[0] * b_r[1] - a_r[1] * b_r[0])
            if best is None:
                take = True
            elif area > best[1] * 1.5:  # a larger cell: enough when it keeps every Friedel pair
                take = n_pairs >= best[3] and (n_pairs > 0 or n_ok >= best[2])
            elif area < best[1] / 1.5:  # a sub-cell: only when it explains more pairs
                take = n_pairs > best[3] or (best[3] == 0 and n_ok > best[2])
            else:
                take = score > best[0] + 1e-9
            if take:
                best = (score, area, n_ok, n_pairs, a_r, b_r)
    if best is None or best[2] < 3:
        raise FitError("no plane lattice explains at least 3 spots")
    g1, g2 = best[4], best[5]
    origin = np.zeros(2)
    # refine: index, least squares (basis and origin), tighten, repeat
    for tol_frac in (tolerance_frac, 0.8 * tolerance_frac, 0.6 * tolerance_frac):
        mn, res = _index(p_ideal - origin, g1, g2)
        tol = tol_frac * min(np.linalg.norm(g1), np.linalg.norm(g2))
        ok = (res < tol) & np.any(mn != 0, axis=1)
        if ok.sum() < 3:
            break
        if refine_centre and ok.sum() >= 4:
            o, g1, g2, r, cov = _refine(p_ideal[ok], mn[ok], w[ok])
            origin = o
        else:
            sol, *_ = np.linalg.lstsq(_design_fixed(mn[ok]), (p_ideal[ok] - origin).reshape(-1), rcond=None)
            g1, g2 = sol[0:2], sol[2:4]
            r = np.linalg.norm(p_ideal[ok] - origin - mn[ok] @ np.column_stack([g1, g2]).T, axis=1)
            cov = None
        g1r, g2r, T = reduce_basis_2d(g1, g2)
        g1, g2 = g1r, g2r
    mn, res = _index(p_ideal - origin, g1, g2)
    tol = 0.6 * tolerance_frac * min(np.linalg.norm(g1), np.linalg.norm(g2))
    ok = (res < tol) & np.any(mn != 0, axis=1)
    if ok.sum() >= 6:
        # robust clipping: a stray spot that happens to sit near a lattice point is far out
        # in units of the scatter of the true spots
        robust = 1.4826 * float(np.median(res[ok]))
        ok &= res < max(5 * robust, 1.0)
    if refine_centre and ok.sum() >= 4:
        origin, g1, g2, r, cov = _refine(p_ideal[ok], mn[ok], w[ok])
        g1, g2, _ = reduce_basis_2d(g1, g2)
        mn, res = _index(p_ideal - origin, g1, g2)
        keep = ok.copy()
        ok = (res < tol) & np.any(mn != 0, axis=1)
        if keep.sum() >= 6:
            robust = 1.4826 * float(np.median(res[ok]))
            ok &= res < max(5 * robust, 1.0)
        sig = np.sqrt(np.clip(np.diag(cov), 0, None)) if cov is not None and np.all(np.isfinite(cov)) else np.full(6, np.nan)
    else:
        sig = np.full(6, np.nan)
        sig[0:2] = 0.0
    centre = c0 + ellipse.matrix @ origin  # back to image pixels
    csig = np.abs(ellipse.matrix) @ sig[0:2]
    rms = float(np.sqrt(np.mean(res[ok] ** 2))) if ok.any() else float("nan")
    indices = np.where(ok[:, None], mn, 0)
    return Lattice2D(
        centre_xy=(float(centre[0]), float(centre[1])),
        centre_sigma_px=(float(csig[0]), float(csig[1])),
        g1_px=(float(g1[0]), float(g1[1])),
        g2_px=(float(g2[0]), float(g2[1])),
        g1_sigma_px=float(np.hypot(sig[2], sig[3])) if np.all(np.isfinite(sig[2:4])) else float("nan"),
        g2_sigma_px=float(np.hypot(sig[4], sig[5])) if np.all(np.isfinite(sig[4:6])) else float("nan"),
        indices=indices,
        inliers=ok,
        residual_rms_px=rms,
        camera_constant_px_A=camera_constant_px_A,
    )


def _design_fixed(mn: np.ndarray) -> np.ndarray:
    n = len(mn)
    A = np.zeros((2 * n, 4))
    A[0::2, 0] = mn[:, 0]
    A[1::2, 1] = mn[:, 0]
    A[0::2, 2] = mn[:, 1]
    A[1::2, 3] = mn[:, 1]
    return A
