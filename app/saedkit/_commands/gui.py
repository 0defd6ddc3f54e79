"""``saedkit gui``: the desktop program (also what ``saedkit`` alone opens).

Qt is imported only inside :func:`run`, so the rest of the command line
never loads it.
"""

from __future__ import annotations

import argparse


def register(sub) -> None:
    p = sub.add_parser(
        "gui",
        help="open the desktop program",
        description="Open the desktop program, optionally on a pattern or a saved session "
        "(*.saedkit.json). With --demo it opens the demo session: a gold-film calibration "
        "applied to an unknown grain, ready to index.",
        epilog="examples:\n  saedkit gui\n  saedkit gui pattern.tif\n  saedkit gui analysis.saedkit.json\n"
        "  saedkit gui --demo",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("file", nargs="?", help="pattern (TIFF, MRC, PNG, JPEG, NPY) or session file to open")
    p.add_argument("--demo", action="store_true", help="open the demo session")
    p.set_defaults(func=run)


def _check_screen() -> None:
    """On Linux without a display Qt aborts the interpreter; say so in one line instead."""
    import os
    import sys

    if not sys.platform.startswith("linux") or os.environ.get("QT_QPA_PLATFORM"):
        return
    if os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"):
        return
    from saedkit.core.errors import SaedkitError

    raise SaedkitError("no screen to open the window on (neither DISPLAY nor WAYLAND_DISPLAY is set): "
                       "run it on a desktop, under Xvfb, or use the command line (e.g. `saedkit demo`)")


def run(args) -> int:
    if args.file and args.demo:
        from saedkit.core.errors import InputError

        raise InputError("give a FILE or --demo, not both")
    _check_screen()
    try:
        from saedkit.gui.app import run as run_gui
    except ImportError as exc:  # e.g. PySide6 missing or no display libraries
        from saedkit.core.errors import SaedkitError

        raise SaedkitError(f"the desktop program cannot start: {exc}") from None
    return int(run_gui(args.file, demo=bool(args.demo)) or 0)
