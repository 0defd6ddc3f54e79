"""The radial profile of a ring pattern about an elliptical centre, and shared ring-input checks."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from saedkit.core._validate import check_image_2d, check_positive, check_xy
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError


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
