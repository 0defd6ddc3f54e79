"""The analysis of one pattern as public steps, and the whole analyses built from them.

Steps (each usable alone, from a script, the command line, the batch runner
or the desktop program):

- :func:`prepare_mask` — the image's mask plus saturated pixels and the beam stop;
- :func:`locate_centre` — the centre from Friedel symmetry (or a known one);
- :func:`detect_spots` — spots about the centre;
- :func:`detect_rings` — rings, centre and ellipse of a ring pattern;
- :func:`calibrate_rings` / :func:`calibrate_spot_standard` — the camera constant on a standard;
- :func:`search_zone_axes` — rank zone axes, then measure every candidate's spots
  with the one measurement function (:func:`saedkit.core.measure.measure_positions`);
- :func:`identify_ring_phases` — rank phases against ring spacings.

:class:`PipelineOptions` holds every default once; :func:`analyse_spot_pattern`
and :func:`analyse_ring_pattern` chain the steps and return an
:class:`~saedkit.core.workflow.analysis.Analysis`.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np

from saedkit.core.calibration.camera import (
    INTERNAL_STANDARD_REPRODUCIBILITY_PCT,
    CameraModel,
    EnteredCalibration,
    camera_terms,
)
from saedkit.core.crystallography.crystal import Phase
from saedkit.core.detection.centre import CentreResult
from saedkit.core.errors import InputError
from saedkit.core.workflow.analysis import Analysis, measure_candidates

__all__ = [
    "PipelineOptions",
    "DEFAULT_OPTIONS",
    "DEFAULT_VOLTAGE_KV",
    "prepare_mask",
    "locate_centre",
    "detect_spots",
    "detect_rings",
    "calibrate_rings",
    "subtract_rings",
    "calibrate_spot_standard",
    "search_zone_axes",
    "measure_candidates",
    "identify_ring_phases",
    "analyse_spot_pattern",
    "analyse_ring_pattern",
    "as_camera",
]

Progress = Callable[[int, int], None]
Stop = Callable[[], bool]

#: Voltage assumed when neither the caller nor the image says (kV).
DEFAULT_VOLTAGE_KV = 200.0


@dataclass(frozen=True)
class PipelineOptions:
    """Every tunable of the pipeline, with its default stated once.

    Parameters
    ----------
    voltage_kv : float, optional
        Accelerating voltage; None: the image's metadata, then 200 kV.
    pixel_size_um : float, optional
        Detector pixel size after binning; None: the image's metadata.
    min_snr : float
        Smallest spot signal-to-noise ratio kept (5, common practice).
    max_spots : int
        Largest number of spots kept.
    d_tolerance_pct, angle_tolerance_deg : float
        Zone-axis match tolerances (2.5 % and 2°, common practice: 2–3 % and 1–2°).
    max_index : int
        Largest |u|, |v|, |w| of the zone axes considered.
    top : int
        Candidates kept (and listed).
    ring_d_tolerance_pct : float
        Ring-to-reflection tolerance of phase identification and ring calibration.
    ring_min_snr : float
        Smallest ring signal-to-noise ratio in the radial profile.
    fit_ellipse : bool
        Fit the elliptical distortion with the rings.
    exact_camera_equation : bool
        Calibrate with ``R = L·tan 2θ``.
    """

    voltage_kv: float | None = None
    pixel_size_um: float | None = None
    min_snr: float = 5.0
    max_spots: int = 1000
    d_tolerance_pct: float = 2.5
    angle_tolerance_deg: float = 2.0
    max_index: int = 10
    top: int = 5
    ring_d_tolerance_pct: float = 1.5
    ring_min_snr: float = 4.0
    fit_ellipse: bool = True
    exact_camera_equation: bool = False

    def replace(self, **changes) -> PipelineOptions:
        """A copy with some options changed (None values leave the default)."""
        return dataclasses.replace(self, **{k: v for k, v in changes.items() if v is not None})

    def voltage_for(self, image) -> float:
        """The voltage to use for ``image``."""
        return float(self.voltage_kv or getattr(image, "voltage_kv", None) or DEFAULT_VOLTAGE_KV)

    def pixel_size_for(self, image) -> float | None:
        """The pixel size to use for ``image`` (None when unknown)."""
        return self.pixel_size_um or getattr(image, "pixel_size_um", None)

    def to_dict(self) -> dict:
        """JSON-ready."""
        return dataclasses.asdict(self)


DEFAULT_OPTIONS = PipelineOptions()


def as_camera(calibration=None, *, camera_constant_px_A: float | None = None,
              camera_constant_sigma_px_A: float | None = None, reproducibility_pct: float | None = None,
              voltage_kv: float | None = None):
    """The camera model of the edge: a calibration as given, or a typed-in K made into an EnteredCalibration.

    Raises
    ------
    InputError
        When both a calibration and a camera constant are given, or the
        calibration is not a camera model.
    """
    if calibration is not None and camera_constant_px_A is not None:
        raise InputError("give a calibration or a camera constant, not both")
    if calibration is not None:
        if not isinstance(calibration, CameraModel):
            raise InputError(f"calibration must be a fitted, saved or entered calibration, "
                             f"got {type(calibration).__name__}")
        if reproducibility_pct is not None:
            calibration = dataclasses.replace(calibration, reproducibility_pct=float(reproducibility_pct))
        return calibration
    if camera_constant_px_A is not None:
        kw = {} if reproducibility_pct is None else {"reproducibility_pct": float(reproducibility_pct)}
        return EnteredCalibration(float(camera_constant_px_A), float(camera_constant_sigma_px_A or 0.0),
                                  voltage_kv=voltage_kv, **kw)
    if camera_constant_sigma_px_A is not None:
        raise InputError("camera_constant_sigma_px_A needs camera_constant_px_A")
    return None


def _stage(progress: Progress | None, done: int, total: int) -> None:
    if progress is not None:
        progress(done, total)


# --------------------------------------------------------------------------- steps


def prepare_mask(image, mask: np.ndarray | None = None) -> np.ndarray:
    """Pixels to leave out: ``mask`` if given, else the image's mask plus saturated pixels and the beam stop."""
    if mask is not None:
        return np.asarray(mask, bool)
    from saedkit.core.detection.masks import find_auto_mask

    return np.asarray(image.mask, bool) | find_auto_mask(image.data, saturation_value=image.saturation_value)


