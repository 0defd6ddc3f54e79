"""CIF reading when the space-group symbol leaves the origin choice or the axes open.

The expected structure factors are closed forms (diamond cubic: |F(220)| = 8 f_e) with
f_e from the 5-Gaussian table of International Tables Vol. C Table 4.3.2.2 (Peng et al.,
Acta Cryst. A52, 257, 1996), read from gemmi's copy of the table, not from saedkit.
"""

import math
import subprocess
import sys
from pathlib import Path

import gemmi
import numpy as np
import pytest

from saedkit.core.crystallography.crystal import Site, make_phase, read_phase_cif
from saedkit.core.crystallography.structure_factors import calculate_structure_factor_array
from saedkit.core.errors import CrystalError

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "cif"
A_SI = 5.431144  # NIST SRM 640f (REFERENCES.md)


def _f_table(element: str, s_per_A: float) -> float:
    """f_e(s) = Σ a_i exp(−b_i s²) from the tabulated coefficients (International Tables C 4.3.2.2)."""
    return gemmi.Element(element).c4322.calculate_sf(s_per_A**2)


def _si_220(phase) -> float:
    return float(np.abs(calculate_structure_factor_array(phase, [[2, 2, 0]]))[0])


def _si_cif(xyz: str, *, symbol: str = "F d -3 m", extra: str = "", mult: str = "") -> str:
    head = "_atom_site_symmetry_multiplicity\n" if mult else ""
    return (f"data_t\n_chemical_formula_sum 'Si'\n{extra}"
            f"_cell_length_a {A_SI}\n_cell_length_b {A_SI}\n_cell_length_c {A_SI}\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n"
            f"_symmetry_space_group_name_H-M '{symbol}'\n"
            "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
            f"_atom_site_fract_z\n_atom_site_B_iso_or_equiv\n{head}Si1 Si {xyz} 0 {mult}\n")


@pytest.mark.parametrize("fixture, origin", [("hon_si_origin1.cif", 1), ("hon_si_origin2.cif", 2)])
def test_bare_fd3m_symbol_is_read_in_the_origin_its_coordinates_need(fixture, origin):
    si = read_phase_cif(FIXTURES / fixture)
    # diamond cubic: 8 atoms per cell on 8a (International Tables Vol. A, Fd-3m)
    assert len(si.atom_positions[0]) == 8
    assert si.space_group.setting == f"F d -3 m:{origin}"
    # |F(220)| = 8 f_e(s220), s = 1/(2d), d220 = a/√8; 14.921 Å at B = 0 (REFERENCES.md)
    s220 = 1 / (2 * A_SI / math.sqrt(8))
    assert _si_220(si) == pytest.approx(8 * _f_table("Si", s220), rel=1e-6)
    assert _si_220(si) == pytest.approx(14.921, abs=0.002)
    # never silent: the phase says which origin it took and how to state it
    assert len(si.notes) == 1 and f"origin choice {origin}" in si.notes[0]
    assert "':1'" in si.notes[0] and "':2'" in si.notes[0]


def test_formula_units_rule_out_the_wrong_origin():
    # Z = 8 Si per cell (diamond cubic): origin choice 2 would put 16 atoms on 0,0,0 (16c)
    si = read_phase_cif("t.cif", text=_si_cif("0 0 0", extra="_cell_formula_units_Z 8\n"))
    assert si.space_group.setting == "F d -3 m:1"
    assert "ruled out" in si.notes[0] and "16 Si" in si.notes[0]


def test_site_multiplicity_rules_out_the_wrong_origin():
    si = read_phase_cif("t.cif", text=_si_cif("0.125 0.125 0.125", mult="8"))
    assert si.space_group.setting == "F d -3 m:2" and "ruled out" in si.notes[0]


def test_sites_that_fit_neither_origin_are_refused_naming_the_choices():
    # multiplicity 32 fits neither reading of 0,0,0 (8 in origin 1, 16 in origin 2)
    with pytest.raises(CrystalError, match=r"t\.cif: .*neither origin choice.*':1' or ':2'"):
        read_phase_cif("t.cif", text=_si_cif("0 0 0", mult="32"))


def test_a_stated_origin_or_symmetry_operations_need_no_note():
    si = read_phase_cif("t.cif", text=_si_cif("0 0 0", symbol="F d -3 m:1"))
    assert si.notes == () and len(si.atom_positions[0]) == 8
    assert _si_220(si) == pytest.approx(14.921, abs=0.002)


def _corundum(cell: str, sites: str) -> str:
    return ("data_corundum\n_chemical_formula_sum 'Al2 O3'\n" + cell
            + "_symmetry_space_group_name_H-M 'R -3 c'\n"
            "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
            "_atom_site_fract_z\n" + sites)


# corundum α-Al2O3, R-3c, hexagonal axes a = 4.759, c = 12.991 Å, Al 12c z = 0.3522,
# O 18e x = 0.3064 (from memory of the published structure; Z = 6 on hexagonal axes)
HEX_CELL = ("_cell_length_a 4.759\n_cell_length_b 4.759\n_cell_length_c 12.991\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 120\n")
HEX_SITES = "Al1 Al 0 0 0.3522\nO1 O 0.3064 0 0.25\n"


