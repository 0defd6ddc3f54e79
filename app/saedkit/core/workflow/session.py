"""The state of one open pattern, with undo/redo, change notices and a session file.

A :class:`Session` holds what a user builds up on one diffraction pattern:
the image, the mask of excluded pixels, the centre, the spots (each found
automatically or placed by hand), the ring fit, the calibration, the chosen
phases, the zone-axis match and the candidate shown, the phases identified
from the rings, and the settings
(voltage, pixel size, tolerances). Every change goes through a method that

1. records the previous state on the undo history (states are immutable
   snapshots that share their unchanged parts; masks are stored bit-packed
   and compressed), and
2. tells every subscriber which parts changed (plain callables, no Qt).

The desktop program redraws from these notices and turns its Edit menu into
:meth:`Session.undo` / :meth:`Session.redo`; a script can use the same object.

A session is saved as one JSON file (:meth:`Session.save`,
:meth:`Session.load`): the image by path and SHA-256 (the pixels are re-read
on load), the mask bit-packed, every result as a typed record that is read
back into the same frozen dataclasses. :func:`autosave_path` and
:func:`find_leftover_autosave` support crash recovery.
"""

from __future__ import annotations

import base64
import contextlib
import dataclasses
import datetime as _dt
import json
import math
import os
import sys
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from saedkit import __version__
from saedkit.core._atomic import write_text_atomic
from saedkit.core._jsonsafe import JsonLimitError, loads_bounded
from saedkit.core._validate import check_positive, check_xy
from saedkit.core.workflow.analysis import Analysis
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import ImageReadError, InputError, SaedkitError
from saedkit.core.uncertainty import calculate_d_sigma, calculate_radius_sigmas
from saedkit.core.workflow.records import find_record_type, record_name
from saedkit.core.calibration.camera import EnteredCalibration
from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS, DEFAULT_VOLTAGE_KV

__all__ = [
    "Session",
    "SessionSettings",
    "SessionState",
    "SessionEvent",
    "EnteredCalibration",
    "PackedMask",
    "SpotMeasurement",
    "PairMeasurement",
    "PointReading",
    "SPOT_ORIGINS",
    "SESSION_SUFFIX",
    "calculate_spot_measurements",
    "calculate_pair_measurement",
    "find_spot_hkl",
    "data_dir",
    "autosave_path",
    "find_leftover_autosave",
    "remove_autosave",
]

#: How a spot came to be in the list.
SPOT_ORIGINS = ("auto", "manual")

#: File name ending of a saved session.
SESSION_SUFFIX = ".saedkit.json"

_FORMAT = "saedkit-session"
_FORMAT_VERSION = 1
_MAX_HISTORY = 200

#: The parts of a session's state that change and are named in notices.
STATE_FIELDS = (
    "mask", "centre", "spots", "ring_fit", "calibration", "phases", "match",
    "chosen_candidate", "phase_id", "settings",
)


# --------------------------------------------------------------------------- #
# Small value types
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class SessionSettings:
    """Settings of one session (defaults come from the program's preferences).

    Parameters
    ----------
    voltage_kv : float
        Accelerating voltage, kV.
    pixel_size_um : float, optional
        Detector pixel size, µm (gives the camera length).
    d_tolerance_pct : float
        Spacing tolerance of the zone-axis search, %.
    angle_tolerance_deg : float
        Angle tolerance of the zone-axis search, degrees.
    max_index : int
        Largest Miller index considered by the search.
    top : int
        Number of candidates kept.
    min_snr : float
        Smallest peak signal-to-noise ratio of an automatically found spot.
    snap_radius_px : float
        How far from a click a spot is looked for, pixels.
    standard : str
        Calibration standard (library name or CIF path).
    """

    # the analysis defaults are the pipeline's, stated once in PipelineOptions
    voltage_kv: float = DEFAULT_VOLTAGE_KV
    pixel_size_um: float | None = None
    d_tolerance_pct: float = DEFAULT_OPTIONS.d_tolerance_pct
    angle_tolerance_deg: float = DEFAULT_OPTIONS.angle_tolerance_deg
    max_index: int = DEFAULT_OPTIONS.max_index
    top: int = DEFAULT_OPTIONS.top
    min_snr: float = DEFAULT_OPTIONS.min_snr
    snap_radius_px: float = 10.0
    standard: str = "Au"

    def __post_init__(self) -> None:
        object.__setattr__(self, "voltage_kv", check_positive("voltage_kv", self.voltage_kv))
        if self.pixel_size_um is not None:
            object.__setattr__(self, "pixel_size_um", check_positive("pixel_size_um", self.pixel_size_um))
        for name in ("d_tolerance_pct", "angle_tolerance_deg", "min_snr", "snap_radius_px"):
            object.__setattr__(self, name, check_positive(name, getattr(self, name)))
        for name in ("max_index", "top"):
            value = getattr(self, name)
            if (isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating))
                    or not math.isfinite(value) or int(value) != value or int(value) < 1):
                raise InputError(f"{name} must be an integer >= 1, got {value!r}")
            object.__setattr__(self, name, int(value))
        if not str(self.standard).strip():
            raise InputError("standard must name a phase, got an empty string")

    def replace(self, **changes: Any) -> SessionSettings:
        """A copy with some settings changed (checked)."""
        unknown = set(changes) - {f.name for f in dataclasses.fields(self)}
        if unknown:
            raise InputError(f"unknown setting(s): {', '.join(sorted(unknown))}")
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, record: dict) -> SessionSettings:
        """Settings from a record; unknown keys are ignored, missing ones take the defaults."""
        names = {f.name for f in dataclasses.fields(cls)}
        return cls(**{k: v for k, v in dict(record).items() if k in names})


