"""Measuring every frame of a series: centre, spots with d, phase, zone, rotation, virtual detectors.

:func:`analyse_frames` measures a block of consecutive frames with
:func:`saedkit.core.workflow.pipeline.analyse_spot_pattern`, reusing what does
not change from frame to frame:

- the **mask** (saturated pixels and beam stop) is computed once for the whole
  series by :func:`calculate_series_mask` and passed to every frame;
- the **centre** is tracked: each frame starts from the previous frame's
  centre, and the start is kept only when the frame itself confirms it (the
  spot lattice's refined centre, or the mean midpoint of its Friedel pairs,
  lies within ``drift_tolerance_px``); otherwise the centre is searched afresh
  (Friedel symmetry) and tracking restarts from there;
- the **phases** are resolved once per worker process, so the matcher's
  reflection tables (cached per phase object) are built once per worker, not
  once per frame.

A frame that cannot be measured (no signal, NaN pixels, too few spots for a
centre) is recorded with its error and never stops the others; an
unexpected exception in one frame is recorded too, with its type named
(``unexpected LinAlgError: ...``), so that one odd frame of a long scan does
not end the run.
"""

from __future__ import annotations

import hashlib
import math
import pickle
import threading
from dataclasses import dataclass, field, replace
from typing import Any, Sequence

import numpy as np

from saedkit.core.errors import InputError, SaedkitError
from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS

__all__ = ["SeriesOptions", "FrameResult", "analyse_frames", "calculate_series_mask", "calculate_rotation_period_deg",
           "calculate_virtual_detector_sums", "FRAME_FIELDS"]

_NAN = float("nan")
_STOP_DARKER = 0.5  # a beam stop's median is below this fraction of the unshadowed pixels' median


