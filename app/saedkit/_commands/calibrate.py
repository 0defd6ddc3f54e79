"""``saedkit calibrate``: the camera constant from a ring pattern (or, with --spots, a single-crystal pattern) of a known standard."""

from __future__ import annotations

import argparse

from saedkit._calib_reproducibility import choose_reproducibility
from saedkit._commands._calib_options import add_reproducibility_option
from saedkit._commands._common import add_json_option, finite_or_none, positive_float, software_record

_EPILOG = """\
examples:
  saedkit calibrate au_film.tif --standard Au --kv 200
  saedkit calibrate au_film.tif --standard Au --kv 200 --pixel-size-um 15 --json
  saedkit calibrate al_film.tif --standard Al --kv 120 --save "120 kV CL 800 mm" \\
      --instrument "TEM-1, 2k camera" --nominal-camera-length-mm 800 --binning 2
  saedkit calibrate film.tif --standard my_standard.cif --kv 300
  saedkit calibrate si_011.tif --standard Si --kv 200 --spots --zone 0 1 1      # a single-crystal standard

The rings are found and assigned to the standard's ring families without a
starting K; K is fitted together with the centre and the elliptical
distortion. The quality is "poor" (with the reason in words) when fewer than
three rings are assigned, a clear ring matches no family, the residuals are
systematic, or the ring intensities do not fit the standard.
"""


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number, got {text!r}") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"must be >= 1, got {text!r}")
    return v


