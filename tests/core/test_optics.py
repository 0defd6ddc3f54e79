"""Electron wavelength and the camera equation against published tables."""

import math
from pathlib import Path

import pytest

from saedkit.core.errors import InputError
from saedkit.core.optics import (
    calculate_camera_constant_px_A,
    calculate_camera_length_mm,
    calculate_d_A,
    calculate_interaction_constant,
    calculate_lambda_L_mm_A,
    calculate_radius_px,
    calculate_relativistic_voltage_V,
    calculate_small_angle_error_array,
    calculate_velocity_ratio,
    calculate_wavelength_A,
)


@pytest.mark.parametrize("kv, nm", [(100, 0.00370), (120, 0.00335), (200, 0.00251), (300, 0.00197)])
def test_wavelength_matches_handbook_table(kv, nm):
    # Williams & Carter, Transmission Electron Microscopy, 2nd ed. (2009), Table 1.1
    # (values from memory), given to 3 significant figures in nm.
    assert calculate_wavelength_A(kv) / 10 == pytest.approx(nm, abs=0.000006)


# CODATA 2018, typed here rather than taken from a library: h, e and c are exact by definition;
# m_e = 9.1093837015(28)e-31 kg.
H_J_S = 6.62607015e-34
E_C = 1.602176634e-19
M_E_KG = 9.1093837015e-31
C_M_S = 299792458.0

# REFERENCES.md wavelength table (λ in pm, v/c, σ in rad V⁻¹ Å⁻¹), as printed there
WAVELENGTH_TABLE = [
    (60, 4.86606, 0.446225, 1.13569e-3),
    (80, 4.17572, 0.502399, 1.00871e-3),
    (100, 3.70144, 0.548221, 9.24396e-4),
    (120, 3.34922, 0.586671, 8.63811e-4),
    (200, 2.50793, 0.695314, 7.28840e-4),
    (300, 1.96875, 0.776525, 6.52616e-4),
]


@pytest.mark.parametrize("kv, pm, v_over_c, sigma", WAVELENGTH_TABLE)
def test_wavelength_velocity_interaction_constant_codata(kv, pm, v_over_c, sigma):
    # the program against the table's digits (to the last digit printed) ...
    assert calculate_wavelength_A(kv) * 100 == pytest.approx(pm, abs=6e-6)
    assert calculate_velocity_ratio(kv) == pytest.approx(v_over_c, abs=6e-7)
    assert calculate_interaction_constant(kv) == pytest.approx(sigma, rel=1e-5)
    # ... and the table against the closed forms with the typed CODATA values:
    # λ = h / sqrt(2 m0 e V (1 + eV/2m0c²)), γ = 1 + eV/m0c², v/c = sqrt(1 − 1/γ²), σ = 2π γ m0 e λ / h²
    v = kv * 1e3
    gamma = 1 + E_C * v / (M_E_KG * C_M_S**2)
    lam_m = H_J_S / math.sqrt(2 * M_E_KG * E_C * v * (1 + E_C * v / (2 * M_E_KG * C_M_S**2)))
    assert lam_m * 1e12 == pytest.approx(pm, abs=6e-6)
    assert math.sqrt(1 - 1 / gamma**2) == pytest.approx(v_over_c, abs=6e-7)
    # σ at 200 kV ≈ 0.00073 V⁻¹Å⁻¹: Kirkland, Advanced Computing in Electron Microscopy (from memory)
    assert 2 * math.pi * gamma * M_E_KG * E_C * lam_m / H_J_S**2 * 1e-10 == pytest.approx(sigma, rel=1e-5)


def _readme_error_table() -> dict[tuple[int, float], float]:
    """The small-angle error table of README.md, {(kV, d_A): relative error}."""
    text = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    rows = [ln for ln in text.splitlines() if ln.startswith("| kV | d = ")]
    assert len(rows) == 1, "README.md must hold one small-angle error table"
    lines = text.splitlines()
    i = lines.index(rows[0])
    ds = [float(c.split("=")[1].replace("Å", "")) for c in rows[0].strip("|").split("|")[1:]]
    table = {}
    for ln in lines[i + 2:]:
        if not ln.startswith("|"):
            break
        cells = [c.strip() for c in ln.strip("|").split("|")]
        for d, c in zip(ds, cells[1:]):
            table[(int(cells[0]), d)] = float(c)
    return table


def test_readme_table_of_the_small_angle_error():
    # the README's numbers against tan(2 asin(λ/2d)) / (λ/d) − 1 with λ from the REFERENCES.md
    # table's digits (an independent computation, no saedkit code)
    table = _readme_error_table()
    lam_A = {kv: pm / 100 for kv, pm, _, _ in WAVELENGTH_TABLE}
    assert {kv for kv, _ in table} == set(lam_A) and {d for _, d in table} >= {0.5, 0.8, 1.0, 2.0, 3.0}
    for (kv, d), printed in table.items():
        x = lam_A[kv] / (2 * d)
        expected = math.tan(2 * math.asin(x)) / (2 * x) - 1
        assert printed == pytest.approx(expected, rel=6e-3), (kv, d)  # printed to 3 digits
        assert float(calculate_small_angle_error_array(d, kv)) == pytest.approx(expected, rel=1e-5)
        # and the series (3/8)(λ/d)² to its next order
        assert expected == pytest.approx(1.5 * x * x, rel=4 * x * x)
    # the sentences of the documentation: 5.1e-4 at 100 kV, d = 1 Å; 1.0e-3 at 80 kV, d = 0.8 Å
    assert table[(100, 1.0)] == pytest.approx(5.1e-4, abs=0.06e-4)
    assert table[(80, 0.8)] == pytest.approx(1.0e-3, abs=0.03e-3)


def test_small_angle_error_refuses_impossible_spacings():
    with pytest.raises(InputError, match="d_A"):
        calculate_small_angle_error_array(0.0, 200)
    with pytest.raises(InputError, match="d_A"):
        calculate_small_angle_error_array(0.01, 200)  # below λ/2


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
