"""Helpers shared by the exports: JSON conversion, number formatting, and a
uniform view of the parts of an :class:`~saedkit.core.workflow.analysis.Analysis`.

No matplotlib here: the CSV and JSON exports import this module only.

The parts of an analysis come from several producers (a fitted calibration,
one applied from the library, one typed in by hand), so they are read with
``getattr`` and every missing field is treated as unknown.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import enum
import math
import os
from dataclasses import dataclass
from pathlib import Path, PurePath
from typing import Any

import numpy as np

from saedkit import __version__
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError

__all__ = [
    "CAUTION",
    "CalibrationInfo",
    "CentreInfo",
    "software_label",
    "json_ready",
    "finite",
    "format_sig",
    "format_value_sigma",
    "hkl_text",
    "zone_text",
    "is_hexagonal",
    "image_stem",
    "image_label",
    "summarize_calibration",
    "pick_centre",
    "pick_ellipse",
    "index_camera_constant",
    "describe_unindexed",
    "identified_rings",
    "is_calibration_of_image",
]

#: The warning printed in every report.
CAUTION = (
    "Indexing a single zone-axis pattern can be ambiguous (180° rotation; zones of similar "
    "symmetry); results are measurements to be checked by a trained person."
)


def software_label() -> str:
    """``"saedkit <version>"``."""
    return f"saedkit {__version__}"


# --------------------------------------------------------------------------- #
# JSON
# --------------------------------------------------------------------------- #


def json_ready(obj: Any) -> Any:
    """A copy of ``obj`` made of JSON types only.

    numpy scalars and arrays become Python numbers and lists, tuples and sets
    lists, paths strings, NaN and infinities ``None``; objects with a
    ``to_dict()`` are converted through it, other dataclasses field by field.

    Raises
    ------
    InputError
        For an object that has no JSON form.
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, dict):
        return {str(k): json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        items = sorted(obj, key=repr) if isinstance(obj, (set, frozenset)) else obj
        return [json_ready(v) for v in items]
    if isinstance(obj, np.ndarray):
        return json_ready(obj.tolist())
    if isinstance(obj, (PurePath, os.PathLike)):
        return os.fspath(obj)
    if isinstance(obj, enum.Enum):
        return json_ready(obj.value)
    if isinstance(obj, (_dt.datetime, _dt.date)):
        return obj.isoformat()
    if isinstance(obj, complex):
        raise InputError(f"cannot write the complex number {obj!r} as JSON")
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        return json_ready(to_dict())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: json_ready(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    raise InputError(f"cannot write a {type(obj).__name__} as JSON")


# --------------------------------------------------------------------------- #
# Numbers as text
# --------------------------------------------------------------------------- #


def finite(x: Any) -> float | None:
    """``x`` as a float, or None when missing, not a number or not finite."""
    if x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _decimals_for(sigma: float, sig: int) -> int:
    """Decimals that show ``sigma`` to ``sig`` significant figures (never negative)."""
    if sigma <= 0 or not math.isfinite(sigma):
        return 0
    return max(0, sig - 1 - math.floor(math.log10(sigma)))


def format_sig(x: Any, sig: int = 2) -> str:
    """``x`` to ``sig`` significant figures in plain notation (no exponent); "" when unknown.

    Numbers of ``sig`` digits or more before the point are rounded to a whole
    number, not to tens, so that the last printed digit is always significant.

    >>> format_sig(0.009859), format_sig(296.5), format_sig(1.0)
    ('0.0099', '296', '1.0')
    """
    v = finite(x)
    if v is None:
        return ""
    if v == 0:
        return "0"
    return f"{v:.{_decimals_for(abs(v), sig)}f}"


def format_value_sigma(value: Any, sigma: Any, *, unit: str = "", sig: int = 2, max_decimals: int = 6) -> str:
    """``value ± sigma`` with sigma to ``sig`` significant figures and the value to the same decimals.

    >>> format_value_sigma(299.884, 0.0377, unit=" px·Å")
    '299.884 ± 0.038 px·Å'
    >>> format_value_sigma(3.1, None)
    '3.1'
    """
    v = finite(value)
    if v is None:
        return "—"
    s = finite(sigma)
    if s is None or s <= 0:
        text = f"{v:.{min(max_decimals, 4)}g}" if abs(v) < 1e-3 or abs(v) >= 1e6 else _trim(f"{v:.4f}")
        return text + unit
    dec = min(_decimals_for(s, sig), max_decimals)
    return f"{v:.{dec}f} ± {s:.{dec}f}{unit}"


def _trim(text: str) -> str:
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return text


# --------------------------------------------------------------------------- #
# Indices
# --------------------------------------------------------------------------- #


def hkl_text(hkl, *, hexagonal: bool = False, brackets: str = "()") -> str:
    """Indices with overbars for negatives, e.g. (1̄11); Miller–Bravais (hkil) when ``hexagonal``."""
    from saedkit.core.crystallography.crystal import format_indices, to_four_index_plane

    if hkl is None:
        return ""
    idx = tuple(int(v) for v in hkl)
    if hexagonal and len(idx) == 3:
        idx = to_four_index_plane(idx)
    return format_indices(idx, brackets=brackets)


def zone_text(candidate) -> str:
    """The zone axis of a candidate, e.g. [01̄1]; four-index [uvtw] for a hexagonal phase."""
    from saedkit.core.crystallography.crystal import format_indices

    if candidate is None:
        return ""
    four = getattr(candidate, "zone_four_index", None)
    text = format_indices(candidate.zone, brackets="[]")
    if four is not None:
        text = f"{format_indices(four, brackets='[]')} = {text}"
    return text


def is_hexagonal(candidate) -> bool:
    """True when the candidate's phase is shown in four-index notation."""
    return candidate is not None and getattr(candidate, "zone_four_index", None) is not None


# --------------------------------------------------------------------------- #
# Image
# --------------------------------------------------------------------------- #


def image_stem(analysis) -> str:
    """File-name stem of the analysed image ("pattern" when it has no file)."""
    path = getattr(getattr(analysis, "image", None), "source_path", None)
    if path:
        stem = Path(str(path)).stem
        if stem:
            return stem
    return "pattern"


def image_label(analysis) -> str:
    """File name of the analysed image, or a description when it has none."""
    path = getattr(getattr(analysis, "image", None), "source_path", None)
    return Path(str(path)).name if path else "(image from memory)"


# --------------------------------------------------------------------------- #
# Calibration
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class CalibrationInfo:
    """A uniform view of any calibration-like object (fitted, from the library, entered).

    Fields the object does not provide are None (or empty).
    """

    source: str  # "fitted", "library", "entered" or the type name
    name: str | None
    camera_constant_px_A: float | None
    camera_constant_sigma_px_A: float | None
    camera_constant_rel_sigma: float | None
    ellipse: Ellipse
    ellipticity_sigma: float | None
    major_axis_sigma_deg: float | None
    standard: str | None
    date: str | None
    voltage_kv: float | None
    wavelength_A: float | None
    pixel_size_um: float | None
    camera_length_mm: float | None
    camera_length_sigma_mm: float | None
    lambda_L_mm_A: float | None
    lambda_L_sigma_mm_A: float | None
    quality: str | None
    warnings: tuple[str, ...]
    rings: tuple  # ring assignments (hkl, d_A, radius_px, ...) of a fitted calibration
    unassigned_radii_px: tuple[float, ...]  # rings of the calibration pattern that no reflection explains
    profile: Any  # RadialProfile or None
    centre_xy: tuple[float, float] | None


def _name_of(x: Any) -> str | None:
    if x is None:
        return None
    name = getattr(x, "name", None)
    return str(name) if name is not None else str(x)


def _text(x: Any) -> str | None:
    if x is None:
        return None
    if isinstance(x, (_dt.datetime, _dt.date)):
        return x.isoformat()
    if isinstance(x, dict):
        return ", ".join(f"{k}: {v}" for k, v in x.items())
    return str(x)


def summarize_calibration(cal, *, image=None) -> CalibrationInfo | None:
    """Read a calibration-like object into a :class:`CalibrationInfo`; None when ``cal`` is None.

    Parameters
    ----------
    cal : Calibration, SavedCalibration, EnteredCalibration or similar
        Anything with ``camera_constant_px_A``.
    image : PatternImage, optional
        Supplies the pixel size and the voltage when the calibration lacks them.

    Notes
    -----
    Missing derived values are computed from the camera equation: with a
    pixel size ``p`` (mm) ``λL = K·p`` (mm·Å) and ``L = K·p / λ`` [1]_.

    References
    ----------
    .. [1] D. B. Williams and C. B. Carter, *Transmission Electron
       Microscopy*, 2nd ed., Springer (2009), ch. 18.
    """
    if cal is None:
        return None
    k = finite(getattr(cal, "camera_constant_px_A", None))
    sk = finite(getattr(cal, "camera_constant_sigma_px_A", None))
    rel = finite(getattr(cal, "camera_constant_rel_sigma", None))
    if sk is None and rel is not None and k is not None:
        sk = rel * k
    if rel is None and sk is not None and k:
        rel = sk / k
    ellipse = getattr(cal, "ellipse", None)
    if not isinstance(ellipse, Ellipse):
        e = finite(getattr(cal, "ellipticity", None))
        phi = finite(getattr(cal, "major_axis_deg", None))
        try:
            ellipse = Ellipse(e or 0.0, phi or 0.0)
        except Exception:  # noqa: BLE001 - out-of-range values from a foreign object: show none
            ellipse = NO_DISTORTION
    cls = type(cal).__name__
    source = {"Calibration": "fitted", "SavedCalibration": "library", "EnteredCalibration": "entered"}.get(cls)
    if source is None:
        declared = getattr(cal, "source", None)
        if declared in ("fitted", "library", "entered"):
            source = declared
        elif getattr(cal, "profile", None) is not None or getattr(cal, "rings", None):
            source = "fitted"
        elif getattr(cal, "date", None):
            source = "library"
        else:
            source = cls
    voltage = finite(getattr(cal, "voltage_kv", None)) or finite(getattr(image, "voltage_kv", None))
    pixel = finite(getattr(cal, "pixel_size_um", None)) or finite(getattr(image, "pixel_size_um", None))
    lam = finite(getattr(cal, "wavelength_A", None))
    if lam is None and voltage:
        from saedkit.core.optics import calculate_wavelength_A

        lam = calculate_wavelength_A(voltage)
    lam_l = finite(getattr(cal, "lambda_L_mm_A", None))
    if lam_l is None and k and pixel:
        lam_l = k * pixel * 1e-3
    cam_l = finite(getattr(cal, "camera_length_mm", None))
    if cam_l is None and lam_l and lam:
        cam_l = lam_l / lam
    # σ of L and λL follow σK (the pixel size taken as exact)
    cam_l_sig = finite(getattr(cal, "camera_length_sigma_mm", None))
    if cam_l_sig is None and cam_l is not None and rel is not None:
        cam_l_sig = cam_l * rel
    lam_l_sig = finite(getattr(cal, "lambda_L_sigma_mm_A", None))
    if lam_l_sig is None and lam_l is not None and rel is not None:
        lam_l_sig = lam_l * rel
    unassigned = tuple(v for v in (finite(r) for r in (getattr(cal, "unassigned_radii_px", ()) or ())) if v)
    centre = getattr(cal, "centre", None)
    centre_xy = None
    if centre is not None:
        cx, cy = finite(getattr(centre, "x", None)), finite(getattr(centre, "y", None))
        if cx is not None and cy is not None:
            centre_xy = (cx, cy)
    warnings = getattr(cal, "warnings", ()) or ()
    if isinstance(warnings, str):
        warnings = (warnings,)
    return CalibrationInfo(
        source=source,
        name=_text(getattr(cal, "name", None)),
        camera_constant_px_A=k,
        camera_constant_sigma_px_A=sk,
        camera_constant_rel_sigma=rel,
        ellipse=ellipse,
        ellipticity_sigma=finite(getattr(cal, "ellipticity_sigma", None)),
        major_axis_sigma_deg=finite(getattr(cal, "major_axis_sigma_deg", None)),
        standard=_name_of(getattr(cal, "standard", None)),
        date=_text(getattr(cal, "date", None) or getattr(cal, "created", None)),
        voltage_kv=voltage,
        wavelength_A=lam,
        pixel_size_um=pixel,
        camera_length_mm=cam_l,
        camera_length_sigma_mm=cam_l_sig,
        lambda_L_mm_A=lam_l,
        lambda_L_sigma_mm_A=lam_l_sig,
        quality=_text(getattr(cal, "quality", None)),
        warnings=tuple(str(w) for w in warnings),
        rings=tuple(getattr(cal, "rings", ()) or ()),
        unassigned_radii_px=unassigned,
        profile=getattr(cal, "profile", None),
        centre_xy=centre_xy,
    )


# --------------------------------------------------------------------------- #
# Centre, ellipse and camera constant used for the measurements
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class CentreInfo:
    """The centre the measurements are taken about."""

    x: float
    y: float
    sigma_x: float
    sigma_y: float
    source: str  # what it is: "centre (method)", "refined with the lattice", "ring fit", ...


def _centre_from(obj, source: str) -> CentreInfo | None:
    if obj is None:
        return None
    x, y = finite(getattr(obj, "x", None)), finite(getattr(obj, "y", None))
    if x is None or y is None:
        return None
    sx = finite(getattr(obj, "sigma_x", None))
    sy = finite(getattr(obj, "sigma_y", None))
    method = getattr(obj, "method", None)
    label = f"{source} ({method})" if method else source
    return CentreInfo(x, y, sx if sx is not None else 0.0, sy if sy is not None else 0.0, label)


def pick_centre(analysis, *, prefer_lattice: bool = False) -> CentreInfo | None:
    """The centre to measure about.

    ``analysis.centre``, else the centre refined with the spot lattice, else
    that of the ring fit, else the calibration's. With ``prefer_lattice`` the
    lattice-refined centre comes first (the one the zone-axis match measured
    its spacings about).
    """
    lattice = getattr(getattr(analysis, "match", None), "lattice", None)
    lat = None
    if lattice is not None and getattr(lattice, "centre_xy", None) is not None:
        (x, y) = lattice.centre_xy
        (sx, sy) = getattr(lattice, "centre_sigma_px", (0.0, 0.0))
        if finite(x) is not None and finite(y) is not None:
            lat = CentreInfo(float(x), float(y), finite(sx) or 0.0, finite(sy) or 0.0,
                             "refined with the spot lattice")
    own = _centre_from(getattr(analysis, "centre", None), "centre")
    ring = _centre_from(getattr(getattr(analysis, "ring_fit", None), "centre", None), "ring fit")
    cal = _centre_from(getattr(getattr(analysis, "calibration", None), "centre", None), "calibration")
    order = (lat, own, ring, cal) if prefer_lattice else (own, lat, ring, cal)
    for c in order:
        if c is not None:
            return c
    return None


def pick_ellipse(analysis) -> Ellipse:
    """The distortion to correct for: the calibration's, else the ring fit's, else none."""
    info = summarize_calibration(getattr(analysis, "calibration", None))
    if info is not None:
        return info.ellipse
    ell = getattr(getattr(analysis, "ring_fit", None), "ellipse", None)
    return ell if isinstance(ell, Ellipse) else NO_DISTORTION


def index_camera_constant(analysis) -> tuple[float | None, float | None, str]:
    """(K, total σK, where from) of the spacings: the camera model of :attr:`Analysis.camera`.

    That is the calibration's (fitted, saved or typed in) when there is one,
    else the chosen candidate's refined K; (None, None, "none") without either.
    """
    camera = getattr(analysis, "camera", None)
    if camera is None:
        return None, None, "none"
    from saedkit.core.calibration.camera import camera_terms

    t = camera_terms(camera)
    if t.source == "match":
        where = "refined by the zone-axis match"
    else:
        where = {"rings": "calibration fitted on rings", "spots": "calibration fitted on spots",
                 "library": "calibration from the library", "entered": "entered by hand"}.get(t.source, t.source)
        where += (f" ({t.name})" if t.name and t.source == "library" else "")
        where += f"; reproducibility {format_sig(t.reproducibility_pct, 2)} % included"
    return t.camera_constant_px_A, t.total_sigma_px_A, where


def describe_unindexed(analysis) -> str:
    """One line for an analysis without a zone-axis candidate: what the pattern is known to be."""
    pid = getattr(analysis, "phase_id", None)
    cands = getattr(pid, "candidates", None) if pid is not None else None
    if cands:
        best = cands[0]
        phases = getattr(best, "phases", None)
        name = " + ".join(map(str, phases)) if isinstance(phases, (list, tuple)) else str(phases or "?")
        score = finite(getattr(best, "score", None))
        return f"ring pattern; best phase match {name}" + (f" (score {score:.3f})" if score is not None else "")
    info = summarize_calibration(getattr(analysis, "calibration", None))
    has_rings = getattr(analysis, "ring_fit", None) is not None or (info is not None and info.rings)
    if has_rings and info is not None and info.standard and info.rings:
        return f"ring pattern of the calibration standard {info.standard}"
    if has_rings:
        return "ring pattern, phases not identified"
    if getattr(analysis, "match", None) is not None:
        return "no zone axis matches"
    return "not indexed"


def identified_rings(phase_id) -> list:
    """(d_A, RingMatch) of the rings that the best phase identification indexes."""
    cands = getattr(phase_id, "candidates", None) if phase_id is not None else None
    if not cands:
        return []
    out = []
    for m in getattr(cands[0], "matches", ()) or ():
        d = finite(getattr(m, "d_A", None))
        if d and getattr(m, "hkl", None) is not None:
            out.append((d, m))
    return out


def is_calibration_of_image(analysis) -> bool:
    """True when the analysis' calibration was fitted on the analysis' own image.

    Then its rings are rings of this pattern (drawn on it and listed in the
    table); otherwise they belong to the standard's pattern and only the
    camera constant and the ellipse apply. Decided by the images' SHA-256
    when both are known, else by the analysis being a ring pattern (no spots,
    no zone-axis match).
    """
    cal = getattr(analysis, "calibration", None)
    if cal is None:
        return False
    cal_sha = getattr(cal, "image_sha256", None)
    img_sha = getattr(getattr(analysis, "image", None), "sha256", None)
    if cal_sha and img_sha:
        return str(cal_sha) == str(img_sha)
    return not analysis.spots and getattr(analysis, "match", None) is None
