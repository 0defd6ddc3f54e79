"""``saedkit calibrations``: list, show, rename, delete saved calibrations and see how K drifted."""

from __future__ import annotations

import argparse

from saedkit._commands._common import add_json_option, positive_float, software_record

_EPILOG = """\
examples:
  saedkit calibrations
  saedkit calibrations list --json
  saedkit calibrations show "200 kV CL 600 mm"
  saedkit calibrations rename "200 kV CL 600 mm" "200 kV CL 600 mm (2026-01)"
  saedkit calibrations delete "old one"
  saedkit calibrations history --kv 200 --nominal-camera-length-mm 600
  saedkit calibrations recover          # move an unreadable library file aside

The library is one JSON file, <data dir>/calibrations.json (the data dir is
$SAEDKIT_DATA_DIR when set, else the platform's user data folder). An
unreadable file is never replaced silently: it is reported, and moved aside
to calibrations.json.broken-<time> at the next save or by `recover`.
"""

_ACTIONS = {"list": 0, "show": 1, "delete": 1, "rename": 2, "history": 0, "recover": 0}


def register(sub) -> None:
    p = sub.add_parser(
        "calibrations",
        help="list, show, rename or delete saved calibrations; K drift history",
        description="Manage the calibration library: the camera constants saved with "
        "`saedkit calibrate --save NAME`.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("action", nargs="?", default="list", choices=list(_ACTIONS),
                   help="what to do (default: list)")
    p.add_argument("names", nargs="*", metavar="NAME", help="the calibration (show, delete) or OLD NEW (rename)")
    p.add_argument("--kv", type=positive_float, metavar="KV", help="history: accelerating voltage in kV")
    p.add_argument("--nominal-camera-length-mm", type=positive_float, metavar="L",
                   help="history: nominal camera length in mm (omit for calibrations saved without one)")
    p.add_argument("--binning", type=int, metavar="N", help="history: only this camera binning")
    add_json_option(p)
    p.set_defaults(func=run)


def _summary_line(c) -> str:
    cl = f"CL {c.nominal_camera_length_mm:g} mm" if c.nominal_camera_length_mm else "CL ?"
    return (f"{c.name!s:28s} {c.voltage_kv:6g} kV  {cl:13s} bin {c.binning:<2d} "
            f"K = {c.camera_constant_px_A:10.3f} ± {c.camera_constant_sigma_px_A:.3f} px·Å  "
            f"{c.standard:5s} {c.date}")


def run(args):
    from saedkit.core.calibration.library import CalibrationLibrary, resolve_calibration
    from saedkit.core.errors import InputError

    action = args.action
    want = _ACTIONS[action]
    if len(args.names) != want:
        usage = {"show": "show NAME", "delete": "delete NAME", "rename": "rename OLD NEW"}.get(action, action)
        raise InputError(f"`calibrations {usage}` takes {want} name{'s' if want != 1 else ''}, "
                         f"got {len(args.names)}")
    lib = CalibrationLibrary()
    rec: dict = {"software": software_record(), "library": str(lib.path)}

    if action == "list":
        cals = lib.list()
        rec["calibrations"] = [_full(c) for c in cals]
        if not cals:
            return rec, f"no saved calibrations in {lib.path}"
        return rec, "\n".join([f"{len(cals)} saved in {lib.path}:"] + [_summary_line(c) for c in cals])

    if action == "show":
        c = resolve_calibration(args.names[0], library=lib)
        rec["calibration"] = _full(c)
        lines = [f"{k}: {v}" for k, v in _full(c).items()]
        return rec, "\n".join(lines)

    if action == "delete":
        c = lib.delete(args.names[0])
        rec["deleted"] = c.name
        return rec, f"deleted {c.name!r} from {lib.path}"

    if action == "rename":
        c = lib.rename(args.names[0], args.names[1])
        rec["renamed"] = {"old": args.names[0], "new": c.name}
        return rec, f"renamed {args.names[0]!r} to {c.name!r}"

    if action == "recover":
        moved = lib.recover()
        rec["moved_to"] = None if moved is None else str(moved)
        if moved is None:
            return rec, f"the library {lib.path} is readable (or absent): nothing to recover"
        return rec, f"moved the unreadable library to {moved}; started an empty one at {lib.path}"

    # history
    if args.kv is None:
        raise InputError("`calibrations history` needs --kv (and usually --nominal-camera-length-mm)")
    hist = lib.history(voltage_kv=args.kv, nominal_camera_length_mm=args.nominal_camera_length_mm,
                       binning=args.binning)
    rec["history"] = [h.to_dict() for h in hist]
    rec["query"] = {"voltage_kv": args.kv, "nominal_camera_length_mm": args.nominal_camera_length_mm,
                    "binning": args.binning}
    if not hist:
        return rec, "no saved calibrations at that voltage and camera length"
    lines = [f"{'date':22s} {'name':28s} {'K (px·Å)':>12s} {'σ':>8s} {'change':>10s}"]
    for h in hist:
        lines.append(f"{h.date:22s} {h.name:28s} {h.camera_constant_px_A:12.3f} {h.camera_constant_sigma_px_A:8.3f} "
                     f"{100 * h.relative_change:+9.3f}%")
    from saedkit.core.calibration.library import estimate_reproducibility_pct

    est = estimate_reproducibility_pct(hist)
    rec["reproducibility_pct_estimate"] = est
    lines.append(f"reproducibility of K from these {len(hist)}: {est:.2g} % (what `calibrate` uses for a new one)"
                 if est is not None else "reproducibility of K: 3 or more calibrations needed for an estimate")
    return rec, "\n".join(lines)


def _full(c) -> dict:
    d = c.to_dict()
    d["camera_constant_rel_sigma"] = c.camera_constant_rel_sigma
    d["camera_constant_total_sigma_px_A"] = c.camera_constant_total_sigma_px_A
    d["camera_length_sigma_mm"] = c.camera_length_sigma_mm
    d["camera_length_mm"] = c.camera_length_mm
    d["lambda_L_mm_A"] = c.lambda_L_mm_A
    return d
