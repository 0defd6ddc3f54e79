"""Structure factors and reflection rules against International Tables and closed forms."""

import math

import numpy as np
import pytest

from saedkit.core.crystallography import _gemmi_adapter as gm
from saedkit.core.crystallography.crystal import Site, make_phase
from saedkit.core.crystallography.library import find_phase
from saedkit.core.crystallography.structure_factors import (
    calculate_reflections,
    calculate_ring_families,
    calculate_scattering_factor_array,
    calculate_structure_factor_array,
)


def _f_table(element, s_per_A):
    """f_e(s) = Σ a_i exp(−b_i s²) from the tabulated 5-Gaussian coefficients of International Tables
    Vol. C Table 4.3.2.2 (Peng et al., Acta Cryst. A52, 257, 1996), as gemmi stores them — not saedkit's f."""
    import gemmi

    return gemmi.Element(element).c4322.calculate_sf(s_per_A**2)


def _s(a_A, hkl):
    """s = sin θ/λ = 1/(2d) for a cubic cell, d = a/√(h²+k²+l²)."""
    return math.sqrt(sum(i * i for i in hkl)) / (2 * a_A)


def _zero_b(phase):
    """The same phase with B = 0 on every site (the reference values are at B = 0)."""
    sites = [Site(s.element, s.x, s.y, s.z, s.occupancy, 0.0, s.label) for s in phase.sites]
    return make_phase(phase.name, phase.cell, phase.space_group, sites)


@pytest.mark.parametrize("el, f0", [("Al", 5.8872), ("Si", 5.8268), ("Fe", 7.1637), ("Cu", 5.5991), ("Au", 10.5714)])
def test_electron_scattering_factor_at_zero_angle(el, f0):
    # f_e(0) = Σ a_i of International Tables Vol. C Table 4.3.2.2 (Peng et al., Acta Cryst. A52, 257, 1996)
    assert calculate_scattering_factor_array(el, 0.0) == pytest.approx(f0, abs=2e-4)


@pytest.mark.parametrize("el", ["Al", "Si", "Cu", "Au"])
@pytest.mark.parametrize("s", [0.2, 0.4, 0.8, 1.2])
def test_mott_bethe_cross_check(el, s):
    # Mott–Bethe: f_e(s) = C (Z − f_x(s)) / s², C = 1/(8π² a0) = 0.0239337 Å⁻¹, with the X-ray
    # form factors of International Tables (it92); agreement within ~0.3 % for s ≥ 0.2 Å⁻¹ (REFERENCES.md)
    C = 1 / (8 * math.pi**2 * 0.529177210903)
    fx = gm.xray_sf(el, s * s)
    fe_mb = C * (gm.atomic_number(el) - fx) / s**2
    assert calculate_scattering_factor_array(el, s) == pytest.approx(fe_mb, rel=0.01)


def test_silicon_structure_factors_closed_forms():
    # Diamond cubic, B = 0: |F(111)| = 4√2 f, |F(220)| = 8 f, F(200) = F(222) = 0, |F(400)| = 8 f
    # (8 atoms per cell; International Tables Vol. A, Fd-3m 8a), f from the table.
    # Reference values 18.431 Å and 14.921 Å (REFERENCES.md).
    si = _zero_b(find_phase("Si"))
    a = si.cell.a
    F = np.abs(calculate_structure_factor_array(si, [[1, 1, 1], [2, 2, 0], [2, 0, 0], [2, 2, 2], [4, 0, 0]]))
    assert len(si.atom_positions[0]) == 8
    assert F[0] == pytest.approx(4 * math.sqrt(2) * _f_table("Si", _s(a, (1, 1, 1))), rel=1e-5)
    assert F[0] == pytest.approx(18.431, abs=0.002)
    assert F[1] == pytest.approx(8 * _f_table("Si", _s(a, (2, 2, 0))), rel=1e-5)
    assert F[1] == pytest.approx(14.921, abs=0.002)
    assert F[2] < 1e-9 and F[3] < 1e-9
    assert F[4] == pytest.approx(8 * _f_table("Si", _s(a, (4, 0, 0))), rel=1e-5)


