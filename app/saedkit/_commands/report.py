"""``saedkit report``: run the analysis and write CSV, JSON, PNG, SVG and PDF into a folder."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options
from saedkit._commands._common import add_json_option, positive_float, software_record
from saedkit._commands._image_options import add_image_options, resolve_mask
from saedkit._commands._index_options import add_match_options
from saedkit._commands.index import add_internal_standard_option

EXAMPLES = """\
examples:
  saedkit report grain.tif --phase Ni --phase Fe --calibration "KB-7 200 kV CL400 bin2" --out results/
  saedkit report grain.tif --phase Si --camera-constant 343.4 --kv 300 --out results/
  saedkit report film.tif --standard Au --kv 200 --pixel-size-um 30 --out results/    # a calibration film
"""


def register(sub) -> None:
    p = sub.add_parser(
        "report", help="analyse a pattern and write CSV, JSON, PNG, SVG and PDF",
        description="Run the same analysis as `index` (a spot pattern with --phase) or `calibrate` (a ring "
        "standard with --standard) and write the measurement table (CSV), the full record (JSON), the "
        "annotated pattern (PNG, SVG) and a PDF report into OUT.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("image", help="pattern image")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the report files (created)")
    p.add_argument("--standard", metavar="NAME|CIF", help="treat the image as a ring standard and calibrate against it")
    p.add_argument("--pixel-size-um", type=positive_float, metavar="P", help="detector pixel size in µm (ring standard)")
    add_match_options(p, phases_required=False)
    add_calibration_options(p)
    add_internal_standard_option(p)
    add_image_options(p)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from saedkit.core.errors import InputError
    from saedkit.report import write_report_bundle

    if args.standard:
        if args.phase:
            raise InputError("give --phase (a spot pattern to index) or --standard (a ring standard), not both")
        from saedkit.core.imageio import read_pattern
        from saedkit.core.crystallography.library import find_phase
        from saedkit.core.workflow.pipeline import analyse_ring_pattern

        if args.calibration or args.camera_constant is not None:
            raise InputError("--standard calibrates the pattern: give no --calibration or --camera-constant with it")
        image = read_pattern(args.image)
        analysis = analyse_ring_pattern(image, standard=find_phase(args.standard), mask=resolve_mask(args, image),
                                        voltage_kv=args.kv, pixel_size_um=args.pixel_size_um,
                                        reproducibility_pct=args.reproducibility_pct)
    else:
        if not args.phase:
            raise InputError("give at least one --phase to index a spot pattern, or --standard for a ring standard")
        from saedkit._commands.index import run_analysis

        analysis = run_analysis(args)
    files = write_report_bundle(analysis, args.out)
    rec = {"software": software_record(), "files": {k: str(v) for k, v in files.items()},
           "analysis": analysis.to_dict()}
    lines = [f"wrote {len(files)} files into {args.out}:"] + [f"  {k:4s} {v}" for k, v in files.items()]
    cand = analysis.candidate
    if cand is not None:
        lines.append(f"best: {cand.phase} {list(cand.zone)} score {cand.score:.3f}")
    elif analysis.calibration is not None and args.standard:
        c = analysis.calibration
        lines.append(f"K = {c.camera_constant_px_A:.3f} ± {c.camera_constant_sigma_px_A:.3f} px·Å")
    return rec, "\n".join(lines)
