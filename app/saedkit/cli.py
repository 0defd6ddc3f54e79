"""The ``saedkit`` command line: a thin argparse layer over core/ and report/.

Every sub-command prints a human-readable summary, or with ``--json`` one
JSON object (the record documented in the README) on stdout. Expected
failures (bad arguments, unreadable files, failed fits) give one line on
stderr and exit status 1 (2 for argument errors, as argparse does); never a
traceback.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import warnings

# Small matrix products are the hot path here; BLAS threads only fight over the
# cores (measured 100x slower on a loaded 2-core machine). Set before numpy loads.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
from typing import Sequence

from saedkit import __version__
from saedkit._commands import COMMAND_MODULES
from saedkit.core.errors import SaedkitError

__all__ = ["main", "build_parser"]

_EPILOG = """\
examples:
  saedkit phases
  saedkit rings sample_patterns/film_au_200kV.tif --json
  saedkit calibrate film.tif --standard Au --kv 200 --pixel-size-um 15 --save "CL 600 mm"
  saedkit index grain.tif --phase Si --phase Cu --calibration "CL 600 mm"
  saedkit report grain.tif --phase Si --calibration "CL 600 mm" --out results/
  saedkit gui grain.tif
"""


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every sub-command."""
    parser = argparse.ArgumentParser(
        prog="saedkit",
        description="Measure, calibrate and index electron diffraction patterns. "
        "With no sub-command the desktop program opens.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"saedkit {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for module in COMMAND_MODULES:
        module.register(sub)
    return parser


def _print_record(record: dict, text: str, as_json: bool) -> None:
    if as_json:
        json.dump(record, sys.stdout, indent=2, allow_nan=False, default=_json_default)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(text.rstrip("\n") + "\n")


def _json_default(obj):
    import numpy as np

    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"cannot write {type(obj).__name__} as JSON")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        args = parser.parse_args(["gui", *([] if argv is None else argv)])
    # library warnings (numpy, tifffile, ...) are held back: a failure prints one line only,
    # a success passes them on to the warning filters in force (the test suite turns them into errors)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            result = args.func(args)
        except SaedkitError as exc:
            msg = " ".join(str(exc).split())
            print(f"saedkit {args.command}: error: {msg}", file=sys.stderr)
            return 1
        except KeyboardInterrupt:
            print(f"saedkit {args.command}: interrupted", file=sys.stderr)
            return 130
    for w in caught:
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno, source=w.source)
    if result is None:
        return 0
    if isinstance(result, int):
        return result
    record, text = result
    try:
        _print_record(record, text, getattr(args, "json", False))
    except BrokenPipeError:  # e.g. piped into `head`
        sys.stderr.close()
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
