"""The spot record, detection constants and input checks shared by the spot-search steps."""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from saedkit.core._validate import check_image_2d
from saedkit.core.errors import InputError, SaedkitError


# Gaussian kernels are cut at 3 sigma (99.7 % of a 1-D profile): cheaper than
# scipy's default 4 sigma at no measurable cost in sensitivity (common practice).
_TRUNCATE = 3.0
# A detection must be at least this many sigma of the filtered image's noise
# (the usual 5-sigma detection floor: common practice), more in a large image
# so that pure noise gives fewer than this many false peaks per image.
_MIN_SIGNIFICANCE = 5.0
_FALSE_PEAKS_PER_IMAGE = 0.5
# Allowances below min_snr for the matched-filter estimate of a spot's peak SNR:
# five of its standard errors (noise), and 15 % for what scales with the signal
# (an off-centre spot between pixels loses up to 5 %, the noise estimate may be
# 10 % high), so a spot whose true peak SNR is min_snr is practically never lost.
_SNR_ALLOWANCE_SE = 5.0
_SNR_ALLOWANCE_REL = 0.15
_DEFAULT_SIGMA_PX = 2.0
_MAD_TO_SIGMA = 1.4826  # Gaussian: sigma = 1.4826 * median absolute deviation

ProgressFn = Callable[[int, int], None]
StopFn = Callable[[], bool]


# ----------------------------------------------------------------------------- results


@dataclass(frozen=True)
class Spot:
    """One refined diffraction spot.

    Parameters
    ----------
    x, y : float
        Refined position, pixels (x = column, y = row).
    sigma_x, sigma_y : float
        Standard uncertainty of the position, pixels.
    intensity : float
        Integrated intensity in the aperture, local background subtracted, counts.
    intensity_sigma : float
        Standard uncertainty of ``intensity``.
    background : float
        Local background per pixel (median of the annulus), counts.
    peak : float
        Peak height above the background, counts.
    snr : float
        Peak signal-to-noise ratio: ``peak`` over the per-pixel noise of the
        local background.
    width_px : float
        Gaussian sigma of the spot, pixels.
    method : str
        ``"gaussian"`` (least-squares fit) or ``"centroid"`` (the fit failed or
        was not asked for).
    saturated : bool
        Some of the spot's central pixels are saturated: its position comes
        from the unsaturated wings and is sound, its ``peak`` is extrapolated
        by the fit and its ``intensity`` is a lower bound.
    """

    x: float
    y: float
    sigma_x: float
    sigma_y: float
    intensity: float
    intensity_sigma: float
    background: float
    peak: float
    snr: float
    width_px: float
    method: str = "gaussian"
    saturated: bool = False

    @property
    def xy(self) -> np.ndarray:
        """The position as an array ``[x, y]``."""
        return np.array([self.x, self.y])

    def to_dict(self) -> dict:
        """JSON-ready record (units in the keys where they are pixels); unknown values are None.

        A spot placed by hand has no measured intensity (NaN), and JSON has no NaN.
        """
        rec = {
            "x": self.x,
            "y": self.y,
            "sigma_x_px": self.sigma_x,
            "sigma_y_px": self.sigma_y,
            "intensity": self.intensity,
            "intensity_sigma": self.intensity_sigma,
            "background": self.background,
            "peak": self.peak,
            "snr": self.snr,
            "width_px": self.width_px,
        }
        out = {k: (float(v) if np.isfinite(v) else None) for k, v in rec.items()}
        out["saturated"] = bool(self.saturated)
        return out


def spots_xy_array(spots: Sequence[Spot]) -> np.ndarray:
    """Positions of spots as an (N, 2) array of ``[x, y]``.

    Parameters
    ----------
    spots : sequence of Spot

    Returns
    -------
    (N, 2) float array (shape (0, 2) when empty).
    """
    if len(spots) == 0:
        return np.zeros((0, 2))
    return np.array([[s.x, s.y] for s in spots], dtype=float)


# ----------------------------------------------------------------------------- input


