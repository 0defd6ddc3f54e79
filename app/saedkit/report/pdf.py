"""The multi-page PDF report of one analysed pattern.

Pages, each only when its part of the analysis exists:

1. the annotated pattern under a title block (image, date, phase and zone, K);
2. the measurement table (as many pages as it needs);
3. the calibration: radial profile with the assigned rings and their
   residuals, K ± σ, ellipse, λL, camera length;
4. the ranked zone-axis candidates;
5. the phase identification of a ring pattern;
6. the record: image, software, calibration and every parameter of the run,
   and the caution about single-pattern indexing.

Written with matplotlib's PDF backend (:class:`~matplotlib.backends.backend_pdf.PdfPages`)
to a temporary file that is renamed onto the target when complete. Fonts are
embedded as TrueType, so the text can be searched and copied.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import textwrap
from pathlib import Path
from typing import Any, Callable

from saedkit.core._atomic import write_with_atomic
from saedkit.report._common import (
    describe_unindexed,
    CAUTION,
    finite,
    format_sig,
    format_value_sigma,
    image_label,
    index_camera_constant,
    is_calibration_of_image,
    is_hexagonal,
    json_ready,
    pick_centre,
    software_label,
    summarize_calibration,
    zone_text,
)
from saedkit.report.figures import RC, _draw_pattern, _profile_parts, draw_profile, escape_dollars, index_mathtext, zone_mathtext
from saedkit.report.tables import calculate_measurement_table

__all__ = ["write_pdf_report", "plan_pdf_pages", "PAGE_SIZE_IN", "TABLE_ROWS_FIRST_PAGE", "TABLE_ROWS_PER_PAGE"]

#: A4 portrait, inches.
PAGE_SIZE_IN = (8.27, 11.69)
#: Rows of the measurement table on its first page (below the notes) and on the next ones.
TABLE_ROWS_FIRST_PAGE = 36
TABLE_ROWS_PER_PAGE = 44
# Record pages: line height, extra space above a heading, height available under the title (inches).
_RECORD_STEP_IN = 0.155
_RECORD_HEADING_GAP_IN = 0.08
_RECORD_HEIGHT_IN = 9.3

_MARGIN_IN = 0.7
_INK = "#1b1b1b"
_GREY = "#6b6b6b"
_ACCENT = "#1f4e79"
_SHADE = "#eef2f7"

ProgressFn = Callable[[int, int], None]


class _Math(str):
    """Text that contains matplotlib mathtext on purpose (indices with overlines); never wrapped."""


def _signed(idx) -> str:
    """Indices as signed integers, e.g. "-1 1 0": what a search or a copy of the PDF text finds."""
    return " ".join(str(int(v)) for v in idx)


# --------------------------------------------------------------------------- #
# Page furniture
# --------------------------------------------------------------------------- #


class _Page:
    """A4 page with helpers that take inches from the top-left corner."""

    def __init__(self, fig):
        self.fig = fig
        self.w, self.h = PAGE_SIZE_IN

    def fx(self, x_in: float) -> float:
        return x_in / self.w

    def fy(self, y_in: float) -> float:
        return 1.0 - y_in / self.h

    def text(self, x_in: float, y_in: float, s: str, **kw):
        if not isinstance(s, _Math):
            s = escape_dollars(s)
        kw.setdefault("color", _INK)
        kw.setdefault("va", "baseline")
        return self.fig.text(self.fx(x_in), self.fy(y_in), s, **kw)

    def rule(self, y_in: float, *, x0: float = _MARGIN_IN, x1: float | None = None, color: str = _GREY,
             lw: float = 0.6) -> None:
        from matplotlib.lines import Line2D

        x1 = self.w - _MARGIN_IN if x1 is None else x1
        self.fig.add_artist(Line2D([self.fx(x0), self.fx(x1)], [self.fy(y_in)] * 2, color=color, lw=lw))

    def shade(self, y_top: float, height: float, *, x0: float = _MARGIN_IN, x1: float | None = None) -> None:
        from matplotlib.patches import Rectangle

        x1 = self.w - _MARGIN_IN if x1 is None else x1
        self.fig.add_artist(Rectangle((self.fx(x0), self.fy(y_top + height)), self.fx(x1) - self.fx(x0),
                                      height / self.h, fc=_SHADE, ec="none", zorder=-1))

    def title(self, text: str, subtitle: str | None = None) -> float:
        self.text(_MARGIN_IN, 0.85, text, fontsize=15, weight="bold", color=_ACCENT)
        y = 0.85
        if subtitle:
            y += 0.3
            self.text(_MARGIN_IN, y, subtitle, fontsize=9.5, color=_GREY)
        self.rule(y + 0.15, color=_ACCENT, lw=1.0)
        return y + 0.45

    def footer(self, label: str, number: int, total: int) -> None:
        self.rule(self.h - 0.55, lw=0.4)
        self.text(_MARGIN_IN, self.h - 0.38, label, fontsize=7, color=_GREY)
        self.text(self.w - _MARGIN_IN, self.h - 0.38, f"page {number} of {total}", fontsize=7, color=_GREY,
                  ha="right")


def _wrap(text: str, width: int) -> list[str]:
    return textwrap.wrap(" ".join(str(text).split()), width=width) or [""]


def _key_values(page: _Page, y: float, items: list[tuple[str, str]], *, x_key: float = _MARGIN_IN,
                x_val: float = _MARGIN_IN + 1.55, fontsize: float = 9, step: float = 0.21, width: int = 80) -> float:
    """Two columns, key and value; values wrap. Returns the y below the block."""
    for key, value in items:
        lines = [value] if isinstance(value, _Math) else _wrap(value, width)
        page.text(x_key, y, key, fontsize=fontsize, color=_GREY)
        for line in lines:
            page.text(x_val, y, line, fontsize=fontsize)
            y += step
    return y


def _table(page: _Page, y: float, columns: list[tuple[str, float, str]], rows: list[list[str]], *,
           fontsize: float = 7.5, step: float = 0.205, highlight: set[int] | None = None) -> float:
    """Columns of (header, width_in, align) from the left margin; returns the y below the table."""
    xs = []
    x = _MARGIN_IN
    for _, width, align in columns:
        xs.append(x + (width - 0.05 if align == "right" else (width / 2 if align == "center" else 0.06)))
        x += width
    right = x
    for (head, _, align), xx in zip(columns, xs):
        page.text(xx, y, head, fontsize=fontsize, weight="bold", ha=align)
    page.rule(y + 0.07, x1=right, color=_INK, lw=0.6)
    y += step + 0.04
    for i, row in enumerate(rows):
        if i % 2 == 1:
            page.shade(y - step + 0.055, step, x1=right)
        bold = highlight is not None and i in highlight
        for (_, _, align), xx, cell in zip(columns, xs, row):
            page.text(xx, y, cell, fontsize=fontsize, ha=align, weight="bold" if bold else "normal")
        y += step
    page.rule(y - step + 0.09, x1=right, color=_INK, lw=0.6)
    return y + 0.1


# --------------------------------------------------------------------------- #
# Pages
# --------------------------------------------------------------------------- #


def _k_line(analysis) -> str:
    k, sk, source = index_camera_constant(analysis)
    if not k:
        return "none (no calibration and no zone-axis match)"
    rel = f" ({format_sig(100 * sk / k, 2)} %)" if sk else ""
    return f"K = {format_value_sigma(k, sk)} px·Å{rel}, {source}"


def _phase_zone_line(analysis) -> str:
    cand = analysis.candidate
    if cand is None:
        return describe_unindexed(analysis)
    n = len(analysis.match.candidates)
    rank = min(max(analysis.chosen_candidate, 0), n - 1) + 1
    four = getattr(cand, "zone_four_index", None)
    signed = f"[{_signed(four)}] = [{_signed(cand.zone)}]" if four is not None else f"[{_signed(cand.zone)}]"
    return _Math(f"{escape_dollars(cand.phase)}, zone axis {zone_mathtext(cand)}  (as integers {signed}); "
                 f"candidate {rank} of {n}, score {float(cand.score):.3f}")


def _page_pattern(page: _Page, analysis) -> None:
    img = analysis.image
    name = image_label(analysis)
    y = page.title("Electron diffraction pattern", name)
    items = []
    shape = getattr(img, "shape", None)
    items.append(("Image", f"{name}" + (f" ({shape[0]} × {shape[1]} px, {img.dtype})" if shape else "")))
    items.append(("Analysed", str(analysis.created)))
    items.append(("Phase and zone", _phase_zone_line(analysis)))
    items.append(("Camera constant", _k_line(analysis)))
    info = summarize_calibration(getattr(analysis, "calibration", None), image=img)
    if info is not None:
        what = {"fitted": "fitted", "library": "from the library", "entered": "entered by hand"}.get(info.source,
                                                                                                 info.source)
        bits = [what] + [b for b in (info.name, info.standard and f"standard {info.standard}", info.date) if b]
        items.append(("Calibration", ", ".join(bits)))
    c = pick_centre(analysis, prefer_lattice=analysis.candidate is not None)
    if c is not None:
        items.append(("Centre", f"x = {format_value_sigma(c.x, c.sigma_x)}, y = {format_value_sigma(c.y, c.sigma_y)}"
                                f" px ({c.source})"))
    n_spots = len(analysis.spots or ())
    n_rings = len(getattr(getattr(analysis, "ring_fit", None), "rings", ()) or ())
    if not n_rings and info is not None and is_calibration_of_image(analysis):
        n_rings = len(info.rings) + len(info.unassigned_radii_px)
    counts = [f"{n_spots} spot(s)" if n_spots else None, f"{n_rings} ring(s)" if n_rings else None]
    if any(counts):
        items.append(("Measured", ", ".join(c for c in counts if c)))
    y = _key_values(page, y, items, fontsize=9, width=78)

    # the pattern, as large as fits above the caution
    top, bottom = y + 0.1, page.h - 1.45
    avail_w, avail_h = page.w - 2 * _MARGIN_IN, bottom - top
    rows, cols = shape
    scale = min(avail_w / cols, avail_h / rows)
    w_in, h_in = cols * scale, rows * scale
    x0 = (page.w - w_in) / 2
    ax = page.fig.add_axes((page.fx(x0), page.fy(top + h_in), w_in / page.w, h_in / page.h))
    unit = max(w_in, h_in) * page.fig.dpi / 800.0
    _draw_pattern(ax, analysis, overlays=("centre", "spots", "rings", "ellipse", "grid", "labels", "scalebar"),
                  display="log", unit=unit, max_side_px=int(2 * max(w_in, h_in) * 150))
    y = top + h_in + 0.3
    for line in _wrap("Caution: " + CAUTION, 118):
        page.text(_MARGIN_IN, y, line, fontsize=7.5, color=_INK, style="italic")
        y += 0.16


_TABLE_COLUMNS = [  # widths (inches) add up to the 6.87 in between the A4 margins
    ("", 0.32, "left"), ("#", 0.25, "right"), ("x (px)", 0.5, "right"), ("y (px)", 0.5, "right"),
    ("R (px)", 0.88, "right"), ("d ± σ (Å)", 0.9, "right"), ("σ stat, sys", 0.88, "right"),
    ("|g| (nm⁻¹)", 0.66, "right"), ("(hkl)", 0.55, "center"),
    ("intensity", 0.55, "right"), ("SNR", 0.38, "right"), ("Δd (%)", 0.45, "right"),
]


def _table_rows(analysis, table) -> list[list[str]]:
    hexagonal = is_hexagonal(analysis.candidate)
    out = []
    for r in table.rows:
        def num(key, fmt):
            return _fmt(r.get(key), fmt)

        hkl = r.get("hkl")
        label = ""
        if hkl is not None:
            label = _Math(index_mathtext(hkl, hexagonal=hexagonal and r["feature"] == "spot",
                                         brackets="{}" if r["feature"] == "ring" else "()")
                          + ("*" if r.get("double_diffraction") else ""))
        out.append([
            r["feature"], str(r["index"]), num("x_px", ".2f"), num("y_px", ".2f"),
            format_value_sigma(r["R_px"], r["R_sigma_px"], max_decimals=3) if finite(r["R_px"]) is not None else "",
            format_value_sigma(r["d_A"], r["d_sigma_A"], max_decimals=5) if finite(r["d_A"]) is not None else "",
            (f"{format_sig(r['d_stat_sigma_A'], 2)}, {format_sig(r['d_sys_sigma_A'], 2)}"
             if finite(r["d_A"]) is not None else ""),
            num("g_per_nm", ".3f"), label, _fmt_intensity(r.get("intensity")), num("snr", ".1f"),
            num("d_error_pct", ".2f"),
        ])
    return out


def _page_table(page: _Page, analysis, rows: list[list[str]], part: int, parts: int, table) -> None:
    sub = f"{image_label(analysis)}" + (f" — part {part} of {parts}" if parts > 1 else "")
    y = page.title("Measurements", sub)
    if part == 1:
        c = pick_centre(analysis, prefer_lattice=analysis.candidate is not None)
        notes = [f"Spacings: {_k_line(analysis)}."]
        if c is not None:
            notes.append(f"Centre: x = {format_value_sigma(c.x, c.sigma_x)}, y = {format_value_sigma(c.y, c.sigma_y)}"
                         f" px ({c.source}); R is corrected for the elliptical distortion.")
        notes.append("d = K / R (camera equation R·d = λL), |g| = 1/d; ± is the total standard uncertainty: the "
                     "statistical part (positions, centre, fit of K) and the systematic part (reproducibility "
                     "of K) in quadrature, both in the column beside it; "
                     "Δd = (measured − predicted) / predicted; * kinematically forbidden (double diffraction).")
        for n in notes:
            for line in _wrap(n, 120):
                page.text(_MARGIN_IN, y, line, fontsize=7.5, color=_GREY)
                y += 0.17
        y += 0.15
    _table(page, y, _TABLE_COLUMNS, rows, fontsize=7.0)


def _page_calibration(page: _Page, analysis) -> None:
    info = summarize_calibration(getattr(analysis, "calibration", None), image=getattr(analysis, "image", None))
    own_profile = info is not None and getattr(info, "profile", None) is not None
    title = "Calibration" if own_profile else ("Radial profile and calibration" if info is not None
                                               else "Radial profile")
    y = page.title(title, image_label(analysis))
    items: list[tuple[str, str]] = []
    if info is not None:
        from saedkit.core.calibration.camera import camera_terms

        t = camera_terms(analysis.calibration)
        k = t.camera_constant_px_A
        fit = format_value_sigma(k, t.stat_sigma_px_A) if t.stat_sigma_px_A > 0 else f"{k:g}"
        items.append(("Camera constant", f"K = {format_value_sigma(k, t.total_sigma_px_A)} px·Å (total "
                                         f"{format_sig(100 * t.total_sigma_px_A / k, 2)} %): fit K = {fit}, "
                                         f"reproducibility {format_sig(t.reproducibility_pct, 2)} % = "
                                         f"{format_sig(t.sys_sigma_px_A, 2)} px·Å"))
        e = info.ellipse
        items.append(("Ellipse", f"ellipticity {format_value_sigma(100 * e.ellipticity, None if info.ellipticity_sigma is None else 100 * info.ellipticity_sigma)} %, "
                                 f"major axis {format_value_sigma(e.major_axis_deg, info.major_axis_sigma_deg, max_decimals=2)}°"))
        if info.standard:
            items.append(("Standard", info.standard))
        if info.voltage_kv:
            items.append(("Voltage", f"{info.voltage_kv:g} kV"
                                     + (f" (λ = {info.wavelength_A:.6f} Å)" if info.wavelength_A else "")))
        if info.pixel_size_um:
            items.append(("Pixel size", f"{info.pixel_size_um:g} µm"))
        if info.lambda_L_mm_A:
            items.append(("λL", f"{format_value_sigma(info.lambda_L_mm_A, info.lambda_L_sigma_mm_A)} mm·Å"))
        if info.camera_length_mm:
            items.append(("Camera length", f"{format_value_sigma(info.camera_length_mm, info.camera_length_sigma_mm)} mm"
                                           " (from K, the pixel size and λ)"))
        if info.unassigned_radii_px:
            items.append(("Not assigned", ", ".join(f"{r:.2f}" for r in info.unassigned_radii_px)
                          + " px (rings that no reflection of the standard explains)"))
        if info.name or info.date:
            items.append(("Name, date", ", ".join(str(b) for b in (info.name, info.date) if b)))
        cal_sha = getattr(analysis.calibration, "image_sha256", None)
        if is_calibration_of_image(analysis):
            items.append(("Fitted on", "this image"))
        elif cal_sha:
            items.append(("Fitted on", f"another image, SHA-256 {cal_sha}"))
        if info.quality:
            items.append(("Quality", info.quality))
        for w in info.warnings:
            items.append(("Warning", w))
    else:
        items.append(("Camera constant", "none: ring radii in pixels only"))
    y = _key_values(page, y, items, fontsize=9, width=80)
    parts = _profile_parts(analysis)
    assigned = parts[1] if parts is not None else []
    # profile and residuals in the rest of the page (ring table below when it fits)
    n_tab = len(assigned) if assigned else 0
    table_h = (0.3 + 0.2 * (n_tab + 1)) if 0 < n_tab <= 16 else 0.0
    top = y + 0.45
    bottom = page.h - 0.9 - table_h
    res_h = 1.3 if assigned else 0.0
    main_h = max(bottom - top - res_h - 0.55, 2.0)
    left, width = _MARGIN_IN + 0.45, page.w - 2 * _MARGIN_IN - 0.5
    rect_main = (page.fx(left), page.fy(top + main_h), width / page.w, main_h / page.h)
    rect_res = (page.fx(left), page.fy(top + main_h + 0.1 + res_h), width / page.w, res_h / page.h) if assigned else None
    draw_profile(page.fig, rect_main, rect_res, analysis, unit=1.0)
    if table_h:
        y = top + main_h + 0.1 + res_h + 0.65
        cols = [("{hkl}", 0.8, "center"), ("d standard (Å)", 1.15, "right"), ("R (px)", 1.1, "right"),
                ("residual (px)", 1.0, "right"), ("residual (%)", 0.95, "right"), ("multiplicity", 0.9, "right")]
        rows = []
        for a in assigned:
            rows.append([
                _Math("+".join(index_mathtext(h, brackets="{}")
                               for h in (a.hkl, *(getattr(a, "blend", ()) or ()))))
                if getattr(a, "hkl", None) is not None else "",
                _fmt(getattr(a, "d_A", None), ".5f"),
                format_value_sigma(getattr(a, "radius_px", None), getattr(a, "radius_sigma_px", None), max_decimals=3),
                _fmt(getattr(a, "residual_px", None), ".3f"), _fmt(getattr(a, "residual_pct", None), ".3f"),
                _fmt(getattr(a, "multiplicity", None), ".0f"),
            ])
        _table(page, y, cols, rows)


def _fmt(v: Any, fmt: str) -> str:
    f = finite(v)
    if f is None:
        return ""
    text = format(f, fmt)
    if text.startswith("-") and not text.strip("-0.") and "e" not in text:
        text = text[1:]  # no "-0.00"
    return text


def _fmt_intensity(v: Any) -> str:
    f = finite(v)
    if f is None:
        return ""
    return f"{f:.0f}" if abs(f) >= 1000 else f"{f:.4g}"


def _page_candidates(page: _Page, analysis) -> None:
    match = analysis.match
    y = page.title("Zone-axis candidates", image_label(analysis))
    items = [("Phases searched", ", ".join(map(str, getattr(match, "phases", ()) or ())) or "—"),
             ("Camera constant", "given (calibrated match)" if getattr(match, "calibrated", False)
              else "fitted for each candidate (spacing ratios and angles only)")]
    tol = getattr(match, "tolerances", None) or {}
    if tol:
        items.append(("Tolerances", ", ".join(f"{k} {v}" for k, v in tol.items())))
    lat = getattr(match, "lattice", None)
    if lat is not None:
        text = (f"|g1| = {lat.r1_px:.2f} px, |g2| = {lat.r2_px:.2f} px, angle {lat.angle_deg:.2f}°")
        if getattr(lat, "d1_A", None) is not None and getattr(lat, "d2_A", None) is not None:
            text += f"; d1 = {lat.d1_A:.4f} Å, d2 = {lat.d2_A:.4f} Å"
        rms = finite(getattr(lat, "residual_rms_px", None))
        if rms is not None:
            text += f"; lattice residual {rms:.3f} px rms"
        items.append(("Spot lattice", text))
    y = _key_values(page, y, items, fontsize=9, width=80) + 0.2
    cands = list(getattr(match, "candidates", ()) or ())
    chosen = min(max(analysis.chosen_candidate, 0), len(cands) - 1) if cands else -1
    cols = [("", 0.22, "left"), ("rank", 0.4, "right"), ("phase", 0.95, "left"), ("zone", 1.0, "center"),
            ("score", 0.55, "right"), ("Δd (%)", 0.6, "right"), ("Δangle (°)", 0.75, "right"),
            ("rotation (°)", 0.85, "right"), ("K (px·Å)", 1.05, "right"), ("explained", 0.72, "right")]
    rows = []
    for i, c in enumerate(cands):
        rows.append([
            "▶" if i == chosen else "", str(i + 1), str(c.phase), _Math(zone_mathtext(c)), _fmt(c.score, ".3f"),
            _fmt(c.d_error_pct, ".2f"), _fmt(c.angle_error_deg, ".2f"), _fmt(c.in_plane_rotation_deg, ".1f"),
            format_value_sigma(c.camera_constant_px_A, c.camera_constant_sigma_px_A, max_decimals=3),
            f"{c.n_explained}/{c.n_spots}",
        ])
    if rows:
        y = _table(page, y, cols, rows, highlight={chosen})
    else:
        page.text(_MARGIN_IN, y, "No zone axis of the phases searched explains the spots within the tolerances.",
                  fontsize=9)
        y += 0.3
    y += 0.1
    notes: list[str] = []
    if cands:
        c = cands[chosen]
        if getattr(c, "n_missing_strong", 0):
            notes.append(f"{c.n_missing_strong} strong predicted reflection(s) of the chosen candidate are not seen.")
        notes.extend(str(n) for n in (getattr(c, "notes", ()) or ()))
    notes.extend(str(n) for n in (getattr(match, "notes", ()) or ()))
    notes.append(CAUTION)
    page.text(_MARGIN_IN, y, "Notes", fontsize=9, weight="bold")
    y += 0.22
    for n in dict.fromkeys(notes):  # unique, in order
        for j, line in enumerate(_wrap(n, 105)):
            page.text(_MARGIN_IN + (0.0 if j == 0 else 0.15), y, ("• " if j == 0 else "") + line, fontsize=8.5)
            y += 0.18
        y += 0.04


def _short_numbers(v: Any) -> Any:
    if isinstance(v, float):
        return float(f"{v:.6g}")
    if isinstance(v, list):
        return [_short_numbers(x) for x in v]
    if isinstance(v, dict):
        return {k: _short_numbers(x) for k, x in v.items()}
    return v


def _scalar_text(v: Any) -> str:
    v = json_ready(v)
    if isinstance(v, float):
        return f"{v:.6g}"
    if isinstance(v, (list, dict)):
        return json.dumps(_short_numbers(v), ensure_ascii=False)
    return "" if v is None else str(v)


def _page_phase_id(page: _Page, analysis) -> None:
    rec = json_ready(analysis.phase_id.to_dict()) if hasattr(analysis.phase_id, "to_dict") else {}
    y = page.title("Phase identification", image_label(analysis))
    cands = rec.get("candidates", []) if isinstance(rec, dict) else []
    others = {k: v for k, v in rec.items() if k != "candidates"} if isinstance(rec, dict) else {}
    if others:
        y = _key_values(page, y, [(k, _scalar_text(v)) for k, v in others.items()], fontsize=8.5, width=82) + 0.15
    keys: list[str] = []
    for c in cands:
        for k, v in c.items():
            if k not in keys and not isinstance(v, (list, dict)) or k == "phases":
                if k not in keys:
                    keys.append(k)
    keys = keys[:7]
    if cands and keys:
        width = (page.w - 2 * _MARGIN_IN - 0.45) / len(keys)
        cols = [("rank", 0.45, "right")] + [(k.replace("_", " "), width, "left" if k == "phases" else "right")
                                              for k in keys]
        rows = []
        for i, c in enumerate(cands[:40]):
            row = [str(i + 1)]
            for k in keys:
                v = c.get(k)
                row.append(" + ".join(map(str, v)) if isinstance(v, list) else _scalar_text(v))
            rows.append(row)
        _table(page, y, cols, rows, fontsize=7.5)
    else:
        page.text(_MARGIN_IN, y, "No phase explains the measured rings.", fontsize=9)


def _record_lines(analysis) -> list[tuple[str, str, str]]:
    """(style, key, value) lines of the record pages; style "h" heading, "kv" key-value, "p" paragraph."""
    out: list[tuple[str, str, str]] = []
    img = analysis.image
    out.append(("h", "Image", ""))
    if img is not None:
        rec = json_ready(img.to_dict()) if hasattr(img, "to_dict") else {}
        out.append(("kv", "path", str(getattr(img, "source_path", None) or "(array in memory)")))
        out.append(("kv", "sha256", str(getattr(img, "sha256", ""))))
        shape = getattr(img, "shape", None)
        if shape is not None:
            out.append(("kv", "shape", f"{shape[0]} × {shape[1]} (rows × columns)"))
        out.append(("kv", "dtype", str(getattr(img, "dtype", ""))))
        for key in ("pixel_size_um", "voltage_kv", "camera_length_mm", "page", "saturation_value", "masked_fraction"):
            if key in rec:
                out.append(("kv", key, _scalar_text(rec[key]) or "unknown"))
    else:
        out.append(("kv", "image", "none"))
    cand = analysis.candidate
    if cand is not None:
        out.append(("h", "Result", ""))
        out.append(("kv", "phase", str(cand.phase)))
        out.append(("kv", "zone axis [u v w]", _signed(cand.zone)))
        four = getattr(cand, "zone_four_index", None)
        if four is not None:
            out.append(("kv", "zone axis [u v t w]", _signed(four)))
        out.append(("kv", "score", _fmt(cand.score, ".4f")))
        out.append(("kv", "camera constant", _k_line(analysis)))
    out.append(("h", "Software", ""))
    out.append(("kv", "software", software_label()))
    out.append(("kv", "analysed", str(analysis.created)))
    out.append(("kv", "report written", _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")))
    cal = getattr(analysis, "calibration", None)
    if cal is not None and hasattr(cal, "to_dict"):
        out.append(("h", "Calibration", ""))
        rec = json_ready(cal.to_dict())
        for key, value in rec.items():
            if key in ("profile", "rings"):
                if isinstance(value, list):
                    out.append(("kv", key, f"{len(value)} entries (in the JSON record)"))
                continue
            out.append(("kv", key, _scalar_text(value)))
    out.append(("h", "Parameters", ""))
    params = analysis.parameters or {}
    if not params:
        out.append(("kv", "(none)", ""))
    for key, value in params.items():
        out.append(("kv", str(key), _scalar_text(value)))
    out.append(("h", "Caution", ""))
    out.append(("p", "", CAUTION))
    return out


_RECORD_WIDTH = 78


def _record_chunks(analysis) -> list[list[tuple[str, str, str]]]:
    """The record's lines split into pages (each wrapped line counts)."""
    lines = []
    for style, key, value in _record_lines(analysis):
        if style == "kv":
            wrapped = _wrap(value, _RECORD_WIDTH)
            for j, w in enumerate(wrapped):
                lines.append(("kv", key if j == 0 else "", w))
        elif style == "p":
            for w in _wrap(value, _RECORD_WIDTH + 25):
                lines.append(("p", "", w))
        else:
            lines.append((style, key, value))
    pages: list[list[tuple[str, str, str]]] = [[]]
    used = 0.0
    for line in lines:
        h = _RECORD_STEP_IN + (_RECORD_HEADING_GAP_IN if line[0] == "h" else 0.0)
        if used + h > _RECORD_HEIGHT_IN and pages[-1]:
            pages.append([])
            used = 0.0
        pages[-1].append(line)
        used += h
    return pages


