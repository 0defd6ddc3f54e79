"""Camera-constant calibration: ring indexing without K, joint fits, checks, spots, applying K.

Simulated patterns (invented data, :mod:`saedkit.core.simulation.simulate`) with known K,
centre and ellipse. The image sizes are small (512–1280 px), so K is scaled
down with them: the real-world range K ≈ 800–2500 px·Å belongs to 2k–4k
cameras (REFERENCES.md, "Practice": cameras 2k–4k, common practice); K = 800
appears here on a 1280-px image and K = 2500 on a 4k image (marked slow).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from saedkit.core.calibration.calibrate import (
    Calibration,
    calculate_corrected_radius_array,
    calculate_d_from_offset_array,
    calculate_d_from_radius_array,
    calculate_d_sigma_array,
    calculate_d_sigma_from_radius_array,
    calibrate_from_rings,
    calibrate_from_spots,
    find_ring_indexing,
    fit_camera_constant,
)
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import CrystalError, FitError, InputError, SaedkitError
from saedkit.core.crystallography.library import find_phase
from saedkit.core.detection.masks import find_auto_mask
from saedkit.core.optics import calculate_radius_px
from saedkit.core.simulation.render import BeamStop
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern

# Au a = 4.0782 Å: Maeland & Flanagan, Can. J. Phys. 42, 2364 (1964).
# fcc ring sequence h² + k² + l² = 3, 4, 8, 11, 12, 16 (International Tables Vol. A reflection rule).
AU_A = 4.0782
FCC_N = np.array([3, 4, 8, 11, 12, 16, 19, 20, 24])


def _ring_case(phase, n, K, e, phi, seed, *, offset=(0.0, 0.0), beam_stop_deg=60.0, peak_counts=1500.0,
               truth_mask=False):
    rng = np.random.default_rng(seed)
    centre = (n / 2 - 0.5 + offset[0], n / 2 - 0.5 + offset[1])
    bs = BeamStop(angle_deg=beam_stop_deg)
    img, truth = simulate_ring_pattern(find_phase(phase), shape=(n, n), camera_constant_px_A=K,
                                       ellipse=Ellipse(e, phi), centre_xy=centre, beam_stop=bs, rng=rng,
                                       peak_counts=peak_counts)
    if truth_mask:
        mask = bs.mask_array(img.shape, centre)
    else:
        mask = find_auto_mask(img.astype(np.float32), saturation_value=65535)
    return img, truth, mask


def _angle_diff_deg(a, b):
    return abs((a - b + 90.0) % 180.0 - 90.0)


# --------------------------------------------------------------------------- pure math on radii


def test_fit_camera_constant_one_parameter_least_squares():
    d = AU_A / np.sqrt(FCC_N[:5])
    R = 300.0 / d
    K, sK, chi2 = fit_camera_constant(R, d, radius_sigma_px=np.full(5, 0.01))
    assert K == pytest.approx(300.0, rel=1e-12)
    assert chi2 == pytest.approx(0.0, abs=1e-12)
    # a misfit far beyond the stated radius σ widens σ_K (σ from the scatter, not from the claim)
    R2 = R + np.array([0.1, -0.1, 0.1, -0.1, 0.1])
    K2, sK2, chi2b = fit_camera_constant(R2, d, radius_sigma_px=np.full(5, 0.01))
    assert chi2b > 1 and sK2 > 5 * sK


def test_sigma_k_against_monte_carlo_of_noisy_radii():
    # 4000 fits of the six Au rings with Gaussian radius noise of known σ (a pull test, no formula of
    # the implementation): the scatter of K about the truth must be what σ_K says. With σ given, the
    # fit may only widen σ_K (by the Birge ratio when χ² > 1), so the pulls' standard deviation lies
    # a little below 1; their scatter in pixel·Å must match the median σ_K within a few per cent.
    rng = np.random.default_rng(2024)
    d = AU_A / np.sqrt(FCC_N[:6])
    sig = np.array([0.05, 0.05, 0.08, 0.1, 0.1, 0.15])
    fits = [fit_camera_constant(300.0 / d + rng.normal(0, sig), d, radius_sigma_px=sig) for _ in range(4000)]
    K = np.array([f[0] for f in fits])
    sK = np.array([f[1] for f in fits])
    assert np.std(K - 300.0) == pytest.approx(np.median(sK), rel=0.04)
    pulls = (K - 300.0) / sK
    assert 0.88 < np.std(pulls) < 1.03
    assert abs(np.mean(pulls)) < 0.05
    # σ not given: σ_K comes from the residuals of six rings, so the pulls follow Student's t with
    # ν = 5 degrees of freedom (standard deviation sqrt(ν/(ν − 2)) = 1.291; scipy.stats.t)
    from scipy import stats

    fits = [fit_camera_constant(300.0 / d + rng.normal(0, 0.1, 6), d) for _ in range(4000)]
    pulls = np.array([(k - 300.0) / s for k, s, _ in fits])
    assert np.std(pulls) == pytest.approx(stats.t(df=5).std(), rel=0.05)
    # the 68.27 % point of |t₅| (1.111) is robust to the tails
    assert np.percentile(np.abs(pulls), 68.27) == pytest.approx(stats.t(df=5).ppf(0.5 + 0.6827 / 2), rel=0.04)


def test_fit_camera_constant_exact_camera_equation():
    # R = L·tan 2θ with L/p = K/λ (optics module); the exact fit recovers K, the small-angle one is off by ~1e-4
    d = AU_A / np.sqrt(FCC_N[:6])
    R = calculate_radius_px(d, 1500.0, exact=True, voltage_kv=200)
    K_exact, _, _ = fit_camera_constant(R, d, exact=True, voltage_kv=200)
    K_small, _, _ = fit_camera_constant(R, d)
    assert K_exact == pytest.approx(1500.0, rel=1e-10)
    assert 1e-5 < K_small / 1500.0 - 1 < 3e-4  # Au at 200 kV: 4e-5 to 1.1e-4 (REFERENCES.md, [calc])
    with pytest.raises(InputError, match="voltage_kv"):
        fit_camera_constant(R, d, exact=True)


def test_fit_camera_constant_bad_input():
    with pytest.raises(InputError, match="equal-length"):
        fit_camera_constant([1.0, 2.0], [1.0])
    with pytest.raises(InputError, match="> 0"):
        fit_camera_constant([1.0, -2.0], [1.0, 1.0])


def test_find_ring_indexing_without_k_and_rejects_sub_multiples():
    d = AU_A / np.sqrt(FCC_N)
    rng = np.random.default_rng(5)
    R = 420.0 / d[:6] * (1 + rng.normal(0, 2e-4, 6))
    res = find_ring_indexing(R, d)
    assert res.family_index.tolist() == [0, 1, 2, 3, 4, 5]
    assert res.camera_constant_px_A == pytest.approx(420.0, rel=1e-3)
    # at K/2 every fcc ring lines up with another fcc ring (h,k,l → 2h,2k,2l), but then many
    # families would be predicted between the measured rings and are not there
    assert not np.isclose(res.camera_constant_px_A, 210.0, rtol=1e-2)
    # only the outer rings (222, 400, 331, 420, 422): at 2K the 222 and 400 rings would pass for
    # 111 and 200 — leaving three measured rings unexplained
    R_outer = 420.0 / d[[4, 5, 6, 7, 8]]
    res = find_ring_indexing(R_outer, d, radius_range_px=(0.5 * R_outer.min(), 1.01 * R_outer.max()))
    assert res.family_index.tolist() == [4, 5, 6, 7, 8]
    assert res.camera_constant_px_A == pytest.approx(420.0, rel=1e-6)


def test_find_ring_indexing_leaves_foreign_ring_unassigned():
    d = AU_A / np.sqrt(FCC_N[:6])
    R = np.sort(np.append(300.0 / d, 160.0))  # 160 px matches no Au ring at K = 300
    res = find_ring_indexing(R, d)
    assert res.camera_constant_px_A == pytest.approx(300.0, rel=1e-9)
    assert res.family_index[np.argmin(np.abs(R - 160.0))] == -1
    assert np.count_nonzero(res.family_index >= 0) == 6


def test_find_ring_indexing_nothing_to_match():
    assert find_ring_indexing([], [2.0, 1.0]) is None


# --------------------------------------------------------------------------- ring patterns

# (phase, image side, K, ellipticity, major axis, seed, centre offset): K spans the real-world range
# scaled to the image (see the module docstring), e from 0 to 3 %.
RING_CASES = [
    ("Au", 512, 220.0, 0.000, 0.0, 1, (9.3, -6.2)),
    ("Au", 512, 250.0, 0.012, 35.0, 2, (-14.1, 8.7)),
    ("Al", 640, 300.0, 0.030, 120.0, 3, (6.6, 12.4)),
    ("Au", 768, 360.0, 0.020, 75.0, 4, (-20.0, -11.0)),
    ("Al", 768, 420.0, 0.008, 160.0, 5, (3.0, 17.5)),
    ("Au", 1280, 800.0, 0.015, 10.0, 6, (-7.7, 4.4)),
]


@pytest.mark.parametrize("phase,n,K,e,phi,seed,offset", RING_CASES)
def test_calibrate_from_rings_recovers_truth(phase, n, K, e, phi, seed, offset):
    img, truth, mask = _ring_case(phase, n, K, e, phi, seed, offset=offset, beam_stop_deg=40.0 + 50 * seed)
    cal = calibrate_from_rings(img, find_phase(phase), voltage_kv=200, mask=mask)
    assert isinstance(cal, Calibration) and cal.method == "rings" and cal.fit == "joint"
    # K within 0.1 % (acceptance), and consistent with its own uncertainty
    assert abs(cal.camera_constant_px_A / K - 1) < 1e-3
    assert abs(cal.camera_constant_px_A - K) < 4 * cal.camera_constant_sigma_px_A
    assert abs(cal.ellipse.ellipticity - e) < 0.002
    if e >= 0.01:
        assert _angle_diff_deg(cal.ellipse.major_axis_deg, phi) < 3.0
    assert np.hypot(cal.centre.x - truth.centre_xy[0], cal.centre.y - truth.centre_xy[1]) < 0.1
    # every ring is assigned to the right family
    assert [r.hkl for r in cal.rings] == list(truth.hkl)
    assert cal.quality == "good", cal.warnings
    assert cal.standard == phase
    json.dumps(cal.to_dict(), allow_nan=False)


def _ring_pulls(n_fits, size):
    """(K_fit − K_true)/σ_K over n_fits simulated Au films with independent Poisson noise."""
    au = find_phase("Au")
    pulls = []
    for seed in range(n_fits):
        rng = np.random.default_rng(1000 + seed)
        K = 0.42 * size
        centre = (size / 2 - 0.5 + rng.uniform(-3, 3), size / 2 - 0.5 + rng.uniform(-3, 3))
        img, _ = simulate_ring_pattern(au, shape=(size, size), camera_constant_px_A=K, ellipse=Ellipse(0.01, 30.0),
                                       centre_xy=centre, rng=rng, peak_counts=300.0)
        cal = calibrate_from_rings(img, au, voltage_kv=200)
        pulls.append((cal.camera_constant_px_A - K) / cal.camera_constant_sigma_px_A)
    return np.array(pulls)


@pytest.mark.slow
def test_sigma_k_of_ring_calibration_pull():
    # the whole chain (ring radii from the image, joint fit) over 80 independent noisy 256-px
    # images: the scatter of K about the truth over σ_K has standard deviation 1 when σ_K is
    # honest (80 fits know it to ±8 %); a σ_K two or ten times too small fails. About a minute,
    # hence slow; the fast check of σ_K is the Monte Carlo of fit_camera_constant above.
    pulls = _ring_pulls(80, 256)
    assert 0.75 < np.std(pulls) < 1.2
    assert abs(np.mean(pulls)) < 0.35


def test_calibrate_with_truth_mask_and_centre_guess():
    img, truth, mask = _ring_case("Au", 512, 240.0, 0.02, 100.0, 11, offset=(-12.0, 5.0), truth_mask=True)
    cal = calibrate_from_rings(img, "Au", voltage_kv=300, mask=mask,
                               centre_guess_xy=np.array(truth.centre_xy) + [2.5, -1.5])
    assert abs(cal.camera_constant_px_A / 240.0 - 1) < 1e-3
    assert abs(cal.ellipse.ellipticity - 0.02) < 0.002
    assert _angle_diff_deg(cal.ellipse.major_axis_deg, 100.0) < 3.0


def test_au_standard_ratio_and_wrong_standard_is_flagged():
    # Au with a = 4.0782 Å (Maeland & Flanagan, Can. J. Phys. 42, 2364 (1964)): K/K_true = 1 within 0.1 %
    au, al = find_phase("Au"), find_phase("Al")
    assert au.cell.a == pytest.approx(AU_A)
    img, truth, mask = _ring_case("Au", 640, 280.0, 0.01, 60.0, 21)
    cal = calibrate_from_rings(img, au, voltage_kv=200, mask=mask)
    assert cal.camera_constant_px_A / 280.0 == pytest.approx(1.0, abs=1e-3)
    assert cal.quality == "good"
    # The same pattern calibrated as Al: both fcc, so the radius ratios are identical and the rings
    # line up at K·a_Al/a_Au — only the ring intensities show that the film is not Al (Al scatters far
    # more weakly at high angle than Au; electron scattering factors, International Tables Vol. C 4.3.2.2).
    wrong = calibrate_from_rings(img, al, voltage_kv=200, mask=mask)
    assert wrong.camera_constant_px_A / 280.0 == pytest.approx(al.cell.a / AU_A, abs=1e-3)
    assert wrong.quality == "poor"
    assert any("intensities do not follow Al" in w for w in wrong.warnings)


def test_wrong_standard_with_other_ratios_leaves_rings_unassigned():
    # Au rings calibrated as Si (diamond: 200 and 222 absent): the Au 200 and 222 rings match nothing
    img, truth, mask = _ring_case("Au", 512, 250.0, 0.0, 0.0, 22)
    cal = calibrate_from_rings(img, "Si", voltage_kv=200, mask=mask)
    assert cal.quality == "poor"
    assert len(cal.unassigned_radii_px) >= 2
    assert any("standard may be wrong" in w for w in cal.warnings)


def test_large_ellipticity_is_corrected_and_warned():
    img, truth, mask = _ring_case("Al", 640, 300.0, 0.045, 20.0, 23)
    cal = calibrate_from_rings(img, "Al", voltage_kv=200, mask=mask)
    assert abs(cal.ellipse.ellipticity - 0.045) < 0.002
    assert abs(cal.camera_constant_px_A / 300.0 - 1) < 1e-3
    assert any("stigmators" in w for w in cal.warnings)


def test_too_few_rings_is_poor():
    # K = 500 on a 512-px image: only 111 and 200 of Au fit on the detector
    img, truth, mask = _ring_case("Au", 512, 500.0, 0.01, 45.0, 24)
    cal = calibrate_from_rings(img, "Au", voltage_kv=200, mask=mask)
    assert len(cal.rings) == len(truth.hkl) == 2
    assert [r.hkl for r in cal.rings] == [(1, 1, 1), (2, 0, 0)]
    assert abs(cal.camera_constant_px_A / 500.0 - 1) < 1e-3
    assert cal.quality == "poor" and any("only 2 rings" in w for w in cal.warnings)


def test_weak_pattern_still_within_tolerance():
    img, truth, mask = _ring_case("Au", 512, 230.0, 0.015, 140.0, 25, peak_counts=80.0)
    cal = calibrate_from_rings(img, "Au", voltage_kv=200, mask=mask)
    assert abs(cal.camera_constant_px_A / 230.0 - 1) < 1e-3
    assert [r.hkl for r in cal.rings] == list(truth.hkl)


def test_camera_length_from_pixel_size_and_pattern_image():
    from saedkit.core.imageio import pattern_from_array
    from saedkit.core.optics import calculate_wavelength_A

    img, truth, mask = _ring_case("Au", 512, 250.0, 0.0, 0.0, 26)
    pimg = pattern_from_array(img, pixel_size_um=14.0, voltage_kv=200)
    cal = calibrate_from_rings(pimg, "Au", voltage_kv=200, mask=mask)
    K = cal.camera_constant_px_A
    # λL = K·p and L = K·p/λ (camera equation R·d = λL; DESIGN.md conventions)
    assert cal.lambda_L_mm_A == pytest.approx(K * 14e-3)
    assert cal.camera_length_mm == pytest.approx(K * 14e-3 / calculate_wavelength_A(200))
    # the camera length carries the fit's σ and the reproducibility of K as separate parts, total in quadrature
    assert cal.camera_length_stat_sigma_mm == pytest.approx(cal.camera_length_mm * cal.camera_constant_rel_sigma)
    assert cal.camera_length_sys_sigma_mm == pytest.approx(cal.camera_length_mm * cal.reproducibility_pct / 100)
    assert cal.camera_length_sigma_mm == pytest.approx(math.hypot(cal.camera_length_stat_sigma_mm,
                                                                  cal.camera_length_sys_sigma_mm))
    assert cal.image_sha256 == pimg.sha256
    rec = cal.to_dict()
    for key in ("camera_constant_px_A", "camera_constant_rel_sigma", "ellipse", "rings", "camera_length_mm",
                "lambda_L_mm_A", "centre_px", "warnings"):
        assert key in rec
    assert set(rec["ellipse"]) >= {"ellipticity", "major_axis_deg", "ellipticity_sigma", "major_axis_sigma_deg"}
    assert set(rec["rings"][0]) >= {"hkl", "d_A", "radius_px", "radius_sigma_px", "residual_px", "residual_pct"}
    assert "profile" not in rec and "profile" in cal.to_dict(include_profile=True)
    no_px = calibrate_from_rings(img, "Au", voltage_kv=200, mask=mask)
    assert no_px.camera_length_mm is None and no_px.lambda_L_mm_A is None


def test_progress_and_stop():
    img, truth, mask = _ring_case("Au", 512, 250.0, 0.0, 0.0, 27)
    seen = []
    calibrate_from_rings(img, "Au", voltage_kv=200, mask=mask, progress=lambda d, t: seen.append((d, t)))
    assert seen and seen[-1][0] == seen[-1][1]
    with pytest.raises(FitError, match="stopped"):
        calibrate_from_rings(img, "Au", voltage_kv=200, mask=mask, should_stop=lambda: True)


def test_calibrate_from_rings_bad_input():
    img, truth, mask = _ring_case("Au", 256, 110.0, 0.0, 0.0, 28)
    with pytest.raises(InputError, match="voltage_kv"):
        calibrate_from_rings(img, "Au", voltage_kv=-5)
    with pytest.raises(CrystalError, match="unknown phase"):
        calibrate_from_rings(img, "unobtainium", voltage_kv=200)
    with pytest.raises(InputError, match="mask"):
        calibrate_from_rings(img, "Au", voltage_kv=200, mask=np.zeros((3, 3), bool))
    with pytest.raises(SaedkitError):
        calibrate_from_rings(np.full((64, 64), 100.0) + np.random.default_rng(0).normal(0, 1, (64, 64)),
                             "Au", voltage_kv=200)


@pytest.mark.slow
def test_real_world_camera_constant_on_4k_image():
    # K = 2500 px·Å on a 4k camera: the top of the real-world range (common practice)
    img, truth, mask = _ring_case("Au", 4096, 2500.0, 0.012, 55.0, 29)
    cal = calibrate_from_rings(img, "Au", voltage_kv=200, mask=mask)
    assert abs(cal.camera_constant_px_A / 2500.0 - 1) < 1e-3
    assert [r.hkl for r in cal.rings] == list(truth.hkl)
    assert abs(cal.ellipse.ellipticity - 0.012) < 0.002


# --------------------------------------------------------------------------- spots


def _si_case(K, e, phi, rot, seed, noise_px=0.3, n=768):
    rng = np.random.default_rng(seed)
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(n, n), camera_constant_px_A=K,
                                       rotation_deg=rot, ellipse=Ellipse(e, phi), rng=rng)
    xy = truth.xy + rng.normal(0, noise_px, truth.xy.shape)
    off = truth.xy - np.array(truth.centre_xy)
    r = np.hypot(*off.T)
    order = np.argsort(r)
    i1 = order[0]
    i2 = next(j for j in order[1:] if abs(off[i1, 0] * off[j, 1] - off[i1, 1] * off[j, 0]) > 0.3 * r[i1] * r[j])
    refl = [(xy[i1], tuple(truth.hkl[i1])), (xy[i2], tuple(truth.hkl[i2]))]
    return img, truth, xy, refl


@pytest.mark.parametrize("K,e,phi,rot,seed", [(400.0, 0.02, 35.0, 17.0, 1), (520.0, 0.02, 120.0, -70.0, 2),
                                             (600.0, 0.0, 0.0, 40.0, 3)])
def test_calibrate_from_spots_si_011(K, e, phi, rot, seed):
    img, truth, xy, refl = _si_case(K, e, phi, rot, seed)
    centre0 = np.array(truth.centre_xy) + [0.4, -0.3]
    cal = calibrate_from_spots(xy, centre0, find_phase("Si"), voltage_kv=200, reflections=refl)
    assert cal.method == "spots" and cal.fit == "affine"
    assert abs(cal.camera_constant_px_A / K - 1) < 2e-3  # acceptance: 0.2 %
    assert abs(cal.ellipse.ellipticity - e) < 0.003
    if e >= 0.01:
        assert _angle_diff_deg(cal.ellipse.major_axis_deg, phi) < 5.0
    # every spot indexed as in the truth
    truth_hkl = {tuple(np.round(p, 3)): tuple(h) for p, h in zip(xy, truth.hkl)}
    assert len(cal.rings) == len(truth.hkl)
    assert {r.hkl for r in cal.rings} == set(truth_hkl.values())
    assert cal.quality == "good", cal.warnings
    assert np.hypot(cal.centre.x - truth.centre_xy[0], cal.centre.y - truth.centre_xy[1]) < 0.2


def test_calibrate_from_detected_spots():
    from saedkit.core.detection.spots import find_spots

    img, truth, _, _ = _si_case(450.0, 0.02, 60.0, 25.0, 7)
    spots = find_spots(img, centre_xy=truth.centre_xy)
    det = np.array([[s.x, s.y] for s in spots])

    def nearest(p):
        return det[np.argmin(np.hypot(*(det - p).T))]

    off = truth.xy - np.array(truth.centre_xy)
    r = np.hypot(*off.T)
    order = np.argsort(r)
    i1, i2 = order[0], next(j for j in order[1:] if abs(np.cross(np.r_[off[order[0]], 0], np.r_[off[j], 0])[2])
                             > 0.3 * r[order[0]] * r[j])
    refl = [(nearest(truth.xy[i1]), truth.hkl[i1]), (nearest(truth.xy[i2]), truth.hkl[i2])]
    cal = calibrate_from_spots(det, truth.centre_xy, "Si", voltage_kv=200, reflections=refl, pixel_size_um=15.0)
    assert abs(cal.camera_constant_px_A / 450.0 - 1) < 2e-3
    assert abs(cal.ellipse.ellipticity - 0.02) < 0.003
    assert cal.camera_length_mm is not None


def test_calibrate_from_spots_few_spots_and_no_ellipse():
    img, truth, xy, refl = _si_case(500.0, 0.0, 0.0, 10.0, 4, noise_px=0.1)
    cal = calibrate_from_spots([p for p, _ in refl], truth.centre_xy, "Si", voltage_kv=200, reflections=refl)
    assert cal.fit == "similarity" and cal.ellipse == NO_DISTORTION
    assert abs(cal.camera_constant_px_A / 500.0 - 1) < 2e-3
    assert cal.quality == "poor"  # two spots cannot check themselves
    cal2 = calibrate_from_spots(xy, truth.centre_xy, "Si", voltage_kv=200, reflections=refl, fit_ellipse=False)
    assert cal2.fit == "similarity" and abs(cal2.camera_constant_px_A / 500.0 - 1) < 2e-3


def test_calibrate_from_spots_wrong_indices_is_poor():
    img, truth, xy, refl = _si_case(500.0, 0.0, 0.0, 10.0, 5)
    # call the first reflection 220 instead of a 111: ratio and angle no longer fit Si
    bad = [(refl[0][0], (2, 2, 0)), refl[1]]
    cal = calibrate_from_spots(xy, truth.centre_xy, "Si", voltage_kv=200, reflections=bad)
    assert cal.quality == "poor"
    assert any("do not fit Si" in w for w in cal.warnings)


def test_calibrate_from_spots_bad_input():
    with pytest.raises(InputError, match="at least two"):
        calibrate_from_spots([[10.0, 10.0]], [0.0, 0.0], "Si", voltage_kv=200, reflections=[((10, 0), (1, 1, 1))])
    with pytest.raises(InputError, match="collinear"):
        calibrate_from_spots([[10.0, 0.0], [20.0, 0.0]], [0.0, 0.0], "Si", voltage_kv=200,
                             reflections=[((10.0, 0.0), (1, 1, 1)), ((20.0, 0.0), (2, 2, 2))])
    with pytest.raises(InputError, match="three integers"):
        calibrate_from_spots([[10.0, 0.0], [0.0, 10.0]], [0.0, 0.0], "Si", voltage_kv=200,
                             reflections=[((10.0, 0.0), (0, 0, 0)), ((0.0, 10.0), (1, 1, 1))])


# --------------------------------------------------------------------------- applying a calibration


def test_d_from_offsets_with_ellipse_correction_and_sigma():
    ell = Ellipse(0.02, 30.0)
    cal = Calibration(camera_constant_px_A=1200.0, camera_constant_sigma_px_A=1.2, ellipse=ell, voltage_kv=200)
    d_true = np.array([2.3545, 2.0391, 1.4419])
    ang = np.deg2rad([10.0, 95.0, 200.0])
    ideal = (1200.0 / d_true)[:, None] * np.c_[np.cos(ang), np.sin(ang)]
    obs = ell.distort_array(ideal)
    assert calculate_corrected_radius_array(obs, ell) == pytest.approx(1200.0 / d_true)
    d = calculate_d_from_offset_array(obs, cal)
    assert d == pytest.approx(d_true, rel=1e-12)
    assert calculate_d_from_radius_array(1200.0 / d_true, cal) == pytest.approx(d_true, rel=1e-12)
    # σ_d/d = sqrt((σ_R/R)² + (σ_K/K)²), checked against a finite-difference propagation
    s = calculate_d_sigma_array(obs, 0.5, cal)
    eps = 1e-4
    for i in range(3):
        g = []
        for k in range(2):
            dv = np.zeros(2)
            dv[k] = eps
            g.append((calculate_d_from_offset_array(obs[i:i + 1] + dv, cal)[0]
                      - calculate_d_from_offset_array(obs[i:i + 1] - dv, cal)[0]) / (2 * eps))
        sd_pos = math.hypot(g[0] * 0.5, g[1] * 0.5)
        expected = math.hypot(sd_pos, d[i] * 1.2 / 1200.0)
        assert s[i] == pytest.approx(expected, rel=1e-5)
    # and against a Monte Carlo: 20000 draws of the spot position (σ 0.5 px per axis) and of K
    # (σ 1.2 px·Å), d from each draw; the scatter of d is what σ_d says (within 3 %)
    rng = np.random.default_rng(7)
    for i in range(3):
        Ks = 1200.0 + rng.normal(0, 1.2, 20000)
        pts = obs[i] + rng.normal(0, 0.5, (20000, 2))
        d_unit = calculate_d_from_offset_array(pts, Calibration(camera_constant_px_A=1.0, camera_constant_sigma_px_A=0.0,
                                                                ellipse=ell, voltage_kv=200))
        assert np.std(Ks * d_unit) == pytest.approx(s[i], rel=0.03)
    sr = calculate_d_sigma_from_radius_array(1200.0 / d_true, 0.5, cal)
    R_draws = 1200.0 / d_true + rng.normal(0, 0.5, (20000, 3))
    K_draws = 1200.0 + rng.normal(0, 1.2, (20000, 1))
    assert np.std(K_draws / R_draws, axis=0) == pytest.approx(sr, rel=0.03)
    with pytest.raises(InputError, match="offsets_sigma"):
        calculate_d_sigma_array(obs, np.ones((2, 2)), cal)


def test_apply_works_with_every_camera_model_and_nothing_else():
    from types import SimpleNamespace

    from saedkit.core.calibration.camera import EnteredCalibration

    # R·d = K (camera equation): 500 px·Å at 250 px is 2 Å
    assert calculate_d_from_offset_array([[0.0, 250.0]], EnteredCalibration(500.0))[0] == pytest.approx(2.0)
    # a bare namespace is not a calibration any more: the camera model is built at the edge
    with pytest.raises(InputError, match="camera must be a calibration"):
        calculate_d_from_offset_array([[0.0, 250.0]], SimpleNamespace(camera_constant_px_A=500.0,
                                                                       ellipse=NO_DISTORTION))
    with pytest.raises(InputError, match="camera_constant_px_A"):
        EnteredCalibration(-1.0)
