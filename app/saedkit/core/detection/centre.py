"""The pattern centre (position of the undiffracted beam).

Ways to find it: Friedel symmetry of a spot pattern (the intensity at c + v
equals that at c − v, so the image correlates best with its point reflection
through c; and the midpoints of Friedel pairs g, −g all fall on c); the common
centre of ring ellipses (:mod:`saedkit.core.detection.rings`); or set by hand.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

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
    "find_centre",
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
        How it was found: ``"direct-beam"``, ``"friedel-pairs"``,
        ``"film-halo"``, ``"friedel-correlation"``, ``"brightest-region"`` (nothing
        clearer found), ``"rings"``,
        ``"spot-lattice"`` or ``"manual"``.
    n_used : int
        Number of pairs, rings or points behind the estimate (0 when manual).
    confidence : float
        How far the estimate can be trusted, 0–1 (1: a clear, precise
        estimate, as from a fit of a visible direct beam or many Friedel
        pairs; below 0.5: weak, check it; see :func:`find_centre`).
    notes : tuple of str
        What the search tried and why it chose this estimate; a weak result
        says so here.
    """

    x: float
    y: float
    sigma_x: float
    sigma_y: float
    method: str
    n_used: int = 0
    confidence: float = 1.0
    notes: tuple[str, ...] = ()

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
            "confidence": self.confidence,
            "notes": list(self.notes),
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
    return _friedel_correlation(image, mask=mask, guess_xy=guess_xy, search_radius_px=search_radius_px)[0]


def _friedel_correlation(image, *, mask=None, guess_xy=None, search_radius_px=None):
    """:func:`find_centre_friedel` with the correlation at its peak (Pearson r) and its
    prominence (robust SDs), for judging it."""
    from saedkit.core.detection.spot_model import _prepare

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
    peak_r = float(ncc[ty, tx])
    start = np.array([tx / 2.0, ty / 2.0])
    if 1 <= ty < ncc.shape[0] - 1 and 1 <= tx < ncc.shape[1] - 1:
        vert = _vertex_3x3(ncc[ty - 1 : ty + 2, tx - 1 : tx + 2])
        if vert is not None:
            start = np.array([(tx + vert[1]) / 2.0, (ty + vert[0]) / 2.0])
    cx, cy, sx, sy = _refine_symmetry(img[sub], valid[sub], start)
    return CentreResult(cx + x0, cy + y0, sx, sy, "friedel-correlation", _SECTORS), peak_r, prom


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
    """The centre of a spot pattern: :func:`find_centre` with its default chain.

    Kept for callers of earlier versions; it no longer raises when the
    symmetry correlation fails, since :func:`find_centre` falls back on the
    direct beam, the Friedel pairs of spot positions and the film halo.

    Parameters
    ----------
    image : (rows, cols) array
    mask : (rows, cols) bool array, optional
        True for excluded pixels.
    guess_xy : [x, y], optional
        Where to look first.

    Returns
    -------
    CentreResult
    """
    return find_centre(image, mask=mask, guess_xy=guess_xy)


# ----------------------------------------------------------------------------- the chain

# Confidence at or above which an estimate is taken without trying further methods.
_GOOD = 0.6
# Pearson correlation of the image with its reflection below which the symmetry
# centre is not trusted: a tilted crystal's intensities are not centrosymmetric.
_MIN_CORRELATION = 0.35
_PAIR_TOL_PX = 3.0  # how far from 2c − p a Friedel partner may lie
_MAX_VOTING_SPOTS = 150  # midpoints of all pairs among at most this many spots
_BEAM_SIGMA_FLOOR_PX = 0.03  # a direct-beam fit is not better than this (common practice)


@dataclass(frozen=True)
class _Estimate:
    xy: np.ndarray
    sigma: np.ndarray
    method: str
    n_used: int
    confidence: float
    note: str

    def result(self, notes) -> CentreResult:
        return CentreResult(
            float(self.xy[0]), float(self.xy[1]), float(self.sigma[0]), float(self.sigma[1]),
            self.method, int(self.n_used), float(np.clip(self.confidence, 0.0, 1.0)), tuple(notes),
        )


