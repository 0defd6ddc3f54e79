"""Measurement table (CSV) and analysis record (JSON)."""

from __future__ import annotations

import csv
import dataclasses
import json
import math
import os

import numpy as np
import pytest

from saedkit import __version__
from saedkit.core.calibration.camera import EnteredCalibration
from saedkit.core.workflow.analysis import Analysis
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError, SaedkitError
from saedkit.core.detection.spots import Spot
from saedkit.report import (
    calculate_measurement_table,
    read_measurements_csv,
    write_analysis_json,
    write_measurements_csv,
)
from saedkit.report._common import format_sig, format_value_sigma, json_ready
from saedkit.report.tables import printed_tolerance

# Si a = 5.431144 Å (NIST SRM 640f, Black et al., Powder Diffraction 35, 2020): d = a/√(h²+k²+l²)
SI_A = 5.431144
# Au a = 4.0782 Å (Maeland & Flanagan, Can. J. Phys. 42, 2364, 1964): first rings, REFERENCES.md
AU_D = {(1, 1, 1): 2.3545, (2, 0, 0): 2.0391, (2, 2, 0): 1.4419, (3, 1, 1): 1.2296, (2, 2, 2): 1.1773}


def _raw_rows(path):
    lines = [ln for ln in path.read_text(encoding="utf-8").splitlines() if not ln.startswith("#")]
    return list(csv.DictReader(lines))


def _spot(x, y, *, s=0.1, intensity=100.0):
    return Spot(x=x, y=y, sigma_x=s, sigma_y=s, intensity=intensity, intensity_sigma=5.0, background=10.0,
                peak=50.0, snr=20.0, width_px=1.5)


def _Entered(k: float, sigma: float, ellipse: Ellipse = Ellipse(0.0, 0.0)) -> EnteredCalibration:
    """A calibration typed in by hand (K, σK and an ellipse only; no reproducibility term)."""
    return EnteredCalibration(k, sigma, ellipse, reproducibility_pct=0.0)


# ----------------------------------------------------------------------------- CSV


def test_csv_round_trip_matches_the_analysis_within_printed_precision(spot_analysis, tmp_path):
    path = write_measurements_csv(spot_analysis, tmp_path / "m.csv")
    assert path == tmp_path / "m.csv"
    table = read_measurements_csv(path)
    expected = calculate_measurement_table(spot_analysis)
    assert table.columns == expected.columns
    assert len(table) == len(spot_analysis.spots) == len(expected)
    raw = _raw_rows(path)
    for got, want, text in zip(table.rows, expected.rows, raw):
        for col in table.columns:
            if col in ("feature", "phase"):
                assert got[col] == want[col]
            elif col in ("hkl", "hkil", "double_diffraction", "index"):
                assert got[col] == want[col], col
            elif math.isnan(want[col]):
                assert math.isnan(got[col]) and text[col] == ""
            else:
                tol = printed_tolerance(text[col])
                assert abs(got[col] - want[col]) <= tol * (1 + 1e-9), (col, got[col], want[col], text[col])
    # the table's spots are the analysis' spots
    for row, spot in zip(table.rows, spot_analysis.spots):
        assert row["x_px"] == pytest.approx(spot.x, abs=5e-4)
        assert row["y_px"] == pytest.approx(spot.y, abs=5e-4)
        assert row["snr"] == pytest.approx(spot.snr, abs=5e-3)


def test_csv_d_spacings_come_from_the_indexed_candidate(spot_analysis, tmp_path):
    table = read_measurements_csv(write_measurements_csv(spot_analysis, tmp_path / "m.csv"))
    cand = spot_analysis.candidate
    rng = np.random.default_rng(5)
    for row in table.rows:
        own = min(cand.spots, key=lambda s: math.hypot(s.x - row["x_px"], s.y - row["y_px"]))
        assert row["hkl"] == own.hkl
        assert row["d_A"] == pytest.approx(own.d_A, abs=5e-6)
        assert row["d_error_pct"] == pytest.approx(own.d_error_pct, abs=5e-4)
        # known answer: the Si spacing of the (hkl), within 0.3 % (simulated K is exact)
        d_true = SI_A / math.sqrt(sum(v * v for v in own.hkl))
        assert row["d_A"] == pytest.approx(d_true, rel=3e-3)
        assert row["g_per_nm"] == pytest.approx(10.0 / row["d_A"], rel=1e-4)
        # d = K / R with the camera constant the match used
        assert row["d_A"] == pytest.approx(300.0 / row["R_px"], rel=1e-4)
        assert row["phase"] == "Si"
        # σd against a Monte Carlo of d = K/R with K ~ N(300, 0.3) and R ~ N(R, σR); printed to
        # 2 significant figures
        draws = rng.normal(300.0, 0.3, 20000) / rng.normal(row["R_px"], row["R_sigma_px"], 20000)
        assert row["d_sigma_A"] == pytest.approx(np.std(draws), rel=0.06)


