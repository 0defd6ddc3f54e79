"""Analyses of simulated patterns (known truth) for the export tests."""

from __future__ import annotations

import numpy as np

from saedkit.core.calibration.camera import EnteredCalibration
import pytest

from saedkit.core.workflow.analysis import Analysis
from saedkit.core.calibration.calibrate import calibrate_from_rings
from saedkit.core.calibration.library import SavedCalibration
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import Ellipse
from saedkit.core.indexing.identify import identify_phases
from saedkit.core.imageio import pattern_from_array
from saedkit.core.crystallography.library import find_phase
from saedkit.core.indexing.matching import match_zone_axes
from saedkit.core.detection.rings import find_rings
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern
from saedkit.core.detection.spots import find_spots, spots_xy_array


@pytest.fixture(scope="session")
def spot_analysis() -> Analysis:
    """Si along [011] (K = 300 px·Å, rotated 20°), spots found and indexed with a known K."""
    si = find_phase("Si")
    img, truth = simulate_spot_pattern(si, (0, 1, 1), shape=(512, 512), camera_constant_px_A=300,
                                       rotation_deg=20, rng=np.random.default_rng(1))
    pim = pattern_from_array(img, source_path="/data/grain_si_011.tif", voltage_kv=200, pixel_size_um=15)
    centre = CentreResult(*truth.centre_xy, 0.3, 0.3, "manual", 0)
    spots = find_spots(pim.data, centre_xy=centre.xy)
    match = match_zone_axes(spots_xy_array(spots), centre.xy, [si], camera_constant_px_A=300.0,
                            camera_constant_sigma_px_A=0.3, image_shape=pim.shape)
    params = {"phases": ["Si"], "camera_constant_px_A": 300.0, "camera_constant_sigma_px_A": 0.3,
              "d_tolerance_pct": 2.5, "angle_tolerance_deg": 2.0, "note": "costs $5 $6"}
    # a typed-in K is an EnteredCalibration from the edge on (no reproducibility term here)
    cal = EnteredCalibration(300.0, 0.3, reproducibility_pct=0.0)
    return Analysis(image=pim, centre=centre, spots=tuple(spots), match=match, calibration=cal, parameters=params)


@pytest.fixture(scope="session")
def uncalibrated_analysis() -> Analysis:
    """Cu along [001] without a camera constant: K is fitted by the match."""
    cu = find_phase("Cu")
    img, truth = simulate_spot_pattern(cu, (0, 0, 1), shape=(384, 448), camera_constant_px_A=250,
                                       rotation_deg=-12, rng=np.random.default_rng(7))
    pim = pattern_from_array(img, source_path="cu_001.tif")
    centre = CentreResult(*truth.centre_xy, 0.5, 0.5, "manual", 0)
    spots = find_spots(pim.data, centre_xy=centre.xy)
    match = match_zone_axes(spots_xy_array(spots), centre.xy, [cu], image_shape=pim.shape)
    return Analysis(image=pim, centre=centre, spots=tuple(spots), match=match)


@pytest.fixture(scope="session")
def ring_analysis() -> Analysis:
    """An Au film (K = 250 px·Å, 1 % ellipse at 30°, 15 µm pixels, 200 kV) calibrated as the pipeline does."""
    au = find_phase("Au")
    img, _ = simulate_ring_pattern(au, shape=(512, 512), camera_constant_px_A=250,
                                   ellipse=Ellipse(0.01, 30.0), rng=np.random.default_rng(2))
    pim = pattern_from_array(img, source_path="/data/au_film.tif", voltage_kv=200, pixel_size_um=15)
    cal = calibrate_from_rings(pim, au, voltage_kv=200.0)
    return Analysis(image=pim, centre=cal.centre, calibration=cal,
                    parameters={"standard": "Au", "voltage_kv": 200.0, "pixel_size_um": 15.0})


@pytest.fixture(scope="session")
def identified_analysis(ring_analysis) -> Analysis:
    """An Al film measured with the Au calibration from the library; phases ranked against its rings."""
    saved = SavedCalibration.from_calibration(ring_analysis.calibration, name="CL 150 mm", date="2026-11-30T09:00:00Z")
    al = find_phase("Al")
    img, _ = simulate_ring_pattern(al, shape=(448, 448), camera_constant_px_A=250, ellipse=Ellipse(0.01, 30.0),
                                   rng=np.random.default_rng(3))
    pim = pattern_from_array(img, source_path="film unknown.tif", voltage_kv=200)
    ring_fit = find_rings(pim.data)
    d = [saved.camera_constant_px_A / r.radius_px for r in ring_fit.rings]
    phase_id = identify_phases(d, [find_phase(n) for n in ("Au", "Al", "Cu", "Ni")])
    return Analysis(image=pim, centre=ring_fit.centre, ring_fit=ring_fit, calibration=saved, phase_id=phase_id,
                    parameters={"phases": ["Au", "Al", "Cu", "Ni"]})
