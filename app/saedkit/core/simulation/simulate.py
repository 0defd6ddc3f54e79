"""Kinematic diffraction-pattern synthesiser for tests and the demo.

Spot patterns of a phase at a zone axis (with in-plane rotation, camera
constant, ellipse distortion) and ring patterns of a polycrystalline phase,
drawn by :func:`saedkit.core.simulation.render.render_pattern` with a saturated central
beam, beam stop, background and noise. Each returns the image with its
ground truth. The data are invented: they serve tests and the demo only.

Intensities are kinematic: ``|F|²`` times a relrod factor
``1 / (1 + (π t s)²)`` for foil thickness ``t`` and excitation error ``s`` at
the exact zone-axis orientation; rings carry ``m·|F|²`` spread over their
circumference. Dynamical effects are not modelled, but a spot pattern can
add the kinematically forbidden reflections that double diffraction would
bring back (Si 200 at [011]).

Realistic effects (all off by default): a beam tilted off the zone axis by
a fraction of a degree (the excitation error of each reflection then
depends on the tilt and the foil thickness, so only the part of the zone
near the Laue circle is bright), log-normal scrambling of the intensities
(a stand-in for dynamical scattering), higher-order Laue-zone (HOLZ) spots
and a second crystal (twin, second grain or precipitate) in a given
orientation relative to the first.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from saedkit.core._validate import check_positive
from saedkit.core.crystallography.crystal import Phase, reduce_indices
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError
from saedkit.core.optics import calculate_wavelength_A
from saedkit.core.simulation.render import BeamStop, Detector, render_pattern
from saedkit.core.crystallography.structure_factors import calculate_reflections, calculate_ring_families
from saedkit.core.crystallography.zone import (
    calculate_excitation_error_array,
    calculate_pattern_offsets_array,
    calculate_zone_frame,
    rotation_matrix_2d,
)

__all__ = ["SpotPatternTruth", "RingPatternTruth", "SecondCrystal", "simulate_spot_pattern", "simulate_ring_pattern"]


@dataclass(frozen=True)
class SecondCrystal:
    """A second crystal in the beam: a twin, a second grain or a precipitate.

    ``orientation`` maps Cartesian vectors of the second crystal's frame
    (its ``cell.direct_basis`` frame) to the first crystal's frame: a
    reciprocal vector ``g2`` of the second crystal is ``orientation @ g2``
    in the first crystal's frame. Its spots are those near the Ewald sphere
    of the first crystal's beam, with ``relative_intensity`` scaling them.
    """

    phase: Phase
    orientation: np.ndarray = field(repr=False)
    relative_intensity: float = 0.6


@dataclass(frozen=True)
class SpotPatternTruth:
    """Ground truth of a simulated spot pattern."""

    phase: str
    zone: tuple[int, int, int]
    camera_constant_px_A: float
    rotation_deg: float
    centre_xy: tuple[float, float]
    ellipse: Ellipse
    voltage_kv: float
    hkl: np.ndarray = field(repr=False)  # (N, 3) drawn reflections (extra spots have hkl 0 0 0)
    xy: np.ndarray = field(repr=False)  # (N, 2) observed positions
    d_A: np.ndarray = field(repr=False)
    snr: np.ndarray = field(repr=False)
    forbidden: np.ndarray = field(repr=False)  # bool: kinematically forbidden, added as double diffraction
    extra: np.ndarray = field(repr=False)  # bool: spurious spot (dust, second grain)
    laue_zone: np.ndarray | None = field(default=None, repr=False)  # (N,) int: h·u of each spot (0 = ZOLZ)
    second: np.ndarray | None = field(default=None, repr=False)  # (N,) bool: spot of the second crystal
    tilt_mrad: float = 0.0
    tilt_azimuth_deg: float = 0.0  # image direction from the centre to the Laue-circle centre
    laue_circle_centre_xy: tuple[float, float] | None = None

    def to_dict(self) -> dict:
        return {
            "phase": self.phase, "zone": list(self.zone), "camera_constant_px_A": self.camera_constant_px_A,
            "rotation_deg": self.rotation_deg, "centre_px": list(self.centre_xy), "ellipse": self.ellipse.to_dict(),
            "voltage_kv": self.voltage_kv, "tilt_mrad": self.tilt_mrad, "tilt_azimuth_deg": self.tilt_azimuth_deg,
            "laue_circle_centre_px": None if self.laue_circle_centre_xy is None else list(self.laue_circle_centre_xy),
            "spots": [{"hkl": [int(v) for v in h], "x": float(p[0]), "y": float(p[1]), "d_A": float(d),
                       "snr": float(s), "forbidden": bool(f), "extra": bool(e),
                       "laue_zone": 0 if self.laue_zone is None else int(self.laue_zone[i]),
                       "second": False if self.second is None else bool(self.second[i])}
                      for i, (h, p, d, s, f, e) in enumerate(zip(self.hkl, self.xy, self.d_A, self.snr, self.forbidden,
                                                                 self.extra))],
        }


@dataclass(frozen=True)
class RingPatternTruth:
    """Ground truth of a simulated ring pattern."""

    phase: str
    camera_constant_px_A: float
    centre_xy: tuple[float, float]
    ellipse: Ellipse
    voltage_kv: float
    hkl: tuple[tuple[int, int, int], ...]
    d_A: np.ndarray = field(repr=False)
    radius_px: np.ndarray = field(repr=False)
    relative_intensity: np.ndarray = field(repr=False)
    admixture: tuple["RingPatternTruth", ...] = ()  # rings of the other phases of a mixture

    def to_dict(self) -> dict:
        out = {
            "phase": self.phase, "camera_constant_px_A": self.camera_constant_px_A, "centre_px": list(self.centre_xy),
            "ellipse": self.ellipse.to_dict(), "voltage_kv": self.voltage_kv,
            "rings": [{"hkl": list(h), "d_A": float(d), "radius_px": float(r), "relative_intensity": float(i)}
                      for h, d, r, i in zip(self.hkl, self.d_A, self.radius_px, self.relative_intensity)],
        }
        if self.admixture:
            out["admixture"] = [t.to_dict() for t in self.admixture]
        return out


def _default_centre(shape, rng):
    rows, cols = shape
    jitter = rng.uniform(-0.05, 0.05, 2) * np.array([cols, rows]) if rng is not None else np.zeros(2)
    return (cols / 2 - 0.5 + 0.37 + jitter[0], rows / 2 - 0.5 - 0.21 + jitter[1])


def simulate_spot_pattern(
    phase: Phase,
    zone,
    *,
    shape: tuple[int, int] = (512, 512),
    camera_constant_px_A: float = 600.0,
    rotation_deg: float = 0.0,
    centre_xy=None,
    ellipse: Ellipse = NO_DISTORTION,
    voltage_kv: float = 200.0,
    thickness_A: float = 250.0,
    peak_counts: float = 4000.0,
    spot_sigma_px: float = 1.6,
    min_relative_intensity: float = 2e-3,
    double_diffraction: bool = False,
    n_missing: int = 0,
    n_extra: int = 0,
    background_counts: float = 300.0,
    beam_stop: BeamStop | None = None,
    detector: Detector = Detector(),
    rng: np.random.Generator | None = None,
    tilt_mrad: float = 0.0,
    tilt_azimuth_deg: float = 0.0,
    laue_zones: int = 0,
    holz_relative_intensity: float = 0.15,
    intensity_scatter: float = 0.0,
    second: SecondCrystal | None = None,
) -> tuple[np.ndarray, SpotPatternTruth]:
    """Simulate a zero-order Laue-zone spot pattern of ``phase`` along ``zone``.

    Parameters
    ----------
    phase : Phase
    zone : [u, v, w]
        Zone axis (direct-lattice direction).
    shape : (rows, cols)
    camera_constant_px_A : float
        K in pixel·Å (R = K/d).
    rotation_deg : float
        In-plane rotation of the pattern.
    centre_xy : [x, y], optional
        Defaults to near the image centre (off by a fraction of a pixel).
    ellipse : Ellipse
        Projector distortion.
    voltage_kv : float
        Accelerating voltage (wavelength and Ewald-sphere curvature).
    thickness_A : float
        Foil thickness for the relrod factor.
    peak_counts : float
        Peak height of the strongest spot, counts.
    min_relative_intensity : float
        Weaker reflections are not drawn.
    double_diffraction : bool
        Also draw kinematically forbidden ZOLZ reflections that are sums of
        two allowed ones, at 30 % of the weaker of the two (dynamical effects).
    n_missing, n_extra : int
        Remove this many random drawn spots; add this many spurious spots.
    beam_stop, detector, rng
        Passed to :func:`~saedkit.core.simulation.render.render_pattern`.
    tilt_mrad, tilt_azimuth_deg : float
        Beam tilt away from the zone axis, and the image direction (degrees
        from +x towards +y) from the pattern centre to the centre of the
        Laue circle (the side of the pattern that stays bright). The
        excitation errors follow the tilted Ewald sphere; positions stay
        the projection on the zone plane (small tilts).
    laue_zones : int
        Also draw the reflections of the first ``laue_zones`` populated
        higher-order Laue zones (HOLZ, ``h·u ≠ 0``) that the Ewald sphere
        excites, the brightest at ``holz_relative_intensity`` of the
        strongest ZOLZ spot (high-angle structure factors are small; the
        ring shows on a detector's log scale).
    intensity_scatter : float
        Standard deviation of ``ln I``: each spot's intensity is multiplied
        by a log-normal factor (dynamical scattering scrambles intensities).
        Uses ``rng`` (or a fixed seed).
    second : SecondCrystal, optional
        A second crystal whose excited reflections are drawn too.

    Returns
    -------
    image : ndarray
    truth : SpotPatternTruth
    """
    K = check_positive("camera_constant_px_A", camera_constant_px_A)
    uvw = tuple(int(v) for v in reduce_indices(zone))
    rows, cols = shape
    c = np.asarray(centre_xy if centre_xy is not None else _default_centre(shape, rng), float)
    r_max = np.hypot(max(c[0], cols - c[0]), max(c[1], rows - c[1]))
    lam = calculate_wavelength_A(voltage_kv)
    e1, e2, uhat = calculate_zone_frame(phase.cell, uvw)
    tilt = float(tilt_mrad) * 1e-3
    # the Laue-circle centre lies at −k·sin(τ)·n̂ in the zone plane: n̂ points away from the image
    # direction tilt_azimuth_deg (mapped back through the in-plane rotation)
    q_dir = rotation_matrix_2d(-rotation_deg) @ np.array([math.cos(math.radians(tilt_azimuth_deg)),
                                                          math.sin(math.radians(tilt_azimuth_deg))])
    n_hat = -(q_dir[0] * e1 + q_dir[1] * e2)
    k_hat = math.cos(tilt) * uhat + math.sin(tilt) * n_hat
    g_lim = r_max / K
    if laue_zones:
        # HOLZ rings lie at |g| ≈ sqrt(2H/λ): the reflection list must reach past the image
        g_lim = math.hypot(g_lim, 3.0 * laue_zones / phase.cell.calculate_direction_length_A(uvw))
    table = calculate_reflections(phase, g_max_per_A=g_lim, voltage_kv=voltage_kv)
    layer_all = table.hkl @ np.array(uvw)
    zolz = table.select(layer_all == 0)
    if tilt == 0.0:
        s = calculate_excitation_error_array(phase.cell, uvw, zolz.hkl, wavelength_A=lam) if len(zolz) else np.zeros(0)
    else:
        s = _excitation_error_array(zolz.hkl @ phase.cell.reciprocal_basis.T, k_hat, lam)
    relrod = 1.0 / (1.0 + (np.pi * thickness_A * s) ** 2)
    inten = zolz.intensity * relrod
    allowed = zolz.allowed.copy()
    forbidden = np.zeros(len(zolz), bool)
    if double_diffraction and np.any(allowed):
        ah = zolz.hkl[allowed]
        ai = inten[allowed]
        lookup = {tuple(h): i for i, h in enumerate(ah.tolist())}
        for i in np.flatnonzero(~allowed):
            h = zolz.hkl[i]
            best = 0.0
            for j, h1 in enumerate(ah):
                k = lookup.get(tuple((h - h1).tolist()))
                if k is not None:
                    best = max(best, min(ai[j], ai[k]))
            if best > 0 and not phase.is_centring_absent_array(h)[0]:
                inten[i] = 0.3 * best
                forbidden[i] = True
    i_ref = inten[allowed].max() if allowed.any() else 1.0
    draw = (allowed | forbidden) & (inten >= min_relative_intensity * i_ref)
    hkl = zolz.hkl[draw]
    inten = inten[draw]
    forbidden = forbidden[draw]
    layer = np.zeros(len(hkl), int)
    is_second = np.zeros(len(hkl), bool)
    offsets = calculate_pattern_offsets_array(phase.cell, uvw, hkl, camera_constant_px_A=K, rotation_deg=rotation_deg)
    if laue_zones:
        # a centred cell can leave the layers h·u = ±1 empty: count populated layers only
        populated = np.abs(layer_all[(layer_all != 0) & table.allowed])
        step = int(populated.min()) if len(populated) else 1
        holz = table.select((layer_all != 0) & (np.abs(layer_all) <= int(laue_zones) * step) & table.allowed)
        if len(holz):
            sh = _excitation_error_array(holz.hkl @ phase.cell.reciprocal_basis.T, k_hat, lam)
            ih = holz.intensity / (1.0 + (np.pi * thickness_A * sh) ** 2)
            # only the central maximum of the shape function (|s| < 1/t; the Lorentzian tail of the
            # relrod factor overstates far low-angle reflections); high-angle |F|² is small, so the
            # brightest HOLZ spot is drawn at holz_relative_intensity
            keep = (np.abs(sh) < 1.0 / thickness_A)
            keep &= ih >= 0.05 * (ih[keep].max() if keep.any() else 1.0)
            holz = holz.select(keep)
            ih = ih[keep]
            keep = np.ones(len(ih), bool)
            hkl = np.vstack([hkl, holz.hkl])
            inten = np.concatenate([inten, ih[keep] / ih[keep].max() * i_ref * float(holz_relative_intensity)])
            forbidden = np.concatenate([forbidden, np.zeros(len(holz), bool)])
            layer = np.concatenate([layer, holz.hkl @ np.array(uvw)])
            is_second = np.concatenate([is_second, np.zeros(len(holz), bool)])
            offsets = np.vstack([offsets, calculate_pattern_offsets_array(
                phase.cell, uvw, holz.hkl, camera_constant_px_A=K, rotation_deg=rotation_deg)])
    if second is not None:
        R12 = np.asarray(second.orientation, float)
        t2 = calculate_reflections(second.phase, g_max_per_A=r_max / K, voltage_kv=voltage_kv)
        t2 = t2.select(t2.allowed)
        g2 = (t2.hkl @ second.phase.cell.reciprocal_basis.T) @ R12.T  # in the first crystal's frame
        s2 = _excitation_error_array(g2, k_hat, lam)
        i2 = t2.intensity / (1.0 + (np.pi * thickness_A * s2) ** 2)
        keep = i2 >= min_relative_intensity * float(i2.max() if len(i2) else 1.0)
        i2 = i2[keep] / (i2[keep].max() if keep.any() else 1.0) * i_ref * float(second.relative_intensity)
        q2 = np.stack([g2[keep] @ e1, g2[keep] @ e2], axis=1) * K
        hkl = np.vstack([hkl, t2.hkl[keep]])
        inten = np.concatenate([inten, i2])
        forbidden = np.concatenate([forbidden, np.zeros(int(keep.sum()), bool)])
        layer = np.concatenate([layer, np.zeros(int(keep.sum()), int)])
        is_second = np.concatenate([is_second, np.ones(int(keep.sum()), bool)])
        offsets = np.vstack([offsets, q2 @ rotation_matrix_2d(rotation_deg).T])
    if intensity_scatter:
        scr = rng if rng is not None else np.random.default_rng(1)
        inten = inten * np.exp(scr.normal(0.0, float(intensity_scatter), len(inten)))
    obs = c + ellipse.distort_array(offsets) if len(offsets) else np.zeros((0, 2))
    margin = 4 * spot_sigma_px
    inside = (obs[:, 0] > margin) & (obs[:, 0] < cols - 1 - margin) & (obs[:, 1] > margin) & (obs[:, 1] < rows - 1 - margin)
    hkl, inten, forbidden, offsets = hkl[inside], inten[inside], forbidden[inside], offsets[inside]
    layer, is_second = layer[inside], is_second[inside]
    gen = rng if rng is not None else np.random.default_rng(0)
    if n_missing and len(hkl) > n_missing:
        keep = np.ones(len(hkl), bool)
        keep[gen.choice(len(hkl), n_missing, replace=False)] = False
        hkl, inten, forbidden, offsets = hkl[keep], inten[keep], forbidden[keep], offsets[keep]
        layer, is_second = layer[keep], is_second[keep]
    extra = np.zeros(len(hkl), bool)
    if n_extra:
        ex = np.column_stack([gen.uniform(margin, cols - 1 - margin, n_extra),
                              gen.uniform(margin, rows - 1 - margin, n_extra)]) - c
        offsets = np.vstack([offsets, ellipse.correct_array(ex)])
        inten = np.concatenate([inten, np.full(n_extra, np.median(inten) if len(inten) else 1.0)])
        hkl = np.vstack([hkl, np.zeros((n_extra, 3), int)])
        forbidden = np.concatenate([forbidden, np.zeros(n_extra, bool)])
        extra = np.concatenate([extra, np.ones(n_extra, bool)])
        layer = np.concatenate([layer, np.zeros(n_extra, int)])
        is_second = np.concatenate([is_second, np.zeros(n_extra, bool)])
    peaks = peak_counts * inten / (inten.max() if len(inten) else 1.0)
    image, rt = render_pattern(
        shape, c, spot_offsets_xy=offsets, spot_intensity=peaks, spot_sigma_px=spot_sigma_px,
        ellipse=ellipse, background_intensity=background_counts, beam_stop=beam_stop,
        detector=detector, rng=rng,
    )
    d = np.where(extra, np.nan, 1.0 / np.maximum(phase.cell.calculate_g_array(np.where(extra[:, None], 1, hkl)), 1e-12)) if len(hkl) else np.zeros(0)
    if second is not None and is_second.any():
        d[is_second] = 1.0 / second.phase.cell.calculate_g_array(hkl[is_second])
    laue_xy = None
    if tilt:
        q_c = -math.sin(tilt) / lam * np.array([n_hat @ e1, n_hat @ e2]) * K
        laue_xy_v = c + ellipse.distort_array((rotation_matrix_2d(rotation_deg) @ q_c)[None, :])[0]
        laue_xy = (float(laue_xy_v[0]), float(laue_xy_v[1]))
    truth = SpotPatternTruth(phase.name, uvw, K, float(rotation_deg), (float(c[0]), float(c[1])), ellipse,
                             float(voltage_kv), hkl, rt.spot_xy, d, rt.spot_snr, forbidden, extra,
                             laue_zone=layer, second=is_second, tilt_mrad=float(tilt_mrad),
                             tilt_azimuth_deg=float(tilt_azimuth_deg), laue_circle_centre_xy=laue_xy)
    return image, truth


def _ring_extra_model(shape, c, ellipse, R, power, *, ring_width_px, spots_per_ring, multiplicity,
                      texture_arc_deg, texture_arcs, halo_counts, halo_radius_px, halo_sigma_px, gen):
    """Noise-free model of spotty or textured rings and of an amorphous halo (counts per pixel)."""
    rows, cols = shape
    yy, xx = np.indices((rows, cols), dtype=np.float64)
    ideal = ellipse.correct_array(np.stack([(xx - c[0]).ravel(), (yy - c[1]).ravel()], axis=1))
    r_ideal = np.hypot(*ideal.T).reshape(rows, cols)
    ang = np.arctan2(ideal[:, 1], ideal[:, 0]).reshape(rows, cols)
    model = np.zeros((rows, cols))
    if halo_counts > 0:
        model += halo_counts * np.exp(-0.5 * ((r_ideal - halo_radius_px) / halo_sigma_px) ** 2)
    s = ring_width_px
    m_ref = float(np.max(multiplicity)) if len(multiplicity) else 1.0
    for i, (rad, p) in enumerate(zip(R, power)):
        if spots_per_ring is not None:
            # each grain in the Bragg condition gives one spot (and its Friedel mate); more
            # reflections in the family (multiplicity m) give proportionally more spots
            n = max(1, int(gen.poisson(max(spots_per_ring * multiplicity[i] / m_ref, 0.5) / 2.0)))
            phi = gen.uniform(0.0, 2.0 * np.pi, n)
            phi = np.concatenate([phi, phi + np.pi])
            share = gen.lognormal(0.0, 0.5, n)
            share = np.concatenate([share, share])
            share *= p / share.sum()  # each spot's integrated counts
            offs = rad * np.stack([np.cos(phi), np.sin(phi)], axis=1)
            obs = c + ellipse.distort_array(offs)
            half = int(np.ceil(5 * s)) + 1
            for (sx, sy), a in zip(obs, share):
                x0, x1 = max(int(sx) - half, 0), min(int(sx) + half + 2, cols)
                y0, y1 = max(int(sy) - half, 0), min(int(sy) + half + 2, rows)
                if x0 >= x1 or y0 >= y1:
                    continue
                gx = np.exp(-((np.arange(x0, x1) - sx) ** 2) / (2 * s * s))
                gy = np.exp(-((np.arange(y0, y1) - sy) ** 2) / (2 * s * s))
                model[y0:y1, x0:x1] += a / (2 * np.pi * s * s) * np.outer(gy, gx)
            continue
        band = np.abs(r_ideal - rad) < 6 * s
        h = p / (2 * np.pi * rad * np.sqrt(2 * np.pi) * s)  # peak height of the uniform ring
        weight = np.ones(np.count_nonzero(band))
        if texture_arc_deg is not None:
            # arcs in Friedel pairs (φ and φ + 180°) at random azimuths, each ring its own
            centres = gen.uniform(0.0, np.pi, texture_arcs)
            sig = np.deg2rad(texture_arc_deg) / 2.3548
            a = ang[band]
            weight = np.zeros(len(a))
            for c0 in centres:
                dphi = np.angle(np.exp(1j * 2 * (a - c0))) / 2.0  # distance to the nearer of c0, c0 + π
                weight += np.exp(-0.5 * (dphi / sig) ** 2)
            # the ring's total power is kept: the arcs carry what the full ring would
            weight *= 2 * np.pi / (2 * texture_arcs * np.sqrt(2 * np.pi) * sig)
        model[band] += h * weight * np.exp(-((r_ideal[band] - rad) ** 2) / (2 * s * s))
    return model


def _excitation_error_array(g_cart: np.ndarray, k_hat: np.ndarray, wavelength_A: float) -> np.ndarray:
    """Excitation error s_g (Å⁻¹) of Cartesian reciprocal vectors for a beam along ``k_hat``."""
    k = 1.0 / wavelength_A
    kg = np.atleast_2d(g_cart) + k * k_hat
    return (k**2 - np.sum(kg * kg, axis=1)) / (2 * np.linalg.norm(kg, axis=1))


def simulate_ring_pattern(
    phase: Phase,
    *,
    shape: tuple[int, int] = (512, 512),
    camera_constant_px_A: float = 600.0,
    centre_xy=None,
    ellipse: Ellipse = NO_DISTORTION,
    voltage_kv: float = 200.0,
    peak_counts: float = 1500.0,
    ring_width_px: float = 1.5,
    background_counts: float = 400.0,
    beam_stop: BeamStop | None = None,
    detector: Detector = Detector(),
    spots_per_ring: float | None = None,
    texture_arc_deg: float | None = None,
    texture_arcs: int = 2,
    halo_counts: float = 0.0,
    halo_d_A: float = 2.1,
    halo_width_per_A: float = 0.08,
    admixture: Sequence[tuple[Phase, float]] = (),
    rng: np.random.Generator | None = None,
) -> tuple[np.ndarray, RingPatternTruth]:
    """Simulate the ring pattern of a polycrystalline film of ``phase``.

    Ring heights follow ``m·|F|² / R`` (the ring's power spread over its
    circumference), scaled so the strongest ring peaks at ``peak_counts``.
    By default the film is fine-grained and untextured (smooth, uniform rings).

    Parameters
    ----------
    phase : Phase
    shape, camera_constant_px_A, centre_xy, ellipse, voltage_kv
        Image size, K (pixel·Å), centre, distortion, voltage.
    peak_counts : float
        Peak height of the strongest ring of ``phase`` as a uniform ring, counts.
    ring_width_px : float
        Gaussian sigma of a ring's radial profile (and of a grain's spot).
    background_counts : float
        Diffuse background (see :func:`~saedkit.core.simulation.render.render_pattern`).
    beam_stop, detector
        As for :func:`~saedkit.core.simulation.render.render_pattern`.
    spots_per_ring : float, optional
        A nanocrystalline film of few grains: each ring is a set of discrete
        spots (in Friedel pairs) at random azimuths, on average this many on
        the ring of largest multiplicity and proportionally fewer on the others,
        with log-normal (σ = 0.5) scatter of their strengths; a ring keeps its
        total power.
    texture_arc_deg : float, optional
        A textured film: each ring is seen only in ``texture_arcs`` pairs of
        arcs (φ and φ + 180°) of this FWHM at random azimuths, keeping its power.
    texture_arcs : int
        Arc pairs per ring when textured.
    halo_counts, halo_d_A, halo_width_per_A : float
        An amorphous support-film halo: a broad Gaussian hump of this peak height
        (counts) centred at ``1/halo_d_A`` in reciprocal space with this σ (Å⁻¹),
        so at ``K/halo_d_A`` pixels with σ ``K·halo_width_per_A``. The default
        2.1 Å is about where the first maximum of amorphous carbon lies (from memory).
    admixture : sequence of (Phase, weight)
        Further phases in the film (a specimen on a standard, a two-phase
        mixture): their rings are drawn the same way, scaled so that each
        phase's strongest ring is ``weight`` times ``peak_counts``.
    rng : numpy.random.Generator, optional
        Noise, grain and texture source; without one the image is noiseless
        (and the grains and arcs come from a fixed seed).

    Returns
    -------
    image : ndarray
    truth : RingPatternTruth
        The rings of ``phase``; those of each admixed phase are in ``truth.admixture``.
    """
    K = check_positive("camera_constant_px_A", camera_constant_px_A)
    rows, cols = shape
    c = np.asarray(centre_xy if centre_xy is not None else _default_centre(shape, rng), float)
    r_max = min(c[0], cols - 1 - c[0], c[1], rows - 1 - c[1]) * (1 - ellipse.ellipticity) - 4 * ring_width_px

    def rings_of(ph, weight):
        fams = calculate_ring_families(ph, d_min_A=K / max(r_max, 1.0), voltage_kv=voltage_kv)
        d = np.array([f.d_A for f in fams])
        R = K / d
        h = np.array([f.intensity for f in fams]) / R
        h = weight * h / h.max() if len(h) else h
        return fams, d, R, h

    fams, d, R, h = rings_of(phase, 1.0)
    parts = [(phase, fams, d, R, h)]
    for ph, wgt in admixture:
        if not isinstance(ph, Phase):
            raise InputError(f"admixture must hold (Phase, weight) pairs, got {type(ph).__name__}")
        parts.append((ph, *rings_of(ph, check_positive("admixture weight", wgt))))
    plain = spots_per_ring is None and texture_arc_deg is None
    if spots_per_ring is not None:
        spots_per_ring = check_positive("spots_per_ring", spots_per_ring)
    if texture_arc_deg is not None:
        texture_arc_deg = check_positive("texture_arc_deg", texture_arc_deg)
        if int(texture_arcs) < 1:
            raise InputError(f"texture_arcs must be >= 1, got {texture_arcs!r}")
    all_R = np.concatenate([p[3] for p in parts])
    all_h = np.concatenate([p[4] for p in parts])
    image, rt = render_pattern(
        shape, c, ring_radius_px=all_R if plain else None, ring_intensity=peak_counts * all_h if plain else None,
        ring_width_px=ring_width_px, ellipse=ellipse, background_intensity=background_counts, beam_stop=beam_stop,
        detector=detector, rng=rng,
    )
    if not plain or halo_counts > 0:
        gen = rng if rng is not None else np.random.default_rng(0)
        mult = np.concatenate([[f.multiplicity for f in p[1]] for p in parts]).astype(float)
        power = peak_counts * all_h * 2 * np.pi * all_R * np.sqrt(2 * np.pi) * ring_width_px
        extra = _ring_extra_model(
            (rows, cols), c, ellipse, [] if plain else all_R, [] if plain else power,
            ring_width_px=ring_width_px, spots_per_ring=spots_per_ring, multiplicity=mult,
            texture_arc_deg=texture_arc_deg, texture_arcs=int(texture_arcs),
            halo_counts=float(halo_counts), halo_radius_px=K / check_positive("halo_d_A", halo_d_A),
            halo_sigma_px=K * check_positive("halo_width_per_A", halo_width_per_A), gen=gen,
        )
        if rt.beam_stop_mask is not None:
            extra[rt.beam_stop_mask] *= beam_stop.transmission
        gain = detector.counts_per_unit
        # a sum of independent Poisson variables is Poisson: the extra signal's own noise is added
        add = gen.poisson(np.clip(extra * gain, 0, 1e12)) / gain if rng is not None else extra
        total = np.clip(image.astype(np.float64) + add, 0, detector.full_well)
        image = (np.round(total) if np.dtype(detector.dtype).kind in "ui" else total).astype(detector.dtype)
    truths = [RingPatternTruth(p[0].name, K, (float(c[0]), float(c[1])), ellipse, float(voltage_kv),
                               tuple(f.hkl for f in p[1]), p[2], p[3], p[4]) for p in parts]
    truth = RingPatternTruth(phase.name, K, (float(c[0]), float(c[1])), ellipse, float(voltage_kv),
                             tuple(f.hkl for f in fams), d, R, h, admixture=tuple(truths[1:]))
    return image, truth