def test_gold_structure_factors_closed_form():
    # fcc, B = 0: |F| = 4 f for unmixed hkl, 0 for mixed (International Tables Vol. A, Fm-3m 4a);
    # 27.002 Å (111) and 24.495 Å (200) (REFERENCES.md)
    au = _zero_b(find_phase("Au"))
    hkls = [(1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1), (1, 0, 0), (2, 1, 0)]
    F = np.abs(calculate_structure_factor_array(au, hkls))
    for h, value in zip(hkls[:4], F[:4]):
        assert value == pytest.approx(4 * _f_table("Au", _s(au.cell.a, h)), rel=1e-5), h
    assert F[0] == pytest.approx(27.002, abs=0.002)
    assert F[1] == pytest.approx(24.495, abs=0.002)
    assert F[4] < 1e-9 and F[5] < 1e-9


def test_iron_structure_factors_closed_form():
    # bcc, B = 0: |F| = 2 f for h + k + l even, 0 for odd (International Tables Vol. A, Im-3m 2a)
    fe = _zero_b(find_phase("Fe"))
    hkls = [(1, 1, 0), (2, 0, 0), (2, 1, 1), (3, 1, 0), (1, 0, 0), (1, 1, 1)]
    F = np.abs(calculate_structure_factor_array(fe, hkls))
    for h, value in zip(hkls[:4], F[:4]):
        assert value == pytest.approx(2 * _f_table("Fe", _s(fe.cell.a, h)), rel=1e-5), h
    assert F[4] < 1e-9 and F[5] < 1e-9


def test_debye_waller_and_relativistic_factor():
    si = find_phase("Si")
    si0 = _zero_b(si)
    hkl = [[2, 2, 0]]
    s = 1 / (2 * si.calculate_d_A((2, 2, 0)))
    ratio = abs(calculate_structure_factor_array(si, hkl)[0]) / abs(calculate_structure_factor_array(si0, hkl)[0])
    assert ratio == pytest.approx(math.exp(-si.sites[0].b_iso_A2 * s * s), rel=1e-12)
    # relativistic: × γ = 1 + eV/m0c² (1.3914 at 200 kV)
    r = abs(calculate_structure_factor_array(si, hkl, voltage_kv=200)[0]) / abs(calculate_structure_factor_array(si, hkl)[0])
    assert r == pytest.approx(1.3914, abs=1e-4)


def _allowed(phase, hkls):
    t = calculate_reflections(phase, d_min_A=0.5)
    idx = {tuple(h): i for i, h in enumerate(t.hkl.tolist())}
    return {tuple(h): (bool(t.allowed[idx[tuple(h)]]), bool(t.absent_space_group[idx[tuple(h)]]),
                       bool(t.absent_sites[idx[tuple(h)]])) for h in hkls}


def test_fcc_rule():
    # fcc: h, k, l all odd or all even (International Tables Vol. A)
    t = calculate_reflections(find_phase("Cu"), d_min_A=0.7)
    unmixed = np.all(t.hkl % 2 == 0, axis=1) | np.all(t.hkl % 2 == 1, axis=1)
    assert np.array_equal(t.allowed, unmixed)
    assert np.array_equal(t.absent_space_group, ~unmixed)


def test_bcc_rule():
    # bcc: h + k + l even (International Tables Vol. A)
    t = calculate_reflections(find_phase("Fe"), d_min_A=0.7)
    assert np.array_equal(t.allowed, t.hkl.sum(axis=1) % 2 == 0)


def test_diamond_rules_space_group_versus_sites():
    # Fd-3m: 200 is absent by the d-glide (space group); 222 is zero only because Si sits on 8a;
    # 400 present (International Tables Vol. A; REFERENCES.md)
    r = _allowed(find_phase("Si"), [(2, 0, 0), (2, 2, 2), (4, 0, 0), (1, 1, 1), (4, 4, 2), (4, 2, 0)])
    assert r[(2, 0, 0)] == (False, True, False)
    assert r[(4, 2, 0)] == (False, True, False)
    assert r[(2, 2, 2)] == (False, False, True)
    assert r[(4, 4, 2)] == (False, False, True)
    assert r[(4, 0, 0)][0] and r[(1, 1, 1)][0]


