"""The annotated pattern (PNG, SVG) and the radial-profile figure.

matplotlib is used through :class:`matplotlib.figure.Figure` with the Agg
canvas only: never ``pyplot``, so no window system is touched and nothing
global changes. Text is DejaVu Sans (matplotlib's own font), which draws the
combining overbars of negative indices.

Overlays (any subset, drawn in this order):

``mask``      excluded pixels, tinted
``rings``     fitted rings as ellipses, labelled {hkl} or d
``ellipse``   major and minor axes of the elliptical distortion
``grid``      predicted reflections of the chosen zone-axis candidate (marker
              area grows with the kinematic intensity; crosses for
              kinematically forbidden ones)
``spots``     measured spots (circles)
``centre``    the pattern centre
``labels``    (hkl) beside predicted reflections (or row numbers beside spots
              when nothing is indexed), the phase and zone axis in a corner,
              and a legend
``scalebar``  a reciprocal-space scale bar in nm⁻¹ (needs a camera constant)
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from saedkit.core._atomic import write_with_atomic
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import InputError
from saedkit.core.presentation.marker_style import MARKER_COLOURS
from saedkit.report._common import (
    describe_unindexed,
    finite,
    format_sig,
    format_value_sigma,
    identified_rings,
    image_label,
    index_camera_constant,
    is_calibration_of_image,
    is_hexagonal,
    pick_centre,
    pick_ellipse,
    software_label,
    summarize_calibration,
)

__all__ = [
    "OVERLAYS",
    "DEFAULT_OVERLAYS",
    "DISPLAY_MODES",
    "FIGURE_DPI",
    "render_pattern_figure",
    "write_pattern_figure",
    "render_profile_figure",
    "calculate_display_array",
    "draw_profile",
    "index_mathtext",
    "zone_mathtext",
    "escape_dollars",
    "COLOURS",
]

#: Every overlay :func:`render_pattern_figure` can draw.
OVERLAYS = ("mask", "rings", "ellipse", "grid", "spots", "centre", "labels", "scalebar")
#: The overlays drawn by default.
DEFAULT_OVERLAYS = ("centre", "spots", "rings", "ellipse", "grid", "labels", "scalebar")
#: Grey-level mappings of the pattern.
DISPLAY_MODES = ("log", "gamma", "linear")
#: Dots per inch of a figure as built; a PNG written at this dpi has ``size_px`` pixels.
FIGURE_DPI = 100
#: Long side of the figure in pixels when ``size_px`` is not given: the image's, within these limits.
_DEFAULT_SIZE_LIMITS_PX = (800, 1600)

# Colours of saedkit's overlays, the same as on screen (core/presentation/marker_style.py): the report shows what the user saw
COLOURS = {
    "spot": MARKER_COLOURS["spot_auto"],  # measured spots
    "grid": MARKER_COLOURS["predicted"],  # predicted reflections
    "forbidden": MARKER_COLOURS["forbidden"],  # kinematically forbidden reflections
    "centre": MARKER_COLOURS["centre"],
    "ring": MARKER_COLOURS["rings"],  # fitted rings
    "ellipse": MARKER_COLOURS["ellipse"],  # distortion axes
    "mask": MARKER_COLOURS["mask"],  # excluded pixels: blue tint
    "text": "#ffffff",
    "outline": "#000000",
}

# rcParams used for every figure of the report (set only inside rc_context).
RC = {
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans"],
    "pdf.fonttype": 42,  # TrueType: text stays text (searchable, editable)
    "ps.fonttype": 42,
    "svg.fonttype": "none",  # SVG text as text elements, editable in a drawing program
    "axes.unicode_minus": True,
    "image.interpolation": "antialiased",
    "savefig.facecolor": "white",
}

_REFERENCE_SIZE_PX = 800.0  # font and marker sizes are given for a figure of this size


# --------------------------------------------------------------------------- #
# Grey levels
# --------------------------------------------------------------------------- #


def _block_reduce(a: np.ndarray, f: int, func) -> np.ndarray:
    if f <= 1:
        return a
    rows, cols = a.shape
    pr, pc = (-rows) % f, (-cols) % f
    if pr or pc:
        a = np.pad(a, ((0, pr), (0, pc)), mode="edge")
    r2, c2 = a.shape[0] // f, a.shape[1] // f
    return func(a.reshape(r2, f, c2, f), axis=(1, 3))


def calculate_display_array(data, mask=None, *, display: str = "log", max_side_px: int | None = None,
                            gamma: float = 0.5, settings=None) -> np.ndarray:
    """Grey levels 0–1 of a pattern for display: the screen's own mapping (:mod:`saedkit.core.presentation.display`).

    Parameters
    ----------
    data : (rows, cols) array
    mask : bool array, optional
        Excluded pixels (left out of the percentiles).
    display : {"log", "gamma", "linear"}
        The curve, with the screen's default limits (0.5th to 99.9th
        percentile); ignored when ``settings`` is given.
    max_side_px : int, optional
        Block-average the levels down to at most about this size.
    settings : saedkit.core.presentation.display.DisplaySettings, optional
        The display the user chose on screen (curve, gamma, limits).

    Returns
    -------
    (rows', cols') float32 array in [0, 1]
    """
    from saedkit.core.presentation.display import DisplaySettings, calculate_display_fraction

    if settings is None:
        if display not in DISPLAY_MODES:
            raise InputError(f"display must be one of {', '.join(DISPLAY_MODES)}, got {display!r}")
        settings = DisplaySettings(mapping=display, gamma=float(gamma))
    a = np.asarray(data, dtype=np.float32)
    out = calculate_display_fraction(a, settings, mask=None if mask is None else np.asarray(mask, bool))
    if max_side_px is not None and max(a.shape) > max_side_px:
        out = _block_reduce(out, int(math.ceil(max(a.shape) / max_side_px)), np.mean)
    return np.clip(out, 0, 1).astype(np.float32)


def _shown_display(analysis):
    """The display the user saw (saved by the window in ``analysis.parameters["display"]``), or None."""
    d = (getattr(analysis, "parameters", None) or {}).get("display")
    if not isinstance(d, dict):
        return None
    from saedkit.core.presentation.display import DisplaySettings

    try:
        return DisplaySettings.from_dict(d)
    except (TypeError, ValueError):
        return None


def _colour_map(settings):
    """The screen's colour table as a matplotlib colour map ("gray" without settings)."""
    if settings is None:
        return "gray"
    from matplotlib.colors import ListedColormap

    from saedkit.core.presentation.display import calculate_colour_table

    table = calculate_colour_table(settings.colour_map, invert=settings.invert)
    rgb = np.array([[(v >> 16) & 255, (v >> 8) & 255, v & 255] for v in table], float) / 255.0
    return ListedColormap(rgb)


