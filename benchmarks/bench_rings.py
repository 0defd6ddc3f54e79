"""Speed of the radial profile and the ring search on a 4096 × 4096 ring pattern.

Figures are printed as ratios to a baseline measured in the same run: one
``np.bincount`` over the image (precomputed integer radii as the bins, the
uint16 image as the weights; best of 3), the least any radial average can do.

- ``calculate_radial_profile`` with an ellipse correction (radii computed on
  the fly, four bincounts: counts, radius, intensity, intensity²), target ≤ 3×;
- ``find_rings`` (coarse centre, three rounds of profile, peaks, ring points
  and ellipse fit, final profile), reported with its accuracy.

Run with ``.venv/bin/python benchmarks/bench_rings.py``.
"""

from __future__ import annotations

import time

import numpy as np
from _timing import best_of

from saedkit.core.distortion import Ellipse
from saedkit.core.simulation.render import BeamStop, render_pattern
from saedkit.core.detection.rings import calculate_radial_profile, find_rings

SIZE = 4096
TARGET_PROFILE_RATIO = 3.0


def make_pattern(seed: int = 20261202):
    """A 4096² uint16 ring pattern of an fcc film (first six rings, radii in the
    ratios √3 : √4 : √8 : √11 : √12 : √16), 1.2 % ellipticity, a saturated
    central beam and a masked beam stop. Invented data for the benchmark."""
    rng = np.random.default_rng(seed)
    centre = np.array([SIZE / 2 + 37.3, SIZE / 2 - 21.8])
    radii = 320.0 * np.sqrt(np.array([3, 4, 8, 11, 12, 16]) / 3.0)
    image, truth = render_pattern(
        (SIZE, SIZE),
        centre,
        ring_radius_px=radii,
        ring_intensity=np.array([600.0, 400.0, 280.0, 240.0, 120.0, 80.0]),
        ring_width_px=3.0,
        ellipse=Ellipse(0.012, 33.0),
        central_beam_intensity=1.0e6,
        central_beam_sigma_px=10.0,
        background_intensity=500.0,
        beam_stop=BeamStop(angle_deg=-35.0, width_px=60.0, tip_overhang_px=30.0),
        rng=rng,
    )
    return image, truth



def main() -> None:
    print(f"making a {SIZE}x{SIZE} uint16 ring pattern ...", flush=True)
    image, truth = make_pattern()
    mask = truth.beam_stop_mask
    cx, cy = truth.centre_xy

    yy, xx = np.indices(image.shape, dtype=np.float32)
    r_int = np.hypot(xx - np.float32(cx), yy - np.float32(cy)).astype(np.intp).ravel()
    del yy, xx
    flat = image.ravel()
    baseline, _ = best_of(lambda: np.bincount(r_int, weights=flat))

    ellipse = Ellipse(0.012, 33.0)
    t_profile, _ = best_of(
        lambda: calculate_radial_profile(image, (cx, cy), mask=mask, ellipse=ellipse)
    )
    t_profile_nomask, _ = best_of(lambda: calculate_radial_profile(image, (cx, cy), ellipse=ellipse))

    t0 = time.perf_counter()
    fit = find_rings(image, mask=mask)
    t_find = time.perf_counter() - t0

    print(f"{'name':40s} {'seconds':>9s} {'ratio':>9s}")
    print(f"{'baseline: np.bincount over the image':40s} {baseline:9.3f} {1.0:8.2f}x")
    rows = [
        ("calculate_radial_profile (ellipse+mask)", t_profile),
        ("calculate_radial_profile (ellipse)", t_profile_nomask),
        ("find_rings", t_find),
    ]
    for name, t in rows:
        print(f"{name:40s} {t:9.3f} {t / baseline:8.2f}x")
    ratio = t_profile / baseline
    verdict = "meets" if ratio <= TARGET_PROFILE_RATIO else "MISSES"
    print(f"profile: {ratio:.2f}x baseline ({verdict} the target of <= {TARGET_PROFILE_RATIO:g}x)")

    # accuracy of the ring search on this pattern (truth from the simulation)
    n = min(len(fit.rings), len(truth.ring_radius_px))
    found = np.array([r.radius_px for r in fit.rings])
    rel = [
        float(np.min(np.abs(found - r_true)) / r_true) for r_true in truth.ring_radius_px[:n]
    ]
    print(
        f"find_rings: centre error {np.hypot(fit.centre.x - cx, fit.centre.y - cy):.4f} px, "
        f"ellipticity {fit.ellipse.ellipticity:.5f} (true 0.01200), "
        f"axis {fit.ellipse.major_axis_deg:.2f} deg (true 33.00), "
        f"{len(fit.rings)} rings, worst radius error {100 * max(rel):.4f} %"
    )


if __name__ == "__main__":
    main()
