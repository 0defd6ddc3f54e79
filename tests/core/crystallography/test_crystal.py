"""Cell geometry, phases and CIF reading, against published and textbook values."""

import math

import numpy as np
import pytest

from saedkit.core.crystallography.crystal import (
    UnitCell,
    format_indices,
    from_four_index_direction,
    make_phase,
    read_phase_cif,
    to_four_index_direction,
    to_four_index_plane,
)
from saedkit.core.errors import CrystalError
from saedkit.core.crystallography.library import find_phase

CUBIC = UnitCell(4.0782, 4.0782, 4.0782, 90, 90, 90)


@pytest.mark.parametrize(
    "hkl, d",
    [((1, 1, 1), 2.3545), ((2, 0, 0), 2.0391), ((2, 2, 0), 1.4419), ((3, 1, 1), 1.2296),
     ((2, 2, 2), 1.1773), ((4, 0, 0), 1.0195)],
)
def test_gold_ring_spacings(hkl, d):
    # Au a = 4.0782 Å, Maeland & Flanagan, Can. J. Phys. 42, 2364 (1964); d = a/√(h²+k²+l²)
    assert find_phase("Au").calculate_d_A(hkl) == pytest.approx(d, abs=1e-4)


@pytest.mark.parametrize("hkl", [(1, 1, 1), (2, 2, 0), (3, 1, 1), (4, 0, 0)])
def test_silicon_spacings(hkl):
    # Si a = 5.431144 Å, NIST SRM 640f (Black et al., Powder Diffraction 35, 2020)
    expected = 5.431144 / math.sqrt(sum(i * i for i in hkl))
    assert find_phase("Si").calculate_d_A(hkl) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(
    "h1, h2, angle",
    [((1, 1, 1), (-1, 1, 1), 70.53), ((1, 1, 1), (2, 0, 0), 54.74), ((1, 1, 1), (2, 2, 0), 35.26),
     ((1, 1, 1), (-2, 2, 0), 90.0), ((1, 1, 1), (3, 1, 1), 29.50), ((1, 1, 1), (3, -1, -1), 79.98),
     ((2, 0, 0), (2, 2, 0), 45.0), ((2, 2, 0), (2, 0, 2), 60.0), ((1, 1, 0), (2, 1, 1), 30.0)],
)
def test_cubic_interplanar_angles(h1, h2, angle):
    # Cullity & Stock, Elements of X-ray Diffraction, table of cubic interplanar angles (from memory)
    assert CUBIC.calculate_plane_angle_deg(h1, h2) == pytest.approx(angle, abs=0.01)


def test_hexagonal_geometry_matches_closed_form():
    # 1/d² = 4/3 (h²+hk+k²)/a² + l²/c² for hexagonal cells (textbook formula,
    # e.g. Cullity & Stock, appendix; from memory)
    ti = find_phase("Ti")
    a, c = ti.cell.a, ti.cell.c
    for hkl in [(1, 0, 0), (0, 0, 2), (1, 0, 1), (1, 1, 0), (1, 0, 3), (2, -1, 2)]:
        h, k, l = hkl
        d = 1 / math.sqrt(4 / 3 * (h * h + h * k + k * k) / a**2 + l * l / c**2)
        assert ti.calculate_d_A(hkl) == pytest.approx(d, rel=1e-12)
    # the angle between [001] and [100] is 90°, between [100] and [010] is 120°
    assert ti.cell.calculate_direction_angle_deg((1, 0, 0), (0, 1, 0)) == pytest.approx(120)
    assert ti.cell.calculate_direction_angle_deg((0, 0, 1), (1, 0, 0)) == pytest.approx(90)


