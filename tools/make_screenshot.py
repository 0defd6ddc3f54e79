"""Render the main window with a pattern, a calibration and a candidate overlay to a PNG.

Usage::

    .venv/bin/python tools/make_screenshot.py [OUT.png] [--simulated]

Without arguments it writes ``docs/screenshot.png`` (used by the README) from
the demo session: the demo gold film's calibration applied to grain A, its
spots found and the zone-axis search run. ``--simulated`` uses a small
simulated Si [011] pattern with a typed-in camera constant instead (fast; the
test suite uses it). Runs headless (Qt's offscreen platform) when there is no
display.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]


def _simulated_pattern(folder: Path) -> tuple[Path, float, tuple[float, float]]:
    import numpy as np

    from saedkit.core.distortion import Ellipse
    from saedkit.core.imageio import write_tiff
    from saedkit.core.crystallography.library import find_phase
    from saedkit.core.simulation.render import BeamStop
    from saedkit.core.simulation.simulate import simulate_spot_pattern

    k = 420.0
    img, truth = simulate_spot_pattern(find_phase("Si"), (0, 1, 1), shape=(640, 640), camera_constant_px_A=k,
                                       rotation_deg=17.0, ellipse=Ellipse(0.0), beam_stop=BeamStop(angle_deg=118.0),
                                       rng=np.random.default_rng(2026))
    path = folder / "si_011_simulated.tif"
    write_tiff(path, img, voltage_kv=200.0, pixel_size_um=15.0)
    return path, k, truth.centre_xy


def make_screenshot(out: str | os.PathLike, *, simulated: bool = False, size: tuple[int, int] = (1600, 1000),
                    scene: str = "grain") -> Path:
    """Render the window to ``out``; returns the path.

    ``scene``: "grain" (pattern, calibration, best candidate's grid, the table) or "film" (the demo gold film
    calibrated: rings with their labels, the radial profile against d).
    """
    if not os.environ.get("DISPLAY") and not os.environ.get("WAYLAND_DISPLAY"):
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    # the demo writes a calibration and the window its layout: keep them out of the user's own folders
    for var in ("SAEDKIT_DATA_DIR", "SAEDKIT_CONFIG_DIR"):
        if not os.environ.get(var):
            os.environ[var] = tempfile.mkdtemp(prefix="saedkit-shot-")
    from saedkit.core.detection.centre import manual_centre
    from saedkit.gui.app import make_application
    from saedkit.gui.main_window import MainWindow

    app = make_application()
    window = MainWindow(synchronous=True)
    window.resize(*size)
    window.show()
    app.processEvents()
    try:
        if scene == "film":
            window.open_demo("film")
            window.calibrate()
            window.calibration_panel.plot_axis.setCurrentText("d (Å)")
            window.docks["calibration"].raise_()
            window.set_tool("pan")
            for _ in range(3):
                app.processEvents()
            return _save(window, out)
        if simulated:
            tmp = Path(tempfile.mkdtemp(prefix="saedkit-shot-"))
            path, k, centre = _simulated_pattern(tmp)
            window.open_path(path, confirm=False)
            s = window.session
            s.set_centre(manual_centre(*centre, sigma_px=0.5))
            window.use_camera_constant(k, 0.8)
            s.set_phases(["Si", "Cu", "Fe"])
            window.find_spots()
        else:
            window.open_demo("session")
            s = window.session
            if s is None:
                raise RuntimeError(f"the demo session did not open: {window.notices[-3:]}")
        window.search()
        s = window.session
        if s.candidate is None:
            raise RuntimeError(f"no candidate to show: {window.notices[-3:]}")
        window.set_tool("spot")
        window.show_table(True)
        window.docks["search"].raise_()
        for _ in range(3):
            app.processEvents()
        window.view.fit()  # the table took some height: fit the pattern again
        app.processEvents()
        return _save(window, out)
    finally:
        if window.session is not None:
            window.session.mark_saved()
        window.close()
        app.processEvents()


def _save(window, out) -> Path:
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    if not window.grab().save(str(out)):
        raise RuntimeError(f"could not write {out}")
    return out


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("out", nargs="?", default=str(REPO / "docs" / "screenshot.png"))
    p.add_argument("--simulated", action="store_true", help="a simulated Si [011] pattern instead of the demo")
    p.add_argument("--scene", choices=("grain", "film"), default="grain",
                   help="grain: the indexed unknown grain; film: the calibrated gold film")
    args = p.parse_args(argv)
    path = make_screenshot(args.out, simulated=args.simulated, scene=args.scene)
    print(path)
    return 0


if __name__ == "__main__":
    sys.exit(main())
