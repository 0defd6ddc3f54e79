"""The camera model: what every calibration (fitted, saved, typed in) offers the measurement.

Every calibration type of saedkit — fitted on rings or on spots
(:class:`~saedkit.core.calibration.calibrate.Calibration`), kept in the library
(:class:`~saedkit.core.calibration.library.SavedCalibration`) or typed in
(:class:`EnteredCalibration`) — is a :class:`CameraModel`: it has a camera
constant K with its statistical σ, a reproducibility term, an ellipse, the
camera-equation form, the voltage and a provenance. :func:`camera_terms` reads
any of them into one frozen :class:`CameraTerms`, the only form the measurement
(:mod:`saedkit.core.measure`) uses.

Two uncertainty terms
---------------------
``camera_constant_sigma_px_A`` is the **statistical** uncertainty of K (the
fit's scatter). The **reproducibility** of K between the calibration and the
measurement (specimen height, lens hysteresis, refocusing) is a separate,
systematic term ``reproducibility_pct`` (relative, in %). Spacings carry both:
``σ_d,total² = σ_d,stat² + σ_d,sys²``. The default
(:data:`DEFAULT_REPRODUCIBILITY_PCT`, 1 %) is common practice for a camera
length reproduced without an internal standard (about 0.5–1 %; routine SAED
reaches 1–2 % in d). A ring standard recorded on the same pattern (an
internal standard) removes height and hysteresis; its term
(:data:`INTERNAL_STANDARD_REPRODUCIBILITY_PCT`, 0.1 %) is the d-spacing
accuracy reported for careful calibration (Microsc. Res. Tech. 86, 144, 2023).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

from saedkit.core._validate import check_finite, check_positive
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError

__all__ = [
    "DEFAULT_REPRODUCIBILITY_PCT",
    "INTERNAL_STANDARD_REPRODUCIBILITY_PCT",
    "CameraModel",
    "CameraTerms",
    "EnteredCalibration",
    "camera_terms",
    "check_reproducibility_pct",
]

#: Reproducibility of K between calibration and measurement without an internal standard, % (common practice).
DEFAULT_REPRODUCIBILITY_PCT = 1.0
#: Reproducibility of K when a ring standard is on the same pattern, % (careful calibration, ~0.1 %).
INTERNAL_STANDARD_REPRODUCIBILITY_PCT = 0.1


def check_reproducibility_pct(value, *, name: str = "reproducibility_pct") -> float:
    """A reproducibility in % must be finite, ≥ 0 and below 50."""
    v = check_finite(name, value)
    if not 0.0 <= v < 50.0:
        raise InputError(f"{name} must be a percentage >= 0 and < 50, got {value!r}")
    return v


@runtime_checkable
class CameraModel(Protocol):
    """What a calibration offers the measurement (fitted, saved or typed in).

    Attributes
    ----------
    camera_constant_px_A : float
        K in pixel·Å (``R = K/d`` in the small-angle form).
    camera_constant_sigma_px_A : float
        Statistical standard uncertainty of K (the fit's).
    reproducibility_pct : float
        Systematic relative uncertainty of K between calibration and use, %.
    ellipse : Ellipse
        Elliptical distortion to correct offsets for.
    exact_camera_equation : bool
        True when ``R = L·tan 2θ`` applies instead of ``R = K/d``.
    voltage_kv : float or None
        Accelerating voltage (needed by the exact form).
    source : str
        Provenance: ``"rings"``, ``"spots"``, ``"library"``, ``"entered"``, ``"match"``.
    """

    camera_constant_px_A: float
    camera_constant_sigma_px_A: float
    reproducibility_pct: float
    exact_camera_equation: bool

    @property
    def ellipse(self) -> Ellipse: ...

    @property
    def source(self) -> str: ...


@dataclass(frozen=True)
class CameraTerms:
    """The numbers of a camera model that a measurement needs, read once.

    Parameters
    ----------
    camera_constant_px_A : float
        K, pixel·Å.
    stat_sigma_px_A : float
        Statistical σ of K.
    reproducibility_pct : float
        Systematic relative σ of K, %.
    ellipse : Ellipse
    exact : bool
        Use the exact camera equation (needs ``wavelength_A``).
    wavelength_A : float or None
    source, name : str
        Provenance, for the record.
    """

    camera_constant_px_A: float
    stat_sigma_px_A: float
    reproducibility_pct: float
    ellipse: Ellipse = NO_DISTORTION
    exact: bool = False
    wavelength_A: float | None = None
    source: str = ""
    name: str = ""

    @property
    def sys_sigma_px_A(self) -> float:
        """Systematic σ of K (reproducibility), pixel·Å."""
        return self.camera_constant_px_A * self.reproducibility_pct / 100.0

    @property
    def total_sigma_px_A(self) -> float:
        """Total σ of K: statistical and systematic in quadrature."""
        return math.hypot(self.stat_sigma_px_A, self.sys_sigma_px_A)

    def to_dict(self) -> dict:
        """The ``camera`` entry of a record: which K the numbers used, and its uncertainty parts."""
        K = self.camera_constant_px_A
        return {
            "source": self.source,
            "name": self.name,
            "camera_constant_px_A": K,
            "camera_constant_stat_sigma_px_A": self.stat_sigma_px_A,
            "camera_constant_sys_sigma_px_A": self.sys_sigma_px_A,
            "camera_constant_total_sigma_px_A": self.total_sigma_px_A,
            "camera_constant_total_rel_sigma": self.total_sigma_px_A / K,
            "reproducibility_pct": self.reproducibility_pct,
            "exact_camera_equation": self.exact,
            "wavelength_A": self.wavelength_A,
            "ellipse": self.ellipse.to_dict(),
        }


def _finite_or(value, default: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return default
    return v if math.isfinite(v) else default


def camera_terms(camera) -> CameraTerms:
    """Read a :class:`CameraModel` (any calibration of saedkit) into :class:`CameraTerms`.

    Parameters
    ----------
    camera : CameraModel or CameraTerms

    Raises
    ------
    InputError
        When ``camera`` is not a camera model (e.g. a bare number or tuple).
    """
    if isinstance(camera, CameraTerms):
        return camera
    if not isinstance(camera, CameraModel):
        raise InputError(f"camera must be a calibration (fitted, saved or entered), got {type(camera).__name__}")
    from saedkit.core.optics import calculate_wavelength_A

    K = check_positive("camera_constant_px_A", camera.camera_constant_px_A)
    s = _finite_or(camera.camera_constant_sigma_px_A, 0.0)
    rep = _finite_or(camera.reproducibility_pct, DEFAULT_REPRODUCIBILITY_PCT)
    exact = bool(camera.exact_camera_equation)
    lam = getattr(camera, "wavelength_A", None)
    lam = None if lam is None or not math.isfinite(float(lam)) else float(lam)
    kv = getattr(camera, "voltage_kv", None)
    if lam is None and kv:
        lam = calculate_wavelength_A(float(kv))
    if exact and lam is None:
        raise InputError("an exact-camera-equation calibration needs its voltage (voltage_kv)")
    name = getattr(camera, "name", None)
    return CameraTerms(K, max(s, 0.0), max(rep, 0.0), camera.ellipse or NO_DISTORTION, exact, lam,
                       str(camera.source), "" if name is None else str(name))


class _CameraMixin:
    """The derived uncertainty figures every calibration type shares (needs the CameraModel fields)."""

    camera_constant_px_A: float
    camera_constant_sigma_px_A: float
    reproducibility_pct: float

    @property
    def camera_constant_rel_sigma(self) -> float:
        """Statistical σ_K / K."""
        return float(self.camera_constant_sigma_px_A / self.camera_constant_px_A)

    @property
    def camera_constant_sys_sigma_px_A(self) -> float:
        """Systematic σ of K from the reproducibility, pixel·Å."""
        return float(self.camera_constant_px_A * self.reproducibility_pct / 100.0)

    @property
    def camera_constant_total_sigma_px_A(self) -> float:
        """Total σ of K (statistical and systematic in quadrature), pixel·Å."""
        return float(math.hypot(self.camera_constant_sigma_px_A, self.camera_constant_sys_sigma_px_A))

    @property
    def camera_constant_total_rel_sigma(self) -> float:
        """Total σ_K / K."""
        return float(self.camera_constant_total_sigma_px_A / self.camera_constant_px_A)


@dataclass(frozen=True)
class EnteredCalibration(_CameraMixin):
    """A camera constant typed in by hand (no fit behind it), or the one a zone-axis match refined.

    Parameters
    ----------
    camera_constant_px_A : float
        K in pixel·Å (R_px = K / d_A).
    camera_constant_sigma_px_A : float
        Its statistical standard uncertainty (0 when unknown).
    ellipse : Ellipse
        Distortion to correct for (none by default).
    name : str
        Where the value came from, for the record.
    reproducibility_pct : float
        Systematic relative uncertainty of K, % (default: common practice, see the module notes).
    voltage_kv : float, optional
        Accelerating voltage (needed with ``exact_camera_equation``).
    exact_camera_equation : bool
        Use ``R = L·tan 2θ``.
    source : str
        ``"entered"`` (typed in) or ``"match"`` (refined by the zone-axis match).
    """

    camera_constant_px_A: float
    camera_constant_sigma_px_A: float = 0.0
    ellipse: Ellipse = NO_DISTORTION
    name: str = "entered by hand"
    reproducibility_pct: float = DEFAULT_REPRODUCIBILITY_PCT
    voltage_kv: float | None = None
    exact_camera_equation: bool = False
    source: str = "entered"

    def __post_init__(self) -> None:
        object.__setattr__(self, "camera_constant_px_A",
                           check_positive("camera_constant_px_A", self.camera_constant_px_A))
        sigma = check_finite("camera_constant_sigma_px_A", self.camera_constant_sigma_px_A)
        if sigma < 0:
            raise InputError(f"camera_constant_sigma_px_A must be >= 0, got {sigma!r}")
        object.__setattr__(self, "camera_constant_sigma_px_A", sigma)
        object.__setattr__(self, "reproducibility_pct", check_reproducibility_pct(self.reproducibility_pct))
        if self.voltage_kv is not None:
            object.__setattr__(self, "voltage_kv", check_positive("voltage_kv", self.voltage_kv))
        if self.exact_camera_equation and self.voltage_kv is None:
            raise InputError("exact_camera_equation needs voltage_kv")
        if self.source not in ("entered", "match"):
            raise InputError(f"source must be 'entered' or 'match', got {self.source!r}")

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return {
            "source": self.source,
            "name": self.name,
            "camera_constant_px_A": self.camera_constant_px_A,
            "camera_constant_sigma_px_A": self.camera_constant_sigma_px_A,
            "camera_constant_rel_sigma": self.camera_constant_rel_sigma,
            "reproducibility_pct": self.reproducibility_pct,
            "camera_constant_sys_sigma_px_A": self.camera_constant_sys_sigma_px_A,
            "camera_constant_total_sigma_px_A": self.camera_constant_total_sigma_px_A,
            "voltage_kv": self.voltage_kv,
            "exact_camera_equation": self.exact_camera_equation,
            "ellipse": self.ellipse.to_dict(),
        }
