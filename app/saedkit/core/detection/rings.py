"""Ring patterns: radial profile, ring peaks, centre and elliptical distortion.

A polycrystalline film (an evaporated Au or Al film used as a calibration
standard, say) gives concentric rings. With projector astigmatism every ring
becomes an ellipse with the same centre, the same ellipticity ``e`` and the
same major-axis angle ``phi`` (the :class:`~saedkit.core.distortion.Ellipse`
model: an ideal offset ``v`` appears at ``D·v``). The radius saedkit reports
for a ring is the mean of its semi-axes, which is the ideal radius ``R``.

The steps, each usable on its own:

* :func:`calculate_radial_profile` — the azimuthal mean of the image as a
  function of the ellipse-corrected radius ``|D⁻¹(p − c)|``;
* :func:`find_ring_peaks` — rings in a profile, above a background that falls
  steeply with radius, refined to a fraction of a bin;
* :func:`sample_ring_points` — points on one ring in many azimuthal sectors;
* :func:`fit_concentric_ellipses` — one centre, one ``(e, phi)`` and one radius
  per ring from those points, by least squares;
* :func:`find_rings` — the whole job, iterated.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, optimize, signal

from saedkit.core._validate import check_image_2d, check_points_xy, check_positive, check_xy
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import FitError, InputError

__all__ = [
    "RadialProfile",
    "RingPeak",
    "EllipseFit",
    "RingFit",
    "RejectedRing",
    "MIN_ARC_POINTS",
    "MIN_ARC_DEG",
    "calculate_radial_profile",
    "find_ring_peaks",
    "sample_ring_points",
    "fit_concentric_ellipses",
    "find_rings",
]

_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))  # 2.3548...
_PROFILE_BLOCK_PIXELS = 131072  # pixels per block of rows in calculate_radial_profile
_MAD_TO_SIGMA = 1.4826  # standard deviation of a normal distribution per median absolute deviation


def _finite_or_none(values) -> list:
    """A JSON-ready list: non-finite numbers become ``None``."""
    return [float(v) if math.isfinite(v) else None for v in np.asarray(values, dtype=float)]


def _check_mask(mask, shape: tuple[int, ...]) -> np.ndarray | None:
    """Return ``mask`` as a bool array of ``shape`` (True = excluded), or None."""
    if mask is None:
        return None
    m = np.asarray(mask)
    if m.shape != tuple(shape):
        raise InputError(f"mask must have the image's shape {tuple(shape)}, got shape {m.shape}")
    if m.dtype != bool:
        raise InputError(f"mask must be a boolean array (True = pixel excluded), got dtype {m.dtype}")
    return m


def _check_ellipse(ellipse) -> Ellipse:
    if not isinstance(ellipse, Ellipse):
        raise InputError(f"ellipse must be an Ellipse, got {type(ellipse).__name__}")
    return ellipse




# --------------------------------------------------------------------------- profile


@dataclass(frozen=True)
class RadialProfile:
    """Azimuthally averaged intensity as a function of (ellipse-corrected) radius.

    Parameters
    ----------
    radius_px : (M,) ndarray
        Bin centres in pixels: the mean radius of the pixels that fell in each
        bin (the nominal centre ``(k + 1/2)·bin_px`` for an empty bin).
    intensity : (M,) ndarray
        Mean pixel value in each bin (NaN for an empty bin).
    sigma : (M,) ndarray
        Standard error of that mean, ``s/√n`` (NaN with fewer than 2 pixels).
    counts : (M,) ndarray of int
        Number of pixels in each bin.
    bin_px : float
        Bin width, pixels.
    """

    radius_px: np.ndarray = field(repr=False)
    intensity: np.ndarray = field(repr=False)
    sigma: np.ndarray = field(repr=False)
    counts: np.ndarray = field(repr=False)
    bin_px: float = 1.0

    def __repr__(self) -> str:
        n = int(np.count_nonzero(self.counts))
        return (
            f"RadialProfile({len(self.radius_px)} bins of {self.bin_px:g} px, "
            f"{n} non-empty, {int(self.counts.sum())} pixels)"
        )

    def to_dict(self) -> dict:
        """JSON-ready record (empty bins give ``None``)."""
        return {
            "bin_px": float(self.bin_px),
            "radius_px": _finite_or_none(self.radius_px),
            "intensity": _finite_or_none(self.intensity),
            "sigma": _finite_or_none(self.sigma),
            "counts": [int(c) for c in self.counts],
        }


def _quadratic_form(ellipse: Ellipse) -> tuple[float, float, float]:
    """Coefficients of ``|D⁻¹v|² = a·dx² + 2b·dx·dy + c·dy²``."""
    m = ellipse.inverse_matrix
    g = m.T @ m
    return float(g[0, 0]), float(g[0, 1]), float(g[1, 1])


def calculate_radial_profile(
    image,
    centre_xy,
    *,
    mask=None,
    ellipse: Ellipse = NO_DISTORTION,
    bin_px: float = 1.0,
    r_max_px: float | None = None,
) -> RadialProfile:
    """Azimuthal mean of an image about a centre, with the ellipse corrected.

    Parameters
    ----------
    image : (rows, cols) array
        The pattern, any real dtype. Non-finite pixels of a float image are skipped.
    centre_xy : [x, y]
        Pattern centre, pixels.
    mask : (rows, cols) bool array, optional
        True where a pixel is excluded (beam stop, dead pixels).
    ellipse : Ellipse
        Elliptical distortion to correct: the radius of a pixel ``p`` is
        ``|D⁻¹(p − c)|``, the ideal (undistorted) radius.
    bin_px : float
        Bin width in pixels of ideal radius.
    r_max_px : float, optional
        Largest radius to include; the farthest image corner by default.

    Returns
    -------
    RadialProfile
        Bin ``k`` holds the pixels with ``k·bin_px ≤ r < (k + 1)·bin_px``.

    Raises
    ------
    InputError
        If the image is not 2-D, the mask has the wrong shape or type, or an
        option is out of range.

    Notes
    -----
    One pass over the image in blocks of rows that stay in the processor
    cache. For each block the squared radius is evaluated as the quadratic
    form ``a·dx² + 2b·dx·dy + c·dy²`` of ``G = D⁻ᵀD⁻¹`` in float32 (precise to
    about 10⁻³ px at 5000 px) and truncated to the bin index; three
    ``np.bincount`` calls accumulate the pixel count with the radii (weights
    ``K + frac(r)`` with ``K`` a power of two above the number of pixels: a
    bin's sum divided by ``K`` counts its pixels, the remainder sums their
    fractional radii), the intensities and the squared intensities: about
    2.5 times the cost of one plain ``np.bincount`` over the image. Each
    pixel goes wholly into one bin (splitting pixels between neighbouring
    bins would cost two more bincounts); the reported bin radius is the mean
    radius of its pixels, so a bin's intensity and radius describe the same
    pixels exactly.

    Examples
    --------
    >>> yy, xx = np.indices((64, 64))
    >>> img = np.hypot(xx - 31.5, yy - 30.0)
    >>> p = calculate_radial_profile(img, [31.5, 30.0])
    >>> bool(np.allclose(p.intensity[5:30], p.radius_px[5:30], atol=1e-4))
    True
    """
    img = check_image_2d("image", image)
    if img.dtype.kind not in "uif":
        raise InputError(f"image must have a real numeric dtype, got {img.dtype}")
    c = check_xy("centre_xy", centre_xy)
    msk = _check_mask(mask, img.shape)
    _check_ellipse(ellipse)
    bin_px = check_positive("bin_px", bin_px)
    rows, cols = img.shape
    a, b, cc = _quadratic_form(ellipse)
    corners = np.array([[0, 0], [cols - 1, 0], [0, rows - 1], [cols - 1, rows - 1]], float) - c
    r_corner = float(np.max(np.hypot(*ellipse.correct_array(corners).T)))
    if r_max_px is None:
        r_max_px = r_corner + bin_px
    else:
        r_max_px = check_positive("r_max_px", r_max_px)
    clip = r_max_px < r_corner + bin_px  # some pixels lie beyond the last bin
    n_bins = max(int(math.ceil(r_max_px / bin_px)), 1)
    trash = n_bins  # index of the bin that collects masked and out-of-range pixels
    size = n_bins + 1

    s = 1.0 / bin_px**2
    dx = np.arange(cols, dtype=np.float64) - c[0]
    dy = np.arange(rows, dtype=np.float64) - c[1]
    ax = (a * s * dx * dx).astype(np.float32)
    bx = (2.0 * b * s * dx).astype(np.float32)
    cy = (cc * s * dy * dy).astype(np.float32)
    dyf = dy.astype(np.float32)
    check_nonfinite = img.dtype.kind == "f"

    # K: a power of two above the number of pixels, so above any bin's count
    count_unit = float(2 ** int(math.ceil(math.log2(rows * cols + 1))))
    count_frac = np.zeros(size)
    sum_w = np.zeros(size)
    sum_w2 = np.zeros(size)
    # blocks of about 128k pixels: every temporary stays in the processor's cache
    block = max(1, min(rows, _PROFILE_BLOCK_PIXELS // max(cols, 1)))
    r_buf = np.empty((block, cols), np.float32)
    i_buf = np.empty((block, cols), np.intp)
    w_buf = np.empty((block, cols), np.float64)
    ri_buf = np.empty((block, cols), np.float32)
    i32_buf = np.empty((block, cols), np.int32)
    c_buf = np.empty((block, cols), np.float64)
    for y0 in range(0, rows, block):
        y1 = min(y0 + block, rows)
        m = y1 - y0
        r = r_buf[:m]
        r_int = ri_buf[:m]
        i32 = i32_buf[:m]
        idx = i_buf[:m]
        cf = c_buf[:m]
        w = w_buf[:m]
        # |D^-1 (p - c)|^2 / bin^2 = a dx^2 + 2b dx dy + c dy^2, built in place
        np.multiply(dyf[y0:y1, None], bx[None, :], out=r)
        r += ax
        r += cy[y0:y1, None]
        if y0 - 2 <= c[1] <= y1 + 1:  # near the centre rounding can make a tiny negative
            np.maximum(r, 0.0, out=r)
        np.sqrt(r, out=r)
        if clip:
            np.minimum(r, trash, out=r)
        np.floor(r, out=r_int)
        np.subtract(r, r_int, out=r)  # r: fractional part
        # float32 -> int32 -> intp is several times faster than float32 -> intp
        np.copyto(i32, r_int, casting="unsafe")
        np.copyto(idx, i32)
        # pixel count and radius sum in one pass: each pixel adds K + frac(r),
        # so a bin's sum is n·K + Σ frac with Σ frac < n < K
        np.add(r, count_unit, out=cf, dtype=np.float64)  # in float64: frac keeps its digits
        np.copyto(w, img[y0:y1])
        if msk is not None:
            np.copyto(idx, trash, where=msk[y0:y1])
        if check_nonfinite:
            bad = ~np.isfinite(w)
            if bad.any():
                np.copyto(idx, trash, where=bad)
                w[bad] = 0.0
        fi = idx.ravel()
        count_frac += np.bincount(fi, weights=cf.ravel(), minlength=size)
        sum_w += np.bincount(fi, weights=w.ravel(), minlength=size)
        np.multiply(w, w, out=w)
        sum_w2 += np.bincount(fi, weights=w.ravel(), minlength=size)

    count_frac, sum_w, sum_w2 = count_frac[:n_bins], sum_w[:n_bins], sum_w2[:n_bins]
    counts = np.floor(count_frac / count_unit)
    sum_frac = count_frac - counts * count_unit
    k = np.arange(n_bins)
    nominal = (k + 0.5) * bin_px
    with np.errstate(invalid="ignore", divide="ignore"):
        radius = np.where(counts > 0, (k + sum_frac / counts) * bin_px, nominal)
        mean = np.where(counts > 0, sum_w / counts, np.nan)
        var = (sum_w2 - sum_w * mean) / (counts - 1)
        sem = np.where(counts > 1, np.sqrt(np.clip(var, 0.0, None) / counts), np.nan)
    return RadialProfile(
        radius_px=radius,
        intensity=mean,
        sigma=sem,
        counts=counts.astype(np.int64),
        bin_px=bin_px,
    )


# --------------------------------------------------------------------------- peaks


@dataclass(frozen=True)
class RingPeak:
    """One ring.

    Parameters
    ----------
    radius_px : float
        Ring radius in pixels: the ideal radius, i.e. the mean of the ellipse's
        semi-axes when the distortion has been corrected.
    radius_sigma_px : float
        Its standard uncertainty, pixels.
    height : float
        Peak height above the background, in image units.
    width_px : float
        Full width at half maximum of the ring's radial profile, pixels.
    snr : float
        Height over the noise of the radial profile at the peak.
    n_points : int
        Points on the ring behind ``radius_px`` in an ellipse fit (0 when the
        radius comes from the radial profile alone).
    """

    radius_px: float
    radius_sigma_px: float
    height: float
    width_px: float
    snr: float
    n_points: int = 0

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return {
            "radius_px": float(self.radius_px),
            "radius_sigma_px": float(self.radius_sigma_px),
            "height": float(self.height),
            "width_px": float(self.width_px),
            "snr": float(self.snr),
            "n_points": int(self.n_points),
        }


def _snip_background(y: np.ndarray, half_window: int) -> np.ndarray:
    """Smooth lower envelope of ``y`` (SNIP clipping on a log-log-sqrt scale).

    Peaks narrower than about ``half_window`` samples are cut off; a convex
    background (an exponential or Lorentzian fall) is followed as it is.
    """
    offset = float(np.min(y))
    v = np.log(np.log(np.sqrt(y - offset + 1.0) + 1.0) + 1.0)
    n = len(v)
    h = min(int(half_window), n - 1)
    # decreasing clipping window gives a smoother envelope than increasing;
    # the ends are continued as straight lines (odd reflection) so that a
    # steep fall at the first bins is not clipped away
    for p in range(h, 0, -1):
        pad = np.pad(v, p, mode="reflect", reflect_type="odd")
        np.minimum(v, 0.5 * (pad[: n] + pad[2 * p :]), out=v)
    return np.expm1(np.expm1(v)) ** 2 - 1.0 + offset


def _background_and_noise(y, sem, n_pix, half: int) -> tuple[np.ndarray, np.ndarray]:
    """Smooth background under the peaks of a radial profile, and the noise per bin.

    The lower envelope of the lightly smoothed profile (SNIP) sits below the
    noise; it is lifted by the running median of the normalised residual over
    the bins away from peaks. The noise is the standard error of each bin,
    with bins on ring flanks (whose spread also holds the ring's slope across
    the bin) capped by the running median of the per-pixel spread, scaled up
    if the bin-to-bin scatter is larger than that.
    """
    size = 4 * half + 1
    smooth = ndimage.uniform_filter1d(y, 3, mode="nearest")
    bg = _snip_background(smooth, half)
    root_n = np.sqrt(n_pix)
    pixel_sd = ndimage.median_filter(sem * root_n, size=size, mode="nearest")
    sem_n = np.minimum(sem, pixel_sd / root_n)
    bins = np.arange(len(y))
    z0 = (y - bg) / sem_n

    def running(v):
        return ndimage.uniform_filter1d(
            ndimage.median_filter(v, size=size, mode="nearest"), 2 * half + 1, mode="nearest"
        )

    # first over all bins (the rings are a minority of them), then over the
    # bins away from the peaks found above that first estimate
    lift = running(z0)
    quiet = np.ones(len(y), bool)
    for _ in range(2):
        quiet = ~ndimage.binary_dilation(z0 - lift > 3.0, iterations=max(2, half // 3))
        if np.count_nonzero(quiet) < 5:
            break
        lift = running(np.interp(bins, bins[quiet], z0[quiet]))
    bg = bg + lift * sem_n
    z = (y - bg) / sem_n
    dz = np.diff(z)[quiet[1:] & quiet[:-1]]
    scale = _MAD_TO_SIGMA * np.median(np.abs(dz - np.median(dz))) / math.sqrt(2.0) if len(dz) > 5 else 1.0
    noise = sem_n * max(1.0, float(scale) if np.isfinite(scale) else 1.0)
    # the background model itself is good to about 0.25 % of the background:
    # below that, bumps are not rings however small the counting noise
    noise = np.maximum(noise, 2.5e-3 * np.abs(bg))
    return bg, noise


def _gaussians_linear(x, params):
    """Sum of Gaussians ``(height, centre, sigma)·k`` plus ``c0 + c1·x``, and its Jacobian."""
    n = (len(params) - 2) // 3
    out = params[-2] + params[-1] * x
    jac = np.empty((len(x), len(params)))
    for i in range(n):
        h, mu, s = params[3 * i : 3 * i + 3]
        u = (x - mu) / s
        g = np.exp(-0.5 * u * u)
        out = out + h * g
        jac[:, 3 * i] = g
        jac[:, 3 * i + 1] = h * g * u / s
        jac[:, 3 * i + 2] = h * g * u * u / s
    jac[:, -2] = 1.0
    jac[:, -1] = x
    return out, jac


@dataclass
class _GroupFit:
    """Gaussians fitted to one stretch of a profile (internal)."""

    height: np.ndarray
    mu: np.ndarray
    sigma: np.ndarray
    sigma_mu: np.ndarray
    chi2_red: float
    resid: np.ndarray  # data - model


def _fit_peak_group(x, y, sy, starts) -> _GroupFit | None:
    """Least-squares fit of Gaussians plus a straight line; None if it fails."""
    x0 = float(x.mean())
    xc = x - x0  # centred, so the line's two terms are nearly uncorrelated
    w = np.ones_like(y) if sy is None else 1.0 / np.asarray(sy, float)
    p0, lo, hi = [], [], []
    span = float(x[-1] - x[0])
    for h, mu, s in starts:
        s = float(np.clip(s, 0.1, span))
        p0 += [max(float(h), 1e-12), float(np.clip(mu - x0, xc[0], xc[-1])), s]
        lo += [0.0, xc[0], 0.05 * s]
        hi += [np.inf, xc[-1], max(span, 2.0 * s)]
    p0 += [0.0, 0.0]
    lo += [-np.inf, -np.inf]
    hi += [np.inf, np.inf]
    n_par = len(p0)
    if len(x) <= n_par:
        return None

    def fun(p):
        return (_gaussians_linear(xc, p)[0] - y) * w

    def jac(p):
        return _gaussians_linear(xc, p)[1] * w[:, None]

    try:
        sol = optimize.least_squares(fun, p0, jac=jac, method="lm", x_scale="jac", max_nfev=400)
    except (ValueError, np.linalg.LinAlgError):
        return None
    # unconstrained Levenberg-Marquardt is much faster than a bounded fit here;
    # a solution outside the plausible range counts as a failed fit
    n = len(starts)
    sol.x[2 : 3 * n : 3] = np.abs(sol.x[2 : 3 * n : 3])  # the model is even in sigma
    if not np.all(np.isfinite(sol.x)) or np.any(sol.x < lo) or np.any(sol.x > hi):
        return None
    chi2_red = float(np.sum(sol.fun**2) / (len(x) - n_par))
    jtj = sol.jac.T @ sol.jac
    try:
        cov = np.linalg.inv(jtj) * chi2_red
    except np.linalg.LinAlgError:
        return None
    err = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    if not np.all(np.isfinite(err)):
        return None
    p = sol.x
    return _GroupFit(
        height=p[0 : 3 * n : 3].copy(),
        mu=p[1 : 3 * n : 3] + x0,
        sigma=np.abs(p[2 : 3 * n : 3]),
        sigma_mu=err[1 : 3 * n : 3],
        chi2_red=chi2_red,
        resid=y - _gaussians_linear(xc, p)[0],
    )


def _split_unresolved(x, y, sy, fit: _GroupFit, min_snr: float, max_added: int = 2) -> _GroupFit:
    """Add a Gaussian where a fit leaves a strong, coherent residual (an unresolved ring).

    A ring closer to a brighter one than about twice their widths shows as a
    shoulder, not a separate maximum. If the fit is poor (reduced χ² > 2) and
    an extra Gaussian at the largest smoothed residual halves χ², every
    Gaussian is at least ``min_snr`` noise and 10 % of the strongest high,
    and they lie at least one width apart, the extra one is kept.
    """
    for _ in range(max_added):
        if fit.chi2_red <= 2.0:
            break
        s_med = float(np.median(fit.sigma))
        step = float(np.median(np.diff(x))) if len(x) > 1 else 1.0
        rs = ndimage.gaussian_filter1d(fit.resid, max(s_med / step, 0.5), mode="nearest")
        # look for the missing ring only among the fitted ones, not at the window's ends
        core = (x >= np.min(fit.mu - 2.0 * fit.sigma)) & (x <= np.max(fit.mu + 2.0 * fit.sigma))
        if not core.any():
            break
        rs = np.where(core, rs, -np.inf)
        j = int(np.argmax(rs))
        if rs[j] <= 0:
            break
        starts = [(h, m, s) for h, m, s in zip(fit.height, fit.mu, fit.sigma)] + [(rs[j], x[j], s_med)]
        trial = _fit_peak_group(x, y, sy, starts)
        if trial is None or trial.chi2_red > 0.5 * fit.chi2_red:
            break
        noise_at = np.interp(trial.mu, x, sy)
        mu_sorted = np.sort(trial.mu)
        sep_ok = np.all(np.diff(mu_sorted) >= np.max(trial.sigma))
        # a strong ring's small departure from a Gaussian is not another ring
        strong_enough = np.all(trial.height >= np.maximum(min_snr * noise_at, 0.1 * trial.height.max()))
        if not (strong_enough and sep_ok):
            break
        fit = trial
    return fit


def _half_max_widths(y: np.ndarray, peaks: np.ndarray, base_reach: int | None = None) -> np.ndarray:
    """Full width at half height of each peak of ``y`` (in samples), by walking down each side.

    With ``base_reach`` the height is taken above the lowest value within that many samples on
    either side (not above zero): a ring sitting on a broad hump that the background leaves in
    ``y`` (an amorphous halo) keeps its own width.
    """
    out = np.empty(len(peaks))
    n = len(y)
    for k, i in enumerate(peaks):
        base = 0.0
        if base_reach:
            lo_i, hi_i = max(i - base_reach, 0), min(i + base_reach + 1, n)
            base = max(0.0, float(min(np.min(y[lo_i:i + 1]), np.min(y[i:hi_i]))))
        half = base + 0.5 * (y[i] - base)
        lo = i
        while lo > 0 and y[lo - 1] > half:
            lo -= 1
        hi = i
        while hi < n - 1 and y[hi + 1] > half:
            hi += 1
        # linear interpolation of the crossings
        left = lo - (y[lo] - half) / (y[lo] - y[lo - 1]) if lo > 0 and y[lo] != y[lo - 1] else lo - 0.5
        right = hi + (y[hi] - half) / (y[hi] - y[hi + 1]) if hi < n - 1 and y[hi] != y[hi + 1] else hi + 0.5
        out[k] = max(right - left, 1.0)
    return out


def find_ring_peaks(
    profile: RadialProfile,
    *,
    min_snr: float = 4.0,
    min_radius_px: float | None = None,
    max_rings: int = 30,
    background_window_px: float = 20.0,
) -> tuple[RingPeak, ...]:
    """Find rings in a radial profile.

    Parameters
    ----------
    profile : RadialProfile
        From :func:`calculate_radial_profile`.
    min_snr : float
        Smallest peak height above the background, in units of the profile's
        noise at the peak.
    min_radius_px : float, optional
        Ignore peaks nearer the centre than this. By default, the first three
        non-empty bins are skipped.
    max_rings : int
        Keep at most this many rings (the strongest, returned in radius order).
    background_window_px : float
        Features narrower than about this are treated as peaks, wider ones as
        background.

    Returns
    -------
    tuple of RingPeak
        In order of increasing radius; empty when there is no ring.

    Notes
    -----
    The background is the lower envelope of the profile by iterative clipping
    (SNIP, [1]_) on a ``log(log(√(y + 1) + 1) + 1)`` scale, which follows the
    steep, convex fall of the diffuse background and the central-beam tail,
    lifted by the running median of the residual away from the peaks (the
    clipped envelope sits in the noise's lower fringe). The noise is the
    standard error of each bin (on ring flanks, where a bin's spread also
    holds the ring's own slope, the local per-pixel spread over √n), scaled up
    if the bin-to-bin scatter is larger, and never below 0.25 % of the
    background (the background model's own accuracy). Peaks are found with
    :func:`scipy.signal.find_peaks` (height and prominence at least
    ``min_snr`` times the noise), then refined by a least-squares fit of a
    Gaussian plus a local straight line, jointly for rings whose windows
    overlap; a ring seen only as a shoulder of a brighter one is added when
    the fit needs it. The radius uncertainty is from the fit covariance
    (scaled by the reduced χ²). Peaks narrower than 1.5 bins (unless twice as
    strong as needed) or wider than ``background_window_px`` are dropped, and
    so is the core of an unmasked central beam.

    References
    ----------
    .. [1] C. G. Ryan, E. Clayton, W. L. Griffin, S. H. Sie, D. R. Cousens,
       "SNIP, a statistics-sensitive background treatment for the quantitative
       analysis of PIXE spectra in geoscience applications", Nucl. Instrum.
       Methods B 34, 396 (1988).
    """
    if not isinstance(profile, RadialProfile):
        raise InputError(f"profile must be a RadialProfile, got {type(profile).__name__}")
    min_snr = check_positive("min_snr", min_snr)
    if int(max_rings) < 1:
        raise InputError(f"max_rings must be >= 1, got {max_rings!r}")
    background_window_px = check_positive("background_window_px", background_window_px)
    # bins of fewer than 8 pixels (the far corners) give no usable noise estimate
    good = (profile.counts >= 8) & np.isfinite(profile.intensity) & np.isfinite(profile.sigma)
    idx = np.flatnonzero(good)
    if len(idx) < 12:
        return ()
    bin_px = float(profile.bin_px)
    if min_radius_px is None:
        # skip the first bins and, when the central beam is neither masked
        # nor blocked (the profile starts at the centre with its maximum), its
        # core out to 1.5 times the radius where the profile first falls below
        # half that maximum: a saturated core's edge leaves a bump above the
        # clipped background
        inten = profile.intensity[idx]
        r_min = profile.radius_px[idx[min(3, len(idx) - 1)]]
        if profile.radius_px[idx[0]] <= 2.0 * bin_px and inten[0] >= 0.9 * np.max(inten):
            below = np.flatnonzero(inten < 0.5 * inten[0])
            if len(below):
                r_min = max(r_min, 1.5 * profile.radius_px[idx[below[0]]])
    else:
        r_min = float(min_radius_px)
    x = profile.radius_px[idx]
    y = profile.intensity[idx]
    sem = profile.sigma[idx]
    positive = sem > 0  # a bin of identical pixels (saturated, or noiseless data) has sem 0
    if positive.any():
        sem = np.where(positive, sem, np.median(sem[positive]))
        sem = np.maximum(sem, 1e-3 * np.median(sem))
    else:
        sem = np.full(len(idx), max(1e-3 * float(np.max(np.abs(profile.intensity[idx]))), 1e-12))

    n_pix = profile.counts[idx].astype(float)

    half_window = max(2, int(round(background_window_px / bin_px)))
    # the background is estimated on the regular grid of bin centres: where a
    # bin is only partly filled (an image corner, a mask edge) the mean radius
    # of its pixels is off its centre, and the profile would show a kink there
    x_nom = (idx + 0.5) * bin_px
    bg_nom, noise = _background_and_noise(np.interp(x_nom, x, y), sem, n_pix, half_window)
    bg = np.interp(x, x_nom, bg_nom)
    resid = y - bg
    zn = resid / noise
    pk, _ = signal.find_peaks(zn, height=min_snr, prominence=min_snr)
    pk = pk[x[pk] >= r_min]
    if len(pk) == 0:
        return ()
    # features wider than the clipping window are background, not rings
    # (each peak's width above the lowest point within the window on either side: a ring on an
    # amorphous halo that SNIP partly clipped is as narrow as it is, and the halo stays wide)
    narrow_enough = _half_max_widths(resid, pk, half_window) * bin_px <= background_window_px
    pk = pk[narrow_enough]
    if len(pk) == 0:
        return ()
    if len(pk) > max_rings:
        strongest = np.argsort(zn[pk])[::-1][: int(max_rings)]
        pk = np.sort(pk[strongest])
    widths = _half_max_widths(resid, pk, half_window) * bin_px
    sig0 = np.clip(widths / _FWHM_PER_SIGMA, 0.5 * bin_px, background_window_px)

    # group peaks whose fit windows overlap, fit each group jointly
    lo_r = x[pk] - 4.0 * sig0 - bin_px
    hi_r = x[pk] + 4.0 * sig0 + bin_px
    groups: list[list[int]] = [[0]]
    for k in range(1, len(pk)):
        if lo_r[k] <= hi_r[groups[-1][-1]]:
            groups[-1].append(k)
        else:
            groups.append([k])
    peaks: list[RingPeak] = []
    for grp in groups:
        sel = (x >= lo_r[grp[0]]) & (x <= hi_r[grp[-1]])
        xs, ys, ns = x[sel], resid[sel], noise[sel]
        starts = [(resid[pk[k]], x[pk[k]], sig0[k]) for k in grp]
        fit = _fit_peak_group(xs, ys, ns, starts) if len(xs) >= 3 * len(grp) + 3 else None
        if fit is not None:
            fit = _split_unresolved(xs, ys, ns, fit, min_snr)
            comps = [
                (fit.height[j], fit.mu[j], fit.sigma[j], fit.sigma_mu[j]) for j in range(len(fit.mu))
            ]
        else:  # three-point parabola through each peak bin
            comps = []
            for k in grp:
                i = pk[k]
                frac = 0.0
                if 0 < i < len(x) - 1:
                    y0, y1, y2 = resid[i - 1], resid[i], resid[i + 1]
                    den = y0 - 2 * y1 + y2
                    frac = float(np.clip(0.5 * (y0 - y2) / den, -0.5, 0.5)) if den < 0 else 0.0
                comps.append(
                    (resid[i], x[i] + frac * bin_px, sig0[k], sig0[k] / max(zn[i], 1.0))
                )
        for h, mu, s, smu in comps:
            if not xs[0] <= mu <= xs[-1]:
                continue
            i_near = int(np.argmin(np.abs(x - mu)))
            snr = h / noise[i_near]
            fwhm = s * _FWHM_PER_SIGMA
            # a feature narrower than 1.5 bins is a noise spike unless it is very strong
            narrow = fwhm < 1.5 * bin_px and snr < 2.0 * min_snr
            # wider than the clipping window: background, not a ring; or not located
            broad = fwhm > background_window_px or not smu < s
            if h <= 0 or snr < min_snr or mu < r_min or narrow or broad:
                continue
            peaks.append(
                RingPeak(
                    radius_px=float(mu),
                    radius_sigma_px=float(smu),
                    height=float(h),
                    width_px=float(fwhm),
                    snr=float(snr),
                )
            )
    peaks.sort(key=lambda p: p.radius_px)
    return tuple(peaks)


# --------------------------------------------------------------------------- ring sampling


def _sector_profiles(
    image: np.ndarray,
    mask: np.ndarray | None,
    centre: np.ndarray,
    ellipse: Ellipse,
    radius_px: float,
    n_sectors: int,
    half_width_px: float,
    step_px: float = 0.5,
):
    """Radial profiles across one ring, averaged within each azimuthal sector.

    Returns ``t`` (offsets from ``radius_px``), ``prof`` (n_sectors, n_t) with
    NaN rows for unusable sectors, and the mean ideal angle of each sector.
    """
    rows, cols = image.shape
    n_t = 2 * int(math.ceil(half_width_px / step_px)) + 1
    t = (np.arange(n_t) - n_t // 2) * step_px
    arc = 2.0 * math.pi * radius_px / n_sectors
    n_sub = int(np.clip(math.ceil(arc), 3, 64))
    sub = (np.arange(n_sub)[None, :] + 0.5) / n_sub
    theta = 2.0 * math.pi * (np.arange(n_sectors)[:, None] + sub) / n_sectors  # (S, U) ideal angles
    u = np.stack([np.cos(theta), np.sin(theta)], axis=-1)  # (S, U, 2) ideal directions
    du = u @ ellipse.matrix.T  # observed directions
    r = radius_px + t  # (T,)
    px = centre[0] + du[..., 0, None] * r  # (S, U, T)
    py = centre[1] + du[..., 1, None] * r
    x0 = np.floor(px).astype(np.intp)
    y0 = np.floor(py).astype(np.intp)
    inside = (x0 >= 0) & (y0 >= 0) & (x0 < cols - 1) & (y0 < rows - 1)
    ok = inside
    if mask is not None:
        xs = np.clip(x0, 0, cols - 2)
        ys = np.clip(y0, 0, rows - 2)
        hit = mask[ys, xs] | mask[ys, xs + 1] | mask[ys + 1, xs] | mask[ys + 1, xs + 1]
        ok = ok & ~hit
    vals = ndimage.map_coordinates(
        image, [py.ravel(), px.ravel()], order=1, mode="nearest", output=np.float64, prefilter=False
    ).reshape(px.shape)
    if image.dtype.kind == "f":
        ok = ok & np.isfinite(vals)
    line_ok = ok.all(axis=2)  # (S, U): a line is used only when all its samples are good
    n_ok = line_ok.sum(axis=1)
    vals = np.where(line_ok[..., None], vals, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        prof = vals.sum(axis=1) / n_ok[:, None]
        ang = np.arctan2(
            (np.sin(theta) * line_ok).sum(axis=1), (np.cos(theta) * line_ok).sum(axis=1)
        )
    usable = n_ok >= max(2, n_sub // 2)
    prof[~usable] = np.nan
    return t, prof, ang


def _gauss(t, mu, s):
    return np.exp(-0.5 * ((t - mu) / s) ** 2)


def _locate_in_sectors(t, prof, sigma_w, neighbour_offsets, search_px, tie_neighbours=True):
    """Matched-filter location of a Gaussian ring in each sector profile.

    For a trial shift ``tau`` the model ``A·g(t − tau) + Σ B_k·g(t − tau − Δ_k)
    + c0 + c1·t + c2·t²`` is linear in its amplitudes, so its least-squares
    residual ``SSR(tau)`` is a closed form. Neighbouring rings move with the
    ring (``tie_neighbours``, while the geometry is still rough) or stay at
    their own offsets ``Δ_k`` (once their radii are known): a strong
    neighbour tied to the ring would otherwise pin the ring to wherever its
    assumed radius puts it. ``SSR`` is minimised on a 0.25 px grid, then
    refined twice by a parabola through three values (±0.25 px, then ±0.05 px).
    Returns ``tau``, ``sigma_tau`` and the amplitude's SNR per sector (NaN
    where the sector is unusable).
    """
    n_t = len(t)
    tn = t / max(t[-1], 1e-9)
    neigh = [(float(d), float(sd)) for d, sd in neighbour_offsets]

    def design(tau):  # tau: any shape -> (..., n_t, m)
        tau = np.asarray(tau, float)[..., None]
        cols = [_gauss(t, tau, sigma_w)]
        for d, sd in neigh:
            cols.append(_gauss(t, (tau if tie_neighbours else 0.0 * tau) + d, sd))
        cols.append(np.broadcast_to(np.ones(n_t), tau.shape[:-1] + (n_t,)))
        cols.append(np.broadcast_to(tn, tau.shape[:-1] + (n_t,)))
        cols.append(np.broadcast_to(tn * tn - 1.0 / 3.0, tau.shape[:-1] + (n_t,)))
        return np.stack(cols, axis=-1)

    def solve(g, p):
        """Per-sector fits: g (S, J, n_t, m), p (S, n_t) -> SSR (S, J), coef, (GᵀG)⁻¹."""
        gtg = np.einsum("sjtm,sjtn->sjmn", g, g)
        gty = np.einsum("sjtm,st->sjm", g, p)
        inv = np.linalg.inv(gtg)
        coef = np.einsum("sjmn,sjn->sjm", inv, gty)
        ssr = np.sum(p * p, axis=1)[:, None] - np.einsum("sjm,sjm->sj", coef, gty)
        return ssr, coef, inv

    good = np.all(np.isfinite(prof), axis=1)
    n_s = prof.shape[0]
    tau_out = np.full(n_s, np.nan)
    sig_out = np.full(n_s, np.nan)
    snr_out = np.full(n_s, np.nan)
    if not np.any(good):
        return tau_out, sig_out, snr_out
    p = prof[good]
    n_good = len(p)
    # coarse grid: one design per trial shift, shared by all sectors (no BLAS:
    # these products are small and a threaded BLAS only adds overhead)
    step = 0.25
    taus = np.arange(-search_px, search_px + step / 2, step)
    g = design(taus)  # (K, n_t, m)
    try:
        gtg_inv = np.linalg.inv(np.einsum("ktm,ktn->kmn", g, g))
    except np.linalg.LinAlgError:
        return tau_out, sig_out, snr_out
    gty = np.einsum("ktm,st->skm", g, p, optimize=False)
    ssr = np.sum(p * p, axis=1)[:, None] - np.einsum("skm,kmn,skn->sk", gty, gtg_inv, gty, optimize=False)
    k = np.argmin(ssr, axis=1)
    interior = (k > 0) & (k < len(taus) - 1)
    kk = np.clip(k, 1, len(taus) - 2)
    rows = np.arange(n_good)

    def vertex(s0, s1, s2, h):
        curv = s0 - 2.0 * s1 + s2
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = np.where(curv > 0, 0.5 * (s0 - s2) / curv, 0.0)
        return np.clip(frac, -1.0, 1.0) * h, curv

    shift, _ = vertex(ssr[rows, kk - 1], ssr[rows, kk], ssr[rows, kk + 1], step)
    tau = taus[kk] + shift
    # fine refinement with a design per sector
    h = 0.05
    trial = tau[:, None] + np.array([-h, 0.0, h])[None, :]
    try:
        ssr3, coef3, inv3 = solve(design(trial), p)
    except np.linalg.LinAlgError:
        return tau_out, sig_out, snr_out
    shift, curv = vertex(ssr3[:, 0], ssr3[:, 1], ssr3[:, 2], h)
    tau = tau + shift
    m = g.shape[2]
    dof = max(n_t - m - 1, 1)
    s2res = ssr3[:, 1] / dof
    amp = coef3[:, 1, 0]
    sig_amp = np.sqrt(np.clip(inv3[:, 1, 0, 0] * s2res, 0.0, None))
    # d²SSR/dtau² = curv / h²;  var(tau) = 2 s² / (d²SSR/dtau²)
    with np.errstate(invalid="ignore", divide="ignore"):
        sig_tau = np.sqrt(2.0 * s2res * h**2 / curv)
        snr = amp / sig_amp
    ok = interior & (curv > 0) & (amp > 0) & np.isfinite(sig_tau) & (np.abs(tau) <= search_px)
    tau_out[good] = np.where(ok, tau, np.nan)
    sig_out[good] = np.where(ok, sig_tau, np.nan)
    snr_out[good] = np.where(ok, snr, np.nan)
    return tau_out, sig_out, snr_out


def _estimate_sigma_w(t, prof, default, neighbour_offsets=()):
    """Gaussian sigma of the ring in the sector profiles (fit to their mean, neighbours included)."""
    rows = np.all(np.isfinite(prof), axis=1)
    if not rows.any():
        return default
    mean = prof[rows].mean(axis=0)
    y = mean - np.percentile(mean, 10.0)
    central = np.abs(t) <= 0.5 * t[-1]
    height = float(np.max(y[central]))
    if height <= 0:
        return default
    starts = [(height, 0.0, default)]
    for d in neighbour_offsets:
        d = float(d if np.ndim(d) == 0 else d[0])
        if t[0] < d < t[-1]:
            starts.append((max(float(np.interp(d, t, y)), 1e-9), d, default))
    fit = _fit_peak_group(t, y, None, starts)
    if fit is None or not 0.3 <= fit.sigma[0] <= t[-1] or abs(fit.mu[0]) > 0.5 * t[-1]:
        return default
    return float(fit.sigma[0])


def _sector_sigma(profile_fwhm_px: float, bin_px: float) -> float:
    """Gaussian sigma of a ring in the sector profiles, from its FWHM in a radial profile.

    The profile's bins add a variance of ``bin²/12`` to the ring's own;
    bilinear interpolation along a ray adds 1/6 px² (the variance of the unit
    tent kernel).
    """
    var = (profile_fwhm_px / _FWHM_PER_SIGMA) ** 2 - bin_px**2 / 12.0
    return math.sqrt(max(var, 0.09) + 1.0 / 6.0)


def _sample_ring(
    image,
    mask,
    centre,
    ellipse,
    radius_px,
    *,
    n_sectors,
    half_width_px,
    sigma_w,
    neighbour_offsets=(),
    tie_neighbours=True,
    min_sector_snr=3.0,
):
    """Points on one ring: returns (points (N, 2), sigma_r (N,), snr (N,))."""
    t, prof, ang = _sector_profiles(image, mask, centre, ellipse, radius_px, n_sectors, half_width_px)
    if sigma_w is None:
        sigma_w = _estimate_sigma_w(t, prof, max(half_width_px / 6.0, 1.0), neighbour_offsets)
    search = max(half_width_px - 2.0 * sigma_w, 1.0)
    # (offset, sigma) of the other rings that reach into the window
    neigh = []
    for d in neighbour_offsets:
        d, sd = (d, sigma_w) if np.ndim(d) == 0 else (d[0], d[1])
        if abs(d) < half_width_px + search + 3.0 * sd:
            neigh.append((d, sd))
    tau, sig, snr = _locate_in_sectors(t, prof, sigma_w, neigh, search, tie_neighbours)
    keep = np.isfinite(tau) & (snr >= min_sector_snr)
    u = np.stack([np.cos(ang[keep]), np.sin(ang[keep])], axis=1)
    pts = centre + ((radius_px + tau[keep])[:, None] * u) @ ellipse.matrix.T
    return pts, sig[keep], snr[keep]


def sample_ring_points(
    image,
    centre_xy,
    ellipse: Ellipse,
    radius_px: float,
    *,
    mask=None,
    n_sectors: int = 120,
    half_width_px: float | None = None,
    ring_width_px: float | None = None,
    other_radii_px: Sequence[float] = (),
    min_sector_snr: float = 3.0,
) -> np.ndarray:
    """Points on one ring, one per azimuthal sector where the ring is clear.

    Parameters
    ----------
    image : (rows, cols) array
        The pattern.
    centre_xy : [x, y]
        Current centre, pixels.
    ellipse : Ellipse
        Current distortion estimate.
    radius_px : float
        Ideal radius of the ring (mean of semi-axes), pixels.
    mask : (rows, cols) bool array, optional
        True where a pixel is excluded; sectors crossing it lose those lines.
    n_sectors : int
        Number of equal sectors of ideal angle.
    half_width_px : float, optional
        Half length of the profile taken across the ring; by default four
        ring sigmas plus 3 px, at least 6 px.
    ring_width_px : float, optional
        FWHM of the ring in a 1-px-bin radial profile (``RingPeak.width_px``);
        estimated from the sectors if None.
    other_radii_px : sequence of float
        Known radii of the other rings (e.g. from :func:`find_rings`): those
        within reach of the profile are modelled at their own radii, with the
        same width, so a close neighbour does not pull the peak.
    min_sector_snr : float
        Drop sectors where the ring's amplitude is below this many standard
        errors.

    Returns
    -------
    (N, 2) ndarray
        Points ``[x, y]`` on the ring (observed image coordinates), N ≤ n_sectors.

    Notes
    -----
    In each sector the image is sampled (bilinear) along many rays of ideal
    direction ``u``, at observed positions ``c + D·((R + t)·u)``; the rays
    (one per pixel of arc) are averaged into one profile across the ring,
    using only rays that cross no masked pixel. The ring's position ``t`` in
    that profile is found by a matched filter: a Gaussian of the ring's width
    plus a quadratic background (and Gaussians for neighbouring rings) is
    fitted by linear least squares for every trial ``t`` on a 0.25 px grid,
    and the minimum of the residual is refined by parabolas (to ~10⁻³ px).
    The point is ``c + D·((R + t)·u)`` at the sector's mean angle.

    Examples
    --------
    >>> from saedkit.core.simulation.render import render_pattern
    >>> img, truth = render_pattern((256, 256), [128.0, 128.0], ring_radius_px=[60.0],
    ...                             ring_intensity=2000, rng=np.random.default_rng(0))
    >>> pts = sample_ring_points(img, [128.0, 128.0], NO_DISTORTION, 60.0, n_sectors=36)
    >>> bool(np.allclose(np.hypot(*(pts - 128.0).T), 60.0, atol=0.3))
    True
    """
    img = check_image_2d("image", image)
    c = check_xy("centre_xy", centre_xy)
    msk = _check_mask(mask, img.shape)
    _check_ellipse(ellipse)
    radius_px = check_positive("radius_px", radius_px)
    n_sectors = int(n_sectors)
    if n_sectors < 8:
        raise InputError(f"n_sectors must be >= 8, got {n_sectors}")
    sigma_w = None
    if ring_width_px is not None:
        sigma_w = _sector_sigma(check_positive("ring_width_px", ring_width_px), 1.0)
    if half_width_px is None:
        half_width_px = max(4.0 * (sigma_w or 1.5) + 2.0, 6.0)
    half_width_px = check_positive("half_width_px", half_width_px)
    min_sector_snr = check_positive("min_sector_snr", min_sector_snr)
    others = np.atleast_1d(np.asarray(other_radii_px, dtype=float))
    if not np.all(np.isfinite(others)):
        raise InputError("other_radii_px must be finite")
    neigh = [float(r) - radius_px for r in others if abs(float(r) - radius_px) > 1e-6]
    if sigma_w is None:  # one width for the ring and its neighbours
        t, prof, _ = _sector_profiles(img, msk, c, ellipse, radius_px, n_sectors, half_width_px)
        sigma_w = _estimate_sigma_w(t, prof, max(half_width_px / 6.0, 1.0), neigh)
    pts, _, _ = _sample_ring(
        img, msk, c, ellipse, radius_px,
        n_sectors=n_sectors, half_width_px=half_width_px, sigma_w=sigma_w,
        neighbour_offsets=[(d, sigma_w) for d in neigh], tie_neighbours=False,
        min_sector_snr=min_sector_snr,
    )
    return pts


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


# --------------------------------------------------------------------------- the whole job

#: Fewest points (sectors of its circle where it shows) behind a reported ring.
MIN_ARC_POINTS = 6
#: Least arc of its circle (degrees, in 10° bins holding a point) on which a reported ring shows:
#: textured arcs and the spots of a few grains spread over more; a streak or one grain does not.
MIN_ARC_DEG = 45.0


def _arc_deg(points_xy: np.ndarray, centre_xy) -> float:
    """Arc of a circle covered by points: 10° for every 10° bin of azimuth that holds one."""
    if len(points_xy) == 0:
        return 0.0
    v = np.asarray(points_xy, float) - np.asarray(centre_xy, float)
    k = np.floor((np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360.0) / 10.0).astype(int)
    return 10.0 * len(np.unique(k))


@dataclass(frozen=True)
class RejectedRing:
    """A peak of the radial profile that is not reported as a ring, and why.

    Parameters
    ----------
    peak : RingPeak
        The profile peak (radius, height, width and the SNR it was found with).
    reason : str
        Why it is not a ring, in words.
    """

    peak: RingPeak
    reason: str

    def to_dict(self) -> dict:
        """JSON-ready record: the peak's keys and ``reason``."""
        return {**self.peak.to_dict(), "reason": self.reason}



@dataclass(frozen=True)
class RingFit:
    """Result of :func:`find_rings`.

    Parameters
    ----------
    centre : CentreResult
        Common centre of the rings (method ``"rings"``).
    ellipse : Ellipse
        Common elliptical distortion.
    ellipticity_sigma, major_axis_sigma_deg : float
        Standard uncertainties of ``e`` and ``phi``.
    rings : tuple of RingPeak
        Rings in order of radius; ``radius_px`` is the mean of the semi-axes.
        Rings measured point by point around the ring were fitted; the
        others (too weak for that) come from the final ellipse-corrected
        radial profile, and ``n_points`` counts the wide sectors of their
        circle in which they show (at least :data:`MIN_ARC_POINTS`).
    profile : RadialProfile
        The final radial profile, about ``centre`` and corrected for ``ellipse``.
    residual_rms_px : float
        RMS distance of the ring points from the fitted ellipses.
    n_points : int
        Points in the final ellipse fit.
    rejected : tuple of RejectedRing
        Peaks of the final profile that are not reported as rings (seen on
        fewer than :data:`MIN_ARC_POINTS` sectors, or less than
        :data:`MIN_ARC_DEG` degrees, of their circle), with the reason.
    """

    centre: CentreResult
    ellipse: Ellipse
    ellipticity_sigma: float
    major_axis_sigma_deg: float
    rings: tuple[RingPeak, ...]
    profile: RadialProfile = field(repr=False)
    residual_rms_px: float = 0.0
    n_points: int = 0
    rejected: tuple["RejectedRing", ...] = ()

    @property
    def radius_px(self) -> np.ndarray:
        """Ring radii as an array, pixels."""
        return np.array([r.radius_px for r in self.rings])

    def to_dict(self, *, include_profile: bool = False) -> dict:
        """JSON-ready record (``centre_px``, ``centre_sigma_px``, ``ellipse``, ``rings``, ...)."""
        out = {
            "centre_px": [self.centre.x, self.centre.y],
            "centre_sigma_px": [self.centre.sigma_x, self.centre.sigma_y],
            "centre_method": self.centre.method,
            "ellipse": {
                "ellipticity": self.ellipse.ellipticity,
                "major_axis_deg": self.ellipse.major_axis_deg,
                "ellipticity_sigma": float(self.ellipticity_sigma),
                "major_axis_sigma_deg": float(self.major_axis_sigma_deg),
            },
            "rings": [r.to_dict() for r in self.rings],
            "residual_rms_px": float(self.residual_rms_px),
            "n_points": int(self.n_points),
            "rejected_rings": [r.to_dict() for r in self.rejected],
        }
        if include_profile:
            out["profile"] = self.profile.to_dict()
        return out


def _downsample(image: np.ndarray, mask: np.ndarray | None, max_side: int):
    """Block mean of the unmasked pixels, log-scaled: ``(j, ok, f)`` with ``f`` the block size."""
    rows, cols = image.shape
    f = max(1, int(math.ceil(max(rows, cols) / max_side)))
    nr, nc = rows // f, cols // f
    img = image[: nr * f, : nc * f].astype(np.float32)
    valid = np.ones(img.shape, bool) if mask is None else ~mask[: nr * f, : nc * f]
    if img.dtype.kind == "f":
        valid &= np.isfinite(img)
    img[~valid] = 0.0
    s = img.reshape(nr, f, nc, f).sum(axis=(1, 3), dtype=np.float64)
    n = valid.reshape(nr, f, nc, f).sum(axis=(1, 3))
    ok = n >= 0.5 * f * f
    if np.count_nonzero(ok) < 16:
        raise FitError("too few unmasked pixels to find the pattern centre")
    d = np.where(ok, s / np.maximum(n, 1), 0.0)
    lo = np.percentile(d[ok], 1.0)
    # log scale: rings of very different strength, and the central beam, count alike
    j = np.where(ok, np.log1p(np.clip(d - lo, 0.0, None)), 0.0)
    return j, ok, f


def _symmetry_centre(j: np.ndarray, ok: np.ndarray) -> np.ndarray | None:
    """Centre of point symmetry ``[x, y]`` of a (downsampled) image, or None.

    With ``I(c + v) = I(c − v)`` the autoconvolution ``Σ_p I(p)·I(u − p)``
    peaks at ``u = 2c``. Masked pixels are left out by normalising over the
    overlap of the valid region with its own point reflection (masked
    normalised cross-correlation, [1]_), all by FFT.

    .. [1] D. Padfield, "Masked object registration in the Fourier domain",
       IEEE Trans. Image Process. 21, 2706 (2012).
    """
    from scipy.fft import irfft2, next_fast_len, rfft2

    nr, nc = j.shape
    m = ok.astype(np.float64)
    shape = (next_fast_len(2 * nr - 1, real=True), next_fast_len(2 * nc - 1, real=True))
    fm = rfft2(m, shape)
    fj = rfft2(j, shape)
    fj2 = rfft2(j * j, shape)

    def back(a):
        return irfft2(a, shape)[: 2 * nr - 1, : 2 * nc - 1]

    overlap = np.rint(back(fm * fm))
    sum_j = back(fj * fm)
    sum_jj = back(fj * fj)
    sum_j2 = back(fj2 * fm)
    # only lags where the valid region overlaps its reflection well enough
    usable = overlap >= 0.05 * overlap.max()
    ov = np.where(usable, overlap, 1.0)
    num = sum_jj - sum_j * sum_j / ov
    var = sum_j2 - sum_j * sum_j / ov
    usable &= var > 1e-9 * np.max(np.abs(var[usable]))
    if not usable.any():
        return None
    # correlation times the square root of the pixels behind it: its
    # significance, so that lags of small overlap do not win by chance
    ncc = np.full(var.shape, -np.inf)
    ncc[usable] = num[usable] / var[usable] * np.sqrt(overlap[usable])
    iy, ix = np.unravel_index(int(np.argmax(ncc)), ncc.shape)

    def vertex(a, b, c):
        den = a - 2.0 * b + c
        if not (np.isfinite(a) and np.isfinite(c)) or den >= 0:
            return 0.0
        return float(np.clip(0.5 * (a - c) / den, -0.5, 0.5))

    fy = vertex(ncc[iy - 1, ix], ncc[iy, ix], ncc[iy + 1, ix]) if 0 < iy < ncc.shape[0] - 1 else 0.0
    fx = vertex(ncc[iy, ix - 1], ncc[iy, ix], ncc[iy, ix + 1]) if 0 < ix < ncc.shape[1] - 1 else 0.0
    return np.array([(ix + fx) / 2.0, (iy + fy) / 2.0])


def _coarse_centre(image: np.ndarray, mask: np.ndarray | None, max_side: int = 512) -> np.ndarray:
    """A centre good to a fraction of a pixel (of a copy of at most ``max_side`` px a side).

    The centre of point symmetry of the log-scaled image after a band-pass
    (masked local means over 1 and 4 blocks) and clipping at ±2 robust
    standard deviations: what is left is mostly the rings, each weighted
    alike, while the smooth background and the inside of an unmasked beam
    stop drop out and its edges cannot dominate.
    """
    j, ok, f = _downsample(image, mask, max_side)
    if float(np.ptp(j[ok])) <= 0.0:
        raise FitError("the image has no contrast to find the pattern centre from")
    okf = ok.astype(np.float64)

    def local_mean(sigma):
        with np.errstate(invalid="ignore", divide="ignore"):
            return ndimage.gaussian_filter(j, sigma) / ndimage.gaussian_filter(okf, sigma)

    # band-pass: a 1-block smoothing against the noise, minus the local mean over 4 blocks
    keep = ok & (ndimage.gaussian_filter(okf, 4.0) > 0.2) & (ndimage.gaussian_filter(okf, 1.0) > 0.2)
    h = np.where(keep, local_mean(1.0) - local_mean(4.0), 0.0)
    mad = _MAD_TO_SIGMA * float(np.median(np.abs(h[keep]))) if keep.any() else 0.0
    if not mad > 0:
        raise FitError("the image has no contrast to find the pattern centre from")
    h = np.clip(h, -2.0 * mad, 2.0 * mad)
    c = _symmetry_centre(h, keep)
    if c is None:
        raise FitError("the image has no contrast to find the pattern centre from")
    return np.array([c[0] * f + (f - 1) / 2.0, c[1] * f + (f - 1) / 2.0])


def _measure_rings(
    image, mask, centre, ellipse, peaks, *, profile_bin_px=1.0, better_radii=None, min_sector_snr=3.0
):
    """Sample every clear ring; returns lists of points, weights and the peaks used.

    ``better_radii`` (from a previous ellipse fit) replace the profile's radii
    where they match, for the ring itself and for its neighbours.
    """
    radii = [p.radius_px for p in peaks]
    if better_radii is not None and len(better_radii):
        for i, r in enumerate(radii):
            j = int(np.argmin(np.abs(np.asarray(better_radii) - r)))
            if abs(better_radii[j] - r) < max(1.0, 0.25 * peaks[i].width_px):
                radii[i] = float(better_radii[j])
    sigmas = [_sector_sigma(p.width_px, profile_bin_px) for p in peaks]
    pts, wts, used = [], [], []
    for i, p in enumerate(peaks):
        sigma_w = sigmas[i]
        half = max(4.0 * sigma_w + 2.0, 5.0)
        # about one sector per (SNR/4)² keeps each sector's own SNR near 4
        n_sec = int(np.clip((p.snr / 4.0) ** 2, 36, 180))
        n_sec = min(n_sec, max(36, int(2.0 * math.pi * p.radius_px / 2.0)))
        neigh = [(radii[k] - radii[i], sigmas[k]) for k in range(len(peaks)) if k != i]
        xy, sig, _ = _sample_ring(
            image, mask, centre, ellipse, radii[i],
            n_sectors=n_sec, half_width_px=half, sigma_w=sigma_w,
            neighbour_offsets=neigh, tie_neighbours=better_radii is None,
            min_sector_snr=min_sector_snr,
        )
        if len(xy) >= max(8, n_sec // 4):
            pts.append(xy)
            wts.append(1.0 / (sig**2 + 0.01**2))
            used.append(p)
    return pts, wts, used


def find_rings(
    image,
    *,
    mask=None,
    centre_guess_xy=None,
    min_snr: float = 4.0,
    fit_ellipse: bool = True,
    bin_px: float = 1.0,
    max_rings: int = 30,
    n_iterations: int = 3,
    progress: Callable[[int, int], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
) -> RingFit:
    """Find the rings of a polycrystalline pattern, their common centre and distortion.

    Parameters
    ----------
    image : (rows, cols) array
        The ring pattern.
    mask : (rows, cols) bool array, optional
        True where a pixel is excluded (beam stop, saturated core, dead
        pixels). Non-finite pixels of a float image are excluded as well.
    centre_guess_xy : [x, y], optional
        Starting centre (within a few pixels); by default the centre of
        point symmetry of the image.
    min_snr : float
        Smallest ring height over the noise of the radial profile.
    fit_ellipse : bool
        Fit the elliptical distortion (else the rings are fitted as circles).
    bin_px : float
        Radial profile bin, pixels.
    max_rings : int
        Largest number of rings to keep.
    n_iterations : int
        Rounds of profile → peaks → ring points → fit (stops early once the
        centre moves by less than 0.01 px).
    progress : callable(done, total), optional
        Called after each step.
    should_stop : callable() -> bool, optional
        Polled between steps; when it returns True the search stops with
        :class:`FitError`.

    Returns
    -------
    RingFit

    Raises
    ------
    InputError
        Bad image, mask or options.
    FitError
        No ring is found, too few ring points to fit, or stopped on request.

    Notes
    -----
    1. Coarse centre (or ``centre_guess_xy``): the centre of point symmetry
       of a block-averaged copy (at most 512 px a side) of the log-scaled,
       band-passed image, masked pixels excluded — good to a fraction of a
       block, with the central beam masked or not.
    2. Radial profile about the current centre, corrected for the current
       ellipse; ring peaks above its background (:func:`find_ring_peaks`).
    3. Each ring is located in 36–180 azimuthal sectors (about (SNR/4)²,
       so that each sector still sees the ring), as in
       :func:`sample_ring_points`; masked or weak sectors are skipped.
       Neighbouring rings within reach are modelled: in the first round
       they move with the ring, afterwards they sit at their fitted radii.
    4. One centre, one ``(e, phi)`` and one radius per ring are fitted to
       all points with 4-sigma outlier rejection
       (:func:`fit_concentric_ellipses`); a ring whose points scatter three
       times more than their uncertainties say, or lose half their points,
       is left out and the fit repeated.
    5. Steps 2–4 are repeated with the new centre and ellipse until the
       centre moves by less than 0.01 px.
    6. The final profile (about the fitted centre, ellipse corrected) gives
       each ring's height, width and SNR; rings too weak to measure point by
       point are added from it with their profile radius, if they show on at least
       :data:`MIN_ARC_POINTS` of a few wide sectors of their circle (``n_points``
       counts those); peaks on less arc are returned in ``rejected`` with the reason.

    The radius uncertainties are statistical; rings that overlap a much
    stronger neighbour (within about three widths) can carry a further
    systematic error of a few hundredths of a pixel from the neighbour's
    model. Mask the beam stop: an unmasked one still gives the centre, but
    rings near its edge in the profile may be lost.

    Examples
    --------
    >>> from saedkit.core.simulation.render import render_pattern
    >>> img, truth = render_pattern((256, 256), [130.3, 124.8], ring_radius_px=[40, 70, 95],
    ...                             ring_intensity=2000, rng=np.random.default_rng(1))
    >>> fit = find_rings(img)
    >>> bool(abs(fit.centre.x - 130.3) < 0.2 and abs(fit.centre.y - 124.8) < 0.2)
    True
    """
    img = check_image_2d("image", image)
    if img.dtype.kind not in "uif":
        raise InputError(f"image must have a real numeric dtype, got {img.dtype}")
    msk = _check_mask(mask, img.shape)
    min_snr = check_positive("min_snr", min_snr)
    bin_px = check_positive("bin_px", bin_px)
    n_iterations = int(n_iterations)
    if n_iterations < 1:
        raise InputError(f"n_iterations must be >= 1, got {n_iterations}")
    if img.dtype.kind == "f":
        bad = ~np.isfinite(img)
        if bad.any():
            msk = bad if msk is None else (msk | bad)
    if msk is not None and msk.all():
        raise InputError("mask excludes every pixel")
    total = n_iterations + 2
    done = 0

    def step() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total)
        if should_stop is not None and should_stop():
            raise FitError("ring search stopped on request")

    if centre_guess_xy is not None:
        centre = check_xy("centre_guess_xy", centre_guess_xy)
    else:
        centre = _coarse_centre(img, msk)
    step()

    ellipse = NO_DISTORTION
    fit: EllipseFit | None = None
    used: list[RingPeak] = []
    for it in range(n_iterations):
        profile = calculate_radial_profile(img, centre, mask=msk, ellipse=ellipse, bin_px=bin_px)
        peaks = find_ring_peaks(profile, min_snr=min_snr, max_rings=max_rings)
        if not peaks:
            if fit is None:
                raise FitError(
                    f"no ring found: the radial profile about [{centre[0]:.1f}, {centre[1]:.1f}] "
                    f"has no peak with SNR >= {min_snr:g}"
                )
            break
        pts, wts, used_now = _measure_rings(
            img, msk, centre, ellipse, peaks, profile_bin_px=bin_px,
            better_radii=None if fit is None else fit.radius_px,
        )
        if not pts:
            if fit is None:
                raise FitError(
                    f"no ring is clear enough to measure around its circumference "
                    f"({len(peaks)} found in the radial profile, best SNR {max(p.snr for p in peaks):.1f})"
                )
            break
        new_fit = _fit_with_ring_check(pts, wts, centre, fit_ellipse)
        if new_fit is None:
            if fit is None:
                raise FitError("the ring points could not be fitted with concentric ellipses")
            break
        fit, used = new_fit[0], [used_now[i] for i in new_fit[1]]
        used_pts = [pts[i] for i in new_fit[1]]
        moved = float(np.hypot(*(fit.centre.xy - centre)))
        d_ell = np.hypot(*np.subtract(fit.ellipse.components, ellipse.components))
        centre, ellipse = fit.centre.xy, fit.ellipse
        step()
        if it >= 1 and moved < 0.01 and d_ell < 1e-5:
            break

    if fit is None:  # not reachable: the first round either fits or raises
        raise FitError("no ring could be fitted")
    profile = calculate_radial_profile(img, centre, mask=msk, ellipse=ellipse, bin_px=bin_px)
    final_peaks = find_ring_peaks(profile, min_snr=min_snr, max_rings=max_rings)
    rings: list[RingPeak] = []
    rejected: list[RejectedRing] = []
    matched = set()
    # two measured rings on one narrow peak of the final profile are one ring split in two (an
    # early profile about a rough centre can show a ring of few grains' spots as two peaks, and
    # each then gathers points): the one nearer the peak is kept. A peak wider than the rings
    # usually are may hold two real rings that the points resolve, and is left alone
    peak_of: dict[int, int] = {}
    near_j = []
    for k in range(len(used)):
        r_fit = float(fit.radius_px[k])
        j = int(np.argmin([abs(q.radius_px - r_fit) for q in final_peaks])) if final_peaks else -1
        ok = j >= 0 and abs(final_peaks[j].radius_px - r_fit) <= max(final_peaks[j].width_px, 2.0 * bin_px)
        near_j.append(j if ok else -1)
    w_med = float(np.median([q.width_px for q in final_peaks])) if final_peaks else 0.0
    for k, j in enumerate(near_j):
        if j < 0 or final_peaks[j].width_px > 1.3 * w_med:
            continue
        other = peak_of.get(j)
        d_k = abs(final_peaks[j].radius_px - fit.radius_px[k])
        if other is None or d_k < abs(final_peaks[j].radius_px - fit.radius_px[other]):
            peak_of[j] = k
    for k, p_used in enumerate(used):
        r_fit = float(fit.radius_px[k])
        arc = _arc_deg(used_pts[k][fit.inliers[k]], fit.centre.xy)
        best = None
        j = near_j[k]
        if j >= 0:
            best = final_peaks[j]
            matched.add(j)
        src = best or p_used
        if j >= 0 and peak_of.get(j, k) != k:
            rejected.append(RejectedRing(src, (
                f"at R = {r_fit:.2f} px, on the same single peak of the radial profile as the ring at "
                f"{float(fit.radius_px[peak_of[j]]):.2f} px: one ring measured twice")))
            continue
        if arc < MIN_ARC_DEG:
            rejected.append(RejectedRing(src, (
                f"measured on {arc:.0f}° of its circle only (at least {MIN_ARC_DEG:g}° needed): "
                "too little arc to be a ring (a streak, a few grains' spots, an edge)")))
            continue
        rings.append(
            RingPeak(
                radius_px=r_fit,
                radius_sigma_px=float(fit.radius_sigma_px[k]),
                height=src.height,
                width_px=src.width_px,
                snr=src.snr,
                n_points=int(np.count_nonzero(fit.inliers[k])),
            )
        )
    # rings too weak to measure point by point, from the final profile, unless they sit on the
    # flank of a measured ring; each must still show on enough of its arc (in a few wide
    # sectors), or it is reported as rejected: a profile peak made by a small arc (an image
    # corner, a mask edge, a streak) is not a ring
    for j, q in enumerate(final_peaks):
        if j in matched or not all(
            abs(q.radius_px - r.radius_px) > max(q.width_px, r.width_px) for r in rings
        ):
            continue
        n_sec = int(np.clip((q.snr / 2.5) ** 2, MIN_ARC_POINTS, 36))
        sigma_w = _sector_sigma(q.width_px, bin_px)
        xy, _, _ = _sample_ring(
            img, msk, centre, ellipse, q.radius_px, n_sectors=n_sec,
            half_width_px=max(4.0 * sigma_w + 2.0, 5.0), sigma_w=sigma_w,
            neighbour_offsets=[(r.radius_px - q.radius_px, _sector_sigma(r.width_px, bin_px)) for r in rings],
            tie_neighbours=False, min_sector_snr=3.0,
        )
        arc = _arc_deg(xy, centre)
        if len(xy) >= MIN_ARC_POINTS and arc >= MIN_ARC_DEG:
            rings.append(RingPeak(q.radius_px, q.radius_sigma_px, q.height, q.width_px, q.snr, n_points=int(len(xy))))
        else:
            rejected.append(RejectedRing(q, (
                f"a peak of the radial profile (SNR {q.snr:.1f}) that shows on only {len(xy)} of {n_sec} "
                f"sectors of its circle, {arc:.0f}° (at least {MIN_ARC_POINTS} sectors and {MIN_ARC_DEG:g}° "
                "needed): too little arc to be a ring")))
    rings.sort(key=lambda r: r.radius_px)
    if progress is not None:
        progress(total, total)
    return RingFit(
        centre=fit.centre,
        ellipse=fit.ellipse,
        ellipticity_sigma=fit.ellipticity_sigma,
        major_axis_sigma_deg=fit.major_axis_sigma_deg,
        rings=tuple(rings),
        profile=profile,
        residual_rms_px=fit.residual_rms_px,
        n_points=fit.n_points,
        rejected=tuple(rejected),
    )


def _fit_with_ring_check(pts, wts, centre, fit_ellipse):
    """Fit all rings; drop rings that fit much worse than the rest, and refit.

    Returns ``(EllipseFit, indices of the rings kept)`` or None.
    """
    keep = list(range(len(pts)))
    for _ in range(len(pts)):
        try:
            fit = fit_concentric_ellipses(
                [pts[i] for i in keep], centre_guess_xy=centre,
                weights=[wts[i] for i in keep], fit_ellipse=fit_ellipse, outlier_sigma=4.0,
            )
        except FitError:
            if len(keep) <= 1:
                return None
            keep = keep[:-1]  # the outermost ring is the most likely to be cut by the edge
            continue
        if len(keep) < 3:
            return fit, keep
        # per-ring scatter of the kept points about the common ellipses, in
        # units of their own uncertainties (a weak ring scatters more, but
        # not more than its points say), and the fraction of points kept
        dinv = fit.ellipse.inverse_matrix
        scatter = []
        for k, i in enumerate(keep):
            inl = fit.inliers[k]
            p = pts[i][inl]
            r = np.hypot(*((p - fit.centre.xy) @ dinv.T).T) - fit.radius_px[k]
            scatter.append(float(np.sqrt(np.mean(wts[i][inl] * r**2))) if len(r) else np.inf)
        scatter = np.array(scatter)
        frac = np.array([np.mean(fit.inliers[k]) for k in range(len(keep))])
        ratio = scatter / np.median(scatter)
        if ratio.max() <= 3.0 and frac.min() >= 0.5:
            return fit, keep
        worst = int(np.argmax(ratio)) if ratio.max() > 3.0 else int(np.argmin(frac))
        keep = [i for k, i in enumerate(keep) if k != worst]
    return None
