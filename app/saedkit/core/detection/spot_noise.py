"""Per-pixel noise measured from the data (Poisson plus read noise, pixel correlation)."""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import ndimage as ndi

from saedkit.core.errors import FitError
from saedkit.core.detection.spot_filter import _Background, _Kernel, _gauss_radius
from saedkit.core.detection.spot_model import _MAD_TO_SIGMA, _robust_location, _robust_rows


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
