"""Speed and memory of `saedkit series` on a simulated scan of 256² frames.

Figures (ratios against baselines measured in the same run):

- frames per second on a local dask.distributed cluster of 1 and of 2
  single-threaded worker processes, each as the time per frame over the
  one-frame baseline (one frame measured alone in this process, warm caches);
  the scaling from 1 to 2 workers (target ≥ 1.7 on 2 free cores);
- peak memory of a run on the local synchronous scheduler for a scan and for
  one 4 × larger, with the same chunk size: the ratio should stay near 1
  (memory is set by the chunk, not the scan).

The scan is invented: Ni along [011] with a rotation gradient and a drifting
centre, made by saedkit's simulator.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np
from _timing import best_of

from saedkit.core.crystallography.library import find_phase
from saedkit.core.series import SeriesOptions, analyse_frames
from saedkit.core.simulation.simulate import simulate_spot_pattern
from saedkit.series import run_series

FRAME = 256
K = 140.0


def make_scan(n: int, rng) -> np.ndarray:
    ni = find_phase("Ni")
    frames = np.empty((n, FRAME, FRAME), np.uint16)
    for i in range(n):
        c = (FRAME / 2 + 0.3 + 0.02 * i, FRAME / 2 - 0.4 + 0.01 * i)
        frames[i], _ = simulate_spot_pattern(ni, (0, 1, 1), shape=(FRAME, FRAME), camera_constant_px_A=K,
                                             rotation_deg=10 + 0.2 * i, centre_xy=c, rng=rng)
    return frames


def main() -> None:
    rng = np.random.default_rng(5)
    opts = SeriesOptions(phases=("Ni",), camera_constant_px_A=K, max_index=6)
    work = Path(tempfile.mkdtemp(prefix="bench_series_"))
    n = 48
    scan = make_scan(n, rng)
    np.save(work / "scan.npy", scan)
    mask = np.zeros((FRAME, FRAME), bool)

    analyse_frames(scan[:1], first_frame=0, scan_shape=(n,), options=opts, mask=mask)  # warm the caches
    t1, _ = best_of(lambda: analyse_frames(scan[:1], first_frame=0, scan_shape=(n,), options=opts, mask=mask), 3)
    print(f"baseline: one {FRAME}² frame measured alone     {t1:8.3f} s   1.00")

    from distributed import Client, LocalCluster

    fps = {}
    for workers in (1, 2):
        with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                          dashboard_address=None) as cluster, Client(cluster) as client:
            # warm each worker (imports, phase tables) on a throw-away run
            run_series(work / "scan.npy", options=opts, out_dir=work / f"warm{workers}", frames_per_chunk=4,
                       cluster=client, write_figures=False)
            t0 = time.perf_counter()
            res = run_series(work / "scan.npy", options=opts, out_dir=work / f"run{workers}", frames_per_chunk=4,
                             cluster=client, write_figures=False)
            dt = time.perf_counter() - t0
        assert res.complete and res.n_frames_ok == n
        fps[workers] = n / dt
        print(f"series of {n} frames, {workers} worker(s): {fps[workers]:6.2f} frames/s "
              f"{dt / n:8.3f} s/frame   {dt / n / t1:5.2f}x baseline")
    print(f"scaling 1 -> 2 workers                        {fps[2] / fps[1]:8.2f}x   (target >= 1.7 on free cores)")

    # peak memory: the same chunk size on a scan and on one 4x larger
    peaks = {}
    for reps in (1, 4):
        big = np.concatenate([scan[:12]] * reps)
        np.save(work / f"mem{reps}.npy", big)
        del big
        tracemalloc.start()
        run_series(work / f"mem{reps}.npy", options=SeriesOptions(camera_constant_px_A=K), out_dir=work / f"m{reps}",
                   frames_per_chunk=4, scheduler="synchronous", write_figures=False)
        peaks[reps] = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        print(f"peak memory, scan of {12 * reps:3d} frames, chunks of 4:  {peaks[reps] / 1e6:8.1f} MB")
    print(f"peak memory ratio, 4x larger scan             {peaks[4] / peaks[1]:8.2f}x   (target ~1)")
    if not os.environ.get("KEEP_BENCH"):
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