# --------------------------------------------------------------------------- #
# Label placement without overlaps
# --------------------------------------------------------------------------- #


class _Labeller:
    """Place text labels next to points, skipping positions that overlap earlier labels or markers."""

    def __init__(self, ax, *, pad_px: float = 1.0):
        self.ax = ax
        self.renderer = ax.figure.canvas.get_renderer()
        self.axbox = ax.get_window_extent(self.renderer)
        self.placed: list = []
        self.obstacles: list = []  # (bbox, key)
        self.pad = pad_px

    def add_markers(self, xy: np.ndarray, radius_pt: float | np.ndarray, keys: Sequence) -> None:
        from matplotlib.transforms import Bbox

        if len(xy) == 0:
            return
        disp = self.ax.transData.transform(np.asarray(xy, float))
        r = np.broadcast_to(np.asarray(radius_pt, float), (len(disp),)) * self.ax.figure.dpi / 72.0
        for (x, y), rr, k in zip(disp, r, keys):
            self.obstacles.append((Bbox.from_extents(x - rr, y - rr, x + rr, y + rr), k))

    def add_artist_box(self, artist) -> None:
        """Keep labels off an artist already drawn (a corner label, the legend, the scale bar)."""
        try:
            self.placed.append(artist.get_window_extent(self.renderer))
        except Exception:  # noqa: BLE001 - an artist without an extent is no obstacle
            pass

    def _free(self, bb, key) -> bool:
        inside = (bb.x0 >= self.axbox.x0 and bb.x1 <= self.axbox.x1 and bb.y0 >= self.axbox.y0
                  and bb.y1 <= self.axbox.y1)
        if not inside:
            return False
        if any(bb.overlaps(p) for p in self.placed):
            return False
        return not any(k != key and bb.overlaps(o) for o, k in self.obstacles)

    def place(self, xy, text: str, *, offsets_pt: Sequence[tuple[float, float]], key=None, **kw):
        """Try each offset in turn; keep the first label that fits. Returns the Text or None."""
        x, y = xy
        for dx, dy in offsets_pt:
            ha = "center" if dx == 0 else ("left" if dx > 0 else "right")
            va = "center" if dy == 0 else ("bottom" if dy > 0 else "top")
            t = self.ax.annotate(text, (x, y), xytext=(dx, dy), textcoords="offset points", ha=ha, va=va,
                                 annotation_clip=False, **kw)
            bb = t.get_window_extent(self.renderer).expanded(1.0, 1.0).padded(self.pad)
            if self._free(bb, key):
                self.placed.append(bb)
                return t
            t.remove()
        return None


