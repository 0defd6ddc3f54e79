"""The reproducibility term of the camera constant: stored, estimated from the library's history."""

from __future__ import annotations

import math

import numpy as np
import pytest

from saedkit.core.calibration.camera import DEFAULT_REPRODUCIBILITY_PCT
from saedkit.core.calibration.library import (
    CalibrationLibrary,
    SavedCalibration,
    estimate_reproducibility_pct,
)


def _saved(name: str, k: float, sigma: float, day: int, **kw) -> SavedCalibration:
    return SavedCalibration(name=name, instrument="KB-7", voltage_kv=200.0, nominal_camera_length_mm=400.0,
                            binning=1, pixel_size_um=30.0, camera_constant_px_A=k, camera_constant_sigma_px_A=sigma,
                            ellipticity=0.01, major_axis_deg=30.0, standard="Au",
                            date=f"2026-03-{day:02d}T10:00:00Z", image_sha256="", software_version="0.1", **kw)


def test_saved_calibration_keeps_its_reproducibility_and_old_records_read_the_default(tmp_path):
    lib = CalibrationLibrary(tmp_path / "cal.json")
    lib.save(_saved("a", 343.4, 0.01, 1, reproducibility_pct=0.4))
    got = lib.get("a")
    assert got.reproducibility_pct == 0.4
    assert got.camera_constant_sys_sigma_px_A == pytest.approx(343.4 * 0.004)
    assert got.camera_constant_total_sigma_px_A == pytest.approx(math.hypot(0.01, 343.4 * 0.004))
    rec = got.to_dict()
    del rec["reproducibility_pct"]  # a record written before the term existed
    assert SavedCalibration.from_dict(rec).reproducibility_pct == DEFAULT_REPRODUCIBILITY_PCT
    # the camera length carries the total; L = K·p/λ (DESIGN.md)
    assert got.camera_length_sigma_mm == pytest.approx(got.camera_length_mm * got.camera_constant_total_rel_sigma)


def test_history_estimate_recovers_a_known_scatter(tmp_path):
    # Monte Carlo: 40 calibrations whose K scatter by 0.7 % (reproducibility) on top of a 0.05 % fit σ
    rng = np.random.default_rng(11)
    lib = CalibrationLibrary(tmp_path / "cal.json")
    k0, true_pct, fit_rel = 343.4, 0.7, 0.0005
    for i in range(28):
        k = k0 * (1 + rng.normal(0, true_pct / 100)) * (1 + rng.normal(0, fit_rel))
        lib.save(_saved(f"c{i}", k, k * fit_rel, i + 1))
    hist = lib.history(voltage_kv=200.0, nominal_camera_length_mm=400.0)
    est = estimate_reproducibility_pct(hist)
    # the sample standard deviation of 28 draws is within ~ 1/√(2·27) ≈ 14 % of the truth (2σ allowed)
    assert est == pytest.approx(true_pct, rel=0.3)
    assert estimate_reproducibility_pct(hist[:2]) is None  # too few to say


def test_calibrate_command_stores_given_or_estimated_reproducibility(tmp_path):
    from saedkit._calib_reproducibility import choose_reproducibility

    lib = CalibrationLibrary(tmp_path / "cal.json")
    rep, basis = choose_reproducibility(None, lib, voltage_kv=200.0, nominal_camera_length_mm=400.0)
    assert rep == DEFAULT_REPRODUCIBILITY_PCT and basis.startswith("default")
    assert choose_reproducibility(0.3, lib, voltage_kv=200.0, nominal_camera_length_mm=400.0) == (0.3, "given")
    for i, k in enumerate((343.0, 344.0, 342.5, 343.9)):
        lib.save(_saved(f"c{i}", k, 0.0, i + 1))
    rep, basis = choose_reproducibility(None, lib, voltage_kv=200.0, nominal_camera_length_mm=400.0)
    k = np.array([343.0, 344.0, 342.5, 343.9])
    assert rep == pytest.approx(100 * np.std(k, ddof=1) / k.mean())  # sample scatter of K, % (fit σ = 0)
    assert "4 earlier calibrations" in basis