def _fit_direct_beam(img: np.ndarray, hard: np.ndarray | None, sat: np.ndarray | None,
                     sat_level: float | None, guess_xy) -> _Estimate | None:
    """The undiffracted beam: a saturated plateau (its centroid, with masked pixels inside
    it filled) or an unsaturated peak (a 2-D Gaussian on a plane, least squares).

    The beam is the brightest broad feature of the image (the maximum of a
    4 px Gaussian smoothing; its tail outweighs any spot), or the brightest
    one within 20 px of ``guess_xy``. Its confidence grows with how much it
    outshines the brightest other peak, and is low for a peak no wider than
    a spot.
    """
    from saedkit.core.detection.spot_fit import _fit_gaussian

    rows, cols = img.shape
    work = img.astype(np.float64)
    if sat is not None and sat_level is not None:
        work[sat] = sat_level
    w = np.ones(img.shape) if hard is None else (~hard).astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        gw = ndi.gaussian_filter(w, 4.0, truncate=3.0)
        sm = ndi.gaussian_filter(work * w, 4.0, truncate=3.0) / gw
    sm[~(gw > 0.5)] = -np.inf
    if guess_xy is not None:
        yy, xx = np.ogrid[:rows, :cols]
        sm = np.where(np.hypot(xx - guess_xy[0], yy - guess_xy[1]) <= 20.0, sm, -np.inf)
    if not np.isfinite(sm).any():
        return None
    iy, ix = np.unravel_index(int(np.argmax(sm)), sm.shape)
    # the brightest other peak (a spot), on a light smoothing, for the contrast

    if sat is not None and sat.any():
        lab, _ = ndi.label(sat, structure=np.ones((3, 3), bool))
        y0, y1 = max(0, iy - 12), min(rows, iy + 13)
        x0, x1 = max(0, ix - 12), min(cols, ix + 13)
        ids = np.unique(lab[y0:y1, x0:x1])
        ids = ids[ids > 0]
        if ids.size:
            sizes = np.bincount(lab.ravel())
            k = int(ids[np.argmax(sizes[ids])])
            region = lab == k
            if hard is not None:
                # masked pixels (a dead gap line) inside the plateau belong to it
                near = ndi.binary_dilation(region, iterations=3) & hard
                region = ndi.binary_fill_holes(ndi.binary_closing(region | near, iterations=2)) & (region | near)
                region = ndi.binary_fill_holes(region)
            n = int(region.sum())
            if n >= 5:
                ys, xs = np.nonzero(region)
                cxy = np.array([xs.mean(), ys.mean()])
                edge = region & ~ndi.binary_erosion(region)
                n_edge = max(int(edge.sum()), 1)
                # each edge pixel is in or out by chance: ±0.5 px on n_edge of n pixels
                sig = max(_BEAM_SIGMA_FLOOR_PX, 0.5 * math.sqrt(n_edge) / n * math.sqrt(n / math.pi) / 2)
                rad = math.sqrt(n / math.pi)
                far = np.hypot(*(np.mgrid[:rows, :cols][::-1] - cxy[:, None, None])) > rad + 6
                others = sat & far
                second = int(np.max(np.bincount(lab[others]))) if others.any() and lab[others].any() else 0
                conf = 0.95 if n >= 2 * max(second, 1) else 0.5
                return _Estimate(cxy, np.array([sig, sig]), "direct-beam", n, conf,
                                 f"direct beam: saturated plateau of {n} px at [{cxy[0]:.2f}, {cxy[1]:.2f}]")

    xc, yc = float(ix), float(iy)
    fit = None
    for half in (6, 9):
        x0, x1 = max(0, int(round(xc)) - half), min(cols, int(round(xc)) + half + 1)
        y0, y1 = max(0, int(round(yc)) - half), min(rows, int(round(yc)) + half + 1)
        yy, xx = np.mgrid[y0:y1, x0:x1]
        ok = np.ones(xx.shape, bool) if hard is None else ~hard[y0:y1, x0:x1]
        vals = work[y0:y1, x0:x1][ok]
        if vals.size < 20:
            return None
        b0 = float(np.percentile(vals, 10))
        start = np.array([xc, yc, max(float(vals.max()) - b0, 1.0), 2.0, b0, 0.0, 0.0])
        fit = _fit_gaussian(xx[ok].astype(float), yy[ok].astype(float), vals, start, xc, yc)
        if fit is None:
            return None
        p = fit[0]
        if not (p[2] > 0 and 0.3 < p[3] < half and math.hypot(p[0] - xc, p[1] - yc) < half):
            return None
        xc, yc = float(p[0]), float(p[1])
    p, cov, resid = fit
    amp, width = float(p[2]), float(p[3])
    noise = max(float(np.std(resid)), 1e-9)
    # how far the beam outshines the brightest other feature, in flux (the 4 px
    # smoothing integrates a spot of 1-3 px): a diffracted beam carries less
    yy, xx = np.ogrid[:rows, :cols]
    outside = np.hypot(xx - xc, yy - yc) > max(4 * width, 12.0)
    flux = sm - np.median(sm[np.isfinite(sm)])
    peaks = (sm == ndi.maximum_filter(sm, size=5)) & outside & np.isfinite(sm)
    second = float(flux[peaks].max()) if peaks.any() else 0.0
    top = float(flux[iy, ix])
    dominance = top / max(second, 1e-9)
    conf = float(np.clip(dominance - 1.0, 0.0, 1.0))
    if width < 1.5:
        conf *= 0.5  # as narrow as a spot: perhaps not the beam
    if amp / noise < 10:
        conf *= 0.5
    sx = max(float(np.sqrt(cov[0, 0])), _BEAM_SIGMA_FLOOR_PX)
    sy = max(float(np.sqrt(cov[1, 1])), _BEAM_SIGMA_FLOOR_PX)
    return _Estimate(np.array([xc, yc]), np.array([sx, sy]), "direct-beam", int(resid.size), conf,
                     f"direct beam: unsaturated peak {amp:.4g} wide {width:.2f} px at [{xc:.2f}, {yc:.2f}], "
                     f"{dominance:.1f}x the flux of the brightest other feature")


