"""Centre, masks and spots on frames like those of a hybrid-pixel detector (invented data).

The key frames are built here with a few lines of numpy, independent of saedkit's
simulator: Gaussian spots on a square net (a cubic [001] zone: g(220)/g(200) = √2 at
45°, and g(200) ⊥ g(020); textbook geometry, Williams & Carter, from memory) or a
hexagonal net (equal |g| at 60°: a hexagonal [0001] zone, from memory), only one side
excited as by a tilted crystal (so intensities are not Friedel-symmetric), a 2 × 2 chip
gap cross (lines doubled or dead), a broad amorphous-film halo, hot and dead pixels,
a direct beam without a beam stop (unsaturated, or saturated at 12 bits), Poisson noise.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from saedkit.core.detection.centre import find_centre
from saedkit.core.detection.masks import find_auto_mask, find_detector_mask
from saedkit.core.detection.spots import find_spots, spots_xy_array
from saedkit.core.simulation.render import ChipGaps, KikuchiBand, render_pattern

FULL_12_BIT = 4095.0  # a 12-bit counter saturates at 2^12 - 1 (common practice)


def detector_frame(seed: int, *, net: str = "square", saturated: bool = False, shape=(512, 512), gap: str = "doubled"):
    """(image, truth dict) of an invented frame, built with numpy only."""
    rng = np.random.default_rng(seed)
    rows, cols = shape
    yy, xx = np.indices(shape, dtype=float)
    c = np.array([cols / 2 + rng.uniform(-20, 20), rows / 2 + rng.uniform(-20, 20)])
    a = rng.uniform(30.0, 42.0)
    rot = rng.uniform(0, np.pi)
    between = np.pi / 2 if net == "square" else np.pi / 3
    v1 = a * np.array([np.cos(rot), np.sin(rot)])
    v2 = a * np.array([np.cos(rot + between), np.sin(rot + between)])
    tilt = rng.uniform(0, 2 * np.pi)
    t = np.array([np.cos(tilt), np.sin(tilt)])
    r = np.hypot(xx - c[0], yy - c[1])
    halo_r = rng.uniform(90, 140)
    model = 15.0 + 20.0 * np.exp(-r / 150) + 120.0 * np.exp(-((r - halo_r) ** 2) / (2 * 25.0**2))
    beam_peak = 30000.0 if saturated else 3000.0
    model += beam_peak * np.exp(-(r**2) / (2 * 2.5**2)) + 0.01 * beam_peak / (1 + (r / 8.0) ** 2)
    base = model.copy()
    top = 9000.0 if saturated else 2500.0
    xy, peak = [], []
    for i in range(-14, 15):
        for j in range(-14, 15):
            if (i, j) == (0, 0):
                continue
            off = i * v1 + j * v2
            p = c + off
            if not (8 < p[0] < cols - 9 and 8 < p[1] < rows - 9):
                continue
            # only the side of the pattern near the Laue circle is excited
            excitation = np.exp(-((off @ t / 120.0 - 0.8) ** 2) / 0.5)
            h = top * np.exp(-np.hypot(*off) / 90.0) * excitation * rng.lognormal(0.0, 0.5)
            model += h * np.exp(-((xx - p[0]) ** 2 + (yy - p[1]) ** 2) / (2 * 1.0**2))
            xy.append(p)
            peak.append(h)
    xy, peak = np.array(xy), np.array(peak)
    counts = rng.poisson(model).astype(float)
    # chip gaps: two rows and two columns near the middle
    gx, gy = cols // 2 - 1 + rng.integers(-3, 4), rows // 2 - 1 + rng.integers(-3, 4)
    gap_mask = np.zeros(shape, bool)
    gap_mask[:, gx : gx + 2] = True
    gap_mask[gy : gy + 2, :] = True
    counts[gap_mask] = counts[gap_mask] * 2.5 if gap == "doubled" else 0.0
    free = np.flatnonzero(~gap_mask.ravel())
    pick = rng.choice(free, 25, replace=False)
    hot, dead = pick[:15], pick[15:]
    counts.ravel()[hot] = FULL_12_BIT
    counts.ravel()[dead] = 0.0
    image = np.clip(counts, 0, FULL_12_BIT).astype(np.uint16)
    ixy = np.round(xy).astype(int)
    snr = peak / np.sqrt(base[ixy[:, 1], ixy[:, 0]])  # Poisson: noise = sqrt(background)
    bad_xy = np.stack(np.divmod(pick, cols)[::-1], axis=1).astype(float)
    return image, {
        "centre": c, "spot_xy": xy, "snr": snr, "gap": gap_mask, "bad_xy": bad_xy,
        "saturated": image[ixy[:, 1], ixy[:, 0]] >= FULL_12_BIT,
    }


def measurable(truth, shape):
    """Spots whose centre is clear of the gap lines (1.5 px), the hot and dead pixels (2 px)
    and the edge (3 px)."""
    dg = ndi.distance_transform_edt(~truth["gap"])
    ixy = np.round(truth["spot_xy"]).astype(int)
    dh, _ = cKDTree(truth["bad_xy"]).query(truth["spot_xy"])
    inside = np.all((truth["spot_xy"] >= 3) & (truth["spot_xy"] <= np.array(shape[::-1]) - 4), axis=1)
    return (dg[ixy[:, 1], ixy[:, 0]] > 1.5) & (dh > 2.0) & inside


FRAMES = [
    # seed, net, 12-bit saturated beam and strongest spots, gap pixels
    (11, "square", False, "doubled"),
    (12, "square", True, "dead"),
    (13, "hexagonal", False, "dead"),
    (14, "hexagonal", True, "doubled"),
    (15, "square", True, "doubled"),
    (16, "hexagonal", False, "doubled"),
]


@functools.lru_cache(maxsize=None)
def analyse(seed, net, saturated, gap):
    image, truth = detector_frame(seed, net=net, saturated=saturated, gap=gap)
    mask = find_auto_mask(image)
    centre = find_centre(image, mask=mask)
    spots = find_spots(image, mask=mask, centre_xy=centre.xy)
    return image, truth, mask, centre, spots


@pytest.mark.parametrize("frame", FRAMES)
def test_centre_within_half_a_pixel_on_detector_frames(frame):
    image, truth, mask, centre, spots = analyse(*frame)
    err = np.hypot(*(centre.xy - truth["centre"]))
    assert err < 0.5, (err, centre.method, centre.notes)  # project target: 0.5 px
    assert centre.confidence >= 0.5
    assert centre.method in ("direct-beam", "friedel-pairs")


@pytest.mark.parametrize("frame", FRAMES)
def test_spots_found_none_false_none_on_gaps_beam_or_edge(frame):
    image, truth, mask, centre, spots = analyse(*frame)
    xy = spots_xy_array(spots)
    target = (truth["snr"] >= 5) & measurable(truth, image.shape)
    d, _ = cKDTree(xy).query(truth["spot_xy"][target])
    missed = truth["snr"][target][d > 2.0]
    # every spot with S/N >= 5 found (project target), allowing those the noise puts
    # just under the threshold of the measured S/N (see test_spots.py; 7 here: 1 px spots
    # next to gap lines and hot pixels have fewer usable pixels)
    assert np.all(missed < 7.0), np.round(missed, 1)
    assert missed.size <= 0.05 * target.sum()
    d_true, _ = cKDTree(truth["spot_xy"]).query(xy)
    assert np.sum(d_true > 2.0) <= 0.02 * len(spots)  # at most 2 % false (project target)
    assert all(s.snr >= 5 for s in spots)  # the program's own threshold, by its own measure
    ixy = np.round(xy).astype(int)
    assert not truth["gap"][ixy[:, 1], ixy[:, 0]].any()  # none on a gap line
    assert np.all(np.hypot(*(xy - truth["centre"]).T) > 5.0)  # none in the direct beam
    assert np.all((xy >= 2) & (xy <= np.array(image.shape[::-1]) - 3))  # none at the edge


@pytest.mark.parametrize("frame", [f for f in FRAMES if f[2]])
def test_saturated_spots_are_kept_and_flagged(frame):
    image, truth, mask, centre, spots = analyse(*frame)
    sat_truth = truth["saturated"] & measurable(truth, image.shape)
    assert sat_truth.sum() >= 2  # the frame has some
    xy = spots_xy_array(spots)
    d, i = cKDTree(xy).query(truth["spot_xy"][sat_truth])
    assert np.all(d < 0.5)  # kept, with a sound position (from the unsaturated wings)
    assert all(spots[k].saturated for k in i)
    d_all, idx = cKDTree(truth["spot_xy"]).query(xy)
    flagged = np.array([s.saturated for s in spots])
    assert not np.any(flagged & ~truth["saturated"][idx])  # no false flags


def test_detector_mask_finds_gap_lines_hot_and_dead_pixels():
    image, truth = detector_frame(21, gap="doubled")
    found = find_detector_mask(image)
    assert found.mask[truth["gap"]].all()
    hot_dead = truth["bad_xy"].astype(int)
    assert found.mask[hot_dead[:10, 1], hot_dead[:10, 0]].all()  # the 15 hot: first rows of bad_xy
    inner = found.mask.copy()
    inner[:2] = inner[-2:] = False
    inner[:, :2] = inner[:, -2:] = False
    # little else: the 25 hot and dead pixels and a few dark or bright pixels by chance
    assert np.count_nonzero(inner & ~truth["gap"]) <= 40
    assert len(found.line_columns) == 2 and len(found.line_rows) == 2
    assert found.to_dict()["n_hot"] >= 15


def test_detector_mask_of_a_clean_frame_is_the_border():
    rng = np.random.default_rng(3)
    image = rng.poisson(200.0, (256, 320)).astype(np.uint16)  # non-square, no defects
    found = find_detector_mask(image)
    border = np.ones(image.shape, bool)
    border[2:-2, 2:-2] = False
    assert np.array_equal(found.mask, border)
    assert found.line_columns == () and found.line_rows == ()


def test_dead_gap_cross_is_not_taken_for_a_beam_stop():
    image, truth = detector_frame(22, gap="dead")
    mask = find_auto_mask(image)
    assert mask.mean() < 0.05  # the gap cross, the border and the defects only


def test_symmetry_correlation_not_trusted_on_a_tilted_frame():
    image, truth, mask, centre, spots = analyse(13, "hexagonal", False, "dead")
    # the beam or the Friedel pairs of positions decide; the centre is right
    assert centre.method != "friedel-correlation"
    assert np.hypot(*(centre.xy - truth["centre"])) < 0.5


def test_weak_centre_is_flagged_not_refused():
    rng = np.random.default_rng(5)
    noise = rng.poisson(50.0, (128, 128)).astype(np.uint16)
    c = find_centre(noise)
    assert c.confidence < 0.5
    assert any("weak" in n for n in c.notes)


def test_kikuchi_lines_give_no_spots():
    # bright straight bands only (simulator), no spots: every detection would be false
    rng = np.random.default_rng(8)
    bands = [KikuchiBand(angle_deg=25.0, distance_px=20.0, width_px=40.0, intensity=120.0),
             KikuchiBand(angle_deg=110.0, distance_px=-35.0, width_px=30.0, intensity=120.0)]
    image, truth = render_pattern((384, 384), (190.0, 195.0), kikuchi_bands=bands, central_beam_intensity=4000.0,
                                  central_beam_sigma_px=2.5, background_intensity=200.0, rng=rng,
                                  chip_gaps=ChipGaps(hot_pixels=5))
    spots = find_spots(image, mask=find_auto_mask(image), centre_xy=truth.centre_xy, spot_sigma_px=1.0)
    assert len(spots) <= 2