@dataclass(frozen=True)
class SeriesOptions:
    """What to measure on every frame of a series.

    Parameters
    ----------
    phases : tuple of Phase or str
        Candidate phases (Phase objects, library names or CIF paths); none:
        centre and spots only.
    calibration : Calibration or SavedCalibration, optional
        Supplies K, σ_K and the ellipse; or give ``camera_constant_px_A``.
    camera_constant_px_A, camera_constant_sigma_px_A : float, optional
        A typed-in camera constant K (pixel·Å, ``R = K/d``) and its uncertainty.
    voltage_kv : float
        Accelerating voltage (kV).
    min_snr, d_tolerance_pct, angle_tolerance_deg, max_index, top
        As in :func:`~saedkit.core.workflow.pipeline.analyse_spot_pattern`.
    drift_tolerance_px : float
        Largest move of the centre from one frame to the next that tracking
        accepts; a larger move starts a fresh centre search.
    bright_field_radius_px : float
        Radius of the virtual bright-field disc about each frame's centre.
    dark_field_radii_px : (inner, outer)
        Radii of the virtual annular dark-field annulus.
    """

    phases: tuple = ()
    calibration: Any = None
    camera_constant_px_A: float | None = None
    camera_constant_sigma_px_A: float | None = None
    voltage_kv: float = 200.0
    min_snr: float = DEFAULT_OPTIONS.min_snr  # the pipeline's defaults, held once in PipelineOptions
    d_tolerance_pct: float = DEFAULT_OPTIONS.d_tolerance_pct
    angle_tolerance_deg: float = DEFAULT_OPTIONS.angle_tolerance_deg
    max_index: int = DEFAULT_OPTIONS.max_index
    top: int = 3  # a series keeps fewer candidates per frame than a single analysis
    drift_tolerance_px: float = 1.5
    bright_field_radius_px: float = 6.0
    dark_field_radii_px: tuple[float, float] = (12.0, 40.0)

    def __post_init__(self) -> None:
        object.__setattr__(self, "phases", tuple(self.phases))
        if self.calibration is not None and self.camera_constant_px_A is not None:
            raise InputError("give a calibration or a camera constant, not both")
        for name in ("voltage_kv", "min_snr", "d_tolerance_pct", "angle_tolerance_deg", "drift_tolerance_px",
                     "bright_field_radius_px"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise InputError(f"{name} must be a number > 0, got {v!r}")
        inner, outer = (float(v) for v in self.dark_field_radii_px)
        if not (0 <= inner < outer):
            raise InputError(f"dark_field_radii_px must be (inner, outer) with 0 <= inner < outer, "
                             f"got {self.dark_field_radii_px!r}")
        object.__setattr__(self, "dark_field_radii_px", (inner, outer))

    def phase_names(self) -> list[str]:
        """The phases' names (or specs, before they are resolved)."""
        return [p if isinstance(p, str) else p.name for p in self.phases]

    def to_dict(self) -> dict:
        """JSON-ready record (the calibration by name and K)."""
        cal = self.calibration
        return {"phases": self.phase_names(),
                "calibration": None if cal is None else getattr(cal, "name", None) or "fitted",
                "camera_constant_px_A": (self.camera_constant_px_A if cal is None
                                         else float(cal.camera_constant_px_A)),
                "camera_constant_sigma_px_A": self.camera_constant_sigma_px_A,
                "voltage_kv": self.voltage_kv, "min_snr": self.min_snr, "d_tolerance_pct": self.d_tolerance_pct,
                "angle_tolerance_deg": self.angle_tolerance_deg, "max_index": self.max_index, "top": self.top,
                "drift_tolerance_px": self.drift_tolerance_px,
                "bright_field_radius_px": self.bright_field_radius_px,
                "dark_field_radii_px": list(self.dark_field_radii_px)}


FRAME_FIELDS = ["frame", "scan_y", "scan_x", "ok", "error", "centre_x_px", "centre_y_px", "centre_method",
                "n_spots", "phase", "zone", "zone_family", "score", "in_plane_rotation_deg", "rotation_period_deg",
                "d_error_pct", "angle_error_deg", "camera_constant_px_A", "n_explained", "bright_field",
                "dark_field"]


@dataclass(frozen=True)
class FrameResult:
    """What was measured on one frame.

    ``zone`` is the matcher's zone axis, ``zone_family`` the representative
    of its symmetry-equivalent directions (the same for every frame of one
    grain); ``in_plane_rotation_deg`` is defined modulo
    ``rotation_period_deg``, the period of the zone pattern's rotational
    symmetry (see :func:`calculate_rotation_period_deg`).
    ``centre_method`` is ``"tracked"`` (the previous frame's centre,
    confirmed and refined by this frame), ``"searched"`` (a fresh Friedel
    search) or ``""`` when the frame failed before a centre was found.
    ``spots`` holds ``(x_px, y_px, intensity, d_A)`` rows (``d_A`` NaN
    without a camera constant, and for the direct beam). ``bright_field`` and ``dark_field`` are the
    virtual-detector sums (counts) about the frame's centre.
    """

    frame: int
    scan_index: tuple[int, ...]
    ok: bool
    error: str = ""
    centre_x_px: float = _NAN
    centre_y_px: float = _NAN
    centre_method: str = ""
    n_spots: int = 0
    phase: str = ""
    zone: tuple[int, int, int] | None = None
    score: float = _NAN
    in_plane_rotation_deg: float = _NAN
    d_error_pct: float = _NAN
    angle_error_deg: float = _NAN
    camera_constant_px_A: float = _NAN
    n_explained: int = 0
    bright_field: float = _NAN
    dark_field: float = _NAN
    zone_family: tuple[int, int, int] | None = None
    rotation_period_deg: float = _NAN
    spots: tuple[tuple[float, float, float, float], ...] = field(default=(), repr=False)

    def to_dict(self) -> dict:
        """JSON-ready record (NaN as None)."""
        def f(v):
            return None if isinstance(v, float) and not math.isfinite(v) else v

        sy, sx = (self.scan_index if len(self.scan_index) == 2 else (0, self.scan_index[0]))
        return {"frame": self.frame, "scan_y": sy, "scan_x": sx, "ok": self.ok, "error": self.error,
                "centre_x_px": f(self.centre_x_px), "centre_y_px": f(self.centre_y_px),
                "centre_method": self.centre_method, "n_spots": self.n_spots, "phase": self.phase,
                "zone": None if self.zone is None else list(self.zone), "score": f(self.score),
                "in_plane_rotation_deg": f(self.in_plane_rotation_deg), "d_error_pct": f(self.d_error_pct),
                "angle_error_deg": f(self.angle_error_deg), "camera_constant_px_A": f(self.camera_constant_px_A),
                "n_explained": self.n_explained, "bright_field": f(self.bright_field),
                "dark_field": f(self.dark_field),
                "zone_family": None if self.zone_family is None else list(self.zone_family),
                "rotation_period_deg": f(self.rotation_period_deg),
                "spots": [[f(float(v)) for v in row] for row in self.spots]}

    @classmethod
    def from_dict(cls, rec: dict, scan_ndim: int) -> FrameResult:
        """Rebuild from :meth:`to_dict` (as stored in a finished chunk)."""
        def g(v):
            return _NAN if v is None else float(v)

        scan = (int(rec["scan_y"]), int(rec["scan_x"])) if scan_ndim == 2 else (int(rec["scan_x"]),)
        return cls(int(rec["frame"]), scan, bool(rec["ok"]), rec.get("error", ""), g(rec["centre_x_px"]),
                   g(rec["centre_y_px"]), rec.get("centre_method", ""), int(rec["n_spots"]), rec.get("phase", ""),
                   None if rec.get("zone") is None else tuple(int(v) for v in rec["zone"]), g(rec["score"]),
                   g(rec["in_plane_rotation_deg"]), g(rec["d_error_pct"]), g(rec["angle_error_deg"]),
                   g(rec["camera_constant_px_A"]), int(rec.get("n_explained", 0)), g(rec["bright_field"]),
                   g(rec["dark_field"]),
                   None if rec.get("zone_family") is None else tuple(int(v) for v in rec["zone_family"]),
                   g(rec.get("rotation_period_deg")), tuple(tuple(g(v) for v in row) for row in rec.get("spots", ())))


# --------------------------------------------------------------------------- #
# Set-up shared by all frames
# --------------------------------------------------------------------------- #


def calculate_series_mask(frame_sum, frame_max, *, saturation_value: float | None) -> np.ndarray:
    """The mask of a whole series: beam stop from the frames' sum, saturation from their maximum.

    Parameters
    ----------
    frame_sum : (ky, kx) array
        Sum (or mean) of the frames (or of a sample of them): the beam stop,
        fixed on the detector, stands out of it even when each frame is noisy.
    frame_max : (ky, kx) array
        Pixel-wise maximum of the same frames: a pixel saturated in any frame
        (the central beam wherever it drifted) is masked.
    saturation_value : float, optional
        The detector's saturation value (the type's maximum for integer pixels).

    Returns
    -------
    (ky, kx) bool array
        True where pixels are excluded. A beam stop found in the sum is kept
        only when its pixels' median is below half the other pixels' median
        (a real stop shadows the detector).
    """
    from saedkit.core.detection.masks import find_beam_stop_mask, find_saturated_mask

    s = np.asarray(frame_sum, np.float64)
    m = np.asarray(frame_max)
    if s.ndim != 2 or m.shape != s.shape:
        raise InputError(f"frame_sum and frame_max must be 2-D of one shape, got {s.shape} and {m.shape}")
    mask = find_saturated_mask(m, saturation_value=saturation_value)
    if np.ptp(s) > 0:
        stop = find_beam_stop_mask(s)
        # a beam stop shadows what it covers: keep it only when its pixels are clearly darker than the rest
        # (the sum of many different patterns can look like a bar to the search without being one)
        if stop.any() and (~stop).any() and np.median(s[stop]) < _STOP_DARKER * np.median(s[~stop]):
            mask = mask | stop
    return mask


def calculate_virtual_detector_sums(frames, centres_xy, *, bright_field_radius_px: float,
                                    dark_field_radii_px: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    """Virtual bright-field and annular dark-field sums of frames about their own centres.

    Parameters
    ----------
    frames : (n, ky, kx) array
    centres_xy : (n, 2) array
        Each frame's centre ``[x, y]`` (x = column).
    bright_field_radius_px : float
        Pixels within this distance of the centre count to the bright field.
    dark_field_radii_px : (inner, outer)
        Pixels with ``inner <= r <= outer`` count to the dark field.

    Returns
    -------
    bright_field, dark_field : (n,) arrays
        Sums of the pixel values (NaN where the centre is not finite).
    """
    frames = np.asarray(frames)
    c = np.asarray(centres_xy, float).reshape(-1, 2)
    if frames.ndim != 3 or len(c) != len(frames):
        raise InputError(f"frames must be (n, ky, kx) with one centre each, got {frames.shape} and {c.shape}")
    yy, xx = np.indices(frames.shape[1:], dtype=np.float64)
    inner, outer = dark_field_radii_px
    bf = np.full(len(frames), _NAN)
    df = np.full(len(frames), _NAN)
    for i, (f, (cx, cy)) in enumerate(zip(frames, c)):
        if not (math.isfinite(cx) and math.isfinite(cy)):
            continue
        r = np.hypot(xx - cx, yy - cy)
        f64 = f.astype(np.float64, copy=False)
        bf[i] = float(f64[r <= bright_field_radius_px].sum())
        df[i] = float(f64[(r >= inner) & (r <= outer)].sum())
    return bf, df


# --------------------------------------------------------------------------- #
# One worker's phases (resolved once, so the matcher's tables are built once)
# --------------------------------------------------------------------------- #

_PHASES: dict[str, Any] = {}
_PHASES_LOCK = threading.Lock()


def _phase_key(p) -> str:
    if isinstance(p, str):
        return "spec:" + p
    return "pickle:" + hashlib.sha256(pickle.dumps(p)).hexdigest()


def _worker_phases(phases: Sequence) -> list:
    """The same Phase objects for equal phases within one process."""
    out = []
    with _PHASES_LOCK:
        for p in phases:
            key = _phase_key(p)
            if key not in _PHASES:
                if isinstance(p, str):
                    from saedkit.core.crystallography.library import find_phase

                    _PHASES[key] = find_phase(p)
                else:
                    _PHASES[key] = p
            out.append(_PHASES[key])
    return out


# --------------------------------------------------------------------------- #
# Frames
# --------------------------------------------------------------------------- #


def _check_centre(analysis, start_xy: np.ndarray) -> np.ndarray | None:
    """The centre this frame gives by itself when it started from ``start_xy``, or None."""
    from saedkit.core.detection.centre import calculate_centre_from_pairs

    c = analysis.centre
    if c is not None and c.method == "spot-lattice":
        return c.xy
    if len(analysis.spots) < 2:
        return None
    xy = np.array([[s.x, s.y] for s in analysis.spots])
    try:
        pairs = calculate_centre_from_pairs(xy, guess_xy=start_xy, tolerance_px=3.0)
    except SaedkitError:
        return None
    return pairs.xy if pairs.n_used >= 2 else None


def _one(image, options: SeriesOptions, phases, mask, centre_xy):
    from saedkit.core.workflow.pipeline import analyse_spot_pattern

    return analyse_spot_pattern(
        image, phases=phases, calibration=options.calibration, camera_constant_px_A=options.camera_constant_px_A,
        camera_constant_sigma_px_A=options.camera_constant_sigma_px_A, voltage_kv=options.voltage_kv,
        mask=mask, centre_xy=centre_xy, min_snr=options.min_snr, d_tolerance_pct=options.d_tolerance_pct,
        angle_tolerance_deg=options.angle_tolerance_deg, max_index=options.max_index, top=options.top)


def _spot_rows(analysis) -> tuple:
    recs = analysis._spot_records()  # spots with their ellipse-corrected radius and d (when K is known)
    # the direct beam (within a pixel of the centre) has no spacing
    return tuple((float(r["x"]), float(r["y"]), float(r["intensity"]),
                  float(r.get("d_A", _NAN)) if r.get("radius_px", 0.0) >= 1.0 else _NAN) for r in recs)


def calculate_rotation_period_deg(phase, zone) -> float:
    """Period of the in-plane rotation of a zero-order zone-axis pattern, degrees.

    The pattern repeats under the proper rotations about the zone axis of
    the phase's Laue group (point group with inversion), and, by Friedel's
    law, under a 2-fold rotation: the period is ``360 / n`` with ``n`` the
    order of that rotation group, doubled when odd.

    Parameters
    ----------
    phase : Phase
    zone : [u, v, w]

    Returns
    -------
    float
        90 for a cubic crystal along [001], 180 along [011], 60 along [111].
    """
    u = np.asarray(zone, dtype=np.int64)
    rots = np.asarray(phase.space_group.rotations, dtype=np.int64)
    det = np.rint(np.linalg.det(rots)).astype(np.int64)
    proper = rots * det[:, None, None]
    fixed = np.all(np.einsum("kij,j->ki", proper, u) == u, axis=1)
    n = len(np.unique(proper[fixed].reshape(-1, 9), axis=0))
    n = max(n, 1)
    if n % 2:
        n *= 2
    return 360.0 / n


def _result(i, scan_index, analysis, method, bf, df, phases) -> FrameResult:
    from saedkit.core.crystallography.structure_factors import canonical_indices

    cand = analysis.candidate
    c = analysis.centre
    kw: dict[str, Any] = {}
    if cand is not None:
        phase = next((p for p in phases if p.name == cand.phase), None)
        if phase is not None:
            kw["zone_family"] = tuple(int(v) for v in canonical_indices(
                phase.calculate_equivalent_directions(cand.zone)))
            kw["rotation_period_deg"] = calculate_rotation_period_deg(phase, cand.zone)
        kw.update(phase=cand.phase, zone=tuple(int(v) for v in cand.zone), score=float(cand.score),
                  in_plane_rotation_deg=float(cand.in_plane_rotation_deg), d_error_pct=float(cand.d_error_pct),
                  angle_error_deg=float(cand.angle_error_deg),
                  camera_constant_px_A=float(cand.camera_constant_px_A), n_explained=int(cand.n_explained))
    return FrameResult(i, scan_index, True, "", float(c.x), float(c.y), method, len(analysis.spots),
                       bright_field=bf, dark_field=df, spots=_spot_rows(analysis), **kw)


def analyse_frames(frames, *, first_frame: int, scan_shape: tuple[int, ...], options: SeriesOptions,
                   mask: np.ndarray | None = None, start_centre_xy=None) -> list[FrameResult]:
    """Measure a block of consecutive frames, tracking the centre from frame to frame.

    Parameters
    ----------
    frames : (n, ky, kx) array
        The block's pixels.
    first_frame : int
        Number of the block's first frame in the series.
    scan_shape : tuple of int
        The series' arrangement, for each frame's scan position.
    options : SeriesOptions
    mask : (ky, kx) bool array, optional
        The series mask (:func:`calculate_series_mask`), used on every frame;
        without it each frame gets its own automatic mask (slower).
    start_centre_xy : [x, y], optional
        A centre to try on the first frame (checked like a tracked one).

    Returns
    -------
    list of FrameResult
        One per frame, failed frames included (``ok`` False, ``error`` set).
    """
    from saedkit.core.detection.centre import manual_centre
    from saedkit.core.imageio import pattern_from_array

    frames = np.asarray(frames)
    if frames.ndim != 3:
        raise InputError(f"frames must be an (n, ky, kx) block, got shape {frames.shape}")
    phases = _worker_phases(options.phases)
    m = None if mask is None else np.asarray(mask, bool)
    prev = None if start_centre_xy is None else np.asarray(start_centre_xy, float)
    out: list[FrameResult] = []
    for j, frame in enumerate(frames):
        i = first_frame + j
        scan_index = tuple(int(v) for v in np.unravel_index(i, scan_shape))
        try:
            image = pattern_from_array(frame, mask=m, voltage_kv=options.voltage_kv)
            analysis, method = None, "searched"
            if prev is not None:
                tried = _one(image, options, phases, m, prev)
                check = _check_centre(tried, prev)
                if check is not None and float(np.hypot(*(check - prev))) <= options.drift_tolerance_px:
                    analysis, method = tried, "tracked"
                    if tried.centre.method != "spot-lattice":  # no lattice: the Friedel pairs' centre
                        analysis = replace(tried, centre=manual_centre(float(check[0]), float(check[1]),
                                                                       sigma_px=0.5))
            if analysis is None:
                analysis = _one(image, options, phases, m, None)
            cxy = analysis.centre.xy
            bf, df = calculate_virtual_detector_sums(
                frame[None], cxy[None], bright_field_radius_px=options.bright_field_radius_px,
                dark_field_radii_px=options.dark_field_radii_px)
            out.append(_result(i, scan_index, analysis, method, float(bf[0]), float(df[0]), phases))
            prev = cxy
        except Exception as exc:  # noqa: BLE001 - one frame never stops a series; the error is recorded
            where = f"frame {i}" + (f" (scan {scan_index[0]}, {scan_index[1]})" if len(scan_index) == 2 else "")
            msg = " ".join(str(exc).split())
            msg = msg[len("array: "):] if msg.startswith("array: ") else msg  # the frame is named instead
            if not isinstance(exc, SaedkitError):  # not an expected failure: say what broke
                msg = f"unexpected {type(exc).__name__}: {msg}"
            out.append(FrameResult(i, scan_index, False, f"{where}: {msg}"))
    return out
