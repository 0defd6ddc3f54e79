"""Zone-axis matching of spot patterns placed by hand, one per crystal system.

The spots are not made by saedkit's simulator: each pattern is built here from the cell by the
textbook metric-tensor formulas (De Graef & McHenry, *Structure of Materials*, ch. 4–6;
International Tables Vol. B ch. 1.1), with the reflection rules of International Tables Vol. A
typed in: 1/d² = hᵀG*h, cos φ = h₁ᵀG*h₂/(|g₁||g₂|), the zone law h·u = 0, and the sense of
rotation from the Weiss zone law (h₁ × h₂ is parallel to the zone axis). The spot of (hkl)
lies at K·|g| from the centre, K = λL/p in pixel·Å.
"""

import math
from itertools import product
from pathlib import Path

import numpy as np
import pytest

from saedkit.core.crystallography.crystal import read_phase_cif
from saedkit.core.crystallography.library import find_phase
from saedkit.core.crystallography.structure_factors import canonical_indices
from saedkit.core.indexing.matching import match_zone_axes

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "cif"
SHAPE = (1024, 1024)
CENTRE = np.array([511.3, 508.7])


def _reciprocal_metric(a, b, c, al, be, ga):
    """G* = G⁻¹ with G_ij = a_i · a_j from the six cell parameters."""
    ca, cb, cg = (math.cos(math.radians(x)) for x in (al, be, ga))
    G = np.array([[a * a, a * b * cg, a * c * cb], [a * b * cg, b * b, b * c * ca], [a * c * cb, b * c * ca, c * c]])
    return G, np.linalg.inv(G)


# The reflection rules (International Tables Vol. A): which (hkl) of the cell have F ≠ 0
def _fcc(h, k, l):
    return len({h % 2, k % 2, l % 2}) == 1


def _primitive(h, k, l):
    return True


def _hcp_2c(h, k, l):
    # P6_3/mmc with atoms on 2c: F = 0 when h + 2k = 3n and l odd (REFERENCES.md)
    return not ((h + 2 * k) % 3 == 0 and l % 2 == 1)


def _rhombohedral_obverse(h, k, l):
    # R centring on hexagonal axes (obverse): −h + k + l = 3n
    return (-h + k + l) % 3 == 0


def _hand_placed(cell, rule, zone, *, d_min_A, K, rotation_deg):
    """Spot positions [x, y] and the hkl of each, for the zero-order Laue zone of [uvw]."""
    _, Gs = _reciprocal_metric(*cell)
    u = np.array(zone)
    refl = []
    for h in product(range(-8, 9), repeat=3):
        h = np.array(h)
        if not h.any() or h @ u != 0 or not rule(*h):
            continue
        g = math.sqrt(h @ Gs @ h)
        if 1 / g >= d_min_A:
            refl.append((g, tuple(int(v) for v in h)))
    refl.sort()
    g1, h1 = refl[0]
    h1 = np.array(h1)
    xy, hkls = [], []
    for g, h in refl:
        hv = np.array(h)
        cos_phi = np.clip(h1 @ Gs @ hv / (g1 * g), -1, 1)
        sense = np.sign(np.cross(h1, hv) @ u) or 1.0  # h1 × h ∥ ±[uvw] (Weiss zone law)
        phi = sense * math.acos(cos_phi) + math.radians(rotation_deg)
        xy.append(CENTRE + K * g * np.array([math.cos(phi), math.sin(phi)]))
        hkls.append(h)
    return np.array(xy), hkls


def _cif(name):
    return read_phase_cif(FIXTURES / name)


# (crystal system, phase, rule, zone, d_min); library phases where the system has one, CIFs in
# tests/fixtures/cif otherwise (each names its cell's source)
CASES = [
    ("cubic", lambda: find_phase("Au"), _fcc, (0, 1, 1), 0.8),
    ("cubic", lambda: find_phase("Au"), _fcc, (1, 1, 2), 0.75),
    ("tetragonal", lambda: _cif("hon_tetragonal_p4mmm.cif"), _primitive, (1, 0, 0), 0.95),
    ("tetragonal", lambda: _cif("hon_tetragonal_p4mmm.cif"), _primitive, (1, 1, 1), 0.9),
    ("orthorhombic", lambda: _cif("hon_orthorhombic_pmmm.cif"), _primitive, (0, 0, 1), 1.2),
    ("orthorhombic", lambda: _cif("hon_orthorhombic_pmmm.cif"), _primitive, (0, 1, 1), 1.1),
    ("hexagonal", lambda: find_phase("Ti"), _hcp_2c, (0, 1, 0), 0.8),
    ("hexagonal", lambda: find_phase("Ti"), _hcp_2c, (0, 0, 1), 0.75),
    ("trigonal", lambda: _cif("hon_trigonal_hg_r-3m.cif"), _rhombohedral_obverse, (1, 0, 0), 0.8),
    ("trigonal", lambda: _cif("hon_trigonal_hg_r-3m.cif"), _rhombohedral_obverse, (0, 0, 1), 0.7),
    ("monoclinic", lambda: _cif("hon_monoclinic_p2m.cif"), _primitive, (0, 1, 0), 1.2),
    ("monoclinic", lambda: _cif("hon_monoclinic_p2m.cif"), _primitive, (1, 0, 1), 1.1),
    ("triclinic", lambda: _cif("hon_triclinic_p-1.cif"), _primitive, (0, 0, 1), 1.5),
    ("triclinic", lambda: _cif("hon_triclinic_p-1.cif"), _primitive, (1, 0, 0), 1.4),
]


