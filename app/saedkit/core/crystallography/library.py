"""The built-in phase library: calibration standards and common test phases.

Each phase is a CIF file in ``saedkit/core/phases/`` written for saedkit from
published lattice data, with its source in ``_publ_section_references``.
A phase is asked for by a library name (case-insensitive; the formula as a
chemist writes it, or an alias such as ``gold`` or ``rutile``) or by the path
of a CIF file.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from importlib import resources
from pathlib import Path

from saedkit.core.crystallography.crystal import Phase, read_phase_cif
from saedkit.core.errors import CrystalError

__all__ = ["LibraryEntry", "LIBRARY", "list_library", "find_phase", "read_library_phase"]


@dataclass(frozen=True)
class LibraryEntry:
    """One phase of the built-in library."""

    name: str
    file: str
    aliases: tuple[str, ...]
    role: str  # what it is usually for


LIBRARY: tuple[LibraryEntry, ...] = (
    LibraryEntry("Au", "Au.cif", ("gold",), "ring standard (evaporated film)"),
    LibraryEntry("Al", "Al.cif", ("aluminium", "aluminum"), "ring standard (evaporated film)"),
    LibraryEntry("Si", "Si.cif", ("silicon",), "single-crystal standard"),
    LibraryEntry("Cu", "Cu.cif", ("copper",), "fcc metal"),
    LibraryEntry("Ni", "Ni.cif", ("nickel",), "fcc metal"),
    LibraryEntry("Fe", "Fe.cif", ("alpha-Fe", "α-Fe", "a-Fe", "iron", "ferrite"), "bcc metal"),
    LibraryEntry("NaCl", "NaCl.cif", ("halite", "sodium chloride"), "rock-salt crystal"),
    LibraryEntry("MgO", "MgO.cif", ("periclase", "magnesia"), "rock-salt oxide"),
    LibraryEntry("TiO2", "TiO2.cif", ("rutile", "TiO2-rutile"), "tetragonal oxide"),
    LibraryEntry("Ti", "Ti.cif", ("alpha-Ti", "α-Ti", "a-Ti", "titanium"), "hcp metal"),
    LibraryEntry("Mg", "Mg.cif", ("magnesium",), "hcp metal"),
)


def _key(text: str) -> str:
    return "".join(str(text).lower().split())


@lru_cache(maxsize=None)
def read_library_phase(name: str) -> Phase:
    """Read one built-in phase by its library name (exact)."""
    for entry in LIBRARY:
        if entry.name == name:
            ref = resources.files("saedkit.core.crystallography") / "phases" / entry.file
            with resources.as_file(ref) as path:
                phase = read_phase_cif(path)
            return Phase(entry.name, phase.cell, phase.space_group, phase.sites,
                         phase.formula, phase.source, None, phase.notes)
    raise CrystalError(f"no built-in phase named {name!r}")


def list_library() -> list[tuple[LibraryEntry, Phase]]:
    """Every built-in phase with its library entry, in library order."""
    return [(e, read_library_phase(e.name)) for e in LIBRARY]


def find_phase(name_or_path: str | Path) -> Phase:
    """A phase from a library name or alias (case-insensitive), or from a CIF path.

    Raises
    ------
    CrystalError
        When the text is neither a library name nor a readable CIF file; the
        message lists the library names.

    Examples
    --------
    >>> find_phase("gold").name
    'Au'
    """
    text = str(name_or_path).strip()
    key = _key(text)
    for entry in LIBRARY:
        if key in {_key(entry.name), *(_key(a) for a in entry.aliases)}:
            return read_library_phase(entry.name)
    path = Path(text).expanduser()
    if path.suffix.lower() == ".cif" or path.is_file():
        return read_phase_cif(path)
    names = ", ".join(e.name for e in LIBRARY)
    raise CrystalError(f"unknown phase {text!r}: give a library name ({names}) or the path of a CIF file")
