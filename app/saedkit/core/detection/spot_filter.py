"""Matched filtering of spot images against a robust, mask-aware background."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from saedkit.core.detection.spot_model import _TRUNCATE, _fill_nan_nearest, _robust_rows


# ----------------------------------------------------------------------------- filtering


def _gauss_radius(s: float) -> int:
    # scipy.ndimage.gaussian_filter uses radius = int(truncate * sigma + 0.5)
    return int(_TRUNCATE * s + 0.5)


@dataclass(frozen=True)
class _Kernel:
    """Constants of the detection filter for spot width ``s``.

    The response is ``R = G_s * I − b``: the image smoothed by a Gaussian of
    sigma ``s`` (the matched filter) minus a smooth background ``b`` that
    leaves the spots out. ``b`` is built on a grid of ``cell`` × ``cell``-pixel
    means: smoothed by a Gaussian (normalised convolution), with the cells
    that stand out above it (spots) given no weight, twice, then
    interpolated bilinearly (sigma-clipped background estimation). A linear
    smoother follows the steep radial fall near the centre without steps,
    and leaving the spots out means a bright spot does not depress its
    neighbours. Two smoothers are blended: a wide one (``wide`` cells, 8 s)
    wherever the background is flat enough for it, which keeps the noise of
    ``b`` and the lift a faint spot gives its own background small, and a
    narrow one (``smooth`` cells, 3 s) where the background curves steeply
    (near the central beam).
    """

    s: float
    cell: int
    smooth: float  # Gaussian sigma of the narrow background smoother, cells
    wide: float  # Gaussian sigma of the wide background smoother, cells
    gain: float  # response to a unit-peak Gaussian spot of width s on a pixel centre
    norm: float  # noise gain for white noise (Gaussian and background estimate)
    faint_gain: float  # the same for a spot too faint to be left out of the background

    @classmethod
    def for_sigma(cls, s: float, shape: tuple[int, int]) -> _Kernel:
        # cells of about the spot width, but at most ~0.5 M of them (speed)
        cell = max(2, int(math.ceil(s)), int(math.ceil(math.sqrt(shape[0] * shape[1] / 5e5))))
        smooth = max(1.5, 3.0 * s / cell)
        wide = max(smooth, 8.0 * s / cell)
        r = _gauss_radius(s)
        g1 = np.exp(-(np.arange(-r, r + 1) ** 2) / (2 * s * s))
        g1 /= g1.sum()
        # a unit spot of width s seen through the (separable) filter at its centre
        gain = float(((g1 * np.exp(-(np.arange(-r, r + 1) ** 2) / (2 * s * s))).sum()) ** 2)
        g_norm2 = float((g1**2).sum()) ** 2
        # white noise through cell means and a 2-D Gaussian of `wide` cells
        b_norm2 = 1.0 / (cell * cell * 4 * math.pi * wide * wide)
        # a faint spot stays in the background smoother and lifts it at its centre by
        # s²/(s² + σ_b²), σ_b² ≈ (wide·cell)² + cell²/6 (Gaussian of the cell means)
        lift = s * s / (s * s + (wide * cell) ** 2 + cell * cell / 6.0)
        return cls(
            s=s, cell=cell, smooth=smooth, wide=wide, gain=gain,
            norm=math.sqrt(g_norm2 + b_norm2), faint_gain=gain - lift,
        )

    @property
    def reach(self) -> float:
        """How far the background smoother reaches, pixels (2 of its sigmas and a cell)."""
        return (2 * self.smooth + 1) * self.cell


@dataclass(frozen=True)
class _Background:
    """The robust background on a coarse grid, evaluated by bilinear interpolation."""

    grid: np.ndarray  # (ny, nx) float32 background level at the cell centres
    cell: int
    shape: tuple[int, int]

    def _coords(self, idx: np.ndarray, n: int):
        # cell k covers pixels [k*cell, (k+1)*cell); its centre is at k*cell + (cell-1)/2
        u = (np.asarray(idx, float) - (self.cell - 1) / 2) / self.cell
        k0 = np.clip(np.floor(u).astype(int), 0, max(n - 2, 0))
        t = np.clip(u - k0, 0.0, 1.0) if n > 1 else np.zeros_like(u)
        return k0, np.minimum(k0 + 1, n - 1), t

    def at(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Background at pixels (rows, cols) (same-shaped integer arrays)."""
        ny, nx = self.grid.shape
        r0, r1, tr = self._coords(rows, ny)
        c0, c1, tc = self._coords(cols, nx)
        g = self.grid
        top = g[r0, c0] * (1 - tc) + g[r0, c1] * tc
        bot = g[r1, c0] * (1 - tc) + g[r1, c1] * tc
        return top * (1 - tr) + bot * tr

    def subtract_from(self, out: np.ndarray) -> None:
        """``out -= background`` over the whole image."""
        rows, cols = self.shape
        ny, nx = self.grid.shape
        c0, c1, tc = self._coords(np.arange(cols), nx)
        tc = tc.astype(np.float32)
        # interpolate along x once for every grid row
        along_x = self.grid[:, c0] * (1 - tc) + self.grid[:, c1] * tc
        r0, r1, tr = self._coords(np.arange(rows), ny)
        tr = tr.astype(np.float32)
        # rows between two grid rows share the pair: out -= A + t·(B − A), one band at a time
        starts = np.flatnonzero(np.r_[True, (r0[1:] != r0[:-1]) | (r1[1:] != r1[:-1])])
        ends = np.r_[starts[1:], rows]
        for i0, i1 in zip(starts, ends):
            a = along_x[r0[i0]]
            d = along_x[r1[i0]] - a
            band = out[i0:i1]
            band -= a
            band -= tr[i0:i1, None] * d


