"""Every sub-command on the shipped sample patterns, checked against the simulation's truth files.

The sample patterns are simulated (sample_patterns/README.md); their truth is in *.truth.json.
"""

import json
from pathlib import Path

import numpy as np
import pytest

from saedkit.cli import main
from tests.record_schema import assert_record_schema
from saedkit.core.crystallography.library import find_phase
from saedkit.core.crystallography.structure_factors import canonical_indices

SAMPLES = Path(__file__).resolve().parents[2] / "sample_patterns"


def _truth(name):
    return json.loads((SAMPLES / f"{name}.truth.json").read_text())


def _run(capsys, argv):
    assert main(argv) == 0
    rec = json.loads(capsys.readouterr().out)
    assert_record_schema(argv, rec)
    return rec


def _family(phase, uvw):
    return tuple(int(v) for v in canonical_indices(find_phase(phase).calculate_equivalent_directions(uvw)))


@pytest.fixture(scope="module")
def calibration_name():
    return "KB-7 sample test"


def test_rings_on_the_gold_film(capsys):
    t = _truth("kb7_au_film")
    rec = _run(capsys, ["rings", str(SAMPLES / "kb7_au_film.tif"), "--json"])
    assert np.hypot(*(np.array(rec["centre_px"]) - t["centre_px"])) < 0.2
    assert rec["ellipse"]["ellipticity"] == pytest.approx(t["ellipse"]["ellipticity"], abs=0.002)
    assert rec["ellipse"]["major_axis_deg"] == pytest.approx(t["ellipse"]["major_axis_deg"], abs=3)
    truth_r = np.array([r["radius_px"] for r in t["rings"]])
    for ring in rec["rings"]:
        j = np.argmin(np.abs(truth_r - ring["radius_px"]))
        if ring.get("snr", 100) >= 8:
            assert ring["radius_px"] == pytest.approx(truth_r[j], rel=1e-3)


def test_calibrate_index_spots_with_the_saved_calibration(capsys, calibration_name):
    rec = _run(capsys, ["calibrate", str(SAMPLES / "kb7_au_film.tif"), "--standard", "Au", "--kv", "200",
                        "--save", calibration_name, "--json"])
    # the scenario (sample_patterns/README.md): 200 kV, true camera length 2.7 % over the nominal
    # 400 mm, 30 µm pixels; K = λL/p with λ(200 kV) = 0.0250793 Å (REFERENCES.md table)
    K = rec["camera_constant_px_A"]
    assert K == pytest.approx(0.0250793 * 400 * 1.027 / 0.030, rel=2e-3)
    assert rec["camera_length_mm"] == pytest.approx(400 * 1.027, rel=2e-3)
    # each ring's radius times the published Au spacing a/√(h²+k²+l²), a = 4.0782 Å (Maeland &
    # Flanagan, Can. J. Phys. 42, 2364, 1964), gives the same K (R·d = λL/p)
    for ring in rec["rings"][:4]:
        d_pub = 4.0782 / np.sqrt(sum(v * v for v in ring["hkl"]))
        assert ring["radius_px"] * d_pub == pytest.approx(K, rel=1.5e-3)
    assert [r["hkl"] for r in rec["rings"][:4]] == [[1, 1, 1], [2, 0, 0], [2, 2, 0], [3, 1, 1]]

    listed = _run(capsys, ["calibrations", "list", "--json"])
    assert calibration_name in json.dumps(listed)

    for grain, phase, zone in [("kb7_grain_a", "Ni", (0, 1, 1)), ("kb7_grain_b", "Fe", (1, 1, 1))]:
        g = _truth(grain)
        rec = _run(capsys, ["index", str(SAMPLES / f"{grain}.tif"), "--phase", "Ni", "--phase", "Fe",
                            "--phase", "Cu", "--phase", "Al", "--calibration", calibration_name, "--json"])
        best = rec["candidates"][0]
        assert best["phase"] == phase and _family(phase, best["zone"]) == _family(phase, zone)
        assert np.hypot(*(np.array(rec["centre_px"]) - g["centre_px"])) < 0.3

        rec = _run(capsys, ["spots", str(SAMPLES / f"{grain}.tif"), "--calibration", calibration_name, "--json"])
        found = np.array([[s["x"], s["y"]] for s in rec["spots"]])
        for s in g["spots"]:
            if s["snr"] >= 5:
                dist = np.hypot(*(found - [s["x"], s["y"]]).T)
                k = int(np.argmin(dist))
                assert dist[k] < 1.0
                # the published spacing of the spot's reflection: Ni a = 3.5239 Å (Taylor, J. Inst.
                # Metals 77, 585, 1950), α-Fe a = 2.8665 Å (NBS Circular 539, from memory)
                a_pub = {"Ni": 3.5239, "Fe": 2.8665}[phase]
                assert rec["spots"][k]["d_A"] == pytest.approx(a_pub / np.sqrt(sum(v * v for v in s["hkl"])), rel=0.01)


def test_phases_and_identify_on_the_film(capsys):
    rec = _run(capsys, ["identify", str(SAMPLES / "kb7_au_film.tif"), "--camera-constant",
                        str(_truth("kb7_au_film")["camera_constant_px_A"]), "--json"])
    assert rec["phase_identification"]["candidates"][0]["phases"] == ["Au"]


def test_demo_command_writes_three_reports(capsys, tmp_path):
    rec = _run(capsys, ["demo", "--out", str(tmp_path / "demo"), "--json"])
    assert rec["grains"]["grain_a"]["phase"] == "Ni"
    assert rec["grains"]["grain_b"]["phase"] == "Fe"
    for part in ("film", "grain_a", "grain_b"):
        files = rec["files"][part]
        assert all(Path(p).is_file() for p in files.values())
        assert set(files) == {"csv", "json", "png", "svg", "pdf"}
