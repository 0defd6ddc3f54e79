"""The zone-axis matcher on simulated patterns, and textbook standard patterns."""

import math

import numpy as np
import pytest

from saedkit.core.errors import FitError, InputError
from saedkit.core.indexing.lattice2d import find_lattice_2d, reduce_basis_2d
from saedkit.core.crystallography.library import LIBRARY, find_phase
from saedkit.core.indexing.matching import (
    calculate_zone_lattice_basis,
    match_tilt_pair,
    match_zone_axes,
)
from saedkit.core.simulation.simulate import simulate_spot_pattern

SHAPE = (1024, 1024)

# Low-index zones of every library phase (issue list: fcc [001] [011] [111] [112] [013]; bcc [001]
# [011] [111]; diamond [011]; rutile [001]; hcp [0001] and a prism zone)
CASES = [
    ("Au", (0, 0, 1)), ("Au", (0, 1, 1)), ("Al", (1, 1, 1)), ("Cu", (1, 1, 2)), ("Ni", (0, 1, 3)),
    ("Cu", (0, 1, 1)), ("Fe", (0, 0, 1)), ("Fe", (0, 1, 1)), ("Fe", (1, 1, 1)), ("Si", (0, 1, 1)),
    ("TiO2", (0, 0, 1)), ("Ti", (0, 0, 1)), ("Ti", (1, 0, 0)), ("Ti", (2, 1, 0)), ("NaCl", (0, 0, 1)),
    ("MgO", (1, 1, 2)), ("Mg", (0, 0, 1)), ("Al", (0, 1, 3)), ("Ni", (1, 1, 1)), ("Si", (1, 1, 2)),
]


def _family(phase, uvw):
    from saedkit.core.crystallography.structure_factors import canonical_indices

    return tuple(canonical_indices(phase.calculate_equivalent_directions(uvw)))


def _simulated_spots(name, zone, seed, *, n_extra=1, n_missing=1, noise_px=0.25):
    rng = np.random.default_rng(seed)
    ph = find_phase(name)
    K = rng.uniform(250, 450)
    _, t = simulate_spot_pattern(ph, zone, shape=SHAPE, camera_constant_px_A=K, rotation_deg=rng.uniform(0, 360),
                                 double_diffraction=True, n_missing=n_missing, n_extra=n_extra, rng=None)
    xy = t.xy + rng.normal(0, noise_px, t.xy.shape)
    centre = np.array(t.centre_xy) + rng.normal(0, 1.0, 2)  # a rough centre
    return ph, K, t, xy, centre


@pytest.mark.parametrize("calibrated", [False, True])
def test_right_zone_family_first(calibrated):
    firsts, top3 = 0, 0
    worst_K = 0.0
    n = 0
    for seed, (name, zone) in enumerate(CASES):
        ph, K, t, xy, centre = _simulated_spots(name, zone, seed)
        res = match_zone_axes(xy, centre, [ph], camera_constant_px_A=K * 1.003 if calibrated else None,
                              image_shape=SHAPE)
        fams = [_family(ph, c.zone) for c in res.candidates]
        truth = _family(ph, zone)
        n += 1
        firsts += bool(fams) and fams[0] == truth
        top3 += truth in fams[:3]
        if fams and fams[0] == truth and not calibrated:
            ratio = res.candidates[0].camera_constant_px_A / K
            if (name, zone) == ("TiO2", (0, 0, 1)):
                # Rutile [001] with double diffraction: 100/010 (forbidden, h00: h = 2n) appear, the spots
                # form a full square net, and the same net indexed with |g| scaled by sqrt(2) and turned 45°
                # puts every spot on an allowed (h+k even) reflection — a true ambiguity without a
                # calibration (plane-lattice geometry, common practice). Either scale is an honest answer;
                # the calibrated run below resolves it.
                ratio = min((ratio, ratio * np.sqrt(2.0)), key=lambda r: abs(r - 1))
            worst_K = max(worst_K, abs(ratio - 1))
    # targets from the issue: right family first in ≥ 95 %, within the top three always
    assert firsts / n >= 0.95, (firsts, n)
    assert top3 == n
    if not calibrated:
        assert worst_K < 0.01  # uncalibrated mode recovers K within 1 %


