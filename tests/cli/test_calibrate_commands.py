"""`saedkit calibrate`, `calibrations`, `rings` and `spots` on simulated TIFFs."""

from __future__ import annotations

import math

import json
import re
import subprocess
import sys

import numpy as np
import pytest

from saedkit.cli import main
from tests.record_schema import assert_record_schema
from saedkit.core.distortion import Ellipse
from saedkit.core.imageio import write_tiff
from saedkit.core.crystallography.library import find_phase
from saedkit.core.simulation.render import BeamStop
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern

K_TRUE = 270.0
ELLIPSE = Ellipse(0.015, 40.0)


@pytest.fixture
def film(tmp_path):
    """A simulated Au film (invented data) at K = 270 px·Å with 1.5 % ellipticity, 15 µm pixels, 200 kV."""
    img, truth = simulate_ring_pattern(find_phase("Au"), shape=(600, 600), camera_constant_px_A=K_TRUE,
                                       ellipse=ELLIPSE, centre_xy=(303.4, 291.8), beam_stop=BeamStop(angle_deg=110),
                                       rng=np.random.default_rng(41))
    path = tmp_path / "au_film.tif"
    write_tiff(path, img, pixel_size_um=15.0, voltage_kv=200.0, camera_length_mm=180.0)
    return path, truth


@pytest.fixture
def grain(tmp_path):
    """A simulated Si [011] spot pattern with the same camera constant and ellipse."""
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(600, 600), camera_constant_px_A=K_TRUE,
                                       rotation_deg=23.0, ellipse=ELLIPSE, beam_stop=BeamStop(angle_deg=200),
                                       rng=np.random.default_rng(42))
    path = tmp_path / "si_grain.tif"
    write_tiff(path, img)
    return path, truth


def _json(capsys, argv):
    assert main(argv) == 0
    rec = json.loads(capsys.readouterr().out)
    assert_record_schema(argv, rec)
    return rec


def test_calibrate_json_record(film, capsys):
    path, truth = film
    rec = _json(capsys, ["calibrate", str(path), "--standard", "Au", "--json"])  # kV and pixel size from the file
    assert list(rec)[:2] == ["software", "image"]
    assert rec["software"]["name"] == "saedkit"
    assert rec["image"]["sha256"] and rec["image"]["shape"] == [600, 600]
    assert abs(rec["camera_constant_px_A"] / K_TRUE - 1) < 2e-3
    assert 0 < rec["camera_constant_rel_sigma"] < 1e-3
    assert rec["ellipse"]["ellipticity"] == pytest.approx(0.015, abs=0.002)
    assert np.allclose(rec["centre_px"], truth.centre_xy, atol=0.1)
    assert len(rec["centre_sigma_px"]) == 2
    assert [r["hkl"] for r in rec["rings"]] == [list(h) for h in truth.hkl]
    for r in rec["rings"]:
        assert {"d_A", "radius_px", "radius_sigma_px", "residual_px", "residual_pct"} <= set(r)
    assert rec["camera_length_mm"] == pytest.approx(rec["lambda_L_mm_A"] / 0.0250793, rel=1e-4)
    assert rec["quality"] == "good" and rec["warnings"] == []


def test_calibrate_text(film, capsys):
    path, _ = film
    assert main(["calibrate", str(path), "--standard", "gold", "--kv", "200", "--pixel-size-um", "15"]) == 0
    out = capsys.readouterr().out
    assert "(111)" in out and "camera length" in out and "quality good" in out
    # the command line fits the exact camera equation by default; the simulated film follows the
    # small-angle form R = K/d, so K comes out low by the mean of tan(2 asin(λ/2d))/(λ/d) − 1 over
    # the Au rings, about 1e-4 at 200 kV (closed form, 0.0250793 Å from REFERENCES.md)
    k_exact = float(re.search(r"K = ([0-9.]+)", out).group(1))
    assert k_exact / K_TRUE - 1 == pytest.approx(-1.1e-4, abs=6e-5)
    main(["calibrate", str(path), "--standard", "gold", "--kv", "200", "--small-angle"])
    k_small = float(re.search(r"K = ([0-9.]+)", capsys.readouterr().out).group(1))
    assert abs(k_small / K_TRUE - 1) < 5e-5


