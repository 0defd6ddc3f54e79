"""The central beam's core, sub-pixel refinement of a spot, and the spot size."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi
from scipy.optimize import least_squares

from saedkit.core.errors import FitError
from saedkit.core.detection.spot_candidates import _detect
from saedkit.core.detection.spot_filter import _Kernel, _cell_sums
from saedkit.core.detection.spot_model import Spot, _DEFAULT_SIGMA_PX, _FALSE_PEAKS_PER_IMAGE, _MAD_TO_SIGMA, _MIN_SIGNIFICANCE


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
