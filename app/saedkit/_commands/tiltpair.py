"""``saedkit tiltpair``: check two patterns of one grain against the goniometer tilt between them."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options
from saedkit._commands._common import add_json_option, positive_float, software_record
from saedkit._commands._index_options import add_match_options

EXAMPLES = """\
examples:
  saedkit tiltpair a.tif b.tif --tilt-deg 35.3 --phase Fe --calibration "KB-7 200 kV CL400 bin2"
"""


def register(sub) -> None:
    p = sub.add_parser(
        "tiltpair", help="keep the zone pairs of two patterns whose angle matches the tilt",
        description="Index two patterns of the same grain and keep only the pairs of candidates whose zone "
        "axes are as far apart as the goniometer tilt between the recordings; this removes most of the "
        "ambiguity of a single pattern.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("image_a")
    p.add_argument("image_b")
    p.add_argument("--tilt-deg", type=positive_float, required=True, metavar="DEG", help="tilt between the two patterns")
    p.add_argument("--tilt-tol", type=positive_float, default=2.0, metavar="DEG", help="tolerance on the tilt (default 2)")
    add_match_options(p)
    add_calibration_options(p)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from saedkit.core.indexing.matching import match_tilt_pair
    from saedkit._commands.index import run_analysis
    from saedkit._commands._index_options import resolve_phases

    top = args.top
    args.top = max(top, 10)  # keep enough candidates per pattern for the pairing
    results = []
    for path in (args.image_a, args.image_b):
        args.image = path
        a = run_analysis(args)
        if a.match is None:
            from saedkit.core.errors import FitError

            raise FitError(f"{path}: too few spots to index")
        results.append(a)
    phases = resolve_phases(args.phase)
    pairs = match_tilt_pair(results[0].match, results[1].match, phases, tilt_deg=args.tilt_deg,
                            tolerance_deg=args.tilt_tol)
    rec = {"software": software_record(), "tilt_deg": args.tilt_deg,
           "image_a": results[0].image.to_dict(), "image_b": results[1].image.to_dict(),
           "pairs": [p.to_dict() for p in pairs[:top]]}
    from saedkit.core.crystallography.crystal import format_indices

    lines = [f"{len(pairs)} zone pair(s) {args.tilt_deg:g}° ± {args.tilt_tol:g}° apart"]
    for i, p in enumerate(pairs[:top], 1):
        lines.append(f"{i:2d} {p.candidate_a.phase:6s} {format_indices(p.candidate_a.zone, brackets='[]'):10s} → "
                     f"{format_indices(p.candidate_b.zone, brackets='[]'):10s} angle {p.angle_deg:6.2f}°  "
                     f"score {p.score:.3f}")
    return rec, "\n".join(lines)
