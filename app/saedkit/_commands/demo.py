"""``saedkit demo``: build the demo patterns and a complete report from them, headless."""

from __future__ import annotations

import argparse

from saedkit._commands._common import add_json_option, software_record

EXAMPLES = """\
examples:
  saedkit demo                      # into ./saedkit_demo
  saedkit demo --out /tmp/demo --json
"""


def register(sub) -> None:
    p = sub.add_parser(
        "demo", help="simulate the demo session and write its reports",
        description="Simulate the demo session (an invented scenario: a gold calibration film and two "
        "unknown grains, see sample_patterns/README.md), calibrate the film against Au, save the "
        "calibration in your library, index both grains with it, and write a report for each into OUT.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--out", default="saedkit_demo", metavar="DIR", help="output folder (default ./saedkit_demo)")
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from pathlib import Path

    from saedkit.core.imageio import read_pattern
    from saedkit.core.crystallography.library import find_phase
    from saedkit.core.workflow.pipeline import analyse_ring_pattern, analyse_spot_pattern
    from saedkit.demo import ensure_demo_calibration, write_demo_patterns
    from saedkit.report import write_report_bundle

    out = Path(args.out)
    files = write_demo_patterns(out / "patterns")
    film = analyse_ring_pattern(read_pattern(files.film), standard=find_phase(files.standard),
                                voltage_kv=files.voltage_kv, pixel_size_um=files.pixel_size_um)
    written = {"film": write_report_bundle(film, out / "film")}
    saved = ensure_demo_calibration(files)
    phases = [find_phase(n) for n in files.grain_phases]
    rec = {"software": software_record(), "folder": str(out), "calibration": saved.to_dict(), "grains": {}}
    cal = film.calibration
    lines = [f"film: K = {cal.camera_constant_px_A:.3f} ± {cal.camera_constant_total_sigma_px_A:.2g} px·Å "
             f"(fit {cal.camera_constant_sigma_px_A:.2g}, reproducibility {cal.reproducibility_pct:g} %), "
             f"ellipse {100 * cal.ellipse.ellipticity:.2f} % at {cal.ellipse.major_axis_deg:.1f}°, "
             f"{len(cal.rings)} rings; saved as {saved.name!r}"]
    for key, path in (("grain_a", files.grain_a), ("grain_b", files.grain_b)):
        a = analyse_spot_pattern(read_pattern(path), phases=phases, calibration=saved, voltage_kv=files.voltage_kv)
        written[key] = write_report_bundle(a, out / key)
        c = a.candidate
        rec["grains"][key] = None if c is None else {"phase": c.phase, "zone": list(c.zone), "score": c.score,
                                                     "camera_constant_px_A": c.camera_constant_px_A}
        lines.append(f"{key}: " + ("no candidate" if c is None else
                                   f"{c.phase} {list(c.zone)} score {c.score:.3f}, {c.n_explained}/{c.n_spots} spots"))
    rec["files"] = {k: {f: str(p) for f, p in v.items()} for k, v in written.items()}
    lines.append(f"reports in {out}/film, {out}/grain_a, {out}/grain_b")
    return rec, "\n".join(lines)
