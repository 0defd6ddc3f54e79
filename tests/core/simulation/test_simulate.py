"""The simulator's ground truth is self-consistent with the crystallography it draws."""

import numpy as np
import pytest

from saedkit.core.distortion import Ellipse
from saedkit.core.crystallography.library import find_phase
from saedkit.core.simulation.render import BeamStop
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern


def test_spot_pattern_truth_obeys_camera_equation_and_zone_law():
    si = find_phase("Si")
    img, t = simulate_spot_pattern(si, (0, 1, 1), camera_constant_px_A=320, rotation_deg=23,
                                   ellipse=Ellipse(0.0), rng=np.random.default_rng(3))
    assert img.dtype == np.uint16 and img.shape == (512, 512)
    r = np.hypot(*(t.xy - t.centre_xy).T)
    # camera equation R = K/d (small-angle form, DESIGN.md)
    assert r == pytest.approx(320 / t.d_A, rel=1e-9)
    # every spot in the zero-order Laue zone: h·u = 0 (Weiss zone law)
    assert np.all(t.hkl @ np.array([0, 1, 1]) == 0)
    # Friedel pairs: g and −g both present, symmetric about the centre
    pairs = {tuple(h) for h in t.hkl.tolist()}
    inner = [tuple(h) for h, rr in zip(t.hkl.tolist(), r) if rr < 200]
    assert len(inner) >= 10 and all(tuple(-np.array(h)) in pairs for h in inner)
    # fcc [011]: 11̄1-type and 1̄1̄1-type at 70.53°, 022 at 35.26° to 111 (Edington 1976, standard
    # patterns; Cullity & Stock angle table; from memory). Si 200 is kinematically absent here.
    v = {tuple(h): p - t.centre_xy for h, p in zip(t.hkl.tolist(), t.xy)}
    ang = lambda a, b: np.degrees(np.arccos(v[a] @ v[b] / np.linalg.norm(v[a]) / np.linalg.norm(v[b])))  # noqa: E731
    assert ang((1, 1, -1), (-1, 1, -1)) == pytest.approx(70.53, abs=0.01)
    assert ang((1, 1, -1), (0, 2, -2)) == pytest.approx(35.26, abs=0.01)
    assert (2, 0, 0) not in v


def test_double_diffraction_adds_only_forbidden_non_centring_spots():
    si = find_phase("Si")
    _, t0 = simulate_spot_pattern(si, (0, 1, 1), camera_constant_px_A=320, rng=None)
    _, t1 = simulate_spot_pattern(si, (0, 1, 1), camera_constant_px_A=320, double_diffraction=True, rng=None)
    added = {tuple(h) for h in t1.hkl[t1.forbidden].tolist()}
    kinematic = {tuple(h) for h in t0.hkl.tolist()}
    # Si [011]: 200 appears by double diffraction, 200 = 11̄1 + 111̄ (Williams & Carter ch. 13, from memory)
    assert (1, -1, 1) in kinematic and (1, 1, -1) in kinematic
    assert (2, 0, 0) in added and (-2, 0, 0) in added
    assert not t0.forbidden.any()

    def diamond_allowed(h, k, l):  # International Tables Vol. A, Fd-3m 8a
        return len({h % 2, k % 2, l % 2}) == 1 and (h % 2 == 1 or (h + k + l) % 4 == 0)

    # every added spot is forbidden by the diamond rule but fcc-centring allowed (all even,
    # h + k + l = 4n + 2), lies in the zone, and is the sum of two kinematic reflections of it
    for h in added:
        assert not diamond_allowed(*h) and all(v % 2 == 0 for v in h) and h[1] + h[2] == 0, h
        assert any(tuple(np.subtract(h, p)) in kinematic for p in kinematic), h
    assert all(diamond_allowed(*h) for h in kinematic)


def test_ring_pattern_truth_gold():
    au = find_phase("Au")
    img, t = simulate_ring_pattern(au, camera_constant_px_A=250, ellipse=Ellipse(0.02, 30),
                                   beam_stop=BeamStop(angle_deg=120), rng=np.random.default_rng(5))
    assert t.hkl[:4] == ((1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1))
    # radius ratios of an fcc standard: √(4/3), √(8/3), √(11/3) (fcc geometry, common practice)
    assert t.radius_px[1:4] / t.radius_px[0] == pytest.approx([1.1547, 1.6330, 1.9149], abs=1e-4)
    assert t.radius_px[0] == pytest.approx(250 / 2.3545, rel=1e-4)
