"""``saedkit phases``: the built-in phase library with sources."""

from __future__ import annotations

from saedkit._commands._common import add_json_option, software_record


def register(sub) -> None:
    p = sub.add_parser(
        "phases",
        help="list the built-in phase library with sources",
        description="List the built-in phases (calibration standards and test phases) with their "
        "cells, space groups and the published source of each lattice parameter. "
        "With PHASE (a name, alias or CIF path) show that phase and its first reflections.",
        epilog="examples:\n  saedkit phases\n  saedkit phases rutile --json\n  saedkit phases my_phase.cif",
        formatter_class=__import__("argparse").RawDescriptionHelpFormatter,
    )
    p.add_argument("phase", nargs="?", help="show one phase: library name, alias or CIF path")
    p.add_argument("--d-min", type=float, default=1.0, metavar="A",
                   help="with PHASE: list rings down to this spacing in Å (default 1.0)")
    add_json_option(p)
    p.set_defaults(func=run)


def run(args):
    from saedkit.core.crystallography.library import LIBRARY, find_phase, list_library
    from saedkit.core.crystallography.structure_factors import calculate_ring_families

    if args.phase:
        phase = find_phase(args.phase)
        rings = calculate_ring_families(phase, d_min_A=args.d_min)
        rec = {"software": software_record(), "phase": phase.to_dict(), "rings": [r.to_dict() for r in rings]}
        from saedkit.core.crystallography.crystal import format_indices

        lines = [f"{phase.name}  {phase.space_group.hm} (No. {phase.space_group.number})  "
                 f"a={phase.cell.a:.5g} b={phase.cell.b:.5g} c={phase.cell.c:.5g} Å  "
                 f"α={phase.cell.alpha:g} β={phase.cell.beta:g} γ={phase.cell.gamma:g}°",
                 f"source: {phase.source or '(none given)'}"]
        lines += [f"note: {n}" for n in phase.notes]
        lines += ["", "   hkl        d (Å)   mult   rel. I"]
        imax = max((r.intensity for r in rings), default=1.0)
        for r in rings:
            lines.append(f"  {format_indices(r.hkl):10s} {r.d_A:8.4f} {r.multiplicity:6d} {100 * r.intensity / imax:8.1f}")
        return rec, "\n".join(lines)
    entries = []
    lines = [f"{'name':6s} {'space group':12s} {'a (Å)':>9s} {'c (Å)':>9s}  {'aliases':28s} source"]
    roles = {e.name: e for e in LIBRARY}
    for entry, phase in list_library():
        entries.append({
            "name": entry.name, "aliases": list(entry.aliases), "role": entry.role,
            "space_group": phase.space_group.hm, "space_group_number": phase.space_group.number,
            "cell": phase.cell.to_dict(), "source": phase.source, "notes": list(phase.notes),
        })
        first = phase.source.split(". B values")[0]
        lines.append(f"{entry.name:6s} {phase.space_group.hm:12s} {phase.cell.a:9.5f} {phase.cell.c:9.5f}  "
                     f"{', '.join(roles[entry.name].aliases)[:28]:28s} {first}")
    return {"software": software_record(), "phases": entries}, "\n".join(lines)