def test_csv_hexagonal_candidate_adds_miller_bravais_indices(spot_analysis, tmp_path):
    cand = dataclasses.replace(spot_analysis.candidate, zone_four_index=(0, 0, 0, 1))
    a = dataclasses.replace(spot_analysis, match=dataclasses.replace(spot_analysis.match, candidates=(cand,)))
    table = read_measurements_csv(write_measurements_csv(a, tmp_path / "h.csv"))
    assert table.columns.index("hkil") == table.columns.index("hkl") + 1
    for row in table.rows:
        h, k, l = row["hkl"]
        assert row["hkil"] == (h, k, -(h + k), l)
    assert table.metadata["zone_four_index"] == "0 0 0 1"


def test_csv_rows_from_the_match_when_no_spots_are_kept(spot_analysis, tmp_path):
    a = Analysis(image=spot_analysis.image, match=spot_analysis.match, parameters=spot_analysis.parameters)
    table = read_measurements_csv(write_measurements_csv(a, tmp_path / "m.csv"))
    assert len(table) == len(spot_analysis.candidate.spots)
    assert [r["hkl"] for r in table.rows] == [s.hkl for s in spot_analysis.candidate.spots]


def test_csv_header_names_calibration_image_zone_and_software(spot_analysis, tmp_path):
    table = read_measurements_csv(write_measurements_csv(spot_analysis, tmp_path / "m.csv"))
    meta = table.metadata
    assert meta["software"] == f"saedkit {__version__}"
    assert meta["image_sha256"] == spot_analysis.image.sha256
    assert meta["image"] == "/data/grain_si_011.tif"
    assert meta["camera_constant_px_A"].startswith("300")
    assert "0.3" in meta["camera_constant_px_A"]
    assert meta["phase"] == "Si"
    assert tuple(int(v) for v in meta["zone"].split()) == spot_analysis.candidate.zone
    text = (tmp_path / "m.csv").read_text(encoding="utf-8")
    assert text.startswith("# saedkit measurement table\n")


def test_csv_rings_of_a_calibration_carry_hkl_and_the_standard_spacings(ring_analysis, tmp_path):
    table = read_measurements_csv(write_measurements_csv(ring_analysis, tmp_path / "r.csv"))
    rings = [r for r in table.rows if r["feature"] == "ring"]
    cal = ring_analysis.calibration
    assert len(rings) == len(cal.rings) + len(cal.unassigned_radii_px)
    found = {r["hkl"]: r for r in rings if r["hkl"] is not None}
    assert set(AU_D) <= set(found)
    for hkl, d in AU_D.items():
        # K fitted on the same pattern: measured d within 0.05 % of the handbook value
        assert found[hkl]["d_A"] == pytest.approx(d, rel=5e-4)
        assert found[hkl]["phase"] == "Au"
        assert found[hkl]["d_sigma_A"] > 0
    meta = table.metadata
    assert meta["calibration_standard"] == "Au"
    assert meta["calibration_camera_constant_px_A"].startswith("250.0")
    assert "ellipticity 0.0100" in meta["calibration_ellipse"]
    assert meta["calibration"] == "fitted to a ring pattern"
    # the assigned rings' radii are the calibration's
    for r in rings:
        a = [x for x in cal.rings if tuple(x.hkl) == r["hkl"]][0]
        assert r["R_px"] == pytest.approx(a.radius_px, abs=5e-4)
        assert r["snr"] == pytest.approx(a.snr, abs=5e-3)
    # camera length from λL = K·p and L = λL/λ (200 kV: λ = 0.0250793 Å, REFERENCES.md)
    assert float(meta["calibration_camera_length_mm"]) == pytest.approx(250 * 15e-3 / 0.0250793, rel=1e-3)


def test_csv_rings_identified_with_a_library_calibration(identified_analysis, tmp_path):
    table = read_measurements_csv(write_measurements_csv(identified_analysis, tmp_path / "i.csv"))
    meta = table.metadata
    assert meta["calibration"] == "from the calibration library: CL 150 mm"
    assert meta["calibration_date"] == "2026-11-30T09:00:00Z"
    assert meta["calibration_standard"] == "Au"
    rings = [r for r in table.rows if r["feature"] == "ring"]
    assert len(rings) == len(identified_analysis.ring_fit.rings)
    named = [r for r in rings if r["hkl"] is not None]
    assert len(named) == len(rings) >= 3 and all(r["phase"] == "Al" for r in named)
    # Al a = 4.0495 Å (Witt 1967, REFERENCES.md); the film was simulated with the calibration's K
    for r in named:
        assert r["d_A"] == pytest.approx(4.0495 / math.sqrt(sum(v * v for v in r["hkl"])), rel=2e-3)