@dataclass(frozen=True, eq=False)
class PackedMask:
    """A boolean mask stored bit-packed and compressed (``np.packbits`` + zlib).

    A 4096×4096 mask takes 16 MB as a bool array and typically a few kB
    packed, so the undo history can keep many of them.
    """

    shape: tuple[int, int]
    packed: bytes = field(repr=False)
    n_masked: int = 0

    @classmethod
    def from_array(cls, mask: np.ndarray) -> PackedMask:
        """Pack a 2-D bool array."""
        arr = np.asarray(mask)
        if arr.dtype != np.bool_ or arr.ndim != 2:
            raise InputError(f"mask must be a 2-D boolean array, got dtype {arr.dtype} shape {arr.shape}")
        bits = np.packbits(arr, axis=None)
        return cls((int(arr.shape[0]), int(arr.shape[1])), zlib.compress(bits.tobytes(), 1),
                   int(np.count_nonzero(arr)))

    def to_array(self) -> np.ndarray:
        """The mask as a read-only bool array."""
        rows, cols = self.shape
        bits = np.frombuffer(zlib.decompress(self.packed), dtype=np.uint8)
        arr = np.unpackbits(bits, count=rows * cols).view(np.bool_).reshape(rows, cols)
        arr.flags.writeable = False
        return arr

    def to_dict(self) -> dict:
        """JSON-ready record (base64 text)."""
        return {"shape": list(self.shape), "encoding": "packbits-zlib-base64", "n_masked": self.n_masked,
                "data": base64.b64encode(self.packed).decode("ascii")}

    @classmethod
    def from_dict(cls, record: dict, *, expected_shape: tuple[int, int] | None = None) -> PackedMask:
        """Read the record of :meth:`to_dict`.

        The shape is checked (against ``expected_shape`` when given) before
        anything is unpacked, and the compressed data may not unpack to more
        than the mask's size: a hand-edited shape or a zlib bomb is refused
        without allocating.
        """
        try:
            if not isinstance(record, dict) or record.get("encoding") != "packbits-zlib-base64":
                raise ValueError(f"unknown mask encoding {record.get('encoding')!r}" if isinstance(record, dict)
                                 else f"the mask must be an object, got {type(record).__name__}")
            raw_shape = record["shape"]
            if (not isinstance(raw_shape, list) or len(raw_shape) != 2
                    or not all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in raw_shape)):
                raise ValueError(f"the shape must be [rows, cols] of whole numbers > 0, got {raw_shape!r}")
            shape = (int(raw_shape[0]), int(raw_shape[1]))
            if expected_shape is not None and shape != tuple(expected_shape):
                raise ValueError(f"the mask has shape {list(shape)}, the image {list(expected_shape)}")
            n_bytes = -(-shape[0] * shape[1] // 8)
            if not isinstance(record["data"], str) or len(record["data"]) > 4 * n_bytes + 1024:
                raise ValueError("the mask data is not text of the mask's size")
            packed = base64.b64decode(record["data"], validate=True)
            d = zlib.decompressobj()
            bits = d.decompress(packed, n_bytes)
            if len(bits) != n_bytes or d.unconsumed_tail:
                raise ValueError(f"the mask data unpacks to a size other than {n_bytes} bytes of shape {list(shape)}")
            arr = np.unpackbits(np.frombuffer(bits, dtype=np.uint8), count=shape[0] * shape[1])
            return cls(shape, packed, int(np.count_nonzero(arr)))
        except (KeyError, TypeError, ValueError, zlib.error, base64.binascii.Error) as exc:
            raise SaedkitError(f"the session's mask cannot be read: {exc}") from None


@dataclass(frozen=True)
class SessionState:
    """One immutable snapshot of a session's editable state (an undo step)."""

    mask: PackedMask | None = None
    centre: CentreResult | None = None
    spots: tuple = ()
    spot_origins: tuple[str, ...] = ()
    ring_fit: Any = None
    calibration: Any = None
    phases: tuple[str, ...] = ()
    match: Any = None
    chosen_candidate: int = 0
    match_current: bool = True  # False once spots/centre/calibration changed after the search
    phase_id: Any = None  # PhaseIdentification of a ring pattern
    settings: SessionSettings = field(default_factory=SessionSettings)


def _same(a: Any, b: Any) -> bool:
    """Identity, or equality for small values (big results are compared by identity only)."""
    if a is b:
        return True
    if type(a) is not type(b):
        return False
    if isinstance(a, (int, float, str, bool, tuple, SessionSettings, CentreResult, EnteredCalibration)):
        try:
            return bool(a == b)
        except (ValueError, TypeError):
            return False
    return False


def _changed_fields(old: SessionState, new: SessionState) -> frozenset[str]:
    out = set()
    for f in dataclasses.fields(SessionState):
        if not _same(getattr(old, f.name), getattr(new, f.name)):
            out.add(f.name)
    if "spot_origins" in out:
        out.discard("spot_origins")
        out.add("spots")
    if "match_current" in out:
        out.discard("match_current")
        out.add("match")
    return frozenset(out)


@dataclass(frozen=True)
class SessionEvent:
    """What changed in a session.

    Parameters
    ----------
    changed : frozenset of str
        Names among ``mask``, ``centre``, ``spots``, ``ring_fit``,
        ``calibration``, ``phases``, ``match``, ``chosen_candidate``,
        ``phase_id``, ``settings``; plus ``image`` when a whole session was (re)loaded and
        ``saved`` when only the saved/modified flag changed.
    label : str
        The edit's name as the Edit menu shows it ("Move spot").
    kind : str
        ``"edit"``, ``"undo"``, ``"redo"`` or ``"saved"``.
    """

    changed: frozenset
    label: str = ""
    kind: str = "edit"

    def __contains__(self, name: str) -> bool:
        return name in self.changed


# --------------------------------------------------------------------------- #
# Measurements
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class SpotMeasurement:
    """One spot measured about the centre: radius, spacing, angle and (hkl).

    ``radius_px`` is the ideal (ellipse-corrected) distance from the centre;
    ``d_A = K / radius_px``; ``g_per_nm = 10 / d_A``; ``angle_deg`` is the
    direction of the spot from the centre (from +x towards +y). Values that
    need a centre or a camera constant are NaN without one.
    """

    index: int
    x: float
    y: float
    sigma_x: float
    sigma_y: float
    radius_px: float
    radius_sigma_px: float
    d_A: float
    d_sigma_A: float
    g_per_nm: float
    angle_deg: float
    hkl: tuple[int, int, int] | None
    intensity: float
    intensity_sigma: float
    snr: float
    origin: str
    d_stat_sigma_A: float = math.nan  # the statistical and systematic parts of d_sigma_A
    d_sys_sigma_A: float = math.nan
    g_sigma_per_nm: float = math.nan

    def to_dict(self) -> dict:
        """JSON-ready record."""
        def f(v):
            return float(v) if v is not None and math.isfinite(v) else None
        return {
            "index": self.index, "x": self.x, "y": self.y, "sigma_x_px": f(self.sigma_x),
            "sigma_y_px": f(self.sigma_y), "radius_px": f(self.radius_px),
            "radius_sigma_px": f(self.radius_sigma_px), "d_A": f(self.d_A), "d_sigma_A": f(self.d_sigma_A),
            "d_stat_sigma_A": f(self.d_stat_sigma_A), "d_sys_sigma_A": f(self.d_sys_sigma_A),
            "g_sigma_per_nm": f(self.g_sigma_per_nm),
            "g_per_nm": f(self.g_per_nm), "angle_deg": f(self.angle_deg),
            "hkl": None if self.hkl is None else list(self.hkl), "intensity": f(self.intensity),
            "intensity_sigma": f(self.intensity_sigma), "snr": f(self.snr), "origin": self.origin,
        }


@dataclass(frozen=True)
class PairMeasurement:
    """Distance and angle between two spots, or one Friedel pair across the centre.

    Parameters
    ----------
    kind : {"pair", "friedel"}
        ``"pair"``: two spots each measured from the centre; ``"friedel"``:
        a spot ``g`` and its partner ``−g``, measured from each other (half
        their distance), so that the centre's error cancels.
    a_xy, b_xy : tuple of float
        The two points, pixels.
    distance_px : float
        Their distance on the image, pixels (ellipse-corrected).
    radius_px, radius_sigma_px : float
        ``"friedel"``: half the corrected distance; ``"pair"``: NaN.
    d_A, d_sigma_A : float
        ``"friedel"``: ``K / radius_px``; ``"pair"``: the spacing of the
        difference vector ``g_a − g_b`` (``K / distance_px``).
    angle_deg, angle_sigma_deg : float
        ``"pair"``: angle between ``g_a`` and ``g_b`` about the centre;
        ``"friedel"``: direction of ``g`` from +x towards +y.
    radii_px, radii_sigma_px, d_each_A, d_each_sigma_A : tuple of float
        ``"pair"``: radius and spacing of each spot (NaN for ``"friedel"``).
    """

    kind: str
    a_xy: tuple[float, float]
    b_xy: tuple[float, float]
    distance_px: float
    radius_px: float
    radius_sigma_px: float
    d_A: float
    d_sigma_A: float
    angle_deg: float
    angle_sigma_deg: float
    radii_px: tuple[float, float] = (math.nan, math.nan)
    radii_sigma_px: tuple[float, float] = (math.nan, math.nan)
    d_each_A: tuple[float, float] = (math.nan, math.nan)
    d_each_sigma_A: tuple[float, float] = (math.nan, math.nan)

    def to_dict(self) -> dict:
        """JSON-ready record (NaN as None)."""
        def f(v):
            return float(v) if math.isfinite(v) else None
        return {
            "kind": self.kind, "a_px": list(self.a_xy), "b_px": list(self.b_xy),
            "distance_px": f(self.distance_px), "radius_px": f(self.radius_px),
            "radius_sigma_px": f(self.radius_sigma_px), "d_A": f(self.d_A), "d_sigma_A": f(self.d_sigma_A),
            "angle_deg": f(self.angle_deg), "angle_sigma_deg": f(self.angle_sigma_deg),
            "radii_px": [f(v) for v in self.radii_px], "radii_sigma_px": [f(v) for v in self.radii_sigma_px],
            "d_each_A": [f(v) for v in self.d_each_A], "d_each_sigma_A": [f(v) for v in self.d_each_sigma_A],
        }


@dataclass(frozen=True)
class PointReading:
    """A point of the image as the cursor read-out shows it (NaN where unknown)."""

    x: float
    y: float
    inside: bool
    value: float
    masked: bool
    radius_px: float
    angle_deg: float
    d_A: float
    g_per_nm: float


def _camera_terms(calibration) -> tuple[float, float, Ellipse]:
    """(K, total σK, ellipse) of a camera model; K is NaN without one.

    The σ is the total (statistical and reproducibility in quadrature), what
    the ruler and the panels quote; the spot table uses the one measurement
    (:func:`saedkit.core.measure.measure_positions`), which keeps the parts apart.
    """
    if calibration is None:
        return math.nan, math.nan, NO_DISTORTION
    from saedkit.core.calibration.camera import camera_terms

    t = camera_terms(calibration)
    return t.camera_constant_px_A, t.total_sigma_px_A, t.ellipse


def _cov(sx: float, sy: float) -> np.ndarray:
    sx = 0.0 if not math.isfinite(sx) else sx
    sy = 0.0 if not math.isfinite(sy) else sy
    return np.diag([sx * sx, sy * sy])


def find_spot_hkl(spots_xy, candidate, *, centre_xy=None, tolerance_px: float = 3.0,
                  rel_tolerance: float = 0.03) -> list:
    """The (hkl) a zone-axis candidate gives each spot, or None.

    A spot takes the (hkl) of the nearest predicted reflection of the
    candidate when it lies within ``max(tolerance_px, rel_tolerance·R)`` of
    it (``R`` the predicted reflection's distance from the centre), so that
    spots added or moved after the search are labelled too.

    Parameters
    ----------
    spots_xy : (N, 2) array of [x, y]
    candidate : ZoneCandidate or None
    centre_xy : [x, y], optional
        Pattern centre (for the relative tolerance); by default the mean of
        the predicted reflections, which come in ±g pairs.
    tolerance_px, rel_tolerance : float
        Absolute and relative matching tolerances.

    Returns
    -------
    list of tuple or None, one per spot
    """
    pts = np.asarray(spots_xy, dtype=float).reshape(-1, 2)
    if candidate is None or len(pts) == 0 or not candidate.predicted:
        return [None] * len(pts)
    pred = np.array([[p.x, p.y] for p in candidate.predicted], dtype=float)
    hkls = [tuple(int(v) for v in p.hkl) for p in candidate.predicted]
    centre = pred.mean(axis=0) if centre_xy is None else np.asarray(centre_xy, dtype=float)
    r_pred = np.hypot(*(pred - centre).T)
    out: list = []
    for p in pts:
        dist = np.hypot(*(pred - p).T)
        j = int(np.argmin(dist))
        tol = max(tolerance_px, rel_tolerance * r_pred[j])
        out.append(hkls[j] if dist[j] <= tol else None)
    # the candidate's own indexing wins where it names a measured spot
    own = [(s.x, s.y, s.hkl) for s in candidate.spots if s.hkl is not None]
    if own:
        own_xy = np.array([[x, y] for x, y, _ in own])
        for i, p in enumerate(pts):
            dist = np.hypot(*(own_xy - p).T)
            j = int(np.argmin(dist))
            if dist[j] < 0.5:
                out[i] = tuple(int(v) for v in own[j][2])
    return out


def calculate_spot_measurements(spots: Sequence, centre: CentreResult | None, calibration=None, *,
                                origins: Sequence[str] | None = None, candidate=None) -> tuple[SpotMeasurement, ...]:
    """Measure spots about the centre: radius, d-spacing and angle with uncertainties.

    Parameters
    ----------
    spots : sequence of Spot
    centre : CentreResult or None
        Without a centre, radii, spacings and angles are NaN.
    calibration : Calibration, SavedCalibration or EnteredCalibration, optional
        Gives K, its uncertainty and the ellipse to correct for; without one
        spacings are NaN.
    origins : sequence of str, optional
        ``"auto"`` or ``"manual"`` per spot.
    candidate : ZoneCandidate, optional
        Gives the (hkl) column (see :func:`find_spot_hkl`).

    Returns
    -------
    tuple of SpotMeasurement

    Notes
    -----
    The numbers come from :func:`saedkit.core.measure.measure_positions`, the
    one measurement of saedkit (the record, the tables and the matcher's
    candidates use it too): ideal offset ``v = D⁻¹(p − c)``, ``R = |v|``,
    ``d`` from the camera equation, ``d_sigma_A`` the total of the
    statistical (positions, centre, σ_K) and systematic (reproducibility of K) parts.
    """
    from saedkit.core.measure import measure_positions

    xy = np.array([[s.x, s.y] for s in spots], dtype=float).reshape(-1, 2)
    sig = np.array([[s.sigma_x, s.sigma_y] for s in spots], dtype=float).reshape(-1, 2)
    c_xy = None if centre is None else (centre.x, centre.y)
    m = measure_positions(xy, sig, c_xy, None if centre is None else (centre.sigma_x, centre.sigma_y), calibration)
    hkls = find_spot_hkl(xy, candidate, centre_xy=c_xy) if candidate is not None else [None] * len(xy)
    origins = list(origins) if origins is not None else ["auto"] * len(xy)
    out = []
    for i, s in enumerate(spots):
        out.append(SpotMeasurement(
            index=i, x=float(s.x), y=float(s.y), sigma_x=float(s.sigma_x), sigma_y=float(s.sigma_y),
            radius_px=float(m.radius_px[i]), radius_sigma_px=float(m.radius_sigma_px[i]), d_A=float(m.d_A[i]),
            d_sigma_A=float(m.d_sigma_A[i]), g_per_nm=float(m.g_per_nm[i]), angle_deg=float(m.angle_deg[i]),
            hkl=hkls[i], intensity=float(s.intensity), intensity_sigma=float(s.intensity_sigma),
            snr=float(s.snr), origin=origins[i] if i < len(origins) else "auto",
            d_stat_sigma_A=float(m.d_stat_sigma_A[i]), d_sys_sigma_A=float(m.d_sys_sigma_A[i]),
            g_sigma_per_nm=float(m.g_sigma_per_nm[i]),
        ))
    return tuple(out)


def calculate_pair_measurement(a_xy, b_xy, *, centre: CentreResult | None = None, calibration=None,
                               friedel: bool = False, a_sigma_px: tuple[float, float] = (0.5, 0.5),
                               b_sigma_px: tuple[float, float] = (0.5, 0.5)) -> PairMeasurement:
    """Measure two spots: their distance and angle, or a Friedel pair across the centre.

    Parameters
    ----------
    a_xy, b_xy : [x, y]
        The two spot positions, pixels.
    centre : CentreResult, optional
        Needed for ``friedel=False`` (angles and radii about the centre).
    calibration : calibration-like, optional
        Gives K (and the ellipse); without it spacings are NaN.
    friedel : bool
        Treat ``a`` and ``b`` as ``g`` and ``−g``: ``R = |D⁻¹(a − b)| / 2``,
        independent of the centre.
    a_sigma_px, b_sigma_px : (σx, σy)
        Position uncertainties of the spots, pixels.

    Returns
    -------
    PairMeasurement

    Notes
    -----
    Measuring ``g`` from ``−g`` (half the distance of a Friedel pair)
    cancels the error of the centre, which is often the largest error of a
    single-spot radius (common practice). Angles between ``g_a`` and ``g_b``
    use the ideal offsets; their uncertainty is
    ``√((σ⊥a/Ra)² + (σ⊥b/Rb)²)`` with the tangential position uncertainties
    (first-order propagation).
    """
    a = check_xy("a_xy", a_xy)
    b = check_xy("b_xy", b_xy)
    k, sk, ellipse = _camera_terms(calibration)
    dinv = ellipse.inverse_matrix
    cov_a, cov_b = _cov(*a_sigma_px), _cov(*b_sigma_px)
    v_ab, dist, s_dist, _ = calculate_radius_sigmas(a - b, cov_a + cov_b, dinv)
    if friedel:
        r, sr = dist / 2.0, s_dist / 2.0
        d, sd = calculate_d_sigma(r, sr, k, sk)
        angle = math.degrees(math.atan2(a[1] - b[1], a[0] - b[0]))
        sigma_t = math.nan
        if r > 0:
            t = np.array([-v_ab[1], v_ab[0]]) / (2 * r)
            cov = dinv @ (cov_a + cov_b) @ dinv.T
            sigma_t = math.degrees(float(np.sqrt(t @ cov @ t)) / (2 * r))
        return PairMeasurement("friedel", (float(a[0]), float(a[1])), (float(b[0]), float(b[1])),
                               dist, r, sr, d, sd, angle, sigma_t)
    d, sd = calculate_d_sigma(dist, s_dist, k, sk)
    if centre is None:
        return PairMeasurement("pair", (float(a[0]), float(a[1])), (float(b[0]), float(b[1])),
                               dist, math.nan, math.nan, d, sd, math.nan, math.nan)
    c = np.array([centre.x, centre.y])
    cov_c = _cov(centre.sigma_x, centre.sigma_y)
    va, ra, sra, ta = calculate_radius_sigmas(a - c, cov_a + cov_c, dinv)
    vb, rb, srb, tb = calculate_radius_sigmas(b - c, cov_b + cov_c, dinv)
    if ra > 0 and rb > 0:
        cosang = float(np.clip(va @ vb / (ra * rb), -1.0, 1.0))
        angle = math.degrees(math.acos(cosang))
        sang = math.degrees(math.hypot(ta / ra, tb / rb))
    else:
        angle = sang = math.nan
    da, sda = calculate_d_sigma(ra, sra, k, sk)
    db, sdb = calculate_d_sigma(rb, srb, k, sk)
    return PairMeasurement("pair", (float(a[0]), float(a[1])), (float(b[0]), float(b[1])),
                           dist, math.nan, math.nan, d, sd, angle, sang,
                           (ra, rb), (sra, srb), (da, db), (sda, sdb))


# --------------------------------------------------------------------------- #
# The session
# --------------------------------------------------------------------------- #

Listener = Callable[[SessionEvent], None]


class Session:
    """The editable state of one open pattern, with undo/redo and change notices.

    Parameters
    ----------
    image : PatternImage
        The pattern. Its own mask (if any) starts the session's mask.
    settings : SessionSettings, optional
        Defaults; the image's voltage and pixel size, when the file records
        them, fill in the ones left at their defaults.
    mask : (rows, cols) bool array, optional
        Starting mask (instead of the image's).
    path : str or path, optional
        The session file this session was loaded from or saved to.

    Notes
    -----
    Every editing method records one undo step (or a group of them inside
    :meth:`transaction`) and calls each subscriber with a
    :class:`SessionEvent`. Listeners are plain callables; an exception in one
    is not caught (it is a bug).

    Examples
    --------
    >>> import numpy as np
    >>> from saedkit.core.imageio import pattern_from_array
    >>> from saedkit.core.detection.centre import manual_centre
    >>> s = Session(pattern_from_array(np.random.default_rng(0).random((64, 64))))
    >>> s.set_centre(manual_centre(32, 30))
    >>> s.undo(); s.centre is None
    True
    """

    def __init__(self, image, *, settings: SessionSettings | None = None, mask=None,
                 path: str | os.PathLike | None = None) -> None:
        self._image = image
        if settings is None:
            settings = SessionSettings()
            if getattr(image, "voltage_kv", None):
                settings = settings.replace(voltage_kv=image.voltage_kv)
        if settings.pixel_size_um is None and getattr(image, "pixel_size_um", None):
            settings = settings.replace(pixel_size_um=image.pixel_size_um)
        start_mask = mask if mask is not None else image.mask
        packed = None
        if start_mask is not None and np.any(start_mask):
            packed = self._pack_checked(start_mask)
        self._state = SessionState(mask=packed, settings=settings)
        self._undo: list[tuple[str, SessionState]] = []
        self._redo: list[tuple[str, SessionState]] = []
        self._listeners: list[Listener] = []
        self._saved_state: SessionState | None = self._state
        self._revision = 0
        self._txn: list | None = None  # [label, start_state] while a transaction is open
        self._mask_cache: tuple[PackedMask | None, np.ndarray] | None = None
        self.path: Path | None = None if path is None else Path(path)
        self.load_warnings: tuple[str, ...] = ()
        self.recorded_path: str | None = None  # the session file named inside a loaded file (autosaves)

    # -- construction ------------------------------------------------------ #

    @classmethod
    def open(cls, path: str | os.PathLike, *, page: int = 0, settings: SessionSettings | None = None,
             auto_mask: bool = True) -> Session:
        """Read a pattern file and start a session on it.

        Parameters
        ----------
        path : str or path
            Image file (TIFF, MRC, PNG, JPEG, NPY).
        page : int
            Page or frame of a multi-page file.
        settings : SessionSettings, optional
        auto_mask : bool
            Start with the automatic mask (saturated pixels and beam stop,
            :func:`saedkit.core.detection.masks.find_auto_mask`).

        Raises
        ------
        ImageReadError
            If the file cannot be read.
        """
        from saedkit.core.imageio import read_pattern

        image = read_pattern(path, page=page)
        mask = None
        if auto_mask:
            from saedkit.core.detection.masks import find_auto_mask

            mask = find_auto_mask(image.data, saturation_value=image.saturation_value)
        return cls(image, settings=settings, mask=mask)

    # -- read access ------------------------------------------------------- #

    @property
    def image(self):
        """The pattern (PatternImage); its ``mask`` is not the session's mask: see :attr:`mask`."""
        return self._image

    @property
    def state(self) -> SessionState:
        """The current immutable snapshot."""
        return self._state

    @property
    def mask(self) -> np.ndarray:
        """The mask of excluded pixels (read-only bool array of the image's shape)."""
        packed = self._state.mask
        if self._mask_cache is not None and self._mask_cache[0] is packed:
            return self._mask_cache[1]
        if packed is None:
            arr = np.zeros(self._image.shape, dtype=bool)
            arr.flags.writeable = False
        else:
            arr = packed.to_array()
        self._mask_cache = (packed, arr)
        return arr

    @property
    def masked_image(self):
        """The image carrying the session's mask (for the core functions and the report)."""
        return self._image.with_mask(self.mask)

    centre = property(lambda self: self._state.centre, doc="The centre (CentreResult) or None.")
    spots = property(lambda self: self._state.spots, doc="The spots, a tuple of Spot.")
    spot_origins = property(lambda self: self._state.spot_origins,
                            doc="``'auto'`` or ``'manual'`` for each spot.")
    ring_fit = property(lambda self: self._state.ring_fit, doc="The ring fit (RingFit) or None.")
    calibration = property(lambda self: self._state.calibration,
                           doc="Calibration, SavedCalibration, EnteredCalibration or None.")
    phases = property(lambda self: self._state.phases, doc="Chosen phases (library names or CIF paths).")
    match = property(lambda self: self._state.match, doc="The zone-axis match (MatchResult) or None.")
    chosen_candidate = property(lambda self: self._state.chosen_candidate,
                                doc="Index of the candidate shown (0 = best).")
    match_current = property(lambda self: self._state.match_current,
                             doc="False when spots, centre or calibration changed after the search.")
    phase_id = property(lambda self: self._state.phase_id,
                        doc="Phases ranked against the rings (PhaseIdentification) or None.")
    settings = property(lambda self: self._state.settings, doc="The session's SessionSettings.")

    @property
    def candidate(self):
        """The chosen ZoneCandidate, or None."""
        m = self._state.match
        if m is None or not m.candidates:
            return None
        return m.candidates[min(max(self._state.chosen_candidate, 0), len(m.candidates) - 1)]

    @property
    def spots_xy(self) -> np.ndarray:
        """Spot positions as an (N, 2) array of [x, y]."""
        return np.array([[s.x, s.y] for s in self._state.spots], dtype=float).reshape(-1, 2)

    @property
    def camera_constant(self) -> tuple[float, float, Ellipse, str]:
        """The camera constant in use: ``(K, σK, ellipse, source)``.

        The session's calibration when there is one; else the refined K of
        the chosen candidate of an uncalibrated search (``source`` says
        which); else NaN.
        """
        cal = self._state.calibration
        if cal is not None:
            k, sk, ell = _camera_terms(cal)
            return k, sk, ell, "calibration"
        cand = self.candidate
        if cand is not None and math.isfinite(cand.camera_constant_px_A):
            return (float(cand.camera_constant_px_A), float(cand.camera_constant_sigma_px_A),
                    NO_DISTORTION, "candidate")
        return math.nan, math.nan, NO_DISTORTION, "none"

    def measurements(self) -> tuple[SpotMeasurement, ...]:
        """The spots measured with the current centre, camera model and candidate.

        The camera model is the session's calibration (with its reproducibility
        term and camera-equation form) or, without one, the chosen candidate's
        refined K — the same as :attr:`Analysis.camera` of :meth:`to_analysis`.
        """
        from saedkit.core.workflow.analysis import candidate_camera

        cand = self.candidate
        cal = self._state.calibration
        if cal is None and cand is not None and math.isfinite(cand.camera_constant_px_A):
            cal = candidate_camera(cand)
        return calculate_spot_measurements(self._state.spots, self._state.centre, cal,
                                           origins=self._state.spot_origins, candidate=self.candidate)

    def measure_pair(self, a_xy, b_xy, *, friedel: bool = False, a_sigma_px=(0.5, 0.5),
                     b_sigma_px=(0.5, 0.5)) -> PairMeasurement:
        """Measure two points with the current centre and camera constant (see :func:`calculate_pair_measurement`)."""
        k, sk, ell, source = self.camera_constant
        cal = None if source == "none" else EnteredCalibration(k, sk if math.isfinite(sk) else 0.0, ell)
        return calculate_pair_measurement(a_xy, b_xy, centre=self._state.centre, calibration=cal,
                                          friedel=friedel, a_sigma_px=a_sigma_px, b_sigma_px=b_sigma_px)

    def describe_point(self, x: float, y: float) -> PointReading:
        """What the cursor points at: pixel value, radius from the centre, d and |g| when calibrated."""
        rows, cols = self._image.shape
        col, row = int(round(x)), int(round(y))
        inside = 0 <= col < cols and 0 <= row < rows
        value = float(self._image.data[row, col]) if inside else math.nan
        masked = bool(self.mask[row, col]) if inside else False
        r = d = g = angle = math.nan
        c = self._state.centre
        if c is not None:
            k, _, ell, source = self.camera_constant
            v = ell.inverse_matrix @ np.array([x - c.x, y - c.y])
            r = float(np.hypot(*v))
            angle = math.degrees(math.atan2(y - c.y, x - c.x))
            if source != "none" and r > 0:
                d = k / r
                g = 10.0 / d
        return PointReading(float(x), float(y), inside, value, masked, r, angle, d, g)

    def to_analysis(self) -> Analysis:
        """The frozen :class:`~saedkit.core.workflow.analysis.Analysis` record of this session."""
        st = self._state
        params = {
            **st.settings.to_dict(),
            "phases": list(st.phases),
            "spot_origins": list(st.spot_origins),
            "match_current": st.match_current,
            "session_path": None if self.path is None else str(self.path),
        }
        return Analysis(image=self.masked_image, centre=st.centre, spots=tuple(st.spots),
                        ring_fit=st.ring_fit, calibration=st.calibration, match=st.match,
                        chosen_candidate=st.chosen_candidate, phase_id=st.phase_id, parameters=params)

    # -- listeners ---------------------------------------------------------- #

    def subscribe(self, callback: Listener) -> Callable[[], None]:
        """Call ``callback(event)`` after every change; returns a function that unsubscribes."""
        self._listeners.append(callback)

        def unsubscribe() -> None:
            with contextlib.suppress(ValueError):
                self._listeners.remove(callback)

        return unsubscribe

    def _notify(self, event: SessionEvent) -> None:
        for cb in list(self._listeners):
            cb(event)

    # -- history ------------------------------------------------------------ #

    @property
    def can_undo(self) -> bool:
        return bool(self._undo)

    @property
    def can_redo(self) -> bool:
        return bool(self._redo)

    @property
    def undo_label(self) -> str:
        """Name of the edit that :meth:`undo` would take back ('' when none)."""
        return self._undo[-1][0] if self._undo else ""

    @property
    def redo_label(self) -> str:
        return self._redo[-1][0] if self._redo else ""

    @property
    def history_labels(self) -> list[str]:
        """Names of the edits on the undo history, oldest first."""
        return [label for label, _ in self._undo]

    @property
    def is_modified(self) -> bool:
        """True when the state differs from the last saved (or loaded) one."""
        return self._state is not self._saved_state

    @property
    def revision(self) -> int:
        """A counter that grows with every change (for autosave)."""
        return self._revision

    def mark_saved(self) -> None:
        """Take the current state as the saved one."""
        self._saved_state = self._state
        self._notify(SessionEvent(frozenset({"saved"}), "", "saved"))

    def mark_modified(self) -> None:
        """Take the state as not saved (e.g. a session recovered from an autosave)."""
        self._saved_state = None
        self._notify(SessionEvent(frozenset({"saved"}), "", "saved"))

    def undo(self) -> bool:
        """Take back the last edit; returns False when there is none."""
        if self._txn is not None:
            raise SaedkitError("cannot undo inside a transaction")
        if not self._undo:
            return False
        label, prev = self._undo.pop()
        self._redo.append((label, self._state))
        self._set_state(prev, label, "undo")
        return True

    def redo(self) -> bool:
        """Make the last undone edit again; returns False when there is none."""
        if self._txn is not None:
            raise SaedkitError("cannot redo inside a transaction")
        if not self._redo:
            return False
        label, nxt = self._redo.pop()
        self._undo.append((label, self._state))
        self._set_state(nxt, label, "redo")
        return True

    def _set_state(self, new: SessionState, label: str, kind: str) -> None:
        changed = _changed_fields(self._state, new)
        self._state = new
        self._revision += 1
        self._notify(SessionEvent(changed, label, kind))

    def _commit(self, label: str, **changes: Any) -> None:
        new = dataclasses.replace(self._state, **changes)
        changed = _changed_fields(self._state, new)
        if not changed:
            return
        if self._txn is not None:
            self._state = new
            return
        self._undo.append((label, self._state))
        del self._undo[:-_MAX_HISTORY]
        self._redo.clear()
        self._state = new
        self._revision += 1
        self._notify(SessionEvent(changed, label, "edit"))

    @contextlib.contextmanager
    def transaction(self, label: str) -> Iterator[Session]:
        """Group several edits into one undo step and one notice.

        If the block raises, the edits made in it are taken back.

        Examples
        --------
        >>> with session.transaction("Calibrate"):  # doctest: +SKIP
        ...     session.set_calibration(cal)
        ...     session.set_centre(cal.centre)
        """
        if self._txn is not None:  # nested: part of the outer one
            yield self
            return
        start = self._state
        self._txn = [label, start]
        try:
            yield self
        except BaseException:
            self._state = start
            self._txn = None
            raise
        self._txn = None
        changed = _changed_fields(start, self._state)
        if changed:
            self._undo.append((label, start))
            del self._undo[:-_MAX_HISTORY]
            self._redo.clear()
            self._revision += 1
            self._notify(SessionEvent(changed, label, "edit"))

    def _results_stale(self) -> dict:
        """Changes that mark the match as made on older input."""
        return {"match_current": False} if self._state.match is not None else {}

    # -- edits --------------------------------------------------------------- #

    def _pack_checked(self, mask) -> PackedMask:
        arr = np.asarray(mask)
        if arr.dtype != np.bool_ or arr.shape != tuple(self._image.shape):
            raise InputError(
                f"mask must be a boolean array of the image shape {tuple(self._image.shape)}, "
                f"got dtype {arr.dtype} shape {arr.shape}")
        return PackedMask.from_array(arr)

    def _remember_mask(self, packed: PackedMask | None, mask) -> None:
        """Seed the unpacked-mask cache with the array just packed (saves unpacking it again)."""
        if packed is not None:
            arr = np.array(mask, dtype=bool)
            arr.flags.writeable = False
            self._mask_cache = (packed, arr)

    def set_mask(self, mask, *, label: str = "Edit mask") -> None:
        """Replace the mask (True = excluded pixel)."""
        packed = self._pack_checked(mask) if mask is not None and np.any(mask) else None
        old = self._state.mask
        if old is None and packed is None:
            return
        if old is not None and packed is not None and old.packed == packed.packed:
            return
        self._remember_mask(packed, mask)
        self._commit(label, mask=packed)

    def replace_initial_mask(self, mask, *, label: str = "Automatic mask") -> None:
        """Set the mask computed after opening (e.g. the automatic mask, found in the background).

        When nothing has been edited yet, the mask becomes part of the
        starting state (not an undo step, and the session stays unmodified);
        otherwise it is an ordinary :meth:`set_mask`.
        """
        if self._undo or self._redo or self._txn is not None:
            self.set_mask(mask, label=label)
            return
        packed = self._pack_checked(mask) if mask is not None and np.any(mask) else None
        self._remember_mask(packed, mask)
        was_clean = not self.is_modified
        new = dataclasses.replace(self._state, mask=packed)
        self._state = new
        if was_clean:
            self._saved_state = new
        self._revision += 1
        self._notify(SessionEvent(frozenset({"mask"}), label, "edit"))

    def set_centre(self, centre: CentreResult | None, *, label: str = "Set centre") -> None:
        """Set (or clear) the pattern centre."""
        if centre is not None and not isinstance(centre, CentreResult):
            raise InputError(f"centre must be a CentreResult or None, got {type(centre).__name__}")
        self._commit(label, centre=centre, **self._results_stale())

    def _check_spot(self, spot) -> None:
        for name in ("x", "y", "sigma_x", "sigma_y", "intensity", "snr"):
            if not hasattr(spot, name):
                raise InputError(f"spot must be a Spot, got {type(spot).__name__}")
        rows, cols = self._image.shape
        if not (-0.5 <= spot.x <= cols - 0.5 and -0.5 <= spot.y <= rows - 0.5):
            raise InputError(f"spot at ({spot.x:.1f}, {spot.y:.1f}) is outside the image ({cols}x{rows})")

    def _check_index(self, index: int) -> int:
        n = len(self._state.spots)
        if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or not -n <= index < n:
            raise InputError(f"spot index must be an integer in [0, {n}), got {index!r}")
        return int(index) % n

    def add_spot(self, spot, *, origin: str = "manual", label: str = "Add spot") -> int:
        """Append a spot; returns its index."""
        self._check_spot(spot)
        if origin not in SPOT_ORIGINS:
            raise InputError(f"origin must be one of {SPOT_ORIGINS}, got {origin!r}")
        st = self._state
        self._commit(label, spots=st.spots + (spot,), spot_origins=st.spot_origins + (origin,),
                     **self._results_stale())
        return len(self._state.spots) - 1

    def move_spot(self, index: int, spot, *, label: str = "Move spot") -> None:
        """Replace spot ``index`` by ``spot`` (e.g. refined at its new place); it becomes 'manual'."""
        i = self._check_index(index)
        self._check_spot(spot)
        st = self._state
        spots = list(st.spots)
        origins = list(st.spot_origins)
        spots[i] = spot
        origins[i] = "manual"
        self._commit(label, spots=tuple(spots), spot_origins=tuple(origins), **self._results_stale())

    def delete_spot(self, index: int, *, label: str = "Delete spot") -> None:
        """Remove spot ``index``."""
        self.delete_spots([index], label=label)

    def delete_spots(self, indices: Sequence[int], *, label: str = "Delete spots") -> None:
        """Remove several spots at once (one undo step)."""
        drop = {self._check_index(i) for i in indices}
        if not drop:
            return
        st = self._state
        keep = [i for i in range(len(st.spots)) if i not in drop]
        self._commit(label, spots=tuple(st.spots[i] for i in keep),
                     spot_origins=tuple(st.spot_origins[i] for i in keep), **self._results_stale())

    def set_spots(self, spots: Sequence, *, origin: str = "auto", keep_manual: bool = True,
                  label: str = "Find spots") -> None:
        """Replace the spots, e.g. by those of an automatic search.

        Parameters
        ----------
        spots : sequence of Spot
        origin : {"auto", "manual"}
            What the new spots are marked as.
        keep_manual : bool
            Keep the hand-placed spots (those farther than 2 px from every
            new spot); the automatic ones are always replaced.
        """
        if origin not in SPOT_ORIGINS:
            raise InputError(f"origin must be one of {SPOT_ORIGINS}, got {origin!r}")
        new = tuple(spots)
        for s in new:
            self._check_spot(s)
        origins = [origin] * len(new)
        if keep_manual:
            xy = np.array([[s.x, s.y] for s in new]).reshape(-1, 2)
            kept = []
            for s, o in zip(self._state.spots, self._state.spot_origins):
                if o != "manual":
                    continue
                if len(xy) and np.min(np.hypot(*(xy - [s.x, s.y]).T)) < 2.0:
                    continue
                kept.append(s)
            new = new + tuple(kept)
            origins += ["manual"] * len(kept)
        self._commit(label, spots=new, spot_origins=tuple(origins), **self._results_stale())

    def clear_spots(self, *, label: str = "Clear spots") -> None:
        """Remove every spot."""
        self._commit(label, spots=(), spot_origins=(), **self._results_stale())

    def set_ring_fit(self, ring_fit, *, label: str = "Fit rings") -> None:
        """Set (or clear) the ring fit."""
        self._commit(label, ring_fit=ring_fit)

    def set_calibration(self, calibration, *, label: str = "Set calibration", use_centre: bool = False) -> None:
        """Set (or clear) the calibration.

        Parameters
        ----------
        calibration : Calibration, SavedCalibration, EnteredCalibration or None
        use_centre : bool
            Also take the calibration's fitted centre (and ring fit, when it
            carries one) as the session's: for a calibration fitted on this
            very pattern.
        """
        if calibration is not None and not hasattr(calibration, "camera_constant_px_A"):
            raise InputError(f"calibration must carry camera_constant_px_A, got {type(calibration).__name__}")
        changes: dict[str, Any] = {"calibration": calibration, **self._results_stale()}
        if use_centre and calibration is not None and getattr(calibration, "centre", None) is not None:
            changes["centre"] = calibration.centre
        self._commit(label, **changes)

    def set_camera_constant(self, camera_constant_px_A: float, *, sigma_px_A: float = 0.0,
                            label: str = "Enter camera constant") -> None:
        """Use a camera constant typed in by hand (keeps the current calibration's ellipse)."""
        _, _, ell, source = self.camera_constant
        ell = ell if source == "calibration" else NO_DISTORTION
        self.set_calibration(EnteredCalibration(camera_constant_px_A, sigma_px_A, ell), label=label)

    def set_phases(self, phases: Sequence[str], *, label: str = "Choose phases") -> None:
        """Set the phases the zone-axis search considers (library names or CIF paths)."""
        if isinstance(phases, str):
            raise InputError("phases must be a sequence of names, got one string")
        clean = []
        for p in phases:
            text = str(p).strip()
            if not text:
                raise InputError("a phase name is empty")
            if text not in clean:
                clean.append(text)
        self._commit(label, phases=tuple(clean))

    def set_settings(self, settings: SessionSettings | None = None, *, label: str = "Change settings",
                     **changes: Any) -> None:
        """Replace the settings, or change some of them by keyword."""
        new = settings if settings is not None else self._state.settings
        if changes:
            new = new.replace(**changes)
        self._commit(label, settings=new)

    def set_match(self, match, *, label: str = "Search zone axes", current: bool = True) -> None:
        """Set (or clear) the zone-axis match; shows its best candidate.

        ``current=False`` records that the match was made on spots, centre or
        calibration that have changed since (the program says so).
        """
        self._commit(label, match=match, chosen_candidate=0, match_current=bool(current))

    def set_phase_id(self, phase_id, *, label: str = "Identify phases") -> None:
        """Set (or clear) the phases ranked against the rings (a PhaseIdentification).

        The ring spacings behind it come from the ring fit and the camera
        constant in use when it was made; set the ring fit in the same
        :meth:`transaction` so both are undone together.
        """
        if phase_id is not None and not hasattr(phase_id, "candidates"):
            raise InputError(f"phase_id must be a PhaseIdentification, got {type(phase_id).__name__}")
        self._commit(label, phase_id=phase_id)

    def choose_candidate(self, index: int, *, label: str = "Choose candidate") -> None:
        """Show candidate ``index`` of the match."""
        m = self._state.match
        if m is None:
            raise InputError("there is no zone-axis match to choose a candidate from")
        n = len(m.candidates)
        if isinstance(index, bool) or not isinstance(index, (int, np.integer)) or not 0 <= index < n:
            raise InputError(f"candidate index must be in [0, {n}), got {index!r}")
        self._commit(label, chosen_candidate=int(index))

    # -- file ---------------------------------------------------------------- #

    def to_record(self, *, path: str | os.PathLike | None = None) -> dict:
        """The session file's JSON record (see :meth:`save`)."""
        st = self._state
        img = self._image
        image_path = img.source_path
        rel = None
        if image_path and path is not None:
            with contextlib.suppress(ValueError):
                rel = os.path.relpath(os.path.abspath(image_path), os.path.dirname(os.path.abspath(path)))
        return {
            "format": _FORMAT,
            "format_version": _FORMAT_VERSION,
            "software": {"name": "saedkit", "version": __version__},
            "saved": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "image": {
                "path": None if image_path is None else os.path.abspath(image_path),
                "relative_path": rel,
                "sha256": img.sha256,
                "shape": list(img.shape),
                "dtype": img.dtype,
                "page": img.page,
            },
            "settings": st.settings.to_dict(),
            "mask": None if st.mask is None else st.mask.to_dict(),
            "centre": _encode(st.centre),
            "spots": _encode(st.spots),
            "spot_origins": list(st.spot_origins),
            "ring_fit": _encode(st.ring_fit),
            "calibration": _encode(st.calibration),
            "phases": list(st.phases),
            "match": _encode(st.match),
            "chosen_candidate": st.chosen_candidate,
            "match_current": st.match_current,
            "phase_id": _encode(st.phase_id),
            "session_path": None if self.path is None else os.path.abspath(self.path),
        }

    def save(self, path: str | os.PathLike, *, mark_saved: bool = True) -> Path:
        """Write the session to one JSON file, atomically.

        Parameters
        ----------
        path : str or path
            Target file (by convention ending in ``.saedkit.json``).
        mark_saved : bool
            Take the state as saved and remember ``path`` (False for an
            autosave).

        Returns
        -------
        Path

        Raises
        ------
        InputError
            If the image was not read from a file (a session refers to its
            image by path).
        """
        if not self._image.source_path:
            raise InputError("this pattern was not read from a file, so the session cannot refer to it: "
                             "write the image to a file first")
        target = Path(path)
        text = json.dumps(self.to_record(path=target), indent=1, allow_nan=False)
        write_text_atomic(target, text + "\n")
        if mark_saved:
            self.path = target
            self.mark_saved()
        return target

    @classmethod
    def load(cls, path: str | os.PathLike, *, image_path: str | os.PathLike | None = None) -> Session:
        """Read a session file and the image it refers to.

        Parameters
        ----------
        path : str or path
            The session file.
        image_path : str or path, optional
            Read the image from here instead (e.g. after it was moved).

        Returns
        -------
        Session
            With ``load_warnings`` listing anything the user should know
            (the image file changed since the session was saved, the image
            found by its relative path).

        Raises
        ------
        SaedkitError
            If the file is not a saedkit session, cannot be parsed, or its
            image cannot be found or read, or has another shape.
        """
        from saedkit.core.detection.spots import Spot
        from saedkit.core.imageio import read_pattern
        from saedkit.core.indexing.matching_types import MatchResult

        p = Path(path)
        try:
            if not p.exists():
                raise FileNotFoundError(p)
            if not p.is_file():
                raise SaedkitError(f"{p}: not a regular file, so not a session file")
            size = p.stat().st_size
            if size > MAX_SESSION_BYTES:
                raise SaedkitError(f"{p}: {size} bytes, more than the {MAX_SESSION_BYTES} a session file may have")
            text = p.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise SaedkitError(f"{p}: session file not found") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise SaedkitError(f"{p}: cannot be read ({exc})") from None
        try:
            record = loads_bounded(text, what="the file", max_depth=48, max_items=1_000_000)
        except JsonLimitError as exc:
            raise SaedkitError(f"{p}: not a saedkit session ({exc})") from None
        if not isinstance(record, dict) or record.get("format") != _FORMAT:
            raise SaedkitError(f"{p}: not a saedkit session file")
        version = record.get("format_version", 0)
        if isinstance(version, bool) or not isinstance(version, int):
            raise SaedkitError(f"{p}: field 'format_version' must be a whole number, got {version!r}")
        if version > _FORMAT_VERSION:
            raise SaedkitError(f"{p}: written by a newer saedkit (session format "
                               f"{version}); update saedkit to read it")
        warnings: list[str] = []
        info = _field(p, record, "image", dict, default={})
        page = _field(p, info, "page", int, default=0, where="image")
        if not 0 <= page <= 100_000:
            raise SaedkitError(f"{p}: field 'image.page' must be between 0 and 100000, got {page!r}")
        rec_path = _field(p, info, "path", str, default=None, where="image")
        rel_path = _field(p, info, "relative_path", str, default=None, where="image")
        rec_sha = _field(p, info, "sha256", str, default=None, where="image")
        rec_shape = _field(p, info, "shape", list, default=None, where="image")
        if rec_shape is not None and (len(rec_shape) != 2 or not all(
                isinstance(n, int) and not isinstance(n, bool) and 0 < n < 1_000_000 for n in rec_shape)):
            raise SaedkitError(f"{p}: field 'image.shape' must be [rows, cols] of whole numbers, got {rec_shape!r}")
        candidates: list[Path] = []
        if image_path is not None:
            candidates.append(Path(image_path))
        else:
            if rec_path:
                candidates.append(Path(rec_path))
            if rel_path:
                candidates.append(p.parent / rel_path)
            if rec_path:
                candidates.append(p.parent / Path(rec_path).name)
        found = next((c for c in candidates if _is_image_file(c)), None)
        if found is None:
            named = [c for c in candidates if c.exists()]
            if named:
                raise SaedkitError(f"{p}: the session's image {named[0]} is not an image file saedkit reads "
                                   f"(a regular file ending in {', '.join(sorted(_IMAGE_SUFFIXES))})")
            where = rec_path or "(no path recorded)"
            raise SaedkitError(f"{p}: the session's image {where} was not found; "
                               "move it back or open the session with the image's new location")
        if image_path is None and rec_path and found != Path(rec_path):
            warnings.append(f"the image was not at {rec_path}; read {found} instead")
        try:
            image = read_pattern(found, page=page)
        except ImageReadError as exc:
            raise SaedkitError(f"{p}: the session's image cannot be read: {exc}") from None
        if rec_sha and image.sha256 != rec_sha:
            warnings.append(f"the image file {found} has changed since the session was saved "
                            "(its SHA-256 differs): check the results before using them")
        if rec_shape and list(image.shape) != list(rec_shape):
            raise SaedkitError(f"{p}: the image {found} now has shape {list(image.shape)}, "
                               f"the session was made on {rec_shape}")
        try:
            settings = SessionSettings.from_dict(_field(p, record, "settings", dict, default={}))
            mask = None
            mask_rec = _field(p, record, "mask", dict, default=None)
            if mask_rec:
                packed = PackedMask.from_dict(mask_rec, expected_shape=tuple(image.shape))
                mask = packed
            spots = tuple(_decode(_field(p, record, "spots", list, default=[], decoded=True)) or ())
            for i, spot in enumerate(spots):
                if not isinstance(spot, Spot):
                    raise SaedkitError(f"{p}: field 'spots' item {i} must be a spot record, got "
                                       f"{type(spot).__name__}")
            origins_rec = _field(p, record, "spot_origins", list, default=None)
            origins = tuple(str(o) for o in (origins_rec or ["auto"] * len(spots)))
            if len(origins) != len(spots) or any(o not in SPOT_ORIGINS for o in origins):
                raise SaedkitError(f"{p}: spot_origins does not match the spots")
            centre = _typed(p, record, "centre", (CentreResult,), "a centre record")
            match = _typed(p, record, "match", (MatchResult,), "a zone-axis search record")
            calibration = _typed(p, record, "calibration", None, "a calibration record",
                                 needs="camera_constant_px_A")
            ring_fit = _typed(p, record, "ring_fit", None, "a ring fit record")
            phase_id = _typed(p, record, "phase_id", None, "a phase identification record")
            chosen = _field(p, record, "chosen_candidate", int, default=0)
            n_cand = len(getattr(match, "candidates", ()) or ()) if match is not None else 0
            if not 0 <= chosen < max(n_cand, 1):
                raise SaedkitError(f"{p}: field 'chosen_candidate' must be in [0, {max(n_cand, 1)}), got {chosen!r}")
            phases = _field(p, record, "phases", list, default=[])
            if not all(isinstance(x, str) for x in phases):
                raise SaedkitError(f"{p}: field 'phases' must be a list of phase names, got {phases!r}")
            state = SessionState(
                mask=mask, centre=centre, spots=spots, spot_origins=origins,
                ring_fit=ring_fit, calibration=calibration,
                phases=tuple(phases), match=match,
                chosen_candidate=chosen, match_current=_field(p, record, "match_current", bool, default=True),
                phase_id=phase_id, settings=settings,
            )
        except SaedkitError as exc:
            if str(exc).startswith(str(p)):
                raise
            raise SaedkitError(f"{p}: {exc}") from None
        except (TypeError, ValueError, KeyError, AttributeError, OverflowError, MemoryError) as exc:
            raise SaedkitError(f"{p}: the session file is damaged ({type(exc).__name__}: {exc})") from None
        session = cls(image, settings=settings, path=p)
        session._state = state
        session._saved_state = state
        session.load_warnings = tuple(warnings)
        recorded = record.get("session_path")
        session.recorded_path = recorded if isinstance(recorded, str) else None
        return session


#: A session file larger than this is refused unread (a session with thousands of spots takes a few MB).
MAX_SESSION_BYTES = 64_000_000
#: The most elements one array of a session file may hold (bounds the work of loading).
MAX_ARRAY_ELEMENTS = 20_000_000
_IMAGE_SUFFIXES = (".tif", ".tiff", ".png", ".jpg", ".jpeg", ".npy", ".mrc", ".mrcs", ".map", ".st", ".ali")

_TYPE_WORDS = {dict: "an object", list: "a list", str: "text", int: "a whole number", bool: "true or false"}


def _field(p: Path, record: dict, name: str, kind: type, *, default: Any, where: str = "",
           decoded: bool = False) -> Any:
    """``record[name]`` checked to be of ``kind`` (``default`` when missing or null)."""
    value = record.get(name)
    if value is None:
        return default
    ok = isinstance(value, kind) and not (kind is int and isinstance(value, bool))
    if decoded and kind is list and isinstance(value, dict) and set(value) == {"__tuple__"}:
        ok = True
    if not ok:
        full = f"{where}.{name}" if where else name
        shown = repr(value)
        shown = shown if len(shown) <= 60 else shown[:57] + "..."
        raise SaedkitError(f"{p}: field '{full}' must be {_TYPE_WORDS.get(kind, kind.__name__)}, got {shown}")
    return value


def _typed(p: Path, record: dict, name: str, kinds: tuple | None, what: str, *, needs: str | None = None) -> Any:
    """Decode ``record[name]`` and check it is None or a record of ``kinds`` (any saedkit record when None)."""
    value = _decode(record.get(name))
    if value is None:
        return None
    ok = isinstance(value, kinds) if kinds else dataclasses.is_dataclass(value) and not isinstance(value, type)
    if ok and needs is not None:
        ok = hasattr(value, needs)
    if not ok:
        shown = repr(record.get(name))
        shown = shown if len(shown) <= 60 else shown[:57] + "..."
        raise SaedkitError(f"{p}: field '{name}' must be {what} (or null), got {shown}")
    return value


def _is_image_file(path: Path) -> bool:
    """A regular file (not a device, pipe or folder) with an image suffix saedkit reads."""
    import stat as _stat

    try:
        st = path.stat()
    except (OSError, ValueError):
        return False
    return _stat.S_ISREG(st.st_mode) and path.suffix.lower() in _IMAGE_SUFFIXES


# --------------------------------------------------------------------------- #
# Typed JSON encoding of the frozen result records
# --------------------------------------------------------------------------- #

def _enc_float(x: float):
    x = float(x)
    if math.isfinite(x):
        return x
    return {"__float__": "nan" if math.isnan(x) else ("inf" if x > 0 else "-inf")}


def _encode(obj: Any) -> Any:
    """Turn a result object into JSON data that :func:`_decode` reads back into the same types."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, np.integer)) and not isinstance(obj, np.bool_):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (float, np.floating)):
        return _enc_float(obj)
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind not in "biuf":
            raise TypeError(f"cannot save an array of dtype {obj.dtype}")
        flat = obj.ravel().tolist()
        if obj.dtype.kind == "f":
            flat = [_enc_float(v) for v in flat]
        return {"__ndarray__": flat, "dtype": obj.dtype.str, "shape": list(obj.shape)}
    if isinstance(obj, tuple):
        return {"__tuple__": [_encode(v) for v in obj]}
    if isinstance(obj, list):
        return [_encode(v) for v in obj]
    if isinstance(obj, (set, frozenset)):
        return {"__tuple__": [_encode(v) for v in sorted(obj, key=repr)]}
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, dict):
        if all(isinstance(k, str) and not k.startswith("__") for k in obj):
            return {k: _encode(v) for k, v in obj.items()}
        return {"__items__": [[_encode(k), _encode(v)] for k, v in obj.items()]}
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        name = record_name(type(obj))
        fields = {f.name: _encode(getattr(obj, f.name)) for f in dataclasses.fields(obj) if f.init}
        return {"__record__": name, "fields": fields}
    raise TypeError(f"cannot save a {type(obj).__name__} in a session file")


def _decode(data: Any) -> Any:
    """Inverse of :func:`_encode`; only dataclasses of saedkit's own modules are built."""
    if data is None or isinstance(data, (bool, int, float, str)):
        return data
    if isinstance(data, list):
        return [_decode(v) for v in data]
    if not isinstance(data, dict):
        raise ValueError(f"unexpected {type(data).__name__} in a session file")
    if "__float__" in data and len(data) == 1:
        return float(data["__float__"])
    if "__tuple__" in data and len(data) == 1:
        return tuple(_decode(v) for v in data["__tuple__"])
    if "__items__" in data and len(data) == 1:
        return {_freeze(_decode(k)): _decode(v) for k, v in data["__items__"]}
    if "__ndarray__" in data:
        if not isinstance(data.get("dtype"), str) or data["dtype"] not in _ARRAY_DTYPES:
            raise ValueError(f"array dtype {data.get('dtype')!r} is not allowed")
        dtype = np.dtype(data["dtype"])
        shape = data.get("shape")
        values = data["__ndarray__"]
        if (not isinstance(shape, list) or len(shape) > 8
                or not all(isinstance(n, int) and not isinstance(n, bool) and 0 <= n for n in shape)):
            raise ValueError(f"array shape must be a list of whole numbers >= 0, got {shape!r}")
        if not isinstance(values, list) or math.prod(shape) != len(values) or len(values) > MAX_ARRAY_ELEMENTS:
            raise ValueError(f"array of shape {shape} does not hold {math.prod(shape)} values")
        flat = [float(v["__float__"]) if isinstance(v, dict) else v for v in values]
        return np.array(flat, dtype=dtype).reshape(shape)
    if "__record__" in data or "__type__" in data:  # "__type__": session files of saedkit 0.1
        name = data.get("__record__", data.get("__type__"))
        cls = find_record_type(name)
        if cls is None:
            raise ValueError(f"record type {name!r} is not a saedkit record known to this version")
        fields = {k: _decode(v) for k, v in (data.get("fields") or {}).items()}
        known = {f.name for f in dataclasses.fields(cls) if f.init}
        return cls(**{k: v for k, v in fields.items() if k in known})
    return {k: _decode(v) for k, v in data.items()}


_ARRAY_DTYPES = {np.dtype(t).str for t in ("?", "i1", "i2", "i4", "i8", "u1", "u2", "u4", "u8", "f2", "f4", "f8")} \
    | {np.dtype(t).newbyteorder(">").str for t in ("i2", "i4", "i8", "u2", "u4", "u8", "f2", "f4", "f8")} | {"|b1"}


def _freeze(key: Any) -> Any:
    return tuple(_freeze(k) for k in key) if isinstance(key, list) else key


# --------------------------------------------------------------------------- #
# Data folder and autosave
# --------------------------------------------------------------------------- #


def data_dir() -> Path:
    """saedkit's data folder: ``$SAEDKIT_DATA_DIR``, else the platform's user data folder."""
    env = os.environ.get("SAEDKIT_DATA_DIR")
    if env:
        return Path(env)
    import platformdirs

    return Path(platformdirs.user_data_dir("saedkit", appauthor=False))


def _autosave_dir() -> Path:
    return data_dir() / "autosave"


def autosave_path(pid: int | None = None) -> Path:
    """Where this program (process ``pid``, default this one) autosaves its session."""
    return _autosave_dir() / f"autosave-{os.getpid() if pid is None else int(pid)}{SESSION_SUFFIX}"


def _is_running(pid: int) -> bool:
    if pid == os.getpid():
        return True
    if sys.platform == "win32":  # pragma: no cover - Windows only
        import ctypes

        handle = ctypes.windll.kernel32.OpenProcess(0x1000, False, pid)  # PROCESS_QUERY_LIMITED_INFORMATION
        if not handle:
            return False
        ctypes.windll.kernel32.CloseHandle(handle)
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    except OSError:
        return False
    return True


def find_leftover_autosave() -> Path | None:
    """The newest autosave left by a saedkit that is no longer running (after a crash), or None."""
    folder = _autosave_dir()
    if not folder.is_dir():
        return None
    found = []
    for f in folder.glob(f"autosave-*{SESSION_SUFFIX}"):
        stem = f.name[len("autosave-"):-len(SESSION_SUFFIX)]
        if not stem.isdigit() or _is_running(int(stem)):
            continue
        with contextlib.suppress(OSError):
            found.append((f.stat().st_mtime, f))
    if not found:
        return None
    return max(found)[1]


def remove_autosave(path: str | os.PathLike | None = None) -> None:
    """Delete an autosave file (this process's by default); missing is fine."""
    with contextlib.suppress(FileNotFoundError):
        Path(path if path is not None else autosave_path()).unlink()