def _cell_sums(a: np.ndarray, cell: int) -> np.ndarray:
    """Sums over cell × cell blocks, partial blocks at the right and bottom edges included."""
    rows, cols = a.shape
    ry, rx = rows // cell * cell, cols // cell * cell
    ny, nx = -(-rows // cell), -(-cols // cell)
    out = np.zeros((ny, nx), dtype=np.float64)
    # whole blocks: sum along x within each row, then along y
    core = a[:ry, :rx].reshape(ry, rx // cell, cell).sum(axis=2, dtype=np.float32)
    out[: ry // cell, : rx // cell] = core.reshape(ry // cell, cell, rx // cell).sum(axis=1, dtype=np.float64)
    if rx < cols:
        edge = a[:ry, rx:].sum(axis=1, dtype=np.float64)
        out[: ry // cell, -1] = edge.reshape(ry // cell, cell).sum(axis=1)
    if ry < rows:
        tail = a[ry:, :].sum(axis=0, dtype=np.float64)
        out[-1, : rx // cell] = tail[:rx].reshape(rx // cell, cell).sum(axis=1)
        if rx < cols:
            out[-1, -1] = tail[rx:].sum()
    return out


def _cell_means(img: np.ndarray, bad: np.ndarray | None, cell: int) -> np.ndarray:
    """Means of the usable pixels in cell × cell blocks (partial blocks at the edges); NaN
    for blocks less than a quarter usable. Excluded pixels of ``img`` are zero."""
    rows, cols = img.shape
    tot = _cell_sums(img, cell)
    hy = np.minimum(cell, rows - np.arange(0, rows, cell)).astype(float)
    hx = np.minimum(cell, cols - np.arange(0, cols, cell)).astype(float)
    area = np.outer(hy, hx)
    if bad is None:
        return tot / area
    cnt = area - _cell_sums(bad.view(np.uint8), cell)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = tot / cnt
    mean[cnt < 0.25 * area] = np.nan
    return mean


def _robust_background(
    img: np.ndarray, bad: np.ndarray | None, k: _Kernel, beam: tuple[float, float, float] | None = None
) -> _Background:
    """Sigma-clipped smooth background on the coarse grid (see :class:`_Kernel`).

    Cells more than 4 robust sigma above the smooth level, alone or as the
    mean of 3 × 3 cells, are left out with their neighbours (a threshold that
    spares the noise). ``beam`` = (x, y, radius): the central
    beam is background, not a spot, so cells within that disc are never left
    out and the level follows the beam's fall as closely as the smoother can;
    nor are cells next to masked ones.
    """
    grid = _cell_means(img, bad, k.cell)
    valid = np.isfinite(grid)
    keep = None
    if not valid.all():
        # next to the mask the steep structure is mostly the beam's tail (beam stop,
        # saturated core): never left out there (spots there are measured exactly)
        keep = ndi.binary_dilation(~valid, iterations=int(math.ceil(2 * k.smooth)) + 1)
    if beam is not None:
        ny, nx = grid.shape
        cyc = (np.arange(ny) * k.cell + (k.cell - 1) / 2)[:, None]
        cxc = (np.arange(nx) * k.cell + (k.cell - 1) / 2)[None, :]
        disc = np.hypot(cxc - beam[0], cyc - beam[1]) <= beam[2]
        keep = disc if keep is None else keep | disc
    g0 = np.where(valid, grid, 0.0).astype(np.float32)
    weight = valid.astype(np.float32)

    def smooth(w, sigma):
        num = ndi.gaussian_filter(g0 * w, sigma, mode="constant")
        den = ndi.gaussian_filter(w, sigma, mode="constant")
        with np.errstate(divide="ignore", invalid="ignore"):
            out = num / den
        out[den < 1e-3] = np.nan
        return out

    level = smooth(weight, k.smooth)
    w = weight
    sig = np.full(grid.shape, np.inf)
    for round_ in range(2):
        if round_:
            level = smooth(w, k.smooth)
        resid = np.where(valid, g0 - level, np.nan)
        # a spot covers a few cells: look for it both in single cells and in 3 × 3 means
        # (whose noise is 3 times lower), so that faint spots do not lift their own level
        filled = np.where(valid, resid, 0.0)
        wsum = ndi.uniform_filter(weight, 3, mode="constant")
        with np.errstate(divide="ignore", invalid="ignore"):
            resid3 = np.where(wsum > 0.5, ndi.uniform_filter(filled, 3, mode="constant") / wsum, np.nan)
        sig, sig3 = _block_sigma(resid, 16), _block_sigma(resid3, 16)
        with np.errstate(invalid="ignore"):
            high = (resid > 4.0 * sig) | (resid3 > 4.0 * sig3)
        high = ndi.binary_dilation(high, structure=np.ones((3, 3), bool))
        if keep is not None:
            high &= ~keep
        w = weight * ~high
    # around left-out cells, masked cells and the image edge the weights are lopsided:
    # fit a local plane (first-order normalised convolution) so that a steep gradient
    # is not dragged in
    level = _local_plane(g0, w, k.smooth)
    if k.wide > k.smooth:
        broad = _local_plane(g0, w, k.wide)
        # Gaussian smoothing of a curved background errs by (σ²/2)·∇²b; use the wide
        # smoother where its extra error is under half the filtered image's noise
        # (σ_R ≈ ‖K‖·σ_pixel, σ_pixel ≈ cell·σ_cell for white noise)
        curv = ndi.laplace(np.nan_to_num(broad, nan=np.nanmedian(broad))) / k.cell**2
        extra = 0.5 * ((k.wide * k.cell) ** 2 - (k.smooth * k.cell) ** 2) * np.abs(curv)
        sigma_r = k.norm * k.cell * np.where(np.isfinite(sig), sig, np.inf)
        with np.errstate(invalid="ignore", divide="ignore"):
            alpha = np.clip(2.0 - extra / (0.5 * sigma_r), 0.0, 1.0)
        alpha = ndi.minimum_filter(alpha, size=3)
        alpha = np.where(np.isfinite(broad) & np.isfinite(level), alpha, 0.0)
        level = np.where(alpha > 0, alpha * np.nan_to_num(broad) + (1 - alpha) * np.nan_to_num(level), level)
    level = _fill_nan_nearest(level)
    return _Background(np.ascontiguousarray(level, dtype=np.float32), k.cell, img.shape)


def _local_plane(f: np.ndarray, w: np.ndarray, sigma: float) -> np.ndarray:
    """Value at each cell of the plane fitted to ``f`` with Gaussian × ``w`` weights [2]_.

    Solves the 3 × 3 weighted least-squares normal equations per cell. Their
    entries are the moments ``Σ g(u)·w·(1, u, u²…)`` about each cell, i.e.
    correlations with the separable kernels ``g``, ``u·g`` and ``u²·g``;
    where they are ill-conditioned (too few weights) the weighted mean
    (zeroth order) is used, and NaN where there are no weights at all.
    """
    r = max(1, int(4 * sigma + 0.5))
    u = np.arange(-r, r + 1, dtype=np.float64)
    g = np.exp(-u * u / (2 * sigma * sigma))
    g /= g.sum()
    kern = {0: g, 1: u * g, 2: u * u * g}
    f = f.astype(np.float32, copy=False)
    w = w.astype(np.float32, copy=False)

    def corr(a, ky, kx):
        out = ndi.correlate1d(a, kern[kx], axis=1, mode="constant")
        return ndi.correlate1d(out, kern[ky], axis=0, mode="constant")

    wf = w * f
    m0, mx, my = corr(w, 0, 0), corr(w, 0, 1), corr(w, 1, 0)
    mxx, myy, mxy = corr(w, 0, 2), corr(w, 2, 0), corr(w, 1, 1)
    s0, tx, ty = corr(wf, 0, 0), corr(wf, 0, 1), corr(wf, 1, 0)
    # a = first unknown of [[m0,mx,my],[mx,mxx,mxy],[my,mxy,myy]] · [a,b,c] = [s0,tx,ty] (Cramer)
    det = m0 * (mxx * myy - mxy * mxy) - mx * (mx * myy - mxy * my) + my * (mx * mxy - mxx * my)
    num = s0 * (mxx * myy - mxy * mxy) - mx * (tx * myy - mxy * ty) + my * (tx * mxy - mxx * ty)
    scale = np.maximum(m0, 1e-12) ** 3 * sigma**4
    with np.errstate(divide="ignore", invalid="ignore"):
        a = num / det
        mean = np.where(m0 > 1e-3, s0 / m0, np.nan)
    good = (det > 1e-3 * scale) & (m0 > 1e-3) & np.isfinite(a)
    return np.where(good, a, mean)


def _block_sigma(a: np.ndarray, block: int) -> np.ndarray:
    """Robust sigma of ``a`` (NaN ignored) in block × block tiles, as an array of a's shape."""
    ny, nx = a.shape
    by, bx = -(-ny // block), -(-nx // block)
    pad = np.full((by * block, bx * block), np.nan)
    pad[:ny, :nx] = a
    tiles = pad.reshape(by, block, bx, block).transpose(0, 2, 1, 3).reshape(by * bx, -1)
    _, sig, n = _robust_rows(tiles, rounds=2)
    sig = np.where(n >= 16, sig, np.nan).reshape(by, bx)
    if not np.isfinite(sig).any():
        return np.full(a.shape, np.inf)
    sig = _fill_nan_nearest(sig)
    return np.repeat(np.repeat(sig, block, axis=0), block, axis=1)[:ny, :nx]


def _renormalise_near_mask(g: np.ndarray, bad: np.ndarray, k: _Kernel) -> np.ndarray:
    """Normalised convolution [2]_ of the Gaussian in the tiles that touch excluded pixels.

    ``g`` was computed with excluded pixels set to zero; dividing by the same
    filter applied to the weight image (1 = usable) gives the weighted mean
    of the usable pixels. Pixels whose footprint is less than half usable are
    set to NaN. Returns a boolean image, True where the footprint holds an
    excluded pixel: there a background gradient towards the mask biases the
    response, and candidates are measured again exactly (:func:`_exact_response`).
    """
    rows, cols = bad.shape
    margin = _gauss_radius(k.s) + 1
    tile = max(64, 2 * margin)
    nty, ntx = -(-rows // tile), -(-cols // tile)
    padded = np.zeros((nty * tile, ntx * tile), dtype=bool)
    padded[:rows, :cols] = bad
    touched = padded.reshape(nty, tile, ntx, tile).any(axis=(1, 3))
    touched = ndi.binary_dilation(touched, structure=np.ones((3, 3), bool))
    near = np.zeros(bad.shape, dtype=bool)
    for ty, tx in zip(*np.nonzero(touched)):
        y0, x0 = ty * tile, tx * tile
        y1, x1 = min(rows, y0 + tile), min(cols, x0 + tile)
        ya, xa = max(0, y0 - margin), max(0, x0 - margin)
        yb, xb = min(rows, y1 + margin), min(cols, x1 + margin)
        w = (~bad[ya:yb, xa:xb]).astype(np.float32)
        inner = (slice(y0 - ya, y1 - ya), slice(x0 - xa, x1 - xa))
        gw = ndi.gaussian_filter(w, k.s, truncate=_TRUNCATE, mode="reflect")[inner]
        sl = (slice(y0, y1), slice(x0, x1))
        with np.errstate(divide="ignore", invalid="ignore"):
            gt = g[sl] / gw
        gt[gw < 0.5] = np.nan
        g[sl] = gt
        near[sl] = gw < 1.0 - 1e-4
    return near


def _response(img: np.ndarray, bad: np.ndarray | None, k: _Kernel, beam=None):
    """The detection image R = G_s*I − b, the background b, and where the
    Gaussian footprint touches excluded pixels or the image edge.
    ``beam`` = (x, y, radius) of the central beam, or None."""
    g = ndi.gaussian_filter(img, k.s, truncate=_TRUNCATE, mode="reflect", output=np.float32)
    if bad is not None:
        near = _renormalise_near_mask(g, bad, k)
    else:
        near = np.zeros(img.shape, dtype=bool)
    # at the image edge the reflected image has a kink: measure candidates there exactly too
    r = _gauss_radius(k.s) + 1
    near[:r] = near[-r:] = True
    near[:, :r] = near[:, -r:] = True
    back = _robust_background(img, bad, k, beam)
    back.subtract_from(g)  # g is now the response
    return g, back, near


def _exact_response(
    img: np.ndarray, bad: np.ndarray | None, cy: int, cx: int, k: _Kernel
) -> tuple[float, float]:
    """The response at one pixel next to excluded pixels, done exactly.

    The Gaussian-weighted mean of the usable pixels minus a plane fitted (least
    squares) to the usable pixels around the spot (from 3 to 5 sigma), so a
    background gradient does not bias it however the mask or the image edge
    cuts the footprint.
    Returns ``(response, noise_factor)``, the factor being the norm of the
    equivalent linear kernel over ``k.norm``; ``(nan, nan)`` when the
    footprint is mostly excluded.
    """
    rows, cols = img.shape
    hg = _gauss_radius(k.s)
    hb = max(hg + 2, int(math.ceil(5 * k.s)))
    y0, y1 = max(0, cy - hb), min(rows, cy + hb + 1)
    x0, x1 = max(0, cx - hb), min(cols, cx + hb + 1)
    ok = np.ones((y1 - y0, x1 - x0), bool) if bad is None else ~bad[y0:y1, x0:x1]
    dy, dx = np.mgrid[y0 - cy : y1 - cy, x0 - cx : x1 - cx]
    g = np.exp(-(dx * dx + dy * dy) / (2 * k.s * k.s)) * ((np.abs(dx) <= hg) & (np.abs(dy) <= hg))
    full = float(np.exp(-(np.arange(-hg, hg + 1) ** 2) / (2 * k.s * k.s)).sum() ** 2)
    r = np.hypot(dx, dy)
    ring = ok & (r >= 3 * k.s) & (r <= hb)
    if (g * ok).sum() < 0.5 * full or ring.sum() < 8:
        return float("nan"), float("nan")
    h = (g * ok)[ok]
    h = h / h.sum()
    vals = img[y0:y1, x0:x1].astype(float)
    a_ring = np.stack([np.ones(ring.sum()), dx[ring], dy[ring]], axis=1).astype(float)
    pinv = np.linalg.pinv(a_ring)  # plane coefficients = pinv @ ring values
    a_in = np.stack([np.ones(ok.sum()), dx[ok], dy[ok]], axis=1).astype(float)
    coef_h = (h @ a_in) @ pinv  # weights of the plane's contribution on the ring pixels
    kern = np.zeros(ok.shape)
    kern[ok] += h
    kern[ring] -= coef_h
    return float((kern * vals).sum()), float(np.linalg.norm(kern) / k.norm)
