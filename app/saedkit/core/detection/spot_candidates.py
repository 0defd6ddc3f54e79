"""Candidate spots: local maxima of the matched filter above the significance floor."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.spatial import cKDTree

from saedkit.core.detection.spot_filter import _Background, _Kernel, _exact_response, _gauss_radius, _response
from saedkit.core.detection.spot_model import StopFn, _MIN_SIGNIFICANCE, _check_stop
from saedkit.core.detection.spot_noise import _NoiseModel, _measure_noise, _take_samples


# ----------------------------------------------------------------------------- candidates


@dataclass(frozen=True)
class _Candidates:
    x: np.ndarray  # integer columns of response maxima
    y: np.ndarray
    xs: np.ndarray  # sub-pixel starts (log-parabola on the response)
    ys: np.ndarray
    z: np.ndarray  # significance R / sigma_R
    edge: np.ndarray  # the Gaussian footprint touches excluded pixels
    noise: "_NoiseModel | None" = None  # the noise model they were found with


def _subpixel_offset(m: np.ndarray, c: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Vertex of a parabola through (−1, m), (0, c), (+1, p), on the log scale
    where all three are positive (exact for a Gaussian), clipped to ±0.5."""
    with np.errstate(divide="ignore", invalid="ignore"):
        pos = (m > 0) & (c > 0) & (p > 0)
        lm, lc, lp = (np.log(np.where(pos, v, 1.0)) for v in (m, c, p))
        am, ac, ap = np.where(pos, lm, m), np.where(pos, lc, c), np.where(pos, lp, p)
        den = am - 2 * ac + ap
        off = np.where(den < 0, 0.5 * (am - ap) / den, 0.0)
    return np.clip(np.nan_to_num(off), -0.5, 0.5)


def _border_factor(k: _Kernel, idx: np.ndarray, n: int) -> np.ndarray:
    """Noise of the Gaussian filter near the image edge over its noise inside.

    The filter reflects the image at the edge, so pixels near it enter the
    kernel twice and the noise of the smoothed image is larger there.
    """
    r = _gauss_radius(k.s)
    g1 = np.exp(-(np.arange(-r, r + 1) ** 2) / (2 * k.s * k.s))
    g1 /= g1.sum()
    table = np.ones(r + 1)
    for d in range(min(r + 1, n)):
        pos = d + np.arange(-r, r + 1)
        pos = np.where(pos < 0, -pos - 1, pos)  # scipy's "reflect": d c b a | a b c d
        pos = np.where(pos >= n, 2 * n - pos - 1, pos)
        folded = np.bincount(pos, weights=g1)
        table[d] = np.sqrt((folded**2).sum() / (g1**2).sum())
    dist = np.minimum(idx, n - 1 - idx)
    out = np.ones(len(idx))
    edge = dist <= r
    out[edge] = table[dist[edge]]
    return out