def index_mathtext(idx, *, brackets: str = "()", hexagonal: bool = False) -> str:
    """Indices as matplotlib mathtext with a clear overline over each negative index, e.g. ``$\\overline{1}11$``.

    The combining overbar of :func:`~saedkit.core.crystallography.crystal.format_indices` sits
    too close to the digit at label sizes (it reads as "I"); mathtext draws a
    bar with a gap. Two neighbouring negative indices get a thin space so
    their bars stay apart; indices above 9 are separated by spaces.
    """
    from saedkit.core.crystallography.crystal import to_four_index_plane

    vals = [int(v) for v in idx]
    if hexagonal and len(vals) == 3:
        vals = list(to_four_index_plane(vals))
    wide = any(abs(v) > 9 for v in vals)
    body = ""
    for i, v in enumerate(vals):
        if i:
            if wide:
                body += r"\;"
            elif v < 0 and vals[i - 1] < 0:
                body += r"\,"
        body += rf"\overline{{{abs(v)}}}" if v < 0 else str(v)
    left, right = (brackets[0], brackets[1]) if brackets else ("", "")
    esc = {"{": r"\{", "}": r"\}"}
    return f"${esc.get(left, left)}{body}{esc.get(right, right)}$"


def escape_dollars(text: str) -> str:
    """Text with ``$`` escaped, so that matplotlib does not read it as mathtext."""
    return str(text).replace("$", r"\$")


def zone_mathtext(candidate) -> str:
    four = getattr(candidate, "zone_four_index", None)
    text = index_mathtext(candidate.zone, brackets="[]")
    if four is not None:
        text = f"{index_mathtext(four, brackets='[]')} = {text}"
    return text


def _outline(unit: float):
    from matplotlib import patheffects

    return [patheffects.withStroke(linewidth=1.6 * unit, foreground=COLOURS["outline"])]


def _nice_step(x: float) -> float:
    """The largest 1, 2 or 5 × 10ⁿ not above ``x``."""
    if x <= 0 or not math.isfinite(x):
        return 0.0
    e = math.floor(math.log10(x))
    for m in (5, 2, 1):
        if m * 10**e <= x:
            return m * 10.0**e
    return 10.0 ** (e - 1) * 5


# --------------------------------------------------------------------------- #
# Drawing the pattern
# --------------------------------------------------------------------------- #


def _check_overlays(overlays) -> tuple[str, ...]:
    if isinstance(overlays, str):
        overlays = (overlays,)
    out = tuple(overlays)
    bad = [o for o in out if o not in OVERLAYS]
    if bad:
        raise InputError(f"unknown overlay(s) {', '.join(map(repr, bad))}; choose from {', '.join(OVERLAYS)}")
    return out


def _ring_sources(analysis):
    """(centre_xy, ellipse, [(radius_px, hkl or None)]) of the rings to draw, or None.

    A ring takes the (hkl) of the calibration's assignment, else that of the
    best phase identification.
    """
    out = _ring_sources_raw(analysis)
    if out is None:
        return None
    centre, ellipse, items = out
    info = summarize_calibration(getattr(analysis, "calibration", None))
    k = info.camera_constant_px_A if info is not None else None
    identified = identified_rings(getattr(analysis, "phase_id", None)) if k else []
    if identified:
        named = []
        for r, hkl in items:
            if hkl is None and r > 0:
                d = k / r
                d_m, m = min(identified, key=lambda t: abs(t[0] - d))
                if abs(d_m - d) <= 5e-3 * d:  # the same ring (0.5 %)
                    hkl = tuple(int(v) for v in m.hkl)
            named.append((r, hkl))
        items = named
    return centre, ellipse, items


def _ring_sources_raw(analysis):
    ring_fit = getattr(analysis, "ring_fit", None)
    own = is_calibration_of_image(analysis)
    info = summarize_calibration(getattr(analysis, "calibration", None)) if own else None
    assigned = [a for a in (info.rings if info is not None else ()) if finite(getattr(a, "radius_px", None))]
    if ring_fit is not None and getattr(ring_fit, "rings", None):
        c = ring_fit.centre
        centre = (float(c.x), float(c.y))
        ellipse = ring_fit.ellipse if isinstance(ring_fit.ellipse, Ellipse) else NO_DISTORTION
        radii = [float(r.radius_px) for r in ring_fit.rings]
        labels = []
        for r in radii:
            hkl = None
            if assigned:
                a = min(assigned, key=lambda a: abs(float(a.radius_px) - r))
                if abs(float(a.radius_px) - r) <= 1.0:
                    hkl = getattr(a, "hkl", None)
            labels.append(hkl)
        return centre, ellipse, list(zip(radii, labels))
    if assigned or (info is not None and info.unassigned_radii_px):
        centre = info.centre_xy
        if centre is None:
            c = pick_centre(analysis)
            if c is None:
                return None
            centre = (c.x, c.y)
        items = [(float(a.radius_px), getattr(a, "hkl", None)) for a in assigned]
        items += [(float(r), None) for r in info.unassigned_radii_px]
        return centre, info.ellipse, sorted(items, key=lambda t: t[0])
    return None


