"""Speed of the zone-axis matcher.

Targets: a 20-spot pattern against one cubic phase with zones up to index
10 in ≤ 50 ms; against the whole library (rutile and α-Ti included) in ≤ 1 s.
The baseline, measured in the same run, is sorting 10⁶ random floats with
numpy (a fixed amount of work that tracks the machine's speed).
"""

from __future__ import annotations


import numpy as np
from _timing import best_of

from saedkit.core.crystallography.library import LIBRARY, find_phase
from saedkit.core.indexing import matching
from saedkit.core.indexing.matching import match_zone_axes
from saedkit.core.simulation.simulate import simulate_spot_pattern



def main() -> None:
    rng = np.random.default_rng(0)
    data = rng.random(1_000_000)
    t_base, _ = best_of(lambda: np.sort(data), 5)
    print(f"baseline np.sort(1e6 floats)            {t_base * 1e3:8.1f} ms")

    ph = find_phase("Ni")
    _, t = simulate_spot_pattern(ph, (0, 1, 1), shape=(1024, 1024), camera_constant_px_A=280, rotation_deg=23, rng=None)
    order = np.argsort(np.linalg.norm(t.xy - t.centre_xy, axis=1))[:20]
    xy = t.xy[order] + rng.normal(0, 0.3, (20, 2))
    centre = np.array(t.centre_xy) + [0.8, -0.6]
    phases = [find_phase(e.name) for e in LIBRARY]
    def cold(fn):
        # clear the reflection-table caches first: the figure of a first search
        def run():
            matching._phase_data.cache_clear()
            matching._zolz.cache_clear()
            matching._canonical_zone_cached.cache_clear()
            return fn()
        return run

    for label, kw in [("calibrated", {"camera_constant_px_A": 280.0}), ("uncalibrated", {})]:
        dt1, r1 = best_of(cold(lambda: match_zone_axes(xy, centre, [ph], max_index=10, image_shape=(1024, 1024), **kw)), 5)
        dtl, rl = best_of(cold(lambda: match_zone_axes(xy, centre, phases, max_index=10, image_shape=(1024, 1024), **kw)), 2)
        dtw, _ = best_of(lambda: match_zone_axes(xy, centre, phases, max_index=10, image_shape=(1024, 1024), **kw), 3)
        b1 = r1.candidates[0]
        bl = rl.candidates[0]
        print(f"match 20 spots, one cubic phase, {label:12s} {dt1 * 1e3:8.1f} ms  {dt1 / t_base:6.1f}x baseline  "
              f"(target 50 ms)  pairs examined {r1.n_pairs_examined:5d}  best {b1.phase} {list(b1.zone)}")
        print(f"match 20 spots, library of {len(phases)}, {label:12s} {dtl * 1e3:8.1f} ms  {dtl / t_base:6.1f}x baseline  "
              f"(target 1000 ms) pairs examined {rl.n_pairs_examined:5d}  best {bl.phase} {list(bl.zone)}")
        print(f"  the same again with warm caches (GUI, batch)   {dtw * 1e3:8.1f} ms  {dtw / t_base:6.1f}x baseline")


if __name__ == "__main__":
    main()
