"""`saedkit series` end to end on a small HDF5 scan drawn from textbook zone geometry."""

from __future__ import annotations

import csv
import json

import h5py
import numpy as np
import pytest

from saedkit.cli import main
from tests.core.series.conftest import K_PX_A, draw_frame, truth_of


@pytest.fixture(scope="module")
def scan_h5(tmp_path_factory):
    rng = np.random.default_rng(11)
    frames = np.stack([draw_frame(i, rng) for i in range(6)])  # scan row 0: Ni, Ni, Ni, Ni, Fe, Fe
    p = tmp_path_factory.mktemp("cli_scan") / "scan.h5"
    with h5py.File(p, "w") as fh:
        fh.create_dataset("entry/data", data=frames.reshape(2, 3, *frames.shape[1:]))
        fh.create_dataset("entry/dark", data=np.zeros((2, 3, 4)))
    return p


ARGS = ["--phase", "Ni", "--phase", "Fe", "--camera-constant", str(K_PX_A), "--max-index", "4",
        "--bf-radius", "6", "--adf-radii", "12", "50", "--scheduler", "synchronous", "--chunk", "4"]


def test_series_command_writes_the_table_and_maps_and_resumes(scan_h5, tmp_path, capsys):
    out = tmp_path / "maps"
    assert main(["series", f"{scan_h5}:/entry/data", *ARGS, "--out", str(out), "--json"]) == 0
    cap = capsys.readouterr()
    rec = json.loads(cap.out)
    assert "series: 6/6 frames (100%)" in cap.err  # the progress line
    assert rec["complete"] and rec["series"]["scan_shape"] == [2, 3] and rec["n_frames_ok"] == 6
    assert rec["maps"]["phase_counts"] == {"Ni": 4, "Fe": 2}  # the drawn grains
    assert rec["options"]["camera_constant_px_A"] == K_PX_A
    with open(out / "frames.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["phase"] for r in rows] == [truth_of(i)["phase"] for i in range(6)]
    assert [(r["scan_y"], r["scan_x"]) for r in rows] == [("0", "0"), ("0", "1"), ("0", "2"),
                                                          ("1", "0"), ("1", "1"), ("1", "2")]
    for name in ("maps.h5", "spots.csv", "mask.npy", "maps/phase_index.png", "maps/dark_field.png"):
        assert (out / name).is_file(), name
    # run again: everything is kept, nothing computed
    assert main(["series", f"{scan_h5}:/entry/data", *ARGS, "--out", str(out), "--json"]) == 0
    again = json.loads(capsys.readouterr().out)
    assert again["n_chunks_computed"] == 0 and again["maps"] == rec["maps"]
    # other settings into the same folder: refused in one line, unless --restart
    assert main(["series", f"{scan_h5}:/entry/data", *ARGS, "--drift-tol", "3", "--out", str(out)]) == 1
    err = capsys.readouterr().err.strip()
    assert err.startswith("saedkit series: error:") and "other settings" in err and "\n" not in err
    assert main(["series", f"{scan_h5}:/entry/data", *ARGS, "--drift-tol", "3", "--out", str(out),
                 "--restart", "--no-figures"]) == 0
    assert "6/6 frames measured" in capsys.readouterr().out


def test_series_command_errors_are_one_line(scan_h5, tmp_path, capsys):
    cases = [([f"{scan_h5}:/entry/missing"], "has no dataset /entry/missing"),
             ([f"{scan_h5}:/entry/data", "--scan-shape", "4", "4"], "does not fit"),
             ([str(tmp_path / "nothing.npy")], "no such file"),
             ([f"{scan_h5}:/entry/data", "--phase", "Unobtainium"], "Unobtainium")]
    for extra, words in cases:
        code = main(["series", *extra, "--camera-constant", "45", "--out", str(tmp_path / "o"),
                     "--scheduler", "synchronous"])
        err = capsys.readouterr().err.strip()
        assert code == 1 and words in err and "\n" not in err, (extra, err)


def test_series_is_listed_with_examples(capsys):
    with pytest.raises(SystemExit):
        main(["series", "--help"])
    text = capsys.readouterr().out
    assert "examples:" in text and "--cluster" in text and ":/entry/data" in text


def test_series_command_on_a_running_scheduler(scan_h5, tmp_path, capsys):
    from distributed import LocalCluster

    local = tmp_path / "local"
    assert main(["series", f"{scan_h5}:/entry/data", *ARGS, "--out", str(local), "--no-figures", "--json"]) == 0
    expected = json.loads(capsys.readouterr().out)
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, dashboard_address=":0") as cluster:
        out = tmp_path / "remote"
        assert main(["series", f"{scan_h5}:/entry/data", *ARGS, "--out", str(out), "--no-figures", "--json",
                     "--cluster", cluster.scheduler_address]) == 0
    rec = json.loads(capsys.readouterr().out)
    assert rec["complete"] and rec["maps"] == expected["maps"]
    assert (out / "frames.csv").read_text() == (local / "frames.csv").read_text()
