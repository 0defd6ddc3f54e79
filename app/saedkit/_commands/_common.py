"""Helpers shared by the sub-commands: common options and the record header."""

from __future__ import annotations

import argparse
import math

from saedkit import __version__
from saedkit.core._validate import finite_or_none

__all__ = ["add_json_option", "software_record", "finite_or_none", "positive_float"]


def add_json_option(parser: argparse.ArgumentParser) -> None:
    """Add ``--json``."""
    parser.add_argument("--json", action="store_true", help="print the machine-readable record (JSON) on stdout")


def software_record() -> dict:
    """The ``software`` entry of every record."""
    return {"name": "saedkit", "version": __version__}


def positive_float(text: str) -> float:
    """argparse type: a finite number > 0."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise argparse.ArgumentTypeError(f"must be a number > 0, got {text!r}")
    return v
