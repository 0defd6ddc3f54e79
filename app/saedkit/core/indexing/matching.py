"""The zone-axis matcher: which phase, seen along which zone axis [uvw], explains a spot pattern.

The measured pattern is reduced to its plane lattice (:mod:`.lattice2d`):
the two shortest spot vectors g1, g2, their lengths and the angle between
them. For each candidate phase every pair of reflections (h1, h2) whose
spacings (calibrated) or spacing ratio (uncalibrated) and angle match within
the tolerances is a hypothesis; its zone axis is ``h1 × h2`` (Weiss zone
law). Each hypothesis indexes every lattice spot (``hkl = m·h1 + n·h2``),
fits the in-plane rotation and the camera constant to all of them, and is
scored on the whole pattern: the fraction of spots it explains, the
positional residual, and the strong reflections it predicts that are not
there. Kinematically forbidden spots that double diffraction can produce
(the sum of two allowed reflections of the zone) are flagged, not held
against it. Symmetry-equivalent results are reported once.

A single zero-order pattern has a two-fold ambiguity: [uvw] and [ūv̄w̄] (a
180° rotation, (hkl) ↔ (h̄k̄l̄)) give the same spots; so can other zones of
the same symmetry class. Tilt pairs (:func:`match_tilt_pair`) or a
higher-order Laue zone resolve it.

References
----------
.. [1] J. W. Edington, *Practical Electron Microscopy in Materials Science*
   (1976), ch. 2.
.. [2] D. B. Williams and C. B. Carter, *Transmission Electron Microscopy*,
   2nd ed. (2009), ch. 18.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import lru_cache
from typing import Callable, Sequence

import numpy as np

from saedkit.core._validate import check_points_xy, check_positive, check_xy
from saedkit.core.crystallography.crystal import Phase, reduce_indices, to_four_index_direction
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import FitError, InputError, SaedkitError
from saedkit.core.indexing.lattice2d import find_lattice_2d
from saedkit.core.indexing.matching_types import (
    HolzRing,
    IndexedSpot,
    Lattice2D,
    MatchResult,
    OrientationRelationship,
    PredictedSpot,
    ZoneCandidate,
    ZoneTilt,
)
from saedkit.core.optics import calculate_wavelength_A
from saedkit.core.crystallography.structure_factors import calculate_reflections, calculate_structure_factor_array, canonical_indices
from saedkit.core.crystallography.zone import (
    calculate_excitation_error_array,
    calculate_holz_layer_spacing_per_A,
    calculate_holz_radius_per_A,
    calculate_zone_frame,
)

__all__ = ["match_zone_axes", "match_tilt_pair", "TiltPairMatch", "calculate_zone_lattice_basis"]

_AMBIGUITY_NOTE = ("single zero-order pattern: [uvw] and its opposite (a 180° rotation, (hkl) ↔ (h̄k̄l̄)) "
                   "explain the same spots; confirm with a tilt pair or the HOLZ")


def calculate_zone_lattice_basis(phase: Phase, uvw) -> tuple[np.ndarray, np.ndarray]:
    """A primitive basis (a, b) of the index lattice {h : h·u = 0}, shortest vectors first.

    ``a × b = ±u`` for a primitive basis when the indices of ``u`` are coprime.
    """
    u = reduce_indices(uvw)
    n = int(np.max(np.abs(u))) + 1
    r = np.arange(-n, n + 1)
    h = np.stack(np.meshgrid(r, r, r, indexing="ij"), -1).reshape(-1, 3)
    h = h[(h @ u == 0) & np.any(h != 0, axis=1)]
    g = phase.cell.calculate_g_array(h)
    h = h[np.argsort(g, kind="stable")]
    a = h[0]
    target = np.abs(u)
    for b in h[1:]:
        if np.array_equal(np.abs(np.cross(a, b)), target):
            return a, b
    raise FitError(f"no primitive zone basis found for {tuple(u)}")  # pragma: no cover


@dataclass
class _PhaseData:
    phase: Phase
    hkl: np.ndarray  # allowed reflections (N, 3) up to g_cap
    g: np.ndarray
    gcart: np.ndarray  # (N, 3) Cartesian Å⁻¹
    rep_idx: np.ndarray  # indices of family representatives (h1 candidates)


@lru_cache(maxsize=64)
def _phase_data(phase: Phase, g_cap: float, g_h1_cap: float, voltage_kv: float) -> _PhaseData:
    t = calculate_reflections(phase, g_max_per_A=g_cap, voltage_kv=voltage_kv)
    # basis vectors of the spot lattice can be kinematically forbidden reflections (rutile 100
    # at [001]: only 110, 200, 120... are seen), never centring-absent ones
    t = t.select(~phase.is_centring_absent_array(t.hkl))
    gcart = t.hkl @ phase.cell.reciprocal_basis.T
    reps = []
    seen: set = set()
    for i, h in enumerate(t.hkl.tolist()):
        if t.g_per_A[i] > g_h1_cap:
            break
        if tuple(h) in seen:
            continue
        eq = phase.calculate_equivalent_array(h)
        seen.update(map(tuple, eq.tolist()))
        rep = canonical_indices(eq)  # an equivalent, so in the table with the same |g|
        reps.append(int(np.flatnonzero(np.all(t.hkl == rep, axis=1))[0]))
    return _PhaseData(phase, t.hkl, t.g_per_A, gcart, np.array(reps, dtype=int))


def _canonical_zone(phase: Phase, u) -> tuple[int, int, int]:
    return _canonical_zone_cached(phase, tuple(int(x) for x in u))


@lru_cache(maxsize=4096)
def _canonical_zone_cached(phase: Phase, u: tuple[int, int, int]) -> tuple[int, int, int]:
    eq = phase.calculate_equivalent_directions(u)
    return tuple(int(v) for v in canonical_indices(eq))


@lru_cache(maxsize=512)
def _zolz(phase: Phase, u: tuple[int, int, int], g_max: float, voltage_kv: float) -> "_Zolz":
    return _Zolz(phase, u, g_max, voltage_kv)


class _Zolz:
    """Cached zero-order-zone reflections of one zone: hkl, allowed, centring-absent, |F|², frame."""

    def __init__(self, phase: Phase, u, g_max: float, voltage_kv: float):
        a, b = calculate_zone_lattice_basis(phase, u)
        cell = phase.cell
        ga, gb = cell.reciprocal_basis @ a, cell.reciprocal_basis @ b
        area = np.linalg.norm(np.cross(ga, gb))
        m = int(math.ceil(g_max * max(np.linalg.norm(ga), np.linalg.norm(gb)) / area)) + 1
        mm, nn = np.meshgrid(np.arange(-m, m + 1), np.arange(-m, m + 1), indexing="ij")
        hkl = mm.reshape(-1, 1) * a + nn.reshape(-1, 1) * b
        hkl = hkl[np.any(hkl != 0, axis=1)]
        g = cell.calculate_g_array(hkl)
        keep = g <= g_max
        self.hkl, self.g = hkl[keep], g[keep]
        F = calculate_structure_factor_array(phase, self.hkl, voltage_kv=voltage_kv)
        lam = calculate_wavelength_A(voltage_kv)
        s = calculate_excitation_error_array(cell, u, self.hkl, wavelength_A=lam)
        power = np.abs(F) ** 2
        self.power = power
        self.intensity = power / (1 + (np.pi * 250.0 * s) ** 2)  # relrod of a ~25 nm foil
        zero = np.abs(F) < 1e-5 * (np.abs(F).max() if len(F) else 1)
        self.allowed = ~zero & ~phase.is_space_group_absent_array(self.hkl)
        self.centring_absent = phase.is_centring_absent_array(self.hkl)
        self.index = {tuple(h): i for i, h in enumerate(self.hkl.tolist())}
        # forbidden but the sum of two allowed reflections of the zone (double diffraction): h − a allowed
        self.double = np.zeros(len(self.hkl), bool)
        cand = np.flatnonzero(~self.allowed & ~self.centring_absent)
        ah = self.hkl[self.allowed]
        if len(cand) and len(ah):
            span = 4 * int(np.abs(self.hkl).max()) + 1

            def key(h):
                h = h + span // 2
                return (h[..., 0] * span + h[..., 1]) * span + h[..., 2]

            allowed_keys = np.sort(key(ah))
            for lo in range(0, len(cand), 256):
                part = cand[lo:lo + 256]
                kd = key(self.hkl[part][:, None, :] - ah[None, :, :])
                pos = np.clip(np.searchsorted(allowed_keys, kd), 0, len(allowed_keys) - 1)
                self.double[part] = np.any(allowed_keys[pos] == kd, axis=1)
        self.imax = float(self.intensity[self.allowed].max()) if self.allowed.any() else 1.0


def match_zone_axes(
    spots_xy,
    centre_xy,
    phases: Sequence[Phase],
    *,
    camera_constant_px_A: float | None = None,
    camera_constant_sigma_px_A: float | None = None,
    ellipse: Ellipse = NO_DISTORTION,
    voltage_kv: float = 200.0,
    d_tolerance_pct: float = 2.5,
    angle_tolerance_deg: float = 2.0,
    max_index: int = 10,
    top: int = 10,
    spots_sigma_px=None,
    image_shape: tuple[int, int] | None = None,
    mask: np.ndarray | None = None,
    spots_intensity=None,
    progress: Callable[[int, int], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
) -> MatchResult:
    """Rank the zone axes of candidate phases that explain a spot pattern.

    Parameters
    ----------
    spots_xy : (N, 2) array
        Spot positions [x, y] in pixels (the undiffracted beam excluded).
    centre_xy : [x, y]
        Pattern centre; refined with the lattice.
    phases : sequence of Phase
        Candidate phases.
    camera_constant_px_A : float, optional
        K (pixel·Å) from a calibration: spacings are then compared directly.
        Without it the match uses spacing ratios and angles only, and fits K.
    camera_constant_sigma_px_A : float, optional
        Its standard uncertainty (propagated to the spot d-spacings).
    ellipse : Ellipse
        The calibration's distortion, corrected before matching.
    voltage_kv : float
        Accelerating voltage (Ewald-sphere curvature of the predicted intensities).
    d_tolerance_pct, angle_tolerance_deg : float
        Tolerances on spacings (or their ratio) and on the angle between the
        basis vectors. Defaults 2.5 % and 2° (common practice).
    max_index : int
        Largest |u|, |v|, |w| of the zone axes considered.
    top : int
        Number of candidates returned.
    spots_sigma_px : (N,) array or float, optional
        Position uncertainty of each spot (default 0.3 px).
    image_shape : (rows, cols), optional
        To predict the grid over the whole image and to skip predicted spots
        that fall outside it when counting missing ones.
    mask : bool array, optional
        Excluded pixels: predicted spots there are not counted as missing.
    spots_intensity : (N,) array, optional
        Measured spot intensities. They never enter the choice of zone
        (positions only: tilt and dynamical scattering scramble them); they
        refine the estimate of the beam tilt off the zone axis.
    progress, should_stop : callables, optional
        ``progress(done, total)`` per phase; ``should_stop()`` cancels.

    Returns
    -------
    MatchResult
        Candidates best first. An empty list means nothing matched within
        the tolerances (the result's notes say so).

    Raises
    ------
    FitError
        When the spots do not form a plane lattice.
    """
    p = check_points_xy("spots_xy", spots_xy)
    c = check_xy("centre_xy", centre_xy)
    if not phases:
        raise InputError("phases must name at least one candidate phase")
    K_given = None if camera_constant_px_A is None else check_positive("camera_constant_px_A", camera_constant_px_A)
    K_sig = float(camera_constant_sigma_px_A or 0.0)
    dtol = check_positive("d_tolerance_pct", d_tolerance_pct) / 100
    atol = check_positive("angle_tolerance_deg", angle_tolerance_deg)
    sig = np.broadcast_to(np.asarray(0.3 if spots_sigma_px is None else spots_sigma_px, float), (len(p),))

    inten = None
    if spots_intensity is not None:
        inten = np.asarray(spots_intensity, float).reshape(-1)
        if len(inten) != len(p):
            raise InputError(f"spots_intensity has {len(inten)} values, expected one per spot ({len(p)})")
    weights = 1 / np.maximum(sig, 0.05)
    lattice = find_lattice_2d(p, c, ellipse=ellipse, weights=weights, camera_constant_px_A=K_given)
    common = dict(phases=phases, K_sig=K_sig, dtol=dtol, atol=atol, max_index=max_index, sig=sig, ellipse=ellipse,
                  image_shape=image_shape, mask=mask, voltage_kv=voltage_kv, should_stop=should_stop, inten=inten)
    # consensus over lattice hypotheses: the lattice of all spots, and that of the spots inside a radial
    # gap (a HOLZ ring or a far second lattice can make a sub-cell win the first); one result per zone
    hyps = [lattice] + _inner_lattice_hypotheses(p, lattice, ellipse, weights, K_given)
    best_of_zone: dict = {}
    by_name = {ph.name: ph for ph in phases}
    n_pairs = 0
    for k, lat in enumerate(hyps):
        cands, npr = _search_lattice(p, lat, K_given=K_given, progress=progress if k == 0 else None, **common)
        n_pairs += npr
        for cd in cands:
            key = (cd.phase, _canonical_zone(by_name[cd.phase], cd.zone))
            if key not in best_of_zone or cd.score > best_of_zone[key][0].score:
                best_of_zone[key] = (cd, lat)
    if not best_of_zone or max(cl[0].score for cl in best_of_zone.values()) < 0.5:
        # poor or no match: the spots of two overlapping lattices (a twin) can fill a common sub-cell that
        # wins the lattice search; try the larger cells that hold many Friedel pairs
        area = abs(lattice.g1_px[0] * lattice.g2_px[1] - lattice.g1_px[1] * lattice.g2_px[0])
        for _ in range(2):
            try:
                alt = find_lattice_2d(p, c, ellipse=ellipse, weights=weights, camera_constant_px_A=K_given,
                                      min_cell_area_px2=1.5 * area)
            except FitError:
                break
            if alt.inliers.sum() < max(4, 0.25 * len(p)):
                break
            cands, npr = _search_lattice(p, alt, K_given=K_given, **common)
            n_pairs += npr
            for cd in cands:
                key = (cd.phase, _canonical_zone(by_name[cd.phase], cd.zone))
                if key not in best_of_zone or cd.score > best_of_zone[key][0].score:
                    best_of_zone[key] = (cd, alt)
            if cands and max(cd.score for cd in cands) >= 0.5:
                break
            area = abs(alt.g1_px[0] * alt.g2_px[1] - alt.g1_px[1] * alt.g2_px[0])
    ranked = sorted(best_of_zone.values(), key=lambda cl: -cl[0].score)
    candidates = [cl[0] for cl in ranked]
    if ranked:
        lattice = ranked[0][1]
    second = None
    orel = None
    notes: list[str] = []
    if candidates:
        second = _find_second_lattice(p, candidates[0], lattice, K_given=K_given, common=common)
        if second is not None:
            orel = _orientation_relationship(candidates[0], second, lattice.centre_xy)
            notes.append(f"a second lattice ({second.phase} {list(second.zone)}) explains {second.n_explained} of the "
                         "spots the first leaves unexplained (twin, second grain or precipitate)")
    else:
        notes.append("no zone axis of the given phases matches within the tolerances")
        notes.extend(_why_no_match(p, lattice, K_given=K_given, common=common))
    return MatchResult(
        candidates=tuple(candidates[: max(int(top), 1)]),
        lattice=lattice,
        calibrated=K_given is not None,
        n_pairs_examined=n_pairs,
        phases=tuple(ph.name for ph in phases),
        tolerances={"d_tolerance_pct": d_tolerance_pct, "angle_tolerance_deg": angle_tolerance_deg,
                    "max_index": max_index},
        notes=tuple(notes),
        second=second,
        orientation_relationship=orel,
    )


def _on_subset(lat: Lattice2D, sub: np.ndarray) -> Lattice2D:
    """A lattice found on a subset of the spots, with per-spot arrays over all spots."""
    n = len(sub)
    idx = np.zeros((n, 2), int)
    inl = np.zeros(n, bool)
    idx[sub] = lat.indices
    inl[sub] = lat.inliers
    return replace(lat, indices=idx, inliers=inl)


def _inner_lattice_hypotheses(p, lattice: Lattice2D, ellipse, weights, K_given) -> list[Lattice2D]:
    v = (p - np.array(lattice.centre_xy)) @ ellipse.inverse_matrix.T
    R = np.linalg.norm(v, axis=1)
    order = np.argsort(R)
    Rs = R[order]
    if len(Rs) < 8:
        return []
    step = min(lattice.r1_px, lattice.r2_px)
    gaps = [(Rs[i + 1] - Rs[i], i) for i in range(4, len(Rs) - 3)
            if Rs[i + 1] > 1.2 * Rs[i] and Rs[i + 1] - Rs[i] > 1.2 * step]
    if not gaps:
        return []
    _, i = max(gaps)
    sub = np.zeros(len(p), bool)
    sub[order[: i + 1]] = True
    try:
        lat = find_lattice_2d(p[sub], lattice.centre_xy, ellipse=ellipse, weights=weights[sub],
                              camera_constant_px_A=K_given)
    except FitError:
        return []
    return [_on_subset(lat, sub)]


def _search_lattice(p, lattice: Lattice2D, *, phases, K_given, K_sig, dtol, atol, max_index, sig, ellipse,
                    image_shape, mask, voltage_kv, should_stop, inten, progress=None):
    """Every (phase, zone) hypothesis that explains the spots on ``lattice``, one per zone, scored."""
    g1, g2 = np.array(lattice.g1_px), np.array(lattice.g2_px)
    r1, r2, phi = lattice.r1_px, lattice.r2_px, lattice.angle_deg
    centre = np.array(lattice.centre_xy)
    Dm, Dinv = ellipse.matrix, ellipse.inverse_matrix
    v = (p - centre) @ Dinv.T  # ideal offsets
    R = np.linalg.norm(v, axis=1)
    r_obs_max = float(R[lattice.inliers].max()) if lattice.inliers.any() else float(R.max())
    if image_shape is not None:
        rows, cols = image_shape
        corners = np.array([[0, 0], [cols - 1, 0], [0, rows - 1], [cols - 1, rows - 1]]) - centre
        r_pred_max = float(np.max(np.linalg.norm(corners @ Dinv.T, axis=1)))
    else:
        r_pred_max = 1.15 * r_obs_max
    cross_obs = g1[0] * g2[1] - g1[1] * g2[0]

    candidates: list[ZoneCandidate] = []
    n_pairs = 0
    for ip, phase in enumerate(phases):
        if should_stop is not None and should_stop():
            raise SaedkitError("zone-axis search cancelled")
        if K_given is not None:
            g1_target = r1 / K_given
            g_h1_cap = g1_target * (1 + dtol)
        else:
            t_low = calculate_reflections(phase, g_max_per_A=1.0 / min(phase.cell.a, phase.cell.b, phase.cell.c) * 2.01)
            g_min = float(t_low.g_per_A.min())
            g_allowed = float(t_low.g_per_A[t_low.allowed].min()) if t_low.allowed.any() else g_min
            # a long axis makes g_min tiny: the shortest allowed reflection bounds the basis too
            # (anatase or corundum [001] have no spot below 2× their lowest allowed |g|)
            g_h1_cap = max(3.5 * g_min, 2.0 * g_allowed)
        g_cap = g_h1_cap * (r2 / r1) * (1 + dtol) * 1.001
        # rounded caps let repeated searches (GUI, batch) reuse the cached tables
        g_h1_cap = float(np.ceil(g_h1_cap * 50) / 50)
        g_cap = float(np.ceil(g_cap * 50) / 50)
        data = _phase_data(phase, g_cap, g_h1_cap, float(voltage_kv))
        best_by_key: dict = {}
        for i1 in data.rep_idx:
            h1g = data.g[i1]
            if K_given is not None:
                if abs(h1g - r1 / K_given) > dtol * r1 / K_given:
                    continue
                ok2 = np.abs(data.g - r2 / K_given) <= dtol * r2 / K_given
            else:
                ok2 = np.abs(data.g / h1g - r2 / r1) <= dtol * (r2 / r1)
            if not ok2.any():
                continue
            idx2 = np.flatnonzero(ok2)
            c1 = data.gcart[i1]
            cosang = (data.gcart[idx2] @ c1) / (data.g[idx2] * h1g)
            ang = np.degrees(np.arccos(np.clip(cosang, -1, 1)))
            idx2 = idx2[np.abs(ang - phi) <= atol]
            n_pairs += len(idx2)
            for i2 in idx2:
                h1, h2 = data.hkl[i1], data.hkl[i2]
                u = np.cross(h1, h2)
                if not u.any():
                    continue
                u = reduce_indices(u)
                if np.max(np.abs(u)) > max_index:
                    continue
                # handedness: the zone frame must turn h1 towards h2 the way the image turns g1 to g2
                e1, e2, _ = calculate_zone_frame(phase.cell, u)
                q1 = np.array([data.gcart[i1] @ e1, data.gcart[i1] @ e2])
                q2 = np.array([data.gcart[i2] @ e1, data.gcart[i2] @ e2])
                if (q1[0] * q2[1] - q1[1] * q2[0]) * cross_obs < 0:
                    u = -u
                key = (_canonical_zone(phase, u), tuple(data.hkl[i1]), round(float(data.g[i2]), 4))
                if key in best_by_key:
                    continue
                cand = _score_hypothesis(
                    phase, u, h1, h2, lattice, v, R, p, centre, Dm, sig, K_given, K_sig, dtol,
                    r_obs_max, r_pred_max, image_shape, mask, voltage_kv, inten,
                )
                best_by_key[key] = cand
        # one result per symmetry-equivalent zone (the best of its hypotheses)
        per_zone: dict = {}
        for cand in best_by_key.values():
            if cand is None:
                continue
            k = _canonical_zone(phase, cand.zone)
            if k not in per_zone or cand.score > per_zone[k].score:
                per_zone[k] = cand
        candidates.extend(per_zone.values())
        if progress is not None:
            progress(ip + 1, len(phases))
    return candidates, n_pairs


def _score_hypothesis(phase, u, h1, h2, lattice: Lattice2D, v, R, p, centre, Dm, sig, K_given, K_sig, dtol,
                      r_obs_max, r_pred_max, image_shape, mask, voltage_kv, inten=None):
    cell = phase.cell
    e1, e2, _ = calculate_zone_frame(cell, u)
    B = cell.reciprocal_basis
    inl = lattice.inliers
    mn = lattice.indices
    hkl_all = mn[:, :1] * h1 + mn[:, 1:] * h2  # (N, 3); meaningless for outliers
    gc = hkl_all @ B.T
    q = np.stack([gc @ e1, gc @ e2], axis=1)
    # similarity fit v ≈ [[a, −b], [b, a]] q over the lattice spots
    A = np.zeros((2 * inl.sum(), 2))
    qi = q[inl]
    A[0::2, 0], A[0::2, 1] = qi[:, 0], -qi[:, 1]
    A[1::2, 0], A[1::2, 1] = qi[:, 1], qi[:, 0]
    y = v[inl].reshape(-1)
    sol, *_ = np.linalg.lstsq(A, y, rcond=None)
    a, b = sol
    K_fit = float(math.hypot(a, b))
    if K_fit <= 0:
        return None
    res_vec = y - A @ sol
    dof = max(len(y) - 2, 1)
    s2 = float(res_vec @ res_vec / dof)
    try:
        cov = np.linalg.inv(A.T @ A) * s2
        K_fit_sig = float(math.sqrt(max((a * a * cov[0, 0] + b * b * cov[1, 1] + 2 * a * b * cov[0, 1]) / K_fit**2, 0)))
    except np.linalg.LinAlgError:
        K_fit_sig = float("nan")
    if K_given is not None and abs(K_fit - K_given) / K_given > dtol:
        return None
    theta = math.degrees(math.atan2(b, a))
    S = np.array([[a, -b], [b, a]])
    pred_v = q @ S.T
    pos_err = np.linalg.norm(v - pred_v, axis=1)

    g_pred_max = float(np.ceil(r_pred_max / K_fit * 20) / 20)
    zolz = _zolz(phase, tuple(int(x) for x in u), g_pred_max, float(voltage_kv))

    K_use = K_given if K_given is not None else K_fit
    K_use_sig = K_sig if K_given is not None else K_fit_sig
    spots = []
    explained = np.zeros(len(p), bool)
    forbidden_flags = np.zeros(len(p), bool)
    d_err = []
    ang_err = []
    for i in range(len(p)):
        d_meas = K_use / R[i] if R[i] > 0 else float("nan")
        s_R = math.hypot(sig[i], max(lattice.centre_sigma_px))
        d_sig = d_meas * math.hypot(s_R / R[i] if R[i] > 0 else 0, (K_use_sig / K_use) if K_use_sig == K_use_sig else 0)
        hkl = None
        derr = None
        perr = None
        forb = False
        if inl[i]:
            h = tuple(int(x) for x in hkl_all[i])
            j = zolz.index.get(h)
            tol_px = max(3 * sig[i], dtol * R[i])
            if j is not None and pos_err[i] <= tol_px * 1.5 and (zolz.allowed[j] or zolz.double[j]):
                hkl = h
                forb = not zolz.allowed[j]
                d_pred = 1.0 / zolz.g[j]
                derr = (d_meas - d_pred) / d_pred * 100
                perr = float(pos_err[i])
                explained[i] = True
                forbidden_flags[i] = forb
                d_err.append(derr)
                ang = math.degrees(math.atan2(v[i, 1], v[i, 0]) - math.atan2(pred_v[i, 1], pred_v[i, 0]))
                ang_err.append((ang + 180) % 360 - 180)
        spots.append(IndexedSpot(float(p[i, 0]), float(p[i, 1]), hkl, float(d_meas), float(d_sig),
                                 None if derr is None else float(derr), perr, forb))
    n_exp = int(explained.sum())
    if n_exp < 2:
        return None

    # predicted grid on the image
    zq = zolz.hkl @ B.T
    zq2 = np.stack([zq @ e1, zq @ e2], axis=1) @ S.T  # ideal px offsets
    zxy = centre + zq2 @ Dm.T
    show = zolz.allowed | zolz.double
    imax = zolz.imax
    predicted = tuple(
        PredictedSpot(float(zxy[j, 0]), float(zxy[j, 1]), tuple(int(x) for x in zolz.hkl[j]), float(1 / zolz.g[j]),
                      float(zolz.intensity[j] / imax) if zolz.allowed[j] else 0.0, bool(not zolz.allowed[j]))
        for j in np.flatnonzero(show)
    )
    # strong predicted reflections that are not there
    rz = np.linalg.norm(zq2, axis=1)
    strong = zolz.allowed & (rz <= r_obs_max * 1.02) & (zolz.intensity >= 0.15 * imax)
    if image_shape is not None:
        rows, cols = image_shape
        inside = (zxy[:, 0] >= 2) & (zxy[:, 0] <= cols - 3) & (zxy[:, 1] >= 2) & (zxy[:, 1] <= rows - 3)
        strong &= inside
        if mask is not None:
            ix = np.clip(np.round(zxy[:, 0]).astype(int), 0, cols - 1)
            iy = np.clip(np.round(zxy[:, 1]).astype(int), 0, rows - 1)
            strong &= ~np.asarray(mask, bool)[iy, ix]
    n_strong = int(strong.sum())
    n_missing = 0
    n_inner_missing = 0
    if n_strong:
        d2 = np.linalg.norm(zq2[strong][:, None, :] - v[None, :, :], axis=2)
        tol = np.maximum(dtol * rz[strong], 3 * float(np.median(sig)))[:, None] * 1.5
        missing = ~np.any(d2 <= tol, axis=1)
        # a reflection whose Friedel mate is there is not missing for the zone: a beam tilted off the
        # axis leaves one side of the pattern dark (positions only, no kinematic intensities)
        sidx = np.flatnonzero(strong)
        present = {tuple(h) for h in zolz.hkl[sidx[~missing]].tolist()}
        if explained.any():
            present |= {tuple(h) for h in hkl_all[explained].tolist()}
        mate_there = np.array([tuple((-zolz.hkl[j]).tolist()) in present for j in sidx], bool)
        missing &= ~mate_there
        n_missing = int(np.sum(missing))
        # a strong reflection predicted closer to the centre than every measured spot, and not
        # hidden by the mask, is the surest sign of a wrong scale: low orders are never all absent
        r_inner = 0.9 * float(np.min(R[explained])) if explained.any() else 0.0
        n_inner_missing = int(np.sum(missing & (rz[strong] < r_inner)))

    # HOLZ ring among the spots off the zero-order net: checks the zone and the cell
    # (outside the zero-order spots: the zero-order zone fades where the Ewald sphere leaves it, well
    # inside the ring; a family of a second lattice at one radius is not a ring)
    r_zolz = float(R[explained].max()) if explained.any() else 0.0
    holz, ring = _find_holz_ring(phase, u, v, R, ~explained & (R > 0.95 * r_zolz), K_use, voltage_kv)
    # explained fraction: spots off this candidate's lattice (a second lattice, dust) count a quarter,
    # HOLZ-ring spots not at all, so unexplained spots never veto the lattice that explains the rest
    on_lat = inl & ~ring
    n_off = int(np.sum(~inl & ~ring))
    frac = min(1.0, n_exp / max(int(on_lat.sum()) + 0.25 * n_off, 1.0))
    rel = pos_err[explained] / np.maximum(R[explained], 1e-9)
    rms_rel = float(np.sqrt(np.mean(rel**2)))
    score = frac * (1 - 0.6 * n_missing / max(n_strong, 1)) * math.exp(-0.5 * (rms_rel / dtol) ** 2)
    score *= 0.5 ** n_inner_missing
    if K_given is not None:
        score *= math.exp(-0.5 * ((K_fit - K_given) / K_given / dtol) ** 2)
    four = to_four_index_direction(u) if phase.is_hexagonal else None
    notes = [_AMBIGUITY_NOTE]
    if forbidden_flags.any():
        notes.append(f"{int(forbidden_flags.sum())} spot(s) kinematically forbidden, explained by double diffraction")
    if holz is not None:
        notes.append(f"HOLZ ring of {holz.n_spots} spots at {holz.radius_px:.1f} px (predicted {holz.predicted_radius_px:.1f} px): "
                     f"layer spacing {holz.layer_spacing_per_A:.4f} Å⁻¹ vs {holz.predicted_layer_spacing_per_A:.4f} Å⁻¹ "
                     f"({holz.layer_spacing_error_pct:+.1f} %)")
        if abs(holz.layer_spacing_error_pct) > 15:
            score *= 0.7
            notes.append("the HOLZ ring does not fit this zone and cell")
    zone_spots = explained & ~forbidden_flags
    tilt = _estimate_tilt(v[zone_spots], None if inten is None else inten[zone_spots],
                          zolz, hkl_all[zone_spots], centre, Dm, K_use, voltage_kv)
    if tilt is not None and tilt.tilt_mrad >= 3:
        notes.append(f"beam about {tilt.tilt_mrad:.0f} mrad ({tilt.tilt_deg:.2f}°) off the zone axis, towards "
                     f"{tilt.azimuth_deg:.0f}° in the image ({tilt.method}); matched on positions only")
    return ZoneCandidate(
        phase=phase.name,
        zone=tuple(int(x) for x in u),
        zone_four_index=four,
        score=float(max(score, 0.0)),
        d_error_pct=float(np.sqrt(np.mean(np.square(d_err)))) if d_err else float("nan"),
        angle_error_deg=float(np.sqrt(np.mean(np.square(ang_err)))) if ang_err else float("nan"),
        in_plane_rotation_deg=float(theta),
        camera_constant_px_A=K_fit,
        camera_constant_sigma_px_A=K_fit_sig,
        fraction_explained=float(frac),
        n_explained=n_exp,
        n_spots=len(p),
        n_missing_strong=n_missing,
        residual_px=float(np.sqrt(np.mean(pos_err[explained] ** 2))),
        spots=tuple(spots),
        predicted=predicted,
        basis_hkl=(tuple(int(x) for x in h1), tuple(int(x) for x in h2)),
        notes=tuple(notes),
        holz=holz,
        tilt=tilt,
        n_double_diffraction=int(forbidden_flags.sum()),
    )


def _find_holz_ring(phase, u, v, R, candidates_mask, K_use, voltage_kv):
    """The densest thin annulus (±3 %) of at least 5 spots off the zero-order net, spread round the centre."""
    ring = np.zeros(len(R), bool)
    idx = np.flatnonzero(candidates_mask & (R > 0))
    if len(idx) < 5 or not (K_use > 0):
        return None, ring
    Ru = R[idx]
    best = None
    for r0 in Ru:
        m = np.abs(Ru - r0) <= 0.03 * r0
        if best is None or m.sum() > best.sum():
            best = m
    members = idx[best]
    if len(members) < 5:
        return None, ring
    az = np.arctan2(v[members, 1], v[members, 0])
    spread = 1 - abs(np.mean(np.exp(1j * az)))  # 0 when all in one direction
    if spread < 0.05:
        return None, ring
    ring[members] = True
    r_ring = float(np.median(R[members]))
    r_sig = float(np.std(R[members]) / math.sqrt(len(members)))
    lam = calculate_wavelength_A(voltage_kv)
    k = 1 / lam
    G = r_ring / K_use
    H_meas = k - math.sqrt(max(k * k - G * G, 0.0))
    H_pred = _holz_spacing(phase, tuple(int(x) for x in u))
    G_pred = calculate_holz_radius_per_A(phase.cell, u, wavelength_A=lam, layer_spacing_per_A=H_pred)
    return HolzRing(r_ring, r_sig, int(len(members)), float(G_pred * K_use), float(H_meas), float(H_pred),
                    float((H_meas - H_pred) / H_pred * 100)), ring


@lru_cache(maxsize=1024)
def _holz_spacing(phase: Phase, u: tuple[int, int, int]) -> float:
    return calculate_holz_layer_spacing_per_A(phase, u)


def _estimate_tilt(q, inten, zolz, hkl, centre, Dm, K_use, voltage_kv) -> ZoneTilt | None:
    """Laue circle through the undiffracted beam fitted to the excited zero-order spots.

    With the beam tilted by τ, the zero-order reflections on the circle
    ``|q − C|² = |C|²`` (``|C| = k sin τ``) are exactly excited. Each spot
    contributes ``|q|² = 2 q·C`` weighted by its excitation: the measured
    intensity over the kinematic |F|² when intensities are given, else 1
    (then the spots present say where the circle lies).
    """
    if len(q) < 3 or not (K_use > 0):
        return None
    r = np.linalg.norm(q, axis=1)
    ok = r > 0
    q, r, hkl = q[ok], r[ok], hkl[ok]
    method = "positions"
    w = np.ones(len(q))
    if inten is not None:
        inten = np.asarray(inten, float)[ok]
        power = np.array([zolz.power[zolz.index[tuple(h)]] if tuple(h) in zolz.index else np.nan
                          for h in hkl.tolist()])
        e = inten / np.where(power > 0, power, np.nan)
        if np.all(np.isfinite(e)) and np.nanmax(e) > 0:
            w = np.clip(e / np.nanmax(e), 0, 1)
            method = "intensities"
    A = 2 * q / r[:, None]
    sw = np.sqrt(w)
    if np.linalg.matrix_rank(A * sw[:, None]) < 2:
        return None
    C, *_ = np.linalg.lstsq(A * sw[:, None], r * sw, rcond=None)
    lam = calculate_wavelength_A(voltage_kv)
    sin_t = min(float(np.hypot(*C)) / K_use * lam, 1.0)
    tau = math.asin(sin_t)
    Ci = Dm @ C
    xy = np.asarray(centre, float) + Ci
    return ZoneTilt((float(xy[0]), float(xy[1])), float(tau * 1e3), float(math.degrees(tau)),
                    float(math.degrees(math.atan2(Ci[1], Ci[0])) % 360), method)


def _find_second_lattice(p, best: ZoneCandidate, lattice: Lattice2D, *, K_given, common) -> ZoneCandidate | None:
    """Index a second lattice (twin, grain, precipitate) among the spots ``best`` leaves unexplained."""
    rest = np.array([s.hkl is None for s in best.spots], bool)
    if best.holz is not None:
        R = np.linalg.norm(p - np.array(lattice.centre_xy), axis=1)
        rest &= np.abs(R - best.holz.radius_px) > 0.03 * best.holz.radius_px
    if rest.sum() < 4:
        return None
    ellipse = common["ellipse"]
    try:
        lat = find_lattice_2d(p[rest], lattice.centre_xy, ellipse=ellipse, refine_centre=False,
                              camera_constant_px_A=K_given)
    except FitError:
        return None
    if lat.inliers.sum() < 3:
        return None
    lat = _on_subset(lat, rest)
    # the same camera: the second lattice is measured with the first's camera constant
    K2 = K_given if K_given is not None else best.camera_constant_px_A
    kw = dict(common)
    kw["K_sig"] = common["K_sig"] if K_given is not None else best.camera_constant_sigma_px_A
    cands, _ = _search_lattice(p, replace(lat, camera_constant_px_A=K2), K_given=K2, **kw)
    cands = [cd for cd in cands if cd.n_explained >= 3]
    if not cands:
        return None
    cands.sort(key=lambda cd: -cd.score)
    return cands[0]


def _orientation_relationship(a: ZoneCandidate, b: ZoneCandidate, centre_xy) -> OrientationRelationship | None:
    """Parallel planes (the closest-to-parallel low-index reflections of the two zones) and directions."""
    cx, cy = float(centre_xy[0]), float(centre_xy[1])

    def rows(c: ZoneCandidate):
        out = []
        for s in c.predicted:
            if s.forbidden:
                continue
            ang = math.degrees(math.atan2(s.y - cy, s.x - cx)) % 180
            out.append((s.d_A, tuple(s.hkl), ang))
        out.sort(key=lambda t: -t[0])
        return out[:16]

    ra, rb = rows(a), rows(b)
    if not ra or not rb:
        return None
    best = None
    for ia, (da, ha, aa) in enumerate(ra):
        for ib, (db, hb, ab) in enumerate(rb):
            dev = abs((aa - ab + 90) % 180 - 90)
            key = (dev > 1.5, ia + ib, dev)  # the lowest-index pair within 1.5°, else the closest
            if best is None or key < best[0]:
                best = (key, ha, hb, dev)
    _, ha, hb, dev = best
    return OrientationRelationship(a.phase, b.phase, tuple(int(x) for x in reduce_indices(ha)),
                                   tuple(int(x) for x in reduce_indices(hb)), a.zone, b.zone, float(dev),
                                   float((b.in_plane_rotation_deg - a.in_plane_rotation_deg + 180) % 360 - 180))


def _why_no_match(p, lattice: Lattice2D, *, K_given, common) -> list[str]:
    """Reasons a pattern may match nothing, each tested where it can be."""
    out = []
    n, n_in = len(p), int(lattice.inliers.sum())
    if n_in < 0.75 * n:
        out.append(f"{n - n_in} of {n} spots lie off the main lattice: a second lattice (twin, second grain, "
                   "precipitate), HOLZ spots or spurious spots")
    if K_given is not None:
        cands, _ = _search_lattice(p, replace(lattice, camera_constant_px_A=None), K_given=None, **common)
        if cands:
            cd = max(cands, key=lambda c: c.score)
            out.append(f"with the camera constant free, {cd.phase} {list(cd.zone)} matches at K = "
                       f"{cd.camera_constant_px_A:.1f} px·Å, {100 * (cd.camera_constant_px_A / K_given - 1):+.1f} % from "
                       "the given K: check the calibration (camera length, specimen height)")
    # every second row a superlattice row: try the cell with one or both basis vectors doubled
    g1, g2 = np.array(lattice.g1_px), np.array(lattice.g2_px)
    mn = lattice.indices
    for f1, f2 in ((2, 1), (1, 2), (2, 2)):
        keep = lattice.inliers & (mn[:, 0] % f1 == 0) & (mn[:, 1] % f2 == 0)
        if keep.sum() < 3:
            continue
        sup = replace(lattice, g1_px=tuple(g1 * f1), g2_px=tuple(g2 * f2), inliers=keep,
                      indices=np.where(keep[:, None], mn // np.array([f1, f2]), 0))
        cands, _ = _search_lattice(p, sup, K_given=K_given, **common)
        if cands:
            cd = max(cands, key=lambda c: c.score)
            out.append(f"{cd.phase} {list(cd.zone)} explains the spots of a cell {f1 * f2}× larger; the other spots "
                       "may be superlattice reflections of an ordered phase (or double diffraction)")
            break
    out.append("the phase may be missing from the candidates (add its CIF), or the zone may be beyond max_index")
    return out


@dataclass(frozen=True)
class TiltPairMatch:
    """Two candidates (one per pattern) whose zone axes are as far apart as the goniometer tilt."""

    candidate_a: ZoneCandidate
    candidate_b: ZoneCandidate
    angle_deg: float  # angle between the two zone axes (best symmetry-equivalent choice)
    error_deg: float  # |angle − tilt|
    score: float

    def to_dict(self) -> dict:
        return {"phase": self.candidate_a.phase, "zone_a": list(self.candidate_a.zone),
                "zone_b": list(self.candidate_b.zone), "angle_deg": self.angle_deg,
                "error_deg": self.error_deg, "score": self.score,
                "candidate_a": self.candidate_a.to_dict(), "candidate_b": self.candidate_b.to_dict()}


def match_tilt_pair(result_a: MatchResult, result_b: MatchResult, phases: Sequence[Phase], *, tilt_deg: float,
                    tolerance_deg: float = 2.0) -> list[TiltPairMatch]:
    """Keep the zone pairs of two patterns of one grain whose angle matches the goniometer tilt.

    For each candidate of pattern A and each of pattern B of the same phase,
    the angle between [uvw]_A and every symmetry-equivalent of [uvw]_B is
    computed (one of them is the true relative orientation); pairs with an
    angle within ``tolerance_deg`` of ``tilt_deg`` are kept, best first.
    """
    tilt = abs(float(tilt_deg))
    by_name = {ph.name: ph for ph in phases}
    out = []
    for ca in result_a.candidates:
        for cb in result_b.candidates:
            if ca.phase != cb.phase or ca.phase not in by_name:
                continue
            ph = by_name[ca.phase]
            eqb = ph.calculate_equivalent_directions(cb.zone)
            angs = np.array([ph.cell.calculate_direction_angle_deg(ca.zone, e) for e in eqb])
            err = np.abs(angs - tilt)
            k = int(np.argmin(err))
            if err[k] <= tolerance_deg:
                s = ca.score * cb.score * math.exp(-0.5 * (err[k] / tolerance_deg) ** 2)
                out.append(TiltPairMatch(ca, cb, float(angs[k]), float(err[k]), float(s)))
    out.sort(key=lambda m: -m.score)
    return out