def _draw_pattern(ax, analysis, *, overlays: Sequence[str], display: str, unit: float,
                  max_side_px: int) -> dict:
    """Draw the pattern and overlays into ``ax`` (whose figure has an Agg canvas). Returns a summary."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Ellipse as EllipsePatch
    from matplotlib.patches import Rectangle

    img = analysis.image
    rows, cols = img.shape
    mask = getattr(img, "mask", None)
    shown = _shown_display(analysis)
    grey = calculate_display_array(img.data, mask, display=display, max_side_px=max_side_px, settings=shown)
    extent = (-0.5, cols - 0.5, rows - 0.5, -0.5)
    ax.imshow(grey, cmap=_colour_map(shown), vmin=0, vmax=1, extent=extent, origin="upper", interpolation="antialiased")
    ax.set_xlim(-0.5, cols - 0.5)
    ax.set_ylim(rows - 0.5, -0.5)
    ax.set_axis_off()
    ax.set_aspect("equal")

    fs = 8.5 * unit  # label font size, pt
    text_kw = {"color": COLOURS["text"], "fontsize": fs, "path_effects": _outline(unit)}
    labeller = _Labeller(ax, pad_px=1.0 * unit)
    legend: list = []
    summary: dict[str, Any] = {"n_grid_labels": 0, "n_ring_labels": 0, "scalebar_per_nm": None}
    cand = analysis.candidate
    hexagonal = is_hexagonal(cand)

    if "mask" in overlays and mask is not None and np.any(mask):
        m = np.asarray(mask, bool)
        if max(m.shape) > max_side_px:
            m = _block_reduce(m, int(math.ceil(max(m.shape) / max_side_px)), np.any)
        rgba = np.zeros(m.shape + (4,), np.float32)
        rgba[m] = (*_rgb(COLOURS["mask"]), 0.35)
        ax.imshow(rgba, extent=extent, origin="upper", interpolation="nearest")
        legend.append(Rectangle((0, 0), 1, 1, fc=COLOURS["mask"], alpha=0.5, label="excluded"))

    # --- rings
    rings = _ring_sources(analysis) if ("rings" in overlays or "ellipse" in overlays) else None
    k_used, _, _ = index_camera_constant(analysis)
    info = summarize_calibration(getattr(analysis, "calibration", None), image=img)
    k_rings = info.camera_constant_px_A if info is not None else None
    ring_label_jobs = []
    if rings is not None and "rings" in overlays:
        (cx, cy), ell, items = rings
        for r, hkl in items:
            w, h = 2 * r * (1 + ell.ellipticity / 2), 2 * r * (1 - ell.ellipticity / 2)
            ax.add_patch(EllipsePatch((cx, cy), w, h, angle=ell.major_axis_deg, fill=False,
                                      ec=COLOURS["ring"], lw=0.9 * unit, alpha=0.85))
            if hkl is not None:
                ring_label_jobs.append((r, index_mathtext(hkl, brackets="{}")))
            elif k_rings:
                ring_label_jobs.append((r, f"{k_rings / r:.3f} Å"))
        if items:
            legend.append(Line2D([], [], color=COLOURS["ring"], lw=1.2 * unit, label="fitted ring"))

    # --- ellipse axes
    ell = pick_ellipse(analysis)
    centre = pick_centre(analysis, prefer_lattice=cand is not None)
    if "ellipse" in overlays and ell.ellipticity > 1e-4 and centre is not None:
        r_ext = max((r for r, _ in rings[2]), default=0.0) if rings is not None else 0.0
        r_ext = r_ext * 1.08 if r_ext > 0 else 0.3 * min(rows, cols)
        phi = math.radians(ell.major_axis_deg)
        for ang, style, scale in ((phi, "--", 1 + ell.ellipticity / 2), (phi + math.pi / 2, ":", 1 - ell.ellipticity / 2)):
            dx, dy = math.cos(ang) * r_ext * scale, math.sin(ang) * r_ext * scale
            ax.plot([centre.x - dx, centre.x + dx], [centre.y - dy, centre.y + dy], ls=style,
                    color=COLOURS["ellipse"], lw=0.9 * unit, alpha=0.9)
        legend.append(Line2D([], [], color=COLOURS["ellipse"], ls="--", lw=1.0 * unit,
                             label=f"ellipse axes (e = {100 * ell.ellipticity:.2f} %)"))

    # --- predicted grid
    grid_xy = np.zeros((0, 2))
    grid_pred: list = []
    if cand is not None and "grid" in overlays:
        preds = [p for p in (getattr(cand, "predicted", ()) or ())
                 if -0.5 <= p.x <= cols - 0.5 and -0.5 <= p.y <= rows - 0.5]
        allowed = [p for p in preds if not p.forbidden and p.intensity > 0]
        forbidden = [p for p in preds if p.forbidden or p.intensity <= 0]
        if allowed:
            xy = np.array([[p.x, p.y] for p in allowed])
            inten = np.clip(np.array([p.intensity for p in allowed], float), 0, 1)
            diam = (4.0 + 10.0 * np.sqrt(inten)) * unit
            ax.scatter(xy[:, 0], xy[:, 1], s=diam**2, marker="s", facecolors="none", edgecolors=COLOURS["grid"],
                       linewidths=0.9 * unit, alpha=0.95)
            legend.append(Line2D([], [], ls="none", marker="s", mfc="none", mec=COLOURS["grid"], ms=7 * unit,
                                 mew=0.9 * unit, label="predicted (size ∝ √I)"))
            labeller.add_markers(xy, diam / 2, [("g", i) for i in range(len(allowed))])
        if forbidden:
            xy = np.array([[p.x, p.y] for p in forbidden])
            ax.scatter(xy[:, 0], xy[:, 1], s=(5.0 * unit) ** 2, marker="x", color=COLOURS["forbidden"],
                       linewidths=0.8 * unit, alpha=0.9)
            legend.append(Line2D([], [], ls="none", marker="x", color=COLOURS["forbidden"], ms=5 * unit,
                                 mew=0.8 * unit, label="kinematically forbidden"))
            labeller.add_markers(xy, 2.5 * unit, [("f", i) for i in range(len(forbidden))])
        grid_pred = allowed + [p for p in forbidden if p.forbidden]
        grid_xy = np.array([[p.x, p.y] for p in grid_pred]).reshape(-1, 2)

    # --- measured spots
    spots = list(analysis.spots or ())
    if not spots and cand is not None:
        spots = list(getattr(cand, "spots", ()) or ())
    spot_xy = np.array([[s.x, s.y] for s in spots], float).reshape(-1, 2)
    if "spots" in overlays and len(spot_xy):
        widths = np.array([finite(getattr(s, "width_px", None)) or 1.5 for s in spots])
        px_pt = ax.get_window_extent(labeller.renderer).width / cols * 72.0 / ax.figure.dpi
        diam = np.maximum(9.0 * unit, 2 * 2.5 * widths * px_pt)
        ax.scatter(spot_xy[:, 0], spot_xy[:, 1], s=diam**2, marker="o", facecolors="none",
                   edgecolors=COLOURS["spot"], linewidths=1.1 * unit)
        legend.append(Line2D([], [], ls="none", marker="o", mfc="none", mec=COLOURS["spot"], ms=8 * unit,
                             mew=1.1 * unit, label="measured spot"))
        labeller.add_markers(spot_xy, diam / 2, [("s", i) for i in range(len(spot_xy))])

    # --- centre
    if "centre" in overlays and centre is not None:
        ax.plot([centre.x], [centre.y], marker="+", ms=16 * unit, mew=1.4 * unit, color=COLOURS["centre"], ls="none")
        ax.plot([centre.x], [centre.y], marker="o", ms=5 * unit, mew=1.0 * unit, mfc="none",
                mec=COLOURS["centre"], ls="none")
        legend.append(Line2D([], [], ls="none", marker="+", color=COLOURS["centre"], ms=10 * unit, mew=1.4 * unit,
                             label="centre"))
        labeller.add_markers(np.array([[centre.x, centre.y]]), 8 * unit, ["c"])

    # --- scale bar (reciprocal space)
    if "scalebar" in overlays and k_used:
        # an ideal offset of length L along x appears with length L·|D e_x| on the image
        stretch = float(np.hypot(*(ell.matrix @ np.array([1.0, 0.0]))))
        target_px = 0.2 * cols
        g_nm = _nice_step(10.0 * target_px / (k_used * stretch))
        if g_nm > 0:
            length = k_used * g_nm / 10.0 * stretch  # image pixels (R = K·g, g in Å⁻¹)
            x0, y0 = 0.04 * cols, rows - 0.05 * rows
            bar_h = max(0.008 * rows, 2.0)
            bar = Rectangle((x0, y0 - bar_h), length, bar_h, fc="white", ec="black", lw=0.8 * unit,
                            gid="scalebar", label=f"scale bar {g_nm:g} nm⁻¹")
            ax.add_patch(bar)
            label = f"{format_sig(g_nm, 1) if g_nm < 1 else f'{g_nm:g}'} nm⁻¹"
            t = ax.text(x0 + length / 2, y0 - bar_h - 0.01 * rows, label, ha="center", va="bottom",
                        fontsize=9 * unit, color="white", path_effects=_outline(unit))
            labeller.add_artist_box(bar)
            labeller.add_artist_box(t)
            summary["scalebar_per_nm"] = g_nm
            summary["scalebar_px"] = length

    # --- corner label, legend
    if "labels" in overlays:
        lines = []
        if cand is not None:
            lines.append(f"{escape_dollars(cand.phase)}   {zone_mathtext(cand)}")
            n = len(analysis.match.candidates)
            lines.append(f"candidate {min(max(analysis.chosen_candidate, 0), n - 1) + 1} of {n}, "
                         f"score {float(cand.score):.3f}")
        else:
            lines.append(escape_dollars(describe_unindexed(analysis)))
        if k_used:
            k, sk, _ = index_camera_constant(analysis)
            lines.append(f"K = {format_value_sigma(k, sk, max_decimals=3)} px·Å")
        if ell.ellipticity > 1e-4:
            lines.append(f"ellipse e = {100 * ell.ellipticity:.2f} %, {ell.major_axis_deg:.1f}°")
        corner = ax.text(0.012, 0.988, "\n".join(lines), transform=ax.transAxes, ha="left", va="top",
                         fontsize=9 * unit, color="white", linespacing=1.35,
                         bbox={"boxstyle": "round,pad=0.35", "fc": "black", "alpha": 0.6, "ec": "none"})
        labeller.add_artist_box(corner)
        if legend:
            leg = ax.legend(handles=legend, loc="lower right", fontsize=7 * unit, framealpha=0.6,
                            facecolor="black", edgecolor="none", labelcolor="white", borderpad=0.5,
                            handletextpad=0.5, borderaxespad=0.6)
            labeller.add_artist_box(leg)

        # ring labels: along a few rays, the first that fits
        angles = (-45, -30, -60, -15, -75, 15, -90, 30, 45, 135, -135, 180, 0)
        placed = 0
        if ring_label_jobs and rings is not None:
            (cx, cy), rell, _ = rings
            for r, text in ring_label_jobs:
                for a in angles:
                    v = rell.distort_array(np.array([[math.cos(math.radians(a)), math.sin(math.radians(a))]]))[0] * r
                    t = labeller.place((cx + v[0], cy + v[1]), text, offsets_pt=[(2 * unit, 2 * unit)],
                                       key=("r", r), color=COLOURS["ring"], fontsize=fs,
                                       path_effects=_outline(unit))
                    if t is not None:
                        placed += 1
                        break
        summary["n_ring_labels"] = placed

        # (hkl) beside predicted reflections: measured ones first, then outwards from the centre
        d = 4.0 * unit
        offsets = [(d, d), (d, -d), (-d, d), (-d, -d), (0, 1.6 * d), (0, -1.6 * d)]
        n_lab = 0
        if len(grid_pred):
            measured = np.zeros(len(grid_pred), bool)
            if len(spot_xy):
                dist = np.min(np.hypot(grid_xy[:, None, 0] - spot_xy[None, :, 0],
                                       grid_xy[:, None, 1] - spot_xy[None, :, 1]), axis=1)
                measured = dist <= 3.0
            c0 = np.array([centre.x, centre.y]) if centre is not None else grid_xy.mean(axis=0)
            rr = np.hypot(*(grid_xy - c0).T)
            order = np.lexsort((rr, ~measured))
            for j in order:
                p = grid_pred[j]
                if p.forbidden and not measured[j]:
                    continue
                t = labeller.place((p.x, p.y), index_mathtext(p.hkl, hexagonal=hexagonal, brackets=""),
                                   offsets_pt=offsets, key=_grid_key(grid_pred, j), **text_kw)
                if t is not None:
                    n_lab += 1
        elif len(spot_xy) and "spots" in overlays:
            for i, (x, y) in enumerate(spot_xy):
                t = labeller.place((x, y), str(i + 1), offsets_pt=offsets, key=("s", i),
                                   **{**text_kw, "color": COLOURS["spot"]})
                if t is not None:
                    n_lab += 1
        summary["n_grid_labels"] = n_lab
    return summary


def _grid_key(grid_pred, j):
    """Obstacle key of a predicted reflection's own marker (so its label may touch it)."""
    p = grid_pred[j]
    if p.forbidden:
        forb = [q for q in grid_pred if q.forbidden]
        return ("f", forb.index(p)) if p in forb else None
    return ("g", j)