def register(sub) -> None:
    p = sub.add_parser(
        "calibrate",
        help="fit the camera constant on a ring pattern of a standard (Au, Al, a CIF)",
        description="Fit the camera constant K (pixel·Å, R = K/d), the pattern centre and the elliptical "
        "distortion on a ring pattern of a polycrystalline standard, and optionally save the result in the "
        "calibration library.",
        epilog=_EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("image", help="ring pattern of the standard (TIFF, MRC, PNG, JPEG, .npy)")
    p.add_argument("--standard", required=True, metavar="NAME|CIF",
                   help="the standard: a library phase (Au, Al, ...; see `saedkit phases`) or a CIF file")
    p.add_argument("--kv", type=positive_float, metavar="KV",
                   help="accelerating voltage in kV (default: from the image file, if it says)")
    p.add_argument("--pixel-size-um", type=positive_float, metavar="P",
                   help="detector pixel size after binning in µm, for λL and the camera length "
                   "(default: from the image file, if it says)")
    p.add_argument("--d-tol", type=positive_float, default=1.5, metavar="PCT",
                   help="a ring is assigned to a family within this many percent of K/d (default 1.5)")
    p.add_argument("--min-snr", type=positive_float, default=4.0, metavar="S",
                   help="smallest ring signal-to-noise ratio in the radial profile (default 4)")
    p.add_argument("--no-ellipse", action="store_true", help="fit circles (no elliptical distortion)")
    form = p.add_mutually_exclusive_group()
    form.add_argument("--exact", action="store_true",
                      help="use the exact camera equation R = L·tan 2θ (the default; kept for scripts)")
    form.add_argument("--small-angle", action="store_true",
                      help="ring standards: use the small-angle form R = λL/d instead of the exact "
                      "R = L·tan 2θ (they differ by 2×10⁻⁵ to 4×10⁻³ relative at 60–300 kV, d = 3–0.5 Å); "
                      "--spots always uses the small-angle form")
    p.add_argument("--expect-k", type=positive_float, metavar="K",
                   help="roughly the camera constant to expect (px·Å, e.g. from the nominal camera length): "
                   "rings are assigned only with K within ±10 %% of it — needed when a second phase of the "
                   "standard's structure (Cu with Au) gives rings as strong as the standard's")
    p.add_argument("--spots", action="store_true",
                   help="the image is a single-crystal spot pattern of the standard (e.g. Si), not a ring pattern")
    p.add_argument("--zone", type=int, nargs=3, metavar=("U", "V", "W"),
                   help="with --spots: the zone axis family of the pattern, if known (e.g. 0 1 1)")
    p.add_argument("--save", metavar="NAME", help="save the calibration in the library under NAME")
    p.add_argument("--overwrite", action="store_true", help="with --save: replace a calibration of the same name")
    p.add_argument("--instrument", default="", metavar="TEXT", help="with --save: microscope and camera (free text)")
    p.add_argument("--nominal-camera-length-mm", type=positive_float, metavar="L",
                   help="with --save: the camera length the microscope displayed (default: from the image file)")
    p.add_argument("--binning", type=_positive_int, default=1, metavar="N",
                   help="with --save: camera binning (default 1)")
    p.add_argument("--notes", default="", metavar="TEXT", help="with --save: free text")
    add_reproducibility_option(p, what="stored with --save (default: estimated from the library's earlier "
                               "calibrations of the same voltage, camera length and binning when there are 3 or "
                               "more, else")
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    import numpy as np

    from saedkit.core.calibration.calibrate import calibrate_from_rings
    from saedkit.core.calibration.library import CalibrationLibrary, SavedCalibration
    from saedkit.core.crystallography.crystal import format_indices
    from saedkit.core.errors import InputError
    from saedkit.core.imageio import read_pattern
    from saedkit.core.crystallography.library import find_phase
    from saedkit.core.detection.masks import find_auto_mask

    phase = find_phase(args.standard)
    image = read_pattern(args.image)
    kv = args.kv or image.voltage_kv
    if kv is None:
        raise InputError(f"the accelerating voltage is not recorded in {args.image}: give it with --kv")
    px = args.pixel_size_um or image.pixel_size_um
    if args.save is not None and not args.save.strip():
        raise InputError("--save needs a non-empty name")
    mask = np.asarray(image.mask, bool) | find_auto_mask(image.data, saturation_value=image.saturation_value)
    if args.spots:
        from saedkit.core.workflow.pipeline import calibrate_spot_standard

        cal = calibrate_spot_standard(image, phase, voltage_kv=kv, zone=args.zone, pixel_size_um=px, mask=mask,
                                      fit_ellipse=not args.no_ellipse)
    elif args.zone:
        raise InputError("--zone goes with --spots (a single-crystal pattern)")
    else:
        cal = calibrate_from_rings(image, phase, voltage_kv=kv, mask=mask, pixel_size_um=px,
                                   d_tolerance_pct=args.d_tol, min_snr=args.min_snr, fit_ellipse=not args.no_ellipse,
                                   exact_camera_equation=not args.small_angle,
                                   expected_camera_constant_px_A=args.expect_k)
    lib = CalibrationLibrary()
    nominal_L = args.nominal_camera_length_mm or image.camera_length_mm
    rep, basis = choose_reproducibility(args.reproducibility_pct, lib, voltage_kv=kv,
                                        nominal_camera_length_mm=nominal_L, binning=args.binning)
    cal = cal.with_reproducibility(rep)
    c = cal.centre
    rec = {
        "software": software_record(),
        "image": image.to_dict(),
        "centre_px": [c.x, c.y],
        "centre_sigma_px": [finite_or_none(c.sigma_x), finite_or_none(c.sigma_y)],
    }
    rec.update({k: v for k, v in cal.to_dict().items() if k not in ("centre_px", "centre_sigma_px")})
    rec["reproducibility_basis"] = basis

    lines = [
        f"{args.image}: {phase.name} at {kv:g} kV — quality {cal.quality}",
        f"K = {cal.camera_constant_px_A:.3f} ± {cal.camera_constant_total_sigma_px_A:.2g} px·Å "
        f"(total {100 * cal.camera_constant_total_rel_sigma:.2g} %: fit {cal.camera_constant_sigma_px_A:.2g}, "
        f"reproducibility {cal.reproducibility_pct:.2g} % — {basis})",
        f"centre (x, y) = ({c.x:.3f}, {c.y:.3f}) ± ({c.sigma_x:.2g}, {c.sigma_y:.2g}) px",
        f"ellipse e = {100 * cal.ellipse.ellipticity:.3f} ± {100 * cal.ellipticity_sigma:.2g} % at "
        f"{cal.ellipse.major_axis_deg:.1f} ± {min(cal.major_axis_sigma_deg, 90):.2g}°",
    ]
    if cal.camera_length_mm is not None:
        lines.append(f"λL = {cal.lambda_L_mm_A:.4f} ± {cal.lambda_L_sigma_mm_A:.2g} mm·Å, camera length "
                     f"L = {cal.camera_length_mm:.1f} ± {cal.camera_length_sigma_mm:.2g} mm (pixel {px:g} µm; "
                     f"statistical {cal.camera_length_stat_sigma_mm:.2g}, systematic {cal.camera_length_sys_sigma_mm:.2g})")
    else:
        lines.append("λL and the camera length need the pixel size (--pixel-size-um)")
    lines += ["", f"  {'hkl':9s} {'d (Å)':>8s} {'R (px)':>10s} {'± (px)':>8s} {'resid (px)':>11s} {'resid (%)':>10s}"]
    for r in cal.rings:
        blend = f"  + {', '.join(format_indices(h) for h in r.blend)}" if r.blend else ""
        lines.append(f"  {format_indices(r.hkl):9s} {r.d_A:8.4f} {r.radius_px:10.3f} {r.radius_sigma_px:8.3f} "
                     f"{r.residual_px:+11.3f} {r.residual_pct:+10.4f}{blend}")
    if cal.unassigned_radii_px:
        lines.append("  unassigned rings at R = " + ", ".join(f"{r:.1f}" for r in cal.unassigned_radii_px) + " px")
    for w in cal.warnings:
        lines.append(f"warning: {w}")
    if args.save:
        saved = SavedCalibration.from_calibration(
            cal, name=args.save, instrument=args.instrument,
            nominal_camera_length_mm=nominal_L,
            binning=args.binning, notes=args.notes)
        lib.save(saved, overwrite=args.overwrite)
        rec["saved"] = {"name": saved.name, "library": str(lib.path),
                        "broken_library_moved_to": None if lib.set_aside_path is None else str(lib.set_aside_path)}
        lines.append(f"saved as {saved.name!r} in {lib.path}")
        if lib.set_aside_path is not None:
            lines.append(f"note: the old library file was unreadable and has been moved to {lib.set_aside_path}")
    return rec, "\n".join(lines)
