"""A whole scan measured on Dask: maps against the drawn truth, virtual detectors, resume, a cluster."""

from __future__ import annotations

import csv
import json

import h5py
import numpy as np
import pytest

from saedkit.core.crystallography.library import find_phase
from saedkit.core.errors import InputError
from saedkit.core.series import SeriesOptions, calculate_rotation_period_deg
from saedkit.series import read_series_run, run_series

from .conftest import A_FE, A_NI, BAD_CONSTANT, BAD_NOISE, JUMP_AT, K_PX_A, SCAN, truth_of

BAD = {BAD_CONSTANT, BAD_NOISE}
N = SCAN[0] * SCAN[1]
# textbook rotational symmetry of zero-order zone patterns of cubic crystals (with Friedel's law):
# 4-fold along [001], 2-fold along [011]
PERIOD = {"Ni": 90.0, "Fe": 180.0}


def _options(**kw):
    return SeriesOptions(phases=("Ni", "Fe"), camera_constant_px_A=K_PX_A, max_index=4, bright_field_radius_px=6.0,
                         dark_field_radii_px=(12.0, 50.0), **kw)


@pytest.fixture(scope="module")
def run(scan_npy, tmp_path_factory):
    out = tmp_path_factory.mktemp("series_out")
    return run_series(scan_npy, options=_options(), out_dir=out, frames_per_chunk=6, scheduler="threads", workers=2)


def test_every_frame_is_recorded_and_bad_frames_do_not_stop_the_rest(run):
    assert run.complete and run.n_chunks == 5 and len(run.frames) == N
    assert [r.frame for r in run.frames] == list(range(N))
    for r in run.frames:
        if r.frame == BAD_CONSTANT:
            assert not r.ok and r.error.startswith(f"frame {r.frame} (scan {r.frame // 6}, {r.frame % 6}): ")
        elif r.frame == BAD_NOISE:  # pure noise: fails, or is measured with no phase
            assert (not r.ok and r.error.startswith(f"frame {r.frame} ")) or not r.phase
        else:
            assert r.ok, r.error


def test_phase_zone_and_rotation_maps_match_the_drawn_grains(run):
    m = run.maps
    assert m.scan_shape == SCAN and m.phases[:2] == ("Ni", "Fe")
    right = 0
    for i in range(N):
        at = np.unravel_index(i, SCAN)
        if i in BAD:
            assert m.phase_index[at] == -1 and (i != BAD_CONSTANT or not m.ok[at])
            continue
        t = truth_of(i)
        if m.phases[m.phase_index[at]] != t["phase"]:
            continue
        right += 1
        # zone family: <001> for the Ni grain, <011> for the Fe grain (index sets, any order and sign)
        assert sorted(np.abs(m.zone_uvw[at])) == ([0, 0, 1] if t["phase"] == "Ni" else [0, 1, 1])
        diff = (m.in_plane_rotation_deg[at] - t["rotation_deg"] + PERIOD[t["phase"]] / 2) % PERIOD[t["phase"]]
        assert abs(diff - PERIOD[t["phase"]] / 2) < 1.0, (i, m.in_plane_rotation_deg[at], t["rotation_deg"])
        assert 0.5 < m.score[at] <= 1.0 and m.n_spots[at] >= 6
    assert right / (N - len(BAD)) >= 0.98
    assert len(m.orientations) == 2  # one label per grain


def test_rotation_period_is_the_textbook_symmetry_of_the_zone():
    # cubic: 4-fold [001], 2-fold [011], 3-fold [111] made 6-fold by Friedel's law; hexagonal: 6-fold [001]
    ni, mg = find_phase("Ni"), find_phase("Mg")
    assert [calculate_rotation_period_deg(ni, z) for z in [(0, 0, 1), (0, 1, 1), (1, 1, 1)]] == [90.0, 180.0, 60.0]
    assert calculate_rotation_period_deg(mg, (0, 0, 1)) == 60.0
    assert calculate_rotation_period_deg(mg, (1, 0, 0)) == 180.0


def test_centre_is_tracked_through_drift_and_found_again_after_a_jump(run):
    by = {r.frame: r for r in run.frames}
    for i, r in by.items():
        if i in BAD or not r.ok:
            continue
        cx, cy = truth_of(i)["centre_xy"]
        assert np.hypot(r.centre_x_px - cx, r.centre_y_px - cy) < 0.3, i
    assert by[JUMP_AT].centre_method == "searched"  # 6 px jump inside a chunk: not accepted as tracked
    assert by[JUMP_AT + 1].centre_method == "tracked"
    assert all(by[k * 6].centre_method == "searched" for k in range(5))  # a chunk starts afresh
    assert sum(r.centre_method == "tracked" for r in run.frames) >= 18


def test_virtual_detectors_against_a_direct_numpy_sum(run, scan_array):
    frames = scan_array.reshape(N, *scan_array.shape[2:]).astype(np.float64)
    yy, xx = np.indices(frames.shape[1:])
    for r in run.frames:
        if not r.ok:  # no centre, no virtual detector
            assert np.isnan(r.bright_field) and np.isnan(r.dark_field)
            continue
        rad = np.hypot(xx - r.centre_x_px, yy - r.centre_y_px)  # x = column, y = row
        bf = frames[r.frame][rad <= 6.0].sum()
        df = frames[r.frame][(rad >= 12.0) & (rad <= 50.0)].sum()
        at = np.unravel_index(r.frame, SCAN)
        assert run.maps.bright_field[at] == pytest.approx(bf, rel=1e-12)
        assert run.maps.dark_field[at] == pytest.approx(df, rel=1e-12)