def _rgb(hex_colour: str) -> tuple[float, float, float]:
    h = hex_colour.lstrip("#")
    return tuple(int(h[i:i + 2], 16) / 255.0 for i in (0, 2, 4))  # type: ignore[return-value]


def _figure_size_px(shape, size_px: int | None) -> tuple[int, int]:
    rows, cols = shape
    long_side = max(rows, cols)
    if size_px is None:
        lo, hi = _DEFAULT_SIZE_LIMITS_PX
        size_px = int(min(max(long_side, lo), hi))
    else:
        if isinstance(size_px, bool) or not isinstance(size_px, (int, np.integer)) or size_px < 64:
            raise InputError(f"size_px must be an integer >= 64, got {size_px!r}")
        size_px = int(size_px)
    w = max(1, int(round(cols / long_side * size_px)))
    h = max(1, int(round(rows / long_side * size_px)))
    return w, h


def render_pattern_figure(analysis, *, overlays: Sequence[str] = DEFAULT_OVERLAYS, display: str = "log",
                          size_px: int | None = None):
    """The pattern with overlays, as a matplotlib Figure (Agg canvas, no pyplot).

    Parameters
    ----------
    analysis : Analysis
        Must have an image.
    overlays : sequence of str
        Any of :data:`OVERLAYS` (see the module notes).
    display : {"log", "gamma", "linear"}
        Grey-level mapping (see :func:`calculate_display_array`).
    size_px : int, optional
        Long side of the figure in pixels at :data:`FIGURE_DPI`; by default the
        image's long side, kept within 800–1600. The image fills the figure;
        text and markers scale with it.

    Returns
    -------
    matplotlib.figure.Figure
        ``figure.get_size_inches() * FIGURE_DPI`` is the size in pixels.

    Raises
    ------
    InputError
        No image, an unknown overlay or display mode, or a bad size.

    Notes
    -----
    The scale bar is in reciprocal space: a length ``g`` (nm⁻¹) spans
    ``R = K·g/10`` pixels (camera equation ``R·d = λL``, ``g = 1/d``),
    stretched by the elliptical distortion along x.

    Examples
    --------
    >>> fig = render_pattern_figure(analysis, overlays=("centre", "spots"))  # doctest: +SKIP
    """
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    if getattr(analysis, "image", None) is None:
        raise InputError("the analysis has no image to draw")
    ov = _check_overlays(overlays)
    if display not in DISPLAY_MODES:
        raise InputError(f"display must be one of {', '.join(DISPLAY_MODES)}, got {display!r}")
    w, h = _figure_size_px(analysis.image.shape, size_px)
    with matplotlib.rc_context(RC):
        # a hair over the exact size so that size × dpi never truncates one pixel short
        fig = Figure(figsize=((w + 0.01) / FIGURE_DPI, (h + 0.01) / FIGURE_DPI), dpi=FIGURE_DPI)
        FigureCanvasAgg(fig)
        ax = fig.add_axes((0, 0, 1, 1))
        unit = max(w, h) / _REFERENCE_SIZE_PX
        _draw_pattern(ax, analysis, overlays=ov, display=display, unit=unit, max_side_px=2 * max(w, h))
    return fig


