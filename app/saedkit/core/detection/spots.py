"""Diffraction spots: detection, sub-pixel refinement and snapping a click to a spot.

The detector is tuned to spot patterns: a bright (often saturated) central
beam, a diffuse background that falls steeply with radius, Poisson plus read
noise, and Gaussian-like spots of a few pixels that range from very bright to
barely visible.

Detection works in cheap whole-image steps, then per candidate:

1. **Matched filter against a robust background.** The image is smoothed by
   a Gaussian of the spot width ``s`` (the matched filter for a Gaussian
   spot) and a smooth background is subtracted. The background is built on a
   coarse grid of cell means, smoothed by a Gaussian with the cells that
   stand out (spots) left out (sigma clipping), and near left-out cells by a
   local plane (first-order normalised convolution [2]_), so it follows the
   steep radial fall near the central beam without steps and a bright spot
   does not depress its neighbours. Masked pixels carry no weight (the
   Gaussian is a normalised convolution near the mask, and candidates whose
   footprint touches the mask are measured again exactly).
2. **Noise from the data.** The per-pixel noise is measured in blocks from a
   sparse sample of ``I − mean of the 4 neighbours`` (robust MAD) and
   modelled as ``σ² = α + β·b`` with ``b`` the local background (Poisson
   plus read noise), corrected block by block, so the threshold follows the
   larger noise near the central beam; a factor κ ≥ 1 for noise correlated
   between pixels is measured from the filtered image away from the spots.
3. **Threshold.** A candidate's matched-filter estimate of its peak
   signal-to-noise ratio (peak over the per-pixel noise) must come within
   five standard errors and 15 % of ``min_snr``, and the candidate must in
   any case be a 5σ detection of the filtered image (more in a large image,
   so that pure noise gives under 0.5 false peaks per image).
4. **Local maxima** of the filtered image, then greedy non-maximum
   suppression within ``min_separation_px``.
5. **Exclusions:** the central beam's core and candidates on masked pixels.
6. **Refinement** of each candidate: a closed-form start (log-parabola on the
   filtered image), an intensity-weighted centroid, then a least-squares 2-D
   Gaussian on a planar background in a small window, whose sandwich
   covariance gives the position uncertainty; if the fit fails the centroid
   is kept. Integrated intensity by aperture photometry with a planar local
   background from an annulus [3]_.

References
----------
.. [1] W. K. Pratt, *Digital Image Processing*, 4th ed., Wiley (2007): matched
   filtering of known-shape objects in white noise.
.. [2] H. Knutsson and C.-F. Westin, "Normalized and differential
   convolution", Proc. CVPR (1993): filtering with missing data.
.. [3] S. B. Howell, *Handbook of CCD Astronomy*, 2nd ed., Cambridge (2006):
   aperture photometry with an annulus background, centroiding.
.. [4] J. G. MacKinnon and H. White, "Some heteroskedasticity-consistent
   covariance matrix estimators with improved finite sample properties",
   J. Econometrics 29, 305 (1985).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy import ndimage as ndi
from scipy.optimize import least_squares
from scipy.spatial import cKDTree

from saedkit.core._validate import check_image_2d, check_positive, check_xy
from saedkit.core.errors import FitError, InputError, SaedkitError

__all__ = [
    "Spot",
    "find_spots",
    "refine_spot",
    "snap_to_spot",
    "spots_xy_array",
]

# Gaussian kernels are cut at 3 sigma (99.7 % of a 1-D profile): cheaper than
# scipy's default 4 sigma at no measurable cost in sensitivity (common practice).
_TRUNCATE = 3.0
# A detection must be at least this many sigma of the filtered image's noise
# (the usual 5-sigma detection floor: common practice), more in a large image
# so that pure noise gives fewer than this many false peaks per image.
_MIN_SIGNIFICANCE = 5.0
_FALSE_PEAKS_PER_IMAGE = 0.5
# Allowances below min_snr for the matched-filter estimate of a spot's peak SNR:
# five of its standard errors (noise), and 15 % for what scales with the signal
# (an off-centre spot between pixels loses up to 5 %, the noise estimate may be
# 10 % high), so a spot whose true peak SNR is min_snr is practically never lost.
_SNR_ALLOWANCE_SE = 5.0
_SNR_ALLOWANCE_REL = 0.15
_DEFAULT_SIGMA_PX = 2.0
_MAD_TO_SIGMA = 1.4826  # Gaussian: sigma = 1.4826 * median absolute deviation

ProgressFn = Callable[[int, int], None]
StopFn = Callable[[], bool]


# ----------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Spot:
    """One refined diffraction spot.

    Parameters
    ----------
    x, y : float
        Refined position, pixels (x = column, y = row).
    sigma_x, sigma_y : float
        Standard uncertainty of the position, pixels.
    intensity : float
        Integrated intensity in the aperture, local background subtracted, counts.
    intensity_sigma : float
        Standard uncertainty of ``intensity``.
    background : float
        Local background per pixel (median of the annulus), counts.
    peak : float
        Peak height above the background, counts.
    snr : float
        Peak signal-to-noise ratio: ``peak`` over the per-pixel noise of the
        local background.
    width_px : float
        Gaussian sigma of the spot, pixels.
    method : str
        ``"gaussian"`` (least-squares fit) or ``"centroid"`` (the fit failed or
        was not asked for).
    saturated : bool
        Some of the spot's central pixels are saturated: its position comes
        from the unsaturated wings and is sound, its ``peak`` is extrapolated
        by the fit and its ``intensity`` is a lower bound.
    """

    x: float
    y: float
    sigma_x: float
    sigma_y: float
    intensity: float
    intensity_sigma: float
    background: float
    peak: float
    snr: float
    width_px: float
    method: str = "gaussian"
    saturated: bool = False

    @property
    def xy(self) -> np.ndarray:
        """The position as an array ``[x, y]``."""
        return np.array([self.x, self.y])

    def to_dict(self) -> dict:
        """JSON-ready record (units in the keys where they are pixels); unknown values are None.

        A spot placed by hand has no measured intensity (NaN), and JSON has no NaN.
        """
        rec = {
            "x": self.x,
            "y": self.y,
            "sigma_x_px": self.sigma_x,
            "sigma_y_px": self.sigma_y,
            "intensity": self.intensity,
            "intensity_sigma": self.intensity_sigma,
            "background": self.background,
            "peak": self.peak,
            "snr": self.snr,
            "width_px": self.width_px,
        }
        out = {k: (float(v) if np.isfinite(v) else None) for k, v in rec.items()}
        out["saturated"] = bool(self.saturated)
        return out


def spots_xy_array(spots: Sequence[Spot]) -> np.ndarray:
    """Positions of spots as an (N, 2) array of ``[x, y]``.

    Parameters
    ----------
    spots : sequence of Spot

    Returns
    -------
    (N, 2) float array (shape (0, 2) when empty).
    """
    if len(spots) == 0:
        return np.zeros((0, 2))
    return np.array([[s.x, s.y] for s in spots], dtype=float)


# ----------------------------------------------------------------------------- input


def _check_mask(mask, shape: tuple[int, int]) -> np.ndarray | None:
    if mask is None:
        return None
    m = np.asarray(mask)
    if m.shape != tuple(shape):
        raise InputError(f"mask must have the image's shape {tuple(shape)}, got shape {m.shape}")
    if m.dtype != bool:
        if not np.issubdtype(m.dtype, np.number):
            raise InputError(f"mask must be a boolean array (True = excluded), got dtype {m.dtype}")
        m = m != 0
    return m


def _check_numeric_image(image) -> np.ndarray:
    arr = check_image_2d("image", image)
    if not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool) or np.iscomplexobj(arr):
        raise InputError(f"image must hold real numbers, got dtype {arr.dtype}")
    return arr


def _saturation_level(arr: np.ndarray) -> float | None:
    """The clipping level when three or more pixels share the image maximum.

    A detector that saturates clips every overexposed pixel to the same value,
    so ties at the maximum are the signature of saturation (common practice).
    Returns None for an image without such ties (or with the maximum on more
    than 5 % of the pixels, or no brighter than the median: not a clipped beam).
    """
    finite = arr if arr.dtype.kind in "uib" else arr[np.isfinite(arr)]
    if finite.size == 0:
        return None
    vmax = finite.max()
    n = np.count_nonzero(arr == vmax)
    if n < 3 or n > 0.05 * arr.size:
        return None
    sample = finite.ravel()[:: max(1, finite.size // 65536)]
    if not vmax > np.median(sample):
        return None
    return float(vmax)


def _prepare(image, mask):
    """float32 copy with excluded pixels zeroed, the exclusion mask, the saturated
    pixels and their level (None, None without saturation)."""
    arr = _check_numeric_image(image)
    m = _check_mask(mask, arr.shape)
    img = arr.astype(np.float32, copy=True)
    bad = None
    if arr.dtype.kind == "f":
        nonfinite = ~np.isfinite(img)
        if nonfinite.any():
            bad = nonfinite
    sat_level = _saturation_level(arr)
    sat = None
    if sat_level is not None:
        sat = arr >= sat_level
        bad = sat if bad is None else (bad | sat)
    if m is not None:
        bad = m.copy() if bad is None else (bad | m)
    if bad is not None and not bad.any():
        bad = None
    if bad is not None:
        if bad.all():
            raise InputError("mask excludes every pixel of the image")
        img[bad] = 0.0
    return img, bad, sat, sat_level


def _check_stop(should_stop: StopFn | None) -> None:
    if should_stop is not None and should_stop():
        raise SaedkitError("spot search cancelled")


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


# ----------------------------------------------------------------------------- noise


@dataclass(frozen=True)
class _NoiseModel:
    """Noise of the filtered image at any pixel.

    ``sigma_R = scale·sqrt(max(alpha + beta·b, floor)·corr[block])``: the
    per-pixel variance modelled against the local background ``b``
    (Poisson plus read noise), corrected block by block, times the filter's
    noise gain ``scale`` (``κ·‖K‖``).
    """

    alpha: float
    beta: float
    floor: float
    block: int
    corr: np.ndarray  # (nby, nbx) multiplicative correction of the variance
    scale: float

    def pixel_sigma_at(self, rows: np.ndarray, cols: np.ndarray, background: np.ndarray) -> np.ndarray:
        nby, nbx = self.corr.shape
        by = np.minimum(rows // self.block, nby - 1)
        bx = np.minimum(cols // self.block, nbx - 1)
        var = np.maximum(self.alpha + self.beta * background, self.floor) * self.corr[by, bx]
        return np.sqrt(var)

    def sigma_at(self, rows: np.ndarray, cols: np.ndarray, background: np.ndarray) -> np.ndarray:
        return self.scale * self.pixel_sigma_at(rows, cols, background)

    def sigma_min(self, bmin: float) -> float:
        return float(self.scale * np.sqrt(max(self.alpha + self.beta * bmin, self.floor) * self.corr.min()))


def _fill_nan_nearest(a: np.ndarray) -> np.ndarray:
    nan = ~np.isfinite(a)
    if not nan.any():
        return a
    if nan.all():
        return np.zeros_like(a)
    idx = ndi.distance_transform_edt(nan, return_distances=False, return_indices=True)
    return a[tuple(idx)]


def _robust_rows(a: np.ndarray, clip: float = 3.5, rounds: int = 3):
    """Median and robust sigma (1.4826·MAD, iteratively clipped at ``clip`` sigma)
    of every row of ``a``; NaN entries are ignored. Returns (median, sigma, count)."""
    r = np.sort(a, axis=1)  # NaN sort last
    idx = np.arange(r.shape[0])

    def med_of(sorted_rows, n):
        return np.where(n > 0, sorted_rows[idx, np.maximum((n - 1) // 2, 0)], np.nan)

    for i in range(rounds):
        n = np.isfinite(r).sum(axis=1)
        med = med_of(r, n)
        mad = med_of(np.sort(np.abs(r - med[:, None]), axis=1), n)
        sig = _MAD_TO_SIGMA * mad
        if i + 1 < rounds:
            with np.errstate(invalid="ignore"):
                out = np.abs(r - med[:, None]) > clip * sig[:, None]
            r = np.sort(np.where(out, np.nan, r), axis=1)
    return med, sig, n


def _robust_location(v: np.ndarray) -> float:
    """Median of ``v`` after dropping high outliers (3 robust sigma), twice."""
    v = v[np.isfinite(v)]
    for _ in range(2):
        med = float(np.median(v))
        sig = _MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
        keep = v <= med + 3 * sig
        if keep.sum() < 3:
            break
        v = v[keep]
    return float(np.median(v))


@dataclass(frozen=True)
class _Samples:
    """A sparse regular sample of the image, for measuring the noise.

    ``d`` is the residual ``I − (mean of the 4 neighbours)`` (pixel noise:
    ``var d = 1.25 var I`` for white noise; a smooth background does not
    touch it), ``delta`` the difference of the filtered image between two
    points ``lag`` pixels apart (filter noise: ``var δ = 2 var R (1 − ρ)``, a
    slowly varying response to the background's curvature cancels), ``b``
    the local background. Arrays are (blocks, samples per block); NaN marks
    unusable samples.
    """

    rows: np.ndarray
    cols: np.ndarray
    block: int
    nby: int
    nbx: int
    lag: int
    rho: float  # correlation of the filtered white noise at the lag
    d: np.ndarray
    delta: np.ndarray
    b: np.ndarray

    def blocks(self, a: np.ndarray) -> np.ndarray:
        py, px = len(self.rows) // self.nby, len(self.cols) // self.nbx
        return a.reshape(self.nby, py, self.nbx, px).transpose(0, 2, 1, 3).reshape(self.nby * self.nbx, -1)


def _take_samples(
    img: np.ndarray, bad: np.ndarray | None, resp: np.ndarray, back: _Background, k: _Kernel
) -> _Samples:
    rows, cols = resp.shape
    block = int(np.clip(16 * round(min(rows, cols) / 256), 32, 64))
    block = max(16, min(block, 16 * (min(rows, cols) // 16)))
    step = max(1, block // 16)
    nby, nbx = max(1, rows // block), max(1, cols // block)
    off = step // 2
    rs = np.arange(off, nby * block, step)
    cs = np.arange(off, nbx * block, step)
    rs, cs = rs[: (len(rs) // nby) * nby], cs[: (len(cs) // nbx) * nbx]
    rs, cs = np.minimum(rs, rows - 1), np.minimum(cs, cols - 1)  # tiny images
    lag = int(math.ceil(4 * k.s)) + 1

    def gather(a, dr=0, dc=0):
        return a[np.ix_(np.clip(rs + dr, 0, rows - 1), np.clip(cs + dc, 0, cols - 1))]

    d = gather(img).astype(float) - 0.25 * (
        gather(img, -1, 0) + gather(img, 1, 0) + gather(img, 0, -1) + gather(img, 0, 1)
    ).astype(float)
    if bad is not None:
        d[gather(bad) | gather(bad, -1, 0) | gather(bad, 1, 0) | gather(bad, 0, -1) | gather(bad, 0, 1)] = np.nan
    shifted = np.where(cs + lag < cols, cs + lag, cs - lag)
    delta = gather(resp).astype(float) - resp[np.ix_(rs, np.clip(shifted, 0, cols - 1))].astype(float)
    rr, cc = np.meshgrid(rs, cs, indexing="ij")
    b = back.at(rr, cc)
    b[~np.isfinite(d)] = np.nan
    smp = _Samples(rs, cs, block, nby, nbx, lag, _kernel_correlation(k, lag), d, delta, b)
    return replace(smp, d=smp.blocks(d), delta=smp.blocks(delta), b=smp.blocks(b))


def _kernel_correlation(k: _Kernel, lag: int) -> float:
    """Correlation coefficient of white noise smoothed by the Gaussian, at a horizontal lag."""
    r = _gauss_radius(k.s)
    g1 = np.exp(-(np.arange(-r, r + 1) ** 2) / (2 * k.s * k.s))
    shifted = np.zeros_like(g1)
    if lag < len(g1):
        shifted[: len(g1) - lag] = g1[lag:]
    return float((g1 * shifted).sum() / (g1 * g1).sum())


def _measure_noise(
    smp: _Samples, k: _Kernel, exclude_xy=None, exclude_z=None, *, with_kappa: bool = True
) -> _NoiseModel:
    """Measure the noise in blocks and model it against the background.

    Poisson noise plus read noise has a variance linear in the signal, so the
    block variances of the pixel noise (robust: 1.4826·MAD, clipped) are
    fitted as ``α + β·b`` with ``b`` the block's median background (weights
    for relative errors, outliers dropped); the block-to-block ratio to that
    model, median-filtered, corrects it. The factor ``κ`` between the noise
    of the filtered image and the white-noise prediction ``‖K‖·σ_pixel`` (1
    for uncorrelated noise; larger for a detector that spreads each electron
    over several pixels) is the robust median over the blocks, never below 1
    (1 when ``with_kappa`` is False). Samples near the spots found in a
    first pass (``exclude_xy``, with significances ``exclude_z``) are left
    out: within 3 s + 1 for the pixel noise, and for κ out to where the
    spot's response falls below half a noise sigma, ``2s·√ln(2z)``.
    """
    d, delta, b = smp.d, smp.delta, smp.b
    if exclude_xy is not None and len(exclude_xy):
        rs, cs = smp.rows, smp.cols
        zs = np.ones(len(exclude_xy)) if exclude_z is None else np.asarray(exclude_z, float)

        def keep_outside(radii, lag):
            keep = np.ones((len(rs), len(cs)), bool)
            for (x, y), rad in zip(exclude_xy, radii):
                r0, r1 = np.searchsorted(rs, y - rad), np.searchsorted(rs, y + rad, side="right")
                # delta pairs a sample with one `lag` to its right: drop both ends
                c0 = np.searchsorted(cs, x - rad - lag)
                c1 = np.searchsorted(cs, x + rad, side="right")
                keep[r0:r1, c0:c1] = False
            return smp.blocks(keep)

        near_d = keep_outside(np.full(len(zs), 3 * k.s + 1), 0)
        reach = 2 * k.s * np.sqrt(np.log(2 * np.maximum(zs, 1.0))) + 1
        near_q = keep_outside(np.maximum(reach, 3 * k.s + 1), smp.lag)
        d, b = np.where(near_d, d, np.nan), np.where(near_d, b, np.nan)
        delta = np.where(near_q, delta, np.nan)
    _, sig_d, n_d = _robust_rows(d)
    _, sig_q, n_q = _robust_rows(delta)
    b_med, _, _ = _robust_rows(b, rounds=1)
    var_pix = sig_d**2 / 1.25
    nby, nbx = smp.nby, smp.nbx
    good = (n_d >= 24) & np.isfinite(var_pix) & (var_pix > 0) & np.isfinite(b_med)

    if not good.any():
        dd = smp.d[np.isfinite(smp.d)]
        if dd.size == 0:
            raise FitError("no usable pixels to measure the noise")
        v = float((_MAD_TO_SIGMA * np.median(np.abs(dd - np.median(dd)))) ** 2 / 1.25)
        v = max(v, 1e-12 * max(float(np.max(np.abs(dd))), 1.0) ** 2)
        return _NoiseModel(v, 0.0, v, smp.block, np.ones((nby, nbx)), k.norm)

    x, y = b_med[good], var_pix[good]
    alpha, beta = float(np.median(y)), 0.0
    if good.sum() >= 6 and np.ptp(x) > 0:
        keep = np.ones(len(x), bool)
        for _ in range(3):
            # weighted least squares on var = alpha + beta*b, weights 1/var (relative errors)
            a = np.stack([np.ones(keep.sum()), x[keep]], axis=1) / y[keep, None]
            sol, *_ = np.linalg.lstsq(a, np.ones(keep.sum()), rcond=None)
            if sol[1] <= 0:
                alpha, beta = float(np.median(y[keep])), 0.0
                break
            alpha, beta = float(sol[0]), float(sol[1])
            lr = np.log(y / np.maximum(alpha + beta * x, 1e-30))
            spread = _MAD_TO_SIGMA * np.median(np.abs(lr[keep] - np.median(lr[keep]))) + 1e-6
            keep = np.abs(lr - np.median(lr[keep])) < 3 * spread
            if keep.sum() < 3:
                break
    floor = 0.25 * float(np.min(y))
    model = np.maximum(alpha + beta * np.where(np.isfinite(b_med), b_med, np.median(x)), floor)
    ratio = np.where(good, var_pix / model, np.nan)
    # blocks without enough clean samples (crowded with spots) keep the model as it is
    logc = np.nan_to_num(np.log(ratio).reshape(nby, nbx), nan=0.0)
    if logc.size >= 9:
        logc = ndi.median_filter(logc, size=3, mode="nearest")
    corr = np.exp(logc)

    kappa2 = 1.0
    both = good & (n_q >= 24) & np.isfinite(sig_q) & (sig_q > 0)
    if with_kappa and both.sum() >= 3:
        var_r = sig_q[both] ** 2 / (2.0 * (1.0 - smp.rho))
        kappa2 = max(1.0, _robust_location(var_r / (k.norm**2 * var_pix[both])))
    return _NoiseModel(alpha, beta, floor, smp.block, corr, float(k.norm * np.sqrt(kappa2)))


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


# ----------------------------------------------------------------------------- central beam


def _central_core(
    img: np.ndarray,
    bad: np.ndarray | None,
    sat: np.ndarray | None,
    sat_level: float | None,
    centre_xy: np.ndarray | None,
    s: float,
) -> tuple[np.ndarray | None, float]:
    """Locate the central beam and the radius of its bright core.

    Without a centre, the beam is the maximum of a coarse, strongly smoothed
    image (its wide tail outweighs any spot). The core is the connected region
    at or above half the local maximum (saturated pixels included) around the
    beam; it counts as the beam only when it is wider than a spot or
    saturated. Returns ``(centre_xy or None, core_radius_px)``; radius 0 means
    no visible beam (e.g. hidden by the beam stop).
    """
    rows, cols = img.shape
    # saturated pixels were zeroed in img; they count at the clipping level here
    excluded = None
    if bad is not None:
        excluded = bad if sat is None else (bad & ~sat)
    if centre_xy is None:
        bin_ = max(1, min(rows, cols) // 256)
        tot = _cell_sums(img, bin_)
        area = np.outer(
            np.minimum(bin_, rows - np.arange(0, rows, bin_)), np.minimum(bin_, cols - np.arange(0, cols, bin_))
        ).astype(float)
        cnt = area if excluded is None else area - _cell_sums(excluded.view(np.uint8), bin_)
        if sat is not None and sat_level is not None:
            tot = tot + _cell_sums(sat.view(np.uint8), bin_) * sat_level
        sw = ndi.gaussian_filter(cnt, 4)
        sm = ndi.gaussian_filter(tot, 4) / np.maximum(sw, 1e-9)
        sm[sw < 0.3 * area] = -np.inf
        iy, ix = np.unravel_index(int(np.argmax(sm)), sm.shape)
        cx, cy = ix * bin_ + (bin_ - 1) / 2, iy * bin_ + (bin_ - 1) / 2
        given = False
    else:
        cx, cy = float(centre_xy[0]), float(centre_xy[1])
        given = True
    half = int(max(48, 16 * s))
    for _ in range(4):  # widen the window until the core fits inside it
        found = _core_in_window(img, excluded, sat, sat_level, cx, cy, half, s, given)
        if found is None or not found[2]:
            break
        half *= 2
    if found is None:
        return (centre_xy if given else None), 0.0
    core_xy, radius, _ = found
    if not given:
        centre_xy = core_xy
    return centre_xy, radius


def _core_in_window(img, excluded, sat, sat_level, cx, cy, half, s, given):
    """The bright core near (cx, cy) in a window of ``half`` pixels: (centroid, radius,
    touches_edge), or None when there is no beam-like core (see :func:`_central_core`)."""
    rows, cols = img.shape
    x0, x1 = max(0, int(cx) - half), min(cols, int(cx) + half + 1)
    y0, y1 = max(0, int(cy) - half), min(rows, int(cy) + half + 1)
    if x1 - x0 < 4 or y1 - y0 < 4:
        return None
    win = img[y0:y1, x0:x1].astype(float)
    wsat = sat[y0:y1, x0:x1] if sat is not None else np.zeros(win.shape, bool)
    wexc = excluded[y0:y1, x0:x1] if excluded is not None else np.zeros(win.shape, bool)
    if given:
        icx, icy = int(round(cx)) - x0, int(round(cy)) - y0
        if 0 <= icy < win.shape[0] and 0 <= icx < win.shape[1] and wexc[icy, icx]:
            return None  # the centre is behind the user's mask (beam stop)
    if wsat.any() and sat_level is not None:
        win[wsat] = sat_level
    wgt = (~wexc).astype(float)
    sm = ndi.gaussian_filter(win * wgt, s) / np.maximum(ndi.gaussian_filter(wgt, s), 1e-9)
    sm[wexc] = np.nan
    yy, xx = np.mgrid[y0:y1, x0:x1]
    near = np.hypot(xx - cx, yy - cy) <= max(4 * s, 10.0)
    cand = np.where(near & np.isfinite(sm), sm, -np.inf)
    if not np.isfinite(cand).any():
        return None
    py, px = np.unravel_index(int(np.argmax(cand)), cand.shape)
    if wexc.any() and ndi.distance_transform_edt(~wexc)[py, px] <= 2.0:
        return None  # the brightest visible pixel borders the user's mask: the beam is behind it
    base = float(np.nanmedian(sm))
    level = base + 0.5 * (float(sm[py, px]) - base)
    with np.errstate(invalid="ignore"):
        region = (sm >= level) | wsat
    lab, _ = ndi.label(region)
    core = lab == lab[py, px]
    radius = math.sqrt(core.sum() / math.pi)
    # a spot smoothed by the s-wide filter has a half-maximum radius of 1.66 s
    if not (wsat & core).any() and radius <= 2.5 * s:
        return None
    if wexc.any() and (ndi.binary_dilation(core, iterations=2) & wexc).any():
        return None  # the bright region runs into the user's mask: the beam is behind it
    edge = bool(core[0].any() or core[-1].any() or core[:, 0].any() or core[:, -1].any())
    edge &= (x0 > 0 or x1 < cols or y0 > 0 or y1 < rows)
    centroid = np.array([float(xx[core].mean()), float(yy[core].mean())])
    return centroid, radius, edge


# ----------------------------------------------------------------------------- refinement


def _gauss_model(p, xx, yy, xc, yc):
    x0, y0, a, w, b0, bx, by = p
    dx, dy = xx - x0, yy - y0
    w2 = w * w
    e = np.exp(-(dx * dx + dy * dy) / (2 * w2))
    return a * e + b0 + bx * (xx - xc) + by * (yy - yc), e, dx, dy


def _fit_gaussian(xx, yy, vals, start, xc, yc):
    """Least-squares 2-D circular Gaussian on a planar background.

    Returns (params, covariance, residuals) or None when the fit fails.
    """

    def fun(p):
        m, *_ = _gauss_model(p, xx, yy, xc, yc)
        return m - vals

    def jac(p):
        a, w = p[2], p[3]
        _, e, dx, dy = _gauss_model(p, xx, yy, xc, yc)
        w2 = w * w
        j = np.empty((len(vals), 7))
        j[:, 0] = a * e * dx / w2
        j[:, 1] = a * e * dy / w2
        j[:, 2] = e
        j[:, 3] = a * e * (dx * dx + dy * dy) / (w2 * w)
        j[:, 4] = 1.0
        j[:, 5] = xx - xc
        j[:, 6] = yy - yc
        return j

    if len(vals) < 12:
        return None
    try:
        res = least_squares(fun, start, jac=jac, method="lm", x_scale="jac", max_nfev=400)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not res.success or not np.all(np.isfinite(res.x)):
        return None
    p = res.x.copy()
    p[3] = abs(p[3])
    jj = res.jac
    dof = len(vals) - 7
    if dof <= 0:
        return None
    try:
        bread = np.linalg.inv(jj.T @ jj)
    except np.linalg.LinAlgError:
        return None
    # heteroscedasticity-consistent ("sandwich") covariance: the noise is larger on
    # the spot than on the background (shot noise), which the plain s²(JᵀJ)⁻¹ misses;
    # residuals scaled by 1/(1 − leverage) for the small sample (HC3) [4]_
    lev = np.einsum("ij,jk,ik->i", jj, bread, jj)  # leverage of each pixel
    meat = (jj * (res.fun**2 / np.maximum(1.0 - lev, 0.05) ** 2)[:, None]).T @ jj
    cov = bread @ meat @ bread
    if not np.all(np.isfinite(np.diag(cov))) or np.any(np.diag(cov) < 0):
        return None
    return p, cov, res.fun


class _Refiner:
    """Per-spot refinement and photometry on a float32 image with excluded pixels."""

    def __init__(self, img: np.ndarray, bad: np.ndarray | None, s: float, method: str):
        self.img = img
        self.bad = bad
        self.s = float(s)
        self.method = method
        self.fit_half = max(3, int(math.ceil(3.0 * s)))
        self.half = int(math.ceil(6.0 * s)) + 6

    def crop(self, xg: float, yg: float):
        rows, cols = self.img.shape
        ix, iy = int(round(xg)), int(round(yg))
        x0, x1 = max(0, ix - self.half), min(cols, ix + self.half + 1)
        y0, y1 = max(0, iy - self.half), min(rows, iy + self.half + 1)
        win = self.img[y0:y1, x0:x1].astype(float)
        ok = np.ones(win.shape, bool) if self.bad is None else ~self.bad[y0:y1, x0:x1]
        yy, xx = np.mgrid[y0:y1, x0:x1]
        return win, ok, xx.astype(float), yy.astype(float)

    def refine(self, xg: float, yg: float, *, strict: bool = False) -> Spot | None:
        """Refine the spot nearest (xg, yg). strict=True: raise FitError instead of None."""
        s = self.s

        def fail(msg):
            if strict:
                raise FitError(f"no spot at [{xg:.2f}, {yg:.2f}]: {msg}")
            return None

        win, ok, xx, yy = self.crop(xg, yg)
        if win.size == 0:
            return fail("outside the image")
        dxg, dyg = xx - xg, yy - yg
        r0 = np.hypot(dxg, dyg)
        # local background (a plane, for the steep fall near the centre) and the
        # per-pixel noise, from an annulus outside the spot
        ann = ok & (r0 >= 3 * s + 1.5) & (r0 <= 3 * s + 5.5)
        if ann.sum() < 8:
            return fail("too few usable background pixels around it")
        plane, noise = _annulus_plane(dxg[ann], dyg[ann], win[ann])
        bgmap = plane[0] + plane[1] * dxg + plane[2] * dyg

        # intensity-weighted centroid inside 2 s (background subtracted, negatives clipped)
        inner = ok & (r0 <= max(2.0 * s, 1.5))
        wts = np.clip(win[inner] - bgmap[inner], 0, None)
        if wts.sum() <= 0:
            return fail("nothing above the local background")
        xcen = float((wts * xx[inner]).sum() / wts.sum())
        ycen = float((wts * yy[inner]).sum() / wts.sum())

        fit = None
        if self.method == "gaussian":
            box = ok & (np.abs(dxg) <= self.fit_half) & (np.abs(dyg) <= self.fit_half)
            vals = win[box]
            centre = ok & (r0 <= 1.5)
            a0 = float((win - bgmap)[centre].max()) if centre.any() else float(wts.max())
            start = np.array([xg, yg, max(a0, noise), s, plane[0], plane[1], plane[2]])
            fit = _fit_gaussian(xx[box], yy[box], vals, start, xg, yg)
            if fit is not None:
                p, cov, resid = fit
                moved = math.hypot(p[0] - xg, p[1] - yg)
                if not (p[2] > 0 and 0.3 <= p[3] <= max(3.0 * s, 3.0) and moved <= self.fit_half):
                    fit = None
        if fit is not None:
            p, cov, resid = fit
            x, y, amp, width = float(p[0]), float(p[1]), float(p[2]), float(p[3])
            sx, sy = float(np.sqrt(cov[0, 0])), float(np.sqrt(cov[1, 1]))
            amp_se = float(np.sqrt(cov[2, 2]))
            method = "gaussian"
        else:
            if self.method == "gaussian" and strict:
                # a requested fit that fails means there is no spot-shaped signal here
                return fail("the Gaussian fit did not converge to a spot")
            x, y = xcen, ycen
            dxx, dyy = xx[inner] - x, yy[inner] - y
            tot = float(wts.sum())
            # centroid variance: sum over pixels of (x_i - x)^2 * noise^2 / total^2
            sx = float(noise * np.sqrt((dxx**2).sum()) / tot)
            sy = float(noise * np.sqrt((dyy**2).sum()) / tot)
            width = float(np.sqrt(max((wts * (dxx**2 + dyy**2)).sum() / tot / 2.0, 0.09)))
            pk = ok & (np.hypot(xx - x, yy - y) <= 1.0)
            amp = float((win - bgmap)[pk].max()) if pk.any() else float(wts.max())
            amp_se = noise
            method = "centroid"

        # aperture photometry around the refined position, background from the annulus plane
        r = np.hypot(xx - x, yy - y)
        r_ap = 3.0 * float(np.clip(width, 0.5 * s, 2.0 * s))
        ap = r <= r_ap
        ap_ok = ap & ok
        n_ap = int(ap.sum())
        intensity = float((win[ap_ok] - bgmap[ap_ok]).sum())
        var_px = noise**2
        if fit is not None:
            missing = ap & ~ok
            if missing.any():
                # excluded aperture pixels: count the fitted spot there
                intensity += float((amp * np.exp(-(r[missing] ** 2) / (2 * width**2))).sum())
            in_ap = np.hypot(xx[box] - x, yy[box] - y) <= r_ap
            if in_ap.any():
                # the fit residuals inside the aperture include the spot's own shot noise
                var_px = max(var_px, float(np.mean(resid[in_ap] ** 2)))
        n_ann = int(ann.sum())
        # aperture noise plus the error of the background level (a median/plane of n_ann pixels)
        intensity_sigma = math.sqrt(n_ap * var_px + n_ap**2 * (math.pi / 2) * noise**2 / n_ann)
        if strict and not amp / max(amp_se, 1e-300) >= 3.0:
            # a peak less than 3 standard errors above the background is no spot (common practice)
            return fail(f"peak {amp:.3g} is not significant (standard error {amp_se:.3g})")
        return Spot(
            x=x,
            y=y,
            sigma_x=sx,
            sigma_y=sy,
            intensity=intensity,
            intensity_sigma=float(intensity_sigma),
            background=float(plane[0] + plane[1] * (x - xg) + plane[2] * (y - yg)),
            peak=amp,
            snr=float(amp / noise),
            width_px=width,
            method=method,
        )


def _annulus_plane(dx: np.ndarray, dy: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, float]:
    """Plane ``c0 + c1·dx + c2·dy`` through background pixels, with one 3-sigma
    clip of outliers (a neighbouring spot), and the robust noise of the residuals."""
    a = np.stack([np.ones_like(dx), dx, dy], axis=1)
    keep = np.ones(len(v), bool)
    coef = np.array([float(np.median(v)), 0.0, 0.0])
    noise = 0.0
    for _ in range(2):
        if keep.sum() < 4:
            break
        coef, *_ = np.linalg.lstsq(a[keep], v[keep], rcond=None)
        res = v - a @ coef
        med = float(np.median(res[keep]))
        noise = float(_MAD_TO_SIGMA * np.median(np.abs(res[keep] - med)))
        if not noise > 0:
            break
        keep = np.abs(res - med) <= 3 * noise
    if not noise > 0:
        noise = float(np.std(v - a @ coef)) or 1e-12
    return coef, noise


# ----------------------------------------------------------------------------- spot size


def _estimate_sigma(
    img: np.ndarray,
    bad: np.ndarray | None,
    sat: np.ndarray | None,
    sat_level: float | None,
    centre_xy: np.ndarray | None,
) -> float:
    """Spot width from free-width Gaussian fits of the brightest spots near the centre.

    Works on a crop of at most 512 × 512 pixels around the central beam (where
    the strongest spots are), detects with a 2-pixel matched filter (wide
    enough for widths of 1–4 px), fits up to 25 of the strongest candidates
    and returns the median fitted width; 2 px when nothing usable is found.
    """
    rows, cols = img.shape
    s0 = _DEFAULT_SIGMA_PX
    centre, core = _central_core(img, bad, sat, sat_level, centre_xy, s0)
    cx, cy = (cols / 2, rows / 2) if centre is None else (float(centre[0]), float(centre[1]))
    half = 256
    x0 = int(np.clip(round(cx) - half, 0, max(0, cols - 2 * half)))
    y0 = int(np.clip(round(cy) - half, 0, max(0, rows - 2 * half)))
    x1, y1 = min(cols, x0 + 2 * half), min(rows, y0 + 2 * half)
    sub = np.ascontiguousarray(img[y0:y1, x0:x1])
    sbad = None if bad is None else np.ascontiguousarray(bad[y0:y1, x0:x1])
    k = _Kernel.for_sigma(s0, sub.shape)
    c_loc = None if centre is None else centre - np.array([x0, y0])
    cands = _detect(
        sub, sbad, k, z_min=20.0, separation=3 * s0, centre_xy=c_loc,
        exclude_radius=_exclusion(core, k) if core > 0 else 0.0, beam=_beam_disc(c_loc, core, k),
    )
    if len(cands.x) == 0:
        return s0
    ref = _Refiner(sub, sbad, s0, "gaussian")
    widths = []
    for i in range(min(25, len(cands.x))):
        sp = ref.refine(float(cands.xs[i]), float(cands.ys[i]))
        if sp is not None and sp.method == "gaussian" and sp.snr >= 10:
            widths.append(sp.width_px)
    if len(widths) < 3:
        return s0
    return float(np.clip(np.median(widths), 0.5, 8.0))


def _significance_floor(area_px: int, s: float, false_per_image: float = _FALSE_PEAKS_PER_IMAGE) -> float:
    """The lowest significance a detection may have: 5 sigma, or more in a large image.

    Pure noise smoothed by a Gaussian of sigma ``s`` has on average
    ``A/FWHM² · 4 ln2 (2π)^(−3/2) · z · exp(−z²/2)`` peaks above ``z`` in an
    area ``A`` (FWHM = 2.355 s; the Euler-characteristic density of a smooth
    Gaussian field, Worsley et al. 1996, from memory). The floor is where that
    falls to ``false_per_image``.
    """
    resels = area_px / (2.3548 * s) ** 2
    coef = resels * 4 * math.log(2) * (2 * math.pi) ** -1.5

    def expected(z):
        return coef * z * math.exp(-z * z / 2)

    z = _MIN_SIGNIFICANCE
    while expected(z) > false_per_image and z < 10:
        z += 0.05
    return z


def _exclusion(core_radius: float, k: _Kernel) -> float:
    """Radius around the centre where the beam's core gives no spots: the core and
    the detection filter's reach beyond its edge."""
    return core_radius + 2 * k.s + k.cell