def locate_centre(image, mask: np.ndarray, *, centre_xy=None, centre_sigma_px: float = 0.5) -> CentreResult:
    """The pattern centre from the chain of methods of :func:`~saedkit.core.detection.centre.find_centre`
    (direct beam, Friedel pairs of spots, rings or halo, symmetry correlation), or the known ``centre_xy``."""
    from saedkit.core.detection.centre import find_centre, manual_centre

    if centre_xy is not None:
        return manual_centre(float(centre_xy[0]), float(centre_xy[1]), sigma_px=centre_sigma_px)
    return find_centre(image.data, mask=mask)


def detect_spots(image, mask: np.ndarray, centre: CentreResult, *, options: PipelineOptions = DEFAULT_OPTIONS,
                 should_stop: Stop | None = None) -> tuple:
    """The spots of the pattern about ``centre`` (tuple of Spot)."""
    from saedkit.core.detection.spots import find_spots

    return tuple(find_spots(image.data, mask=mask, centre_xy=centre.xy, min_snr=options.min_snr,
                            max_spots=options.max_spots, should_stop=should_stop))


def detect_rings(image, mask: np.ndarray, *, options: PipelineOptions = DEFAULT_OPTIONS, centre_guess_xy=None,
                 progress: Progress | None = None, should_stop: Stop | None = None):
    """Rings, centre and ellipse of a ring pattern (RingFit); ``centre_guess_xy`` starts the fit."""
    from saedkit.core.detection.rings import find_rings

    return find_rings(image.data, mask=mask, min_snr=options.ring_min_snr, fit_ellipse=options.fit_ellipse,
                      centre_guess_xy=centre_guess_xy, progress=progress, should_stop=should_stop)


