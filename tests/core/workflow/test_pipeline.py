"""The pipeline steps, the analysis record, and one number per spot in every output."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from saedkit.core.calibration.camera import INTERNAL_STANDARD_REPRODUCIBILITY_PCT, EnteredCalibration
from saedkit.core.calibration.library import SavedCalibration
from saedkit.core.crystallography.library import find_phase
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError
from saedkit.core.imageio import pattern_from_array
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern
from saedkit.core.workflow import pipeline
from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS, PipelineOptions

SI_A = 5.4309  # Si lattice parameter, Å (REFERENCES.md)
K_TRUE = 300.0


@pytest.fixture(scope="module")
def si_image():
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(384, 384), camera_constant_px_A=K_TRUE,
                                       rotation_deg=20, rng=np.random.default_rng(5))
    return pattern_from_array(img, source_path="si_011.tif", voltage_kv=200, pixel_size_um=15), truth


def _saved(k: float, sigma: float, ellipse: Ellipse) -> SavedCalibration:
    return SavedCalibration(name="KB-7 test", instrument="KB-7", voltage_kv=200.0, nominal_camera_length_mm=400.0,
                            binning=1, pixel_size_um=15.0, camera_constant_px_A=k, camera_constant_sigma_px_A=sigma,
                            ellipticity=ellipse.ellipticity, major_axis_deg=ellipse.major_axis_deg, standard="Au",
                            date="2026-03-01T10:00:00Z", image_sha256="", software_version="0.1",
                            reproducibility_pct=0.6)


def test_options_hold_each_default_once():
    import argparse

    from saedkit._commands._index_options import add_match_options

    p = argparse.ArgumentParser()
    add_match_options(p)
    args = p.parse_args(["--phase", "Si"])
    # the command line's defaults are the pipeline's
    assert args.top == DEFAULT_OPTIONS.top and args.d_tol == DEFAULT_OPTIONS.d_tolerance_pct
    assert args.angle_tol == DEFAULT_OPTIONS.angle_tolerance_deg and args.max_index == DEFAULT_OPTIONS.max_index
    assert args.min_snr == DEFAULT_OPTIONS.min_snr
    from saedkit.core.workflow.session import SessionSettings

    st = SessionSettings()  # the desktop program's defaults are the same ones
    assert (st.top, st.max_index, st.min_snr, st.d_tolerance_pct, st.angle_tolerance_deg) == (
        DEFAULT_OPTIONS.top, DEFAULT_OPTIONS.max_index, DEFAULT_OPTIONS.min_snr, DEFAULT_OPTIONS.d_tolerance_pct,
        DEFAULT_OPTIONS.angle_tolerance_deg)
    opts = DEFAULT_OPTIONS.replace(top=3, min_snr=None)
    assert opts.top == 3 and opts.min_snr == DEFAULT_OPTIONS.min_snr
    with pytest.raises(dataclasses.FrozenInstanceError):
        opts.top = 4  # type: ignore[misc]
    assert PipelineOptions().voltage_for(pattern_from_array(np.random.default_rng(0).random((8, 8)))) == 200.0


def test_steps_one_by_one(si_image):
    image, truth = si_image
    mask = pipeline.prepare_mask(image)
    assert mask.shape == image.shape and mask.dtype == bool
    centre = pipeline.locate_centre(image, mask)
    assert np.allclose(centre.xy, truth.centre_xy, atol=0.3)
    spots = pipeline.detect_spots(image, mask, centre)
    assert len(spots) >= 8
    cam = EnteredCalibration(K_TRUE, 0.3)
    match, centre2 = pipeline.search_zone_axes(spots, centre, [find_phase("Si")], calibration=cam,
                                               image_shape=image.shape, mask=mask)
    best = match.best
    assert best is not None and sorted(abs(v) for v in best.zone) == [0, 1, 1]
    for s in best.spots:
        if s.hkl is not None and not s.forbidden:
            # d of an indexed spot against the cubic spacing a/√(h²+k²+l²) (textbook formula), within 0.5 %
            assert s.d_A == pytest.approx(SI_A / math.sqrt(sum(h * h for h in s.hkl)), rel=5e-3)
            assert s.d_sigma_A == pytest.approx(math.hypot(s.d_stat_sigma_A, s.d_sys_sigma_A), rel=1e-12)
    assert centre2.method == "spot-lattice"


def test_ring_steps_and_phase_identification():
    au = find_phase("Au")
    img, _ = simulate_ring_pattern(au, shape=(320, 320), camera_constant_px_A=180.0, rng=np.random.default_rng(2))
    image = pattern_from_array(img, voltage_kv=200)
    fit = pipeline.detect_rings(image, pipeline.prepare_mask(image))
    assert len(fit.rings) >= 3
    pid = pipeline.identify_ring_phases(fit, [au, find_phase("Al")], EnteredCalibration(180.0, 0.2))
    assert pid.candidates[0].phases == ("Au",) or list(pid.candidates[0].phases) == ["Au"]
    # Au 111 at a/√3 with a = 4.0782 Å (REFERENCES.md)
    assert min(abs(d - 4.0782 / math.sqrt(3)) for d in pid.d_A) < 0.01
    assert pipeline.identify_ring_phases(fit, [au], None) is None


def test_a_typed_camera_constant_becomes_a_camera_model_at_the_edge():
    cam = pipeline.as_camera(camera_constant_px_A=300.0, camera_constant_sigma_px_A=2.0, reproducibility_pct=0.5)
    assert isinstance(cam, EnteredCalibration) and cam.reproducibility_pct == 0.5
    saved = _saved(300.0, 0.1, Ellipse(0.0, 0.0))
    assert pipeline.as_camera(saved, reproducibility_pct=2.0).reproducibility_pct == 2.0
    with pytest.raises(InputError, match="not both"):
        pipeline.as_camera(saved, camera_constant_px_A=300.0)
    with pytest.raises(InputError, match="calibration must be"):
        pipeline.as_camera((300.0, 1.0))
    assert pipeline.as_camera() is None


def _calibrations(image):
    fitted = pipeline.calibrate_spot_standard(image, find_phase("Si"), zone=(0, 1, 1))
    return {
        "typed": EnteredCalibration(K_TRUE, 0.5),
        "saved": _saved(K_TRUE * 1.001, 0.2, Ellipse(0.004, 25.0)),
        "fitted": fitted,
        "exact": EnteredCalibration(K_TRUE, 0.5, voltage_kv=200.0, exact_camera_equation=True),
    }


def test_every_output_gives_the_same_d_for_the_same_spot(si_image, tmp_path):
    """Record spots[], candidates[].spots[], the table behind CSV and PDF, the desktop table: one number."""
    from pypdf import PdfReader

    from saedkit.core.workflow.session import Session
    from saedkit.report import write_measurements_csv
    from saedkit.report._common import format_value_sigma
    from saedkit.report.pdf import write_pdf_report
    from saedkit.report.tables import calculate_measurement_table, read_measurements_csv

    image, _ = si_image
    for kind, cal in _calibrations(image).items():
        a = pipeline.analyse_spot_pattern(image, phases=[find_phase("Si")], calibration=cal)
        rec = a.to_dict()
        assert rec["camera"]["source"] == {"typed": "entered", "saved": "library", "fitted": "spots",
                                           "exact": "entered"}[kind]
        spots = rec["spots"]
        cand = rec["candidates"][0]
        assert cand["spots_camera"]["camera_constant_px_A"] == rec["camera"]["camera_constant_px_A"]
        table = calculate_measurement_table(a)
        csv_rows = read_measurements_csv(write_measurements_csv(a, tmp_path / f"{kind}.csv")).rows
        session = Session(image)
        session.set_centre(a.centre)
        session.set_calibration(cal)
        session.set_spots(a.spots)
        gui = session.measurements()
        for i, s in enumerate(spots):
            c = cand["spots"][i]
            row = table.rows[i]
            assert (c["x"], c["y"]) == (s["x"], s["y"])
            for key in ("d_A", "d_sigma_A", "d_stat_sigma_A", "d_sys_sigma_A"):
                assert c[key] == pytest.approx(s[key], abs=1e-9), (kind, key)
                assert row[key] == pytest.approx(s[key], abs=1e-9), (kind, key)
                assert getattr(gui[i], key) == pytest.approx(s[key], abs=1e-9), (kind, key)
            # the CSV prints d to 5 decimals and σ to 2 significant figures
            assert csv_rows[i]["d_A"] == pytest.approx(s["d_A"], abs=5.1e-6)
            assert csv_rows[i]["d_sigma_A"] == pytest.approx(s["d_sigma_A"], rel=0.051)
        if kind == "exact":
            pdf = write_pdf_report(a, tmp_path / "exact.pdf")
            text = "\n".join(page.extract_text() for page in PdfReader(str(pdf)).pages)
            for s in spots[:5]:
                assert format_value_sigma(s["d_A"], s["d_sigma_A"], max_decimals=5) in text


def test_candidates_report_the_refined_camera_constant_beside_the_calibration(si_image):
    image, _ = si_image
    a = pipeline.analyse_spot_pattern(image, phases=[find_phase("Si")], camera_constant_px_A=K_TRUE,
                                      camera_constant_sigma_px_A=5.0)
    rec = a.to_dict()
    assert rec["calibration"]["source"] == "entered" and rec["calibration"]["camera_constant_sigma_px_A"] == 5.0
    cand = rec["candidates"][0]
    # the refined K is the candidate's own, close to the truth; the spot spacings use the typed K
    assert cand["camera_constant_px_A"] == pytest.approx(K_TRUE, rel=5e-3)
    assert cand["spots_camera"]["camera_constant_px_A"] == K_TRUE
    assert cand["spots_camera"]["camera_constant_stat_sigma_px_A"] == 5.0
    # uncalibrated: the spacings use the refined K, labelled as such, with no reproducibility term
    u = pipeline.analyse_spot_pattern(image, phases=[find_phase("Si")]).to_dict()
    assert u["camera"]["source"] == "match"
    assert u["camera"]["camera_constant_px_A"] == u["candidates"][0]["camera_constant_px_A"]
    assert u["spots"][0]["d_sys_sigma_A"] == 0.0


def test_internal_standard_calibrates_the_pattern_from_its_own_rings():
    # a Ni grain along [001] on a grid carrying an evaporated Au film: spots and rings share centre and K
    k, centre = 260.0, (200.0, 196.0)
    spots_img, truth = simulate_spot_pattern(find_phase("Ni"), (0, 0, 1), shape=(400, 400), camera_constant_px_A=k,
                                             centre_xy=centre, rotation_deg=10, rng=np.random.default_rng(8))
    rings_img, _ = simulate_ring_pattern(find_phase("Au"), shape=(400, 400), camera_constant_px_A=k,
                                         centre_xy=centre, rng=np.random.default_rng(9))
    # a thin film: its rings a tenth as bright as the crystal's spots
    image = pattern_from_array(spots_img.astype(float) + 0.1 * rings_img.astype(float), voltage_kv=200)
    a = pipeline.analyse_spot_pattern(image, phases=[find_phase("Ni")], internal_standard=find_phase("Au"))
    cal = a.calibration
    assert cal.internal_standard and cal.reproducibility_pct == INTERNAL_STANDARD_REPRODUCIBILITY_PCT
    assert cal.camera_constant_px_A == pytest.approx(k, rel=2e-3)
    best = a.candidate
    assert best is not None and best.phase == "Ni" and sorted(abs(v) for v in best.zone) == [0, 0, 1]
    rec = a.to_dict()
    assert rec["parameters"]["internal_standard"] == "Au"
    ni_a = 3.5239  # Ni lattice parameter, Å (REFERENCES.md: Taylor 1950)
    for s in best.spots:
        if s.hkl is not None:
            assert s.d_A == pytest.approx(ni_a / math.sqrt(sum(h * h for h in s.hkl)), rel=5e-3)
            assert s.d_sys_sigma_A == pytest.approx(1e-3 * s.d_A, rel=1e-9)  # 0.1 %: the internal standard's term
    with pytest.raises(InputError, match="internal standard"):
        pipeline.analyse_spot_pattern(image, phases=[find_phase("Ni")], internal_standard=find_phase("Au"),
                                      camera_constant_px_A=k)
