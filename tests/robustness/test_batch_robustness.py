"""`batch` with hostile file names, bad files and Ctrl-C (issue 14, found 2, 3 and 8)."""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from saedkit.batch import output_stems, run_batch, safe_stem
from saedkit.cli import main
from saedkit.core.crystallography.library import find_phase
from saedkit.core.imageio import write_tiff
from saedkit.core.simulation.simulate import simulate_spot_pattern
from tests.robustness._helpers import child_env

K_TRUE = 300.0


@pytest.fixture(scope="module")
def ni_image(tmp_path_factory):
    """A simulated Ni [001] pattern, 256 px, as TIFF bytes."""
    img, _ = simulate_spot_pattern(find_phase("Ni"), (0, 0, 1), shape=(256, 256), camera_constant_px_A=K_TRUE,
                                   rotation_deg=20.0, rng=np.random.default_rng(5))
    p = tmp_path_factory.mktemp("ni") / "ni.tif"
    write_tiff(p, img, voltage_kv=200.0)
    return p.read_bytes()


def _rows(path: Path) -> list[dict]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_safe_and_distinct_output_names():
    # found 2: a/same.tif and b/same.tif both wrote OUT/same.json
    stems = output_stems(["a/same.tif", "b/same.tif", "c/SAME.tif", "../../evil.tif", "...tif", "x\n y.tif",
                          "summary.tif", "CON.tif"])
    assert stems[:3] == ["same", "same-2", "SAME-3"]
    assert len(set(s.casefold() for s in stems)) == len(stems)
    for s in stems:
        assert "/" not in s and "\\" not in s and not s.startswith(".") and s.isprintable()
    assert stems[3] == "evil" and stems[4] == "pattern"
    assert stems[6] != "summary"  # never the summary's own name
    assert safe_stem("CON.tif") != "CON"  # a reserved device name on Windows


def test_same_names_in_two_folders_get_two_records(tmp_path, ni_image):
    for d in ("a", "b"):
        (tmp_path / d).mkdir()
        (tmp_path / d / "same.tif").write_bytes(ni_image)
    out = tmp_path / "out"
    items = run_batch([tmp_path / "a" / "same.tif", tmp_path / "b" / "same.tif"],
                      options={"phases": (find_phase("Ni"),), "camera_constant_px_A": K_TRUE},
                      out_dir=out, scheduler="synchronous")
    assert all(it.ok for it in items)
    assert len({it.record_path for it in items}) == 2
    for it in items:
        assert Path(it.record_path).parent == out
        assert json.loads(Path(it.record_path).read_text())["image"]["path"].endswith(
            str(Path(it.path).relative_to(tmp_path)))
    rows = _rows(out / "summary.csv")
    assert rows[0]["record_path"] != rows[1]["record_path"]


def test_bad_files_are_recorded_and_never_stop_the_rest(tmp_path, ni_image, capsys):
    # found 3: `...tif` with --bundle stopped the batch; a folder where <stem>.json goes gave a traceback;
    # a named pipe `*.tif` blocked forever; the exit status was 0 with failures
    good = tmp_path / "good.tif"
    good.write_bytes(ni_image)
    dots = tmp_path / "...tif"
    dots.write_bytes(ni_image)
    blocked = tmp_path / "blocked.tif"
    blocked.write_bytes(ni_image)
    out = tmp_path / "out"
    (out / "blocked.json").mkdir(parents=True)  # a folder where the record should go
    paths = [str(good), str(dots), str(blocked)]
    if hasattr(os, "mkfifo"):
        fifo = tmp_path / "pipe.tif"
        os.mkfifo(fifo)
        paths.append(str(fifo))
    argv = ["batch", *paths, "--phase", "Ni", "--camera-constant", str(K_TRUE), "--out", str(out),
            "--scheduler", "synchronous", "--json"]
    t0 = time.monotonic()
    assert main(argv) == 1
    assert time.monotonic() - t0 < 120
    rec = json.loads(capsys.readouterr().out)
    by = {r["path"]: r for r in rec["patterns"]}
    assert by[str(good)]["ok"] and by[str(dots)]["ok"]
    assert not by[str(blocked)]["ok"] and "cannot be written" in by[str(blocked)]["error"]
    if len(paths) == 4:
        assert not by[paths[3]]["ok"] and "not a regular file" in by[paths[3]]["error"]
    rows = _rows(out / "summary.csv")
    assert [r["path"] for r in rows] == paths
    assert all(r["error"] for r in rows if r["ok"] == "False")
    # --bundle with the same hostile names writes inside OUT only
    out2 = tmp_path / "out2"
    assert main(["batch", str(dots), str(good), "--phase", "Ni", "--camera-constant", str(K_TRUE), "--bundle",
                 "--out", str(out2), "--scheduler", "synchronous", "--json"]) == 0
    capsys.readouterr()
    for f in out2.rglob("*"):
        assert out2 in f.resolve().parents
        assert not f.name.startswith(".")


