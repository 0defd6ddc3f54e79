"""The calibration library: saved camera constants, one JSON file per user.

A camera constant belongs to an instrument state — accelerating voltage,
nominal camera length, camera binning — and drifts a little with the lens
history. The library keeps every calibration the user saves under a name,
finds the best one for a new pattern (:meth:`CalibrationLibrary.find_best`)
and shows how K drifted over time (:meth:`CalibrationLibrary.history`).

The file
--------
``<data dir>/calibrations.json``, with ``<data dir>`` the environment
variable ``SAEDKIT_DATA_DIR`` when set, else
``platformdirs.user_data_dir("saedkit")``::

    {"format": "saedkit-calibrations", "version": 1,
     "calibrations": [{"name": ..., "camera_constant_px_A": ..., ...}, ...]}

Every write goes to a temporary file beside it that is then renamed over it
(:func:`saedkit.core._atomic.write_text_atomic`), so a crash mid-save leaves
the old file intact.

A broken file
-------------
A file that is not JSON, has the wrong format or version, or holds an
invalid record is never silently replaced. Reading it (``list``, ``get``,
``find_best``, ...) raises :class:`~saedkit.core.errors.LibraryError` naming
the file and the problem, and ``rename``/``delete`` refuse to touch it. The
next :meth:`CalibrationLibrary.save` first moves it aside to
``calibrations.json.broken-<UTC timestamp>`` (kept for the user to inspect
or repair) and then starts a new library with the saved record;
:meth:`CalibrationLibrary.recover` does the same without saving anything.
The path it was moved to is in :attr:`CalibrationLibrary.set_aside_path`.
Damage of every kind counts: deep nesting, ``NaN``/``1e999`` numbers,
numbers of thousands of digits, wrongly typed fields (the file is read with
the bounds of :func:`saedkit.core._jsonsafe.loads_bounded`).

Several processes at once
-------------------------
Every change (save, rename, delete, recover) reads, modifies and writes the
file while holding an exclusive lock on ``calibrations.json.lock`` beside it
(``fcntl.flock`` on POSIX, ``msvcrt.locking`` on Windows), so calibrations
saved by several programs at the same moment are all kept.

Names
-----
A name must not hold path separators (``/``, ``\\``) or control characters
(which would print fake lines in a listing); names read from a hand-edited
file that hold control characters are refused the same way.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import math
import os
import time
import unicodedata
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path
from typing import Any, Sequence

from saedkit.core._atomic import write_text_atomic
from saedkit.core._jsonsafe import JsonLimitError, loads_bounded
from saedkit.core.calibration.camera import DEFAULT_REPRODUCIBILITY_PCT, _CameraMixin
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError, LibraryError

__all__ = [
    "SavedCalibration",
    "CalibrationHistoryEntry",
    "CalibrationLibrary",
    "default_library_path",
    "resolve_calibration",
    "check_calibration_name",
    "estimate_reproducibility_pct",
    "LIBRARY_FORMAT",
    "LIBRARY_VERSION",
]

LIBRARY_FORMAT = "saedkit-calibrations"
LIBRARY_VERSION = 1
FILE_NAME = "calibrations.json"
#: Two voltages are "the same" within this fraction (a 200 kV setting is 200 kV).
VOLTAGE_TOLERANCE = 0.005
#: Two nominal camera lengths are "the same" within this fraction (history).
CAMERA_LENGTH_TOLERANCE = 0.005


def _software_version() -> str:
    from saedkit import __version__

    return __version__


def _now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _parse_date(text: str) -> _dt.datetime:
    """An ISO 8601 date-time; naive values are taken as UTC."""
    t = str(text).strip()
    if t.endswith("Z"):
        t = t[:-1] + "+00:00"
    d = _dt.datetime.fromisoformat(t)
    if d.tzinfo is None:
        d = d.replace(tzinfo=_dt.timezone.utc)
    return d.astimezone(_dt.timezone.utc)


def default_library_path() -> Path:
    """``<data dir>/calibrations.json`` (``SAEDKIT_DATA_DIR`` or the platform's user data folder)."""
    env = os.environ.get("SAEDKIT_DATA_DIR")
    if env:
        return Path(env).expanduser() / FILE_NAME
    import platformdirs

    return Path(platformdirs.user_data_dir("saedkit")) / FILE_NAME


# --------------------------------------------------------------------------- the record


def _bad(field_name: str, value: Any, what: str, where: str = "") -> LibraryError:
    loc = f" in {where}" if where else ""
    return LibraryError(f"calibration record{loc}: field '{field_name}' {what}, got {value!r}")


def _num(rec: dict, name: str, where: str, *, positive: bool = False, optional: bool = False,
         non_negative: bool = False, lo: float | None = None, hi: float | None = None) -> float | None:
    if name not in rec or rec[name] is None:
        if optional:
            return None
        raise _bad(name, rec.get(name), "is missing", where)
    v = rec[name]
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise _bad(name, v, "must be a number", where)
    v = float(v)
    if not math.isfinite(v):
        raise _bad(name, v, "must be finite", where)
    if positive and v <= 0:
        raise _bad(name, v, "must be > 0", where)
    if non_negative and v < 0:
        raise _bad(name, v, "must be >= 0", where)
    if lo is not None and v < lo or hi is not None and v > hi:
        raise _bad(name, v, f"must be between {lo} and {hi}", where)
    return v


_MISSING = object()


def _str(rec: dict, name: str, where: str, *, default: Any = _MISSING, non_empty: bool = False) -> str:
    if name not in rec or rec[name] is None:
        if default is not _MISSING:
            return default
        raise _bad(name, rec.get(name), "is missing", where)
    v = rec[name]
    if not isinstance(v, str):
        raise _bad(name, v, "must be text", where)
    if non_empty and not v.strip():
        raise _bad(name, v, "must not be empty", where)
    return v


def _escape_controls(text: str) -> str:
    return "".join(repr(ch)[1:-1] if unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp") else ch for ch in text)


def check_calibration_name(name: str, *, where: str = "") -> str:
    """Return ``name`` or raise LibraryError if it holds a path separator or a control character."""
    loc = f" in {where}" if where else ""
    if "/" in name or "\\" in name:
        raise LibraryError(f"calibration name{loc} {name!r} must not hold a path separator ('/' or '\\')")
    if any(unicodedata.category(ch) in ("Cc", "Cf", "Zl", "Zp") for ch in name):
        raise LibraryError(f"calibration name{loc} '{_escape_controls(name)}' must not hold control characters")
    if len(name) > 200:
        raise LibraryError(f"calibration name{loc} is {len(name)} characters long; at most 200 allowed")
    return name


def _reproducibility(rec: dict, where: str) -> float:
    value = rec.get("reproducibility_pct", DEFAULT_REPRODUCIBILITY_PCT)
    if value is None:
        return DEFAULT_REPRODUCIBILITY_PCT
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value < 50:
        raise _bad("reproducibility_pct", value, "must be a percentage >= 0 and < 50", where)
    return float(value)


@dataclass(frozen=True)
class SavedCalibration(_CameraMixin):
    """A calibration kept in the library.

    Parameters
    ----------
    name : str
        Unique name, e.g. ``"200 kV CL 600 mm bin 1"``.
    instrument : str
        Free text (microscope, camera).
    voltage_kv : float
        Accelerating voltage, kV.
    nominal_camera_length_mm : float or None
        The camera length the microscope displayed, mm.
    binning : int
        Camera binning (1, 2, 4, ...).
    pixel_size_um : float or None
        Detector pixel size after binning, µm.
    camera_constant_px_A, camera_constant_sigma_px_A : float
        K (pixel·Å) and its standard uncertainty.
    ellipticity, major_axis_deg : float
        Elliptical distortion ``(e, φ)``.
    standard : str
        Standard the calibration was fitted on.
    date : str
        When it was made, ISO 8601 UTC (``2026-01-31T12:00:00Z``).
    image_sha256 : str
        SHA-256 of the calibration image ("" when unknown).
    software_version : str
        saedkit version that fitted it.
    notes : str
        Free text.
    ellipticity_sigma, major_axis_sigma_deg : float
        Uncertainties of the ellipse (0 when unknown).
    quality : str
        ``"good"`` or ``"poor"`` as fitted ("" when unknown).
    exact_camera_equation : bool
        K was fitted with ``R = L·tan 2θ``.
    reproducibility_pct : float
        Systematic relative uncertainty of K when it is applied to another
        pattern (specimen height, lens hysteresis), %; records saved before it
        existed read as the default (see :mod:`saedkit.core.calibration.camera`).
    """

    name: str
    instrument: str
    voltage_kv: float
    nominal_camera_length_mm: float | None
    binning: int
    pixel_size_um: float | None
    camera_constant_px_A: float
    camera_constant_sigma_px_A: float
    ellipticity: float
    major_axis_deg: float
    standard: str
    date: str
    image_sha256: str
    software_version: str
    notes: str = ""
    ellipticity_sigma: float = 0.0
    major_axis_sigma_deg: float = 0.0
    quality: str = ""
    exact_camera_equation: bool = False
    reproducibility_pct: float = DEFAULT_REPRODUCIBILITY_PCT

    source = "library"  # provenance, for the camera model

    def __post_init__(self) -> None:
        # validate (and normalise) through the same path as a record read from disk
        try:
            checked = self.from_dict(self.to_dict())
        except LibraryError as exc:
            raise InputError(str(exc).replace("calibration record ", "calibration ")) from None
        for f in fields(self):
            object.__setattr__(self, f.name, getattr(checked, f.name))

    # -- derived

    @property
    def ellipse(self) -> Ellipse:
        """The distortion as an :class:`Ellipse`."""
        return Ellipse(self.ellipticity, self.major_axis_deg)

    @property
    def datetime(self) -> _dt.datetime:
        """``date`` as an aware UTC datetime."""
        return _parse_date(self.date)

    @property
    def camera_length_mm(self) -> float | None:
        """Calibrated camera length ``L = K·p/λ`` when the pixel size is known."""
        if self.pixel_size_um is None:
            return None
        from saedkit.core.optics import calculate_camera_length_mm

        return calculate_camera_length_mm(self.camera_constant_px_A, self.pixel_size_um, self.voltage_kv)

    @property
    def lambda_L_mm_A(self) -> float | None:
        """λL = K·p in mm·Å when the pixel size is known."""
        if self.pixel_size_um is None:
            return None
        return self.camera_constant_px_A * self.pixel_size_um * 1e-3

    @property
    def camera_length_sigma_mm(self) -> float | None:
        """Total standard uncertainty of the camera length (statistical and reproducibility)."""
        L = self.camera_length_mm
        return None if L is None else float(L * self.camera_constant_total_rel_sigma)

    @property
    def camera_length_stat_sigma_mm(self) -> float | None:
        """Statistical part of the camera length's uncertainty."""
        L = self.camera_length_mm
        return None if L is None else float(L * self.camera_constant_rel_sigma)

    @property
    def camera_length_sys_sigma_mm(self) -> float | None:
        """Systematic part (reproducibility) of the camera length's uncertainty."""
        L = self.camera_length_mm
        return None if L is None else float(L * self.reproducibility_pct / 100.0)

    # -- conversion

    def to_dict(self) -> dict:
        """JSON-ready record (the library file's format)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, rec: Any, *, where: str = "") -> SavedCalibration:
        """Check and build a record read from JSON.

        Raises
        ------
        LibraryError
            Naming the first missing or invalid field (and ``where``, e.g. the file).
        """
        if not isinstance(rec, dict):
            raise LibraryError(f"calibration record{' in ' + where if where else ''} must be a JSON object, "
                               f"got {type(rec).__name__}")
        name = _str(rec, "name", where, non_empty=True)
        check_calibration_name(name, where=where)
        where_n = f"{where} ('{name}')" if where else f"'{name}'"
        binning = rec.get("binning", 1)
        if (isinstance(binning, bool) or not isinstance(binning, (int, float)) or not math.isfinite(binning)
            or binning != int(binning) or not 1 <= binning <= 1024):
            raise _bad("binning", binning, "must be a whole number from 1 to 1024", where_n)
        date = _str(rec, "date", where_n, non_empty=True)
        try:
            _parse_date(date)
        except (ValueError, OverflowError):
            raise _bad("date", date, "must be an ISO 8601 date-time", where_n) from None
        exact = rec.get("exact_camera_equation", False)
        if not isinstance(exact, bool):
            raise _bad("exact_camera_equation", exact, "must be true or false", where_n)
        quality = rec.get("quality", "") or ""
        if quality not in ("", "good", "poor"):
            raise _bad("quality", quality, "must be 'good', 'poor' or empty", where_n)
        values = dict(
            name=name,
            instrument=_str(rec, "instrument", where_n, default=""),
            voltage_kv=_num(rec, "voltage_kv", where_n, positive=True),
            nominal_camera_length_mm=_num(rec, "nominal_camera_length_mm", where_n, positive=True, optional=True),
            binning=int(binning),
            pixel_size_um=_num(rec, "pixel_size_um", where_n, positive=True, optional=True),
            camera_constant_px_A=_num(rec, "camera_constant_px_A", where_n, positive=True),
            camera_constant_sigma_px_A=_num(rec, "camera_constant_sigma_px_A", where_n, non_negative=True),
            ellipticity=_num(rec, "ellipticity", where_n, lo=0.0, hi=0.5),
            major_axis_deg=_num(rec, "major_axis_deg", where_n),
            standard=_str(rec, "standard", where_n, default=""),
            date=date,
            image_sha256=_str(rec, "image_sha256", where_n, default=""),
            software_version=_str(rec, "software_version", where_n, default=""),
            notes=_str(rec, "notes", where_n, default=""),
            ellipticity_sigma=_num(rec, "ellipticity_sigma", where_n, non_negative=True, optional=True) or 0.0,
            major_axis_sigma_deg=_num(rec, "major_axis_sigma_deg", where_n, non_negative=True, optional=True) or 0.0,
            quality=quality,
            exact_camera_equation=exact,
            reproducibility_pct=_reproducibility(rec, where_n),
        )
        obj = object.__new__(cls)
        for f in fields(cls):
            object.__setattr__(obj, f.name, values[f.name])
        object.__setattr__(obj, "major_axis_deg", float(values["major_axis_deg"]) % 180.0)
        return obj

    @classmethod
    def from_calibration(
        cls,
        calibration,
        *,
        name: str,
        instrument: str = "",
        nominal_camera_length_mm: float | None = None,
        binning: int = 1,
        pixel_size_um: float | None = None,
        notes: str = "",
        date: str | None = None,
        reproducibility_pct: float | None = None,
    ) -> SavedCalibration:
        """A library record from a fitted :class:`~saedkit.core.calibration.calibrate.Calibration`.

        Parameters
        ----------
        calibration : Calibration
        name : str
            Unique name in the library.
        instrument, notes : str
            Free text.
        nominal_camera_length_mm : float, optional
            The camera length the microscope displayed.
        binning : int
            Camera binning.
        pixel_size_um : float, optional
            Overrides the calibration's pixel size.
        date : str, optional
            ISO 8601 UTC; now by default.
        reproducibility_pct : float, optional
            Overrides the calibration's reproducibility term (%).

        Raises
        ------
        InputError
            If a value is invalid (the name empty, binning < 1, ...).
        """
        ell = getattr(calibration, "ellipse", None) or Ellipse()
        px = pixel_size_um if pixel_size_um is not None else getattr(calibration, "pixel_size_um", None)
        sig_e = getattr(calibration, "ellipticity_sigma", 0.0)
        sig_phi = getattr(calibration, "major_axis_sigma_deg", 0.0)
        return cls(
            name=str(name).strip(),
            instrument=str(instrument or ""),
            voltage_kv=float(calibration.voltage_kv),
            nominal_camera_length_mm=None if nominal_camera_length_mm is None else float(nominal_camera_length_mm),
            binning=binning,
            pixel_size_um=None if px is None else float(px),
            camera_constant_px_A=float(calibration.camera_constant_px_A),
            camera_constant_sigma_px_A=float(calibration.camera_constant_sigma_px_A),
            ellipticity=float(ell.ellipticity),
            major_axis_deg=float(ell.major_axis_deg),
            standard=str(getattr(calibration, "standard", "") or ""),
            date=date or _now_iso(),
            image_sha256=str(getattr(calibration, "image_sha256", None) or ""),
            software_version=_software_version(),
            notes=str(notes or ""),
            ellipticity_sigma=float(sig_e) if sig_e is not None and math.isfinite(sig_e) else 0.0,
            major_axis_sigma_deg=float(sig_phi) if sig_phi is not None and math.isfinite(sig_phi) else 0.0,
            quality=str(getattr(calibration, "quality", "") or ""),
            exact_camera_equation=bool(getattr(calibration, "exact_camera_equation", False)),
            reproducibility_pct=float(getattr(calibration, "reproducibility_pct", DEFAULT_REPRODUCIBILITY_PCT)
                                      if reproducibility_pct is None else reproducibility_pct),
        )


@dataclass(frozen=True)
class CalibrationHistoryEntry:
    """One calibration in a drift history.

    Parameters
    ----------
    name, date : str
    camera_constant_px_A, camera_constant_sigma_px_A : float
    relative_change : float
        ``K / K_first − 1``, against the oldest calibration of the history.
    relative_change_sigma : float
        Its standard uncertainty (both σ_K in quadrature).
    """

    name: str
    date: str
    camera_constant_px_A: float
    camera_constant_sigma_px_A: float
    relative_change: float
    relative_change_sigma: float

    def to_dict(self) -> dict:
        return asdict(self)


# --------------------------------------------------------------------------- the library


class CalibrationLibrary:
    """The saved calibrations, in one JSON file.

    Parameters
    ----------
    path : str or path, optional
        The library file; :func:`default_library_path` by default.

    Examples
    --------
    >>> lib = CalibrationLibrary("/tmp/calibrations.json")  # doctest: +SKIP
    >>> lib.find_best(voltage_kv=200, nominal_camera_length_mm=600)  # doctest: +SKIP
    """

    def __init__(self, path: str | os.PathLike | None = None) -> None:
        self.path = Path(path).expanduser() if path is not None else default_library_path()
        self.set_aside_path: Path | None = None

    def __repr__(self) -> str:
        return f"CalibrationLibrary({str(self.path)!r})"

    # -- reading

    def _read(self) -> list[SavedCalibration]:
        """Every record; [] when the file does not exist. Raises LibraryError when it is broken."""
        try:
            text = self.path.read_text(encoding="utf-8")
        except FileNotFoundError:
            return []
        except (OSError, UnicodeDecodeError) as exc:
            raise LibraryError(f"calibration library {self.path} cannot be read: {exc}") from None
        return self._parse(text)

    def _parse(self, text: str) -> list[SavedCalibration]:
        hint = ("; the file is kept as it is — the next save moves it aside to "
                f"{self.path.name}.broken-<time>, or run CalibrationLibrary.recover()")
        try:
            doc = loads_bounded(text, what=f"calibration library {self.path}", max_depth=16,
                                max_chars=50_000_000)
        except JsonLimitError as exc:
            raise LibraryError(f"{exc}{hint}") from None
        if not isinstance(doc, dict) or doc.get("format") != LIBRARY_FORMAT:
            raise LibraryError(f"calibration library {self.path} is not a saedkit calibration library "
                               f"(format must be {LIBRARY_FORMAT!r}){hint}")
        if doc.get("version") != LIBRARY_VERSION:
            raise LibraryError(f"calibration library {self.path} has version {doc.get('version')!r}; this saedkit "
                               f"reads version {LIBRARY_VERSION}{hint}")
        recs = doc.get("calibrations")
        if not isinstance(recs, list):
            raise LibraryError(f"calibration library {self.path}: 'calibrations' must be a list{hint}")
        out: list[SavedCalibration] = []
        names: set[str] = set()
        for i, rec in enumerate(recs):
            try:
                cal = SavedCalibration.from_dict(rec, where=f"{self.path} record {i}")
            except LibraryError as exc:
                raise LibraryError(f"{exc}{hint}") from None
            except (TypeError, ValueError, OverflowError) as exc:
                raise LibraryError(f"calibration library {self.path} record {i} is damaged "
                                   f"({type(exc).__name__}: {exc}){hint}") from None
            if cal.name in names:
                raise LibraryError(f"calibration library {self.path}: the name {cal.name!r} appears twice{hint}")
            names.add(cal.name)
            out.append(cal)
        return out

    def _write(self, records: list[SavedCalibration]) -> None:
        doc = {"format": LIBRARY_FORMAT, "version": LIBRARY_VERSION,
               "calibrations": [r.to_dict() for r in records]}
        try:
            write_text_atomic(self.path, json.dumps(doc, indent=2, ensure_ascii=False, allow_nan=False) + "\n")
        except OSError as exc:
            raise LibraryError(f"calibration library {self.path} cannot be written: {exc}") from None

    @property
    def lock_path(self) -> Path:
        """The lock file beside the library (held while the library is changed)."""
        return self.path.with_name(self.path.name + ".lock")

    @contextlib.contextmanager
    def _locked(self, *, timeout_s: float = 60.0):
        """Hold the library's exclusive lock (a read-modify-write of one process at a time)."""
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fh = open(self.lock_path, "a+b")
        except OSError as exc:
            raise LibraryError(f"calibration library {self.path}: cannot open its lock file "
                               f"{self.lock_path}: {exc}") from None
        try:
            _acquire(fh, timeout_s, self.lock_path)
            try:
                yield
            finally:
                _release(fh)
        finally:
            fh.close()

    def _move_aside(self) -> Path:
        stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        target = self.path.with_name(f"{self.path.name}.broken-{stamp}")
        n = 1
        while target.exists():
            target = self.path.with_name(f"{self.path.name}.broken-{stamp}-{n}")
            n += 1
        try:
            os.replace(self.path, target)
        except OSError as exc:
            raise LibraryError(f"calibration library {self.path} is broken and cannot be moved aside: {exc}") from None
        self.set_aside_path = target
        return target

    def is_broken(self) -> bool:
        """True when the file exists but cannot be read as a library."""
        try:
            self._read()
        except LibraryError:
            return self.path.exists()
        return False

    def list(self) -> list[SavedCalibration]:
        """Every saved calibration, in file order.

        Raises
        ------
        LibraryError
            When the file is broken (it is left as it is).
        """
        return self._read()

    def names(self) -> list[str]:
        """The names of the saved calibrations."""
        return [c.name for c in self._read()]

    def get(self, name: str) -> SavedCalibration:
        """The calibration called ``name`` (exact, else case-insensitive).

        Raises
        ------
        LibraryError
            When there is none (the message lists the names) or the file is broken.
        """
        recs = self._read()
        for c in recs:
            if c.name == name:
                return c
        folded = [c for c in recs if c.name.casefold() == str(name).strip().casefold()]
        if len(folded) == 1:
            return folded[0]
        known = ", ".join(repr(c.name) for c in recs) or "(the library is empty)"
        raise LibraryError(f"no saved calibration named {name!r} in {self.path}; saved: {known}")

    # -- writing

    def save(self, calibration: SavedCalibration, *, overwrite: bool = False) -> SavedCalibration:
        """Add a calibration (or replace one of the same name with ``overwrite``).

        A broken library file is first moved aside (see the module notes);
        :attr:`set_aside_path` then says where.

        Raises
        ------
        LibraryError
            When the name exists and ``overwrite`` is False, or the file cannot be written.
        """
        if not isinstance(calibration, SavedCalibration):
            raise InputError(f"save takes a SavedCalibration, got {type(calibration).__name__} "
                             "(use SavedCalibration.from_calibration)")
        self.set_aside_path = None
        with self._locked():
            return self._save_locked(calibration, overwrite=overwrite)

    def _save_locked(self, calibration: SavedCalibration, *, overwrite: bool) -> SavedCalibration:
        try:
            recs = self._read()
        except LibraryError:
            if not self.path.exists():
                raise
            self._move_aside()
            recs = []
        for i, c in enumerate(recs):
            if c.name == calibration.name:
                if not overwrite:
                    raise LibraryError(f"a calibration named {calibration.name!r} is already saved in {self.path}; "
                                       "choose another name or overwrite it")
                recs[i] = calibration
                break
        else:
            recs.append(calibration)
        self._write(recs)
        return calibration

    def rename(self, old: str, new: str) -> SavedCalibration:
        """Rename a saved calibration.

        Raises
        ------
        LibraryError
            When ``old`` is not saved, ``new`` is taken or empty, or the file is broken.
        """
        new = str(new).strip()
        if not new:
            raise LibraryError("the new name of a calibration must not be empty")
        check_calibration_name(new)
        with self._locked():
            recs = self._read()
            cal = self.get(old)
            if any(c.name == new for c in recs) and new != cal.name:
                raise LibraryError(f"a calibration named {new!r} is already saved in {self.path}")
            renamed = replace(cal, name=new)
            self._write([renamed if c.name == cal.name else c for c in recs])
        return renamed

    def delete(self, name: str) -> SavedCalibration:
        """Remove a saved calibration; returns it.

        Raises
        ------
        LibraryError
            When it is not saved or the file is broken.
        """
        with self._locked():
            recs = self._read()
            cal = self.get(name)
            self._write([c for c in recs if c.name != cal.name])
        return cal

    def recover(self) -> Path | None:
        """Move a broken library file aside and start an empty library; returns where it went.

        Does nothing (returns None) when the file is missing or fine.
        """
        self.set_aside_path = None
        with self._locked():
            if not self.path.exists():
                return None
            try:
                self._read()
                return None
            except LibraryError:
                target = self._move_aside()
                self._write([])
                return target

    # -- queries

    @staticmethod
    def _same_voltage(c: SavedCalibration, kv: float) -> bool:
        return abs(c.voltage_kv - kv) <= VOLTAGE_TOLERANCE * kv

    def find_best(self, *, voltage_kv: float, nominal_camera_length_mm: float | None = None,
                  binning: int | None = None) -> SavedCalibration | None:
        """The calibration that fits an instrument state best, or None.

        Parameters
        ----------
        voltage_kv : float
            Required: only calibrations at this voltage (within 0.5 %) qualify.
        nominal_camera_length_mm : float, optional
            Prefer the nearest nominal camera length (relative difference);
            calibrations without one come after those with one.
        binning : int, optional
            Only calibrations with this binning qualify.

        Notes
        -----
        Among equals, the newest wins.
        """
        kv = float(voltage_kv)
        if not kv > 0:
            raise InputError(f"voltage_kv must be > 0, got {voltage_kv!r}")
        cands = [c for c in self._read() if self._same_voltage(c, kv)]
        if binning is not None:
            cands = [c for c in cands if c.binning == int(binning)]
        if not cands:
            return None

        def key(c: SavedCalibration):
            if nominal_camera_length_mm is None:
                dist = 0.0
            elif c.nominal_camera_length_mm is None:
                dist = math.inf
            else:
                dist = abs(c.nominal_camera_length_mm / float(nominal_camera_length_mm) - 1.0)
            return (dist, -c.datetime.timestamp())

        return min(cands, key=key)

    def history(self, *, voltage_kv: float, nominal_camera_length_mm: float | None,
                binning: int | None = None) -> list[CalibrationHistoryEntry]:
        """How K drifted: the calibrations of one instrument state, oldest first.

        Parameters
        ----------
        voltage_kv : float
        nominal_camera_length_mm : float or None
            Same nominal camera length within 0.5 % (None: those without one).
        binning : int, optional
            Same binning when given.

        Returns
        -------
        list of CalibrationHistoryEntry
            With the relative change of K against the first (oldest) one.
        """
        kv = float(voltage_kv)
        recs = [c for c in self._read() if self._same_voltage(c, kv)]
        if nominal_camera_length_mm is None:
            recs = [c for c in recs if c.nominal_camera_length_mm is None]
        else:
            L = float(nominal_camera_length_mm)
            recs = [c for c in recs if c.nominal_camera_length_mm is not None
                    and abs(c.nominal_camera_length_mm / L - 1.0) <= CAMERA_LENGTH_TOLERANCE]
        if binning is not None:
            recs = [c for c in recs if c.binning == int(binning)]
        recs.sort(key=lambda c: c.datetime)
        if not recs:
            return []
        k0, s0 = recs[0].camera_constant_px_A, recs[0].camera_constant_sigma_px_A
        out = []
        for c in recs:
            ratio = c.camera_constant_px_A / k0
            sig = ratio * math.hypot(c.camera_constant_sigma_px_A / c.camera_constant_px_A, s0 / k0) \
                if c is not recs[0] else 0.0
            out.append(CalibrationHistoryEntry(c.name, c.date, c.camera_constant_px_A,
                                               c.camera_constant_sigma_px_A, ratio - 1.0, sig))
        return out


def _acquire(fh, timeout_s: float, where: Path) -> None:
    """Take an exclusive lock on the open file ``fh``, waiting up to ``timeout_s``."""
    deadline = time.monotonic() + timeout_s
    if os.name == "nt":  # pragma: no cover - Windows
        import msvcrt

        while True:
            try:
                fh.seek(0)
                msvcrt.locking(fh.fileno(), msvcrt.LK_NBLCK, 1)
                return
            except OSError:
                if time.monotonic() > deadline:
                    raise LibraryError(f"the calibration library is locked by another program ({where}); "
                                       "try again") from None
                time.sleep(0.02)
    import fcntl

    while True:
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            if time.monotonic() > deadline:
                raise LibraryError(f"the calibration library is locked by another program ({where}); "
                                   "try again") from None
            time.sleep(0.01)


def _release(fh) -> None:
    if os.name == "nt":  # pragma: no cover - Windows
        import msvcrt

        fh.seek(0)
        msvcrt.locking(fh.fileno(), msvcrt.LK_UNLCK, 1)
        return
    import fcntl

    fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def estimate_reproducibility_pct(history: Sequence[CalibrationHistoryEntry], *, min_count: int = 3) -> float | None:
    """The reproducibility of K (%) from repeated calibrations of one instrument state, or None if too few.

    Parameters
    ----------
    history : sequence of CalibrationHistoryEntry
        From :meth:`CalibrationLibrary.history` (same voltage, camera length, binning).
    min_count : int
        Fewest calibrations that give an estimate.

    Notes
    -----
    The scatter of K between calibrations holds the fits' own statistical
    scatter and the reproducibility: ``r² = s²(K)/K̄² − mean(σ_K²/K²)``
    (``s`` the sample standard deviation), floored at 0 [cp].
    """
    if len(history) < max(int(min_count), 2):
        return None
    k = [float(h.camera_constant_px_A) for h in history]
    mean = sum(k) / len(k)
    var = sum((x - mean) ** 2 for x in k) / (len(k) - 1)
    stat = sum((h.camera_constant_sigma_px_A / h.camera_constant_px_A) ** 2 for h in history) / len(history)
    return 100.0 * math.sqrt(max(var / mean**2 - stat, 0.0))


def resolve_calibration(name_or_file: str | os.PathLike, *, library: CalibrationLibrary | None = None
                        ) -> SavedCalibration:
    """A saved calibration from a JSON file or from the library by name.

    Parameters
    ----------
    name_or_file : str or path
        A JSON file holding one calibration record, or a library file with
        exactly one record; otherwise a name in the library.
    library : CalibrationLibrary, optional
        The library to look names up in (the default one otherwise).

    Raises
    ------
    LibraryError
        When the file is not a calibration, holds several, or the name is not saved.
    """
    text = str(name_or_file)
    p = Path(text).expanduser()
    if p.is_file():
        try:
            if p.stat().st_size > 50_000_000:
                raise LibraryError(f"calibration file {p} is {p.stat().st_size} bytes; a calibration is a few kB")
            doc = loads_bounded(p.read_text(encoding="utf-8"), what=f"calibration file {p}", max_depth=16)
        except (OSError, UnicodeDecodeError) as exc:
            raise LibraryError(f"calibration file {p} cannot be read: {exc}") from None
        except JsonLimitError as exc:
            raise LibraryError(str(exc)) from None
        if isinstance(doc, dict) and doc.get("format") == LIBRARY_FORMAT:
            recs = CalibrationLibrary(p)._parse(json.dumps(doc))
            if len(recs) != 1:
                names = ", ".join(repr(c.name) for c in recs) or "none"
                raise LibraryError(f"calibration file {p} holds {len(recs)} calibrations ({names}); "
                                   "give one of their names with this file as the library, or a file with one")
            return recs[0]
        if isinstance(doc, dict) and isinstance(doc.get("calibration"), dict):
            doc = doc["calibration"]
        try:
            return SavedCalibration.from_dict(doc, where=str(p))
        except (TypeError, ValueError, OverflowError) as exc:
            raise LibraryError(f"calibration file {p} is damaged ({type(exc).__name__}: {exc})") from None
    if p.suffix.lower() == ".json" and not p.exists():
        raise LibraryError(f"calibration file {p} does not exist")
    lib = library if library is not None else CalibrationLibrary()
    return lib.get(text)