def test_monoclinic_and_triclinic_metric_is_consistent():
    # d from the metric equals 1/|B h| from the Cartesian reciprocal basis (two independent routes)
    cell = UnitCell(5.1, 6.3, 7.2, 81.0, 97.5, 103.0)
    rng = np.random.default_rng(1)
    for hkl in rng.integers(-4, 5, size=(20, 3)):
        if not hkl.any():
            continue
        g_cart = cell.reciprocal_basis @ hkl
        assert cell.calculate_d_A(hkl) == pytest.approx(1 / np.linalg.norm(g_cart), rel=1e-12)
    # the reciprocal basis is dual to the direct one: a_i · a*_j = δ_ij
    assert np.allclose(cell.direct_basis.T @ cell.reciprocal_basis, np.eye(3))


def test_zone_axis_of_two_reflections():
    # fcc [011] pattern: 11̄1 and 1̄1̄1 at 70.53°, 200 at 54.74° to both (Edington, Practical
    # Electron Microscopy in Materials Science, 1976, standard patterns; from memory)
    u = UnitCell.calculate_zone_axis((1, -1, 1), (-1, -1, 1))
    assert np.all(np.cross(u, [0, 1, 1]) == 0)
    assert CUBIC.calculate_plane_angle_deg((1, -1, 1), (-1, -1, 1)) == pytest.approx(70.53, abs=0.01)
    # 11̄1 and 1̄11 share the zone [110], not [011] (Weiss zone law h·u = 0)
    assert np.all(np.cross(UnitCell.calculate_zone_axis((1, -1, 1), (-1, 1, 1)), [1, 1, 0]) == 0)
    assert (UnitCell.calculate_laue_zone([(2, 0, 0), (1, 1, -1), (1, 1, 1)], [0, 1, 1]) == [0, 0, 2]).all()
    with pytest.raises(CrystalError, match="parallel"):
        UnitCell.calculate_zone_axis((1, 1, 1), (2, 2, 2))


def test_four_index_notation():
    # Miller–Bravais: [100] = [2 -1 -1 0]/3, [001] = [0001], [110] = [11-20] (common practice)
    assert to_four_index_direction((1, 0, 0)) == (2, -1, -1, 0)
    assert to_four_index_direction((0, 0, 1)) == (0, 0, 0, 1)
    assert to_four_index_direction((1, 1, 0)) == (1, 1, -2, 0)
    assert from_four_index_direction((2, -1, -1, 0)) == (1, 0, 0)
    assert to_four_index_plane((1, 0, 1)) == (1, 0, -1, 1)
    for uvw in [(1, 2, 3), (2, -1, 0), (1, 1, 1)]:
        assert from_four_index_direction(to_four_index_direction(uvw)) == uvw


def test_format_indices_bars_negatives():
    assert format_indices((1, -1, 1)) == "(11\u03041)"
    assert format_indices((0, 1, -1), brackets="[]") == "[011\u0304]"


@pytest.mark.parametrize(
    "cell, match",
    [((4.0, 4.0, -1.0, 90, 90, 90), "length c"), ((4, 4, 4, 90, 90, 180), "angle gamma"),
     ((4, 4, 4, 120, 120, 120), "cannot form a cell"), ((4, 4, 4, 10, 10, 100), "cannot form a cell")],
)
def test_impossible_cells_are_refused(cell, match):
    with pytest.raises(CrystalError, match=match):
        UnitCell(*cell)


def test_make_phase_errors():
    with pytest.raises(CrystalError, match="unknown space group"):
        make_phase("x", (4, 4, 4, 90, 90, 90), "F m -3 q", [("Au", 0, 0, 0)])
    with pytest.raises(CrystalError, match="1 to 230"):
        make_phase("x", (4, 4, 4, 90, 90, 90), 231, [("Au", 0, 0, 0)])
    with pytest.raises(CrystalError, match="unknown element 'Qq'"):
        make_phase("x", (4, 4, 4, 90, 90, 90), 225, [("Qq", 0, 0, 0)])
    with pytest.raises(CrystalError, match="does not fit the cubic"):
        make_phase("x", (4, 4, 5, 90, 90, 90), 225, [("Au", 0, 0, 0)])
    with pytest.raises(CrystalError, match="no atom sites"):
        make_phase("x", (4, 4, 4, 90, 90, 90), 225, [])


