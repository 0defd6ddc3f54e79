"""Exports of one analysed pattern: measurement table (CSV), record (JSON),
annotated pattern (PNG, SVG) and a multi-page PDF report.

Every file is written atomically (a temporary file beside the target, then a
rename), so an interrupted export never leaves a half-written file. The
figures use matplotlib's Agg and PDF backends only (never ``pyplot``), so no
window system is touched; matplotlib is imported when a figure is first
asked for, not when this package is imported.

Examples
--------
>>> from saedkit import report                     # doctest: +SKIP
>>> paths = report.write_report_bundle(analysis, "results/")  # doctest: +SKIP
>>> sorted(paths)                                   # doctest: +SKIP
['csv', 'json', 'pdf', 'png', 'svg']
"""

from __future__ import annotations

import importlib
from typing import Any

__all__ = [
    "CAUTION",
    "MeasurementTable",
    "calculate_measurement_table",
    "read_measurements_csv",
    "write_measurements_csv",
    "write_analysis_json",
    "render_pattern_figure",
    "write_pattern_figure",
    "render_profile_figure",
    "write_pdf_report",
    "write_report_bundle",
    "OVERLAYS",
    "DISPLAY_MODES",
]

# public name -> submodule that defines it (imported on first use)
_WHERE = {
    "CAUTION": "._common",
    "MeasurementTable": ".tables",
    "calculate_measurement_table": ".tables",
    "read_measurements_csv": ".tables",
    "write_measurements_csv": ".tables",
    "write_analysis_json": ".tables",
    "render_pattern_figure": ".figures",
    "write_pattern_figure": ".figures",
    "render_profile_figure": ".figures",
    "OVERLAYS": ".figures",
    "DISPLAY_MODES": ".figures",
    "write_pdf_report": ".pdf",
    "write_report_bundle": ".bundle",
}


def __getattr__(name: str) -> Any:
    where = _WHERE.get(name)
    if where is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(where, __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
