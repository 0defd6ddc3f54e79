"""Property-based checks of the geometry every later step relies on (hypothesis; kept short)."""

import math

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from saedkit.core.crystallography.crystal import UnitCell, from_four_index_direction, to_four_index_direction
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import CrystalError
from saedkit.core.indexing.lattice2d import reduce_basis_2d
from saedkit.core.optics import calculate_d_A, calculate_radius_px

FAST = settings(max_examples=60, deadline=None)

lengths = st.floats(2.0, 12.0)
angles = st.floats(60.0, 120.0)
small = st.integers(-4, 4)


@FAST
@given(e=st.floats(0, 0.1), phi=st.floats(0, 180), x=st.floats(-500, 500), y=st.floats(-500, 500))
def test_ellipse_correct_undoes_distort(e, phi, x, y):
    ell = Ellipse(e, phi)
    v = np.array([[x, y]])
    assert np.allclose(ell.correct_array(ell.distort_array(v)), v, atol=1e-9)
    # the mean of the semi-axes of a distorted circle is its radius (DESIGN.md ellipse model)
    p1, p2 = ell.components
    again = Ellipse.from_components(p1, p2)
    assert math.isclose(again.ellipticity, ell.ellipticity, abs_tol=1e-12)


@FAST
@given(a=lengths, b=lengths, c=lengths, al=angles, be=angles, ga=angles,
       h=st.tuples(small, small, small), k=st.tuples(small, small, small))
def test_metric_and_cartesian_routes_agree(a, b, c, al, be, ga, h, k):
    try:
        cell = UnitCell(a, b, c, al, be, ga)
    except CrystalError:
        return  # angles that cannot close a cell are refused, as they should be
    if not any(h) or not any(k):
        return
    gh = cell.reciprocal_basis @ np.array(h, float)
    gk = cell.reciprocal_basis @ np.array(k, float)
    assert math.isclose(cell.calculate_d_A(h), 1 / np.linalg.norm(gh), rel_tol=1e-9)
    if np.linalg.norm(np.cross(gh, gk)) > 1e-9 * np.linalg.norm(gh) * np.linalg.norm(gk):
        cos = gh @ gk / np.linalg.norm(gh) / np.linalg.norm(gk)
        assert math.isclose(cell.calculate_plane_angle_deg(h, k), math.degrees(math.acos(np.clip(cos, -1, 1))),
                            abs_tol=1e-6)
        # the zone axis of two reflections is normal to both (Weiss zone law h·u = 0)
        u = UnitCell.calculate_zone_axis(h, k)
        assert int(np.dot(u, h)) == 0 and int(np.dot(u, k)) == 0


@FAST
@given(u=st.tuples(small, small, small))
def test_four_index_round_trip(u):
    if not any(u):
        return
    g = math.gcd(math.gcd(abs(u[0]), abs(u[1])), abs(u[2]))
    reduced = tuple(v // g for v in u)
    four = to_four_index_direction(u)
    assert four[0] + four[1] + four[2] == 0
    assert from_four_index_direction(four) == reduced


@FAST
@given(ax=st.floats(-50, 50), ay=st.floats(-50, 50), bx=st.floats(-50, 50), by=st.floats(-50, 50))
def test_reduced_basis_spans_the_same_lattice(ax, ay, bx, by):
    a, b = np.array([ax, ay]), np.array([bx, by])
    area = abs(ax * by - ay * bx)
    if area < 1.0 or min(np.linalg.norm(a), np.linalg.norm(b)) < 1.0:
        return
    r1, r2, T = reduce_basis_2d(a, b)
    assert abs(round(np.linalg.det(T))) == 1
    assert np.allclose(np.column_stack([a, b]) @ T, np.column_stack([r1, r2]), atol=1e-6 * (1 + area))
    assert np.linalg.norm(r1) <= np.linalg.norm(r2) + 1e-9
    cos = r1 @ r2 / np.linalg.norm(r1) / np.linalg.norm(r2)
    assert -1e-9 <= cos <= 0.5 + 1e-9  # angle between 60° and 90°


@FAST
@given(d=st.floats(0.5, 10.0), K=st.floats(100, 5000), kv=st.sampled_from([80, 120, 200, 300]))
def test_camera_equation_inverts(d, K, kv):
    for exact in (False, True):
        r = calculate_radius_px(d, K, exact=exact, voltage_kv=kv)
        assert math.isclose(float(calculate_d_A(r, K, exact=exact, voltage_kv=kv)), d, rel_tol=1e-9)