def test_cif_round_trip(tmp_path):
    for name in ["Si", "TiO2", "Ti", "NaCl"]:
        phase = find_phase(name)
        path = tmp_path / f"{name}.cif"
        path.write_text(phase.to_cif())
        again = read_phase_cif(path)
        assert again.cell.parameters == pytest.approx(phase.cell.parameters, abs=1e-5)
        assert again.space_group.number == phase.space_group.number
        assert len(again.atom_positions[0]) == len(phase.atom_positions[0])
        assert [s.element for s in again.sites] == [s.element for s in phase.sites]
        assert find_phase(str(path)).name == again.name


def test_cif_with_symmetry_operations_and_uiso(tmp_path):
    # A CIF that lists its operations (P -1 here) and gives U_iso instead of B.
    text = """data_test
_cell_length_a 5.0
_cell_length_b 6.0
_cell_length_c 7.0
_cell_angle_alpha 80
_cell_angle_beta 95
_cell_angle_gamma 100
loop_
_space_group_symop_operation_xyz
'x, y, z'
'-x, -y, -z'
loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
_atom_site_U_iso_or_equiv
Fe1 Fe2+ 0.1 0.2 0.3 0.01
"""
    p = tmp_path / "p1bar.cif"
    p.write_text(text)
    phase = read_phase_cif(p)
    assert phase.space_group.number == 2
    assert phase.sites[0].element == "Fe"
    assert phase.sites[0].b_iso_A2 == pytest.approx(8 * math.pi**2 * 0.01)
    assert len(phase.atom_positions[0]) == 2


@pytest.mark.parametrize(
    "text, match",
    [
        ("data_x\n_cell_length_b 4\n", "no unit cell"),
        ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n_cell_angle_alpha 90\n"
         "_cell_angle_beta 90\n_cell_angle_gamma 90\n_space_group_name_H-M_alt 'Q 9'\n"
         "loop_\n_atom_site_label\n_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\nAu 0 0 0\n",
         "unknown space group"),
        ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n_cell_angle_alpha 90\n"
         "_cell_angle_beta 90\n_cell_angle_gamma 90\n_space_group_IT_number 225\n"
         "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
         "_atom_site_fract_z\nX1 Zz 0 0 0\n", "unknown element"),
        ("data_x\n_cell_length_a 4\n_cell_length_b 4\n_cell_length_c 4\n_cell_angle_alpha 90\n"
         "_cell_angle_beta 90\n_cell_angle_gamma 90\n_space_group_IT_number 225\n", "no atom sites"),
        ("this is not a cif {{{", "not a readable CIF"),
    ],
)
def test_bad_cif_messages_name_the_file(tmp_path, text, match):
    p = tmp_path / "bad.cif"
    p.write_text(text)
    with pytest.raises(CrystalError, match=match) as info:
        read_phase_cif(p)
    assert "bad.cif" in str(info.value)


def test_missing_cif_and_unknown_name():
    with pytest.raises(CrystalError, match="no such CIF"):
        find_phase("/nonexistent/x.cif")
    with pytest.raises(CrystalError, match="library name"):
        find_phase("unobtainium")


@pytest.mark.parametrize("alias, name", [("gold", "Au"), ("AU", "Au"), ("alpha-Fe", "Fe"), ("rutile", "TiO2"),
                                         ("tio2", "TiO2"), ("alpha-Ti", "Ti"), ("nacl", "NaCl"), ("MgO", "MgO")])
def test_library_names_and_aliases(alias, name):
    assert find_phase(alias).name == name


def test_symmetry_equivalents():
    au = find_phase("Au")
    assert len(au.calculate_equivalent_array((1, 1, 1))) == 8
    assert len(au.calculate_equivalent_array((3, 1, 1))) == 24
    ti = find_phase("Ti")
    assert len(ti.calculate_equivalent_array((1, 0, 0))) == 6
    assert len(ti.calculate_equivalent_array((0, 0, 2))) == 2
    assert len(ti.calculate_equivalent_directions((0, 0, 1))) == 2
