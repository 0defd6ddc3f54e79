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

__all__ = [
    "BeamStop",
    "ChipGaps",
    "Detector",
    "FilmHalo",
    "KikuchiBand",
    "RenderTruth",
    "render_pattern",
]


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
class FilmHalo:
    """The diffuse ring of an amorphous support film (carbon, SiN).

    Parameters
    ----------
    radius_px : float
        Radius of the halo's maximum, pixels (about 1/(2.1 Å) for carbon, from memory).
    width_px : float
        Gaussian sigma of the halo's radial profile, pixels (broad: a few tens of pixels).
    intensity : float
        Height of the halo above the rest of the background, counts.
    """

    radius_px: float = 120.0
    width_px: float = 25.0
    intensity: float = 400.0


@dataclass(frozen=True)
class KikuchiBand:
    """A straight Kikuchi-like band: a bright line pair (excess/deficit lines drawn bright).

    Parameters
    ----------
    angle_deg : float
        Direction of the band's normal, degrees from +x towards +y.
    distance_px : float
        Distance of the band's middle from the pattern centre along its normal.
    width_px : float
        Distance between the band's two edge lines, pixels.
    line_sigma_px : float
        Gaussian sigma across each edge line, pixels.
    intensity : float
        Peak height of each edge line, counts.
    """

    angle_deg: float = 30.0
    distance_px: float = 40.0
    width_px: float = 30.0
    line_sigma_px: float = 1.2
    intensity: float = 60.0


@dataclass(frozen=True)
class ChipGaps:
    """The gap cross of a 2 × 2 hybrid-pixel detector, and its stray pixels.

    Parameters
    ----------
    split_xy : [x, y], optional
        Column and row where the chips meet (default: the image middle).
    gap_px : int
        Width of each gap line, pixels.
    mode : {"doubled", "dead"}
        ``"doubled"``: the larger gap pixels collect ``gain`` times the signal
        of an ordinary pixel; ``"dead"``: they read 0.
    gain : float
        Signal factor of a doubled gap pixel.
    hot_pixels : int
        Number of isolated hot pixels at random places, reading ``hot_value``.
    hot_value : float, optional
        Value of a hot pixel (default: the detector's full well).
    dead_pixels : int
        Number of isolated dead pixels (reading 0).
    """

    split_xy: tuple[float, float] | None = None
    gap_px: int = 2
    mode: str = "doubled"
    gain: float = 2.5
    hot_pixels: int = 0
    hot_value: float | None = None
    dead_pixels: int = 0

    def gap_mask(self, shape: tuple[int, int]) -> np.ndarray:
        """Boolean (rows, cols) array, True on the gap lines."""
        rows, cols = shape
        sx, sy = (cols / 2, rows / 2) if self.split_xy is None else self.split_xy
        g = int(self.gap_px)
        out = np.zeros(shape, bool)
        c0, r0 = int(round(sx - g / 2)), int(round(sy - g / 2))
        out[:, max(c0, 0) : max(c0 + g, 0)] = True
        out[max(r0, 0) : max(r0 + g, 0), :] = True
        return out


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
    gap_mask: np.ndarray | None = field(default=None, repr=False)  # chip-gap lines
    hot_xy: np.ndarray | None = field(default=None, repr=False)  # (H, 2) hot pixels
    dead_xy: np.ndarray | None = field(default=None, repr=False)  # (D, 2) dead pixels
    saturated_spots: np.ndarray | None = field(default=None, repr=False)  # (N,) bool


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
    film_halo: FilmHalo | None = None,
    kikuchi_bands=(),
    psf_tail_fraction: float = 0.0,
    psf_tail_scale_px: float = 3.0,
    chip_gaps: ChipGaps | None = None,
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
    film_halo : FilmHalo, optional
        Diffuse ring of an amorphous support film.
    kikuchi_bands : sequence of KikuchiBand
        Straight bright line pairs crossing the pattern.
    psf_tail_fraction, psf_tail_scale_px : float
        Fraction of every pixel's signal spread into a long-tailed
        point-spread function ``(1 + (r/a)²)^(-3/2)`` of scale ``a`` (the
        tail of a hybrid-pixel or scintillator detector); 0 = none.
    chip_gaps : ChipGaps, optional
        Gap cross of a 2 × 2 chip detector (doubled or dead lines), hot and
        dead pixels; applied after the noise, before saturation.
        For a 12-bit counter use ``Detector(full_well=4095)``.

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

    if film_halo is not None:
        model += film_halo.intensity * np.exp(-((r - film_halo.radius_px) ** 2) / (2 * film_halo.width_px**2))
    for band in kikuchi_bands:
        nx, ny = np.cos(np.deg2rad(band.angle_deg)), np.sin(np.deg2rad(band.angle_deg))
        along_normal = dx * nx + dy * ny - band.distance_px
        for edge in (-band.width_px / 2, band.width_px / 2):
            model += band.intensity * np.exp(-((along_normal - edge) ** 2) / (2 * band.line_sigma_px**2))

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

    if psf_tail_fraction > 0:
        if not 0 < psf_tail_fraction < 1:
            raise InputError(f"psf_tail_fraction must be in [0, 1), got {psf_tail_fraction!r}")
        a = check_positive("psf_tail_scale_px", psf_tail_scale_px)
        from scipy.signal import fftconvolve

        ky, kx = np.indices((2 * rows - 1, 2 * cols - 1), dtype=np.float64)
        kr = np.hypot(kx - (cols - 1), ky - (rows - 1))
        kern = (1 + (kr / a) ** 2) ** -1.5
        kern /= kern.sum()
        spread = fftconvolve(model, kern, mode="valid")
        model = (1 - psf_tail_fraction) * model + psf_tail_fraction * spread
        peaks = peaks * (1 - psf_tail_fraction)  # the spot's core keeps this much of its peak

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
    gap = hot_xy = dead_xy = None
    if chip_gaps is not None:
        if chip_gaps.mode not in ("doubled", "dead"):
            raise InputError(f"chip_gaps.mode must be 'doubled' or 'dead', got {chip_gaps.mode!r}")
        gap = chip_gaps.gap_mask((rows, cols))
        if chip_gaps.mode == "dead":
            counts[gap] = 0.0
        else:
            counts[gap] = (counts[gap] - detector.offset) * chip_gaps.gain + detector.offset
        pick = rng if rng is not None else np.random.default_rng(0)
        n_hot, n_dead = int(chip_gaps.hot_pixels), int(chip_gaps.dead_pixels)
        free = np.flatnonzero(~gap.ravel())
        where = pick.choice(free, size=n_hot + n_dead, replace=False)
        hy, hx = np.divmod(where, cols)
        hot_value = detector.full_well if chip_gaps.hot_value is None else chip_gaps.hot_value
        counts[hy[:n_hot], hx[:n_hot]] = hot_value
        counts[hy[n_hot:], hx[n_hot:]] = 0.0
        hot_xy = np.stack([hx[:n_hot], hy[:n_hot]], axis=1).astype(float)
        dead_xy = np.stack([hx[n_hot:], hy[n_hot:]], axis=1).astype(float)
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
        gap_mask=gap,
        hot_xy=hot_xy,
        dead_xy=dead_xy,
        saturated_spots=(counts[iy, ix] >= detector.full_well) if len(spot_xy) else np.zeros(0, bool),
    )
    return image, truth
