"""The detector effects of the drawing layer: gaps, hot and dead pixels, halo, bands, PSF, 12 bits."""

from __future__ import annotations

import numpy as np
import pytest

from saedkit.core.errors import InputError
from saedkit.core.simulation.render import ChipGaps, Detector, FilmHalo, KikuchiBand, render_pattern

FLAT = dict(central_beam_intensity=0.0, background_intensity=0.0)


def test_chip_gaps_doubled_dead_and_stray_pixels():
    det = Detector(offset=0.0, read_noise=0.0, full_well=4095.0)
    base, _ = render_pattern((64, 80), (40, 32), detector=det, **{**FLAT, "background_intensity": 100.0})
    gaps = ChipGaps(split_xy=(40.0, 32.0), gap_px=2, mode="doubled", gain=2.5, hot_pixels=3, dead_pixels=2)
    img, truth = render_pattern((64, 80), (40, 32), detector=det, chip_gaps=gaps,
                                **{**FLAT, "background_intensity": 100.0})
    g = truth.gap_mask
    assert g[:, 39:41].all() and g[31:33, :].all() and g.sum() == 2 * 64 + 2 * 80 - 4
    assert np.allclose(img[g].astype(float), np.minimum(2.5 * base[g].astype(float), 4095), atol=1.5)
    hot = truth.hot_xy.astype(int)
    dead = truth.dead_xy.astype(int)
    assert np.all(img[hot[:, 1], hot[:, 0]] == 4095) and np.all(img[dead[:, 1], dead[:, 0]] == 0)
    dead_gaps, _ = render_pattern((64, 80), (40, 32), detector=det, chip_gaps=ChipGaps(mode="dead"), **FLAT)
    assert np.all(dead_gaps[ChipGaps().gap_mask((64, 80))] == 0)
    with pytest.raises(InputError, match="mode"):
        render_pattern((64, 80), (40, 32), chip_gaps=ChipGaps(mode="odd"))


def test_halo_and_bands_where_drawn():
    det = Detector(offset=0.0, read_noise=0.0)
    img, _ = render_pattern((201, 201), (100, 100), detector=det, film_halo=FilmHalo(60.0, 10.0, 500.0), **FLAT)
    assert img[100, 160] == 500 and img[100, 100] == 0  # Gaussian ring: its peak at the radius
    band = KikuchiBand(angle_deg=0.0, distance_px=20.0, width_px=30.0, line_sigma_px=1.0, intensity=200.0)
    img, _ = render_pattern((201, 201), (100, 100), detector=det, kikuchi_bands=[band], **FLAT)
    # normal along +x, middle at x = 120, edges at 105 and 135
    assert img[50, 105] == 200 and img[50, 135] == 200 and img[50, 120] == 0


def test_long_tailed_psf_keeps_the_flux_and_spreads_it():
    det = Detector(offset=0.0, read_noise=0.0, dtype="float32", full_well=1e12)
    kw = dict(spot_offsets_xy=[[0.0, 0.0]], spot_intensity=1000.0, spot_sigma_px=1.0, detector=det, **FLAT)
    sharp, _ = render_pattern((129, 129), (64, 64), **kw)
    tail, truth = render_pattern((129, 129), (64, 64), psf_tail_fraction=0.2, psf_tail_scale_px=4.0, **kw)
    # the kernel is normalised, so the flux is kept (up to what spreads off the image)
    assert tail.sum() == pytest.approx(sharp.sum(), rel=0.03)
    assert tail[64, 64] == pytest.approx(0.8 * sharp[64, 64], rel=0.02)
    assert tail[64, 100] > 1e-3 and sharp[64, 100] < 1e-6  # the tail reaches far
    assert truth.spot_peak[0] == pytest.approx(800.0)


def test_twelve_bit_saturation_and_flagged_spots():
    det = Detector(offset=0.0, read_noise=0.0, full_well=4095.0)
    img, truth = render_pattern((128, 160), (80, 64), spot_offsets_xy=[[30, 0], [-30, 0]],
                                spot_intensity=[9000.0, 1000.0], detector=det, central_beam_intensity=0.0)
    assert img.max() == 4095 and img.shape == (128, 160)
    assert truth.saturated_spots.tolist() == [True, False]
