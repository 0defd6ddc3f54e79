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
from dataclasses import replace

import numpy as np
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from saedkit.core._validate import check_positive, check_xy
from saedkit.core.errors import FitError, InputError
from saedkit.core.detection.spot_candidates import _detect
from saedkit.core.detection.spot_filter import _Kernel
from saedkit.core.detection.spot_fit import _Refiner, _annulus_plane, _beam_disc, _central_core, _estimate_sigma, _exclusion, _significance_floor
from saedkit.core.detection.spot_model import ProgressFn, Spot, StopFn, _DEFAULT_SIGMA_PX, _MIN_SIGNIFICANCE, _SNR_ALLOWANCE_REL, _SNR_ALLOWANCE_SE, _check_mask, _check_numeric_image, _check_stop, _prepare, _saturation_level, spots_xy_array

__all__ = [
    "Spot",
    "find_spots",
    "refine_spot",
    "snap_to_spot",
    "spots_xy_array",
]

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