def test_save_then_list_show_rename_history_delete(film, capsys):
    path, _ = film
    rec = _json(capsys, ["calibrate", str(path), "--standard", "Au", "--kv", "200", "--save", "200 kV CL 180",
                         "--instrument", "TEM-1", "--binning", "2", "--json"])
    assert rec["saved"]["name"] == "200 kV CL 180" and rec["saved"]["broken_library_moved_to"] is None
    listed = _json(capsys, ["calibrations", "list", "--json"])
    assert [c["name"] for c in listed["calibrations"]] == ["200 kV CL 180"]
    c = listed["calibrations"][0]
    assert c["camera_constant_px_A"] == pytest.approx(rec["camera_constant_px_A"])
    assert c["nominal_camera_length_mm"] == 180.0 and c["binning"] == 2 and c["instrument"] == "TEM-1"
    shown = _json(capsys, ["calibrations", "show", "200 kV CL 180", "--json"])
    assert shown["calibration"]["standard"] == "Au"
    hist = _json(capsys, ["calibrations", "history", "--kv", "200", "--nominal-camera-length-mm", "180", "--json"])
    assert [h["name"] for h in hist["history"]] == ["200 kV CL 180"]
    assert main(["calibrations", "rename", "200 kV CL 180", "renamed"]) == 0
    assert "renamed" in capsys.readouterr().out
    assert main(["calibrations", "delete", "renamed"]) == 0
    capsys.readouterr()
    assert _json(capsys, ["calibrations", "--json"])["calibrations"] == []


def test_spots_with_saved_calibration_reports_d(film, grain, capsys):
    fpath, _ = film
    gpath, truth = grain
    assert main(["calibrate", str(fpath), "--standard", "Au", "--save", "cal"]) == 0
    capsys.readouterr()
    rec = _json(capsys, ["spots", str(gpath), "--calibration", "cal", "--json"])
    assert rec["calibration"]["name"] == "cal"
    assert np.allclose(rec["centre_px"], truth.centre_xy, atol=0.3)
    spots = rec["spots"]
    assert len(spots) >= 8
    matched = 0
    for s in spots:
        dist = np.hypot(truth.xy[:, 0] - s["x"], truth.xy[:, 1] - s["y"])
        i = int(np.argmin(dist))
        if dist[i] < 1.0 and np.isfinite(truth.d_A[i]):
            matched += 1
            assert abs(s["d_A"] / truth.d_A[i] - 1) < 0.01  # acceptance: within 1 % of the truth
            # total σ = statistical (small here) and the default 1 % reproducibility of K, in quadrature
            assert 0 < s["d_stat_sigma_A"] < 0.01 * s["d_A"]
            assert s["d_sys_sigma_A"] == pytest.approx(0.01 * s["d_A"], rel=1e-3)  # exact form: ∂ln d/∂ln K = 1 − O((λ/d)²)
            assert s["d_sigma_A"] == pytest.approx(math.hypot(s["d_stat_sigma_A"], s["d_sys_sigma_A"]), rel=1e-9)
            assert {"x", "y", "intensity", "snr", "radius_px"} <= set(s)
    assert matched >= 8


def test_spots_uncalibrated_and_rings_with_camera_constant(film, grain, capsys):
    gpath, _ = grain
    rec = _json(capsys, ["spots", str(gpath), "--json"])
    assert rec["calibration"] is None and "d_A" not in rec["spots"][0]
    fpath, truth = film
    rec = _json(capsys, ["rings", str(fpath), "--camera-constant", str(K_TRUE), "--camera-constant-sigma", "0.27",
                         "--json"])
    assert rec["ellipse"]["ellipticity"] == pytest.approx(0.015, abs=0.002)
    assert rec["camera_constant_rel_sigma"] == pytest.approx(1e-3)
    d = [r["d_A"] for r in rec["rings"] if r["snr"] > 20]
    assert len(d) >= len(truth.d_A)
    for dt in truth.d_A:
        assert min(abs(x / dt - 1) for x in d) < 1e-3
    r0 = rec["rings"][0]
    assert r0["semi_major_px"] > r0["radius_px"] > r0["semi_minor_px"]
    assert r0["d_sigma_A"] > 0
    assert main(["rings", str(fpath)]) == 0
    assert "no calibration" in capsys.readouterr().out


