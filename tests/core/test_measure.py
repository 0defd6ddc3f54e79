"""The one measurement function: values against closed forms, uncertainties against a Monte Carlo."""

from __future__ import annotations

import math

import numpy as np
import pytest

from saedkit.core.calibration.camera import EnteredCalibration, camera_terms
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError
from saedkit.core.measure import measure_positions, measure_radii

# electron wavelength at 200 kV, 0.02508 Å (Williams & Carter, Table 1.1) [pub, mem]
LAMBDA_200KV_A = 0.02508


def _mc_spread(xy, sig_xy, c, sig_c, K, sig_K, *, ellipse=None, exact_lambda=None, n=20000, seed=0):
    """Scatter of d when the positions, the centre and K are drawn from their σ (independent code)."""
    rng = np.random.default_rng(seed)
    p = xy + rng.normal(0.0, 1.0, (n, 2)) * sig_xy
    cc = c + rng.normal(0.0, 1.0, (n, 2)) * sig_c
    k = K + rng.normal(0.0, sig_K, n)
    v = p - cc
    if ellipse is not None:  # D = Rot(φ)·diag(1 + e/2, 1 − e/2)·Rot(−φ) (DESIGN.md), undone by its inverse
        e, phi = ellipse
        c_, s_ = math.cos(math.radians(phi)), math.sin(math.radians(phi))
        rot = np.array([[c_, -s_], [s_, c_]])
        D = rot @ np.diag([1 + e / 2, 1 - e / 2]) @ rot.T
        v = v @ np.linalg.inv(D).T
    R = np.hypot(v[:, 0], v[:, 1])
    if exact_lambda is None:
        d = k / R  # R·d = K (camera equation, small angle)
    else:  # R = L·tan 2θ with L = K/λ, and Bragg's law λ = 2 d sin θ
        two_theta = np.arctan(R * exact_lambda / k)
        d = exact_lambda / (2 * np.sin(two_theta / 2))
    return float(np.std(d))


@pytest.mark.parametrize("case", ["plain", "ellipse", "exact"])
def test_statistical_sigma_matches_a_monte_carlo(case):
    xy, c = np.array([412.0, 163.0]), np.array([256.0, 250.0])
    sig_xy, sig_c = np.array([0.6, 0.3]), np.array([0.2, 0.4])
    K, sig_K = 400.0, 2.0
    ell = Ellipse(0.02, 30.0) if case == "ellipse" else Ellipse(0.0, 0.0)
    cam = EnteredCalibration(K, sig_K, ell, reproducibility_pct=0.0, voltage_kv=200.0,
                             exact_camera_equation=(case == "exact"))
    m = measure_positions([xy], [sig_xy], c, sig_c, cam)
    lam = camera_terms(cam).wavelength_A if case == "exact" else None
    spread = _mc_spread(xy, sig_xy, c, sig_c, K, sig_K, ellipse=(0.02, 30.0) if case == "ellipse" else None,
                        exact_lambda=lam)
    # first-order propagation agrees with the Monte Carlo scatter within its sampling error (~1 %, n = 20000)
    assert m.d_stat_sigma_A[0] == pytest.approx(spread, rel=0.03)
    assert m.d_sys_sigma_A[0] == 0.0
    assert m.d_sigma_A[0] == pytest.approx(m.d_stat_sigma_A[0], rel=1e-12)


def test_reproducibility_adds_a_systematic_part_in_quadrature():
    # a Monte Carlo over both terms: K drawn with σ_K (statistical) and a shared scale of 1.5 % (systematic)
    xy, c = np.array([300.0, 100.0]), np.array([100.0, 100.0])
    cam = EnteredCalibration(500.0, 1.0, reproducibility_pct=1.5)
    m = measure_positions([xy], 0.4, c, 0.0, cam)
    rng = np.random.default_rng(3)
    n = 40000
    k = 500.0 * (1 + rng.normal(0, 0.015, n)) + rng.normal(0, 1.0, n)
    R = np.hypot(*(xy + rng.normal(0, 0.4, (n, 2)) - c).T)
    assert m.d_sigma_A[0] == pytest.approx(np.std(k / R), rel=0.03)
    # the systematic part alone: 1.5 % of d = 1.5 % of 500/200 Å
    assert m.d_sys_sigma_A[0] == pytest.approx(0.015 * 2.5, rel=1e-12)
    # |g| = 1/d in nm⁻¹ carries the same relative uncertainty parts
    assert m.g_per_nm[0] == pytest.approx(4.0)
    assert m.g_sys_sigma_per_nm[0] / m.g_per_nm[0] == pytest.approx(0.015)
    assert m.g_sigma_per_nm[0] / m.g_per_nm[0] == pytest.approx(m.d_sigma_A[0] / m.d_A[0])


def test_exact_camera_equation_against_bragg_law():
    # Au 220, d = 1.4420 Å (a = 4.0782 Å, REFERENCES.md), at 200 kV; place the spot with R = L·tan 2θ, L = K/λ
    K, d = 343.4, 4.0782 / math.sqrt(8)
    cam = EnteredCalibration(K, 0.0, voltage_kv=200.0, exact_camera_equation=True, reproducibility_pct=0.0)
    lam = camera_terms(cam).wavelength_A
    assert lam == pytest.approx(LAMBDA_200KV_A, abs=1e-5)
    R = K / lam * math.tan(2 * math.asin(lam / (2 * d)))
    m = measure_positions([[100.0 + R, 50.0]], 0.0, [100.0, 50.0], 0.0, cam)
    assert m.d_A[0] == pytest.approx(d, rel=1e-12)
    small = measure_radii([R], 0.1, EnteredCalibration(K, 0.0, reproducibility_pct=0.0))
    # the small-angle form reads d a little short of the exact one (by about 1e-4 here) [calc]
    assert 5e-5 < (m.d_A[0] - small.d_A[0]) / d < 3e-4


def test_angles_radii_and_missing_values():
    m = measure_positions([[110.0, 110.0], [100.0, 100.0]], 0.0, [100.0, 100.0], 0.0, EnteredCalibration(300.0))
    assert m.angle_deg[0] == pytest.approx(45.0)  # from +x towards +y (DESIGN.md)
    assert m.radius_px[0] == pytest.approx(math.sqrt(200))
    assert math.isnan(m.d_A[1]) and m.row(1)["d_A"] is None  # the centre itself has no spacing
    none = measure_positions([[110.0, 110.0]], 0.0, None, None, EnteredCalibration(300.0))
    assert math.isnan(none.radius_px[0])
    no_cam = measure_positions([[110.0, 110.0]], 0.0, [100.0, 100.0])
    assert math.isnan(no_cam.d_A[0]) and no_cam.radius_px[0] > 0


def test_bare_numbers_are_not_a_camera():
    with pytest.raises(InputError, match="camera must be a calibration"):
        measure_positions([[1.0, 2.0]], 0.0, [0.0, 0.0], 0.0, (300.0, 1.0, None))
    with pytest.raises(InputError, match="reproducibility_pct"):
        EnteredCalibration(300.0, reproducibility_pct=-1.0)
    with pytest.raises(InputError, match="sigma_xy"):
        measure_positions([[1.0, 2.0], [3.0, 4.0]], np.zeros((3, 2)), [0.0, 0.0])
