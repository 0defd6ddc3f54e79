"""``saedkit spots``: the centre and the spots of a single-crystal pattern, with spacings when calibrated."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import (
    add_calibration_options,
    calibration_source_record,
    describe_camera,
    resolve_calibration_options,
)
from saedkit._commands._common import add_json_option, positive_float, software_record
from saedkit._commands._image_options import add_image_options, resolve_centre, resolve_mask

_EPILOG = """\
examples:
  saedkit spots grain.tif
  saedkit spots grain.tif --json --min-snr 8
  saedkit spots grain.tif --calibration "200 kV CL 600 mm"
  saedkit spots grain.tif --camera-constant 1520.4 --json
  saedkit spots frame.tif --centre 255.4 261.0 --mask gaps.tif

The centre comes from the direct beam, the Friedel pairs of spot positions,
the support-film halo or the symmetry of the pattern, whichever is clearest
(centre_method, centre_confidence and centre_notes say which and why), or
from --centre X Y. Detector gaps, hot and dead pixels, the saturated beam and
a beam stop are masked automatically; --mask FILE adds pixels of your own.
Saturated spots are kept for their positions and flagged ("saturated"). With a
calibration, each spot's offset from the centre is corrected for the
calibration's elliptical distortion before d = K/R; σ_d combines the spot's
and the centre's position uncertainties with σ_K.
"""


def register(sub) -> None:
    p = sub.add_parser(
        "spots",
        help="find the centre and the spots; d-spacings when calibrated",
        description="Find the pattern centre (Friedel symmetry) and the diffraction spots with sub-pixel "
        "positions, intensities and signal-to-noise ratios; with a calibration, their d-spacings.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("image", help="spot pattern (TIFF, MRC, PNG, JPEG, .npy)")
    add_calibration_options(p)
    p.add_argument("--min-snr", type=positive_float, default=5.0, metavar="S",
                   help="smallest spot peak signal-to-noise ratio (default 5)")
    p.add_argument("--max-spots", type=int, default=1000, metavar="N", help="keep at most N spots (default 1000)")
    add_image_options(p)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    import math

    from saedkit.core.errors import InputError
    from saedkit.core.imageio import read_pattern
    from saedkit.core.workflow.analysis import Analysis
    from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS, detect_spots, locate_centre, prepare_mask

    if args.max_spots < 1:
        raise InputError(f"--max-spots must be >= 1, got {args.max_spots}")
    camera = resolve_calibration_options(args)
    image = read_pattern(args.image)
    opts = DEFAULT_OPTIONS.replace(min_snr=args.min_snr, max_spots=args.max_spots)
    mask = prepare_mask(image, resolve_mask(args, image))
    centre = locate_centre(image, mask, centre_xy=resolve_centre(args, image))
    spots = detect_spots(image, mask, centre, options=opts)
    analysis = Analysis(image=image, centre=centre, spots=spots, calibration=camera,
                        parameters={"min_snr": args.min_snr, "max_spots": args.max_spots})
    m = analysis.measure_spots()
    rec = analysis.to_dict()
    rec["software"] = software_record()
    rec["calibration"] = calibration_source_record(camera)
    rec["centre_confidence"] = centre.confidence
    rec["centre_notes"] = list(centre.notes)
    if camera is not None:
        rec["camera_constant_px_A"] = camera.camera_constant_px_A
        rec["camera_constant_rel_sigma"] = camera.camera_constant_rel_sigma
        rec["ellipse"] = camera.ellipse.to_dict()
    n = len(spots)
    lines = [
        f"{args.image}: {n} spot{'s' if n != 1 else ''}",
        f"centre (x, y) = ({centre.x:.3f}, {centre.y:.3f}) ± ({centre.sigma_x:.2g}, {centre.sigma_y:.2g}) px "
        f"[{centre.method}]",
    ]
    if camera is not None:
        ell = camera.ellipse
        lines.append(describe_camera(camera) + f"; ellipse e = {100 * ell.ellipticity:.2f} % "
                     f"at {ell.major_axis_deg:.1f}°")
    lines.append("")
    head = f"  {'x':>9s} {'y':>9s} {'intensity':>11s} {'SNR':>7s} {'R (px)':>9s}"
    if camera is not None:
        head += f" {'d (Å)':>8s} {'± (Å)':>7s}"
    lines.append(head)
    for i, s in enumerate(spots):
        line = f"  {s.x:9.2f} {s.y:9.2f} {s.intensity:11.1f} {s.snr:7.1f} {m.radius_px[i]:9.2f}"
        if camera is not None:
            dv = m.d_A[i]
            line += f" {dv:8.4f} {m.d_sigma_A[i]:7.4f}" if math.isfinite(dv) else f" {'-':>8s} {'-':>7s}"
        lines.append(line)
    if camera is None:
        lines.append("(no calibration: give --calibration NAME or --camera-constant K for d-spacings)")
    else:
        lines.append("(± is the total standard uncertainty: statistical and reproducibility of K; parts in --json)")
    return rec, "\n".join(lines)