def subtract_rings(data: np.ndarray, centre_xy, ellipse, *, mask: np.ndarray | None = None,
                   bin_px: float = 0.5) -> np.ndarray:
    """The image with its rotationally symmetric part (rings, diffuse background) taken away.

    The median of the pixels in each thin annulus of ideal (ellipse-corrected)
    radius about ``centre_xy`` is subtracted and the result clipped at 0. The
    median is untouched by the few pixels of a spot in an annulus, so spots
    stay while the rings of an internal standard go.

    Parameters
    ----------
    data : 2-D array
    centre_xy : [x, y]
    ellipse : Ellipse
    mask : bool array, optional
        Pixels left out of the medians.
    bin_px : float
        Annulus width, pixels.
    """
    a = np.asarray(data, dtype=float)
    rows, cols = a.shape
    yy, xx = np.mgrid[0:rows, 0:cols]
    v = np.stack([xx.ravel() - float(centre_xy[0]), yy.ravel() - float(centre_xy[1])], axis=1)
    R = np.hypot(*ellipse.correct_array(v).T)
    b = (R / bin_px).astype(np.int64)
    vals = a.ravel()
    use = np.ones(vals.shape, bool) if mask is None else ~np.asarray(mask, bool).ravel()
    nb = int(b.max()) + 1
    order = np.lexsort((vals[use], b[use]))
    sorted_vals = vals[use][order]
    counts = np.bincount(b[use], minlength=nb)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    med = np.zeros(nb)
    has = counts > 0
    lo = starts[has] + (counts[has] - 1) // 2
    hi = starts[has] + counts[has] // 2
    med[has] = 0.5 * (sorted_vals[lo] + sorted_vals[hi])
    return np.clip(a - med[b].reshape(a.shape), 0.0, None)


def _mask_strong_spots(image, mask: np.ndarray, options: PipelineOptions) -> np.ndarray:
    """``mask`` with discs over the crystal's strong spots, so that an internal standard's ring fit sees only rings.

    A few strong spots of the specimen on one radius (e.g. the four {200} of a cubic [001] grain) would
    otherwise read as a ring of the standard and pull its assignment to another K.
    """
    from saedkit.core.detection.masks import draw_disc
    from saedkit.core.detection.spots import find_spots

    strong = find_spots(image.data, mask=mask, min_snr=max(4.0 * options.min_snr, 20.0), max_spots=400)
    out = np.array(mask, bool)
    for sp in strong:
        draw_disc(out, (sp.x, sp.y), max(4.0 * float(sp.width_px), 5.0))
    return out


def calibrate_rings(image, standard: Phase, mask: np.ndarray, *, options: PipelineOptions = DEFAULT_OPTIONS,
                    reproducibility_pct: float | None = None, internal_standard: bool = False,
                    progress: Progress | None = None, should_stop: Stop | None = None):
    """The camera constant fitted on the rings of a standard (Calibration).

    With ``internal_standard`` the standard shares the pattern with the
    specimen: the calibration is marked so and its reproducibility term is
    :data:`~saedkit.core.calibration.camera.INTERNAL_STANDARD_REPRODUCIBILITY_PCT`
    unless ``reproducibility_pct`` says otherwise.
    """
    from saedkit.core.calibration.calibrate import calibrate_from_rings

    cal = calibrate_from_rings(image, standard, voltage_kv=options.voltage_for(image), mask=mask,
                               pixel_size_um=options.pixel_size_for(image),
                               d_tolerance_pct=options.ring_d_tolerance_pct, min_snr=options.ring_min_snr,
                               fit_ellipse=options.fit_ellipse, exact_camera_equation=options.exact_camera_equation,
                               progress=progress, should_stop=should_stop)
    if internal_standard:
        rep = INTERNAL_STANDARD_REPRODUCIBILITY_PCT if reproducibility_pct is None else reproducibility_pct
        return dataclasses.replace(cal, internal_standard=True, reproducibility_pct=float(rep))
    if reproducibility_pct is not None:
        return dataclasses.replace(cal, reproducibility_pct=float(reproducibility_pct))
    return cal


