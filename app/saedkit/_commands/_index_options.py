"""Options shared by the commands that run the zone-axis matcher (index, tiltpair, report, batch)."""

from __future__ import annotations

from saedkit._commands._common import positive_float


def add_match_options(parser, *, phases_required: bool = True) -> None:
    """--phase (repeatable), --kv, tolerances, --max-index, --top."""
    parser.add_argument("--phase", action="append", required=phases_required, metavar="NAME|CIF",
                        help="candidate phase: a library name (see `saedkit phases`) or a CIF file; repeat for several")
    parser.add_argument("--kv", type=positive_float, metavar="KV",
                        help="accelerating voltage in kV (default: from the image, else 200)")
    parser.add_argument("--d-tol", type=positive_float, default=2.5, metavar="PCT",
                        help="spacing tolerance in %% (default 2.5)")
    parser.add_argument("--angle-tol", type=positive_float, default=2.0, metavar="DEG",
                        help="angle tolerance in degrees (default 2)")
    parser.add_argument("--max-index", type=int, default=10, metavar="N",
                        help="largest zone-axis index |u|, |v|, |w| considered (default 10)")
    parser.add_argument("--top", type=int, default=5, metavar="N", help="number of candidates listed (default 5)")
    parser.add_argument("--min-snr", type=positive_float, default=5.0, metavar="S",
                        help="smallest spot signal-to-noise ratio kept (default 5)")


def resolve_phases(names) -> list:
    """Phases from library names or CIF paths."""
    from saedkit.core.crystallography.library import find_phase

    return [find_phase(n) for n in (names or [])]


def _pad(text: str, width: int) -> str:
    """Left-justify text whose overbars are combining characters (they take no column)."""
    import unicodedata

    shown = sum(1 for ch in text if not unicodedata.combining(ch))
    return text + " " * max(width - shown, 0)


def describe_candidates(match, *, top: int) -> list[str]:
    """Human-readable lines for the ranked candidates."""
    from saedkit.core.crystallography.crystal import format_indices

    lines = [f"{'#':>2} {'phase':6s} {'zone':14s} {'score':>6s} {'d err %':>8s} {'ang err°':>8s} {'rot°':>7s} "
             f"{'K (px·Å)':>9s} {'explained':>9s}"]
    for i, c in enumerate(match.candidates[:top], 1):
        zone = format_indices(c.zone, brackets="[]")
        if c.zone_four_index is not None:
            zone += " " + format_indices(c.zone_four_index, brackets="[]")
        lines.append(f"{i:2d} {c.phase:6s} {_pad(zone, 14)} {c.score:6.3f} {c.d_error_pct:8.2f} {c.angle_error_deg:8.2f} "
                     f"{c.in_plane_rotation_deg:7.1f} {c.camera_constant_px_A:9.1f} {c.n_explained:4d}/{c.n_spots:<4d}")
    if not match.candidates:
        lines.append("   no candidate: " + "; ".join(match.notes))
    else:
        # what the best candidate found beyond the zero-order net: double diffraction, HOLZ ring, tilt
        for note in match.candidates[0].notes[1:]:
            lines.append("   " + note)
    if match.second is not None:
        s2 = match.second
        lines.append(f"second lattice: {s2.phase} {format_indices(s2.zone, brackets='[]')}, "
                     f"{s2.n_explained} spots, score {s2.score:.3f}")
    orel = match.orientation_relationship
    if orel is not None:
        lines.append(f"orientation relationship: {format_indices(orel.plane_1)}{orel.phase_1} ∥ "
                     f"{format_indices(orel.plane_2)}{orel.phase_2}, {format_indices(orel.direction_1, brackets='[]')}"
                     f"{orel.phase_1} ∥ {format_indices(orel.direction_2, brackets='[]')}{orel.phase_2} "
                     f"(planes {orel.plane_deviation_deg:.2f}° apart)")
    return lines
