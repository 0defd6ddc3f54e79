"""``saedkit index``: find the phase and zone axis [uvw] of a spot pattern."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options, describe_camera, resolve_calibration_options
from saedkit._commands._common import add_json_option, software_record
from saedkit._commands._image_options import add_image_options, resolve_centre, resolve_mask
from saedkit._commands._index_options import add_match_options, describe_candidates, resolve_phases

EXAMPLES = """\
examples:
  saedkit index grain.tif --phase Ni --phase Fe                     # uncalibrated: K is fitted
  saedkit index grain.tif --phase Ni --calibration "KB-7 200 kV CL400 bin2" --json
  saedkit index grain.tif --phase my_phase.cif --camera-constant 343.4 --kv 200 --max-index 6
  saedkit index grain_on_au.tif --phase Ni --internal-standard Au --kv 200       # gold rings on the same grid
"""


def register(sub) -> None:
    p = sub.add_parser(
        "index", help="find the phase and zone axis of a spot pattern",
        description="Detect the centre and the spots, find their plane lattice and rank the zone axes of the "
        "candidate phases that explain it, indexing every spot. Without a calibration the match uses "
        "spacing ratios and angles only and fits the camera constant.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("image", help="pattern image (TIFF, PNG, JPEG, MRC or NPY)")
    add_match_options(p)
    add_calibration_options(p)
    add_internal_standard_option(p)
    add_image_options(p)
    add_json_option(p)
    p.set_defaults(func=run)


def add_internal_standard_option(p) -> None:
    """``--internal-standard NAME|CIF``: a ring standard on the same pattern calibrates it."""
    p.add_argument("--internal-standard", metavar="NAME|CIF",
                   help="a ring standard recorded in the same pattern as the specimen (e.g. Au evaporated on "
                   "the grid): K is fitted on its rings and the spots are measured with it, with a small "
                   "reproducibility term (0.1 %%)")


def pipeline_options(args):
    """The PipelineOptions of the match options (shared with `report` and `batch`)."""
    from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS

    return DEFAULT_OPTIONS.replace(voltage_kv=args.kv, min_snr=args.min_snr, d_tolerance_pct=args.d_tol,
                                   angle_tolerance_deg=args.angle_tol, max_index=args.max_index, top=args.top)


def run_analysis(args):
    """The Analysis behind `index` (shared with `report`)."""
    from saedkit.core.crystallography.library import find_phase
    from saedkit.core.errors import InputError
    from saedkit.core.imageio import read_pattern
    from saedkit.core.workflow.pipeline import analyse_spot_pattern

    phases = resolve_phases(args.phase)
    image = read_pattern(args.image)
    camera = resolve_calibration_options(args, voltage_kv=args.kv)
    standard = getattr(args, "internal_standard", None)
    if standard and camera is not None:
        raise InputError("--internal-standard calibrates the pattern itself: give no --calibration or "
                         "--camera-constant with it")
    return analyse_spot_pattern(image, phases=phases, calibration=camera, options=pipeline_options(args),
                                mask=resolve_mask(args, image), centre_xy=resolve_centre(args, image),
                                internal_standard=find_phase(standard) if standard else None,
                                reproducibility_pct=getattr(args, "reproducibility_pct", None) if standard else None)


def run(args):
    analysis = run_analysis(args)
    rec = analysis.to_dict()
    rec["software"] = software_record()
    m = analysis.match
    c = analysis.centre
    lines = [f"{args.image}: centre ({c.x:.2f}, {c.y:.2f}) ± ({c.sigma_x:.2f}, {c.sigma_y:.2f}) px, "
             f"{len(analysis.spots)} spots"]
    if analysis.calibration is not None:
        lines.append("spacings with " + describe_camera(analysis.calibration))
    if m is None:
        lines.append("too few spots to index (need 3 or more)")
    else:
        lat = m.lattice
        mode = "calibrated" if m.calibrated else "uncalibrated (K fitted)"
        lines.append(f"lattice: R1 {lat.r1_px:.2f} px, R2 {lat.r2_px:.2f} px, angle {lat.angle_deg:.2f}°, "
                     f"{int(lat.inliers.sum())}/{len(lat.inliers)} spots on it; {mode}; "
                     f"{m.n_pairs_examined} reflection pairs examined")
        lines += describe_candidates(m, top=args.top)
        if m.candidates:
            lines.append("note: " + m.candidates[0].notes[0])
    return rec, "\n".join(lines)