def search_zone_axes(spots: Sequence, centre: CentreResult, phases: Sequence[Phase], *, calibration=None,
                     image_shape=None, mask: np.ndarray | None = None, options: PipelineOptions = DEFAULT_OPTIONS,
                     voltage_kv: float = DEFAULT_VOLTAGE_KV, should_stop: Stop | None = None):
    """Rank the zone axes that explain the spots; the lattice-refined centre; candidates measured.

    Returns
    -------
    (MatchResult, CentreResult)
        The match (candidates' spots measured with :func:`measure_candidates`)
        and the centre they were measured about (refined with the lattice
        when its uncertainty is known, else ``centre``).
    """
    from saedkit.core.detection.spots import spots_xy_array
    from saedkit.core.indexing.matching import match_zone_axes

    K = K_sig = None
    ellipse = None
    if calibration is not None:
        t = camera_terms(calibration)
        K, K_sig, ellipse = t.camera_constant_px_A, t.stat_sigma_px_A, t.ellipse
    sig = np.array([np.hypot(s.sigma_x, s.sigma_y) / np.sqrt(2) for s in spots])
    kw = {} if ellipse is None else {"ellipse": ellipse}
    match = match_zone_axes(
        spots_xy_array(list(spots)), centre.xy, list(phases), camera_constant_px_A=K,
        camera_constant_sigma_px_A=K_sig, voltage_kv=voltage_kv, d_tolerance_pct=options.d_tolerance_pct,
        angle_tolerance_deg=options.angle_tolerance_deg, max_index=options.max_index, top=options.top,
        spots_sigma_px=sig, image_shape=image_shape, mask=mask, should_stop=should_stop,
        spots_intensity=np.array([s.intensity for s in spots], float), **kw)
    lat = match.lattice
    if lat is not None and np.all(np.isfinite(lat.centre_sigma_px)):
        centre = CentreResult(lat.centre_xy[0], lat.centre_xy[1], lat.centre_sigma_px[0], lat.centre_sigma_px[1],
                              "spot-lattice", int(np.sum(lat.inliers)))
    return measure_candidates(match, spots, centre, calibration), centre


def identify_ring_phases(ring_fit, phases: Sequence[Phase], calibration, *,
                         options: PipelineOptions = DEFAULT_OPTIONS):
    """Rank phases (and two-phase mixtures) against the rings' spacings; None without rings or phases."""
    from saedkit.core.indexing.identify import identify_phases
    from saedkit.core.measure import measure_radii

    if not phases or calibration is None or not ring_fit.rings:
        return None
    m = measure_radii([r.radius_px for r in ring_fit.rings], [r.radius_sigma_px for r in ring_fit.rings],
                      calibration)
    return identify_phases([float(d) for d in m.d_A], list(phases),
                           intensities=[max(r.height, 0.0) for r in ring_fit.rings],
                           d_tolerance_pct=options.ring_d_tolerance_pct)


# --------------------------------------------------------------------------- whole analyses


def _options(options: PipelineOptions | None, **overrides) -> PipelineOptions:
    return (options or DEFAULT_OPTIONS).replace(**overrides)


