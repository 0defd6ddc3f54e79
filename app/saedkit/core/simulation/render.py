"""Geometric synthesis of diffraction images: spots and rings on a detector.

This is the drawing layer of the simulator (:mod:`saedkit.core.simulation.simulate`
puts crystallography on top of it). It knows nothing of crystals: it draws
Gaussian spots at given offsets, rings at given radii, the ellipse distortion,
a saturated central beam, a beam-stop bar, a background that falls with
radius, Poisson and read noise, and returns the image with its ground truth.
Invented data from here is for tests and the demo only.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from saedkit.core._validate import check_positive, check_xy
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError

__all__ = ["BeamStop", "Detector", "RenderTruth", "render_pattern"]


@dataclass(frozen=True)
class BeamStop:
    """A beam-stop bar from the pattern centre to the detector edge.

    Parameters
    ----------
    angle_deg : float
        Direction of the bar from the centre, degrees from +x towards +y.
    width_px : float
        Full width of the bar in pixels.
    transmission : float
        Fraction of the signal that passes the bar (0 = opaque).
    tip_overhang_px : float
        How far the rounded tip reaches past the centre.
    """

    angle_deg: float = 45.0
    width_px: float = 20.0
    transmission: float = 0.02
    tip_overhang_px: float = 12.0

    def mask_array(self, shape: tuple[int, int], centre_xy) -> np.ndarray:
        """Boolean (rows, cols) array, True under the bar."""
        yy, xx = np.indices(shape, dtype=float)
        cx, cy = centre_xy
        ux, uy = np.cos(np.deg2rad(self.angle_deg)), np.sin(np.deg2rad(self.angle_deg))
        along = (xx - cx) * ux + (yy - cy) * uy
        across = np.abs(-(xx - cx) * uy + (yy - cy) * ux)
        half = self.width_px / 2
        bar = (along >= 0) & (across <= half)
        tip = np.hypot(xx - cx, yy - cy) <= half + self.tip_overhang_px
        return bar | tip


@dataclass(frozen=True)
class Detector:
    """Counting and noise model of the camera.

    Parameters
    ----------
    counts_per_unit : float
        Mean detected electrons per unit of model intensity (dose scale).
    read_noise : float
        Gaussian read noise, counts RMS.
    offset : float
        Constant pedestal added to every pixel, counts.
    full_well : float
        Value at which pixels saturate (65535 for a 16-bit camera).
    dtype : str
        Output pixel type, e.g. ``"uint16"`` or ``"float32"``.
    """

    counts_per_unit: float = 1.0
    read_noise: float = 3.0
    offset: float = 100.0
    full_well: float = 65535.0
    dtype: str = "uint16"


@dataclass(frozen=True)
class RenderTruth:
    """What was drawn, in image pixels (x = column, y = row)."""

    centre_xy: tuple[float, float]
    ellipse: Ellipse
    spot_xy: np.ndarray = field(repr=False)  # (N, 2) observed spot centres
    spot_peak: np.ndarray = field(repr=False)  # (N,) peak height above background, counts
    spot_snr: np.ndarray = field(repr=False)  # (N,) peak SNR (peak / noise at the spot)
    ring_radius_px: np.ndarray = field(repr=False)  # (M,) ideal radii (mean of semi-axes)
    spot_sigma_px: float = 1.5
    beam_stop_mask: np.ndarray | None = field(default=None, repr=False)


def render_pattern(
    shape: tuple[int, int],
    centre_xy,
    *,
    spot_offsets_xy=None,
    spot_intensity=None,
    spot_sigma_px: float = 1.5,
    ring_radius_px=None,
    ring_intensity=None,
    ring_width_px: float = 1.5,
    ellipse: Ellipse = NO_DISTORTION,
    central_beam_intensity: float = 2.0e5,
    central_beam_sigma_px: float = 4.0,
    background_intensity: float = 300.0,
    background_scale_px: float | None = None,
    beam_stop: BeamStop | None = None,
    detector: Detector = Detector(),
    rng: np.random.Generator | None = None,
) -> tuple[np.ndarray, RenderTruth]:
    """Draw a diffraction image with known geometry.

    Parameters
    ----------
    shape : (rows, cols)
        Image size.
    centre_xy : [x, y]
        Position of the undiffracted beam, pixels.
    spot_offsets_xy : (N, 2) array, optional
        Ideal (undistorted) spot offsets from the centre, pixels.
    spot_intensity : (N,) array, optional
        Peak height of each spot above background, counts (before noise).
    spot_sigma_px : float
        Gaussian sigma of the spots, pixels.
    ring_radius_px, ring_intensity : (M,) arrays, optional
        Ideal ring radii (pixels) and their peak heights (counts).
    ring_width_px : float
        Gaussian sigma of the ring profile, pixels.
    ellipse : Ellipse
        Distortion applied to every offset.
    central_beam_intensity, central_beam_sigma_px : float
        Peak height and core width of the undiffracted beam; it has a
        Lorentzian tail and usually saturates the detector.
    background_intensity, background_scale_px : float
        Diffuse background ``A·exp(-r/s)`` plus a weak flat term; ``s``
        defaults to a quarter of the image size.
    beam_stop : BeamStop, optional
        Bar that blocks the centre and a strip to the edge.
    detector : Detector
        Dose, noise, pedestal, saturation and pixel type.
    rng : numpy.random.Generator, optional
        Noise source; without one the image is noiseless.

    Returns
    -------
    image : (rows, cols) array of ``detector.dtype``
    truth : RenderTruth
    """
    rows, cols = (int(shape[0]), int(shape[1]))
    if rows < 16 or cols < 16:
        raise InputError(f"shape must be at least 16x16, got {shape}")
    c = check_xy("centre_xy", centre_xy)
    spot_sigma_px = check_positive("spot_sigma_px", spot_sigma_px)
    yy, xx = np.indices((rows, cols), dtype=np.float64)
    dx, dy = xx - c[0], yy - c[1]
    r = np.hypot(dx, dy)

    scale = background_scale_px or 0.25 * min(rows, cols)
    model = background_intensity * (np.exp(-r / scale) + 0.05)
    # central beam: Gaussian core with a Lorentzian-like tail
    w = central_beam_sigma_px
    model += central_beam_intensity * (
        np.exp(-(r**2) / (2 * w**2)) + 0.01 / (1 + (r / (3 * w)) ** 2)
    )

    radii = np.asarray([] if ring_radius_px is None else ring_radius_px, dtype=float)
    if radii.size:
        heights = np.broadcast_to(
            np.asarray(1000.0 if ring_intensity is None else ring_intensity, float), radii.shape
        )
        ideal = np.stack([dx.ravel(), dy.ravel()], axis=1)
        r_ideal = np.hypot(*ellipse.correct_array(ideal).T).reshape(rows, cols)
        for rad, h in zip(radii, heights):
            band = np.abs(r_ideal - rad) < 6 * ring_width_px
            model[band] += h * np.exp(-((r_ideal[band] - rad) ** 2) / (2 * ring_width_px**2))

    offsets = np.zeros((0, 2)) if spot_offsets_xy is None else np.asarray(spot_offsets_xy, float)
    offsets = offsets.reshape(-1, 2)
    peaks = np.broadcast_to(
        np.asarray(1000.0 if spot_intensity is None else spot_intensity, float), (len(offsets),)
    ).copy()
    spot_xy = c + ellipse.distort_array(offsets) if len(offsets) else np.zeros((0, 2))
    half = int(np.ceil(5 * spot_sigma_px))
    for (sx, sy), h in zip(spot_xy, peaks):
        x0, x1 = max(int(sx) - half, 0), min(int(sx) + half + 2, cols)
        y0, y1 = max(int(sy) - half, 0), min(int(sy) + half + 2, rows)
        if x0 >= x1 or y0 >= y1:
            continue
        gx = np.exp(-((np.arange(x0, x1) - sx) ** 2) / (2 * spot_sigma_px**2))
        gy = np.exp(-((np.arange(y0, y1) - sy) ** 2) / (2 * spot_sigma_px**2))
        model[y0:y1, x0:x1] += h * np.outer(gy, gx)

    stop_mask = None
    if beam_stop is not None:
        stop_mask = beam_stop.mask_array((rows, cols), c)
        model[stop_mask] *= beam_stop.transmission

    gain = detector.counts_per_unit
    if rng is not None:
        counts = rng.poisson(np.clip(model * gain, 0, 1e12)).astype(np.float64) / gain
        counts += rng.normal(0.0, detector.read_noise, size=counts.shape)
    else:
        counts = model.copy()
    counts += detector.offset
    counts = np.clip(counts, 0, detector.full_well)

    # noise at each spot: Poisson on (background + spot) and read noise
    ix = np.clip(np.round(spot_xy[:, 0]).astype(int), 0, cols - 1) if len(spot_xy) else np.zeros(0, int)
    iy = np.clip(np.round(spot_xy[:, 1]).astype(int), 0, rows - 1) if len(spot_xy) else np.zeros(0, int)
    under = model[iy, ix] - peaks if len(spot_xy) else np.zeros(0)
    if stop_mask is not None and len(spot_xy):
        peaks = np.where(stop_mask[iy, ix], peaks * beam_stop.transmission, peaks)
    noise = np.sqrt(np.clip(under, 0, None) / gain + detector.read_noise**2)
    snr = peaks / np.maximum(noise, 1e-9)

    if np.dtype(detector.dtype).kind in "ui":
        image = np.round(counts).astype(detector.dtype)
    else:
        image = counts.astype(detector.dtype)
    truth = RenderTruth(
        centre_xy=(float(c[0]), float(c[1])),
        ellipse=ellipse,
        spot_xy=spot_xy,
        spot_peak=peaks,
        spot_snr=snr,
        ring_radius_px=radii,
        spot_sigma_px=spot_sigma_px,
        beam_stop_mask=stop_mask,
    )
    return image, truth
