"""Spot detection, refinement and snapping on simulated spot patterns with known truth."""

from __future__ import annotations

import functools

import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from saedkit.core.errors import FitError, InputError, SaedkitError
from saedkit.core.simulation.render import BeamStop, Detector, render_pattern
from saedkit.core.detection.spots import Spot, find_spots, refine_spot, snap_to_spot, spots_xy_array

# Targets from the project's issue: every spot with peak SNR >= 5 found, at most 2 %
# false detections (farther than 2 px from any true spot), refined positions of spots
# with SNR >= 15 within 0.15 px RMS, a snap from 4 px away within 0.15 px.
MATCH_PX = 2.0


def lattice_pattern(
    seed: int,
    size: int = 512,
    *,
    sigma: float = 1.5,
    dose: float = 1.0,
    beam: float = 2.0e5,
    stop: bool = False,
):
    """A simulated zone-axis-like spot pattern (invented data).

    A 2-D lattice of offsets i·g1 + j·g2 (|g| 30–60 px, 60–90° apart, random
    in-plane rotation) about a centre near the middle; peak heights fall with
    |g| from very bright to below the noise, equal within 5 % for g and −g
    (Friedel's law in kinematic conditions: Williams & Carter, *Transmission
    Electron Microscopy*, from memory). Returns (image, truth, mask) with the mask
    covering the beam stop and the saturated pixels.
    """
    rng = np.random.default_rng(seed)
    centre = np.array([size / 2, size / 2]) + rng.uniform(-15, 15, 2)
    g1, g2 = rng.uniform(30, 60, 2)
    angle, rot = np.deg2rad(rng.uniform(60, 90)), rng.uniform(0, 2 * np.pi)
    v1 = g1 * np.array([np.cos(rot), np.sin(rot)])
    v2 = g2 * np.array([np.cos(rot + angle), np.sin(rot + angle)])
    n = int(1.5 * size / min(g1, g2)) + 1
    factor = {}
    offsets, heights = [], []
    for i in range(-n, n + 1):
        for j in range(-n, n + 1):
            if (i, j) == (0, 0):
                continue
            off = i * v1 + j * v2
            p = centre + off
            if not (np.all(p >= 6) and np.all(p <= size - 7)):
                continue
            key = max((i, j), (-i, -j))
            factor.setdefault(key, rng.uniform(0.6, 1.4))
            r = np.hypot(*off)
            offsets.append(off)
            heights.append(6000.0 * np.exp(-r / 60.0) * factor[key] * rng.uniform(0.95, 1.05))
    image, truth = render_pattern(
        (size, size),
        centre,
        spot_offsets_xy=np.array(offsets),
        spot_intensity=np.array(heights),
        spot_sigma_px=sigma,
        central_beam_intensity=beam,
        beam_stop=BeamStop(angle_deg=rng.uniform(0, 360)) if stop else None,
        detector=Detector(counts_per_unit=dose),
        rng=rng,
    )
    mask = image >= 65535
    if truth.beam_stop_mask is not None:
        mask = mask | truth.beam_stop_mask
    return image, truth, mask


@functools.lru_cache(maxsize=None)
def found(seed, size, sigma, dose, beam, stop, with_centre):
    image, truth, mask = lattice_pattern(seed, size, sigma=sigma, dose=dose, beam=beam, stop=stop)
    centre = truth.centre_xy if with_centre else None
    return image, truth, mask, find_spots(image, mask=mask, centre_xy=centre)


def visible(truth, mask, shape):
    """True spots whose 2-sigma disc (86 % of the flux) is clear of the mask and the image
    edge; half-hidden spots are not counted."""
    margin = 2 * truth.spot_sigma_px
    far = ndi.distance_transform_edt(~mask) > max(3.0, margin + 1)
    xy = np.round(truth.spot_xy).astype(int)
    inside = (
        (truth.spot_xy[:, 0] >= margin) & (truth.spot_xy[:, 0] <= shape[1] - 1 - margin)
        & (truth.spot_xy[:, 1] >= margin) & (truth.spot_xy[:, 1] <= shape[0] - 1 - margin)
    )
    out = np.zeros(len(xy), bool)
    out[inside] = far[xy[inside, 1], xy[inside, 0]]
    return out


CASES = [
    # seed, size, sigma, dose, beam, beam stop, centre given
    (1, 512, 1.5, 1.0, 2.0e5, False, False),
    (2, 384, 1.0, 0.3, 1.0e6, True, False),
    (3, 512, 2.5, 0.3, 1.0e6, False, True),
    (4, 768, 1.5, 0.25, 2.0e5, True, True),
    (5, 384, 3.5, 1.0, 1.0e6, True, False),
]


