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
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from saedkit.core._validate import check_image_2d, check_positive, check_xy
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import FitError, InputError
from saedkit.core.detection.ellipse_fit import EllipseFit, fit_concentric_ellipses
from saedkit.core.detection.radial_profile import RadialProfile, calculate_radial_profile
from saedkit.core.detection.ring_peaks import RingPeak, find_ring_peaks
from saedkit.core.detection.ring_sampling import _sample_ring, _sector_sigma, sample_ring_points
from saedkit.core.detection.radial_profile import _MAD_TO_SIGMA, _check_mask

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