def test_bad_image_one_line_error_and_exit_status(tmp_path):
    bad = tmp_path / "broken.tif"
    bad.write_bytes(b"II*\x00 not really a tiff")
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "calibrate", str(bad), "--standard", "Au", "--kv",
                          "200"], capture_output=True, text=True)
    assert res.returncode == 1
    assert res.stderr.count("\n") == 1 and "saedkit calibrate: error:" in res.stderr and "broken.tif" in res.stderr
    assert "Traceback" not in res.stderr


def test_errors_in_process(film, tmp_path, capsys):
    path, _ = film
    assert main(["spots", str(path), "--calibration", "no such calibration"]) == 1
    err = capsys.readouterr().err
    assert "no saved calibration named 'no such calibration'" in err and err.count("\n") == 1
    assert main(["calibrations", "show"]) == 1
    assert "takes 1 name" in capsys.readouterr().err
    assert main(["calibrations", "history"]) == 1
    capsys.readouterr()
    # a broken library: reported, not replaced
    from saedkit.core.calibration.library import CalibrationLibrary

    lib = CalibrationLibrary()
    lib.path.parent.mkdir(parents=True, exist_ok=True)
    lib.path.write_text("{oops")
    assert main(["calibrations", "list"]) == 1
    assert "not valid JSON" in capsys.readouterr().err
    assert lib.path.read_text() == "{oops"
    with pytest.raises(SystemExit) as info:  # mutually exclusive options: an argparse error
        main(["rings", str(path), "--camera-constant", "100", "--calibration", "x"])
    assert info.value.code == 2
    capsys.readouterr()
    noinfo = tmp_path / "plain.tif"
    write_tiff(noinfo, np.random.default_rng(0).integers(0, 100, (64, 64)).astype(np.uint16))
    assert main(["calibrate", str(noinfo), "--standard", "Au"]) == 1
    assert "--kv" in capsys.readouterr().err


def test_rings_lists_a_short_arc_as_rejected(tmp_path, capsys):
    # a 20° arc at R = 335 px (between Au 422 and 511/333) (a streak or one grain, not a ring): not among the rings, and if the
    # radial profile shows it, listed under rejected_rings with the reason
    img, truth = simulate_ring_pattern(find_phase("Au"), shape=(600, 600), camera_constant_px_A=K_TRUE,
                                       centre_xy=(303.4, 291.8), beam_stop=BeamStop(angle_deg=110),
                                       rng=np.random.default_rng(43))
    img = img.astype(np.float64)
    yy, xx = np.indices(img.shape)
    r = np.hypot(xx - 303.4, yy - 291.8)
    phi = np.degrees(np.arctan2(yy - 291.8, xx - 303.4))
    img[(np.abs(r - 335.0) < 2.0) & (np.abs(phi - 45.0) < 10.0)] += 400.0
    path = tmp_path / "arc.tif"
    write_tiff(path, img.astype(np.float32))
    rec = _json(capsys, ["rings", str(path), "--json"])
    assert all(abs(x["radius_px"] - 335.0) > 3.0 for x in rec["rings"])
    near = [x for x in rec["rejected_rings"] if abs(x["radius_px"] - 335.0) < 3.0]
    assert len(near) == 1 and "too little arc" in near[0]["reason"]


def test_calibrate_with_expected_camera_constant(film, capsys):
    path, truth = film
    rec = _json(capsys, ["calibrate", str(path), "--standard", "Au", "--kv", "200", "--expect-k", "260", "--json"])
    assert rec["camera_constant_px_A"] == pytest.approx(K_TRUE, rel=1e-3)
    # a wrong expectation (K = 100 px·Å) forces a wrong assignment, which the checks call poor
    rec = _json(capsys, ["calibrate", str(path), "--standard", "Au", "--kv", "200", "--expect-k", "100", "--json"])
    assert 90.0 <= rec["camera_constant_px_A"] <= 110.0 and rec["quality"] == "poor"