def _split_mask(data, mask):
    """(float image with excluded pixels zeroed, hard mask or None, saturated pixels outside
    the user's mask or None, saturation level): saturated pixels count as signal for the
    beam, the rest of the mask (e.g. a doubled gap line clipped in the beam) does not."""
    from saedkit.core.detection.spot_model import _check_mask, _prepare

    img, bad, sat, sat_level = _prepare(data, mask)
    user = _check_mask(mask, img.shape)
    if sat is not None and user is not None:
        # saturated pixels under the user's mask count only where they form a broad
        # plateau (the beam), not a thin line (a doubled gap line clipped in the beam)
        broad = ndi.binary_opening(sat, structure=np.ones((3, 3), bool))
        sat = sat & ~(user & ~broad)
        if not sat.any():
            sat = None
    hard = None
    if bad is not None:
        hard = bad if sat is None else (bad & ~sat)
        if not hard.any():
            hard = None
    return img, hard, sat, sat_level


def _direct_beam_guess(data, mask=None):
    """[x, y] of a clearly visible direct beam (confidence >= 0.6), else None."""
    img, hard, sat, sat_level = _split_mask(data, mask)
    beam = _fit_direct_beam(img, hard, sat, sat_level, None)
    return None if beam is None or beam.confidence < _GOOD else beam.xy