def test_csv_uncalibrated_match_uses_the_refined_camera_constant(uncalibrated_analysis, tmp_path):
    cand = uncalibrated_analysis.candidate
    assert cand is not None and cand.phase == "Cu"
    table = read_measurements_csv(write_measurements_csv(uncalibrated_analysis, tmp_path / "c.csv"))
    assert "refined" in table.metadata["camera_constant_source"]
    assert float(table.metadata["camera_constant_px_A"].split()[0]) == pytest.approx(cand.camera_constant_px_A,
                                                                                    abs=1e-2)
    # Cu a = 3.6150 Å (NBS Circular 539, REFERENCES.md): every indexed spot within 1 %
    for row in table.rows:
        if row["hkl"] is not None:
            assert row["d_A"] == pytest.approx(3.6150 / math.sqrt(sum(v * v for v in row["hkl"])), rel=1e-2)


def test_csv_from_a_calibration_alone_propagates_the_uncertainties(tmp_path, spot_analysis):
    # known answer: a spot placed at c + D·v with |v| = 100 px has R = 100 px after the correction
    ell = Ellipse(0.02, 30.0)
    c = CentreResult(200.0, 180.0, 0.2, 0.1, "manual")
    v = np.array([60.0, 80.0])
    p = np.array([c.x, c.y]) + ell.matrix @ v
    spots = (_spot(*p, s=0.3),)
    cal = _Entered(250.0, 0.5, ell)
    a = Analysis(image=spot_analysis.image, centre=c, spots=spots, calibration=cal)
    row = read_measurements_csv(write_measurements_csv(a, tmp_path / "k.csv")).rows[0]
    assert row["R_px"] == pytest.approx(100.0, abs=5e-4)
    assert row["d_A"] == pytest.approx(2.5, abs=5e-6)
    # σR and σd against a Monte Carlo: draw the spot (σ 0.3 px per axis), the centre (σ 0.2, 0.1 px)
    # and K (σ 0.5 px·Å); R = |D⁻¹(spot − centre)| undoes the ellipse, d = K/R
    rng = np.random.default_rng(9)
    n = 40000
    off = (p + rng.normal(0, 0.3, (n, 2))) - (np.array([c.x, c.y]) + rng.normal(0, [0.2, 0.1], (n, 2)))
    R = np.hypot(*(off @ ell.inverse_matrix.T).T)
    assert row["R_sigma_px"] == pytest.approx(np.std(R), rel=0.05)  # printed to 2 significant figures
    assert row["d_sigma_A"] == pytest.approx(np.std(rng.normal(250.0, 0.5, n) / R), rel=0.05)
    assert row["g_per_nm"] == pytest.approx(4.0, abs=5e-5)
    assert row["angle_deg"] == pytest.approx(math.degrees(math.atan2(p[1] - c.y, p[0] - c.x)), abs=5e-3)
    assert row["hkl"] is None and "d_error_pct" not in row


def test_csv_without_calibration_or_match_leaves_d_empty(spot_analysis, tmp_path):
    a = Analysis(image=spot_analysis.image, centre=spot_analysis.centre, spots=spot_analysis.spots[:3])
    path = write_measurements_csv(a, tmp_path / "n.csv")
    raw = _raw_rows(path)
    assert [r["d_A"] for r in raw] == ["", "", ""]
    table = read_measurements_csv(path)
    assert all(math.isnan(r["d_A"]) and math.isfinite(r["R_px"]) for r in table.rows)
    assert table.metadata["calibration"] == "none"
    # no centre either: R and the angle are empty too
    b = Analysis(image=spot_analysis.image, spots=spot_analysis.spots[:2])
    rows = read_measurements_csv(write_measurements_csv(b, tmp_path / "b.csv")).rows
    assert all(math.isnan(r["R_px"]) and math.isnan(r["angle_deg"]) for r in rows)


def test_csv_of_an_empty_analysis_has_the_header_only(tmp_path):
    table = read_measurements_csv(write_measurements_csv(Analysis(), tmp_path / "e.csv"))
    assert len(table) == 0 and "d_A" in table.columns


def test_read_measurements_csv_rejects_other_files(tmp_path):
    other = tmp_path / "other.csv"
    other.write_text("a,b\n1,2\n", encoding="utf-8")
    with pytest.raises(InputError, match="not a saedkit measurement table"):
        read_measurements_csv(other)
    with pytest.raises(InputError, match="cannot read"):
        read_measurements_csv(tmp_path / "missing.csv")
    bad = tmp_path / "bad.csv"
    bad.write_text("# x: y\nfeature,index,d_A\nspot,0\n", encoding="utf-8")
    with pytest.raises(SaedkitError, match="line 3"):
        read_measurements_csv(bad)