def test_hcp_rules():
    # hcp (2c): 0001 and 0003 absent by the 6_3 screw (space group); 0002 present;
    # h+2k = 3n with l odd is zero only by the 2c site (e.g. 30̄31 = (301)); |F|²/f² = 4, 3, 1
    # for (h+2k = 3n, l even), (≠ 3n, l odd), (≠ 3n, l even)  (REFERENCES.md, International Tables Vol. A)
    ti = _zero_b(find_phase("Ti"))
    r = _allowed(ti, [(0, 0, 1), (0, 0, 3), (0, 0, 2), (3, 0, 1), (1, 0, 0), (1, 0, 1)])
    assert r[(0, 0, 1)] == (False, True, False)
    assert r[(0, 0, 3)] == (False, True, False)
    assert r[(0, 0, 2)][0]
    assert r[(3, 0, 1)] == (False, False, True)
    hkls = [(0, 0, 2), (1, 1, 0), (1, 0, 1), (1, 0, 0), (1, 0, 2), (3, 0, 1)]
    F2 = np.abs(calculate_structure_factor_array(ti, hkls)) ** 2
    # s = 1/(2d), hexagonal: 1/d² = 4/3 (h² + hk + k²)/a² + l²/c²; f from the table
    a, c = ti.cell.a, ti.cell.c
    f2 = [_f_table("Ti", 0.5 * math.sqrt(4 / 3 * (h * h + h * k + k * k) / a**2 + l * l / c**2)) ** 2
          for h, k, l in hkls]
    assert F2 / np.array(f2) == pytest.approx([4, 4, 3, 1, 1, 0], rel=1e-5, abs=1e-9)


def test_rock_salt_mixed_and_rutile_rules():
    # NaCl: fcc rule; F(111) ∝ f_Na − f_Cl, F(200) ∝ f_Na + f_Cl (textbook, e.g. Cullity & Stock; from memory)
    nacl = find_phase("NaCl")
    F = np.abs(calculate_structure_factor_array(nacl, [[1, 1, 1], [2, 0, 0]]))
    assert F[1] > 3 * F[0] > 0
    # rutile P4_2/mnm: 0kl with k + l odd absent (n-glide), 00l with l odd absent (International Tables Vol. A)
    r = _allowed(find_phase("TiO2"), [(0, 1, 0), (0, 0, 1), (0, 1, 1), (1, 1, 0), (1, 0, 1)])
    assert not r[(0, 1, 0)][0] and not r[(0, 0, 1)][0]
    assert r[(0, 1, 1)][0] and r[(1, 1, 0)][0] and r[(1, 0, 1)][0]


def test_space_group_absence_agrees_with_gemmi():
    # cross-check our absence test against gemmi's is_systematically_absent
    import gemmi

    for name, sg in [("Si", "F d -3 m:2"), ("TiO2", "P 42/m n m"), ("Ti", "P 63/m m c"), ("Fe", "I m -3 m")]:
        ops = gemmi.find_spacegroup_by_name(sg).operations()
        t = calculate_reflections(find_phase(name), d_min_A=0.8)
        ref = np.array([ops.is_systematically_absent(list(map(int, h))) for h in t.hkl])
        assert np.array_equal(t.absent_space_group, ref), name


def test_gold_rings_and_multiplicities():
    # First rings of Au: 111 200 220 311 222 400 with multiplicities 8 6 12 24 8 6
    # (common practice, cubic m-3m multiplicities)
    fam = calculate_ring_families(find_phase("Au"), d_min_A=1.0)
    assert [f.hkl for f in fam] == [(1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1), (2, 2, 2), (4, 0, 0)]
    assert [f.multiplicity for f in fam] == [8, 6, 12, 24, 8, 6]
    ratios = [f.d_A and fam[0].d_A / f.d_A for f in fam]
    # radius ratios to the first ring: 1, 1.1547, 1.6330, 1.9149, 2.0000, 2.3094 (fcc geometry)
    assert ratios == pytest.approx([1, 1.1547, 1.6330, 1.9149, 2.0000, 2.3094], abs=1e-4)