def _pairs_around(xy: np.ndarray, sig: np.ndarray, guess) -> CentreResult | None:
    try:
        return calculate_centre_from_pairs(xy, guess_xy=guess, tolerance_px=_PAIR_TOL_PX, spots_sigma_xy=sig)
    except FitError:
        return None


def _vote_pairs(xy: np.ndarray, shape) -> list[tuple[np.ndarray, int]]:
    """Trial centres where many midpoints of spot pairs coincide, most votes first.

    Every Friedel pair (g, −g) has its midpoint at the centre, whatever the
    intensities; other pairs scatter their midpoints (on a lattice, over the
    half-lattice points, each with fewer votes). Midpoints of all pairs are
    counted in 1 px cells, summed over 3 × 3 cells.
    """
    rows, cols = shape
    pts = xy[:_MAX_VOTING_SPOTS]
    if len(pts) < 4:
        return []
    i, j = np.triu_indices(len(pts), k=1)
    mid = (pts[i] + pts[j]) / 2
    ok = np.hypot(*(pts[i] - pts[j]).T) > 4.0
    mid = mid[ok]
    hist, _, _ = np.histogram2d(mid[:, 1], mid[:, 0], bins=(rows, cols), range=((-0.5, rows - 0.5), (-0.5, cols - 0.5)))
    votes = ndi.uniform_filter(hist, size=3, mode="constant") * 9
    peak = (votes == ndi.maximum_filter(votes, size=7)) & (votes >= 3)
    ys, xs = np.nonzero(peak)
    order = np.argsort(-votes[ys, xs])[:8]
    out = []
    for k in order:
        y, x = ys[k], xs[k]
        near = (np.abs(mid[:, 0] - x) <= 1.5) & (np.abs(mid[:, 1] - y) <= 1.5)
        if near.any():
            out.append((mid[near].mean(axis=0), int(round(votes[y, x]))))
    return out


def _halo_centre(img: np.ndarray, hard: np.ndarray | None, guess) -> _Estimate | None:
    """The centre of a broad diffuse ring (support-film halo, or rings): a circle fitted to
    the radial maxima of the smoothed image along 72 directions from ``guess``."""
    rows, cols = img.shape
    w = np.ones(img.shape) if hard is None else (~hard).astype(np.float64)
    a = ndi.median_filter(np.where(w > 0, img, 0).astype(np.float64), size=5)  # spots out
    with np.errstate(divide="ignore", invalid="ignore"):
        sm = ndi.gaussian_filter(a * w, 4.0) / ndi.gaussian_filter(w, 4.0)
    sm = np.nan_to_num(sm)
    r_max = 0.48 * min(rows, cols)
    radii = np.arange(10.0, r_max, 1.0)
    ang = np.deg2rad(np.arange(0, 360, 5.0))
    px = guess[0] + np.outer(np.cos(ang), radii)
    py = guess[1] + np.outer(np.sin(ang), radii)
    prof = ndi.map_coordinates(sm, [py, px], order=1, mode="nearest")
    # a ring: a maximum along the ray that stands above both its inner and outer sides
    k = np.argmax(prof[:, 5:-5], axis=1) + 5
    top = prof[np.arange(len(ang)), k]
    inner = prof[:, :5].min(axis=1)
    outer = prof[:, -5:].mean(axis=1)
    is_max = (k > 5) & (k < len(radii) - 6) & (top > outer * 1.05) & (top > prof[np.arange(len(ang)), np.maximum(k - 8, 0)])
    del inner
    if is_max.sum() < 12:
        return None
    x, y = px[np.arange(len(ang)), k][is_max], py[np.arange(len(ang)), k][is_max]
    keep = np.ones(len(x), bool)
    for _ in range(3):
        A = np.stack([x[keep], y[keep], np.ones(keep.sum())], axis=1)
        b = x[keep] ** 2 + y[keep] ** 2
        sol, *_ = np.linalg.lstsq(A, b, rcond=None)
        cx, cy = sol[0] / 2, sol[1] / 2
        rr = math.sqrt(max(sol[2] + cx * cx + cy * cy, 0.0))
        res = np.hypot(x - cx, y - cy) - rr
        mad = 1.4826 * float(np.median(np.abs(res[keep]))) + 0.2
        keep = np.abs(res) <= 3 * mad
        if keep.sum() < 12:
            return None
    n = int(keep.sum())
    sig = mad * math.sqrt(2.0 / n)
    conf = float(np.clip(n / 72.0, 0, 1)) * (0.6 if sig < 1.0 else 0.3)
    return _Estimate(np.array([cx, cy]), np.array([sig, sig]), "film-halo", n, conf,
                     f"diffuse ring of radius {rr:.1f} px: circle through {n} radial maxima")