def test_tables_and_maps_file(run):
    with open(run.files["frames_csv"], newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == N and rows[0]["scan_y"] == "0" and rows[7]["scan_x"] == "1"
    for row in rows:
        i = int(row["frame"])
        if i == BAD_CONSTANT:
            assert row["ok"] == "False" and row["error"]
        elif i not in BAD:
            assert row["ok"] == "True"
            assert row["phase"] == truth_of(i)["phase"]
    # every spot's d against the published spacings: Ni a = 3.5239 Å, α-Fe a = 2.8665 Å (REFERENCES.md);
    # d_hkl = a/√N, N = h²+k²+l² of the zone's reflections (textbook): fcc [001]: hk0 with h, k even
    # (N = 4, 8, 16, 20, 32, 36); bcc [011]: (h, k, -k) with h even (N = 2, 4, 6, 8, 12, 16, 18, 22, 24)
    d_ni = A_NI / np.sqrt([4, 8, 16, 20, 32, 36])
    d_fe = A_FE / np.sqrt([2, 4, 6, 8, 12, 16, 18, 22, 24])
    with open(run.files["spots_csv"], newline="") as fh:
        spots = list(csv.DictReader(fh))
    assert len(spots) == sum(r.n_spots for r in run.frames)
    n_checked = 0
    by = {r.frame: r for r in run.frames}
    for s in spots:
        i = int(s["frame"])
        if s["d_A"] == "":  # the direct beam: at the centre, no spacing
            assert np.hypot(float(s["x_px"]) - by[i].centre_x_px, float(s["y_px"]) - by[i].centre_y_px) < 1.0
            continue
        d = float(s["d_A"])
        ref = d_ni if truth_of(i)["phase"] == "Ni" else d_fe
        assert np.min(np.abs(ref - d) / ref) < 0.01, (i, d)
        n_checked += 1
    assert n_checked > 200
    with h5py.File(run.files["maps_h5"], "r") as fh:
        np.testing.assert_array_equal(fh["maps/phase_index"][()], run.maps.phase_index)
        np.testing.assert_array_equal(fh["maps/bright_field"][()], run.maps.bright_field)
        assert json.loads(fh.attrs["phases"])[:2] == ["Ni", "Fe"]
    for key in ("png_phase_index", "png_in_plane_rotation_deg", "png_bright_field", "png_dark_field"):
        assert run.files[key].read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    series, frames, maps = read_series_run(run.out_dir)
    assert series.n_frames == N and frames == run.frames
    np.testing.assert_array_equal(maps.orientation_index, run.maps.orientation_index)


# --------------------------------------------------------------------------- #
# resume and cluster, on the first 8 frames (3 chunks of 3, 3 and 2)
# --------------------------------------------------------------------------- #


@pytest.fixture(scope="module")
def small(scan_array, tmp_path_factory):
    d = tmp_path_factory.mktemp("small")
    p = d / "first.npy"
    np.save(p, scan_array.reshape(N, *scan_array.shape[2:])[:8])
    whole = run_series(p, options=_options(), out_dir=d / "whole", frames_per_chunk=3, scheduler="synchronous",
                       write_figures=False)
    assert whole.complete
    return p, whole


def _same(a, b):
    assert a.frames == b.frames
    for name in ("phase_index", "orientation_index", "in_plane_rotation_deg", "score", "bright_field", "dark_field"):
        np.testing.assert_array_equal(getattr(a.maps, name), getattr(b.maps, name))


def test_a_stopped_run_resumes_where_it_stopped(small, tmp_path):
    path, whole = small
    out = tmp_path / "out"
    first = run_series(path, options=_options(), out_dir=out, frames_per_chunk=3, scheduler="synchronous",
                       write_figures=False, should_stop=lambda: True)  # "killed" after the first chunk
    assert not first.complete and first.n_chunks_done == 1 and first.maps is None
    assert not (out / "frames.csv").exists()
    assert sorted(p.name for p in (out / "chunks").iterdir()) == ["chunk_000000.json"]
    again = run_series(path, options=_options(), out_dir=out, frames_per_chunk=3, scheduler="synchronous",
                       write_figures=False)
    assert again.complete and again.n_chunks_computed == 2
    _same(again, whole)
    # a chunk file damaged by a crash is computed again; nothing else is
    (out / "chunks" / "chunk_000001.json").write_text('{"run": "trunc')
    third = run_series(path, options=_options(), out_dir=out, frames_per_chunk=3, scheduler="synchronous",
                       write_figures=False)
    assert third.n_chunks_computed == 1
    _same(third, whole)
    # other settings never mix with these chunks
    with pytest.raises(InputError, match="other settings"):
        run_series(path, options=_options(drift_tolerance_px=3.0), out_dir=out, frames_per_chunk=3)


def test_a_distributed_cluster_gives_the_same_results(small, tmp_path):
    from distributed import Client, LocalCluster

    path, whole = small
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=":0") as cluster, \
            Client(cluster) as client:
        got = run_series(path, options=_options(), out_dir=tmp_path / "c", frames_per_chunk=3, cluster=client,
                         write_figures=False)
    assert got.complete and got.n_chunks_computed == 3
    _same(got, whole)