@pytest.mark.parametrize("case", CASES)
def test_every_spot_above_snr_5_is_found_with_few_false(case):
    image, truth, mask, spots = found(*case)
    xy = spots_xy_array(spots)
    assert len(spots) > 20
    # recall: every visible spot with peak SNR >= 5 within 2 px of a detection (project target)
    target = (truth.spot_snr >= 5) & visible(truth, mask, image.shape)
    dist_to_found, _ = cKDTree(xy).query(truth.spot_xy[target])
    missed = truth.spot_snr[target][dist_to_found > MATCH_PX]
    # every listed spot passes S/N >= 5 by its own measured S/N (project target), so a
    # spot whose true S/N is just above 5 is lost when the noise puts its measured S/N
    # below: none above 6.5 (2.5 standard errors of the measured S/N for 1 px spots) may
    # be missed, and at least 95 % of all those at 5 or more are found
    assert np.all(missed < 6.5), f"missed spots with SNR {np.round(missed, 1)}"
    assert missed.size <= 0.05 * target.sum(), f"missed spots with SNR {np.round(missed, 1)}"
    assert all(s.snr >= 5 for s in spots)
    # false detections: farther than 2 px from every true spot, at most 2 % (project target)
    dist_to_true, _ = cKDTree(truth.spot_xy).query(xy)
    n_false = int(np.sum(dist_to_true > MATCH_PX))
    assert n_false <= 0.02 * len(spots), f"{n_false} false of {len(spots)}"


@pytest.mark.parametrize("case", CASES)
def test_bright_spots_are_refined_within_015_px_rms(case):
    image, truth, mask, spots = found(*case)
    xy = spots_xy_array(spots)
    dist, idx = cKDTree(truth.spot_xy).query(xy)
    bright = (dist <= MATCH_PX) & (truth.spot_snr[idx] >= 15)
    assert bright.sum() >= 15
    err = xy[bright] - truth.spot_xy[idx[bright]]
    rms = float(np.sqrt(np.mean(np.sum(err**2, axis=1))))
    assert rms <= 0.15, rms  # project target: 0.15 px RMS at SNR >= 15


def test_position_uncertainties_match_the_scatter():
    # the quoted sigma should describe the real error: normalised errors with SD near 1
    # (common practice for checking a covariance on simulations)
    pulls = []
    for case in CASES[:3]:
        image, truth, mask, spots = found(*case)
        xy = spots_xy_array(spots)
        sig = np.array([[s.sigma_x, s.sigma_y] for s in spots])
        dist, idx = cKDTree(truth.spot_xy).query(xy)
        use = (dist <= MATCH_PX) & (truth.spot_snr[idx] >= 15) & visible(truth, mask, image.shape)[idx]
        pulls.append((xy[use] - truth.spot_xy[idx[use]]) / sig[use])
    sd = np.concatenate(pulls).std(axis=0)
    assert np.all(sd > 0.7) and np.all(sd < 1.4), sd


@pytest.mark.parametrize("sigma", [1.0, 3.0])
def test_spot_width_is_estimated_when_not_given(sigma):
    image, truth, mask = lattice_pattern(11, 384, sigma=sigma)
    spots = find_spots(image, mask=mask)
    widths = [s.width_px for s in spots if s.snr >= 20 and s.method == "gaussian"]
    assert len(widths) >= 10
    assert np.median(widths) == pytest.approx(sigma, rel=0.05)


def test_integrated_intensity_of_isolated_spots():
    # a Gaussian spot of peak A and sigma s holds 2·pi·s²·A counts, 98.9 % of it inside
    # 3 s (1 − exp(−4.5)); textbook Gaussian integral (common practice)
    s, peak = 1.5, 3000.0
    offsets = np.array([[60.0, 0.0], [-60.0, 0.0], [0.0, 70.0], [0.0, -70.0], [80.0, 80.0], [-80, -80]])
    image, truth = render_pattern(
        (384, 384), (190.0, 195.0), spot_offsets_xy=offsets, spot_intensity=peak,
        spot_sigma_px=s, rng=np.random.default_rng(5),
    )
    spots = find_spots(image, centre_xy=truth.centre_xy, spot_sigma_px=s)
    assert len(spots) == 6
    expected = 2 * np.pi * s * s * peak * (1 - np.exp(-4.5))
    for sp in spots:
        assert abs(sp.intensity - expected) < max(3 * sp.intensity_sigma, 0.03 * expected)
        assert sp.peak == pytest.approx(peak, rel=0.05)
        assert sp.width_px == pytest.approx(s, rel=0.05)


