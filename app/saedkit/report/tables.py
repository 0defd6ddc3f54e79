"""The measurement table (CSV) and the analysis record (JSON).

The table has one row per spot (and one per ring of a ring fit): position,
distance from the centre, direction, d-spacing and |g| with their standard
uncertainties, (hkl) when a zone-axis candidate indexes the pattern,
intensity and signal-to-noise ratio. A block of ``#`` comment lines above it
names the image (path, SHA-256), the calibration (camera constant ± σ,
ellipse, standard, date, voltage), the zone axis and phase, and the software
version, so that a number copied into a notebook can be traced back.

No matplotlib here.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from dataclasses import dataclass, field
from decimal import Decimal, InvalidOperation
from pathlib import Path
from typing import Any

import numpy as np

from saedkit.core._atomic import write_text_atomic
from saedkit.core.errors import InputError
from saedkit.report._common import (
    CentreInfo,
    finite,
    format_sig,
    format_value_sigma,
    identified_rings,
    is_calibration_of_image,
    is_hexagonal,
    json_ready,
    pick_centre,
    software_label,
    summarize_calibration,
    zone_text,
)

__all__ = [
    "MeasurementTable",
    "calculate_measurement_table",
    "write_measurements_csv",
    "read_measurements_csv",
    "write_analysis_json",
    "printed_tolerance",
    "COLUMN_NOTES",
]

_TITLE = "saedkit measurement table"

#: Every column the table can have, in order, with its text format.
_COLUMN_FORMATS: dict[str, str] = {
    "feature": "str",  # "spot" or "ring"
    "index": "int",  # number of the spot in analysis.spots (or ring in ring_fit.rings), from 1 as on screen
    "x_px": ".3f",
    "x_sigma_px": "sig2",
    "y_px": ".3f",
    "y_sigma_px": "sig2",
    "R_px": ".3f",
    "R_sigma_px": "sig2",
    "angle_deg": ".2f",
    "d_A": ".5f",
    "d_sigma_A": "sig2",
    "d_stat_sigma_A": "sig2",
    "d_sys_sigma_A": "sig2",
    "g_per_nm": ".5f",
    "g_sigma_per_nm": "sig2",
    "hkl": "indices",
    "hkil": "indices",
    "phase": "str",  # the phase the (hkl) belongs to
    "intensity": ".6g",
    "intensity_sigma": "sig2",
    "snr": ".2f",
    "d_error_pct": ".3f",
    "double_diffraction": "bool",
}

_BASE_COLUMNS = (
    "feature", "index", "x_px", "x_sigma_px", "y_px", "y_sigma_px", "R_px", "R_sigma_px", "angle_deg",
    "d_A", "d_sigma_A", "d_stat_sigma_A", "d_sys_sigma_A", "g_per_nm", "g_sigma_per_nm", "hkl", "intensity", "intensity_sigma", "snr",
)

#: What each column means (written under the header block of the CSV).
COLUMN_NOTES = (
    "x_px, y_px: position (x = column, y = row, origin at the centre of the top-left pixel)",
    "R_px: distance from the centre corrected for the elliptical distortion; angle_deg: from +x towards +y",
    "d_A = K / R_px (camera equation R·d = λL; exact form when the calibration says); g_per_nm = |g| = 10 / d_A",
    "d_sigma_A, g_sigma_per_nm: total standard uncertainty = statistical (d_stat_sigma_A: positions, centre, "
    "fit of K) and systematic (d_sys_sigma_A: reproducibility of K) in quadrature",
    "hkl: Miller indices h k l (hkil: Miller–Bravais) of the named phase; "
    "d_error_pct = (measured − predicted d) / predicted d × 100",
)


@dataclass(frozen=True, eq=False)
class MeasurementTable:
    """The measurement table of one analysis.

    Parameters
    ----------
    columns : tuple of str
        Column names, in order (units in the names).
    rows : tuple of dict
        One dict per row, keyed by column: floats (NaN when unknown),
        ``index`` an int, ``feature`` a str, ``hkl``/``hkil`` a tuple of int or
        None, ``double_diffraction`` a bool or None.
    metadata : dict of str
        The header block: image, calibration, zone axis, software, ...
    """

    columns: tuple[str, ...]
    rows: tuple[dict, ...]
    metadata: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.rows)

    def column(self, name: str) -> list:
        """All values of one column."""
        if name not in self.columns:
            raise InputError(f"the table has no column {name!r}; it has {', '.join(self.columns)}")
        return [r[name] for r in self.rows]

    def column_array(self, name: str) -> np.ndarray:
        """A numeric column as a float array (NaN where empty)."""
        return np.array([np.nan if v is None else float(v) for v in self.column(name)], dtype=float)

    def format_cell(self, row: dict, name: str) -> str:
        """The text of one cell as written to the CSV."""
        return _format_cell(row.get(name), _COLUMN_FORMATS.get(name, ".6g"))

    def __repr__(self) -> str:
        return f"MeasurementTable({len(self.rows)} rows, columns={list(self.columns)})"


# --------------------------------------------------------------------------- #
# Building the table
# --------------------------------------------------------------------------- #


def _nan(x: Any) -> float:
    v = finite(x)
    return math.nan if v is None else v


def _nearest_predicted(candidate, x: float, y: float, r: float):
    """The predicted reflection of ``candidate`` within max(3 px, 3 % of R) of (x, y), or None."""
    pred = getattr(candidate, "predicted", ()) or ()
    if not pred or not (math.isfinite(x) and math.isfinite(y)):
        return None
    xy = np.array([[p.x, p.y] for p in pred], dtype=float)
    dist = np.hypot(xy[:, 0] - x, xy[:, 1] - y)
    j = int(np.argmin(dist))
    tol = max(3.0, 0.03 * r) if math.isfinite(r) else 3.0  # tolerances: common practice
    return pred[j] if dist[j] <= tol else None


def calculate_measurement_table(analysis) -> MeasurementTable:
    """The measurement table of an analysis: one row per spot, then one per ring.

    Parameters
    ----------
    analysis : Analysis

    Returns
    -------
    MeasurementTable

    Notes
    -----
    Every spot's R, d, |g| and their uncertainties come from
    :meth:`Analysis.measure_spots` (the one measurement function,
    :func:`saedkit.core.measure.measure_positions`): the same numbers as the
    record's ``spots`` and the candidates' spots. The camera is the
    calibration's when there is one, else the chosen candidate's refined K.
    ``d = K / |D⁻¹(p − c)|`` (or the exact form), with the statistical σ from
    the spot's and the centre's position uncertainties and the fit's σ of K,
    and the systematic σ from the reproducibility of K [1]_.

    Rings use the calibration's K; a ring that the calibration assigned to a
    reflection of its standard carries that (hkl) when the calibration was
    fitted on this image, else the (hkl) of the best phase identification.

    References
    ----------
    .. [1] ISO 25498:2018, Microbeam analysis — Analytical electron
       microscopy — Selected area electron diffraction analysis using a TEM.
    """
    from saedkit.core.measure import measure_positions, measure_radii

    cand = analysis.candidate
    hexagonal = is_hexagonal(cand)
    centre = pick_centre(analysis)  # the centre the record's spots are measured about

    rows: list[dict] = []
    indexed = [s for s in (getattr(cand, "spots", ()) or ())] if cand is not None else []
    indexed_xy = np.array([[s.x, s.y] for s in indexed], dtype=float).reshape(-1, 2)
    spots = list(analysis.spots or ())
    if spots:  # the record's own measurement (same centre, same camera): one number everywhere
        m = analysis.measure_spots()
    else:  # spots known only through the match
        spots = indexed
        camera = getattr(analysis, "camera", None)
        m = measure_positions([[s.x, s.y] for s in spots], 0.0, None if centre is None else (centre.x, centre.y),
                              None if centre is None else (centre.sigma_x, centre.sigma_y), camera)
    for i, s in enumerate(spots):
        x, y = _nan(s.x), _nan(s.y)
        sx, sy = _nan(getattr(s, "sigma_x", None)), _nan(getattr(s, "sigma_y", None))
        r, sr, angle = float(m.radius_px[i]), float(m.radius_sigma_px[i]), float(m.angle_deg[i])
        d = float(m.d_A[i])
        hkl = None
        d_err = math.nan
        dd = None
        own = None
        if len(indexed_xy):
            dist = np.hypot(indexed_xy[:, 0] - x, indexed_xy[:, 1] - y)
            j = int(np.argmin(dist))
            if dist[j] < 0.5:
                own = indexed[j]
        if own is not None:
            hkl = None if own.hkl is None else tuple(int(v) for v in own.hkl)
            d_err = _nan(own.d_error_pct)
            dd = bool(getattr(own, "forbidden", False)) if hkl is not None else None
        else:
            p = _nearest_predicted(cand, x, y, r) if cand is not None else None
            if p is not None:
                hkl = tuple(int(v) for v in p.hkl)
                d_err = (d - p.d_A) / p.d_A * 100 if math.isfinite(d) else math.nan
                dd = bool(getattr(p, "forbidden", False))
        rows.append({
            "feature": "spot", "index": i + 1, "x_px": x, "x_sigma_px": sx, "y_px": y, "y_sigma_px": sy,
            "R_px": r, "R_sigma_px": sr, "angle_deg": angle, "d_A": d, "d_sigma_A": float(m.d_sigma_A[i]),
            "d_stat_sigma_A": float(m.d_stat_sigma_A[i]), "d_sys_sigma_A": float(m.d_sys_sigma_A[i]),
            "g_per_nm": float(m.g_per_nm[i]), "g_sigma_per_nm": float(m.g_sigma_per_nm[i]), "hkl": hkl,
            "hkil": hkl_tuple_four(hkl) if hexagonal else None,
            "phase": str(cand.phase) if (cand is not None and hkl is not None) else "",
            "intensity": _nan(getattr(s, "intensity", None)),
            "intensity_sigma": _nan(getattr(s, "intensity_sigma", None)),
            "snr": _nan(getattr(s, "snr", None)),
            "d_error_pct": d_err, "double_diffraction": dd,
        })

    ring_fit = getattr(analysis, "ring_fit", None)
    calibration = getattr(analysis, "calibration", None)
    info = summarize_calibration(calibration)
    own_cal = is_calibration_of_image(analysis)
    assigned = [a for a in (info.rings if (info is not None and own_cal) else ())
                if finite(getattr(a, "radius_px", None))]
    identified = identified_rings(getattr(analysis, "phase_id", None))
    ring_list = list(getattr(ring_fit, "rings", ()) or ())
    if not ring_list and info is not None and own_cal:  # a calibration of this image, without a ring fit
        ring_list = sorted(list(assigned) + [_Radius(r) for r in info.unassigned_radii_px],
                           key=lambda a: float(a.radius_px))
    mr = measure_radii([_nan(ring.radius_px) for ring in ring_list],
                       [_nan(getattr(ring, "radius_sigma_px", None)) for ring in ring_list], calibration)
    for i, ring in enumerate(ring_list):
        r, sr = _nan(ring.radius_px), _nan(getattr(ring, "radius_sigma_px", None))
        d = float(mr.d_A[i])
        hkl, d_err, phase = None, math.nan, ""
        if assigned:
            a = min(assigned, key=lambda a: abs(float(a.radius_px) - r))
            tol = max(1.0, 3 * (sr if math.isfinite(sr) else 0.0))  # px; common practice
            if abs(float(a.radius_px) - r) <= tol and getattr(a, "hkl", None) is not None:
                hkl = tuple(int(v) for v in a.hkl)
                phase = info.standard or ""
                d_ref = finite(getattr(a, "d_A", None))
                if d_ref and math.isfinite(d):
                    d_err = (d - d_ref) / d_ref * 100
        if hkl is None and identified and math.isfinite(d):
            d_m, mm = min(identified, key=lambda t: abs(t[0] - d))
            if abs(d_m - d) <= 5e-3 * d:  # the same ring (spacings agree to 0.5 %)
                hkl = tuple(int(v) for v in mm.hkl)
                phase = str(getattr(mm, "phase", "") or "")
                d_err = _nan(getattr(mm, "d_error_pct", None))
        rows.append({
            "feature": "ring", "index": i + 1, "x_px": math.nan, "x_sigma_px": math.nan, "y_px": math.nan,
            "y_sigma_px": math.nan, "R_px": r, "R_sigma_px": sr, "angle_deg": math.nan, "d_A": d,
            "d_sigma_A": float(mr.d_sigma_A[i]), "d_stat_sigma_A": float(mr.d_stat_sigma_A[i]),
            "d_sys_sigma_A": float(mr.d_sys_sigma_A[i]), "g_per_nm": float(mr.g_per_nm[i]),
            "g_sigma_per_nm": float(mr.g_sigma_per_nm[i]), "hkl": hkl, "hkil": None, "phase": phase,
            "intensity": _nan(getattr(ring, "height", None)), "intensity_sigma": math.nan,
            "snr": _nan(getattr(ring, "snr", None)), "d_error_pct": d_err, "double_diffraction": None,
        })

    columns = list(_BASE_COLUMNS)
    if hexagonal:
        columns.insert(columns.index("hkl") + 1, "hkil")
    if any(r["hkl"] is not None for r in rows):
        columns.insert(columns.index("hkil" if hexagonal else "hkl") + 1, "phase")
        columns += ["d_error_pct", "double_diffraction"]
    rows_out = tuple({c: r[c] for c in columns} for r in rows)
    return MeasurementTable(tuple(columns), rows_out, _metadata(analysis, centre))


@dataclass(frozen=True)
class _Radius:
    """A ring known only by its radius (one the calibration could not assign)."""

    radius_px: float
    radius_sigma_px: float = math.nan


def hkl_tuple_four(hkl) -> tuple[int, int, int, int] | None:
    """Miller–Bravais (h, k, i, l) of (h, k, l), i = −(h + k); None for None."""
    if hkl is None:
        return None
    h, k, l = (int(v) for v in hkl)
    return (h, k, -(h + k), l)


def _metadata(analysis, centre: CentreInfo | None) -> dict:
    """The header block: what the numbers of the table rest on."""
    meta: dict[str, str] = {"software": software_label(), "created": str(analysis.created)}
    img = getattr(analysis, "image", None)
    if img is not None:
        meta["image"] = str(getattr(img, "source_path", None) or "(array in memory)")
        meta["image_sha256"] = str(getattr(img, "sha256", ""))
        shape = getattr(img, "shape", None)
        if shape is not None:
            meta["image_shape"] = f"{shape[0]} x {shape[1]} (rows x columns), {getattr(img, 'dtype', '')}".rstrip(", ")
        for key in ("voltage_kv", "pixel_size_um", "camera_length_mm"):
            v = finite(getattr(img, key, None))
            if v is not None:
                meta[f"image_{key}"] = f"{v:g}"
    if centre is not None:
        meta["centre_px"] = (f"{format_value_sigma(centre.x, centre.sigma_x)}, "
                             f"{format_value_sigma(centre.y, centre.sigma_y)}")
        meta["centre_source"] = centre.source
    info = summarize_calibration(getattr(analysis, "calibration", None), image=img)
    if info is None:
        meta["calibration"] = "none"
    else:
        what = {"fitted": "fitted to a ring pattern", "library": "from the calibration library",
                "entered": "entered by hand"}.get(info.source, info.source)
        meta["calibration"] = what + (f": {info.name}" if info.name else "")
        meta["calibration_camera_constant_px_A"] = format_value_sigma(
            info.camera_constant_px_A, info.camera_constant_sigma_px_A)
        if info.camera_constant_rel_sigma is not None:
            meta["calibration_rel_sigma_pct"] = format_sig(100 * info.camera_constant_rel_sigma, 2)
        e = info.ellipse
        meta["calibration_ellipse"] = (
            f"ellipticity {format_value_sigma(e.ellipticity, info.ellipticity_sigma, max_decimals=5)}, "
            f"major axis {format_value_sigma(e.major_axis_deg, info.major_axis_sigma_deg, max_decimals=2)} deg")
        for key, value in (("standard", info.standard), ("date", info.date)):
            if value:
                meta[f"calibration_{key}"] = value
        for key in ("voltage_kv", "wavelength_A", "pixel_size_um", "camera_length_mm", "lambda_L_mm_A"):
            v = getattr(info, key)
            if v is not None:
                meta[f"calibration_{key}"] = f"{v:.6g}"
    camera = getattr(analysis, "camera", None)
    if camera is None:
        meta["camera_constant_px_A"] = "none (spacings left empty)"
        meta["camera_constant_source"] = "none"
    else:
        from saedkit.core.calibration.camera import camera_terms

        t = camera_terms(camera)
        meta["camera_constant_px_A"] = format_value_sigma(t.camera_constant_px_A, t.total_sigma_px_A)
        meta["camera_constant_sigma_parts_px_A"] = (f"statistical {format_sig(t.stat_sigma_px_A, 2)}, "
                                                    f"systematic {format_sig(t.sys_sigma_px_A, 2)} "
                                                    f"(reproducibility {format_sig(t.reproducibility_pct, 2)} %)")
        meta["camera_constant_source"] = ("refined by the zone-axis match" if t.source == "match"
                                          else f"calibration ({t.source})")
        if t.exact:
            meta["camera_equation"] = "exact (R = L tan 2θ)"
    cand = analysis.candidate
    if cand is not None and finite(getattr(cand, "camera_constant_px_A", None)):
        meta["candidate_refined_camera_constant_px_A"] = format_value_sigma(
            cand.camera_constant_px_A, getattr(cand, "camera_constant_sigma_px_A", None))
    if cand is not None:
        match = analysis.match
        meta["phase"] = str(cand.phase)
        meta["zone"] = " ".join(str(int(v)) for v in cand.zone)
        meta["zone_label"] = zone_text(cand)
        if getattr(cand, "zone_four_index", None) is not None:
            meta["zone_four_index"] = " ".join(str(int(v)) for v in cand.zone_four_index)
        n = len(match.candidates)
        meta["candidate"] = f"{min(max(analysis.chosen_candidate, 0), n - 1) + 1} of {n}"
        meta["score"] = f"{_nan(cand.score):.4f}"
        meta["in_plane_rotation_deg"] = f"{_nan(cand.in_plane_rotation_deg):.2f}"
    return meta


# --------------------------------------------------------------------------- #
# CSV
# --------------------------------------------------------------------------- #


def _format_cell(value: Any, fmt: str) -> str:
    if value is None:
        return ""
    if fmt == "str":
        return str(value)
    if fmt == "int":
        return str(int(value))
    if fmt == "indices":
        return " ".join(str(int(v)) for v in value)
    if fmt == "bool":
        return "1" if value else "0"
    v = finite(value)
    if v is None:
        return ""
    if fmt == "sig2":
        return format_sig(v, 2)
    return format(v, fmt)


def _parse_cell(text: str, fmt: str) -> Any:
    text = text.strip()
    if fmt == "str":
        return text
    if fmt == "int":
        return int(text) if text else None
    if fmt == "indices":
        return tuple(int(v) for v in text.split()) if text else None
    if fmt == "bool":
        return None if not text else text not in ("0", "false", "False", "no")
    return float(text) if text else math.nan


def write_measurements_csv(analysis, path: str | os.PathLike) -> Path:
    """Write the measurement table of ``analysis`` as CSV, atomically.

    Parameters
    ----------
    analysis : Analysis
    path : str or path
        The file to write (UTF-8; ``#`` lines above the column names).

    Returns
    -------
    Path
        ``path``.

    Notes
    -----
    Read it back with :func:`read_measurements_csv`, or with any CSV reader
    that skips ``#`` comment lines (e.g. ``pandas.read_csv(path, comment="#")``).
    Empty cells are unknown values.

    Examples
    --------
    >>> write_measurements_csv(analysis, "grain_measurements.csv")  # doctest: +SKIP
    """
    table = calculate_measurement_table(analysis)
    return write_text_atomic(path, _table_text(table))


def _table_text(table: MeasurementTable) -> str:
    buf = io.StringIO()
    buf.write(f"# {_TITLE}\n")
    for key, value in table.metadata.items():
        value = " ".join(str(value).split())  # one line each
        buf.write(f"# {key}: {value}\n")
    for note in COLUMN_NOTES:
        buf.write(f"# note: {note}\n")
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(table.columns)
    for row in table.rows:
        writer.writerow([table.format_cell(row, c) for c in table.columns])
    return buf.getvalue()


def read_measurements_csv(path: str | os.PathLike) -> MeasurementTable:
    """Read a table written by :func:`write_measurements_csv`.

    Parameters
    ----------
    path : str or path

    Returns
    -------
    MeasurementTable
        Numbers as floats (NaN for empty cells), ``hkl`` as tuples of int,
        the ``#`` header block in ``metadata``.

    Raises
    ------
    InputError
        If the file cannot be read or is not such a table.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{p}: cannot read the measurement table ({exc})") from None
    lines = text.splitlines()
    meta: dict[str, str] = {}
    body_start = 0
    for i, line in enumerate(lines):
        if not line.startswith("#"):
            body_start = i
            break
        content = line[1:].strip()
        if ": " in content:
            key, value = content.split(": ", 1)
            if key != "note":
                meta[key.strip()] = value.strip()
    else:
        body_start = len(lines)
    reader = csv.reader(lines[body_start:])
    try:
        columns = tuple(next(reader))
    except StopIteration:
        raise InputError(f"{p}: no column names after the header block; not a measurement table") from None
    unknown = [c for c in columns if c not in _COLUMN_FORMATS]
    if unknown or "d_A" not in columns:
        raise InputError(f"{p}: not a saedkit measurement table (columns {', '.join(columns)})")
    rows = []
    for n, cells in enumerate(reader, start=body_start + 2):
        if not cells:
            continue
        if len(cells) != len(columns):
            raise InputError(f"{p}, line {n}: expected {len(columns)} values, got {len(cells)}")
        try:
            rows.append({c: _parse_cell(t, _COLUMN_FORMATS[c]) for c, t in zip(columns, cells)})
        except ValueError as exc:
            raise InputError(f"{p}, line {n}: {exc}") from None
    return MeasurementTable(columns, tuple(rows), meta)


def printed_tolerance(text: str) -> float:
    """Half a unit in the last printed digit of a number written in the table (0 for "")."""
    if not text.strip():
        return 0.0
    try:
        exp = Decimal(text.strip()).as_tuple().exponent
    except InvalidOperation:
        raise InputError(f"not a number: {text!r}") from None
    return 0.5 * 10.0 ** int(exp)


# --------------------------------------------------------------------------- #
# JSON
# --------------------------------------------------------------------------- #


def write_analysis_json(analysis, path: str | os.PathLike) -> Path:
    """Write the analysis record (``analysis.to_dict()``) as JSON, atomically.

    numpy numbers become JSON numbers, NaN and infinities ``null``; the file
    is strict JSON (UTF-8, indented).

    Parameters
    ----------
    analysis : Analysis
    path : str or path

    Returns
    -------
    Path
        ``path``.
    """
    record = json_ready(analysis.to_dict())
    text = json.dumps(record, indent=2, allow_nan=False, ensure_ascii=False) + "\n"
    return write_text_atomic(path, text)