def _page_record(page: _Page, analysis, lines, part: int, parts: int) -> None:
    y = page.title("Record", image_label(analysis) + (f" — part {part} of {parts}" if parts > 1 else ""))
    for style, key, value in lines:
        if style == "h":
            y += _RECORD_HEADING_GAP_IN
            page.text(_MARGIN_IN, y, key, fontsize=9.5, weight="bold", color=_ACCENT)
        elif style == "kv":
            page.text(_MARGIN_IN, y, key, fontsize=8, color=_GREY)
            page.text(_MARGIN_IN + 1.95, y, value, fontsize=8)
        else:
            page.text(_MARGIN_IN, y, value, fontsize=8.5, style="italic")
        y += _RECORD_STEP_IN


# --------------------------------------------------------------------------- #
# Planning and writing
# --------------------------------------------------------------------------- #


def plan_pdf_pages(analysis) -> list[tuple[str, Callable[[_Page], None]]]:
    """The pages of the report of ``analysis``, as (kind, draw) pairs, in order.

    Kinds: ``"pattern"``, ``"measurements"``, ``"calibration"``,
    ``"candidates"``, ``"phase-identification"``, ``"record"``.
    """
    pages: list[tuple[str, Callable[[_Page], None]]] = []
    if getattr(analysis, "image", None) is not None:
        pages.append(("pattern", lambda p: _page_pattern(p, analysis)))
    table = calculate_measurement_table(analysis)
    if len(table):
        rows = _table_rows(analysis, table)
        first = TABLE_ROWS_FIRST_PAGE
        chunks = [rows[:first]] + [rows[i:i + TABLE_ROWS_PER_PAGE]
                                   for i in range(first, len(rows), TABLE_ROWS_PER_PAGE)]
        for n, chunk in enumerate(chunks, start=1):
            pages.append(("measurements",
                          lambda p, c=chunk, n=n, t=len(chunks): _page_table(p, analysis, c, n, t, table)))
    if _profile_parts(analysis) is not None:
        pages.append(("calibration", lambda p: _page_calibration(p, analysis)))
    if getattr(analysis, "match", None) is not None:
        pages.append(("candidates", lambda p: _page_candidates(p, analysis)))
    if getattr(analysis, "phase_id", None) is not None:
        pages.append(("phase-identification", lambda p: _page_phase_id(p, analysis)))
    chunks = _record_chunks(analysis)
    for n, chunk in enumerate(chunks, start=1):
        pages.append(("record", lambda p, c=chunk, n=n, t=len(chunks): _page_record(p, analysis, c, n, t)))
    return pages


