"""``saedkit rings``: the rings of a polycrystalline pattern, with spacings when calibrated."""

from __future__ import annotations

import argparse

from saedkit._commands._calib_options import (
    add_calibration_options,
    calibration_source_record,
    describe_camera,
    resolve_calibration_options,
)
from saedkit._commands._common import add_json_option, finite_or_none, positive_float, software_record
from saedkit._commands._image_options import add_image_options, resolve_centre, resolve_mask

_EPILOG = """\
examples:
  saedkit rings film.tif
  saedkit rings film.tif --json
  saedkit rings film.tif --calibration "200 kV CL 600 mm"
  saedkit rings film.tif --camera-constant 1520.4 --camera-constant-sigma 0.8 --json

Each ring's radius is the mean of its ellipse's semi-axes (the ideal radius,
with the pattern's own elliptical distortion fitted and corrected). With a
calibration or a camera constant, d = K/R with σ_d/d = √((σ_R/R)² + (σ_K/K)²).
"""


def register(sub) -> None:
    p = sub.add_parser(
        "rings",
        help="find the rings, their centre and ellipse; d-spacings when calibrated",
        description="Find the rings of a polycrystalline pattern: their common centre, the elliptical "
        "distortion and each ring's radius with its uncertainty; with a calibration, the d-spacings.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("image", help="ring pattern (TIFF, MRC, PNG, JPEG, .npy)")
    add_calibration_options(p)
    p.add_argument("--min-snr", type=positive_float, default=4.0, metavar="S",
                   help="smallest ring signal-to-noise ratio in the radial profile (default 4)")
    p.add_argument("--no-ellipse", action="store_true", help="fit circles (no elliptical distortion)")
    add_image_options(p, centre_is_guess=True)
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from saedkit.core.imageio import read_pattern
    from saedkit.core.measure import measure_radii
    from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS, detect_rings, prepare_mask

    camera = resolve_calibration_options(args)
    image = read_pattern(args.image)
    opts = DEFAULT_OPTIONS.replace(ring_min_snr=args.min_snr, fit_ellipse=not args.no_ellipse)
    fit = detect_rings(image, prepare_mask(image, resolve_mask(args, image)), options=opts,
                       centre_guess_xy=resolve_centre(args, image))
    c, ell = fit.centre, fit.ellipse
    m = measure_radii([r.radius_px for r in fit.rings], [r.radius_sigma_px for r in fit.rings], camera)
    rings = []
    for i, r in enumerate(fit.rings):
        entry = {
            "radius_px": r.radius_px,
            "radius_sigma_px": finite_or_none(r.radius_sigma_px),
            "semi_major_px": r.radius_px * (1 + ell.ellipticity / 2),
            "semi_minor_px": r.radius_px * (1 - ell.ellipticity / 2),
            "height": r.height,
            "width_px": r.width_px,
            "snr": r.snr,
            "n_points": r.n_points,
        }
        if camera is not None:
            row = m.row(i)
            for k in ("d_A", "d_sigma_A", "d_stat_sigma_A", "d_sys_sigma_A", "g_per_nm", "g_sigma_per_nm",
                      "g_stat_sigma_per_nm", "g_sys_sigma_per_nm"):
                entry[k] = row[k]
        rings.append(entry)
    rec = {
        "software": software_record(),
        "image": image.to_dict(),
        "parameters": opts.to_dict(),
        "centre_px": [c.x, c.y],
        "centre_sigma_px": [finite_or_none(c.sigma_x), finite_or_none(c.sigma_y)],
        "centre_method": c.method,
        "ellipse": {
            "ellipticity": ell.ellipticity,
            "major_axis_deg": ell.major_axis_deg,
            "ellipticity_sigma": finite_or_none(fit.ellipticity_sigma),
            "major_axis_sigma_deg": finite_or_none(fit.major_axis_sigma_deg),
        },
        "residual_rms_px": finite_or_none(fit.residual_rms_px),
        "rings": rings,
        "rejected_rings": [x.to_dict() for x in fit.rejected],
        "calibration": calibration_source_record(camera),
    }
    if camera is not None:
        from saedkit.core.calibration.camera import camera_terms

        rec["camera"] = camera_terms(camera).to_dict()
        rec["camera_constant_px_A"] = camera.camera_constant_px_A
        rec["camera_constant_rel_sigma"] = camera.camera_constant_rel_sigma
    lines = [
        f"{args.image}: {len(rings)} ring{'s' if len(rings) != 1 else ''}",
        f"centre (x, y) = ({c.x:.3f}, {c.y:.3f}) ± ({c.sigma_x:.2g}, {c.sigma_y:.2g}) px",
        f"ellipse e = {100 * ell.ellipticity:.3f} ± {100 * fit.ellipticity_sigma:.2g} % at "
        f"{ell.major_axis_deg:.1f} ± {min(fit.major_axis_sigma_deg, 90):.2g}°",
    ]
    if camera is not None:
        lines.append(describe_camera(camera))
    lines.append("")
    head = f"  {'R (px)':>10s} {'± (px)':>8s} {'SNR':>7s}"
    if camera is not None:
        head += f" {'d (Å)':>9s} {'± (Å)':>8s}"
    lines.append(head)
    for i, r in enumerate(fit.rings):
        line = f"  {r.radius_px:10.3f} {r.radius_sigma_px:8.3f} {r.snr:7.1f}"
        if camera is not None:
            line += f" {m.d_A[i]:9.4f} {m.d_sigma_A[i]:8.4f}"
        lines.append(line)
    for x in fit.rejected:
        lines.append(f"  not a ring: R = {x.peak.radius_px:.1f} px, {x.reason}")
    if camera is None:
        lines.append("(no calibration: give --calibration NAME or --camera-constant K for d-spacings)")
    return rec, "\n".join(lines)