def test_whole_library_calibrated_finds_phase_and_zone():
    phases = [find_phase(e.name) for e in LIBRARY]
    ok = 0
    cases = [("Si", (0, 1, 1)), ("Fe", (1, 1, 1)), ("TiO2", (0, 0, 1)), ("Ti", (2, 1, 0)), ("Cu", (1, 1, 2))]
    for seed, (name, zone) in enumerate(cases):
        ph, K, t, xy, centre = _simulated_spots(name, zone, 100 + seed)
        res = match_zone_axes(xy, centre, phases, camera_constant_px_A=K, image_shape=SHAPE)
        best = res.candidates[0]
        ok += best.phase == name and _family(ph, best.zone) == _family(ph, zone)
    assert ok == len(cases)


def test_indexed_spots_carry_truth_hkl_up_to_symmetry():
    ph, K, t, xy, centre = _simulated_spots("Fe", (0, 1, 1), 7, n_extra=0, n_missing=0)
    res = match_zone_axes(xy, centre, [ph], camera_constant_px_A=K, image_shape=SHAPE)
    best = res.candidates[0]
    # the indexing is consistent: the same symmetry operation maps the truth hkl onto ours
    ours = np.array([s.hkl for s in best.spots])
    d_truth = ph.cell.calculate_d_array(t.hkl)
    d_ours = ph.cell.calculate_d_array(ours)
    assert d_ours == pytest.approx(d_truth, rel=1e-9)
    # every indexed spot lies in the candidate zone (Weiss zone law)
    assert np.all(ours @ np.array(best.zone) == 0)
    # d-spacings within 1 % of the truth, with an uncertainty
    d_meas = np.array([s.d_A for s in best.spots])
    assert np.max(np.abs(d_meas / t.d_A - 1)) < 0.01
    assert all(s.d_sigma_A > 0 for s in best.spots)
    assert best.zone_four_index is None and any("180°" in n for n in best.notes)


def _diamond_allowed(h, k, l):
    # diamond cubic (International Tables Vol. A, Fd-3m 8a): unmixed, and h + k + l = 4n when all even
    return len({h % 2, k % 2, l % 2}) == 1 and (h % 2 == 1 or (h + k + l) % 4 == 0)


def test_double_diffraction_spots_are_flagged_not_counted_against():
    # Si [011], spots placed by hand (not by the simulator): the kinematic ZOLZ of the diamond rule,
    # plus the forbidden reflections that double diffraction puts there, e.g. 200 = 11̄1 + 111̄ and
    # 2̄00 (Williams & Carter ch. 13; REFERENCES.md). Which spots are forbidden is decided here by
    # the textbook rule, not by the simulator's flags.
    from tests.core.indexing.test_hand_placed_patterns import CENTRE, _hand_placed

    si = find_phase("Si")
    K = 320.0
    _, allowed = _hand_placed(si.cell.parameters, _diamond_allowed, (0, 1, 1), d_min_A=1.0, K=K, rotation_deg=0)
    sums = {tuple(int(v) for v in np.add(p, q)) for p in allowed for q in allowed}

    def seen(h, k, l):  # allowed, or forbidden but the sum of two allowed reflections of the zone
        return _diamond_allowed(h, k, l) or (h, k, l) in sums

    xy, hkls = _hand_placed(si.cell.parameters, seen, (0, 1, 1), d_min_A=1.0, K=K, rotation_deg=23.0)
    placed_dd = np.array([not _diamond_allowed(*h) for h in hkls])
    assert {(2, 0, 0), (-2, 0, 0)} <= {h for h, f in zip(hkls, placed_dd) if f}
    assert (1, -1, 1) in allowed and (1, 1, -1) in allowed  # 200 = 11̄1 + 111̄
    xy = xy + np.random.default_rng(3).normal(0, 0.2, xy.shape)
    best = match_zone_axes(xy, CENTRE, [si], camera_constant_px_A=K, image_shape=SHAPE).candidates[0]
    assert _family(si, best.zone) == _family(si, (0, 1, 1))
    flagged = np.array([s.forbidden for s in best.spots])
    assert np.array_equal(flagged, placed_dd)  # spots come back in input order
    for s in best.spots:
        if s.forbidden:  # forbidden by the diamond rule: all even with h + k + l = 4n + 2
            assert not _diamond_allowed(*s.hkl) and all(v % 2 == 0 for v in s.hkl)
    assert best.fraction_explained == 1.0