def _check_mask(mask, shape: tuple[int, int]) -> np.ndarray | None:
    if mask is None:
        return None
    m = np.asarray(mask)
    if m.shape != tuple(shape):
        raise InputError(f"mask must have the image's shape {tuple(shape)}, got shape {m.shape}")
    if m.dtype != bool:
        if not np.issubdtype(m.dtype, np.number):
            raise InputError(f"mask must be a boolean array (True = excluded), got dtype {m.dtype}")
        m = m != 0
    return m


def _check_numeric_image(image) -> np.ndarray:
    arr = check_image_2d("image", image)
    if not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool) or np.iscomplexobj(arr):
        raise InputError(f"image must hold real numbers, got dtype {arr.dtype}")
    return arr


def _saturation_level(arr: np.ndarray) -> float | None:
    """The clipping level when three or more pixels share the image maximum.

    A detector that saturates clips every overexposed pixel to the same value,
    so ties at the maximum are the signature of saturation (common practice).
    Returns None for an image without such ties (or with the maximum on more
    than 5 % of the pixels, or no brighter than the median: not a clipped beam).
    """
    finite = arr if arr.dtype.kind in "uib" else arr[np.isfinite(arr)]
    if finite.size == 0:
        return None
    vmax = finite.max()
    n = np.count_nonzero(arr == vmax)
    if n < 3 or n > 0.05 * arr.size:
        return None
    sample = finite.ravel()[:: max(1, finite.size // 65536)]
    if not vmax > np.median(sample):
        return None
    return float(vmax)


def _prepare(image, mask):
    """float32 copy with excluded pixels zeroed, the exclusion mask, the saturated
    pixels and their level (None, None without saturation)."""
    arr = _check_numeric_image(image)
    m = _check_mask(mask, arr.shape)
    img = arr.astype(np.float32, copy=True)
    bad = None
    if arr.dtype.kind == "f":
        nonfinite = ~np.isfinite(img)
        if nonfinite.any():
            bad = nonfinite
    sat_level = _saturation_level(arr)
    sat = None
    if sat_level is not None:
        sat = arr >= sat_level
        bad = sat if bad is None else (bad | sat)
    if m is not None:
        bad = m.copy() if bad is None else (bad | m)
    if bad is not None and not bad.any():
        bad = None
    if bad is not None:
        if bad.all():
            raise InputError("mask excludes every pixel of the image")
        img[bad] = 0.0
    return img, bad, sat, sat_level


def _check_stop(should_stop: StopFn | None) -> None:
    if should_stop is not None and should_stop():
        raise SaedkitError("spot search cancelled")


# ----------------------------------------------------------------------------- robust statistics


def _fill_nan_nearest(a: np.ndarray) -> np.ndarray:
    nan = ~np.isfinite(a)
    if not nan.any():
        return a
    if nan.all():
        return np.zeros_like(a)
    idx = ndi.distance_transform_edt(nan, return_distances=False, return_indices=True)
    return a[tuple(idx)]


def _robust_rows(a: np.ndarray, clip: float = 3.5, rounds: int = 3):
    """Median and robust sigma (1.4826·MAD, iteratively clipped at ``clip`` sigma)
    of every row of ``a``; NaN entries are ignored. Returns (median, sigma, count)."""
    r = np.sort(a, axis=1)  # NaN sort last
    idx = np.arange(r.shape[0])

    def med_of(sorted_rows, n):
        return np.where(n > 0, sorted_rows[idx, np.maximum((n - 1) // 2, 0)], np.nan)

    for i in range(rounds):
        n = np.isfinite(r).sum(axis=1)
        med = med_of(r, n)
        mad = med_of(np.sort(np.abs(r - med[:, None]), axis=1), n)
        sig = _MAD_TO_SIGMA * mad
        if i + 1 < rounds:
            with np.errstate(invalid="ignore"):
                out = np.abs(r - med[:, None]) > clip * sig[:, None]
            r = np.sort(np.where(out, np.nan, r), axis=1)
    return med, sig, n


def _robust_location(v: np.ndarray) -> float:
    """Median of ``v`` after dropping high outliers (3 robust sigma), twice."""
    v = v[np.isfinite(v)]
    for _ in range(2):
        med = float(np.median(v))
        sig = _MAD_TO_SIGMA * float(np.median(np.abs(v - med)))
        keep = v <= med + 3 * sig
        if keep.sum() < 3:
            break
        v = v[keep]
    return float(np.median(v))