def _format_from(path: Path, fmt: str | None) -> str:
    if fmt is None:
        fmt = path.suffix.lstrip(".").lower() or "png"
    fmt = str(fmt).lower()
    if fmt not in ("png", "svg"):
        raise InputError(f"figure format must be 'png' or 'svg', got {fmt!r}")
    return fmt


def write_pattern_figure(analysis, path: str | os.PathLike, *, fmt: str | None = None, dpi: float = FIGURE_DPI,
                         overlays: Sequence[str] = DEFAULT_OVERLAYS, display: str = "log",
                         size_px: int | None = None) -> Path:
    """Write the annotated pattern as PNG or SVG, atomically.

    Parameters
    ----------
    analysis : Analysis
    path : str or path
    fmt : {"png", "svg"}, optional
        Default: from the file name's ending.
    dpi : float
        Resolution. A PNG has ``int(size × dpi / 100)`` pixels per side, where
        ``size`` is the figure size in pixels (see ``size_px``); at the default
        100 dpi the PNG is exactly ``size_px`` on its long side.
    overlays, display, size_px
        As for :func:`render_pattern_figure`.

    Returns
    -------
    Path
        ``path``.
    """
    import matplotlib

    p = Path(path)
    fmt = _format_from(p, fmt)
    dpi = float(dpi)
    if not (math.isfinite(dpi) and 10 <= dpi <= 2400):
        raise InputError(f"dpi must be between 10 and 2400, got {dpi!r}")
    fig = render_pattern_figure(analysis, overlays=overlays, display=display, size_px=size_px)
    title = f"{image_label(analysis)}: diffraction pattern"
    meta = {"Title": title, "Software": software_label()} if fmt == "png" else {"Title": title, "Creator": software_label()}

    def _write(tmp: str) -> None:
        with matplotlib.rc_context(RC):
            fig.savefig(tmp, format=fmt, dpi=dpi, metadata=meta)

    return write_with_atomic(p, _write)


