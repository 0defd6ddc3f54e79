"""Speed, memory and recall of spot finding on a 4096 × 4096 simulated pattern.

Figures are printed as ratios to a baseline measured in the same run (one
Gaussian smoothing of the image, sigma 2), so they compare across machines:

- ``spots.find_spots`` (detection and Gaussian refinement) against the baseline,
  target ≤ 6×;
- ``skimage.feature.blob_log`` (default settings, image scaled to [0, 1]) against
  ``find_spots``, target ≥ 10× slower at no better recall;
- recall: the fraction of the spots drawn with peak SNR ≥ 5 that a method finds
  within 2 px;
- peak memory of ``find_spots`` (tracemalloc) over the float32 image size,
  target ≤ 8×.

Run with ``.venv/bin/python benchmarks/bench_spots.py``.
"""

from __future__ import annotations

import time
import tracemalloc

import numpy as np
from _timing import best_of
from scipy import ndimage as ndi
from scipy.spatial import cKDTree

from saedkit.core.simulation.render import BeamStop, render_pattern
from saedkit.core.detection.spots import find_spots, spots_xy_array

SIZE = 4096
SPOT_SIGMA_PX = 2.0


def make_pattern(seed: int = 20261202):
    """A 4096² uint16 spot pattern: a 2-D lattice of spots whose intensity falls
    with |g| (bright near the centre, faint at the edge), a saturated central beam
    and a beam stop. Invented data for the benchmark."""
    rng = np.random.default_rng(seed)
    centre = np.array([SIZE / 2 + 13.3, SIZE / 2 - 21.7])
    g1, g2, angle, rot = 240.0, 280.0, np.deg2rad(72.0), np.deg2rad(17.0)
    v1 = g1 * np.array([np.cos(rot), np.sin(rot)])
    v2 = g2 * np.array([np.cos(rot + angle), np.sin(rot + angle)])
    n = 12
    ij = np.array([(i, j) for i in range(-n, n + 1) for j in range(-n, n + 1) if (i, j) != (0, 0)])
    offsets = ij[:, :1] * v1 + ij[:, 1:] * v2
    pos = centre + offsets
    inside = np.all((pos >= 12) & (pos <= SIZE - 13), axis=1)
    offsets = offsets[inside]
    r = np.hypot(*offsets.T)
    peaks = 3.0e4 * np.exp(-r / 300.0) * rng.uniform(0.6, 1.4, len(r))
    image, truth = render_pattern(
        (SIZE, SIZE),
        centre,
        spot_offsets_xy=offsets,
        spot_intensity=peaks,
        spot_sigma_px=SPOT_SIGMA_PX,
        central_beam_intensity=1.0e6,
        central_beam_sigma_px=8.0,
        background_intensity=400.0,
        beam_stop=BeamStop(angle_deg=-35.0, width_px=60.0, tip_overhang_px=30.0),
        rng=rng,
    )
    return image, truth



def recall(found_xy: np.ndarray, truth_xy: np.ndarray, tol_px: float = 2.0) -> float:
    if len(truth_xy) == 0:
        return float("nan")
    if len(found_xy) == 0:
        return 0.0
    d, _ = cKDTree(found_xy).query(truth_xy)
    return float(np.mean(d <= tol_px))


def main() -> None:
    print(f"building a {SIZE}x{SIZE} uint16 pattern ...", flush=True)
    image, truth = make_pattern()
    mask = truth.beam_stop_mask
    strong = truth.spot_snr >= 5
    target_xy = truth.spot_xy[strong]
    print(
        f"{len(truth.spot_xy)} spots drawn, {int(strong.sum())} with peak SNR >= 5, "
        f"{int(np.sum(truth.spot_snr < 5))} fainter; beam stop and saturated beam"
    )

    base, _ = best_of(lambda: ndi.gaussian_filter(image.astype(np.float32), sigma=2))
    print(f"baseline: gaussian_filter sigma=2 on float32  {base:.3f} s")

    result = {}

    def run_find():
        result["spots"] = find_spots(image, mask=mask, refine="gaussian")

    t_find, _ = best_of(run_find)
    spots = result["spots"]
    rec_find = recall(spots_xy_array(spots), target_xy)
    print(
        f"spots.find_spots  {t_find:.2f} s  {t_find / base:.1f}x baseline "
        f"(gaussian_filter sigma=2: {base:.2f} s)  [target <= 6x]"
    )

    tracemalloc.start()
    find_spots(image, mask=mask, refine="gaussian")
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    f32 = image.size * 4
    print(
        f"spots.find_spots peak memory  {peak / 2**20:.0f} MiB  {peak / f32:.1f}x the float32 image "
        f"({f32 / 2**20:.0f} MiB)  [target <= 8x]"
    )

    from skimage.feature import blob_log

    lo, hi = float(image.min()), float(image.max())
    norm = (image.astype(np.float64) - lo) / (hi - lo)
    t0 = time.perf_counter()
    blobs = blob_log(norm)
    t_blob = time.perf_counter() - t0
    rec_blob = recall(blobs[:, [1, 0]] if len(blobs) else np.zeros((0, 2)), target_xy)
    print(
        f"skimage.feature.blob_log  {t_blob:.2f} s  {t_blob / base:.1f}x baseline  "
        f"{t_blob / t_find:.1f}x find_spots  [target >= 10x]"
    )
    print(f"recall (SNR >= 5, within 2 px): find_spots {rec_find:.3f} ({len(spots)} found), "
          f"blob_log {rec_blob:.3f} ({len(blobs)} found)")


if __name__ == "__main__":
    main()
