"""``saedkit identify``: rank phases (and two-phase mixtures) for a ring pattern."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options, describe_camera, resolve_calibration_options
from saedkit._commands._common import add_json_option, positive_float, software_record

EXAMPLES = """\
examples:
  saedkit identify film.tif --calibration "KB-7 200 kV CL400 bin2"          # against the whole library
  saedkit identify film.tif --camera-constant 343.4 --phase Au --phase Al --json
"""


def register(sub) -> None:
    p = sub.add_parser(
        "identify", help="rank phases for a ring pattern",
        description="Measure the rings of a polycrystalline pattern, turn them into d-spacings with the "
        "calibration, and rank the candidate phases (default: the whole library) and two-phase mixtures by "
        "how well their allowed reflections explain the rings.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("image", help="ring pattern image")
    p.add_argument("--phase", action="append", metavar="NAME|CIF", help="candidate phase (repeat); default: the library")
    p.add_argument("--d-tol", type=positive_float, default=1.5, metavar="PCT", help="spacing tolerance in %% (default 1.5)")
    p.add_argument("--top", type=int, default=5, metavar="N", help="number of results (default 5)")
    add_calibration_options(p, required=True)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from saedkit.core.imageio import read_pattern
    from saedkit.core.crystallography.library import LIBRARY, find_phase
    from saedkit.core.workflow.pipeline import analyse_ring_pattern

    names = args.phase or [e.name for e in LIBRARY]
    phases = [find_phase(n) for n in names]
    image = read_pattern(args.image)
    camera = resolve_calibration_options(args)
    analysis = analyse_ring_pattern(image, calibration=camera, phases=phases, d_tolerance_pct=args.d_tol)
    rec = analysis.to_dict()
    rec["software"] = software_record()
    lines = [f"{args.image}: {len(analysis.ring_fit.rings)} rings; {describe_camera(camera)}"]
    pid = analysis.phase_id
    if pid is None:
        lines.append("no rings to identify")
    else:
        lines.append("d (Å): " + ", ".join(f"{d:.4f}" for d in pid.d_A))
        for i, c in enumerate(pid.candidates[: args.top], 1):
            lines.append(f"{i:2d} {' + '.join(c.phases):14s} score {c.score:.3f}  explained {100 * c.fraction_explained:5.1f} %"
                         f"  strong rings seen {100 * c.fraction_seen:5.1f} %  d err {c.d_error_pct:.2f} %")
    return rec, "\n".join(lines)