def test_number_formats():
    assert format_sig(0.009859) == "0.0099"
    assert format_sig(296.7) == "297"
    assert format_sig(float("nan")) == ""
    assert format_value_sigma(299.884, 0.0377) == "299.884 ± 0.038"
    assert format_value_sigma(None, 1.0) == "—"
    assert printed_tolerance("1.250") == pytest.approx(5e-4)
    assert printed_tolerance("1.5e+03") == pytest.approx(50.0)


# ----------------------------------------------------------------------------- JSON


def test_json_has_the_documented_keys(spot_analysis, tmp_path):
    path = write_analysis_json(spot_analysis, tmp_path / "a.json")
    rec = json.loads(path.read_text(encoding="utf-8"))
    assert rec["software"] == {"name": "saedkit", "version": __version__}
    assert rec["image"]["sha256"] == spot_analysis.image.sha256
    assert rec["image"]["shape"] == [512, 512]
    assert rec["centre_px"] == pytest.approx([spot_analysis.centre.x, spot_analysis.centre.y])
    assert len(rec["spots"]) == len(spot_analysis.spots)
    assert {"x", "y", "intensity"} <= set(rec["spots"][0])
    c0 = rec["candidates"][0]
    for key in ("phase", "zone", "score", "d_error_pct", "angle_error_deg", "in_plane_rotation_deg",
                "camera_constant_px_A", "spots"):
        assert key in c0, key
    assert c0["phase"] == "Si" and c0["zone"] == list(spot_analysis.candidate.zone)
    assert {"x", "y", "hkl"} <= set(c0["spots"][0])
    assert rec["parameters"]["phases"] == ["Si"]


def test_json_is_strict_nan_becomes_null(spot_analysis, tmp_path):
    a = dataclasses.replace(spot_analysis, parameters={"nan": float("nan"), "inf": np.inf,
                                                       "arr": np.array([1.5, np.nan]), "i": np.int64(3),
                                                       "b": np.bool_(True), "t": (1, 2), "p": tmp_path})
    path = write_analysis_json(a, tmp_path / "n.json")
    text = path.read_text(encoding="utf-8")
    assert "NaN" not in text and "Infinity" not in text
    params = json.loads(text)["parameters"]
    assert params == {"nan": None, "inf": None, "arr": [1.5, None], "i": 3, "b": True, "t": [1, 2],
                      "p": str(tmp_path)}


def test_json_ready_refuses_what_json_cannot_hold():
    with pytest.raises(InputError, match="complex"):
        json_ready({"z": 1 + 2j})
    with pytest.raises(InputError, match="object"):
        json_ready(object())


# ----------------------------------------------------------------------------- atomic writes


@pytest.mark.parametrize("writer", [write_measurements_csv, write_analysis_json])
def test_failed_write_leaves_no_partial_file_and_keeps_the_old_one(writer, spot_analysis, tmp_path, monkeypatch):
    import saedkit.core._atomic as atomic

    target = tmp_path / "out.dat"
    target.write_text("previous good file", encoding="utf-8")

    def boom(*_a, **_k):
        raise OSError("disk full")

    monkeypatch.setattr(atomic.os, "replace", boom)
    with pytest.raises(OSError, match="disk full"):
        writer(spot_analysis, target)
    assert target.read_text(encoding="utf-8") == "previous good file"
    assert sorted(os.listdir(tmp_path)) == ["out.dat"]  # no temporary file left behind
    monkeypatch.undo()
    new = tmp_path / "new.dat"
    monkeypatch.setattr(atomic.os, "fsync", boom)
    with pytest.raises(OSError):
        writer(spot_analysis, new)
    assert not new.exists()
    assert sorted(os.listdir(tmp_path)) == ["out.dat"]


def test_rings_of_a_calibration_fitted_on_another_image_are_not_this_patterns(spot_analysis, ring_analysis,
                                                                             tmp_path):
    from saedkit.report._common import is_calibration_of_image
    from saedkit.report.figures import render_pattern_figure

    a = dataclasses.replace(spot_analysis, calibration=ring_analysis.calibration, match=None)
    assert not is_calibration_of_image(a) and is_calibration_of_image(ring_analysis)
    table = read_measurements_csv(write_measurements_csv(a, tmp_path / "x.csv"))
    assert {r["feature"] for r in table.rows} == {"spot"}
    # d from the calibration: K / R
    for r in table.rows:
        assert r["d_A"] == pytest.approx(ring_analysis.calibration.camera_constant_px_A / r["R_px"], rel=1e-5)
    fig = render_pattern_figure(a, overlays=("rings",))
    assert not fig.axes[0].patches
