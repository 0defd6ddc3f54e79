"""One marker style for the screen and the exported figures: what each kind of mark looks like.

Colours are hex strings; the screen (Qt) and the report (matplotlib) both
read them from here, so the report shows what the user saw.
"""

from __future__ import annotations

__all__ = ["MARKER_COLOURS", "MARKER_LEGEND"]

#: Colour of each kind of mark.
MARKER_COLOURS: dict[str, str] = {
    "centre": "#ffb627",  # amber ring with a gapped cross
    "spot_auto": "#2fd3c4",  # teal circle: a spot found automatically
    "spot_manual": "#ff6fae",  # rose diamond: a spot placed by hand
    "predicted": "#a6ee5a",  # lime square: a reflection of the chosen candidate (size ∝ √I)
    "forbidden": "#e8d36a",  # dotted square / cross: kinematically forbidden
    "rings": "#ff8f4a",  # dashed orange ring with (hkl) and d
    "ellipse": "#c9a6ff",  # lilac distortion axes
    "measure": "#fff27a",  # pale yellow ruler and profile line
    "mask": "#4673ff",  # blue tint over excluded pixels
}

#: (kind, shape, text) of the legend, in the order shown.
MARKER_LEGEND: tuple[tuple[str, str, str], ...] = (
    ("centre", "centre", "centre"),
    ("spot_auto", "circle", "spot (found)"),
    ("spot_manual", "diamond", "spot (placed by hand)"),
    ("predicted", "square", "predicted reflection"),
    ("forbidden", "dotted square", "kinematically forbidden"),
    ("rings", "dashed ring", "ring"),
    ("mask", "tint", "masked pixels"),
)
