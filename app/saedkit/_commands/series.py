"""``saedkit series``: measure every frame of a series or 4-D scan, in resumable chunks on Dask."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options, resolve_calibration_options
from saedkit._commands._common import add_json_option, positive_float, software_record
from saedkit._commands._index_options import add_match_options

EXAMPLES = """\
examples:
  saedkit series heating_run/ --phase Ni --camera-constant 412 --out heat_maps/
  saedkit series scan.h5:/entry/data --phase Ni --phase Fe --calibration "KB-7 200 kV CL400 bin2" --out scan_maps/
  saedkit series tilt.mrc --phase Si --camera-constant 380 --out tilt/ --workers 2 --json
  saedkit series stack.tif --scan-shape 32 48 --phase Cu --camera-constant 300 --out map/
  saedkit series scan.npy --phase Ni --camera-constant 412 --out maps/ --cluster tcp://10.0.0.5:8786

A killed run resumes where it stopped: run the same command again (finished chunks are kept in OUT/chunks).
Outputs in OUT: frames.csv (one row per frame), spots.csv (one row per spot, with d), maps.h5 (phase,
zone axis, rotation, score, spot count, virtual bright- and dark-field maps), maps/*.png, mask.npy.
"""


def register(sub) -> None:
    p = sub.add_parser(
        "series", help="measure every frame of a series or 4-D scan (Dask, resumable)",
        description="Measure every frame of a frame series (a folder of frames, a multi-page TIFF, an MRC "
        "stack, a .npy array) or a 4-D scan (a .npy or HDF5 dataset shaped scan_y, scan_x, ky, kx; name the "
        "dataset as FILE.h5:/path): centre (tracked from frame to frame), spots with d and, with --phase, "
        "the best phase, zone axis, in-plane rotation and score; then the per-frame table and the maps. "
        "Frames are read lazily chunk by chunk; a bad frame is recorded and never stops the rest.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("input", metavar="INPUT", help="folder, TIFF, MRC, .npy, or FILE.h5:/dataset")
    p.add_argument("--out", metavar="DIR", required=True, help="folder for the chunks, table, maps and figures")
    p.add_argument("--workers", type=int, metavar="N", help="local workers (default: the number of cores)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="address of a running dask.distributed scheduler (its workers must see INPUT)")
    p.add_argument("--scheduler", choices=["local-cluster", "processes", "threads", "synchronous"],
                   default="local-cluster",
                   help="without --cluster: a local dask.distributed cluster of N single-threaded processes "
                   "(default), or a plain local Dask scheduler")
    p.add_argument("--chunk", type=int, default=16, metavar="N", help="frames per chunk (default 16)")
    p.add_argument("--scan-shape", type=int, nargs=2, metavar=("NY", "NX"),
                   help="arrange the frames of a stack or folder as a scan of NY rows and NX columns")
    p.add_argument("--bf-radius", type=positive_float, metavar="PX",
                   help="virtual bright-field disc radius in pixels (default 6%% of the frame's smaller side)")
    p.add_argument("--adf-radii", type=positive_float, nargs=2, metavar=("INNER", "OUTER"),
                   help="virtual annular dark-field radii in pixels (default twice the bright-field radius "
                   "to 45%% of the frame's smaller side)")
    p.add_argument("--drift-tol", type=positive_float, default=1.5, metavar="PX",
                   help="largest frame-to-frame centre move that tracking accepts before searching afresh "
                   "(default 1.5)")
    p.add_argument("--restart", action="store_true", help="discard an earlier run's chunks in DIR")
    p.add_argument("--no-figures", action="store_true", help="do not write maps/*.png")
    add_match_options(p, phases_required=False)
    add_calibration_options(p)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    import sys

    from saedkit.core.errors import InputError
    from saedkit.core.series import SeriesOptions, open_series
    from saedkit.series import default_detector_radii, run_series

    if args.chunk < 1:
        raise InputError(f"--chunk must be >= 1, got {args.chunk}")
    if args.workers is not None and args.workers < 1:
        raise InputError(f"--workers must be >= 1, got {args.workers}")
    series = open_series(args.input, scan_shape=args.scan_shape)
    bf, adf = default_detector_radii(series.frame_shape)
    bf = args.bf_radius or bf
    adf = tuple(args.adf_radii) if args.adf_radii else (min(2 * bf, adf[1] / 2), adf[1])
    cal = resolve_calibration_options(args, voltage_kv=args.kv)  # a camera model (saved or typed), or None
    kw: dict = {} if cal is None else {"calibration": cal}
    kv = args.kv or getattr(cal, "voltage_kv", None) or 200.0
    options = SeriesOptions(phases=tuple(args.phase or ()), voltage_kv=float(kv), min_snr=args.min_snr,
                            d_tolerance_pct=args.d_tol, angle_tolerance_deg=args.angle_tol,
                            max_index=args.max_index, top=args.top, drift_tolerance_px=args.drift_tol,
                            bright_field_radius_px=bf, dark_field_radii_px=adf, **kw)
    # resolve the phases here, so that a wrong name fails before any work starts
    from saedkit._commands._index_options import resolve_phases

    resolve_phases(args.phase)

    tty = sys.stderr.isatty()

    def progress(done: int, total: int) -> None:
        end = "" if tty and done < total else "\n"
        sys.stderr.write(("\r" if tty else "") + f"series: {done}/{total} frames ({100 * done // max(total, 1)}%)"
                         + end)
        sys.stderr.flush()

    result = run_series(series, options=options, out_dir=args.out, frames_per_chunk=args.chunk,
                        scheduler=args.scheduler, workers=args.workers, cluster=args.cluster,
                        restart=args.restart, write_figures=not args.no_figures, progress=progress)
    rec = {"software": software_record(), "options": options.to_dict(), **result.to_dict()}
    n = result.series["n_frames"]
    kept = result.n_chunks_done - result.n_chunks_computed
    lines = [f"{result.n_frames_ok}/{n} frames measured ({result.n_chunks_computed} of {result.n_chunks} chunks "
             f"computed now" + (f", {kept} kept from an earlier run" if kept else "") + f"); outputs in {args.out}"]
    if not result.complete:
        lines.append("  stopped before the end: run the same command again to resume")
    if result.maps is not None:
        m = result.maps.to_dict()
        for name, count in m["phase_counts"].items():
            lines.append(f"  {name}: {count} frames")
        lines.append(f"  no phase: {m['no_phase']} frames")
        for name, count in m["orientation_counts"].items():
            lines.append(f"  {name}: {count} frames")
    if result.rotation_axis is not None:
        ax = result.rotation_axis
        lines.append(f"  rotation axis {ax.angle_deg:.1f}° ± {ax.sigma_deg:.1f}° from +x (from {ax.n_tracks} spot tracks)")
    for f in rec["failed_frames"][:10]:
        lines.append(f"  FAIL {f['error']}")
    return rec, "\n".join(lines)