def test_results_sorted_by_intensity_and_capped():
    image, truth, mask, spots = found(*CASES[0])
    inten = [s.intensity for s in spots]
    assert inten == sorted(inten, reverse=True)
    every = find_spots(image, mask=mask, spot_sigma_px=1.5)
    few = find_spots(image, mask=mask, spot_sigma_px=1.5, max_spots=7)
    assert few == every[:7]


def test_no_spots_in_a_pattern_without_spots():
    # pure background, central beam and noise: nothing above 5 sigma should come out
    for seed in (21, 22):
        image, _ = render_pattern((384, 384), (190.5, 185.2), rng=np.random.default_rng(seed))
        assert find_spots(image, spot_sigma_px=1.5) == ()


def test_noise_correlated_between_pixels_is_measured():
    # a scintillator camera spreads each electron over neighbouring pixels, so the noise
    # is correlated and the matched filter passes more of it than white noise would
    # (common practice); the detector must measure that rather than flood the result
    offsets = np.array(
        [[i * 47.0 + j * 12.0, j * 44.0 - i * 9.0] for i in range(-5, 6) for j in range(-5, 6) if (i, j) != (0, 0)]
    )
    offsets = offsets[np.all(np.abs(offsets) < 230, axis=1)]
    model, truth = render_pattern(
        (512, 512), (250.3, 260.8), spot_offsets_xy=offsets, spot_intensity=300.0, spot_sigma_px=2.0,
        detector=Detector(dtype="float64"),
    )
    white = np.random.default_rng(4).normal(0, 1, model.shape) * np.sqrt(np.clip(model - 100, 1, None) + 9)
    blurred = 2.0 * ndi.gaussian_filter(white, 1.0)
    assert find_spots(model - truth_spots(model, truth) + blurred, spot_sigma_px=2.0) == ()
    spots = find_spots(model + blurred, spot_sigma_px=2.0)
    xy = spots_xy_array(spots)
    d_true, _ = cKDTree(xy).query(truth.spot_xy)
    d_found, _ = cKDTree(truth.spot_xy).query(xy)
    assert np.mean(d_true <= MATCH_PX) >= 0.97
    assert np.sum(d_found > MATCH_PX) <= 0.02 * len(spots)


def truth_spots(model, truth):
    """The spots alone, drawn again on an empty detector (for a spot-free copy)."""
    spots_only, _ = render_pattern(
        model.shape, truth.centre_xy, spot_offsets_xy=truth.spot_xy - truth.centre_xy,
        spot_intensity=truth.spot_peak, spot_sigma_px=truth.spot_sigma_px, central_beam_intensity=0.0,
        background_intensity=0.0, detector=Detector(dtype="float64", offset=0.0),
    )
    return spots_only


def test_centroid_refinement_is_offered():
    image, truth, mask, _ = found(*CASES[0])
    spots = find_spots(image, mask=mask, spot_sigma_px=1.5, refine="centroid")
    assert spots and all(s.method == "centroid" for s in spots)
    xy = spots_xy_array(spots)
    dist, idx = cKDTree(truth.spot_xy).query(xy)
    bright = truth.spot_snr[idx] >= 30
    assert np.sqrt(np.mean(dist[bright] ** 2)) < 0.3


def test_progress_and_cancel():
    image, truth, mask = lattice_pattern(1, 384)
    calls = []
    spots = find_spots(image, spot_sigma_px=1.5, progress=lambda done, total: calls.append((done, total)))
    assert spots and calls
    assert calls[-1][0] == calls[-1][1] > 0
    assert all(a <= b for (a, _), (b, _) in zip(calls, calls[1:]))
    with pytest.raises(SaedkitError, match="cancelled"):
        find_spots(image, spot_sigma_px=1.5, should_stop=lambda: True)
    # cancel half-way through the refinement
    state = {"n": 0}

    def stop_later():
        state["n"] += 1
        return state["n"] > 4

    with pytest.raises(SaedkitError, match="cancelled"):
        find_spots(image, spot_sigma_px=1.5, should_stop=stop_later)


