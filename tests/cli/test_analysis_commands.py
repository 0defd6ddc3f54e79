"""`index`, `identify`, `tiltpair`, `report`, `batch` and `demo` on simulated patterns, against the truth."""

import csv
import json
import subprocess
import sys

import numpy as np
import pytest

from saedkit.cli import main
from tests.record_schema import assert_record_schema
from saedkit.core.imageio import write_tiff
from saedkit.core.crystallography.library import find_phase
from saedkit.core.simulation.render import BeamStop
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern
from saedkit.core.crystallography.structure_factors import canonical_indices

K_TRUE = 300.0


def _family(name, uvw):
    return tuple(int(v) for v in canonical_indices(find_phase(name).calculate_equivalent_directions(uvw)))


@pytest.fixture(scope="module")
def patterns(tmp_path_factory):
    d = tmp_path_factory.mktemp("patterns")
    out = {}
    for key, name, zone, rot, seed in [("ni011", "Ni", (0, 1, 1), 25.0, 1), ("fe001", "Fe", (0, 0, 1), -40.0, 2),
                                       ("fe011", "Fe", (0, 1, 1), 10.0, 3)]:
        img, t = simulate_spot_pattern(find_phase(name), zone, shape=(640, 640), camera_constant_px_A=K_TRUE,
                                       rotation_deg=rot, thickness_A=80.0, beam_stop=BeamStop(angle_deg=100),
                                       rng=np.random.default_rng(seed))
        p = d / f"{key}.tif"
        write_tiff(p, img, voltage_kv=200.0, pixel_size_um=30.0)
        out[key] = (p, t)
    img, t = simulate_ring_pattern(find_phase("Au"), shape=(640, 640), camera_constant_px_A=K_TRUE,
                                   beam_stop=BeamStop(angle_deg=60), rng=np.random.default_rng(9))
    p = d / "au.tif"
    write_tiff(p, img, voltage_kv=200.0, pixel_size_um=30.0)
    out["au"] = (p, t)
    return out


def _json(capsys, argv, status=0):
    assert main(argv) == status
    rec = json.loads(capsys.readouterr().out)
    assert_record_schema(argv, rec)
    return rec


def test_index_calibrated_and_uncalibrated(patterns, capsys):
    p, t = patterns["ni011"]
    rec = _json(capsys, ["index", str(p), "--phase", "Ni", "--phase", "Fe", "--camera-constant", str(K_TRUE), "--json"])
    best = rec["candidates"][0]
    assert best["phase"] == "Ni" and _family("Ni", best["zone"]) == _family("Ni", (0, 1, 1))
    for key in ("score", "d_error_pct", "angle_error_deg", "in_plane_rotation_deg", "camera_constant_px_A", "spots",
                "predicted"):
        assert key in best
    assert np.hypot(*(np.array(rec["centre_px"]) - t.centre_xy)) < 0.3
    assert rec["image"]["sha256"] and rec["software"]["name"] == "saedkit"
    rec = _json(capsys, ["index", str(p), "--phase", "Ni", "--json"])
    best = rec["candidates"][0]
    assert _family("Ni", best["zone"]) == _family("Ni", (0, 1, 1))
    assert best["camera_constant_px_A"] == pytest.approx(K_TRUE, rel=0.01)  # uncalibrated: K within 1 %


def test_index_text_output_and_bad_input(patterns, capsys, tmp_path):
    p, _ = patterns["fe001"]
    assert main(["index", str(p), "--phase", "Fe"]) == 0
    assert "Fe" in capsys.readouterr().out
    bad = tmp_path / "broken.tif"
    bad.write_bytes(b"II*\x00garbage")
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "index", str(bad), "--phase", "Fe"],
                         capture_output=True, text=True)
    assert res.returncode == 1 and "broken.tif" in res.stderr and res.stderr.count("\n") == 1
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "index", str(p), "--phase", "Unobtainium"],
                         capture_output=True, text=True)
    assert res.returncode == 1 and "unknown phase" in res.stderr


