"""Whole analyses of one pattern, as the command line, the batch runner and the demo run them.

Each function chains the core steps (mask → centre → spots or rings →
calibration → match or identification) with the same defaults as the
desktop program, and returns an :class:`~saedkit.core.workflow.analysis.Analysis`.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from saedkit.core.workflow.analysis import Analysis
from saedkit.core.detection.centre import CentreResult
from saedkit.core.crystallography.crystal import Phase
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError

__all__ = ["analyse_spot_pattern", "analyse_ring_pattern", "calibration_terms"]

Progress = Callable[[int, int], None]
Stop = Callable[[], bool]


def calibration_terms(calibration=None, *, camera_constant_px_A: float | None = None,
                      camera_constant_sigma_px_A: float | None = None) -> tuple[float | None, float, Ellipse]:
    """(K, σ_K, ellipse) from a calibration (fitted or saved) or a typed-in K."""
    if calibration is not None and camera_constant_px_A is not None:
        raise InputError("give a calibration or a camera constant, not both")
    if calibration is not None:
        return (float(calibration.camera_constant_px_A), float(calibration.camera_constant_sigma_px_A or 0.0),
                calibration.ellipse)
    if camera_constant_px_A is not None:
        return float(camera_constant_px_A), float(camera_constant_sigma_px_A or 0.0), NO_DISTORTION
    return None, 0.0, NO_DISTORTION


def _stage(progress: Progress | None, done: int, total: int) -> None:
    if progress is not None:
        progress(done, total)


def analyse_spot_pattern(
    image,
    *,
    phases: Sequence[Phase] = (),
    calibration=None,
    camera_constant_px_A: float | None = None,
    camera_constant_sigma_px_A: float | None = None,
    voltage_kv: float | None = None,
    mask: np.ndarray | None = None,
    centre_xy=None,
    min_snr: float = 5.0,
    d_tolerance_pct: float = 2.5,
    angle_tolerance_deg: float = 2.0,
    max_index: int = 10,
    top: int = 10,
    progress: Progress | None = None,
    should_stop: Stop | None = None,
) -> Analysis:
    """Centre, spots and (with phases) the zone-axis match of a single-crystal pattern.

    Parameters
    ----------
    image : PatternImage
    phases : sequence of Phase
        Candidate phases; without any the analysis stops after the spots.
    calibration : Calibration or SavedCalibration, optional
        Supplies K, σ_K and the ellipse correction.
    camera_constant_px_A, camera_constant_sigma_px_A : float, optional
        A typed-in K instead of a calibration.
    voltage_kv : float, optional
        Defaults to the image's metadata, then 200 kV.
    mask : bool array, optional
        Pixels to exclude; default: the image's mask plus saturated pixels and the beam stop.
    centre_xy : [x, y], optional
        A known centre (skips the Friedel search).
    """
    from saedkit.core.detection.centre import find_centre, manual_centre
    from saedkit.core.detection.masks import find_auto_mask
    from saedkit.core.indexing.matching import match_zone_axes
    from saedkit.core.detection.spots import find_spots, spots_xy_array

    K, K_sig, ellipse = calibration_terms(calibration, camera_constant_px_A=camera_constant_px_A,
                                          camera_constant_sigma_px_A=camera_constant_sigma_px_A)
    kv = float(voltage_kv or getattr(image, "voltage_kv", None) or 200.0)
    data = image.data
    total = 4 if phases else 3
    if mask is None:
        mask = np.asarray(image.mask, bool) | find_auto_mask(data, saturation_value=image.saturation_value)
    _stage(progress, 1, total)
    if centre_xy is not None:
        centre = manual_centre(float(centre_xy[0]), float(centre_xy[1]), sigma_px=0.5)
    else:
        centre = find_centre(data, mask=mask)
    _stage(progress, 2, total)
    spots = find_spots(data, mask=mask, centre_xy=centre.xy, min_snr=min_snr, should_stop=should_stop)
    _stage(progress, 3, total)
    match = None
    if phases and len(spots) >= 3:
        sig = np.array([np.hypot(s.sigma_x, s.sigma_y) / np.sqrt(2) for s in spots])
        match = match_zone_axes(
            spots_xy_array(spots), centre.xy, list(phases), camera_constant_px_A=K,
            camera_constant_sigma_px_A=K_sig, ellipse=ellipse, voltage_kv=kv, d_tolerance_pct=d_tolerance_pct,
            angle_tolerance_deg=angle_tolerance_deg, max_index=max_index, top=top, spots_sigma_px=sig,
            image_shape=data.shape, mask=mask, should_stop=should_stop,
        )
        lat = match.lattice
        if lat is not None and np.all(np.isfinite(lat.centre_sigma_px)):
            centre = CentreResult(lat.centre_xy[0], lat.centre_xy[1], lat.centre_sigma_px[0], lat.centre_sigma_px[1],
                                  "spot-lattice", int(np.sum(lat.inliers)))
        _stage(progress, 4, total)
    params = {
        "voltage_kv": kv, "min_snr": min_snr, "d_tolerance_pct": d_tolerance_pct,
        "angle_tolerance_deg": angle_tolerance_deg, "max_index": max_index, "top": top,
        "phases": [p.name for p in phases], "camera_constant_px_A": K, "camera_constant_sigma_px_A": K_sig,
        "ellipse": ellipse.to_dict(), "calibration": getattr(calibration, "name", None),
    }
    return Analysis(image=image, centre=centre, spots=tuple(spots), calibration=calibration, match=match,
                    parameters=params)


def analyse_ring_pattern(
    image,
    *,
    standard: Phase | None = None,
    calibration=None,
    camera_constant_px_A: float | None = None,
    voltage_kv: float | None = None,
    pixel_size_um: float | None = None,
    phases: Sequence[Phase] = (),
    mask: np.ndarray | None = None,
    d_tolerance_pct: float = 1.5,
    progress: Progress | None = None,
    should_stop: Stop | None = None,
) -> Analysis:
    """Rings of a polycrystalline pattern: calibrate against a standard, or measure and identify phases.

    With ``standard`` the camera constant is fitted (the pattern is a
    calibration film); otherwise the rings are measured, converted to d
    with the given calibration or K, and, with ``phases``, the phases are ranked.
    """
    from saedkit.core.calibration.calibrate import calibrate_from_rings
    from saedkit.core.indexing.identify import identify_phases
    from saedkit.core.detection.masks import find_auto_mask
    from saedkit.core.detection.rings import find_rings

    kv = float(voltage_kv or getattr(image, "voltage_kv", None) or 200.0)
    px = pixel_size_um or getattr(image, "pixel_size_um", None)
    data = image.data
    if mask is None:
        mask = np.asarray(image.mask, bool) | find_auto_mask(data, saturation_value=image.saturation_value)
    params = {"voltage_kv": kv, "pixel_size_um": px, "d_tolerance_pct": d_tolerance_pct,
              "standard": None if standard is None else standard.name, "phases": [p.name for p in phases]}
    if standard is not None:
        if calibration is not None or camera_constant_px_A is not None:
            raise InputError("a standard is calibrated from scratch: give no calibration or camera constant with it")
        cal = calibrate_from_rings(image, standard, voltage_kv=kv, mask=mask, pixel_size_um=px,
                                   progress=progress, should_stop=should_stop)
        return Analysis(image=image, centre=cal.centre, calibration=cal, parameters=params)
    ring_fit = find_rings(data, mask=mask, progress=progress, should_stop=should_stop)
    K, K_sig, _ = calibration_terms(calibration, camera_constant_px_A=camera_constant_px_A)
    phase_id = None
    if phases and K is not None and ring_fit.rings:
        d = [K / r.radius_px for r in ring_fit.rings]
        phase_id = identify_phases(d, list(phases), intensities=[max(r.height, 0.0) for r in ring_fit.rings],
                                   d_tolerance_pct=d_tolerance_pct)
    params["camera_constant_px_A"] = K
    return Analysis(image=image, centre=ring_fit.centre, ring_fit=ring_fit, calibration=calibration,
                    phase_id=phase_id, parameters=params)


def calibrate_spot_standard(
    image,
    standard: Phase,
    *,
    voltage_kv: float | None = None,
    zone=None,
    pixel_size_um: float | None = None,
    mask: np.ndarray | None = None,
    min_snr: float = 5.0,
    fit_ellipse: bool = True,
    should_stop: Stop | None = None,
):
    """Camera constant from a single-crystal pattern of a known standard (e.g. Si along [011]).

    The zone-axis matcher indexes the pattern against the standard alone
    (uncalibrated: ratios and angles); when ``zone`` is given, the best
    candidate of that zone family is taken. Its indexed spots then feed
    :func:`~saedkit.core.calibration.calibrate.calibrate_from_spots`, which fits K
    and the ellipse over all of them.

    Raises
    ------
    FitError
        When too few spots are found, or no zone of the standard (of the
        given family) explains the pattern.
    """
    from saedkit.core.calibration.calibrate import calibrate_from_spots
    from saedkit.core.detection.centre import find_centre
    from saedkit.core.errors import FitError
    from saedkit.core.detection.masks import find_auto_mask
    from saedkit.core.indexing.matching import match_zone_axes
    from saedkit.core.detection.spots import find_spots, spots_xy_array
    from saedkit.core.crystallography.structure_factors import canonical_indices

    kv = float(voltage_kv or getattr(image, "voltage_kv", None) or 200.0)
    px = pixel_size_um or getattr(image, "pixel_size_um", None)
    data = image.data
    if mask is None:
        mask = np.asarray(image.mask, bool) | find_auto_mask(data, saturation_value=image.saturation_value)
    centre = find_centre(data, mask=mask)
    spots = find_spots(data, mask=mask, centre_xy=centre.xy, min_snr=min_snr, should_stop=should_stop)
    if len(spots) < 3:
        raise FitError(f"{getattr(image, 'source_path', 'the image')}: only {len(spots)} spots found; "
                       "a single-crystal standard needs at least 3")
    xy = spots_xy_array(spots)
    match = match_zone_axes(xy, centre.xy, [standard], voltage_kv=kv, image_shape=data.shape, mask=mask,
                            top=20, should_stop=should_stop)
    cands = list(match.candidates)
    if zone is not None:
        fam = tuple(canonical_indices(standard.calculate_equivalent_directions(zone)))
        cands = [c for c in cands if tuple(canonical_indices(standard.calculate_equivalent_directions(c.zone))) == fam]
    if not cands:
        where = "" if zone is None else f" along a zone of the [{' '.join(str(int(v)) for v in zone)}] family"
        raise FitError(f"no zone of {standard.name}{where} explains this spot pattern")
    best = cands[0]
    indexed = [s for s in best.spots if s.hkl is not None and not s.forbidden]
    lat = match.lattice
    c_xy = np.array(lat.centre_xy if lat is not None else centre.xy)

    def offset(s):
        return np.array([s.x, s.y]) - c_xy

    # the candidate's first basis reflection, then a spot well off its line: they fix the 2-D basis
    a = next((s for s in indexed if s.hkl == tuple(best.basis_hkl[0])), indexed[0] if indexed else None)
    b = None
    if a is not None:
        va = offset(a)
        b = next((s for s in indexed if abs(va[0] * offset(s)[1] - va[1] * offset(s)[0])
                  > 0.3 * np.linalg.norm(va) * np.linalg.norm(offset(s))), None)
    if b is None:
        raise FitError("the indexed spots do not give two independent reflections")
    first = [a, b]
    refl = [((s.x, s.y), s.hkl) for s in first] + [((s.x, s.y), s.hkl) for s in indexed if s not in first]
    return calibrate_from_spots(xy, c_xy, standard, voltage_kv=kv, reflections=refl, pixel_size_um=px,
                                fit_ellipse=fit_ellipse, image_sha256=getattr(image, "sha256", None))