def test_snap_from_4_px_away_and_not_on_background():
    image, truth, mask = lattice_pattern(1, 512)
    bright = np.flatnonzero((truth.spot_snr > 30) & visible(truth, mask, image.shape))
    rng = np.random.default_rng(3)
    for i in bright[:6]:
        direction = rng.uniform(0, 2 * np.pi)
        click = truth.spot_xy[i] + 4.0 * np.array([np.cos(direction), np.sin(direction)])
        spot = snap_to_spot(image, click, mask=mask)
        assert spot is not None
        assert np.hypot(*(spot.xy - truth.spot_xy[i])) <= 0.15  # project target
    # a click far from every spot (at least 25 px) returns None
    yy, xx = np.mgrid[20:490:7, 20:490:7]
    grid = np.stack([xx.ravel(), yy.ravel()], axis=1).astype(float)
    d, _ = cKDTree(truth.spot_xy).query(grid)
    r = np.hypot(*(grid - truth.centre_xy).T)
    empty = grid[(d > 25) & (r > 60)]
    assert len(empty) >= 3
    for click in empty[:3]:
        assert snap_to_spot(image, click, mask=mask) is None


def test_refine_spot_and_fit_error_on_background():
    image, truth, mask = lattice_pattern(1, 512)
    i = int(np.argmax(np.where(visible(truth, mask, image.shape), truth.spot_snr, 0)))
    spot = refine_spot(image, truth.spot_xy[i] + [0.8, -0.7], mask=mask, spot_sigma_px=2.0)
    assert isinstance(spot, Spot) and spot.method == "gaussian"
    assert np.hypot(*(spot.xy - truth.spot_xy[i])) < 0.15
    assert spot.width_px == pytest.approx(truth.spot_sigma_px, rel=0.1)
    yy, xx = np.mgrid[20:490:9, 20:490:9]
    grid = np.stack([xx.ravel(), yy.ravel()], axis=1).astype(float)
    d, _ = cKDTree(truth.spot_xy).query(grid)
    r = np.hypot(*(grid - truth.centre_xy).T)
    empty = grid[(d > 25) & (r > 60)][0]
    with pytest.raises(FitError, match="no spot"):
        refine_spot(image, empty, mask=mask)


def test_spot_record():
    sp = Spot(1.0, 2.0, 0.1, 0.2, 100.0, 10.0, 5.0, 20.0, 8.0, 1.5, "gaussian")
    d = sp.to_dict()
    assert set(d) == {
        "x", "y", "sigma_x_px", "sigma_y_px", "intensity", "intensity_sigma",
        "background", "peak", "snr", "width_px", "saturated",
    }
    assert np.array_equal(sp.xy, [1.0, 2.0])
    assert spots_xy_array([]).shape == (0, 2)
    assert spots_xy_array([sp, sp]).shape == (2, 2)


def test_bad_input_names_the_argument():
    img = np.zeros((64, 64), np.uint16)
    with pytest.raises(InputError, match="image"):
        find_spots(np.zeros((3, 64, 64)))
    with pytest.raises(InputError, match="mask"):
        find_spots(img, mask=np.zeros((32, 64), bool))
    with pytest.raises(InputError, match="spot_sigma_px"):
        find_spots(img, spot_sigma_px=-1.0)
    with pytest.raises(InputError, match="min_snr"):
        find_spots(img, min_snr=0)
    with pytest.raises(InputError, match="refine"):
        find_spots(img, refine="parabola")
    with pytest.raises(InputError, match="max_spots"):
        find_spots(img, max_spots=0)
    with pytest.raises(InputError, match="centre_xy"):
        find_spots(img, centre_xy=(1.0, np.nan))
    with pytest.raises(InputError, match="mask"):
        find_spots(img, mask=np.ones((64, 64), bool))
    with pytest.raises(InputError, match="image"):
        refine_spot(np.zeros((2, 8, 8)), (4, 4))
    with pytest.raises(InputError, match="spot_sigma_px"):
        refine_spot(img, (30, 30), spot_sigma_px=-2)
    with pytest.raises(InputError, match="xy"):
        refine_spot(img, (300, 30))
    with pytest.raises(InputError, match="mask"):
        snap_to_spot(img, (30, 30), mask=np.zeros((64, 65), bool))
    with pytest.raises(InputError, match="search_radius_px"):
        snap_to_spot(img, (30, 30), search_radius_px=-1)
    with pytest.raises(InputError, match="spot_sigma_px"):
        snap_to_spot(img, (30, 30), spot_sigma_px=0)


def test_spot_record_has_no_nan():
    # a hand-placed spot has no measured intensity; its JSON record says null, never NaN
    import json

    from saedkit.core.detection.spots import Spot

    s = Spot(10.0, 12.0, 0.5, 0.5, float("nan"), float("nan"), float("nan"), float("nan"), float("nan"), 2.0, "manual")
    rec = s.to_dict()
    assert rec["intensity"] is None and rec["x"] == 10.0
    json.dumps(rec, allow_nan=False)
