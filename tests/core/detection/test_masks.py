"""Tests of the automatic and hand-drawn masks (saedkit.core.detection.masks)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from saedkit.core.detection import masks as masks_module
from saedkit.core.errors import InputError
from saedkit.core.detection.masks import (
    find_auto_mask,
    find_beam_stop_mask,
    find_saturated_mask,
    find_detector_mask,
    mask_disc,
    mask_polygon,
    mask_rectangle,
)
from saedkit.core.simulation.render import BeamStop, Detector, render_pattern

FULL_WELL = 65535.0


def _spot_offsets(size: int) -> np.ndarray:
    """An oblique 2-D lattice of spot offsets (invented, for simulation only)."""
    g1, g2 = np.array([37.0, 12.0]), np.array([-9.0, 41.0])
    ij = np.array([(i, j) for i in range(-9, 10) for j in range(-9, 10) if (i, j) != (0, 0)])
    offsets = ij[:, :1] * g1 + ij[:, 1:] * g2
    return offsets[np.hypot(*offsets.T) < 0.75 * size]


def _simulate(
    seed: int,
    *,
    size: int = 384,
    centre_xy=None,
    beam_stop: BeamStop | None = None,
    rings: bool = False,
    counts_per_unit: float = 1.0,
    background: float = 300.0,
    dtype: str = "uint16",
):
    """A spot (and optionally ring) pattern with a saturated central beam."""
    rng = np.random.default_rng(seed)
    if centre_xy is None:
        centre_xy = (size / 2 + rng.uniform(-15, 15), size / 2 + rng.uniform(-15, 15))
    offsets = _spot_offsets(size)
    ring_kw = {}
    if rings:
        ring_kw = dict(ring_radius_px=[0.15 * size, 0.25 * size, 0.33 * size], ring_intensity=[800, 500, 300])
    return render_pattern(
        (size, size),
        centre_xy,
        spot_offsets_xy=offsets,
        spot_intensity=rng.uniform(300, 5000, len(offsets)),
        central_beam_intensity=1e6,
        background_intensity=background,
        beam_stop=beam_stop,
        detector=Detector(full_well=FULL_WELL, counts_per_unit=counts_per_unit, dtype=dtype),
        rng=rng,
        **ring_kw,
    )


def _coverage_and_false_rate(mask: np.ndarray, truth: np.ndarray, grow_px: int = 3):
    """Fraction of the true stop found, and fraction flagged well outside it."""
    coverage = np.count_nonzero(mask & truth) / np.count_nonzero(truth)
    # pixels within the growth (plus 2 px of slack) of the truth are not false
    near = ndi.binary_dilation(truth, iterations=grow_px + 2)
    false_rate = np.count_nonzero(mask & ~near) / np.count_nonzero(~near)
    return coverage, false_rate


# --------------------------------------------------------------------------- #
# Saturation
# --------------------------------------------------------------------------- #


def test_saturated_mask_covers_every_full_well_pixel():
    image, _ = _simulate(1, beam_stop=None)
    saturated = image == FULL_WELL
    assert saturated.sum() > 50  # the central beam saturates (1e6 counts peak)
    mask = find_saturated_mask(image, saturation_value=FULL_WELL)
    assert mask[saturated].all()
    # grown by 2 px (default), no more: every flagged pixel lies within 2 px
    dist = ndi.distance_transform_edt(~saturated)
    assert dist[mask].max() <= 2.0
    assert mask.sum() > saturated.sum()
    assert np.array_equal(find_saturated_mask(image, saturation_value=FULL_WELL, grow_px=0), saturated)


def test_saturated_plateau_found_without_a_value():
    image, _ = _simulate(2, dtype="float32")  # no type maximum to go by
    saturated = image == image.max()
    mask = find_saturated_mask(image, grow_px=0)
    assert np.array_equal(mask, saturated)


def test_saturation_value_not_reached_falls_back_to_plateau():
    image, _ = _simulate(3)
    clipped = np.minimum(image, 16383).astype(np.uint16)  # a 14-bit camera in a 16-bit file
    mask = find_saturated_mask(clipped, saturation_value=65535, grow_px=0)
    assert np.array_equal(mask, clipped == 16383)


def test_no_plateau_no_saturation(rng):
    image = rng.normal(1000.0, 30.0, (128, 128))  # noisy, maximum is one pixel
    assert not find_saturated_mask(image).any()
    assert not find_saturated_mask(image.astype(np.float32), saturation_value=1e5).any()
    few = np.zeros((64, 64), np.uint16)
    few[[3, 20, 40, 50], [5, 30, 10, 60]] = 900  # scattered equal maxima: no plateau
    few[10, 10] = 5
    assert not find_saturated_mask(few).any()


def test_saturated_mask_rejects_bad_input():
    with pytest.raises(InputError, match="2-D"):
        find_saturated_mask(np.ones((3, 16, 16)))
    with pytest.raises(InputError, match="grow_px"):
        find_saturated_mask(np.ones((16, 16)), grow_px=-1)


# --------------------------------------------------------------------------- #
# Beam stop
# --------------------------------------------------------------------------- #


BEAM_STOPS = [
    BeamStop(angle_deg=30.0, width_px=20.0, transmission=0.02, tip_overhang_px=12.0),
    BeamStop(angle_deg=-90.0, width_px=14.0, transmission=0.0, tip_overhang_px=8.0),
    BeamStop(angle_deg=135.0, width_px=32.0, transmission=0.05, tip_overhang_px=16.0),
    BeamStop(angle_deg=0.0, width_px=10.0, transmission=0.01, tip_overhang_px=6.0),
]


@pytest.mark.parametrize("stop", BEAM_STOPS, ids=lambda s: f"angle{s.angle_deg:g}_w{s.width_px:g}")
@pytest.mark.parametrize("centre_known", [True, False])
def test_beam_stop_found(stop, centre_known):
    image, truth = _simulate(10 + int(stop.width_px), beam_stop=stop)
    centre = truth.centre_xy if centre_known else None
    mask = find_beam_stop_mask(image, centre_xy=centre)
    coverage, false_rate = _coverage_and_false_rate(mask, truth.beam_stop_mask)
    assert coverage >= 0.95
    assert false_rate < 0.01


def test_beam_stop_found_with_rings_and_off_centre_pattern():
    stop = BeamStop(angle_deg=-150.0, width_px=18.0, transmission=0.03, tip_overhang_px=10.0)
    image, truth = _simulate(21, size=512, centre_xy=(190.0, 300.0), beam_stop=stop, rings=True)
    mask = find_beam_stop_mask(image)
    coverage, false_rate = _coverage_and_false_rate(mask, truth.beam_stop_mask)
    assert coverage >= 0.95 and false_rate < 0.01


def test_beam_stop_found_in_low_dose_image():
    # 0.02 electrons per unit: background about 6 electrons per pixel
    stop = BeamStop(angle_deg=60.0, width_px=20.0)
    image, truth = _simulate(22, beam_stop=stop, counts_per_unit=0.02)
    coverage, false_rate = _coverage_and_false_rate(find_beam_stop_mask(image), truth.beam_stop_mask)
    assert coverage >= 0.95 and false_rate < 0.01


def test_beam_stop_grow():
    stop = BeamStop(angle_deg=45.0, width_px=16.0)
    image, truth = _simulate(23, beam_stop=stop)
    tight = find_beam_stop_mask(image, centre_xy=truth.centre_xy, grow_px=0)
    grown = find_beam_stop_mask(image, centre_xy=truth.centre_xy, grow_px=6)
    assert (grown >= tight).all() and grown.sum() > tight.sum()
    assert np.array_equal(grown, ndi.binary_dilation(tight, structure=masks_module._disc_structure(6)))


def test_beam_stop_on_a_block_averaged_image(monkeypatch):
    """Large images are searched at reduced size; the mask comes back full size."""
    monkeypatch.setattr(masks_module, "_WORK_MAX_SIDE", 200)  # 512 px -> 3x3 blocks
    stop = BeamStop(angle_deg=-20.0, width_px=24.0, transmission=0.02)
    image, truth = _simulate(24, size=512, beam_stop=stop)
    mask = find_beam_stop_mask(image)
    assert mask.shape == image.shape
    coverage, false_rate = _coverage_and_false_rate(mask, truth.beam_stop_mask, grow_px=3 + 3)
    assert coverage >= 0.95 and false_rate < 0.01


@pytest.mark.parametrize("seed", [30, 31, 32])
def test_no_beam_stop_nothing_flagged(seed):
    image, _ = _simulate(seed, rings=seed == 31, background=[300.0, 100.0, 2000.0][seed - 30])
    assert find_beam_stop_mask(image).mean() < 1e-3
    assert find_beam_stop_mask(image, centre_xy=(192.0, 192.0)).mean() < 1e-3


def test_no_beam_stop_in_one_sided_background():
    """A background that fades on one side is not a beam stop."""
    image, truth = _simulate(33, dtype="float32")
    yy, xx = np.indices(image.shape)
    theta = np.arctan2(yy - truth.centre_xy[1], xx - truth.centre_xy[0])
    faded = (image - 100.0) * (1.0 + 0.5 * np.cos(theta - 0.7)) + 100.0  # 3:1 around a circle
    assert find_beam_stop_mask(faded).mean() < 1e-3


@pytest.mark.parametrize(
    "image",
    [
        np.random.default_rng(3).normal(100, 5, (256, 256)),
        100.0 + np.indices((256, 256))[1],  # a ramp from the floor: dark edge, but soft
        100.0 + np.indices((256, 256))[1] ** 2 / 256,
    ],
    ids=["noise", "ramp", "parabola"],
)
def test_no_beam_stop_in_plain_images(image):
    assert not find_beam_stop_mask(image).any()


def test_beam_stop_rejects_bad_input():
    with pytest.raises(InputError, match="centre_xy"):
        find_beam_stop_mask(np.ones((32, 32)), centre_xy=(1.0, np.nan))
    with pytest.raises(InputError, match="2-D"):
        find_beam_stop_mask(np.ones(32))


def test_auto_mask_is_the_union():
    stop = BeamStop(angle_deg=100.0, width_px=18.0)
    image, truth = _simulate(40, beam_stop=stop)
    # a beam saturating through the tip, as with a too-thin stop: bright, not dark
    image = image.copy()
    yy, xx = np.indices(image.shape)
    leak = np.hypot(xx - truth.centre_xy[0], yy - truth.centre_xy[1]) <= 6
    image[leak] = FULL_WELL
    auto = find_auto_mask(image, centre_xy=truth.centre_xy, saturation_value=FULL_WELL)
    saturated = find_saturated_mask(image, saturation_value=FULL_WELL)
    stop_mask = find_beam_stop_mask(image, centre_xy=truth.centre_xy)
    # the beam's plateau is large, so all of it is masked; the detector defects join the union
    assert np.array_equal(auto, saturated | stop_mask | find_detector_mask(image).mask)
    assert np.array_equal(find_auto_mask(image, centre_xy=truth.centre_xy, saturation_value=FULL_WELL,
                                         detector_defects=False), saturated | stop_mask)
    assert auto[leak].all()
    coverage, false_rate = _coverage_and_false_rate(saturated | stop_mask, truth.beam_stop_mask)
    assert coverage >= 0.95 and false_rate < 0.01


def test_auto_mask_without_beam_stop_is_the_saturated_core():
    image, _ = _simulate(41)
    auto = find_auto_mask(image, saturation_value=FULL_WELL, detector_defects=False)
    assert np.array_equal(auto, find_saturated_mask(image, saturation_value=FULL_WELL))
    # a clean simulated detector: only the 2 px border is added
    border = np.ones(image.shape, bool)
    border[2:-2, 2:-2] = False
    assert np.array_equal(find_auto_mask(image, saturation_value=FULL_WELL), auto | border)


# --------------------------------------------------------------------------- #
# Editing helpers
# --------------------------------------------------------------------------- #


def test_mask_disc_counts_pixel_centres_inside():
    base = np.zeros((40, 50), bool)
    out = mask_disc(base, (20.3, 15.7), 6.5)
    yy, xx = np.indices(base.shape)
    expected = (xx - 20.3) ** 2 + (yy - 15.7) ** 2 <= 6.5**2
    assert np.array_equal(out, expected)
    assert not base.any()  # never modified in place
    cleared = mask_disc(np.ones_like(base), (20.3, 15.7), 6.5, value=False)
    assert np.array_equal(cleared, ~expected)


def test_mask_disc_at_the_edge_and_outside():
    base = np.zeros((20, 20), bool)
    corner = mask_disc(base, (0, 0), 3)
    assert corner.sum() == 11  # quarter of a radius-3 disc incl. axes: 1 + 3 + 3 + 4
    assert not mask_disc(base, (100, 100), 5).any()


def test_mask_polygon():
    base = np.zeros((60, 60), bool)
    square = mask_polygon(base, [[10, 10], [30, 10], [30, 40], [10, 40]])
    assert not base.any()
    rows, cols = np.nonzero(square)
    assert rows.min() == 10 and rows.max() == 40 and cols.min() == 10 and cols.max() == 30
    triangle = mask_polygon(base, [[0, 0], [40, 0], [0, 40]])
    # pixel centres in the closed right triangle with 40-px legs: 41 + 40 + ... + 1
    assert triangle.sum() == 41 * 42 // 2
    hole = mask_polygon(square, [[15, 15], [25, 15], [25, 25], [15, 25]], value=False)
    assert hole.sum() < square.sum() and not hole[20, 20]


def test_mask_rectangle_any_corner_order():
    base = np.zeros((20, 30), bool)
    a = mask_rectangle(base, (2, 3), (6.5, 8))
    b = mask_rectangle(base, (6.5, 8), (2, 3))
    assert np.array_equal(a, b)
    assert np.array_equal(np.argwhere(a)[[0, -1]], [[3, 2], [8, 6]])  # (row, col) corners
    assert a.sum() == 5 * 6
    assert not base.any()
    assert mask_rectangle(np.ones_like(base), (0, 0), (29, 19), value=False).sum() == 0
    assert not mask_rectangle(base, (-10, -10), (-5, -5)).any()


@pytest.mark.parametrize(
    "call",
    [
        lambda m: mask_disc(m.astype(np.uint8), (1, 1), 2),
        lambda m: mask_disc(m, (1, 1), -2),
        lambda m: mask_polygon(m, [[0, 0], [3, 3]]),
        lambda m: mask_polygon(m, [[0, 0], [3, np.nan], [5, 1]]),
        lambda m: mask_rectangle(m, (0, 0), (1, np.inf)),
    ],
)
def test_editing_rejects_bad_input(call):
    with pytest.raises(InputError):
        call(np.zeros((10, 10), bool))


@pytest.mark.parametrize("radius", [1e155, 1e300, float(np.finfo(float).max)])
def test_mask_disc_huge_radius_covers_everything_without_overflow(radius):
    # A disc wider than the image's diagonal covers every pixel (geometry); before the clamp a radius
    # above ~1e154 overflowed radius**2 and int(floor(cy - radius)).
    with np.errstate(all="raise"):
        out = mask_disc(np.zeros((8, 10), bool), (4.0, 3.0), radius)
    assert out.all()


def test_mask_disc_far_centre_huge_radius_stays_empty_when_out_of_reach():
    # a centre 1e200 px away with radius 10 touches nothing (the disc lies far outside)
    with np.errstate(all="raise"):
        out = mask_disc(np.zeros((8, 10), bool), (1e200, 3.0), 10.0)
    assert not out.any()