def test_tiltpair(patterns, capsys):
    # Fe [001] and [011] are 45° apart (cubic direction angle, common practice)
    a, _ = patterns["fe001"]
    b, _ = patterns["fe011"]
    rec = _json(capsys, ["tiltpair", str(a), str(b), "--tilt-deg", "45", "--phase", "Fe", "--phase", "Ni",
                         "--camera-constant", str(K_TRUE), "--json"])
    assert rec["pairs"] and rec["pairs"][0]["phase"] == "Fe"
    assert rec["pairs"][0]["angle_deg"] == pytest.approx(45, abs=1)


def test_identify_rings(patterns, capsys):
    p, _ = patterns["au"]
    rec = _json(capsys, ["identify", str(p), "--camera-constant", str(K_TRUE), "--json"])
    assert rec["phase_identification"]["candidates"][0]["phases"] == ["Au"]


def test_report_writes_all_files(patterns, capsys, tmp_path):
    p, _ = patterns["ni011"]
    rec = _json(capsys, ["report", str(p), "--phase", "Ni", "--camera-constant", str(K_TRUE), "--out",
                         str(tmp_path / "r"), "--json"])
    files = rec["files"]
    for k in ("csv", "json", "png", "svg", "pdf"):
        assert (tmp_path / "r").joinpath(files[k].split("/")[-1]).is_file()
    with open(files["csv"]) as fh:
        rows = list(csv.reader(line for line in fh if not line.startswith("#")))
    assert len(rows) > 5
    rec = _json(capsys, ["report", str(patterns["au"][0]), "--standard", "Au", "--kv", "200", "--out",
                         str(tmp_path / "cal"), "--json"])
    k = rec["analysis"]["calibration"]["camera_constant_px_A"]
    assert k == pytest.approx(K_TRUE, rel=2e-3)


def test_batch_survives_a_bad_file(patterns, capsys, tmp_path):
    bad = tmp_path / "empty.tif"
    bad.write_bytes(b"")
    paths = [str(patterns["ni011"][0]), str(bad), str(patterns["fe001"][0])]
    rec = _json(capsys, ["batch", *paths, "--phase", "Ni", "--phase", "Fe", "--camera-constant", str(K_TRUE),
                         "--out", str(tmp_path / "b"), "--scheduler", "synchronous", "--json"], status=1)
    # exit status 1 since one pattern failed (the others are still analysed and recorded)
    assert rec["n_patterns"] == 3 and rec["n_ok"] == 2
    by = {r["path"]: r for r in rec["patterns"]}
    assert by[str(bad)]["ok"] is False and "empty" in by[str(bad)]["error"]
    assert by[paths[0]]["phase"] == "Ni" and by[paths[2]]["phase"] == "Fe"
    with open(tmp_path / "b" / "summary.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["ok"] for r in rows] == ["True", "False", "True"]


def test_calibrate_on_a_single_crystal_standard(capsys, tmp_path):
    # Si along [011] with 2 % ellipticity: the matcher indexes it, then K and the ellipse are fitted
    # over every indexed spot (Si a = 5.431144 Å, NIST SRM 640f)
    from saedkit.core.distortion import Ellipse

    img, t = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(768, 768), camera_constant_px_A=330.0,
                                   rotation_deg=12.0, ellipse=Ellipse(0.02, 40.0), thickness_A=80.0,
                                   double_diffraction=True, beam_stop=BeamStop(angle_deg=200),
                                   rng=np.random.default_rng(3))
    p = tmp_path / "si011.tif"
    write_tiff(p, img, voltage_kv=200.0, pixel_size_um=30.0)
    rec = _json(capsys, ["calibrate", str(p), "--standard", "Si", "--spots", "--zone", "0", "1", "1", "--json"])
    assert rec["camera_constant_px_A"] == pytest.approx(330.0, rel=2e-3)
    assert rec["ellipse"]["ellipticity"] == pytest.approx(0.02, abs=0.003)
    assert rec["method"] == "spots"
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "calibrate", str(p), "--standard", "Si", "--spots",
                          "--zone", "1", "1", "1"], capture_output=True, text=True)
    assert res.returncode == 1 and "no zone of Si" in res.stderr
