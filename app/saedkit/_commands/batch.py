"""``saedkit batch``: analyse many patterns in parallel (Dask)."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options, resolve_calibration_options
from saedkit._commands._common import add_json_option, software_record
from saedkit._commands._index_options import add_match_options, resolve_phases
from saedkit._commands.index import add_internal_standard_option

EXAMPLES = """\
examples:
  saedkit batch data/*.tif --phase Ni --phase Fe --calibration "KB-7 200 kV CL400 bin2" --out results/
  saedkit batch films/*.tif --standard Au --kv 200 --out cal/ --workers 2
  saedkit batch data/*.tif --phase Ni --cluster tcp://10.0.0.5:8786 --out results/   # a running Dask cluster
"""


def _printable(text: str) -> str:
    """``text`` with control characters escaped (a file name cannot print fake lines)."""
    return "".join(ch if ch.isprintable() else repr(ch)[1:-1] for ch in str(text))


def register(sub) -> None:
    p = sub.add_parser(
        "batch", help="analyse many patterns in parallel",
        description="Index many spot patterns (with --phase) or calibrate many ring standards (with "
        "--standard) in parallel on Dask. One failing pattern never stops the others; OUT gets a "
        "summary.csv (one row per pattern, rewritten as results arrive, saying what failed and why) and each "
        "pattern's JSON record (or its whole report with --bundle). Exit status 1 when any pattern failed, "
        "130 after Ctrl-C (the summary then lists what finished; --resume goes on).",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("images", nargs="+", help="pattern images")
    p.add_argument("--out", metavar="DIR", help="folder for summary.csv and the records")
    p.add_argument("--standard", metavar="NAME|CIF", help="calibrate ring standards instead of indexing")
    p.add_argument("--bundle", action="store_true", help="write the whole report (CSV, JSON, PNG, SVG, PDF) per pattern")
    p.add_argument("--workers", type=int, metavar="N", help="local workers (default: the number of cores)")
    p.add_argument("--scheduler", choices=["threads", "processes", "synchronous"], default="threads",
                   help="local Dask scheduler (default threads)")
    p.add_argument("--cluster", metavar="ADDRESS", help="address of a running dask.distributed scheduler")
    p.add_argument("--resume", action="store_true",
                   help="skip the patterns OUT/summary.csv lists as finished (after an interrupted run)")
    add_match_options(p, phases_required=False)
    add_calibration_options(p)
    add_internal_standard_option(p)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from saedkit.batch import BatchInterrupted, run_batch, write_batch_summary
    from saedkit.core.errors import InputError
    from saedkit.core.crystallography.library import find_phase

    if bool(args.standard) == bool(args.phase):
        raise InputError("give --phase (spot patterns to index) or --standard (ring standards), one of the two")
    from saedkit._commands.index import pipeline_options

    options = {"options": pipeline_options(args), "reproducibility_pct": args.reproducibility_pct}
    if args.standard:
        options["standard"] = find_phase(args.standard)
        if args.calibration or args.camera_constant is not None:
            raise InputError("--standard calibrates the patterns: give no --calibration or --camera-constant with it")
    else:
        options["phases"] = tuple(resolve_phases(args.phase))
        options["calibration"] = resolve_calibration_options(args, voltage_kv=args.kv)
        if args.internal_standard:
            if options["calibration"] is not None:
                raise InputError("--internal-standard calibrates each pattern itself: give no --calibration or "
                                 "--camera-constant with it")
            options["internal_standard"] = find_phase(args.internal_standard)
        elif options["calibration"] is not None:
            options["reproducibility_pct"] = None  # already applied to the camera model
    if args.resume and not args.out:
        raise InputError("--resume needs --out (the folder of the interrupted run)")
    interrupted = False
    try:
        items = run_batch(args.images, options=options, out_dir=args.out, bundle=args.bundle,
                          scheduler=args.scheduler, workers=args.workers, cluster=args.cluster,
                          resume=args.resume)
    except BatchInterrupted as exc:
        items, interrupted = exc.items, True
    summary = None
    if args.out:
        from pathlib import Path

        summary = write_batch_summary(items, Path(args.out) / "summary.csv")
    n_ok = sum(it.ok for it in items)
    rec = {"software": software_record(), "n_patterns": len(items), "n_ok": n_ok,
           "summary_csv": None if summary is None else str(summary), "patterns": [it.to_dict() for it in items]}
    lines = [f"{n_ok}/{len(items)} patterns analysed" + (f"; summary in {summary}" if summary else "")]
    for it in items:
        if it.ok:
            s = it.summary
            what = (f"{s.get('phase', '-')} [{s.get('zone', '')}] score {s.get('score', 0):.3f}" if "phase" in s
                    else f"K {s.get('camera_constant_px_A', float('nan')):.3f} px·Å" if "camera_constant_px_A" in s
                    else f"{s.get('n_spots', 0)} spots, no candidate")
            lines.append(f"  ok    {_printable(it.path)}: {what}" + ("" if it.summary.get("calibrated", True)
                                                                      else "  (uncalibrated: K left free)"))
        else:
            lines.append(f"  FAIL  {_printable(it.path)}: {_printable(it.error)}")
    rec["interrupted"] = interrupted
    if interrupted:
        lines.append("interrupted: run again with --resume to go on")
    if interrupted or n_ok < len(items):
        # print here, then give the exit status: 130 after Ctrl-C, 1 when any pattern failed
        import sys

        from saedkit.cli import _print_record

        _print_record(rec, "\n".join(lines), args.json)
        sys.stdout.flush()
        return 130 if interrupted else 1
    return rec, "\n".join(lines)
