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


def _ring_power(img, centre, R, half=6.0, bg_from=(8.0, 12.0)):
    """Integrated counts in an annulus about R above the local background (plain numpy)."""
    yy, xx = np.indices(img.shape)
    r = np.hypot(xx - centre[0], yy - centre[1])
    band = np.abs(r - R) < half
    side = (np.abs(r - R) >= bg_from[0]) & (np.abs(r - R) < bg_from[1])
    return float(np.sum(img[band] - np.median(img[side])))


@pytest.mark.parametrize("effect", [dict(spots_per_ring=30.0), dict(texture_arc_deg=30.0, texture_arcs=2)])
def test_spotty_and_textured_rings_keep_each_ring_power(effect):
    # a few-grain or textured film redistributes a ring's intensity around it but keeps its
    # total (kinematic powder intensity m|F|²): compare the integrated ring with the plain ring
    au = find_phase("Au")
    kw = dict(camera_constant_px_A=250.0, centre_xy=(255.3, 256.2), background_counts=0.0, rng=None)
    plain, t = simulate_ring_pattern(au, **kw)
    img, t2 = simulate_ring_pattern(au, **kw, **effect)
    assert np.allclose(t2.radius_px, t.radius_px)
    for R in t.radius_px[:3]:
        assert _ring_power(img.astype(float), t.centre_xy, R) == pytest.approx(
            _ring_power(plain.astype(float), t.centre_xy, R), rel=0.05)
    # and it is no longer uniform around the ring: the azimuthal spread along the 111 ring is large
    yy, xx = np.indices(img.shape)
    on = np.abs(np.hypot(xx - 255.3, yy - 256.2) - t.radius_px[0]) < 1.0
    assert np.std(img[on].astype(float)) > 3 * np.std(plain[on].astype(float))


def test_halo_and_admixture_truth():
    au, nacl = find_phase("Au"), find_phase("NaCl")
    img, t = simulate_ring_pattern(au, camera_constant_px_A=250.0, centre_xy=(255.0, 256.0), halo_counts=800.0,
                                   admixture=[(nacl, 0.5)], background_counts=0.0, rng=None)
    # the admixed phase's rings obey R = K/d with NaCl's own spacings (a = 5.6402 Å, Walker et al. 2004;
    # rock salt 200 at a/2)
    (tn,) = t.admixture
    assert tn.phase == "NaCl" and tn.hkl[1] == (2, 0, 0)
    assert tn.d_A[1] == pytest.approx(5.6402 / 2, rel=1e-4)
    assert np.allclose(tn.radius_px, 250.0 / tn.d_A)
    assert tn.relative_intensity.max() == pytest.approx(0.5)
    assert "admixture" in t.to_dict()
    # the halo alone (noiseless difference with and without it): a Gaussian hump of height 800 at
    # R = K/2.1 Å with σ = K·0.08 Å⁻¹ = 20 px
    no_halo, _ = simulate_ring_pattern(au, camera_constant_px_A=250.0, centre_xy=(255.0, 256.0),
                                       admixture=[(nacl, 0.5)], background_counts=0.0, rng=None)
    halo = img.astype(float) - no_halo.astype(float)
    yy, xx = np.indices(img.shape)
    r = np.hypot(xx - 255.0, yy - 256.0)
    for dr in (0.0, 20.0, -20.0):
        on = np.abs(r - (250.0 / 2.1 + dr)) < 0.5
        assert np.mean(halo[on]) == pytest.approx(800.0 * np.exp(-0.5 * (dr / 20.0) ** 2), abs=2.0)
