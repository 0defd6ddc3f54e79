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
        symbol = str(symbol_or_number).strip()
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
    try:
        return _read_cif_block(path, text=text)
    except UnicodeDecodeError:
        line = _first_non_utf8_line(path) if text is None else None
        where = f" (line {line})" if line else ""
        raise CrystalError(f"{path}: the CIF holds text that is not UTF-8{where}; "
                           "save it with UTF-8 encoding") from None


def _first_non_utf8_line(path: str) -> int | None:
    try:
        with open(path, "rb") as fh:
            data = fh.read(50_000_000)
        data.decode("utf-8")
    except UnicodeDecodeError as exc:
        return data.count(b"\n", 0, exc.start) + 1
    except OSError:
        return None
    return None


def _read_cif_block(path: str, *, text: str | None = None) -> CifContent:
    try:
        doc = gemmi.cif.read_string(text) if text is not None else gemmi.cif.read_file(str(path))
    except (RuntimeError, ValueError, OSError) as exc:
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
    try:
        if ops:
            sg = space_group_from_operations(ops)
        elif hm:
            sg = find_space_group(hm)
        elif number:
            sg = find_space_group(number)
        else:
            raise CrystalError("the CIF names no space group and lists no symmetry operations")
    except CrystalError as exc:
        raise CrystalError(f"{path}: {exc}") from None

    table = block.find("_atom_site_", ["label", "?type_symbol", "fract_x", "fract_y", "fract_z",
                                       "?occupancy", "?B_iso_or_equiv", "?U_iso_or_equiv"])
    if len(table) == 0:
        raise CrystalError(f"{path}: the CIF has no atom sites (_atom_site_fract_x missing)")
    sites = []
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

    name = _text(block, "_chemical_name_common", "_chemical_name_mineral", "_chemical_name_systematic") or block.name
    formula = _text(block, "_chemical_formula_sum", "_chemical_formula_structural")
    source = _text(block, "_publ_section_references", "_citation_journal_full", "_journal_name_full")
    return CifContent(block.name, tuple(cell), sg, sites, name, formula, source)
