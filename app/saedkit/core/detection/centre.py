"""The pattern centre (position of the undiffracted beam).

Ways to find it: Friedel symmetry of a spot pattern (the intensity at c + v
equals that at c − v, so the image correlates best with its point reflection
through c; and the midpoints of Friedel pairs g, −g all fall on c); the common
centre of ring ellipses (:mod:`saedkit.core.detection.rings`); or set by hand.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft as sp_fft
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from saedkit.core._validate import check_finite, check_points_xy, check_positive, check_xy
from saedkit.core.errors import FitError, InputError

__all__ = [
    "CentreResult",
    "manual_centre",
    "find_centre_friedel",
    "calculate_centre_from_pairs",
    "find_centre_spots",
]


@dataclass(frozen=True)
class CentreResult:
    """A pattern centre with its standard uncertainty.

    Parameters
    ----------
    x, y : float
        Centre in image pixels (x = column, y = row).
    sigma_x, sigma_y : float
        Standard uncertainties, pixels.
    method : str
        How it was found: ``"friedel-correlation"``, ``"friedel-pairs"``,
        ``"rings"`` or ``"manual"``.
    n_used : int
        Number of pairs, rings or points behind the estimate (0 when manual).
    """

    x: float
    y: float
    sigma_x: float
    sigma_y: float
    method: str
    n_used: int = 0

    @property
    def xy(self) -> np.ndarray:
        """The centre as an array ``[x, y]``."""
        return np.array([self.x, self.y])

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return {
            "centre_px": [self.x, self.y],
            "centre_sigma_px": [self.sigma_x, self.sigma_y],
            "method": self.method,
            "n_used": self.n_used,
        }


def manual_centre(x: float, y: float, *, sigma_px: float = 1.0) -> CentreResult:
    """A centre set by hand, e.g. by a click.

    Parameters
    ----------
    x, y : float
        Centre in pixels.
    sigma_px : float
        The uncertainty to carry (a click is good to about a pixel: common practice).
    """
    return CentreResult(
        check_finite("x", x), check_finite("y", y), float(sigma_px), float(sigma_px), "manual", 0
    )


# ----------------------------------------------------------------------------- Friedel symmetry

_SECTORS = 8  # angular sectors (mod 180°) for the jackknife uncertainty
_MAX_FFT_SIDE = 1024  # larger images are binned for a coarse search, then cropped
# the correlation peak must stand this many robust SD above the rest of the map
_MIN_PROMINENCE = 8.0
# uncertainty common to all sectors, added to the jackknife (see _refine_symmetry)
_SHARED_ERROR_PX = 0.01


def _symmetry_features(img: np.ndarray, valid: np.ndarray, small: float, large: float) -> np.ndarray:
    """Band-passed, log-compressed image for the symmetry search; 0 where unusable.

    The band-pass (Gaussian of ``small`` minus Gaussian of ``large`` pixels,
    both normalised convolutions over the usable pixels) removes the
    radially falling background, which carries little position
    information; the compression ``sign(d)·log(1 + |d|/3σ)`` (σ the robust
    noise of ``d``) lets many faint pairs count as well as a few bright ones.
    """
    w = valid.astype(np.float64)
    a = img.astype(np.float64) * w
    with np.errstate(divide="ignore", invalid="ignore"):
        gw_s = ndi.gaussian_filter(w, small)
        d = ndi.gaussian_filter(a, small) / gw_s - ndi.gaussian_filter(a, large) / ndi.gaussian_filter(w, large)
    use = valid & (gw_s > 0.5) & np.isfinite(d)
    if use.sum() < 16:
        raise FitError("too few usable pixels to find the centre")
    vals = d[use]
    sigma = 1.4826 * float(np.median(np.abs(vals - np.median(vals))))
    if not sigma > 0:
        sigma = float(np.std(vals)) or 1.0
    out = np.zeros(img.shape)
    out[use] = np.sign(vals) * np.log1p(np.abs(vals) / (3.0 * sigma))
    return out


def _symmetry_map(f: np.ndarray, w: np.ndarray):
    """Masked normalised correlation of ``f`` with its point reflection, for every 2c.

    For a shift ``t`` (array index space) the image is compared with
    ``f(t − x)``, its reflection through ``c = t/2``. With the overlap sums
    ``M = w⋆w``, ``S = f⋆w``, ``N = f⋆f``, ``Q = f²⋆w`` (``⋆`` the
    convolution, done by FFT), the Pearson correlation over the overlap is
    ``(N − S²/M) / (Q − S²/M)`` [1]_. Returns (ncc, overlap), both of shape
    (2·rows − 1, 2·cols − 1).
    """
    rows, cols = f.shape
    out = (2 * rows - 1, 2 * cols - 1)
    shape = (sp_fft.next_fast_len(out[0], real=True), sp_fft.next_fast_len(out[1], real=True))
    ff = sp_fft.rfft2(f, shape)
    fw = sp_fft.rfft2(w, shape)
    fq = sp_fft.rfft2(f * f, shape)

    def back(spec):
        return sp_fft.irfft2(spec, shape)[: out[0], : out[1]]

    n = back(ff * ff)
    s = back(ff * fw)
    m = back(fw * fw)
    q = back(fq * fw)
    with np.errstate(divide="ignore", invalid="ignore"):
        s2m = s * s / m
        ncc = (n - s2m) / (q - s2m)
    ncc[~np.isfinite(ncc) | (m < 0.5)] = -np.inf
    return ncc, m


def _vertex_3x3(v: np.ndarray) -> tuple[float, float] | None:
    """Sub-pixel maximum (dy, dx) of a 3×3 patch: least-squares quadratic on the log
    (exact for a Gaussian peak) when all values are positive, else on the values."""
    if not np.all(np.isfinite(v)):
        return None
    z = np.log(v) if np.all(v > 0) else v
    yy, xx = np.mgrid[-1:2, -1:2]
    a = np.stack([np.ones(9), xx.ravel(), yy.ravel(), xx.ravel() ** 2, (xx * yy).ravel(), yy.ravel() ** 2], 1)
    c, *_ = np.linalg.lstsq(a, z.ravel(), rcond=None)
    hess = np.array([[2 * c[3], c[4]], [c[4], 2 * c[5]]])
    if not (hess[0, 0] < 0 and np.linalg.det(hess) > 0):
        return None
    dx, dy = np.linalg.solve(hess, -c[1:3])
    if abs(dx) > 1 or abs(dy) > 1:
        return None
    return float(dy), float(dx)


def _refine_symmetry(img: np.ndarray, valid: np.ndarray, start_xy: np.ndarray):
    """Least-squares centre of point symmetry, sub-pixel, with a sector jackknife.

    Minimises ``Σ [f(x) − f(2c − x)]²`` over the pixels where both ``x`` and
    ``2c − x`` are usable, by Gauss–Newton, with ``f(2c − x)`` interpolated by
    cubic splines (so ``c`` is not tied to the pixel grid, unlike the
    correlation peak). Here ``f = asinh((G₁*I − m)/3σ)``, the lightly smoothed
    image compressed like a logarithm (``m`` a low percentile, ``σ`` the
    noise); nothing is subtracted, since the diffuse background is symmetric
    too, and only pixels whose smoothing footprint is clear of the mask are
    used, so ``f`` does not depend on the mask's pixel outline (which is not
    symmetric about a centre off the pixel grid). Only pixels with structure,
    or facing structure, enter. The uncertainty is the jackknife over eight
    angular sectors (mod 180°, so a pair stays together), each left out in
    turn, linearised at the solution [2]_.

    Returns (cx, cy, sigma_x, sigma_y) in the array's pixel coordinates.
    """
    rows, cols = img.shape
    usable = ndi.binary_erosion(valid, structure=np.ones((3, 3), bool), iterations=4, border_value=0)
    if usable.sum() < 100:
        raise FitError("too few usable pixels to find the centre")
    sm = ndi.gaussian_filter(np.where(valid, img, 0.0).astype(np.float64), 1.0)
    vals = sm[usable]
    base = float(np.percentile(vals, 10))
    hp = sm - ndi.gaussian_filter(sm, 8.0)
    noise = 1.4826 * float(np.median(np.abs(hp[usable] - np.median(hp[usable])))) or 1.0
    f = np.arcsinh((sm - base) / (3.0 * noise))
    structure = ndi.binary_dilation(np.abs(hp) > 3 * noise, iterations=2) & usable
    c = np.asarray(start_xy, dtype=float).copy()
    # reflected structure at the start, so that a pixel facing a spot enters too
    yy, xx = np.nonzero(usable)
    ry0 = np.rint(2 * c[1] - yy).astype(int)
    rx0 = np.rint(2 * c[0] - xx).astype(int)
    inside0 = (ry0 >= 0) & (ry0 < rows) & (rx0 >= 0) & (rx0 < cols)
    facing = np.zeros(len(yy), bool)
    facing[inside0] = structure[ry0[inside0], rx0[inside0]]
    pick = structure[yy, xx] | facing
    yy, xx = yy[pick].astype(float), xx[pick].astype(float)
    if len(yy) < 50:
        raise FitError("too little structure in the image to find the centre")
    fx = f[yy.astype(int), xx.astype(int)]
    coef = ndi.spline_filter(f, order=3)
    gy, gx = np.gradient(f)
    usable_f = usable.astype(np.float64)
    ang = np.mod(np.arctan2(yy - c[1], xx - c[0]), np.pi)
    labels = np.minimum((ang / np.pi * _SECTORS).astype(np.intp), _SECTORS - 1)

    def terms(cc):
        ry, rx = 2 * cc[1] - yy, 2 * cc[0] - xx
        coords = np.stack([ry, rx])
        ok = (ry >= 0) & (ry <= rows - 1) & (rx >= 0) & (rx <= cols - 1)
        ok &= ndi.map_coordinates(usable_f, coords, order=0, mode="constant") > 0.5
        fr = ndi.map_coordinates(coef, coords, order=3, mode="constant", prefilter=False)
        jx = -2 * ndi.map_coordinates(gx, coords, order=1, mode="constant")
        jy = -2 * ndi.map_coordinates(gy, coords, order=1, mode="constant")
        r = np.where(ok, fx - fr, 0.0)
        jac = np.where(ok[:, None], np.stack([jx, jy], axis=1), 0.0)
        return r, jac, ok

    for _ in range(20):
        r, jac, ok = terms(c)
        if ok.sum() < 50:
            raise FitError("too few pixels face a usable partner to find the centre")
        hess = jac.T @ jac
        try:
            step = -np.linalg.solve(hess, jac.T @ r)
        except np.linalg.LinAlgError:
            raise FitError("the symmetry fit is singular (no structure in one direction)") from None
        step = np.clip(step, -1.0, 1.0)
        c = c + step
        if np.hypot(*step) < 1e-5:
            break
    if np.hypot(*(c - start_xy)) > 2.0:
        raise FitError("the symmetry fit wandered away from the correlation peak")
    r, jac, ok = terms(c)
    hess = jac.T @ jac
    grad = jac.T @ r
    # per-sector parts of the normal equations (additive), for the jackknife
    h_k = np.stack(
        [np.bincount(labels, weights=jac[:, a] * jac[:, b], minlength=_SECTORS) for a, b in ((0, 0), (0, 1), (1, 1))],
        axis=1,
    )
    g_k = np.stack([np.bincount(labels, weights=jac[:, a] * r, minlength=_SECTORS) for a in (0, 1)], axis=1)
    est = []
    for k in range(_SECTORS):
        hk = hess - np.array([[h_k[k, 0], h_k[k, 1]], [h_k[k, 1], h_k[k, 2]]])
        gk = grad - g_k[k]
        try:
            est.append(c - np.linalg.solve(hk, gk))
        except np.linalg.LinAlgError:
            continue
    if len(est) < 3:
        raise FitError("too few independent parts of the pattern to judge the centre's uncertainty")
    e = np.asarray(est)
    kk = len(e)
    var = (kk - 1) / kk * np.sum((e - e.mean(axis=0)) ** 2, axis=0)
    # what all sectors share (the spline interpolation at one sub-pixel phase, the
    # central region) escapes the jackknife: add 0.01 px, about the size of those
    # errors on simulated patterns
    var = var + _SHARED_ERROR_PX**2
    return float(c[0]), float(c[1]), float(np.sqrt(var[0])), float(np.sqrt(var[1]))


def _bin_mean(img: np.ndarray, valid: np.ndarray, b: int):
    rows, cols = img.shape
    ry, rx = rows // b * b, cols // b * b
    w = valid[:ry, :rx].reshape(ry // b, b, rx // b, b).sum(axis=(1, 3), dtype=np.float64)
    s = (img[:ry, :rx] * valid[:ry, :rx]).reshape(ry // b, b, rx // b, b).sum(axis=(1, 3), dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = s / w
    ok = w >= 0.5 * b * b
    return np.where(ok, mean, 0.0), ok


def _peak_in(ncc: np.ndarray, overlap: np.ndarray, centre_guess, radius) -> tuple[int, int, float]:
    """Integer argmax of the correlation where the overlap is at least a quarter of the
    largest, optionally within ``radius`` (in c) of ``centre_guess``; with its prominence
    (robust SDs above the median of the whole map)."""
    allowed = overlap >= 0.25 * overlap.max()
    sample = ncc[allowed & np.isfinite(ncc)]
    if sample.size < 9:
        raise FitError("the image overlaps its reflection too little to find a centre")
    if centre_guess is not None and radius is not None:
        ty, tx = np.mgrid[0 : ncc.shape[0], 0 : ncc.shape[1]]
        allowed &= np.hypot(tx / 2.0 - centre_guess[0], ty / 2.0 - centre_guess[1]) <= radius
    vals = np.where(allowed, ncc, -np.inf)
    if not np.isfinite(vals).any():
        raise FitError("no trial centre within the search region overlaps enough of the image")
    k = int(np.argmax(vals))
    ty, tx = np.unravel_index(k, vals.shape)
    med = float(np.median(sample))
    mad = 1.4826 * float(np.median(np.abs(sample - med))) or 1e-12
    return int(ty), int(tx), (float(vals[ty, tx]) - med) / mad


def find_centre_friedel(
    image,
    *,
    mask=None,
    guess_xy=None,
    search_radius_px: float | None = None,
) -> CentreResult:
    """The pattern centre from the point (Friedel) symmetry of the whole image.

    Parameters
    ----------
    image : (rows, cols) array
        A spot pattern (rings work too).
    mask : (rows, cols) bool array, optional
        True for excluded pixels (beam stop, saturated or dead pixels); they carry
        no weight. Saturated pixels (three or more sharing the maximum) are excluded
        as well.
    guess_xy : [x, y], optional
        Where to look (default: anywhere the image overlaps its reflection by at
        least a quarter).
    search_radius_px : float, optional
        Only consider centres within this distance of ``guess_xy``.

    Returns
    -------
    CentreResult
        ``method="friedel-correlation"``; ``n_used`` is the number of angular
        sectors behind the uncertainty.

    Raises
    ------
    InputError
        Bad arguments.
    FitError
        No clear point symmetry (the correlation peak is not 8 robust standard
        deviations above the rest), or too few usable pixels.

    Notes
    -----
    Kinematically ``I(c + v) = I(c − v)`` (Friedel's law), so the image
    correlates best with its reflection ``I(2c − x)``. The correlation
    ``C(t) = Σ f(x)·f(t − x)`` over all trial ``t = 2c`` is one FFT
    convolution, on a band-passed, log-compressed copy of the image; masked
    pixels are handled by normalising over the overlap of the usable pixels
    [1]_. From that peak (2c to half a pixel), ``c`` is refined by least
    squares: ``Σ [f(x) − f(2c − x)]²`` is minimised by Gauss–Newton with the
    reflection interpolated by cubic splines, on the lightly smoothed,
    log-compressed image, using only pixels clear of the mask. The
    uncertainty is the jackknife spread over eight angular sectors of the
    pattern (each left out in turn) [2]_, plus 0.01 px for what all sectors
    share. Images larger than 1024 px are first searched binned, then on a
    1024 px crop around the coarse centre.

    References
    ----------
    .. [1] D. Padfield, "Masked object registration in the Fourier domain",
       IEEE Trans. Image Process. 21, 2706 (2012).
    .. [2] B. Efron and C. Stein, "The jackknife estimate of variance",
       Ann. Statist. 9, 586 (1981).

    Examples
    --------
    >>> from saedkit.core.simulation.render import render_pattern
    >>> img, truth = render_pattern((256, 256), (120.3, 131.6),
    ...     spot_offsets_xy=[[40, 0], [-40, 0], [0, 45], [0, -45], [40, 45], [-40, -45]],
    ...     spot_intensity=3000, rng=np.random.default_rng(0))
    >>> c = find_centre_friedel(img)
    >>> bool(abs(c.x - 120.3) < 0.3 and abs(c.y - 131.6) < 0.3)
    True
    """
    from saedkit.core.detection.spots import _prepare

    img, bad, _, _ = _prepare(image, mask)
    g = None if guess_xy is None else check_xy("guess_xy", guess_xy)
    radius = None if search_radius_px is None else check_positive("search_radius_px", search_radius_px)
    if radius is not None and g is None:
        raise InputError("search_radius_px needs guess_xy")
    valid = np.ones(img.shape, bool) if bad is None else ~bad
    rows, cols = img.shape

    binning = int(math.ceil(max(rows, cols) / (_MAX_FFT_SIDE / 2))) if max(rows, cols) > _MAX_FFT_SIDE else 1
    if binning > 1:
        bimg, bvalid = _bin_mean(img, valid, binning)
        f = _symmetry_features(bimg, bvalid, 1.0, 4.0)
        ncc, m = _symmetry_map(f, bvalid.astype(np.float64))
        gb = None if g is None else (g - (binning - 1) / 2) / binning
        ty, tx, prom = _peak_in(ncc, m, gb, None if radius is None else radius / binning + 1)
        if prom < _MIN_PROMINENCE:
            raise FitError(f"no clear point symmetry in the image (peak {prom:.1f} robust SD)")
        coarse = np.array([tx / 2.0, ty / 2.0]) * binning + (binning - 1) / 2
        half = _MAX_FFT_SIDE // 2
        x0 = int(np.clip(round(coarse[0]) - half, 0, max(0, cols - 2 * half)))
        y0 = int(np.clip(round(coarse[1]) - half, 0, max(0, rows - 2 * half)))
        sub = (slice(y0, min(rows, y0 + 2 * half)), slice(x0, min(cols, x0 + 2 * half)))
        g_local, r_local = coarse - [x0, y0], float(binning + 2)
    else:
        sub = (slice(0, rows), slice(0, cols))
        x0 = y0 = 0
        g_local, r_local = g, radius
    f = _symmetry_features(img[sub], valid[sub], 1.0, 8.0)
    w = valid[sub].astype(np.float64)
    ncc, m = _symmetry_map(f, w)
    ty, tx, prom = _peak_in(ncc, m, g_local, r_local)
    if prom < _MIN_PROMINENCE:
        raise FitError(f"no clear point symmetry in the image (peak {prom:.1f} robust SD)")
    start = np.array([tx / 2.0, ty / 2.0])
    if 1 <= ty < ncc.shape[0] - 1 and 1 <= tx < ncc.shape[1] - 1:
        vert = _vertex_3x3(ncc[ty - 1 : ty + 2, tx - 1 : tx + 2])
        if vert is not None:
            start = np.array([(tx + vert[1]) / 2.0, (ty + vert[0]) / 2.0])
    cx, cy, sx, sy = _refine_symmetry(img[sub], valid[sub], start)
    return CentreResult(cx + x0, cy + y0, sx, sy, "friedel-correlation", _SECTORS)


def calculate_centre_from_pairs(
    spots_xy,
    *,
    guess_xy,
    tolerance_px: float = 3.0,
    spots_sigma_xy=None,
) -> CentreResult:
    """The centre as the mean midpoint of Friedel pairs of spots.

    Parameters
    ----------
    spots_xy : (N, 2) array
        Spot positions ``[x, y]``, pixels.
    guess_xy : [x, y]
        Starting centre; it must be within about ``tolerance_px / 2`` of the
        truth, since the partner of ``p`` is looked for at ``2c − p``.
    tolerance_px : float
        How far from ``2c − p`` a partner may be.
    spots_sigma_xy : (N, 2) array, optional
        Standard uncertainties of the positions; the midpoints are then
        weighted by the inverse variance of their mean.

    Returns
    -------
    CentreResult
        ``method="friedel-pairs"``, ``n_used`` the number of pairs.

    Raises
    ------
    InputError
        Bad arguments.
    FitError
        Fewer than 2 pairs.

    Notes
    -----
    Friedel's law makes ``g`` and ``−g`` appear symmetrically about the
    centre, so each pair's midpoint ``(p + q)/2`` estimates ``c``. Pairs are
    matched both ways (``q`` is the nearest spot to ``2c − p`` and ``p`` the
    nearest to ``2c − q``); midpoints further than 3 robust standard
    deviations from the median are dropped; ``c`` is re-estimated and the
    pairs matched again until it settles. The uncertainty is the scatter of
    the midpoints over √n (or the propagated uncertainty, if larger).

    Examples
    --------
    >>> pts = np.array([[60.0, 50.0], [140.0, 150.0], [100.0, 40.0], [100.0, 160.0]])
    >>> c = calculate_centre_from_pairs(pts, guess_xy=(101, 99))
    >>> (c.x, c.y, c.n_used)
    (100.0, 100.0, 2)
    """
    pts = check_points_xy("spots_xy", spots_xy)
    c = check_xy("guess_xy", guess_xy)
    tol = check_positive("tolerance_px", tolerance_px)
    sig = None
    if spots_sigma_xy is not None:
        sig = np.asarray(spots_sigma_xy, dtype=float)
        if sig.shape != pts.shape or not np.all(np.isfinite(sig)) or np.any(sig <= 0):
            raise InputError(
                f"spots_sigma_xy must be finite and > 0 with the shape of spots_xy {pts.shape}, "
                f"got shape {sig.shape}"
            )
    n = len(pts)
    if n < 4:
        raise FitError(f"need at least 2 Friedel pairs (4 spots), got {n} spots")
    tree = cKDTree(pts)
    idx = np.arange(n)
    keep_pairs = np.zeros((0, 2), int)
    for _ in range(30):
        d, j = tree.query(2 * c - pts)
        ok = (d <= tol) & (j != idx)
        mutual = ok & ok[j] & (j[j] == idx)
        a = idx[mutual & (idx < j)]
        pairs = np.stack([a, j[a]], axis=1)
        if len(pairs) < 2:
            raise FitError(
                f"found {len(pairs)} Friedel pair(s) within {tol:g} px of the guess {list(c)}; need 2"
            )
        mids = (pts[pairs[:, 0]] + pts[pairs[:, 1]]) / 2
        if len(mids) >= 4:
            med = np.median(mids, axis=0)
            dev = np.hypot(*(mids - med).T)
            spread = max(1.4826 * float(np.median(dev)), 1e-6)
            good = dev <= 3 * spread
            if good.sum() >= 2:
                pairs, mids = pairs[good], mids[good]
        if sig is None:
            wts = np.ones_like(mids)
        else:
            wts = 4.0 / (sig[pairs[:, 0]] ** 2 + sig[pairs[:, 1]] ** 2)
        new = (wts * mids).sum(axis=0) / wts.sum(axis=0)
        moved = float(np.hypot(*(new - c)))
        c = new
        keep_pairs = pairs
        if moved < 1e-6:
            break
    m = len(keep_pairs)
    mids = (pts[keep_pairs[:, 0]] + pts[keep_pairs[:, 1]]) / 2
    if sig is None:
        wts = np.ones_like(mids)
    else:
        wts = 4.0 / (sig[keep_pairs[:, 0]] ** 2 + sig[keep_pairs[:, 1]] ** 2)
    wsum = wts.sum(axis=0)
    scatter = np.sqrt((wts * (mids - c) ** 2).sum(axis=0) / wsum / max(m - 1, 1))
    formal = np.sqrt(1.0 / wsum) if sig is not None else np.zeros(2)
    sx, sy = np.maximum(scatter, formal)
    return CentreResult(float(c[0]), float(c[1]), float(sx), float(sy), "friedel-pairs", m)


def find_centre_spots(image, *, mask=None, guess_xy=None) -> CentreResult:
    """The centre from the whole-image symmetry, refined by Friedel pairs of spots.

    Parameters
    ----------
    image : (rows, cols) array
    mask : (rows, cols) bool array, optional
        True for excluded pixels.
    guess_xy : [x, y], optional
        Passed to :func:`find_centre_friedel`.

    Returns
    -------
    CentreResult
        From :func:`calculate_centre_from_pairs` on the spots found by
        :func:`saedkit.core.detection.spots.find_spots` around the correlation centre,
        or the correlation centre itself when fewer than 3 pairs are found.

    Raises
    ------
    FitError
        When :func:`find_centre_friedel` fails.
    """
    from saedkit.core.detection.spots import find_spots

    coarse = find_centre_friedel(image, mask=mask, guess_xy=guess_xy)
    spots = find_spots(image, mask=mask, centre_xy=coarse.xy)
    if len(spots) < 6:
        return coarse
    xy = np.array([[s.x, s.y] for s in spots])
    sig = np.array([[max(s.sigma_x, 1e-3), max(s.sigma_y, 1e-3)] for s in spots])
    tol = max(3.0, 6.0 * max(coarse.sigma_x, coarse.sigma_y))
    try:
        pairs = calculate_centre_from_pairs(xy, guess_xy=coarse.xy, tolerance_px=tol, spots_sigma_xy=sig)
    except FitError:
        return coarse
    return pairs if pairs.n_used >= 3 else coarse