# --------------------------------------------------------------------------- #
# Radial profile
# --------------------------------------------------------------------------- #


def _profile_parts(analysis):
    """(profile, assignments, ring radii, K, calibration info) for the profile figure, or None."""
    info = summarize_calibration(getattr(analysis, "calibration", None), image=getattr(analysis, "image", None))
    profile = getattr(info, "profile", None) if info is not None else None
    ring_fit = getattr(analysis, "ring_fit", None)
    if profile is None and ring_fit is not None:
        profile = getattr(ring_fit, "profile", None)
    if profile is None or len(getattr(profile, "radius_px", ())) == 0:
        return None
    assigned = [a for a in (info.rings if info is not None else ()) if finite(getattr(a, "radius_px", None))]
    radii = [float(r.radius_px) for r in (getattr(ring_fit, "rings", ()) or ())]
    if not radii and info is not None:
        radii = list(info.unassigned_radii_px)
    k = info.camera_constant_px_A if info is not None else None
    return profile, assigned, radii, k, info


def draw_profile(fig, rect_main, rect_resid, analysis, *, unit: float = 1.0) -> bool:
    """Draw the radial profile (and the ring residuals) into two areas of ``fig``.

    Returns False (drawing nothing) when the analysis has no radial profile.
    """
    parts = _profile_parts(analysis)
    if parts is None:
        return False
    profile, assigned, radii, k, info = parts
    r = np.asarray(profile.radius_px, float)
    y = np.asarray(profile.intensity, float)
    ok = np.isfinite(r) & np.isfinite(y)
    ax = fig.add_axes(rect_main)
    ax.plot(r[ok], y[ok], color="#1b2a41", lw=0.8 * unit)
    sig = getattr(profile, "sigma", None)
    if sig is not None:
        s = np.asarray(sig, float)
        oks = ok & np.isfinite(s)
        ax.fill_between(r[oks], (y - s)[oks], (y + s)[oks], color="#1b2a41", alpha=0.2, lw=0)
    pos = y[ok][y[ok] > 0]
    if len(pos) and np.nanmax(pos) / max(np.nanpercentile(pos, 5), 1e-12) > 30:
        ax.set_yscale("log")
    ax.set_ylabel("mean intensity", fontsize=8 * unit)
    ax.tick_params(labelsize=7 * unit)
    ax.set_xlim(0, float(np.nanmax(r[ok])) if ok.any() else 1)
    top = ax.get_ylim()[1]
    for a in assigned:
        ax.axvline(float(a.radius_px), color="#c0392b", lw=0.7 * unit, alpha=0.8)
        if getattr(a, "hkl", None) is not None:
            ax.text(float(a.radius_px), top, index_mathtext(a.hkl, brackets="{}"), rotation=90, ha="center", va="top",
                    fontsize=7 * unit, color="#c0392b",
                    bbox={"fc": "white", "ec": "none", "alpha": 0.8, "pad": 1.0})
    for rr in radii:
        if not any(abs(float(a.radius_px) - rr) <= 1.0 for a in assigned):
            ax.axvline(rr, color="#566573", lw=0.7 * unit, ls="--", alpha=0.8)
            if k:
                ax.text(rr, top, f"{k / rr:.4f} Å", rotation=90, ha="center", va="top", fontsize=7 * unit,
                        color="#566573", bbox={"fc": "white", "ec": "none", "alpha": 0.8, "pad": 1.0})
    if k:
        sec = ax.secondary_xaxis("top", functions=(lambda x, k=k: 10.0 * x / k, lambda g, k=k: k * g / 10.0))
        sec.set_xlabel("|g| (nm⁻¹)", fontsize=8 * unit)
        sec.tick_params(labelsize=7 * unit)
    if assigned and rect_resid is not None:
        axr = fig.add_axes(rect_resid, sharex=ax)
        rad = np.array([float(a.radius_px) for a in assigned])
        res = np.array([finite(getattr(a, "residual_px", None)) or math.nan for a in assigned])
        err = np.array([finite(getattr(a, "radius_sigma_px", None)) or 0.0 for a in assigned])
        axr.axhline(0, color="#7f8c8d", lw=0.7 * unit)
        axr.errorbar(rad, res, yerr=err, fmt="o", ms=3.5 * unit, color="#c0392b", lw=0.8 * unit, capsize=2 * unit)
        axr.set_xlabel("radius R (px, ellipse-corrected)", fontsize=8 * unit)
        axr.set_ylabel("residual (px)", fontsize=8 * unit)
        axr.tick_params(labelsize=7 * unit)
        ax.tick_params(labelbottom=False)
    else:
        ax.set_xlabel("radius R (px, ellipse-corrected)", fontsize=8 * unit)
    return True


def render_profile_figure(analysis, *, size_in: tuple[float, float] = (7.0, 5.0)):
    """The radial profile with the assigned rings marked by {hkl} and a residual panel.

    Parameters
    ----------
    analysis : Analysis
        Needs a calibration with a radial profile, or a ring fit.
    size_in : (width, height)
        Figure size, inches.

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InputError
        When the analysis has no radial profile.
    """
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    with matplotlib.rc_context(RC):
        fig = Figure(figsize=size_in, dpi=FIGURE_DPI)
        FigureCanvasAgg(fig)
        if not draw_profile(fig, (0.11, 0.36, 0.85, 0.54), (0.11, 0.1, 0.85, 0.2), analysis):
            raise InputError("the analysis has no radial profile (no calibration profile and no ring fit)")
    return fig
