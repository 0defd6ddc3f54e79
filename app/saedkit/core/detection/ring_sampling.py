"""Points on one ring, located in many azimuthal sectors."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy import ndimage

from saedkit.core._validate import check_image_2d, check_positive, check_xy
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError
from saedkit.core.detection.radial_profile import _FWHM_PER_SIGMA, _check_ellipse
from saedkit.core.detection.ring_peaks import _fit_peak_group
from saedkit.core.detection.radial_profile import _check_mask


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
