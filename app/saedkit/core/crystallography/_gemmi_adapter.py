"""Every call into gemmi lives here; the rest of saedkit sees only its own types.

gemmi provides: space-group look-up by Hermann–Mauguin symbol, number or
symmetry operations; the symmetry operations themselves; element look-up;
the electron scattering factors of International Tables Vol. C Table 4.3.2.2
(``c4322``) and the X-ray ones (``it92``, for the Mott–Bethe cross-check);
and the CIF parser.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import gemmi
import numpy as np

from saedkit.core.errors import CrystalError

__all__ = [
    "SpaceGroupData",
    "find_space_group",
    "space_group_from_operations",
    "check_element",
    "electron_sf_coefficients",
    "xray_sf",
    "read_cif_block",
    "CifContent",
    "find_setting_choices",
]


@dataclass(frozen=True)
class SpaceGroupData:
    """Plain data of a space group, free of gemmi objects."""

    hm: str  # short Hermann–Mauguin symbol, e.g. "F d -3 m"
    setting: str  # extended symbol with setting, e.g. "F d -3 m:2"
    number: int
    crystal_system: str
    point_group: str
    laue_class: str
    rotations: np.ndarray  # (n_ops, 3, 3) int, acting on fractional coordinates
    translations: np.ndarray  # (n_ops, 3) float, fractions (centring included)


def _from_gemmi(sg) -> SpaceGroupData:
    ops = sg.operations()
    rot = []
    tran = []
    for op in ops:  # iterating gemmi's GroupOps yields symmetry x centring
        rot.append(np.array(op.rot, dtype=int) // op.DEN)
        tran.append(np.array(op.tran, dtype=float) / op.DEN)
    return SpaceGroupData(
        hm=sg.hm,
        setting=sg.xhm(),
        number=sg.number,
        crystal_system=sg.crystal_system_str(),
        point_group=sg.point_group_hm(),
        laue_class=sg.laue_str(),
        rotations=np.array(rot, dtype=int),
        translations=np.array(tran, dtype=float) % 1.0,
    )


def find_space_group(symbol_or_number: str | int) -> SpaceGroupData:
    """Look up a space group by Hermann–Mauguin symbol or International Tables number.

    Groups with two origin choices take origin choice 2 (the centre of
    symmetry at the origin), the usual choice of modern CIF files; append
    ``:1`` to the symbol for origin choice 1. Rhombohedral groups take
    hexagonal axes.

    Raises
    ------
    CrystalError
        When no such space group exists.
    """
    if isinstance(symbol_or_number, (int, np.integer)) or str(symbol_or_number).strip().isdigit():
        n = int(symbol_or_number)
        sg = gemmi.find_spacegroup_by_number(n) if 1 <= n <= 230 else None
        if sg is None:
            raise CrystalError(f"space group number must be 1 to 230, got {symbol_or_number!r}")
        symbol = sg.hm
    else:
        symbol = _normalise_symbol(str(symbol_or_number))
        if not symbol:
            raise CrystalError("space group symbol is empty")
    sg = None
    if ":" not in symbol:
        sg = gemmi.find_spacegroup_by_name(symbol + ":2")
        if sg is not None and gemmi.find_spacegroup_by_name(symbol + ":1") is None:
            sg = None  # ":2" meant something else (not an origin choice)
    if sg is None:
        sg = gemmi.find_spacegroup_by_name(symbol)
    if sg is None:
        raise CrystalError(f"unknown space group {symbol_or_number!r} (give a Hermann–Mauguin symbol such as 'F m -3 m' or a number 1–230)")
    return _from_gemmi(sg)


def _normalise_symbol(text: str) -> str:
    """A symbol with its origin written as some databases do (a trailing ``S`` for origin choice 1,
    ``Z`` for the origin at the centre of symmetry, i.e. 2) rewritten as ``:1``/``:2``."""
    symbol = text.strip()
    m = re.fullmatch(r"(.*\S)\s+([SZ])", symbol)
    if m and ":" not in symbol:
        base, suffix = m.group(1), {"S": ":1", "Z": ":2"}[m.group(2)]
        if gemmi.find_spacegroup_by_name(base + suffix) is not None and gemmi.find_spacegroup_by_name(base + ":1"):
            return base + suffix
    return symbol


def find_setting_choices(symbol_or_number: str | int) -> tuple[SpaceGroupData, ...]:
    """The settings a bare space-group symbol leaves open, or ``()`` when it names one.

    A symbol without ``:1``/``:2`` of a group with two origin choices (e.g.
    ``F d -3 m``, ``P n -3 m``) returns both origin choices (1 first); a
    rhombohedral symbol without ``:H``/``:R`` (e.g. ``R -3 c``) returns the
    hexagonal and the rhombohedral axes (H first). A symbol that already
    names its setting, or a group with only one, returns ``()``.
    """
    text = _normalise_symbol(str(symbol_or_number))
    if text.isdigit():
        sg = gemmi.find_spacegroup_by_number(int(text)) if 1 <= int(text) <= 230 else None
        if sg is None:
            return ()
        text = sg.hm
    if ":" in text:
        return ()
    for pair in ((":1", ":2"), (":H", ":R")):
        found = [gemmi.find_spacegroup_by_name(text + suffix) for suffix in pair]
        if all(sg is not None for sg in found) and found[0].ext != found[1].ext:
            return tuple(_from_gemmi(sg) for sg in found)
    return ()


def space_group_from_operations(ops_xyz: list[str]) -> SpaceGroupData:
    """Identify the space group (and setting) from symmetry operations in xyz form."""
    try:
        ops = gemmi.GroupOps([gemmi.Op(s.strip().replace(" ", "")) for s in ops_xyz])
    except (RuntimeError, ValueError) as exc:
        raise CrystalError(f"cannot read symmetry operation: {exc}") from None
    sg = gemmi.find_spacegroup_by_ops(ops)
    if sg is None:
        raise CrystalError("the symmetry operations do not form a known space group setting")
    return _from_gemmi(sg)


_ELEMENT_RE = re.compile(r"^([A-Z][a-z]?)")


def check_element(symbol: str) -> str:
    """Return the element symbol in canonical case, or raise CrystalError.

    A CIF type symbol such as ``Fe2+`` or ``O2-`` is reduced to the element.
    """
    text = str(symbol).strip()
    m = _ELEMENT_RE.match(text[:1].upper() + text[1:2].lower() + text[2:] if text else "")
    if not m:
        raise CrystalError(f"unknown element {symbol!r}")
    for cand in (m.group(1), m.group(1)[0]):
        el = gemmi.Element(cand)
        if el.atomic_number > 0 and el.name.lower() == cand.lower():
            return el.name
    raise CrystalError(f"unknown element {symbol!r}")


def electron_sf_coefficients(element: str) -> tuple[np.ndarray, np.ndarray]:
    """The 5-Gaussian electron scattering-factor coefficients (a_i in Å, b_i in Å²).

    ``f_e(s) = Σ a_i exp(-b_i s²)`` with ``s = sin θ / λ`` in Å⁻¹, neutral
    atoms, International Tables Vol. C Table 4.3.2.2 (Peng et al. 1996),
    valid to s = 2 Å⁻¹; non-relativistic (multiply by γ for the relativistic value).
    """
    el = gemmi.Element(check_element(element))
    coef = el.c4322
    if coef is None:
        raise CrystalError(f"no electron scattering factor for element {element!r}")
    return np.array(coef.a, dtype=float), np.array(coef.b, dtype=float)


def xray_sf(element: str, stol2: float) -> float:
    """X-ray form factor (electrons) at (sin θ/λ)² = stol2, International Tables (it92)."""
    return float(gemmi.Element(check_element(element)).it92.calculate_sf(stol2))


def atomic_number(element: str) -> int:
    """Atomic number Z of an element symbol."""
    return int(gemmi.Element(check_element(element)).atomic_number)


@dataclass(frozen=True)
class CifContent:
    """What saedkit reads from one CIF data block."""

    block_name: str
    cell: tuple[float, float, float, float, float, float]
    space_group: SpaceGroupData
    sites: list[tuple[str, str, float, float, float, float, float]]  # label, element, x, y, z, occ, B
    name: str
    formula: str
    source: str
    #: the settings the CIF's bare symbol leaves open (see find_setting_choices); () when settled
    setting_choices: tuple[SpaceGroupData, ...] = ()
    #: _cell_formula_units_Z, when given
    formula_units_z: float | None = None
    #: _atom_site_symmetry_multiplicity of each site (None where not given)
    site_multiplicities: tuple[int | None, ...] = ()
    #: what the reader had to assume (e.g. the text encoding)
    notes: tuple[str, ...] = ()


def _decode_cif_bytes(raw: bytes, path: str) -> tuple[str, tuple[str, ...]]:
    """CIF text from bytes: UTF-8 (ASCII included), else Latin-1 with a note naming the first bad byte."""
    try:
        return raw.decode("utf-8"), ()
    except UnicodeDecodeError as exc:
        line = raw.count(b"\n", 0, exc.start) + 1
        bad = raw[exc.start:exc.start + 1].hex()
        note = (f"{path}: the file is not UTF-8 text (byte 0x{bad} on line {line}); it was read as "
                "Latin-1, so names and other text may show wrong characters (numbers are unaffected); "
                "save it as UTF-8 or ASCII to silence this")
        return raw.decode("latin-1"), (note,)


def _num(block, tag: str, path: str) -> float | None:
    v = block.find_value(tag)
    if v is None or v in ("?", "."):
        return None
    try:
        return float(gemmi.cif.as_number(v))
    except (RuntimeError, ValueError):
        raise CrystalError(f"{path}: {tag} is not a number ({v!r})") from None


def _text(block, *tags: str) -> str:
    for tag in tags:
        v = block.find_value(tag)
        if v is not None and v not in ("?", "."):
            return gemmi.cif.as_string(v).strip()
    return ""


def read_cif_block(path: str, *, text: str | None = None) -> CifContent:
    """Read cell, space group and atom sites from the first data block of a CIF.

    Raises
    ------
    CrystalError
        With the file name, for a file that cannot be parsed, has no cell,
        no space group or no atom sites, or holds text that is not UTF-8.
    """
    notes: tuple[str, ...] = ()
    if text is None:
        try:
            with open(path, "rb") as fh:
                raw = fh.read()
        except OSError as exc:
            raise CrystalError(f"{path}: cannot read the CIF file ({exc.strerror or exc})") from None
        text, notes = _decode_cif_bytes(raw, str(path))
    try:
        doc = gemmi.cif.read_string(text)
    except (RuntimeError, ValueError, OSError, UnicodeError) as exc:
        raise CrystalError(f"{path}: not a readable CIF file ({str(exc).splitlines()[0][:200]})") from None
    if len(doc) == 0:
        raise CrystalError(f"{path}: the CIF has no data block")
    block = None
    for b in doc:  # the first block with a cell
        if b.find_value("_cell_length_a") is not None:
            block = b
            break
    if block is None:
        raise CrystalError(f"{path}: the CIF has no unit cell (_cell_length_a missing)")
    cell = []
    for tag in ("_cell_length_a", "_cell_length_b", "_cell_length_c",
                "_cell_angle_alpha", "_cell_angle_beta", "_cell_angle_gamma"):
        v = _num(block, tag, path)
        if v is None:
            raise CrystalError(f"{path}: the CIF has no {tag}")
        cell.append(v)

    ops = [gemmi.cif.as_string(s) for s in block.find_values("_space_group_symop_operation_xyz")]
    if not ops:
        ops = [gemmi.cif.as_string(s) for s in block.find_values("_symmetry_equiv_pos_as_xyz")]
    hm = _text(block, "_space_group_name_H-M_alt", "_symmetry_space_group_name_H-M")
    number = _text(block, "_space_group_IT_number", "_symmetry_Int_Tables_number")
    choices: tuple[SpaceGroupData, ...] = ()
    try:
        if ops:
            sg = space_group_from_operations(ops)
        elif hm:
            sg = find_space_group(hm)
            choices = find_setting_choices(hm)
        elif number:
            sg = find_space_group(number)
            choices = find_setting_choices(number)
        else:
            raise CrystalError("the CIF names no space group and lists no symmetry operations")
    except CrystalError as exc:
        raise CrystalError(f"{path}: {exc}") from None
    z = _num(block, "_cell_formula_units_Z", path)

    table = block.find("_atom_site_", ["label", "?type_symbol", "fract_x", "fract_y", "fract_z",
                                       "?occupancy", "?B_iso_or_equiv", "?U_iso_or_equiv",
                                       "?symmetry_multiplicity"])
    if len(table) == 0:
        raise CrystalError(f"{path}: the CIF has no atom sites (_atom_site_fract_x missing)")
    sites = []
    multiplicities: list[int | None] = []
    for row in table:
        label = gemmi.cif.as_string(row[0])
        sym = gemmi.cif.as_string(row[1]) if row.has(1) else label
        try:
            element = check_element(sym)
        except CrystalError as exc:
            raise CrystalError(f"{path}: site {label}: {exc}") from None
        xyz = []
        for i in (2, 3, 4):
            try:
                xyz.append(float(gemmi.cif.as_number(row[i])))
            except (RuntimeError, ValueError):
                raise CrystalError(f"{path}: site {label}: coordinate {row[i]!r} is not a number") from None
        occ = float(gemmi.cif.as_number(row[5])) if row.has(5) and row[5] not in ("?", ".") else 1.0
        if row.has(6) and row[6] not in ("?", "."):
            b_iso = float(gemmi.cif.as_number(row[6]))
        elif row.has(7) and row[7] not in ("?", "."):
            b_iso = 8 * np.pi**2 * float(gemmi.cif.as_number(row[7]))
        else:
            b_iso = 0.5  # a typical room-temperature value (common practice) when the CIF gives none
        sites.append((label, element, *xyz, occ, b_iso))
        mult = None
        if row.has(8) and row[8] not in ("?", "."):
            try:
                mult = int(round(float(gemmi.cif.as_number(row[8]))))
            except (RuntimeError, ValueError):
                raise CrystalError(f"{path}: site {label}: multiplicity {row[8]!r} is not a number") from None
        multiplicities.append(mult)

    name = _text(block, "_chemical_name_common", "_chemical_name_mineral", "_chemical_name_systematic") or block.name
    formula = _text(block, "_chemical_formula_sum", "_chemical_formula_structural")
    source = _text(block, "_publ_section_references", "_citation_journal_full", "_journal_name_full")
    return CifContent(block.name, tuple(cell), sg, sites, name, formula, source,
                      setting_choices=choices, formula_units_z=z,
                      site_multiplicities=tuple(multiplicities), notes=notes)