def find_centre(
    data,
    *,
    mask=None,
    guess_xy=None,
    spots=None,
    use_correlation: bool = True,
) -> CentreResult:
    """The pattern centre by a chain of methods, each scored; never refuses a usable pattern.

    Parameters
    ----------
    data : (rows, cols) array
        The pattern.
    mask : (rows, cols) bool array, optional
        True for excluded pixels (detector gaps, beam stop, hot pixels): see
        :func:`saedkit.core.detection.masks.find_auto_mask`. Saturated pixels
        are recognised by themselves.
    guess_xy : [x, y], optional
        Where the centre roughly is (within about 20 px).
    spots : sequence of Spot, optional
        Spots already found (their positions are used for Friedel pairs);
        default: found here with :func:`saedkit.core.detection.spots.find_spots`.
    use_correlation : bool
        Allow the (slower) whole-image symmetry correlation when the cheaper
        methods are weak.

    Returns
    -------
    CentreResult
        ``method`` names the estimate chosen, ``confidence`` (0–1) how clear
        it is, ``notes`` what was tried. A weak result (confidence below
        0.5) is returned with a note saying so rather than raising.

    Raises
    ------
    InputError
        Bad image, mask or guess.

    Notes
    -----
    In order, stopping as soon as the centre is clear:

    1. **Direct beam**: the undiffracted beam is the centre by definition. A
       saturated plateau gives its centroid (masked pixels inside it, e.g. a
       dead gap line, filled); an unsaturated beam a least-squares 2-D
       Gaussian on a plane. Confident when it outshines every spot.
    2. **Friedel pairs of spot positions** (not intensities, which a tilted
       or thick crystal makes unequal for g and −g): around the beam, pairs
       matched both ways with outliers dropped
       (:func:`calculate_centre_from_pairs`); without a beam, the midpoints
       of all pairs of spots are voted on a 1 px grid first (a hot pixel or
       an unpaired spot adds scattered votes only). When three or more pairs
       agree with the beam within 2 px the pairs' mean midpoint is taken
       (method ``"friedel-pairs"``).
    3. **Support-film halo or rings**: a circle through the radial maxima of
       the smoothed, spot-free image.
    4. **Symmetry correlation** (:func:`find_centre_friedel`), trusted only
       when the image correlates with its point reflection with r ≥ 0.35 (a
       tilted pattern's intensities are not centrosymmetric) and its
       refinement converges.

    Estimates that agree within 2 px support each other; the most confident
    one wins, then the Friedel pairs around it refine it.

    Examples
    --------
    >>> from saedkit.core.simulation.render import render_pattern
    >>> img, truth = render_pattern((256, 256), (120.3, 131.6),
    ...     spot_offsets_xy=[[40, 0], [-40, 0], [0, 45], [0, -45], [40, 45], [-40, -45]],
    ...     spot_intensity=3000, rng=np.random.default_rng(0))
    >>> c = find_centre(img)
    >>> bool(abs(c.x - 120.3) < 0.3 and abs(c.y - 131.6) < 0.3), c.method
    (True, 'friedel-pairs')
    """
    from saedkit.core.detection.spots import find_spots

    img, hard, sat, sat_level = _split_mask(data, mask)
    g = None if guess_xy is None else check_xy("guess_xy", guess_xy)
    notes: list[str] = []
    estimates: list[_Estimate] = []

    def spot_arrays(centre_xy):
        # centroids: enough for pair midpoints, and much cheaper than Gaussian fits
        found = spots if spots is not None else find_spots(data, mask=mask, centre_xy=centre_xy, refine="centroid")
        good = list(found)
        xy = np.array([[s.x, s.y] for s in good], float).reshape(-1, 2)
        sig = np.array([[max(s.sigma_x, 1e-3), max(s.sigma_y, 1e-3)] for s in good], float).reshape(-1, 2)
        sig = np.where(np.isfinite(sig), sig, 1.0)
        return xy, sig

    def refine_with_pairs(anchor: _Estimate, xy, sig) -> CentreResult:
        pr = _pairs_around(xy, sig, anchor.xy) if len(xy) >= 4 else None
        if pr is not None and pr.n_used >= 3 and math.hypot(pr.x - anchor.xy[0], pr.y - anchor.xy[1]) <= 2.0:
            conf = max(anchor.confidence, min(1.0, 0.5 + 0.1 * pr.n_used))
            notes.append(f"{pr.n_used} Friedel pairs of spot positions agree with it; their mean midpoint taken")
            return CentreResult(pr.x, pr.y, pr.sigma_x, pr.sigma_y, "friedel-pairs", pr.n_used, conf, tuple(notes))
        if pr is not None and pr.n_used >= 3:
            notes.append(f"{pr.n_used} Friedel pairs point {math.hypot(pr.x - anchor.xy[0], pr.y - anchor.xy[1]):.1f} px "
                         "away; not used")
        else:
            notes.append("fewer than 3 Friedel pairs of spots around it")
        return anchor.result(notes)

    # 1. the direct beam
    beam = _fit_direct_beam(img, hard, sat, sat_level, g)
    if beam is not None:
        notes.append(beam.note + f" (confidence {beam.confidence:.2f})")
        estimates.append(beam)
        if beam.confidence >= _GOOD:
            xy, sig = spot_arrays(beam.xy)
            return refine_with_pairs(beam, xy, sig)
    else:
        notes.append("no direct beam visible")

    # 2. Friedel pairs of spot positions, by voting
    xy, sig = spot_arrays(None if beam is None else beam.xy)
    if beam is not None and beam.confidence >= 0.3:
        # a faint beam still tells which of a periodic net's meeting points is the centre
        pr = _pairs_around(xy, sig, beam.xy) if len(xy) >= 4 else None
        if pr is not None and pr.n_used >= 3 and math.hypot(*(pr.xy - beam.xy)) <= 2.0:
            estimates.append(_Estimate(pr.xy, np.array([pr.sigma_x, pr.sigma_y]), "friedel-pairs", pr.n_used,
                                       float(np.clip(0.3 + 2 * pr.n_used / max(len(xy), 1), 0, 0.9))
                                       * (0.5 + 0.5 * beam.confidence),
                                       f"{pr.n_used} Friedel pairs of spot positions around the beam"))
    votes = _vote_pairs(xy, img.shape)
    if g is not None:
        votes = [v for v in votes if math.hypot(*(v[0] - g)) <= 20.0]
    for vxy, n in votes[:3]:
        pr = _pairs_around(xy, sig, vxy)
        if pr is not None and any(e.method == "friedel-pairs" and np.hypot(*(e.xy - pr.xy)) <= 2.0 for e in estimates):
            continue  # the same meeting point again
        if pr is not None and pr.n_used >= 3:
            frac = 2 * pr.n_used / max(len(xy), 1)
            estimates.append(_Estimate(pr.xy, np.array([pr.sigma_x, pr.sigma_y]), "friedel-pairs", pr.n_used,
                                       float(np.clip(0.3 + frac, 0, 0.9)),
                                       f"{pr.n_used} Friedel pairs of spot positions meet at "
                                       f"[{pr.x:.2f}, {pr.y:.2f}] ({n} votes)"))
    if len(votes) >= 2 and votes[1][1] >= 0.8 * votes[0][1]:
        notes.append(f"pair votes ambiguous ({votes[0][1]} and {votes[1][1]}): a periodic net")
        for k, e in enumerate(estimates):
            if e.method == "friedel-pairs" and "votes" in e.note:
                estimates[k] = replace(e, confidence=e.confidence * 0.6)

    def best_supported():
        if not estimates:
            return None
        scored = []
        for e in estimates:
            support = sum(o.confidence for o in estimates if o is not e and np.hypot(*(o.xy - e.xy)) <= 2.0)
            scored.append((e.confidence + 0.5 * support, e))
        scored.sort(key=lambda t: -t[0])
        return scored[0]

    top = best_supported()
    if top is not None and top[0] >= _GOOD + 0.2:
        notes.append(top[1].note)
        return refine_with_pairs(top[1], xy, sig) if top[1].method != "friedel-pairs" else top[1].result(notes)

    # 3. the film halo or rings
    anchor = g if g is not None else (top[1].xy if top is not None else np.array([(img.shape[1] - 1) / 2, (img.shape[0] - 1) / 2]))
    halo = _halo_centre(img, hard, anchor)
    if halo is not None:
        estimates.append(halo)
        notes.append(halo.note + f" (confidence {halo.confidence:.2f})")

    # 4. the symmetry correlation, judged by its quality
    top = best_supported()
    if use_correlation and (top is None or top[0] < _GOOD + 0.2):
        try:
            kw = {} if g is None else {"guess_xy": g, "search_radius_px": 20.0}
            corr, r_peak, prom = _friedel_correlation(data, mask=mask, **kw)
        except FitError as exc:
            notes.append(f"symmetry correlation failed: {exc}")
        else:
            trusted = r_peak >= _MIN_CORRELATION
            # a clear point symmetry beats a periodic net's ambiguous pair votes
            conf = float(np.clip(0.4 + r_peak, 0, 1)) if trusted else 0.4 * max(r_peak, 0.0)
            estimates.append(_Estimate(corr.xy, np.array([corr.sigma_x, corr.sigma_y]), "friedel-correlation",
                                       corr.n_used, conf, f"symmetry correlation r = {r_peak:.2f} "
                                       f"({prom:.0f} robust SD) at [{corr.x:.2f}, {corr.y:.2f}]"
                                       + ("" if trusted else ": intensities not centrosymmetric, not trusted")))
            notes.append(estimates[-1].note)
    top = best_supported()
    if top is None:
        # nothing clear at all: the brightest region of the heavily smoothed image
        w = np.ones(img.shape) if hard is None else (~hard).astype(np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            heavy = ndi.gaussian_filter(img.astype(np.float64) * w, 8.0) / ndi.gaussian_filter(w, 8.0)
        heavy = np.where(np.isfinite(heavy), heavy, -np.inf)
        iy, ix = np.unravel_index(int(np.argmax(heavy)), heavy.shape)
        estimates.append(_Estimate(np.array([float(ix), float(iy)]), np.array([8.0, 8.0]), "brightest-region", 0,
                                   0.05, "no direct beam, Friedel pairs, ring or point symmetry: the brightest "
                                   "region of the smoothed image"))
        notes.append(estimates[-1].note)
        top = best_supported()
    chosen = top[1]
    if chosen.method != "friedel-pairs":
        res = refine_with_pairs(chosen, xy, sig)
    else:
        res = chosen.result(notes)
    if res.confidence < 0.5:
        res = CentreResult(res.x, res.y, res.sigma_x, res.sigma_y, res.method, res.n_used, res.confidence,
                           res.notes + ("weak: every method is uncertain here; check the centre or set it by hand",))
    return res