def _find_candidates(
    img: np.ndarray,
    resp: np.ndarray,
    back: _Background,
    near: np.ndarray | None,
    bad: np.ndarray | None,
    k: _Kernel,
    noise: _NoiseModel,
    *,
    z_min: float,
    separation: float,
    centre_xy: np.ndarray | None,
    exclude_radius: float,
    allowed: np.ndarray | None = None,
) -> _Candidates:
    rows, cols = resp.shape
    reject = bad if allowed is None or bad is None else (bad & ~allowed)
    bmin = float(back.grid.min())
    thr0 = z_min * noise.sigma_min(bmin)
    empty = _Candidates(*(np.zeros(0, int),) * 2, *(np.zeros(0),) * 3, np.zeros(0, bool))
    # local maxima above threshold, a band of rows at a time (bounded memory)
    parts = []
    band = max(1, (1 << 20) // cols)
    for r0 in range(0, rows, band):
        chunk = resp[r0 : r0 + band]
        with np.errstate(invalid="ignore"):
            flat = np.flatnonzero(chunk > thr0)
        if flat.size == 0:
            continue
        by, bx = np.divmod(flat, cols)
        by += r0
        val = chunk.ravel()[flat]
        # a local maximum in its 3x3 neighbourhood (NaN neighbours do not count; a tie
        # with an earlier neighbour in raster order loses, so a flat top gives one maximum)
        is_max = np.ones(len(by), bool)
        for dy in (-1, 0, 1):
            for dx in (-1, 0, 1):
                if dy == 0 and dx == 0:
                    continue
                ny, nx = by + dy, bx + dx
                inside = (ny >= 0) & (ny < rows) & (nx >= 0) & (nx < cols)
                nb = np.full(len(by), -np.inf, dtype=np.float32)
                nb[inside] = resp[ny[inside], nx[inside]]
                with np.errstate(invalid="ignore"):
                    is_max &= ~((nb > val) | ((nb == val) & ((dy < 0) | ((dy == 0) & (dx < 0)))))
        by, bx, val = by[is_max], bx[is_max], val[is_max]
        sig = noise.sigma_at(by, bx, back.at(by, bx)) * _border_factor(k, by, rows) * _border_factor(k, bx, cols)
        sel = val >= z_min * sig
        if reject is not None:
            sel &= ~reject[by, bx]
        if sel.any():
            parts.append((by[sel], bx[sel], val[sel], sig[sel]))
    if not parts:
        return empty
    cy, cx, val, sig = (np.concatenate(p) for p in zip(*parts))
    val = val.astype(float)
    if near is not None and len(cy):
        # next to the mask or the image edge: measure again with a plane background
        # fitted to the usable pixels
        for i in np.flatnonzero(near[cy, cx]):
            r, factor = _exact_response(img, bad, int(cy[i]), int(cx[i]), k)
            val[i], sig[i] = r, sig[i] * factor
    with np.errstate(invalid="ignore"):
        keep = val / sig >= z_min
    cy, cx, val, sig = cy[keep], cx[keep], val[keep], sig[keep]
    z = val / sig
    if centre_xy is not None and exclude_radius > 0:
        far = np.hypot(cx - centre_xy[0], cy - centre_xy[1]) > exclude_radius
        cy, cx, val, z = cy[far], cx[far], val[far], z[far]
    if len(cy) == 0:
        return empty
    # greedy non-maximum suppression: strongest response first
    order = np.argsort(-val, kind="stable")
    cy, cx, val, z = cy[order], cx[order], val[order], z[order]
    if separation > 1 and len(cy) > 1:
        tree = cKDTree(np.stack([cx, cy], axis=1))
        pairs = tree.query_pairs(separation, output_type="ndarray")
        if len(pairs):
            keep = np.ones(len(cy), bool)
            nbrs: dict[int, list[int]] = {}
            for i, j in pairs:  # i < j: j is weaker
                nbrs.setdefault(int(i), []).append(int(j))
            for i in range(len(cy)):
                if keep[i]:
                    for j in nbrs.get(i, ()):
                        keep[j] = False
            cy, cx, val, z = cy[keep], cx[keep], val[keep], z[keep]

    def at(dy, dx):
        ny = np.clip(cy + dy, 0, rows - 1)
        nx = np.clip(cx + dx, 0, cols - 1)
        v = resp[ny, nx].astype(float)
        return np.where(np.isfinite(v), v, 0.0)

    c0 = val.astype(float)
    xs = cx + _subpixel_offset(at(0, -1), c0, at(0, 1))
    ys = cy + _subpixel_offset(at(-1, 0), c0, at(1, 0))
    edge = np.zeros(len(cx), bool) if near is None else near[cy, cx]
    return _Candidates(cx, cy, xs, ys, z, edge)


def _detect(
    img: np.ndarray,
    bad: np.ndarray | None,
    k: _Kernel,
    *,
    z_min: float,
    separation: float,
    centre_xy: np.ndarray | None,
    exclude_radius: float,
    beam: tuple[float, float, float] | None = None,
    should_stop: StopFn | None = None,
    allowed: np.ndarray | None = None,
) -> _Candidates:
    """Filter, measure the noise, and find the candidates (steps 1–5 of the module notes).

    ``allowed``: excluded pixels on which a candidate may still sit (saturated ones)."""
    resp, back, near = _response(img, bad, k, beam)
    _check_stop(should_stop)
    samples = _take_samples(img, bad, resp, back, k)

    def run(nm):
        return _find_candidates(
            img, resp, back, near, bad, k, nm, z_min=z_min, separation=separation,
            centre_xy=centre_xy, exclude_radius=exclude_radius, allowed=allowed,
        )

    # pass 1: everything visible (a 5-sigma detection, even below min_snr) with the
    # white-noise prediction; pass 2: the noise (and κ) measured away from it
    first = _find_candidates(
        img, resp, back, near, bad, k, _measure_noise(samples, k, with_kappa=False),
        z_min=_MIN_SIGNIFICANCE, separation=separation, centre_xy=None, exclude_radius=0.0, allowed=allowed,
    )
    xy = np.stack([first.xs, first.ys], axis=1)
    nm = _measure_noise(samples, k, xy, first.z)
    return replace(run(nm), noise=nm)