def test_rhombohedral_symbol_on_a_hexagonal_cell_is_read_on_hexagonal_axes_with_a_note():
    ph = read_phase_cif("c.cif", text=_corundum(HEX_CELL, HEX_SITES))
    assert ph.space_group.setting == "R -3 c:H"
    elements = ph.atom_positions[3]
    # Z = 6 Al2O3 on hexagonal axes: 12 Al + 18 O (International Tables Vol. A, R-3c 12c and 18e)
    assert elements.count("Al") == 12 and elements.count("O") == 18
    assert "hexagonal axes" in ph.notes[0] and "':H'" in ph.notes[0]


def test_rhombohedral_symbol_on_a_rhombohedral_cell_is_read_on_rhombohedral_axes():
    # the same cell on rhombohedral axes: a_R = √(3a² + c²)/3, cos α = (2c² − 3a²)/(2c² + 6a²)
    # (hexagonal-to-rhombohedral transformation, International Tables Vol. A ch. 5.1)
    a, c = 4.759, 12.991
    a_r = math.sqrt(3 * a * a + c * c) / 3
    alpha = math.degrees(math.acos((2 * c * c - 3 * a * a) / (2 * c * c + 6 * a * a)))
    cell = "".join(f"_cell_length_{x} {a_r:.5f}\n" for x in "abc")
    cell += "".join(f"_cell_angle_{x} {alpha:.4f}\n" for x in ("alpha", "beta", "gamma"))
    # Al on 4c (x,x,x), O on 6e (x, 1/2−x, 1/4); x values from the hexagonal ones (z_Al, x_O + 1/4)
    ph = read_phase_cif("c.cif", text=_corundum(cell, "Al1 Al 0.3522 0.3522 0.3522\nO1 O 0.5564 -0.0564 0.25\n"))
    assert ph.space_group.setting == "R -3 c:R"
    elements = ph.atom_positions[3]
    assert elements.count("Al") == 4 and elements.count("O") == 6  # Z = 2 on rhombohedral axes
    assert "rhombohedral axes" in ph.notes[0]
    # both settings give the same spacings: (012) on hexagonal axes, 1/d² = 4/3 (h²+hk+k²)/a² + l²/c²,
    # is (110) on rhombohedral axes (obverse: h_R = (2h+k+l)/3, k_R = (−h+k+l)/3, l_R = (−h−2k+l)/3)
    d012 = 1 / math.sqrt(4 / 3 * 1 / a**2 + 4 / c**2)
    hr = ((2 * 0 + 1 + 2) // 3, (-0 + 1 + 2) // 3, (-0 - 2 + 2) // 3)
    assert ph.calculate_d_A(hr) == pytest.approx(d012, rel=1e-4)


def test_rhombohedral_symbol_on_a_cell_of_neither_shape_is_refused():
    cell = ("_cell_length_a 4.7\n_cell_length_b 4.8\n_cell_length_c 13\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 120\n")
    with pytest.raises(CrystalError, match=r"c\.cif: .*':H' or ':R'"):
        read_phase_cif("c.cif", text=_corundum(cell, HEX_SITES))


def test_non_utf8_cif_is_read_with_a_clear_note(tmp_path):
    text = _si_cif("0.125 0.125 0.125", symbol="F d -3 m:2").replace("data_t\n", "data_t\n_chemical_name_common 'Si (Mérieux)'\n")
    p = tmp_path / "latin.cif"
    p.write_bytes(text.encode("latin-1"))
    si = read_phase_cif(p)
    assert si.name == "Si (Mérieux)"
    assert len(si.notes) == 1 and "not UTF-8" in si.notes[0] and "0xe9" in si.notes[0] and "line 2" in si.notes[0]
    assert _si_220(si) == pytest.approx(14.921, abs=0.002)


def test_phases_command_shows_the_note():
    out = subprocess.run([sys.executable, "-m", "saedkit.cli", "phases", str(FIXTURES / "hon_si_origin1.cif"),
                          "--d-min", "1.5"], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    assert "note: " in out.stdout and "origin choice 1" in out.stdout
    lines = [ln.split() for ln in out.stdout.splitlines() if ln.strip().startswith("(")]
    assert [ln[0] for ln in lines] == ["(111)", "(220)", "(311)"]  # no (200) or (222): diamond cubic


def test_typed_in_phase_is_unchanged():
    # make_phase takes the symbol as given (origin choice 2 for a bare symbol, documented)
    si = make_phase("Si", (A_SI,) * 3 + (90,) * 3, "F d -3 m", [Site("Si", 0.125, 0.125, 0.125, 1, 0)])
    assert si.notes == () and len(si.atom_positions[0]) == 8


@pytest.mark.parametrize("symbol, origin", [("F d -3 m S", 1), ("F d -3 m Z", 2)])
def test_database_origin_suffix_is_understood(symbol, origin):
    # some databases write the origin as a trailing S (origin choice 1) or Z (origin at -3m, choice 2)
    xyz = "0 0 0" if origin == 1 else "0.125 0.125 0.125"
    si = read_phase_cif("t.cif", text=_si_cif(xyz, symbol=symbol))
    assert si.space_group.setting == f"F d -3 m:{origin}" and si.notes == ()
    assert len(si.atom_positions[0]) == 8