def write_pdf_report(analysis, path: str | os.PathLike, *, progress: ProgressFn | None = None) -> Path:
    """Write the multi-page PDF report of ``analysis``, atomically.

    Parameters
    ----------
    analysis : Analysis
    path : str or path
    progress : callable(done, total), optional
        Called after each page.

    Returns
    -------
    Path
        ``path``.

    Notes
    -----
    See the module notes for the pages. The PDF's Title names the image and
    its Creator is ``saedkit <version>``.

    Examples
    --------
    >>> write_pdf_report(analysis, "grain_report.pdf")  # doctest: +SKIP
    """
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.backends.backend_pdf import PdfPages
    from matplotlib.figure import Figure

    plan = plan_pdf_pages(analysis)
    total = len(plan)
    label = f"{software_label()} · {image_label(analysis)}"
    cand = analysis.candidate
    subject = "Selected-area electron diffraction: measurements"
    if cand is not None:
        subject += f"; {cand.phase} {zone_text(cand)}"
    metadata = {
        "Title": f"Diffraction pattern report: {image_label(analysis)}",
        "Creator": software_label(),
        "Subject": subject,
        "Keywords": "electron diffraction, SAED, d-spacing, camera constant, zone axis",
        "CreationDate": _dt.datetime.now(_dt.timezone.utc),
    }

    def _write(tmp: str) -> None:
        with matplotlib.rc_context(RC):
            with PdfPages(tmp, metadata=metadata) as pdf:
                for i, (_, draw) in enumerate(plan, start=1):
                    fig = Figure(figsize=PAGE_SIZE_IN, dpi=100)
                    FigureCanvasAgg(fig)  # the label placer measures text with it
                    page = _Page(fig)
                    draw(page)
                    page.footer(label, i, total)
                    pdf.savefig(fig)
                    if progress is not None:
                        progress(i, total)

    return write_with_atomic(path, _write)