def test_hexagonal_candidate_has_four_index_zone():
    ph, K, t, xy, centre = _simulated_spots("Ti", (0, 0, 1), 11)
    best = match_zone_axes(xy, centre, [ph], image_shape=SHAPE).candidates[0]
    assert best.zone_four_index in ((0, 0, 0, 1), (0, 0, 0, -1))


def _basis_ratio_angle(name, zone):
    ph = find_phase(name)
    _, t = simulate_spot_pattern(ph, zone, shape=SHAPE, camera_constant_px_A=400, rng=None)
    lat = find_lattice_2d(t.xy, t.centre_xy)
    return lat.r2_px / lat.r1_px, lat.angle_deg


@pytest.mark.parametrize(
    "name, zone, ratio, angle",
    [
        # Edington (1976) and Andrews, Dyson & Keown (1971) standard patterns (from memory; REFERENCES.md)
        ("Au", (0, 0, 1), 1.0, 90.0),       # fcc [001]: 200, 020
        ("Au", (0, 1, 1), 1.0, 70.53),      # fcc [011]: 11̄1, 1̄1̄1
        ("Au", (1, 1, 1), 1.0, 60.0),       # fcc [111]: 2̄20, 20̄2
        ("Au", (1, 1, 2), 1.633, 90.0),     # fcc [112]: 111̄, 2̄20
        ("Fe", (0, 0, 1), 1.0, 90.0),       # bcc [001]: 110, 1̄10
        ("Fe", (0, 1, 1), 1.4142, 90.0),    # bcc [011]: 01̄1, 200
        ("Fe", (1, 1, 1), 1.0, 60.0),       # bcc [111]: 1̄10, 101̄
    ],
)
def test_textbook_standard_patterns(name, zone, ratio, angle):
    r, a = _basis_ratio_angle(name, zone)
    assert r == pytest.approx(ratio, abs=2e-3)
    assert a == pytest.approx(angle, abs=0.05)


def test_fcc_011_shows_111_and_200_at_textbook_angles():
    # fcc [011]: 111-type at 70.53° to each other, 200 at 54.74° to both (Edington 1976; from memory)
    ph = find_phase("Au")
    _, t = simulate_spot_pattern(ph, (0, 1, 1), shape=SHAPE, camera_constant_px_A=400, rng=None)
    v = {tuple(h): p - t.centre_xy for h, p in zip(t.hkl.tolist(), t.xy)}
    ang = lambda a, b: math.degrees(math.acos(v[a] @ v[b] / np.linalg.norm(v[a]) / np.linalg.norm(v[b])))  # noqa: E731
    assert ang((1, 1, -1), (-1, 1, -1)) == pytest.approx(70.53, abs=0.01)
    assert ang((1, 1, -1), (2, 0, 0)) == pytest.approx(54.74, abs=0.01)
    # spot-distance ratio √2 for fcc [001] 220/200 (common practice, from the geometry)
    _, t1 = simulate_spot_pattern(ph, (0, 0, 1), shape=SHAPE, camera_constant_px_A=400, rng=None)
    r = {tuple(h): np.linalg.norm(p - t1.centre_xy) for h, p in zip(t1.hkl.tolist(), t1.xy)}
    assert r[(2, 2, 0)] / r[(2, 0, 0)] == pytest.approx(math.sqrt(2), rel=1e-9)


def test_lattice_finder_refines_centre_and_rejects_extras():
    ph, K, t, xy, centre = _simulated_spots("Ni", (0, 1, 1), 5, n_extra=2, n_missing=2, noise_px=0.1)
    lat = find_lattice_2d(xy, centre)
    assert np.hypot(*(np.array(lat.centre_xy) - t.centre_xy)) < 0.15
    assert np.array_equal(lat.inliers, ~t.extra)


def test_reduce_basis_2d():
    a, b, T = reduce_basis_2d(np.array([10.0, 0.0]), np.array([31.0, 10.0]))
    assert np.linalg.norm(a) <= np.linalg.norm(b)
    assert 60 - 1e-9 <= math.degrees(math.acos(a @ b / np.linalg.norm(a) / np.linalg.norm(b))) <= 90 + 1e-9
    assert abs(round(np.linalg.det(T))) == 1