def _parameters(options: PipelineOptions, image, camera, phases, **extra) -> dict:
    params = options.to_dict()
    params["voltage_kv"] = options.voltage_for(image)
    params["pixel_size_um"] = options.pixel_size_for(image)
    params["phases"] = [p.name for p in phases]
    t = None if camera is None else camera_terms(camera)
    params["camera_constant_px_A"] = None if t is None else t.camera_constant_px_A
    params["camera_constant_sigma_px_A"] = None if t is None else t.stat_sigma_px_A
    params["reproducibility_pct"] = None if t is None else t.reproducibility_pct
    params["ellipse"] = None if t is None else t.ellipse.to_dict()
    params["calibration"] = None if camera is None else getattr(camera, "name", None)
    params.update(extra)
    return params


def analyse_spot_pattern(
    image,
    *,
    phases: Sequence[Phase] = (),
    calibration=None,
    camera_constant_px_A: float | None = None,
    camera_constant_sigma_px_A: float | None = None,
    reproducibility_pct: float | None = None,
    internal_standard: Phase | None = None,
    options: PipelineOptions | None = None,
    voltage_kv: float | None = None,
    mask: np.ndarray | None = None,
    centre_xy=None,
    min_snr: float | None = None,
    d_tolerance_pct: float | None = None,
    angle_tolerance_deg: float | None = None,
    max_index: int | None = None,
    top: int | None = None,
    progress: Progress | None = None,
    should_stop: Stop | None = None,
) -> Analysis:
    """Centre, spots and (with phases) the zone-axis match of a single-crystal pattern.

    Parameters
    ----------
    image : PatternImage
    phases : sequence of Phase
        Candidate phases; without any the analysis stops after the spots.
    calibration : CameraModel, optional
        A fitted, saved or entered calibration: K, its uncertainty parts and the ellipse.
    camera_constant_px_A, camera_constant_sigma_px_A : float, optional
        A typed-in K instead (made into an
        :class:`~saedkit.core.calibration.camera.EnteredCalibration`).
    reproducibility_pct : float, optional
        Overrides the calibration's reproducibility term (%).
    internal_standard : Phase, optional
        A ring standard on the same pattern (e.g. Au evaporated on the grid):
        the pattern is calibrated on its rings first and the spots are
        measured with that K (small reproducibility term).
    options : PipelineOptions, optional
        The defaults; the single keyword options below override them.
    voltage_kv, min_snr, d_tolerance_pct, angle_tolerance_deg, max_index, top : optional
        Shortcuts for the fields of :class:`PipelineOptions`.
    mask : bool array, optional
        Pixels to exclude; default: :func:`prepare_mask`.
    centre_xy : [x, y], optional
        A known centre (skips the Friedel search).
    """
    opts = _options(options, voltage_kv=voltage_kv, min_snr=min_snr, d_tolerance_pct=d_tolerance_pct,
                    angle_tolerance_deg=angle_tolerance_deg, max_index=max_index, top=top)
    kv = opts.voltage_for(image)
    mask = prepare_mask(image, mask)
    if internal_standard is not None:
        if calibration is not None or camera_constant_px_A is not None:
            raise InputError("an internal standard calibrates the pattern itself: give no calibration or "
                             "camera constant with it")
        camera = calibrate_rings(image, internal_standard, _mask_strong_spots(image, mask, opts), options=opts,
                                 reproducibility_pct=reproducibility_pct, internal_standard=True,
                                 should_stop=should_stop)
    else:
        camera = as_camera(calibration, camera_constant_px_A=camera_constant_px_A,
                           camera_constant_sigma_px_A=camera_constant_sigma_px_A,
                           reproducibility_pct=reproducibility_pct, voltage_kv=kv)
    total = 4 if phases else 3
    _stage(progress, 1, total)
    spot_image = image
    if internal_standard is not None and camera.centre is not None:
        # the standard's rings would read as spots: take them away; their fit gives the centre
        c = camera.centre
        spot_image = dataclasses.replace(image, data=subtract_rings(image.data, c.xy, camera.ellipse, mask=mask))
        centre = c if centre_xy is None else locate_centre(image, mask, centre_xy=centre_xy)
    else:
        centre = locate_centre(image, mask, centre_xy=centre_xy)
    _stage(progress, 2, total)
    spots = detect_spots(spot_image, mask, centre, options=opts, should_stop=should_stop)
    _stage(progress, 3, total)
    match = None
    if phases and len(spots) >= 3:
        match, centre = search_zone_axes(spots, centre, phases, calibration=camera, image_shape=image.data.shape,
                                         mask=mask, options=opts, voltage_kv=kv, should_stop=should_stop)
        _stage(progress, 4, total)
    params = _parameters(opts, image, camera, phases,
                         internal_standard=None if internal_standard is None else internal_standard.name)
    return Analysis(image=image, centre=centre, spots=spots, calibration=camera, match=match, parameters=params)


