"""``saedkit spots``: the centre and the spots of a single-crystal pattern, with spacings when calibrated."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import add_calibration_options, calibration_source_record, resolve_calibration_options
from saedkit._commands._common import add_json_option, finite_or_none, positive_float, software_record
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
    from types import SimpleNamespace

    import numpy as np

    from saedkit.core.calibration.calibrate import calculate_d_from_offset_array, calculate_d_sigma_array
    from saedkit.core.detection.centre import find_centre, manual_centre
    from saedkit.core.distortion import NO_DISTORTION
    from saedkit.core.errors import InputError
    from saedkit.core.imageio import read_pattern
    from saedkit.core.detection.masks import find_auto_mask
    from saedkit.core.detection.spots import find_spots

    if args.max_spots < 1:
        raise InputError(f"--max-spots must be >= 1, got {args.max_spots}")
    resolved = resolve_calibration_options(args)
    image = read_pattern(args.image)
    mask = resolve_mask(args, image)
    if mask is None:
        mask = np.asarray(image.mask, bool) | find_auto_mask(image.data, saturation_value=image.saturation_value)
    given = resolve_centre(args, image)
    centre = manual_centre(*given, sigma_px=0.5) if given else find_centre(image.data, mask=mask)
    spots = find_spots(image.data, mask=mask, centre_xy=centre.xy, min_snr=args.min_snr, max_spots=args.max_spots)
    if resolved is not None:
        K, sK, ell, source = resolved
        cal_like = source if not isinstance(source, str) else SimpleNamespace(
            camera_constant_px_A=K, camera_constant_sigma_px_A=sK, ellipse=NO_DISTORTION)
    else:
        ell, cal_like = NO_DISTORTION, None
    xy = np.array([[s.x, s.y] for s in spots], float).reshape(-1, 2)
    off = xy - centre.xy
    # position uncertainty of the offset: the spot's and the centre's, in quadrature
    sig = np.column_stack([
        np.hypot([s.sigma_x for s in spots], centre.sigma_x),
        np.hypot([s.sigma_y for s in spots], centre.sigma_y),
    ]).reshape(-1, 2)
    sig = np.where(np.isfinite(sig), sig, 0.0)
    ideal = ell.correct_array(off) if len(off) else off
    R = np.hypot(*ideal.T) if len(off) else np.zeros(0)
    # σ_R: the offset's uncertainty along the ideal radial direction (through D⁻¹)
    dinv = ell.inverse_matrix
    with np.errstate(invalid="ignore", divide="ignore"):
        grad = (ideal / R[:, None]) @ dinv if len(off) else np.zeros((0, 2))
    sR = np.sqrt((grad[:, 0] * sig[:, 0]) ** 2 + (grad[:, 1] * sig[:, 1]) ** 2) if len(off) else np.zeros(0)
    angle = np.degrees(np.arctan2(off[:, 1], off[:, 0])) if len(off) else np.zeros(0)
    d = sd = None
    if cal_like is not None and len(off):
        d = calculate_d_from_offset_array(off, cal_like)
        sd = calculate_d_sigma_array(off, sig, cal_like)
    out = []
    for i, s in enumerate(spots):
        e = {
            "x": s.x, "y": s.y,
            "sigma_x_px": finite_or_none(s.sigma_x), "sigma_y_px": finite_or_none(s.sigma_y),
            "intensity": s.intensity, "intensity_sigma": finite_or_none(s.intensity_sigma),
            "peak": s.peak, "snr": s.snr, "width_px": s.width_px,
            "radius_px": float(R[i]), "radius_sigma_px": finite_or_none(sR[i]), "angle_deg": float(angle[i]),
            "saturated": bool(s.saturated),
        }
        if d is not None:
            e["d_A"] = finite_or_none(d[i])
            e["d_sigma_A"] = finite_or_none(sd[i])
        out.append(e)
    rec = {
        "software": software_record(),
        "image": image.to_dict(),
        "centre_px": [centre.x, centre.y],
        "centre_sigma_px": [finite_or_none(centre.sigma_x), finite_or_none(centre.sigma_y)],
        "centre_method": centre.method,
        "centre_confidence": centre.confidence,
        "centre_notes": list(centre.notes),
        "spots": out,
        "calibration": calibration_source_record(resolved),
    }
    if resolved is not None:
        rec["camera_constant_px_A"] = resolved[0]
        rec["camera_constant_rel_sigma"] = resolved[1] / resolved[0]
        rec["ellipse"] = ell.to_dict()
    lines = [
        f"{args.image}: {len(out)} spot{'s' if len(out) != 1 else ''}",
        f"centre (x, y) = ({centre.x:.3f}, {centre.y:.3f}) ± ({centre.sigma_x:.2g}, {centre.sigma_y:.2g}) px "
        f"[{centre.method}]",
    ]
    if resolved is not None:
        K, sK, _, source = resolved
        src = "entered" if isinstance(source, str) else f"calibration {source.name!r}"
        lines.append(f"K = {K:.3f} ± {sK:.2g} px·Å ({src}); ellipse e = {100 * ell.ellipticity:.2f} % "
                     f"at {ell.major_axis_deg:.1f}°")
    lines.append("")
    head = f"  {'x':>9s} {'y':>9s} {'intensity':>11s} {'SNR':>7s} {'R (px)':>9s}"
    if d is not None:
        head += f" {'d (Å)':>8s} {'± (Å)':>7s}"
    lines.append(head)
    for i, s in enumerate(spots):
        line = f"  {s.x:9.2f} {s.y:9.2f} {s.intensity:11.1f} {s.snr:7.1f} {R[i]:9.2f}"
        if d is not None:
            dv = d[i]
            line += f" {dv:8.4f} {sd[i]:7.4f}" if math.isfinite(dv) else f" {'-':>8s} {'-':>7s}"
        lines.append(line)
    if resolved is None:
        lines.append("(no calibration: give --calibration NAME or --camera-constant K for d-spacings)")
    return rec, "\n".join(lines)