def _family(phase, uvw):
    return tuple(canonical_indices(phase.calculate_equivalent_directions(uvw)))


@pytest.mark.parametrize("calibrated", [True, False])
@pytest.mark.parametrize("system, make, rule, zone, d_min", CASES, ids=[f"{c[0]}-{''.join(map(str, c[3]))}" for c in CASES])
def test_hand_placed_pattern_gives_the_right_zone_first(system, make, rule, zone, d_min, calibrated):
    rng = np.random.default_rng(sum(zone) + int(100 * d_min))
    phase = make()
    K = 320.0
    xy, hkls = _hand_placed(phase.cell.parameters, rule, zone, d_min_A=d_min, K=K, rotation_deg=rng.uniform(0, 360))
    assert len(xy) >= 8, "the pattern needs enough spots"
    assert np.all((xy > 10) & (xy < SHAPE[0] - 10)), "spots must lie on the detector"
    xy = xy + rng.normal(0, 0.2, xy.shape)  # 0.2 px position noise
    res = match_zone_axes(xy, CENTRE + rng.normal(0, 0.5, 2), [phase], image_shape=SHAPE,
                          camera_constant_px_A=K if calibrated else None)
    assert res.candidates, f"{system} {zone}: no candidate ({'; '.join(res.notes)})"
    best = res.candidates[0]
    assert _family(phase, best.zone) == _family(phase, zone), (system, zone, best.zone)
    # independent check of the indexing: the spacing of each spot's assigned (hkl), from the test's
    # own metric, equals the spacing of the reflection that was placed there (within 1 %)
    _, Gs = _reciprocal_metric(*phase.cell.parameters)
    placed = {tuple(np.round(p, 1)): h for p, h in zip(xy, hkls)}
    n_checked = 0
    for s in best.spots:
        if s.hkl is None:
            continue
        h_placed = placed.get(tuple(np.round([s.x, s.y], 1)))
        if h_placed is None:
            continue
        d_assigned = 1 / math.sqrt(np.array(s.hkl) @ Gs @ np.array(s.hkl))
        d_placed = 1 / math.sqrt(np.array(h_placed) @ Gs @ np.array(h_placed))
        assert d_assigned == pytest.approx(d_placed, rel=0.01)
        n_checked += 1
    assert n_checked >= 0.9 * len(xy)
    if not calibrated:
        # K fitted from the pattern alone: within 1 % of the value used to place the spots
        assert best.camera_constant_px_A == pytest.approx(K, rel=0.01)


def test_hand_placed_metric_reproduces_textbook_angles():
    # the test's own construction against published angles (REFERENCES.md, Cullity & Stock tables):
    # fcc [011]: the two shortest g, 11̄1 and 1̄1̄1, make 70.53°; 200 lies at 54.74° from 11̄1
    _, Gs = _reciprocal_metric(4.0782, 4.0782, 4.0782, 90, 90, 90)

    def ang(h1, h2):
        h1, h2 = np.array(h1), np.array(h2)
        return math.degrees(math.acos(h1 @ Gs @ h2 / math.sqrt((h1 @ Gs @ h1) * (h2 @ Gs @ h2))))

    assert ang((1, -1, 1), (-1, -1, 1)) == pytest.approx(70.53, abs=0.01)
    assert ang((1, -1, 1), (2, 0, 0)) == pytest.approx(54.74, abs=0.01)
    assert ang((1, 1, 1), (3, 1, 1)) == pytest.approx(29.50, abs=0.01)
    # hcp Ti: d(0002) = c/2 and d(10-10) = a√3/2 (a = 2.9508, c = 4.6855 Å, Wyckoff, from memory)
    _, Gh = _reciprocal_metric(2.9508, 2.9508, 4.6855, 90, 90, 120)
    assert 1 / math.sqrt(np.array([0, 0, 2]) @ Gh @ np.array([0, 0, 2])) == pytest.approx(4.6855 / 2)
    assert 1 / math.sqrt(np.array([1, 0, 0]) @ Gh @ np.array([1, 0, 0])) == pytest.approx(2.9508 * math.sqrt(3) / 2)
