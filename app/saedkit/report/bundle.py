"""All the exports of one analysis into one folder."""

from __future__ import annotations

import os
import re
from pathlib import Path
from typing import Callable, Sequence

from saedkit.core.errors import InputError
from saedkit.report._common import image_stem

__all__ = ["BUNDLE_FORMATS", "bundle_file_names", "write_report_bundle"]

#: Formats of a bundle and the file-name ending each gets after the stem.
BUNDLE_FORMATS = {
    "csv": "_measurements.csv",
    "json": ".json",
    "png": "_pattern.png",
    "svg": "_pattern.svg",
    "pdf": "_report.pdf",
}


def _check_stem(stem: str) -> str:
    stem = str(stem).strip()
    if not stem or stem in (".", "..") or re.search(r"[\\/\x00]", stem):
        raise InputError(f"stem must be a plain file-name stem, got {stem!r}")
    return stem


def bundle_file_names(stem: str, formats: Sequence[str] = tuple(BUNDLE_FORMATS)) -> dict[str, str]:
    """File names of a bundle: ``{format: stem + ending}``."""
    stem = _check_stem(stem)
    bad = [f for f in formats if f not in BUNDLE_FORMATS]
    if bad:
        raise InputError(f"unknown format(s) {', '.join(map(repr, bad))}; choose from {', '.join(BUNDLE_FORMATS)}")
    return {f: stem + BUNDLE_FORMATS[f] for f in formats}


def write_report_bundle(analysis, out_dir: str | os.PathLike, *, stem: str | None = None,
                        formats: Sequence[str] = ("csv", "json", "png", "svg", "pdf"),
                        progress: Callable[[int, int], None] | None = None) -> dict[str, Path]:
    """Write the measurement table, the record, the annotated pattern and the PDF report into a folder.

    Parameters
    ----------
    analysis : Analysis
    out_dir : str or path
        Created when missing.
    stem : str, optional
        File-name stem; default the image file's stem ("pattern" without a file).
    formats : sequence of {"csv", "json", "png", "svg", "pdf"}
        What to write. Names: ``<stem>_measurements.csv``, ``<stem>.json``,
        ``<stem>_pattern.png``, ``<stem>_pattern.svg``, ``<stem>_report.pdf``.
    progress : callable(done, total), optional
        Called after each file.

    Returns
    -------
    dict
        ``{format: path written}``.

    Raises
    ------
    InputError
        An unknown format, a bad stem, or a figure asked for without an image.

    Examples
    --------
    >>> write_report_bundle(analysis, "results/")  # doctest: +SKIP
    {'csv': PosixPath('results/grain_measurements.csv'), ...}
    """
    formats = tuple(dict.fromkeys(formats))  # unique, in order
    names = bundle_file_names(stem if stem is not None else image_stem(analysis), formats)
    if any(f in ("png", "svg", "pdf") for f in formats) and getattr(analysis, "image", None) is None:
        raise InputError("the analysis has no image: write only 'csv' and 'json'")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: exists and is not a folder")
    out.mkdir(parents=True, exist_ok=True)
    written: dict[str, Path] = {}
    for i, fmt in enumerate(formats, start=1):
        target = out / names[fmt]
        if fmt == "csv":
            from saedkit.report.tables import write_measurements_csv

            written[fmt] = write_measurements_csv(analysis, target)
        elif fmt == "json":
            from saedkit.report.tables import write_analysis_json

            written[fmt] = write_analysis_json(analysis, target)
        elif fmt in ("png", "svg"):
            from saedkit.report.figures import write_pattern_figure

            written[fmt] = write_pattern_figure(analysis, target, fmt=fmt)
        else:
            from saedkit.report.pdf import write_pdf_report

            written[fmt] = write_pdf_report(analysis, target)
        if progress is not None:
            progress(i, len(formats))
    return written
