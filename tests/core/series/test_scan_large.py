"""The issue's large case (slow, opt in with -m slow): a 32 x 32 scan of 256² frames, two phases."""

from __future__ import annotations

import numpy as np
import pytest

from saedkit.core.series import SeriesOptions
from saedkit.series import run_series

from .conftest import draw_frame, truth_of

SCAN_L = (32, 32)
FRAME_L = 256
K_L = 120.0
PERIOD = {"Ni": 90.0, "Fe": 180.0}  # textbook: 4-fold [001], 2-fold [011] of cubic zone patterns


@pytest.mark.slow
def test_large_scan_maps_and_a_two_worker_cluster(tmp_path):
    from distributed import Client, LocalCluster

    n = SCAN_L[0] * SCAN_L[1]
    rng = np.random.default_rng(21)
    scan = np.stack([draw_frame(i, rng, scan=SCAN_L, frame=FRAME_L, K=K_L, drift_px=0.004) for i in range(n)])
    np.save(tmp_path / "scan.npy", scan.reshape(*SCAN_L, FRAME_L, FRAME_L))
    del scan
    opts = SeriesOptions(phases=("Ni", "Fe"), camera_constant_px_A=K_L, max_index=4, bright_field_radius_px=10.0,
                         dark_field_radii_px=(20.0, 120.0))
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        got = run_series(tmp_path / "scan.npy", options=opts, out_dir=tmp_path / "cluster", frames_per_chunk=32,
                         cluster=client, write_figures=False)
    m = got.maps
    right = rot_ok = 0
    for i in range(n):
        t = truth_of(i, scan=SCAN_L, frame=FRAME_L, drift_px=0.004)
        at = np.unravel_index(i, SCAN_L)
        if m.phase_index[at] >= 0 and m.phases[m.phase_index[at]] == t["phase"]:
            right += 1
            p = PERIOD[t["phase"]]
            rot_ok += abs(((m.in_plane_rotation_deg[at] - t["rotation_deg"]) + p / 2) % p - p / 2) < 1.0
    assert right / n >= 0.98 and rot_ok / n >= 0.98
    local = run_series(tmp_path / "scan.npy", options=opts, out_dir=tmp_path / "local", frames_per_chunk=32,
                       scheduler="threads", workers=2, write_figures=False)
    assert local.frames == got.frames