def _beam_disc(centre, core_radius: float, k: _Kernel):
    """(x, y, radius) within which the background follows the central beam, or None."""
    if centre is None or core_radius <= 0:
        return None
    return (float(centre[0]), float(centre[1]), core_radius + k.reach)


# ----------------------------------------------------------------------------- public API


def find_spots(
    image,
    *,
    mask=None,
    centre_xy=None,
    spot_sigma_px: float | None = None,
    min_snr: float = 5.0,
    min_separation_px: float | None = None,
    exclude_radius_px: float | None = None,
    max_spots: int = 1000,
    refine: str = "gaussian",
    progress: ProgressFn | None = None,
    should_stop: StopFn | None = None,
) -> tuple[Spot, ...]:
    """Find and refine the diffraction spots of an image.

    Parameters
    ----------
    image : (rows, cols) array
        The diffraction pattern (any real dtype).
    mask : (rows, cols) bool array, optional
        True for excluded pixels (beam stop, dead pixels). Saturated pixels
        (three or more pixels sharing the image maximum) are excluded too.
    centre_xy : [x, y], optional
        Pattern centre, pixels. Without it the central beam is located as
        the brightest broad feature.
    spot_sigma_px : float, optional
        Gaussian sigma of the spots, pixels. Estimated from the brightest
        spots when not given.
    min_snr : float
        Minimum peak signal-to-noise ratio (peak height over the per-pixel
        noise, as :attr:`Spot.snr`). Candidates are kept when their
        matched-filter estimate comes within five standard errors and 15 %
        of it (so a spot at exactly ``min_snr`` is almost never missed; some
        fainter ones are found too), and in any case only 5σ detections of
        the filtered image.
    min_separation_px : float, optional
        Two maxima closer than this count as one spot (default 3 sigma, at
        least 3 px).
    exclude_radius_px : float, optional
        No spots within this radius of the centre (``centre_xy``, or the
        central beam found in the image). Default: the radius of the central
        beam's bright (or saturated) core plus the filter's reach; 0 when no
        central beam is visible (e.g. behind the beam stop, whose mask then
        does the job).
    max_spots : int
        Keep at most this many, the most intense.
    refine : {"gaussian", "centroid"}
        Sub-pixel method. ``"gaussian"`` falls back to the centroid for a spot
        whose fit fails.
    progress : callable(done, total), optional
        Called during the refinement.
    should_stop : callable() -> bool, optional
        Polled between stages and during the refinement; returning True
        raises :class:`SaedkitError` ``"spot search cancelled"``.

    Returns
    -------
    tuple of Spot
        Sorted by decreasing integrated intensity.

    Raises
    ------
    InputError
        Bad image, mask or option.
    SaedkitError
        Cancelled through ``should_stop``.

    Notes
    -----
    The detection image is ``R = G_s * I − b`` (``G_s`` a Gaussian of sigma
    ``s``, the matched filter; ``b`` a smooth background that leaves the
    spots out; see the module notes). A spot of peak ``A`` gives
    ``R = A·k`` with ``k = Σ G_s·g ≈ 1/2`` (``g`` a unit Gaussian spot of the
    same width), and white noise of per-pixel sigma ``σ`` gives
    ``σ_R = σ·‖G_s‖ ≈ σ/(2√π s)``; so ``R/k`` estimates the peak, ``R/σ_R`` is
    the significance [1]_, and the peak SNR is estimated with the standard
    error ``‖G_s‖/k``. The position uncertainty comes from the Gaussian fit's
    heteroscedasticity-consistent covariance ``(JᵀJ)⁻¹ Jᵀ diag(r²/(1−h)²) J
    (JᵀJ)⁻¹`` (``r`` the residuals, ``h`` the leverages), which allows for the
    shot noise of the spot itself [4]_. The intensity is summed in a disc of
    radius 3 × the fitted width (98.9 % of a Gaussian) over a planar
    background fitted to an annulus around it; its uncertainty combines the
    pixel noise in the disc (from the fit residuals) and the uncertainty of
    the background level.

    Spots whose footprint is cut by the mask are measured on their usable
    pixels only; a candidate there whose Gaussian fit fails is dropped (a
    centroid of a cut spot is biased).

    References
    ----------
    .. [1] W. K. Pratt, *Digital Image Processing*, 4th ed. (2007), matched filters.
    .. [4] J. G. MacKinnon and H. White, J. Econometrics 29, 305 (1985).

    Examples
    --------
    >>> from saedkit.core.simulation.render import render_pattern
    >>> import numpy as np
    >>> img, truth = render_pattern((256, 256), (128, 128), spot_offsets_xy=[[40, 0], [-40, 0]],
    ...                             spot_intensity=2000, rng=np.random.default_rng(0))
    >>> spots = find_spots(img, centre_xy=(128, 128))
    >>> len(spots)
    2
    """
    min_snr = check_positive("min_snr", min_snr)
    if refine not in ("gaussian", "centroid"):
        raise InputError(f"refine must be 'gaussian' or 'centroid', got {refine!r}")
    if isinstance(max_spots, bool) or not isinstance(max_spots, (int, np.integer)) or max_spots < 1:
        raise InputError(f"max_spots must be an integer >= 1, got {max_spots!r}")
    c = None if centre_xy is None else check_xy("centre_xy", centre_xy)
    if spot_sigma_px is not None:
        spot_sigma_px = check_positive("spot_sigma_px", spot_sigma_px)
    if min_separation_px is not None:
        min_separation_px = check_positive("min_separation_px", min_separation_px)
    if exclude_radius_px is not None:
        exclude_radius_px = float(exclude_radius_px)
        if not math.isfinite(exclude_radius_px) or exclude_radius_px < 0:
            raise InputError(f"exclude_radius_px must be a finite number >= 0, got {exclude_radius_px!r}")
    img, bad, sat, sat_level = _prepare(image, mask)
    _check_stop(should_stop)
    # saturated pixels the user's mask covers (a doubled gap line clipped in the beam)
    # are no place for a spot
    user = _check_mask(mask, img.shape)
    sat_free = sat if sat is None or user is None else sat & ~user

    s = spot_sigma_px if spot_sigma_px is not None else _estimate_sigma(img, bad, sat, sat_level, c)
    _check_stop(should_stop)
    k = _Kernel.for_sigma(s, img.shape)
    c_found, core = _central_core(img, bad, sat, sat_level, c, s)
    beam = _beam_disc(c_found, core, k)
    if exclude_radius_px is None:
        excl = _exclusion(core, k) if core > 0 else 0.0
    else:
        excl = exclude_radius_px
        if c_found is None and excl > 0:
            c_found = np.array([(img.shape[1] - 1) / 2, (img.shape[0] - 1) / 2])
    # significance needed for a spot whose peak SNR could be min_snr (see Notes)
    se = k.norm / k.faint_gain  # standard error of the peak-SNR estimate of a faint spot
    floor = _significance_floor(img.size if bad is None else int(img.size - bad.sum()), s)
    z_min = max(floor, (1 - _SNR_ALLOWANCE_REL) * min_snr / se - _SNR_ALLOWANCE_SE)
    sep = min_separation_px if min_separation_px is not None else max(3.0, 3.0 * s)
    cands = _detect(
        img, bad, k, z_min=z_min, separation=sep, centre_xy=c_found, exclude_radius=excl,
        beam=beam, should_stop=should_stop, allowed=sat_free,
    )
    _check_stop(should_stop)
    # pixels where no spot may be: the mask (saturated pixels are excluded from the
    # fits but may hold a spot, which is kept and flagged)
    hard = bad if sat_free is None or bad is None else (bad & ~sat_free)
    if c is not None:
        excl = max(excl, 3.0 * s)  # the given centre is the direct beam, never a spot
    edge_px = max(2.0, 2.0 * s)
    rows, cols = img.shape

    limit = min(len(cands.x), max(2 * max_spots, max_spots + 50))
    ref = _Refiner(img, bad, s, refine)
    spots: list[Spot] = []
    step = max(1, limit // 100)
    for i in range(limit):
        if i % 16 == 0:
            _check_stop(should_stop)
        sp = ref.refine(float(cands.xs[i]), float(cands.ys[i]))
        if sp is not None and (hard is None or not _is_bad(hard, sp.x, sp.y)):
            if cands.noise is not None:
                # the peak over the noise model measured on the whole image (Poisson plus
                # read noise against the local background), steadier than an annulus MAD
                iy = np.array([min(max(int(round(sp.y)), 0), rows - 1)])
                ix = np.array([min(max(int(round(sp.x)), 0), cols - 1)])
                px_sigma = float(cands.noise.pixel_sigma_at(iy, ix, np.array([sp.background]))[0])
                if px_sigma > 0:
                    sp = replace(sp, snr=float(sp.peak / px_sigma))
            # a centroid (no Gaussian fit) must still show the detection limit at the
            # refined position, and is not trusted where the mask cuts the spot
            keep = sp.method == "gaussian" or (sp.snr >= z_min * se and not cands.edge[i])
            # listed spots pass min_snr by the measure that is reported
            keep = keep and sp.snr >= min_snr
            # never at the image edge nor in the direct beam's core and tail
            keep = keep and edge_px <= sp.x <= cols - 1 - edge_px and edge_px <= sp.y <= rows - 1 - edge_px
            if keep and c_found is not None and excl > 0:
                keep = math.hypot(sp.x - c_found[0], sp.y - c_found[1]) > excl
            if keep and not _touches(sat_free, sp.x, sp.y, 2.0 * sp.width_px) and _elongation(img, bad, sp, s) > _MAX_ELONGATION:
                keep = False  # a maximum along a line (Kikuchi line, streak), not a spot
            if keep and sp.width_px > _MAX_WIDTH_RATIO * s and not _touches(sat, sp.x, sp.y, 2.0 * sp.width_px):
                keep = False  # far wider than the pattern's spots: a diffuse patch, not a spot
            if keep:
                if _touches(sat_free, sp.x, sp.y, max(1.5, 2.0 * sp.width_px)):
                    sp = replace(sp, saturated=True)
                spots.append(sp)
        if progress is not None and ((i + 1) % step == 0 or i + 1 == limit):
            progress(i + 1, limit)
    spots = _dedupe(spots, sep)
    spots.sort(key=lambda sp: -sp.intensity)
    return tuple(spots[:max_spots])


# The largest ratio of the principal second moments of a spot's light (above its
# local background and noise, within 4 sigma): a round spot gives about 1; the
# maximum of a Kikuchi line or streak, which runs through the whole window, 3 or more.
_MAX_ELONGATION = 3.0
# A spot's fitted width may be at most this times the pattern's spot width (every
# spot is an image of the same beam convergence and point-spread: common practice).
_MAX_WIDTH_RATIO = 2.2


def _elongation(img: np.ndarray, bad: np.ndarray | None, sp: Spot, s: float) -> float:
    """Ratio of the larger to the smaller principal second moment of the light of ``sp``.

    The light is what stands more than 3 noise SDs and a quarter of the spot's
    height above its local background after a 1 px Gaussian smoothing (so a
    faint line under a bright spot does not join it), in the connected region around the spot's pixel within a disc
    of radius max(5, 4 s) (so isolated noise pixels do not count); each moment
    carries the 1/12 px² of a pixel's own extent. A region no longer than
    2 s along its major axis counts as round (1.0): a faint spot is a few pixels.
    Light that runs on to the edge of the disc (a line, a crossing of two lines)
    gives infinity.
    """
    rows, cols = img.shape
    rad = max(5.0, 4.0 * s)
    x0, x1 = max(0, int(sp.x - rad)), min(cols, int(sp.x + rad) + 2)
    y0, y1 = max(0, int(sp.y - rad)), min(rows, int(sp.y + rad) + 2)
    yy, xx = np.mgrid[y0:y1, x0:x1]
    dx, dy = xx - sp.x, yy - sp.y
    inside = dx * dx + dy * dy <= rad * rad
    if bad is not None:
        inside &= ~bad[y0:y1, x0:x1]
    raw = img[y0:y1, x0:x1].astype(float)
    rr = np.hypot(dx, dy)
    ring = inside & (rr >= rad - 2.0)
    if ring.sum() < 8:
        return 1.0
    # the local background as a plane through the rim (a line crossing it is clipped)
    plane, _ = _annulus_plane(dx[ring], dy[ring], raw[ring])
    noise = sp.peak / sp.snr if sp.snr > 0 else 0.0  # the rim's own scatter includes the lines
    win = raw - (plane[0] + plane[1] * dx + plane[2] * dy)
    if bad is not None:
        win = np.where(bad[y0:y1, x0:x1], 0.0, win)
    # smoothed by a 1 px Gaussian, which keeps white noise at 1/(2√π) of its SD:
    # a faint line then stays connected along its length
    smooth = ndi.gaussian_filter(win, 1.0, mode="nearest")
    iy, ix = int(round(sp.y)) - y0, int(round(sp.x)) - x0
    if not (0 <= iy < win.shape[0] and 0 <= ix < win.shape[1]):
        return 1.0
    # the light: above 3 noise SDs of the smoothed image and above a quarter of the
    # spot's own height, so a faint line under a bright spot does not join it
    level = max(3.0 * noise / (2.0 * math.sqrt(math.pi)), 0.25 * float(smooth[iy, ix]))
    excess = smooth - level
    above = (excess > 0) & inside
    lab, _ = ndi.label(above)
    if lab[iy, ix] == 0:
        return 1.0
    region = lab == lab[iy, ix]
    if (rr[region] > rad - 1.5).any():
        return float("inf")  # the light runs on out of the window: a line, a crossing of lines
    w = np.where(region, excess, 0.0)
    tot = float(w.sum())
    mx, my = float((w * dx).sum() / tot), float((w * dy).sum() / tot)
    ex, ey = dx - mx, dy - my
    cxx = float((w * ex * ex).sum() / tot) + 1 / 12
    cyy = float((w * ey * ey).sum() / tot) + 1 / 12
    cxy = float((w * ex * ey).sum() / tot)
    tr, det = cxx + cyy, cxx * cyy - cxy * cxy
    disc = math.sqrt(max(tr * tr / 4 - det, 0.0))
    lo, hi = tr / 2 - disc, tr / 2 + disc
    if math.sqrt(hi) <= 2.0 * s:
        return 1.0
    return float(hi / max(lo, 1 / 12))


def _touches(mask: np.ndarray | None, x: float, y: float, radius: float) -> bool:
    """True when a pixel of ``mask`` lies within ``radius`` of (x, y)."""
    if mask is None:
        return False
    rows, cols = mask.shape
    x0, x1 = max(0, int(x - radius)), min(cols, int(x + radius) + 2)
    y0, y1 = max(0, int(y - radius)), min(rows, int(y + radius) + 2)
    if x0 >= x1 or y0 >= y1:
        return False
    yy, xx = np.mgrid[y0:y1, x0:x1]
    near = (xx - x) ** 2 + (yy - y) ** 2 <= radius * radius
    return bool((mask[y0:y1, x0:x1] & near).any())


def _is_bad(bad: np.ndarray, x: float, y: float) -> bool:
    ix, iy = int(round(x)), int(round(y))
    if not (0 <= iy < bad.shape[0] and 0 <= ix < bad.shape[1]):
        return True
    return bool(bad[iy, ix])


def _dedupe(spots: list[Spot], sep: float) -> list[Spot]:
    """Two candidates refined onto the same spot: keep the one with the higher SNR."""
    if len(spots) < 2:
        return spots
    xy = spots_xy_array(spots)
    pairs = cKDTree(xy).query_pairs(min(sep, 2.0), output_type="ndarray")
    if len(pairs) == 0:
        return spots
    drop = set()
    for i, j in pairs:
        drop.add(int(j) if spots[i].snr >= spots[j].snr else int(i))
    return [sp for n, sp in enumerate(spots) if n not in drop]


def refine_spot(
    image,
    xy,
    *,
    mask=None,
    spot_sigma_px: float = 2.0,
    window_px: float | None = None,
) -> Spot:
    """Refine one spot near a given position.

    Parameters
    ----------
    image : (rows, cols) array
    xy : [x, y]
        Starting position, pixels (within about one spot width of the spot).
    mask : (rows, cols) bool array, optional
        True for excluded pixels.
    spot_sigma_px : float
        Starting Gaussian sigma, pixels (the fit frees it).
    window_px : float, optional
        Half-width of the fitted window, pixels (default 3 sigma, at least 3).

    Returns
    -------
    Spot

    Raises
    ------
    InputError
        Bad arguments.
    FitError
        There is no spot there: the fit fails, runs out of the window, or its
        peak is not 3 standard errors above the background.
    """
    arr = _check_numeric_image(image)
    p = check_xy("xy", xy)
    s = check_positive("spot_sigma_px", spot_sigma_px)
    m = _check_mask(mask, arr.shape)
    rows, cols = arr.shape
    if not (-0.5 <= p[0] <= cols - 0.5 and -0.5 <= p[1] <= rows - 0.5):
        raise InputError(f"xy must lie inside the image ({cols} x {rows}), got {list(p)}")
    half_fit = max(3, int(math.ceil(3.0 * s)))
    if window_px is not None:
        half_fit = max(2, int(math.ceil(check_positive("window_px", window_px))))
    half = max(int(math.ceil(6.0 * s)) + 6, half_fit + 6)
    ix, iy = int(round(p[0])), int(round(p[1]))
    x0, x1 = max(0, ix - half), min(cols, ix + half + 1)
    y0, y1 = max(0, iy - half), min(rows, iy + half + 1)
    sub_img, sub_bad, _ = _prepare_crop(arr, m, x0, x1, y0, y1)
    ref = _Refiner(sub_img, sub_bad, s, "gaussian")
    ref.fit_half = half_fit
    ref.half = half
    spot = ref.refine(p[0] - x0, p[1] - y0, strict=True)
    return _shift(spot, x0, y0)


def _prepare_crop(arr: np.ndarray, m: np.ndarray | None, x0, x1, y0, y1):
    sub = arr[y0:y1, x0:x1]
    img = sub.astype(np.float32)
    bad = None if m is None else m[y0:y1, x0:x1].copy()
    if arr.dtype.kind == "f":
        nf = ~np.isfinite(img)
        if nf.any():
            bad = nf if bad is None else bad | nf
    level = _saturation_level(arr)
    if level is not None:
        s = sub >= level
        if s.any():
            bad = s if bad is None else bad | s
    if bad is not None:
        img[bad] = 0.0
    return img, bad, None


def _shift(spot: Spot, x0: float, y0: float) -> Spot:
    return replace(spot, x=spot.x + x0, y=spot.y + y0)


def snap_to_spot(
    image,
    click_xy,
    *,
    mask=None,
    search_radius_px: float = 10.0,
    spot_sigma_px: float | None = None,
) -> Spot | None:
    """Turn a click near a spot into the refined spot.

    Parameters
    ----------
    image : (rows, cols) array
    click_xy : [x, y]
        Where the user clicked, pixels.
    mask : (rows, cols) bool array, optional
        True for excluded pixels.
    search_radius_px : float
        Look for a spot within this distance of the click.
    spot_sigma_px : float, optional
        Spot sigma for the matched filter (default 2 px; the fit frees the width).

    Returns
    -------
    Spot or None
        The strongest significant spot (a 5σ detection of the matched-filter
        image, noise measured around the click) within the radius, refined;
        None when there is none.

    Raises
    ------
    InputError
        Bad arguments.
    """
    arr = _check_numeric_image(image)
    p = check_xy("click_xy", click_xy)
    radius = check_positive("search_radius_px", search_radius_px)
    s = _DEFAULT_SIGMA_PX if spot_sigma_px is None else check_positive("spot_sigma_px", spot_sigma_px)
    m = _check_mask(mask, arr.shape)
    rows, cols = arr.shape
    k = _Kernel.for_sigma(s, (256, 256))
    half = int(math.ceil(radius + 2 * k.reach + 6 * s + 8))
    ix, iy = int(round(p[0])), int(round(p[1]))
    x0, x1 = max(0, ix - half), min(cols, ix + half + 1)
    y0, y1 = max(0, iy - half), min(rows, iy + half + 1)
    if x1 - x0 < 8 or y1 - y0 < 8:
        return None
    img, bad, _ = _prepare_crop(arr, m, x0, x1, y0, y1)
    if bad is not None and bad.all():
        return None
    cands = _detect(
        img, bad, k, z_min=_MIN_SIGNIFICANCE, separation=max(3.0, 3 * s), centre_xy=None,
        exclude_radius=0.0,
    )
    cx, cy = p[0] - x0, p[1] - y0
    near = np.hypot(cands.xs - cx, cands.ys - cy) <= radius
    if not near.any():
        return None
    best = int(np.flatnonzero(near)[np.argmax(cands.z[near])])
    ref = _Refiner(img, bad, s, "gaussian")
    try:
        spot = ref.refine(float(cands.xs[best]), float(cands.ys[best]), strict=True)
    except FitError:
        return None
    if math.hypot(spot.x - cx, spot.y - cy) > radius + 2 * s:
        return None
    return _shift(spot, x0, y0)
