"""Rings in a radial profile: peaks above a steep background, refined to a fraction of a bin."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize, signal

from saedkit.core._validate import check_positive
from saedkit.core.errors import InputError
from saedkit.core.detection.radial_profile import RadialProfile, _FWHM_PER_SIGMA
from saedkit.core.detection.radial_profile import _MAD_TO_SIGMA


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