def test_summary_says_whether_a_row_was_calibrated(tmp_path, ni_image, capsys):
    # found 8: an uncalibrated wrong-phase match scored 0.97 with K 54 % off, and the summary did not say
    p = tmp_path / "ni.tif"
    p.write_bytes(ni_image)
    for extra, expected, source in [([], "False", "none"), (["--camera-constant", str(K_TRUE)], "True", "entered")]:
        out = tmp_path / f"out{len(extra)}"
        assert main(["batch", str(p), "--phase", "Ni", *extra, "--out", str(out), "--scheduler", "synchronous",
                     "--json"]) == 0
        capsys.readouterr()
        row = _rows(out / "summary.csv")[0]
        assert row["calibrated"] == expected and row["k_source"] == source


def test_spots_never_opens_a_named_pipe(tmp_path, capsys):
    if not hasattr(os, "mkfifo"):
        pytest.skip("no named pipes here")
    fifo = tmp_path / "pipe.tif"
    os.mkfifo(fifo)
    # in a child so that a regression hangs only the child (killed by the timeout), not the suite
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "spots", str(fifo)], capture_output=True, text=True,
                         timeout=60, env=child_env())
    assert res.returncode == 1 and "not a regular file" in res.stderr and res.stderr.count("\n") == 1


def test_ctrl_c_leaves_a_consistent_resumable_folder(tmp_path, ni_image):
    # found 3: after Ctrl-C there was never a summary.csv
    paths = []
    for i in range(8):
        p = tmp_path / f"p{i}.tif"
        p.write_bytes(ni_image)
        paths.append(str(p))
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "saedkit.cli", "batch", *paths, "--phase", "Ni", "--camera-constant", str(K_TRUE),
           "--out", str(out), "--scheduler", "synchronous", "--workers", "1", "--json"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=child_env())
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not (out / "p1.json").exists():
        time.sleep(0.05)
    proc.send_signal(signal.SIGINT)
    stdout, stderr = proc.communicate(timeout=120)
    assert proc.returncode == 130, stderr
    assert "Traceback" not in stderr
    rec = json.loads(stdout)
    assert rec["interrupted"] is True
    rows = _rows(out / "summary.csv")
    assert [r["path"] for r in rows] == paths
    done = [r for r in rows if r["ok"] == "True"]
    assert 2 <= len(done) < len(paths)
    for r in done:
        assert Path(r["record_path"]).is_file()
    assert all("interrupted" in r["error"] for r in rows if r["ok"] == "False")
    assert not [f for f in out.iterdir() if f.name.endswith(".tmp")]
    # resume: only the rest is analysed, the summary ends complete
    before = {r["path"]: os.stat(r["record_path"]).st_mtime_ns for r in done}
    res = subprocess.run(cmd + ["--resume"], capture_output=True, text=True, timeout=300, env=child_env())
    assert res.returncode == 0, res.stderr
    rows = _rows(out / "summary.csv")
    assert all(r["ok"] == "True" for r in rows) and len(rows) == len(paths)
    for path, mtime in before.items():
        rp = next(r["record_path"] for r in rows if r["path"] == path)
        assert os.stat(rp).st_mtime_ns == mtime  # not analysed again
