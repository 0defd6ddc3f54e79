"""Masks of pixels to exclude from measurement: saturation, beam stop, hand edits.

A mask is a boolean array of the image's shape, True where a pixel is
excluded. The automatic finders look for the two things every SAED pattern
from a camera tends to have: a saturated central beam (with its bloom), and
the shadow of a beam stop — a dark bar from the image edge to the centre with
a rounded tip over the undiffracted beam. The editing helpers draw discs,
polygons and rectangles into a mask (for the GUI's mask tools); they return
new arrays and never change their input.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from saedkit.core._validate import check_finite, check_image_2d, check_xy
from saedkit.core.errors import InputError

__all__ = [
    "DetectorMask",
    "find_auto_mask",
    "find_detector_mask",
    "find_beam_stop_mask",
    "find_saturated_mask",
    "mask_disc",
    "draw_disc",
    "mask_polygon",
    "mask_rectangle",
]

#: Fewest connected pixels at the image maximum that count as a saturated
#: plateau when no saturation value is given (a noisy unsaturated maximum is
#: one pixel or a few scattered ones: common practice).
MIN_PLATEAU_PX = 5

# Beam-stop search settings (chosen on simulated patterns; see the tests).
_WORK_MAX_SIDE = 1024  # larger images are block-averaged to at most this side
_SMOOTH_SIGMAS_PX = (1.5, 3.0)  # Gaussian smoothing before thresholding, working pixels
_TIP_SIGMA_PX = 0.7  # lighter smoothing for the tip
_REF_PERCENTILE = 0.6  # reference level of each radius bin (tolerates a bar over 40 % of it)
_DARK_FRACTION = 0.5  # dark: below the reference by half its height above the floor ...
_DARK_SIGMAS = 5.0  # ... and by this many robust standard deviations of the bin
_MIN_ARC_FRACTION = 0.25  # shortest reliable radius bin, fraction of the image side
_MIN_ELONGATION = 2.0  # major/minor axis ratio of a bar
_MIN_LENGTH_FRACTION = 0.15  # shortest bar, fraction of the image side
_DEEP_FRACTION = 0.75  # "deep": below the reference by 3/4 of its height above the floor
_MIN_DEEP_FRACTION = 0.7  # most of a bar is deep (sharp edges)
_MAX_TIP_FRACTION = 0.2  # the bar's inner end lies within this fraction of the side from the centre
_MIN_AREA_FRACTION = 2.0e-4  # smallest bar, fraction of the image
_MAX_AREA_FRACTION = 0.35  # a larger dark region is not a beam stop


def _disc_structure(radius_px: int) -> np.ndarray:
    r = int(radius_px)
    yy, xx = np.mgrid[-r : r + 1, -r : r + 1]
    return xx**2 + yy**2 <= r * r


def _grow(mask: np.ndarray, grow_px: float) -> np.ndarray:
    """Dilate ``mask`` by a disc of ``grow_px`` pixels (0: unchanged copy)."""
    g = int(round(grow_px))
    if g <= 0 or not mask.any():
        return mask.copy()
    return ndi.binary_dilation(mask, structure=_disc_structure(g))


def _check_grow(grow_px) -> float:
    g = check_finite("grow_px", grow_px)
    if g < 0:
        raise InputError(f"grow_px must be >= 0, got {grow_px!r}")
    return g


# --------------------------------------------------------------------------- #
# Saturation
# --------------------------------------------------------------------------- #


def find_saturated_mask(data, *, saturation_value: float | None = None, grow_px: float = 2) -> np.ndarray:
    """Mask the saturated pixels and the bloom around them.

    Parameters
    ----------
    data : (rows, cols) array
        The image.
    saturation_value : float, optional
        Value at which the detector saturates (e.g. 65535 for a 16-bit
        camera; :attr:`PatternImage.saturation_value`). When None, or when no
        pixel reaches it, the image maximum is taken as saturated if it forms
        a plateau of at least ``MIN_PLATEAU_PX`` connected pixels.
    grow_px : float
        Radius by which the saturated region is grown (binary dilation with a
        disc), so that the bloom edge is excluded too.

    Returns
    -------
    (rows, cols) bool array
        True at saturated pixels and within ``grow_px`` of them; all False
        when nothing is saturated.

    Notes
    -----
    A clipped detector records the same maximum value over the whole
    over-exposed area, while an unsaturated noisy maximum is an isolated
    pixel; pixels next to a saturated area are biased by charge spreading
    (common practice), hence the growth.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((32, 32), np.uint16)
    >>> img[14:18, 14:18] = 65535
    >>> int(find_saturated_mask(img, saturation_value=65535, grow_px=1).sum())
    32
    """
    arr = check_image_2d("data", data)
    grow = _check_grow(grow_px)
    saturated = None
    if saturation_value is not None:
        sat = check_finite("saturation_value", saturation_value)
        saturated = arr >= sat
        if not saturated.any():
            saturated = None
    if saturated is None:
        saturated = _plateau_at_max(arr)
    return _grow(saturated, grow)


def _plateau_at_max(arr: np.ndarray) -> np.ndarray:
    """Pixels equal to the maximum, when some of them form a plateau."""
    if arr.dtype.kind == "f":
        finite = np.isfinite(arr)
        if not finite.any():
            return np.zeros(arr.shape, dtype=bool)
        top = np.max(arr[finite])
    else:
        top = arr.max()
    at_max = arr == top
    n = int(np.count_nonzero(at_max))
    if n < MIN_PLATEAU_PX or n == arr.size:
        return np.zeros(arr.shape, dtype=bool)
    labels, _ = ndi.label(at_max, structure=np.ones((3, 3), bool))
    sizes = np.bincount(labels.ravel())[1:]
    if sizes.max() < MIN_PLATEAU_PX:
        return np.zeros(arr.shape, dtype=bool)
    return at_max


# --------------------------------------------------------------------------- #
# Beam stop
# --------------------------------------------------------------------------- #


def find_beam_stop_mask(data, *, centre_xy=None, grow_px: float = 3) -> np.ndarray:
    """Mask the shadow of a beam stop.

    Parameters
    ----------
    data : (rows, cols) array
        The image.
    centre_xy : [x, y], optional
        Pattern centre, pixels. Default: estimated from the image (the
        brightest region, refined by point symmetry). Within a few pixels is
        enough.
    grow_px : float
        Radius by which the found region is grown, pixels.

    Returns
    -------
    (rows, cols) bool array
        True under the beam stop; all False when there is none.

    Raises
    ------
    InputError
        If ``data`` is not a 2-D real image or ``centre_xy`` is not a point.

    Notes
    -----
    The beam stop is a region much darker than the background at the same
    distance from the centre, connected to the image border (the bar) and
    usually reaching the centre (the tip). The search:

    1. Block-average images larger than 1024 pixels a side; smooth with a
       Gaussian (1.5 px, and 3 px if nothing is found at first, for noisy
       low-dose images); the dark floor is the 0.5th percentile.
    2. In radius bins of one pixel around the centre take a reference level
       (60th percentile, so a bar may cover up to 40 % of a circle) and the
       noise of the smoothed image (from the median absolute high-pass
       residual). A pixel is dark when it lies below the reference by more
       than half the reference's height above the floor and by more than
       five noises. Far out, where the bins shrink to short arcs in the
       corners, the last reliable level is held.
    3. Keep the dark regions that touch the border, are elongated (axes
       ratio ≥ 2), long (≥ 15 % of the side), neither tiny nor most of the
       image, and sharp-edged (at least 70 % of them three quarters of the
       way down to the floor): the bar. A background that only fades on one
       side is soft-edged and fails this.
    4. Inside the bar's inner end every bin may lie under the tip, so the
       tip is judged against the reference just outside it; a bright beam
       leaking through a semi-transparent tip is enclosed by dark pixels and
       filled as a hole.
    5. Grow by ``grow_px``.

    Any other sharp-edged, elongated dark region that touches the border,
    e.g. dead detector rows or a shadowed corner, is found too; it carries no
    signal either. A tip that leaks a saturated beam is not dark: the
    saturated mask (:func:`find_saturated_mask`) covers it.

    Examples
    --------
    >>> from saedkit.core.simulation.render import BeamStop, render_pattern
    >>> img, truth = render_pattern((256, 256), (128, 128), beam_stop=BeamStop(angle_deg=30))
    >>> mask = find_beam_stop_mask(img, centre_xy=(128, 128))
    >>> bool((mask & truth.beam_stop_mask).sum() > 0.95 * truth.beam_stop_mask.sum())
    True
    """
    arr = check_image_2d("data", data)
    grow = _check_grow(grow_px)
    if arr.dtype.kind not in "uifb":
        raise InputError(f"data must be a real image, got dtype {arr.dtype}")
    rows, cols = arr.shape
    factor = max(1, math.ceil(max(rows, cols) / _WORK_MAX_SIDE))
    work = _block_mean(np.asarray(arr, dtype=np.float64), factor)
    finite = np.isfinite(work)
    if not finite.all():
        if not finite.any():
            raise InputError("data has no finite pixels")
        work = np.where(finite, work, np.median(work[finite]))

    if centre_xy is not None:
        x, y = check_xy("centre_xy", centre_xy)
        cx, cy = (x + 0.5) / factor - 0.5, (y + 0.5) / factor - 0.5
    else:
        cx, cy = _estimate_centre(ndi.gaussian_filter(work, _SMOOTH_SIGMAS_PX[0]))

    for sigma in _SMOOTH_SIGMAS_PX:  # more smoothing only if a noisy image needs it
        found = _find_stop(work, sigma, cx, cy)
        if found is not None and found.mean() <= _MAX_AREA_FRACTION:
            return _grow(_block_expand(found, factor, (rows, cols)), grow)
    return np.zeros((rows, cols), dtype=bool)


def _block_mean(a: np.ndarray, f: int) -> np.ndarray:
    """Average ``f``×``f`` blocks (the ragged edge is padded by reflection)."""
    if f == 1:
        return a
    rows, cols = a.shape
    pr, pc = (-rows) % f, (-cols) % f
    if pr or pc:
        a = np.pad(a, ((0, pr), (0, pc)), mode="reflect")
    r2, c2 = a.shape[0] // f, a.shape[1] // f
    return a.reshape(r2, f, c2, f).mean(axis=(1, 3))


def _block_expand(mask: np.ndarray, f: int, shape: tuple[int, int]) -> np.ndarray:
    """Undo :func:`_block_mean` for a mask (nearest neighbour)."""
    if f == 1:
        return mask
    big = np.repeat(np.repeat(mask, f, axis=0), f, axis=1)
    return big[: shape[0], : shape[1]]


def _guess_centre(smooth: np.ndarray) -> tuple[float, float]:
    """The brightest region of a heavily smoothed, log-scaled image, [x, y]."""
    floor = np.percentile(smooth, 1.0)
    logged = np.log1p(np.clip(smooth - floor, 0, None))
    sigma = max(4.0, min(smooth.shape) / 32)
    heavy = ndi.gaussian_filter(logged, sigma)
    top = heavy >= np.percentile(heavy, 99.9)
    w = np.where(top, heavy - heavy[top].min() + 1e-12, 0.0)
    yy, xx = np.indices(smooth.shape)
    total = w.sum()
    if total <= 0:
        return (smooth.shape[1] - 1) / 2, (smooth.shape[0] - 1) / 2
    return float((w * xx).sum() / total), float((w * yy).sum() / total)


def _locally_dark(smooth: np.ndarray, floor: float) -> np.ndarray:
    """Pixels below half the local level (60th percentile over ~1/7 of the image)."""
    f = max(1, min(smooth.shape) // 64)
    level = ndi.percentile_filter(_block_mean(smooth, f), 60, size=9, mode="reflect")
    level = _block_expand(level, f, smooth.shape)
    return (smooth - floor) < _DARK_FRACTION * (level - floor)


def _estimate_centre(smooth: np.ndarray) -> tuple[float, float]:
    """Pattern centre for the search, [x, y], on the working image.

    The brightest region is a rough guess (a bar pulls it aside); it is
    refined by point symmetry with the locally dark pixels left out.
    """
    floor = float(np.percentile(smooth, 0.5))
    exclude = ndi.binary_dilation(_locally_dark(smooth, floor), iterations=3)
    return _symmetry_centre(smooth, floor, exclude, _guess_centre(smooth))


def _bin_quantiles(values: np.ndarray, bins: np.ndarray, n_bins: int, qs) -> list[np.ndarray]:
    """Quantiles ``qs`` of ``values`` in each bin (NaN for empty bins), then the counts.

    One sort of ``bin + scaled value`` (the scaled value in [0, 0.5]) orders
    the pixels by bin and by value within each bin.
    """
    flat = values.ravel().astype(np.float64)
    b = bins.ravel()
    lo = float(flat.min())
    span = float(flat.max()) - lo
    scale = 0.5 / span if span > 0 else 0.0
    keys = np.sort(b + (flat - lo) * scale)
    sorted_vals = (keys - np.floor(keys)) / scale + lo if scale else np.full(keys.shape, lo)
    counts = np.bincount(b, minlength=n_bins)
    starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
    has = counts > 0
    last = np.maximum(counts - 1, 0)
    out = []
    for q in qs:
        idx = starts + np.floor(q * last).astype(np.int64)
        level = np.full(n_bins, np.nan)
        level[has] = sorted_vals[idx[has]]
        out.append(level)
    return out + [counts]


def _radial_levels(smooth: np.ndarray, resid: np.ndarray, bins: np.ndarray, n_bins: int, sigma: float):
    """Reference level and noise of the smoothed image in each radius bin.

    The reference is the 60th percentile of the smoothed values; the noise
    is the median absolute high-pass residual, turned into the standard
    deviation of the smoothed image (so that a background that changes
    around the circle does not count as noise).
    """
    ref, counts = _bin_quantiles(smooth, bins, n_bins, [_REF_PERCENTILE])
    (mad,) = _bin_quantiles(np.abs(resid), bins, n_bins, [0.5])[:1]
    # White noise of standard deviation s0 leaves a residual (image minus its
    # Gaussian smoothing of sigma) of s0 * sqrt(1 - 3 / (4 pi sigma^2)), whose
    # median absolute value is 0.6745 of that; the smoothed image keeps
    # s0 / (2 sqrt(pi) sigma).
    kept = math.sqrt(1.0 - 3.0 / (4.0 * math.pi * sigma**2))
    noise = mad / (0.6745 * kept) / (2.0 * math.sqrt(math.pi) * sigma)
    has = counts > 0
    # Beyond the radius with the most pixels the bins shrink to arcs in the
    # image corners, which a bar can fill: there, hold the last reliable level.
    reliable = counts >= max(64, _MIN_ARC_FRACTION * min(smooth.shape))
    idx = np.arange(n_bins)
    k_most = int(np.argmax(counts))
    good = has & (reliable | (idx <= k_most))
    held = np.maximum.accumulate(np.where(good, idx, -1))
    held = np.where(held < 0, int(np.flatnonzero(good)[0]), held)
    ref, noise = ref[held], noise[held]
    ref = ndi.median_filter(ref, size=3, mode="nearest")
    noise = ndi.median_filter(noise, size=5, mode="nearest")
    return ref, noise


def _dark_against(smooth: np.ndarray, ref: np.ndarray, noise: np.ndarray, floor: float) -> np.ndarray:
    """Pixels darker than the reference by the fraction and the noise margin."""
    depth = ref - smooth
    need = np.maximum(_DARK_FRACTION * (ref - floor), _DARK_SIGMAS * noise)
    return (depth > need) & (ref > floor)


def _find_stop(work: np.ndarray, sigma: float, cx: float, cy: float) -> np.ndarray | None:
    """The beam-stop region on the working image, or None."""
    smooth = ndi.gaussian_filter(work, sigma)
    floor = float(np.percentile(smooth, 0.5))
    found = _bar_pass(smooth, work - smooth, sigma, cx, cy, floor)
    bar = found.bar
    if bar is None:
        return None

    # The tip: inside the bar's inner end every bin may be under the stop, so
    # judge those pixels against the reference just outside it (the bar may
    # begin a little inside the tip's edge: look a little further).
    r = found.r
    r_end = float(r[bar].min())
    if r_end > _MAX_TIP_FRACTION * min(smooth.shape):
        return bar  # a bar that stops short of the centre: no tip to find
    reach = r_end + max(3.0, 0.25 * r_end)
    inner = r <= reach
    k = min(int(reach), len(found.ref) - 1)
    ref_k, noise_k = found.ref[k], found.noise[k]
    tip_dark = _dark_against(smooth, ref_k, noise_k, floor)
    # A bright beam leaking through the tip may leave only a thin dark ring
    # around it, which the smoothing blurs away: look again, less smoothed.
    sharp = ndi.gaussian_filter(work, _TIP_SIGMA_PX)
    tip_dark |= _dark_against(sharp, ref_k, noise_k * sigma / _TIP_SIGMA_PX, floor)
    tip_dark &= inner
    region = ndi.binary_closing(bar | tip_dark, structure=np.ones((3, 3), bool)) | bar
    region = ndi.binary_fill_holes(region)
    labels, _ = ndi.label(region, structure=np.ones((3, 3), bool))
    keep = np.unique(labels[bar])
    return np.isin(labels, keep[keep > 0])


@dataclass
class _Pass:
    r: np.ndarray
    ref: np.ndarray
    noise: np.ndarray
    dark: np.ndarray
    bar: np.ndarray | None


def _bar_pass(
    smooth: np.ndarray, resid: np.ndarray, sigma: float, cx: float, cy: float, floor: float
) -> _Pass:
    """Dark pixels against the radial reference around (cx, cy), and the bars among them."""
    rows, cols = smooth.shape
    yy, xx = np.indices((rows, cols), dtype=np.float64)
    r = np.hypot(xx - cx, yy - cy)
    bins = np.floor(r).astype(np.int64)
    ref, noise = _radial_levels(smooth, resid, bins, int(bins.max()) + 1, sigma)
    ref_px = ref[bins]
    dark = _dark_against(smooth, ref_px, noise[bins], floor)
    deep = dark & (smooth - floor < (1.0 - _DEEP_FRACTION) * (ref_px - floor))
    return _Pass(r=r, ref=ref, noise=noise, dark=dark, bar=_select_bars(dark, deep))


def _symmetry_centre(smooth, floor, exclude, c0, *, max_side: int = 512):
    """Centre of point symmetry of the log image near ``c0``, [x, y].

    Minimises the mean squared difference between the image and its point
    reflection through c over the pixels not excluded (Friedel symmetry of
    a diffraction pattern), with the sums done by FFT.
    """
    f = max(1, math.ceil(max(smooth.shape) / max_side))
    img = _block_mean(np.log1p(np.clip(smooth - floor, 0, None)), f)
    w = _block_mean((~exclude).astype(np.float64), f)
    w = (w > 0.99).astype(np.float64)
    if w.sum() < 0.2 * w.size:
        return c0
    rows, cols = img.shape
    sh = (2 * rows, 2 * cols)
    fw = np.fft.rfft2(w, s=sh)
    fwl = np.fft.rfft2(w * img, s=sh)
    fwl2 = np.fft.rfft2(w * img * img, s=sh)
    n = np.fft.irfft2(fw * fw, s=sh)
    ssd = 2.0 * np.fft.irfft2(fwl2 * fw, s=sh) - 2.0 * np.fft.irfft2(fwl * fwl, s=sh)
    # shift s = 2c in block pixels; search near the first guess only
    sx0 = 2.0 * ((c0[0] + 0.5) / f - 0.5)
    sy0 = 2.0 * ((c0[1] + 0.5) / f - 0.5)
    reach = 2.0 * max(rows, cols) / 6
    sy, sx = np.ogrid[: sh[0], : sh[1]]
    ok = (n > 0.05 * w.sum()) & ((sx - sx0) ** 2 + (sy - sy0) ** 2 <= reach**2)
    if not ok.any():
        return c0
    cost = np.where(ok, ssd / np.maximum(n, 1e-9), np.inf)
    iy, ix = np.unravel_index(int(np.argmin(cost)), cost.shape)
    dx = _parabola_offset(cost, iy, ix, axis=1)
    dy = _parabola_offset(cost, iy, ix, axis=0)
    cxb, cyb = (ix + dx) / 2.0, (iy + dy) / 2.0
    return (cxb + 0.5) * f - 0.5, (cyb + 0.5) * f - 0.5


def _parabola_offset(a: np.ndarray, iy: int, ix: int, *, axis: int) -> float:
    """Sub-pixel offset of a minimum from a parabola through three samples."""
    i = iy if axis == 0 else ix
    if not 0 < i < a.shape[axis] - 1:
        return 0.0
    if axis == 0:
        lo, mid, hi = a[iy - 1, ix], a[iy, ix], a[iy + 1, ix]
    else:
        lo, mid, hi = a[iy, ix - 1], a[iy, ix], a[iy, ix + 1]
    curv = lo - 2.0 * mid + hi
    if not np.isfinite(curv) or curv <= 0:
        return 0.0
    return float(np.clip(0.5 * (lo - hi) / curv, -0.5, 0.5))


def _select_bars(dark: np.ndarray, deep: np.ndarray) -> np.ndarray | None:
    """The dark regions that look like a beam-stop bar, or None.

    A bar touches the image border, is elongated (principal axes ratio at
    least 2) and long (at least 15 % of the image side), is neither tiny nor
    most of the image, and has sharp edges: most of it is ``deep``, far
    darker than needed to count as dark (a background that merely fades on
    one side makes a soft-edged region that fails this).
    """
    rows, cols = dark.shape
    labels, n = ndi.label(dark, structure=np.ones((3, 3), bool))
    if n == 0:
        return None
    edge = np.zeros_like(dark)
    edge[0, :] = edge[-1, :] = edge[:, 0] = edge[:, -1] = True
    on_edge = np.unique(labels[edge & dark])
    on_edge = on_edge[on_edge > 0]
    if on_edge.size == 0:
        return None
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    deep_sizes = np.bincount(labels[deep], minlength=n + 1)
    n_px = rows * cols
    min_area = max(20, _MIN_AREA_FRACTION * n_px)
    keep = []
    for lab in on_edge:
        area = sizes[lab]
        if not min_area <= area <= _MAX_AREA_FRACTION * n_px:
            continue
        if deep_sizes[lab] < _MIN_DEEP_FRACTION * area:
            continue
        ys, xs = np.nonzero(labels == lab)
        length, elongation = _shape_of(xs, ys)
        if elongation >= _MIN_ELONGATION and length >= _MIN_LENGTH_FRACTION * min(rows, cols):
            keep.append(lab)
    if not keep:
        return None
    return np.isin(labels, keep)


def _shape_of(xs: np.ndarray, ys: np.ndarray) -> tuple[float, float]:
    """Length along the principal axis (1st-99th percentile span) and elongation."""
    pts = np.stack([xs, ys]).astype(float)
    if xs.size < 3:
        return float(xs.size), 1.0
    cov = np.cov(pts)
    ev, vec = np.linalg.eigh(cov)
    along = vec[:, 1] @ (pts - pts.mean(axis=1, keepdims=True))
    lo, hi = np.percentile(along, [1, 99])
    elongation = float("inf") if ev[0] <= 1e-12 else float(np.sqrt(ev[1] / ev[0]))
    return float(hi - lo), elongation


# --------------------------------------------------------------------------- #
# Detector defects
# --------------------------------------------------------------------------- #

# Line search: a column (row) is compared with a running median across columns
# (rows) of this width, which a gap of up to 4 lines cannot move.
_LINE_MEDIAN_WIDTH = 11
_LINE_BLOCKS = 16  # each half of a line is judged in blocks along its length
_LINE_HIGH, _LINE_LOW = 1.5, 0.55  # block ratio to the neighbours that makes a line odd
_LINE_MIN_FRACTION = 0.6  # "most of its length": this fraction of the blocks of a half
# Hot pixel: this many robust noise SDs above its 3x3 median, with every neighbour
# below this fraction of its excess (a spot, even a 1-px one, spreads into them)
_HOT_SIGMAS = 12.0
_HOT_NEIGHBOUR_FRACTION = 0.2
_DEAD_MIN_LEVEL = 20.0  # a 0 among neighbours this bright is dead (Poisson P(0) < 3e-9)


@dataclass(frozen=True)
class DetectorMask:
    """What :func:`find_detector_mask` found.

    Parameters
    ----------
    mask : (rows, cols) bool array
        True at every defective pixel found (and the border).
    line_columns, line_rows : tuple of int
        Columns and rows found to be gap or dead lines (along at least one
        half of their length).
    n_hot, n_dead : int
        Isolated hot and dead pixels found.
    border_px : int
        Width of the image border masked.
    """

    mask: np.ndarray
    line_columns: tuple[int, ...]
    line_rows: tuple[int, ...]
    n_hot: int
    n_dead: int
    border_px: int

    def to_dict(self) -> dict:
        """JSON-ready summary (without the mask itself)."""
        return {
            "line_columns": list(self.line_columns),
            "line_rows": list(self.line_rows),
            "n_hot": self.n_hot,
            "n_dead": self.n_dead,
            "border_px": self.border_px,
            "n_masked": int(self.mask.sum()),
        }


def _odd_lines(a: np.ndarray) -> np.ndarray:
    """(2, cols) bool: column j is odd over the top (0) or bottom (1) half of the rows.

    The image is summed in blocks of rows (so low counts still give a stable
    ratio); each column's block sum is compared with the running median of
    the block sums of ``_LINE_MEDIAN_WIDTH`` columns around it; a half is odd
    when most of its blocks are much brighter or much darker than the
    neighbours.
    """
    rows, cols = a.shape
    out = np.zeros((2, cols), bool)
    halves = ((0, rows // 2), (rows // 2, rows))
    for h, (r0, r1) in enumerate(halves):
        n_blocks = max(1, min(_LINE_BLOCKS // 2, (r1 - r0) // 8))
        bh = (r1 - r0) // n_blocks
        blocks = np.sort(a[r0 : r0 + bh * n_blocks].reshape(n_blocks, bh, a.shape[1]), axis=1)
        # the lower three quarters of each block's column: spots in a column (a net
        # aligned with the detector) do not make it a bright line
        keep = max(1, int(0.75 * bh))
        num = blocks[:, :keep, :].sum(axis=1)
        den = ndi.median_filter(num, size=(1, _LINE_MEDIAN_WIDTH), mode="nearest")
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = num / den
        # a block with no signal around it says nothing, unless the line itself is bright
        counts = keep
        informative = (den >= 4.0 * counts) | (num >= 4.0 * counts)
        odd = informative & ((ratio > _LINE_HIGH) | (ratio < _LINE_LOW))
        n_inf = informative.sum(axis=0)
        out[h] = (n_inf >= max(2, n_blocks // 2)) & (odd.sum(axis=0) >= _LINE_MIN_FRACTION * np.maximum(n_inf, 1))
    return out


def find_detector_mask(data, *, border_px: int = 2) -> DetectorMask:
    """Find the defects of a pixel detector: gap and dead lines, hot and dead pixels.

    Parameters
    ----------
    data : (rows, cols) array
        The image.
    border_px : int
        Width of the image border to exclude (edge pixels of a chip are often
        larger or less sensitive; a spot cut by the edge cannot be measured).

    Returns
    -------
    DetectorMask
        The mask (True = excluded) and what was found.

    Raises
    ------
    InputError
        If ``data`` is not a 2-D real image or ``border_px`` is negative.

    Notes
    -----
    - **Lines** (the gap cross of a multi-chip hybrid-pixel detector, whose
      larger pixels read about twice the signal or nothing, and dead rows or
      columns): the image is summed in blocks of rows (the lower three
      quarters of each column's values, so spots in a column do not count)
      and each column's block sum compared with the running median of the 11 columns around it; it is odd where most blocks of
      one half of the image (one chip) read more than 1.5 times or less
      than 0.55 times their neighbours. Rows likewise.
    - **Hot pixels**: more than 12 robust noise standard deviations above the
      median of their 3 × 3 neighbourhood while every neighbour stays below a
      fifth of that excess (a diffraction spot, even a one-pixel one blurred by
      the detector, spreads into its neighbours; a hot pixel does not).
    - **Dead pixels**: 0 where the 3 × 3 median is at least 20 counts
      (Poisson probability of a 0 below 3 × 10⁻⁹).
    - The outer ``border_px`` rows and columns.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.random.default_rng(0).poisson(50, (128, 128)).astype(float)
    >>> img[:, 64:66] *= 2.5  # a doubled gap
    >>> img[10, 20] = 4095    # a hot pixel
    >>> found = find_detector_mask(img)
    >>> found.line_columns, found.n_hot
    ((64, 65), 1)
    """
    arr = check_image_2d("data", data)
    if arr.dtype.kind not in "uifb":
        raise InputError(f"data must be a real image, got dtype {arr.dtype}")
    if isinstance(border_px, bool) or not isinstance(border_px, (int, np.integer)) or border_px < 0:
        raise InputError(f"border_px must be an integer >= 0, got {border_px!r}")
    a = np.asarray(arr, dtype=np.float64)
    finite = np.isfinite(a)
    if not finite.all():
        a = np.where(finite, a, 0.0)
    rows, cols = a.shape
    mask = ~finite
    if rows < 16 or cols < 16:
        raise InputError(f"data must be at least 16 x 16 pixels, got shape {arr.shape}")

    odd_cols = _odd_lines(a)
    odd_rows = _odd_lines(a.T)
    half_r, half_c = rows // 2, cols // 2
    line_mask = np.zeros(a.shape, bool)
    line_mask[:half_r, odd_cols[0]] = True
    line_mask[half_r:, odd_cols[1]] = True
    line_mask[odd_rows[0], :half_c] = True
    line_mask[odd_rows[1], half_c:] = True
    mask |= line_mask

    # isolated pixels, judged with the lines left out of the neighbourhoods
    med = ndi.median_filter(a, size=3, mode="nearest")
    resid = np.where(line_mask, 0.0, a - med)
    f = 32
    pr, pc = (-rows) % f, (-cols) % f
    padded = np.pad(np.abs(resid), ((0, pr), (0, pc)), mode="reflect")
    blocks = padded.reshape(padded.shape[0] // f, f, padded.shape[1] // f, f)
    noise_b = 1.4826 * np.median(blocks, axis=(1, 3))
    noise = np.repeat(np.repeat(noise_b, f, axis=0), f, axis=1)[:rows, :cols]
    noise = np.maximum(noise, np.sqrt(np.maximum(med, 0.0)) * 0.5 + 0.5)  # counts at least Poisson-like
    ring = np.ones((3, 3), bool)
    ring[1, 1] = False
    nb = ndi.maximum_filter(resid, footprint=ring, mode="nearest")
    hot = (resid > _HOT_SIGMAS * noise) & (nb < _HOT_NEIGHBOUR_FRACTION * resid) & ~line_mask
    dead = (a == 0) & (med >= _DEAD_MIN_LEVEL) & ~line_mask
    mask |= hot | dead
    if border_px:
        b = int(border_px)
        mask[:b, :] = mask[-b:, :] = True
        mask[:, :b] = mask[:, -b:] = True
    lc = tuple(int(j) for j in np.flatnonzero(odd_cols.any(axis=0)))
    lr = tuple(int(i) for i in np.flatnonzero(odd_rows.any(axis=0)))
    return DetectorMask(mask, lc, lr, int(hot.sum()), int(dead.sum()), int(border_px))


# --------------------------------------------------------------------------- #
# All of them
# --------------------------------------------------------------------------- #

#: A saturated region smaller than this (pixels) is a saturated spot, which the
#: automatic mask leaves for the spot finder to keep and flag; the beam's plateau
#: and its bloom are larger (common practice).
MIN_MASKED_SATURATION_PX = 40


def _large_saturation(saturated: np.ndarray) -> np.ndarray:
    """The saturated regions of at least ``MIN_MASKED_SATURATION_PX`` pixels."""
    if not saturated.any():
        return saturated
    labels, n = ndi.label(saturated, structure=np.ones((3, 3), bool))
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    big = sizes >= MIN_MASKED_SATURATION_PX
    big[0] = False
    return big[labels]


def find_auto_mask(
    data, *, centre_xy=None, saturation_value: float | None = None, detector_defects: bool = True
) -> np.ndarray:
    """Mask the saturated beam, the beam stop and the detector's defects.

    Parameters
    ----------
    data : (rows, cols) array
        The image.
    centre_xy : [x, y], optional
        Pattern centre or a guess, for the beam-stop search.
    saturation_value : float, optional
        Detector saturation value (see :func:`find_saturated_mask`).
    detector_defects : bool
        Include :func:`find_detector_mask` (gap and dead lines, hot and dead
        pixels, the border).

    Returns
    -------
    (rows, cols) bool array
        The union of the large regions of :func:`find_saturated_mask` (at
        least ``MIN_MASKED_SATURATION_PX`` pixels, grown: the beam and its
        bloom; saturated spots are left to the spot finder, which keeps them
        for their positions and flags them), :func:`find_beam_stop_mask` and
        :func:`find_detector_mask`, with their default settings.
    """
    out = _large_saturation(find_saturated_mask(data, saturation_value=saturation_value))
    if not detector_defects:
        return out | find_beam_stop_mask(data, centre_xy=centre_xy)
    arr = check_image_2d("data", data)
    defects = find_detector_mask(arr).mask
    # the beam-stop search sees the defects filled from their nearest good pixels, so a
    # dead gap line (a dark bar from edge to edge) is not taken for a beam stop
    inner = defects.copy()
    inner[[0, -1], :] = inner[:, [0, -1]] = False
    filled = arr
    if inner.any() and not inner.all():
        idx = ndi.distance_transform_edt(inner, return_distances=False, return_indices=True)
        filled = arr[idx[0], idx[1]]
    if centre_xy is None:
        # a visible direct beam is the centre the beam-stop search needs (its own guess,
        # the brightest region, can be pulled aside by a film halo)
        from saedkit.core.detection.centre import _direct_beam_guess

        centre_xy = _direct_beam_guess(arr, defects)
    return out | find_beam_stop_mask(filled, centre_xy=centre_xy) | defects


# --------------------------------------------------------------------------- #
# Editing
# --------------------------------------------------------------------------- #


def _checked_mask(mask) -> np.ndarray:
    arr = np.asarray(mask)
    if arr.dtype != np.bool_ or arr.ndim != 2:
        raise InputError(f"mask must be a 2-D boolean array, got dtype {arr.dtype} shape {arr.shape}")
    return arr


def mask_disc(mask, centre_xy, radius_px: float, *, value: bool = True) -> np.ndarray:
    """Set the pixels within a disc to ``value``; return a new mask.

    Parameters
    ----------
    mask : (rows, cols) bool array
        Mask to start from (not changed).
    centre_xy : [x, y]
        Disc centre, pixels.
    radius_px : float
        Disc radius; a pixel is inside when its centre is within it.
    value : bool
        True to exclude the pixels, False to include them again.

    Examples
    --------
    >>> import numpy as np
    >>> int(mask_disc(np.zeros((9, 9), bool), (4, 4), 1.0).sum())
    5
    """
    arr = _checked_mask(mask)
    cx, cy = check_xy("centre_xy", centre_xy)
    radius = check_finite("radius_px", radius_px)
    if radius < 0:
        raise InputError(f"radius_px must be >= 0, got {radius_px!r}")
    out = arr.copy()
    draw_disc(out, (cx, cy), radius, value=value)
    return out


def draw_disc(mask: np.ndarray, centre_xy, radius_px: float, *, value: bool = True) -> None:
    """Set the pixels of a bool ``mask`` within a disc to ``value``, in place (many discs, one copy)."""
    cx, cy = float(centre_xy[0]), float(centre_xy[1])
    radius = float(radius_px)
    rows, cols = mask.shape
    # beyond the farthest pixel corner a disc covers the whole mask; clamping keeps a huge radius
    # (or a centre far off the image) from overflowing int() and the squared distances
    reach = max(math.hypot(x - cx, y - cy) for x in (0.0, float(cols)) for y in (0.0, float(rows)))
    if radius >= reach:
        mask[...] = bool(value)
        return
    y0, y1 = max(int(math.floor(cy - radius)), 0), min(int(math.ceil(cy + radius)) + 1, rows)
    x0, x1 = max(int(math.floor(cx - radius)), 0), min(int(math.ceil(cx + radius)) + 1, cols)
    if y0 < y1 and x0 < x1:
        yy, xx = np.ogrid[y0:y1, x0:x1]
        inside = (xx - cx) ** 2 + (yy - cy) ** 2 <= radius**2
        mask[y0:y1, x0:x1][inside] = bool(value)


def mask_polygon(mask, vertices_xy, *, value: bool = True) -> np.ndarray:
    """Set the pixels inside a polygon to ``value``; return a new mask.

    Parameters
    ----------
    mask : (rows, cols) bool array
        Mask to start from (not changed).
    vertices_xy : (N, 2) array of [x, y], N >= 3
        Polygon corners in order (closed automatically).
    value : bool
        True to exclude, False to include again.
    """
    from skimage.draw import polygon

    arr = _checked_mask(mask)
    verts = np.asarray(vertices_xy, dtype=float)
    if verts.ndim != 2 or verts.shape[1] != 2 or len(verts) < 3:
        raise InputError(f"vertices_xy must have shape (N, 2) with N >= 3, got shape {verts.shape}")
    if not np.all(np.isfinite(verts)):
        raise InputError("vertices_xy must be finite")
    out = arr.copy()
    rr, cc = polygon(verts[:, 1], verts[:, 0], shape=arr.shape)
    out[rr, cc] = bool(value)
    return out


def mask_rectangle(mask, corner_xy, opposite_xy, *, value: bool = True) -> np.ndarray:
    """Set the pixels of an axis-aligned rectangle to ``value``; return a new mask.

    Parameters
    ----------
    mask : (rows, cols) bool array
        Mask to start from (not changed).
    corner_xy, opposite_xy : [x, y]
        Two opposite corners, in any order; a pixel is inside when its centre
        lies within the rectangle (edges included). A rotated rectangle is a
        polygon: use :func:`mask_polygon`.
    value : bool
        True to exclude, False to include again.

    Examples
    --------
    >>> import numpy as np
    >>> int(mask_rectangle(np.zeros((10, 10), bool), (2, 3), (4, 5)).sum())
    9
    """
    arr = _checked_mask(mask)
    ax, ay = check_xy("corner_xy", corner_xy)
    bx, by = check_xy("opposite_xy", opposite_xy)
    rows, cols = arr.shape
    x0, x1 = max(math.ceil(min(ax, bx)), 0), min(math.floor(max(ax, bx)) + 1, cols)
    y0, y1 = max(math.ceil(min(ay, by)), 0), min(math.floor(max(ay, by)) + 1, rows)
    out = arr.copy()
    if x0 < x1 and y0 < y1:
        out[y0:y1, x0:x1] = bool(value)
    return out