def test_zone_lattice_basis_is_primitive():
    ph = find_phase("Cu")
    for u in [(0, 0, 1), (1, 1, 1), (1, 2, 3), (3, 1, 0), (5, 3, 1)]:
        a, b = calculate_zone_lattice_basis(ph, u)
        assert a @ u == 0 and b @ u == 0
        assert np.array_equal(np.abs(np.cross(a, b)), np.abs(np.array(u)))


def test_tilt_pair_removes_ambiguity():
    # Two patterns of one Fe grain: [001] and [011], 45° apart (cubic direction angle, common practice)
    ph = find_phase("Fe")
    results = []
    for seed, zone in [(1, (0, 0, 1)), (2, (0, 1, 1))]:
        _, K, t, xy, centre = _simulated_spots("Fe", zone, seed)
        results.append(match_zone_axes(xy, centre, [ph, find_phase("Au")], image_shape=SHAPE, top=10))
    pairs = match_tilt_pair(results[0], results[1], [ph, find_phase("Au")], tilt_deg=45.0)
    assert pairs and pairs[0].candidate_a.phase == "Fe"
    assert pairs[0].angle_deg == pytest.approx(45.0, abs=1.0)
    assert {_family(ph, pairs[0].candidate_a.zone), _family(ph, pairs[0].candidate_b.zone)} == {_family(ph, (0, 0, 1)), _family(ph, (0, 1, 1))}
    assert not match_tilt_pair(results[0], results[1], [ph], tilt_deg=20.0, tolerance_deg=1.0)


def test_bad_input():
    ph = find_phase("Au")
    with pytest.raises(FitError, match="at least 3 spots"):
        match_zone_axes([[10, 10], [20, 20]], [0, 0], [ph])
    with pytest.raises(InputError, match="spots_xy"):
        match_zone_axes(np.zeros((4, 3)), [0, 0], [ph])
    with pytest.raises(InputError, match="phases"):
        match_zone_axes([[10, 0], [0, 10], [-10, 0]], [0, 0], [])
    with pytest.raises(InputError, match="camera_constant_px_A"):
        match_zone_axes([[10, 0], [0, 10], [-10, 0]], [0, 0], [ph], camera_constant_px_A=-3)


def test_nothing_matches_says_so():
    # a square lattice with a spacing that no Au reflection has at this camera constant
    g = 37.0
    xy = np.array([[m * g, n * g] for m in range(-3, 4) for n in range(-3, 4) if (m, n) != (0, 0)]) + 500
    res = match_zone_axes(xy, [500, 500], [find_phase("Au")], camera_constant_px_A=400.0)
    assert res.candidates == () and "no zone axis" in res.notes[0]


def test_calibrated_match_survives_harsh_patterns():
    # A quarter of the spots lost (dynamical extinctions, faint orders), two stray spots, 1.5 %
    # uncorrected ellipticity, 0.5 px noise, a centre 1.5 px off and K 1 % off: the right zone family
    # still comes first (tolerances 2.5 % / 2°, common practice). Stray spots must not talk the
    # lattice finder into a sub-cell: cells are compared by their Friedel-paired spots.
    from saedkit.core.distortion import Ellipse

    hits, n = 0, 0
    for rep in range(2):
        for seed, (name, zone) in enumerate(CASES):
            rng = np.random.default_rng(1000 * rep + seed)
            ph = find_phase(name)
            K = rng.uniform(250, 450)
            _, t = simulate_spot_pattern(ph, zone, shape=SHAPE, camera_constant_px_A=K,
                                         rotation_deg=rng.uniform(0, 360), double_diffraction=True,
                                         ellipse=Ellipse(0.015, rng.uniform(0, 180)), rng=None)
            keep = rng.random(len(t.xy)) > 0.25
            xy = np.vstack([t.xy[keep] + rng.normal(0, 0.5, (keep.sum(), 2)), rng.uniform(100, 900, (2, 2))])
            centre = np.array(t.centre_xy) + rng.normal(0, 1.5, 2)
            res = match_zone_axes(xy, centre, [ph], camera_constant_px_A=K * 1.01, image_shape=SHAPE)
            n += 1
            hits += bool(res.candidates) and _family(ph, res.candidates[0].zone) == _family(ph, zone)
    assert hits / n >= 0.95, (hits, n)