def analyse_ring_pattern(
    image,
    *,
    standard: Phase | None = None,
    calibration=None,
    camera_constant_px_A: float | None = None,
    camera_constant_sigma_px_A: float | None = None,
    reproducibility_pct: float | None = None,
    phases: Sequence[Phase] = (),
    options: PipelineOptions | None = None,
    voltage_kv: float | None = None,
    pixel_size_um: float | None = None,
    mask: np.ndarray | None = None,
    d_tolerance_pct: float | None = None,
    progress: Progress | None = None,
    should_stop: Stop | None = None,
) -> Analysis:
    """Rings of a polycrystalline pattern: calibrate against a standard, or measure and identify phases.

    With ``standard`` the camera constant is fitted (the pattern is a
    calibration film); otherwise the rings are measured, converted to d
    with the given calibration or K, and, with ``phases``, the phases are ranked.
    """
    opts = _options(options, voltage_kv=voltage_kv, pixel_size_um=pixel_size_um,
                    ring_d_tolerance_pct=d_tolerance_pct)
    mask = prepare_mask(image, mask)
    if standard is not None:
        if calibration is not None or camera_constant_px_A is not None:
            raise InputError("a standard is calibrated from scratch: give no calibration or camera constant with it")
        cal = calibrate_rings(image, standard, mask, options=opts, reproducibility_pct=reproducibility_pct,
                              progress=progress, should_stop=should_stop)
        params = _parameters(opts, image, cal, phases, standard=standard.name)
        return Analysis(image=image, centre=cal.centre, calibration=cal, parameters=params)
    camera = as_camera(calibration, camera_constant_px_A=camera_constant_px_A,
                       camera_constant_sigma_px_A=camera_constant_sigma_px_A,
                       reproducibility_pct=reproducibility_pct, voltage_kv=opts.voltage_for(image))
    ring_fit = detect_rings(image, mask, options=opts, progress=progress, should_stop=should_stop)
    phase_id = identify_ring_phases(ring_fit, phases, camera, options=opts)
    params = _parameters(opts, image, camera, phases, standard=None)
    return Analysis(image=image, centre=ring_fit.centre, ring_fit=ring_fit, calibration=camera,
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
    from saedkit.core.crystallography.structure_factors import canonical_indices
    from saedkit.core.detection.spots import spots_xy_array
    from saedkit.core.errors import FitError
    from saedkit.core.indexing.matching import match_zone_axes

    opts = DEFAULT_OPTIONS.replace(voltage_kv=voltage_kv, pixel_size_um=pixel_size_um, min_snr=min_snr)
    kv = opts.voltage_for(image)
    px = opts.pixel_size_for(image)
    data = image.data
    mask = prepare_mask(image, mask)
    centre = locate_centre(image, mask)
    spots = detect_spots(image, mask, centre, options=opts, should_stop=should_stop)
    if len(spots) < 3:
        raise FitError(f"{getattr(image, 'source_path', 'the image')}: only {len(spots)} spots found; "
                       "a single-crystal standard needs at least 3")
    xy = spots_xy_array(list(spots))
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
