"""Electron wavelength and the camera equation against published tables."""

import math

import pytest
from scipy import constants as sc

from saedkit.core.errors import InputError
from saedkit.core.optics import (
    calculate_camera_constant_px_A,
    calculate_camera_length_mm,
    calculate_d_A,
    calculate_interaction_constant,
    calculate_lambda_L_mm_A,
    calculate_radius_px,
    calculate_relativistic_voltage_V,
    calculate_velocity_ratio,
    calculate_wavelength_A,
)


@pytest.mark.parametrize("kv, nm", [(100, 0.00370), (120, 0.00335), (200, 0.00251), (300, 0.00197)])
def test_wavelength_matches_handbook_table(kv, nm):
    # Williams & Carter, Transmission Electron Microscopy, 2nd ed. (2009), Table 1.1
    # (values from memory), given to 3 significant figures in nm.
    assert calculate_wavelength_A(kv) / 10 == pytest.approx(nm, abs=0.000006)


@pytest.mark.parametrize(
    "kv, pm, v_over_c, sigma",
    [
        (60, 4.86606, 0.446225, 1.13569e-3),
        (80, 4.17572, 0.502399, 1.00871e-3),
        (100, 3.70144, 0.548221, 9.24396e-4),
        (120, 3.34922, 0.586671, 8.63811e-4),
        (200, 2.50793, 0.695314, 7.28840e-4),
        (300, 1.96875, 0.776525, 6.52616e-4),
    ],
)
def test_wavelength_velocity_interaction_constant_codata(kv, pm, v_over_c, sigma):
    # Computed independently from CODATA constants (scipy.constants): λ = h / sqrt(2 m0 e V*)
    v = kv * 1e3
    v_star = v * (1 + sc.e * v / (2 * sc.m_e * sc.c**2))
    lam_direct = sc.h / math.sqrt(2 * sc.m_e * sc.e * v_star) * 1e12
    assert lam_direct == pytest.approx(pm, abs=5e-5)
    assert calculate_wavelength_A(kv) * 100 == pytest.approx(lam_direct, rel=1e-12)
    assert calculate_velocity_ratio(kv) == pytest.approx(v_over_c, abs=1e-6)
    # σ at 200 kV ≈ 0.00073 V⁻¹Å⁻¹: Kirkland, Advanced Computing in Electron Microscopy (from memory)
    assert calculate_interaction_constant(kv) == pytest.approx(sigma, rel=1e-5)


def test_relativistic_voltage_200kV():
    # 239.14 kV at 200 kV (computed from CODATA constants)
    assert calculate_relativistic_voltage_V(200) / 1e3 == pytest.approx(239.14, abs=0.01)


def test_camera_constant_round_trip():
    K = calculate_camera_constant_px_A(600.0, 15.0, 200)
    # λL / p by hand: 0.0250793 Å × 600 mm / 0.015 mm
    assert K == pytest.approx(0.0250793 * 600 / 0.015, rel=1e-5)
    assert calculate_camera_length_mm(K, 15.0, 200) == pytest.approx(600.0)
    assert calculate_lambda_L_mm_A(K, 15.0) == pytest.approx(0.0250793 * 600, rel=1e-5)


def test_exact_versus_small_angle_camera_equation_for_gold():
    # Au at 200 kV: the exact form R = L tan 2θ differs from λL/d by 4e-5 (111) to
    # 1.1e-4 (220) relative (computed; REFERENCES.md).
    K = 1500.0
    for d, expected in [(2.3545, 4e-5), (1.4419, 1.1e-4)]:
        small = calculate_radius_px(d, K)
        exact = calculate_radius_px(d, K, exact=True, voltage_kv=200)
        assert (exact - small) / small == pytest.approx(expected, rel=0.1)
        assert calculate_d_A(exact, K, exact=True, voltage_kv=200) == pytest.approx(d, rel=1e-12)
        assert calculate_d_A(small, K) == pytest.approx(d, rel=1e-12)


@pytest.mark.parametrize("bad", [0, -200, float("nan"), "abc"])
def test_bad_voltage_is_named(bad):
    with pytest.raises(InputError, match="voltage_kv"):
        calculate_wavelength_A(bad)


def test_exact_form_needs_voltage():
    with pytest.raises(InputError, match="voltage_kv"):
        calculate_radius_px(2.0, 1000.0, exact=True)
