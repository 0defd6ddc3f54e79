"""Unit cells, phases and the geometry of planes and directions.

Works for all seven crystal systems through the metric tensor: with the
direct metric ``G`` (``G_ij = a_i · a_j``) and the reciprocal metric
``G* = G⁻¹``, the spacing of (hkl) is ``1/d² = hᵀ G* h``, the angle between
plane normals is ``cos φ = h₁ᵀ G* h₂ / (|g₁||g₂|)``, and the angle between
directions is ``cos ψ = u₁ᵀ G u₂ / (|u₁||u₂|)``. The zone axis [uvw] of two
reflections is their index cross product ``h₁ × h₂`` (Weiss zone law
``h·u = 0``).

References
----------
.. [1] M. De Graef and M. E. McHenry, *Structure of Materials*, 2nd ed.,
   Cambridge University Press (2012), ch. 4–6.
.. [2] International Tables for Crystallography Vol. A (space groups) and
   Vol. B ch. 1.1 (reciprocal space).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import numpy as np

from saedkit.core.crystallography import _gemmi_adapter as _gm
from saedkit.core.errors import CrystalError

__all__ = [
    "UnitCell",
    "Site",
    "Phase",
    "SpaceGroupData",
    "reduce_indices",
    "to_four_index_plane",
    "to_four_index_direction",
    "from_four_index_direction",
    "format_indices",
    "read_phase_cif",
    "make_phase",
]

SpaceGroupData = _gm.SpaceGroupData


def reduce_indices(v) -> np.ndarray:
    """Divide integer indices by their greatest common divisor; sign kept."""
    arr = np.asarray(np.round(v), dtype=np.int64)
    g = np.gcd.reduce(np.abs(arr))
    return arr // g if g > 1 else arr


@dataclass(frozen=True)
class UnitCell:
    """A unit cell (a, b, c in Å; α, β, γ in degrees).

    Raises
    ------
    CrystalError
        For non-positive lengths or angles that cannot close a cell
        (each in (0, 180), and the metric positive definite).

    Examples
    --------
    >>> round(UnitCell(4.0782, 4.0782, 4.0782, 90, 90, 90).calculate_d_A((1, 1, 1)), 4)
    2.3546
    """

    a: float
    b: float
    c: float
    alpha: float = 90.0
    beta: float = 90.0
    gamma: float = 90.0

    def __post_init__(self) -> None:
        for name in ("a", "b", "c"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float, np.floating)) and math.isfinite(v) and v > 0):
                raise CrystalError(f"cell length {name} must be a number > 0 Å, got {v!r}")
            object.__setattr__(self, name, float(v))
        for name in ("alpha", "beta", "gamma"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float, np.floating)) and math.isfinite(v) and 0 < v < 180):
                raise CrystalError(f"cell angle {name} must be between 0 and 180 degrees, got {v!r}")
            object.__setattr__(self, name, float(v))
        ca, cb, cg = (math.cos(math.radians(x)) for x in (self.alpha, self.beta, self.gamma))
        if 1 - ca**2 - cb**2 - cg**2 + 2 * ca * cb * cg <= 1e-10:
            raise CrystalError(
                f"cell angles α={self.alpha}, β={self.beta}, γ={self.gamma} cannot form a cell "
                "(the volume would be zero or imaginary)"
            )

    @property
    def parameters(self) -> tuple[float, float, float, float, float, float]:
        return (self.a, self.b, self.c, self.alpha, self.beta, self.gamma)

    @cached_property
    def metric(self) -> np.ndarray:
        """Direct metric tensor G (Å²)."""
        a, b, c = self.a, self.b, self.c
        ca, cb, cg = (math.cos(math.radians(x)) for x in (self.alpha, self.beta, self.gamma))
        return np.array([[a * a, a * b * cg, a * c * cb],
                         [a * b * cg, b * b, b * c * ca],
                         [a * c * cb, b * c * ca, c * c]])

    @cached_property
    def reciprocal_metric(self) -> np.ndarray:
        """Reciprocal metric tensor G* = G⁻¹ (Å⁻²)."""
        return np.linalg.inv(self.metric)

    @property
    def volume_A3(self) -> float:
        """Cell volume in Å³."""
        return float(math.sqrt(np.linalg.det(self.metric)))

    @cached_property
    def direct_basis(self) -> np.ndarray:
        """Columns are a, b, c in Cartesian Å (a along x, b in the xy plane)."""
        a, b, c = self.a, self.b, self.c
        al, be, ga = (math.radians(x) for x in (self.alpha, self.beta, self.gamma))
        cx = c * math.cos(be)
        cy = c * (math.cos(al) - math.cos(be) * math.cos(ga)) / math.sin(ga)
        cz = math.sqrt(max(c * c - cx * cx - cy * cy, 0.0))
        return np.array([[a, b * math.cos(ga), cx], [0.0, b * math.sin(ga), cy], [0.0, 0.0, cz]])

    @cached_property
    def reciprocal_basis(self) -> np.ndarray:
        """Columns are a*, b*, c* in Cartesian Å⁻¹ (without the 2π), so g = B·h."""
        return np.linalg.inv(self.direct_basis).T

    def calculate_g_array(self, hkl) -> np.ndarray:
        """|g| = 1/d in Å⁻¹ for an (N, 3) array of indices."""
        h = np.atleast_2d(np.asarray(hkl, dtype=float))
        return np.sqrt(np.einsum("ni,ij,nj->n", h, self.reciprocal_metric, h))

    def calculate_d_A(self, hkl) -> float:
        """Interplanar spacing of (hkl) in Å (``1/d² = hᵀ G* h``)."""
        g = float(self.calculate_g_array(hkl)[0])
        if g == 0:
            raise CrystalError("(000) has no spacing")
        return 1.0 / g

    def calculate_d_array(self, hkl) -> np.ndarray:
        """Interplanar spacings (Å) of an (N, 3) array of indices."""
        with np.errstate(divide="ignore"):
            return 1.0 / self.calculate_g_array(hkl)

    def calculate_plane_angle_deg(self, hkl1, hkl2) -> float:
        """Angle between the normals of planes (h₁k₁l₁) and (h₂k₂l₂), degrees."""
        h1 = np.asarray(hkl1, float)
        h2 = np.asarray(hkl2, float)
        gs = self.reciprocal_metric
        c = h1 @ gs @ h2 / math.sqrt((h1 @ gs @ h1) * (h2 @ gs @ h2))
        return math.degrees(math.acos(max(-1.0, min(1.0, c))))

    def calculate_direction_angle_deg(self, uvw1, uvw2) -> float:
        """Angle between directions [u₁v₁w₁] and [u₂v₂w₂], degrees."""
        u1 = np.asarray(uvw1, float)
        u2 = np.asarray(uvw2, float)
        g = self.metric
        c = u1 @ g @ u2 / math.sqrt((u1 @ g @ u1) * (u2 @ g @ u2))
        return math.degrees(math.acos(max(-1.0, min(1.0, c))))

    def calculate_direction_length_A(self, uvw) -> float:
        """Length of the lattice vector u·a + v·b + w·c in Å."""
        u = np.asarray(uvw, float)
        return float(math.sqrt(u @ self.metric @ u))

    @staticmethod
    def calculate_zone_axis(hkl1, hkl2) -> np.ndarray:
        """Zone axis [uvw] shared by (h₁k₁l₁) and (h₂k₂l₂): the reduced cross product.

        Raises
        ------
        CrystalError
            When the two reflections are parallel (no unique zone).
        """
        u = np.cross(np.asarray(hkl1, dtype=np.int64), np.asarray(hkl2, dtype=np.int64))
        if not np.any(u):
            raise CrystalError(f"reflections {tuple(hkl1)} and {tuple(hkl2)} are parallel: no unique zone axis")
        return reduce_indices(u)

    @staticmethod
    def calculate_laue_zone(hkl, uvw) -> np.ndarray:
        """Laue-zone order N = h·u (0 for the zero-order zone), for (N, 3) arrays."""
        return np.atleast_2d(np.asarray(hkl, np.int64)) @ np.asarray(uvw, np.int64)

    def to_dict(self) -> dict:
        return dict(zip(("a_A", "b_A", "c_A", "alpha_deg", "beta_deg", "gamma_deg"), self.parameters))


@dataclass(frozen=True)
class Site:
    """An atom site: element, fractional x y z, occupancy, isotropic B (Å²)."""

    element: str
    x: float
    y: float
    z: float
    occupancy: float = 1.0
    b_iso_A2: float = 0.5
    label: str = ""

    def __post_init__(self) -> None:
        object.__setattr__(self, "element", _gm.check_element(self.element))
        for name in ("x", "y", "z", "occupancy", "b_iso_A2"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float, np.floating)) and math.isfinite(v)):
                raise CrystalError(f"site {self.label or self.element}: {name} must be a number, got {v!r}")
            object.__setattr__(self, name, float(v))
        if not 0 < self.occupancy <= 1.0 + 1e-6:
            raise CrystalError(f"site {self.label or self.element}: occupancy must be in (0, 1], got {self.occupancy}")
        if self.b_iso_A2 < 0:
            raise CrystalError(f"site {self.label or self.element}: B must be ≥ 0 Å², got {self.b_iso_A2}")
        if not self.label:
            object.__setattr__(self, "label", self.element)


@dataclass(frozen=True, eq=False)
class Phase:
    """A crystalline phase: a name, a unit cell, a space group and atom sites.

    Build one from values with :func:`make_phase` or from a CIF with
    :func:`read_phase_cif`; the built-in ones come from
    :mod:`saedkit.core.crystallography.library`.
    """

    name: str
    cell: UnitCell
    space_group: SpaceGroupData = field(repr=False)
    sites: tuple[Site, ...] = field(repr=False)
    formula: str = ""
    source: str = ""
    path: str | None = None
    #: what the reader assumed or decided (origin choice, axes, encoding); shown with the phase
    notes: tuple[str, ...] = ()

    @property
    def crystal_system(self) -> str:
        return self.space_group.crystal_system

    @property
    def is_hexagonal(self) -> bool:
        """True for hexagonal and trigonal phases on hexagonal axes (four-index notation)."""
        c = self.cell
        return abs(c.gamma - 120) < 1e-6 and abs(c.alpha - 90) < 1e-6 and abs(c.a - c.b) < 1e-6

    @cached_property
    def atom_positions(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str]]:
        """Every atom of the cell: (N, 3) fractional xyz, occupancy, B, element.

        Each site is expanded by the space-group operations and duplicates
        (special positions) are merged, so occupancies are crystallographic.
        """
        xyz_all, occ_all, b_all, el_all = [], [], [], []
        for s in self.sites:
            uniq = _expand_site(s, self.space_group)
            xyz_all.extend(uniq)
            occ_all.extend([s.occupancy] * len(uniq))
            b_all.extend([s.b_iso_A2] * len(uniq))
            el_all.extend([s.element] * len(uniq))
        return np.array(xyz_all), np.array(occ_all), np.array(b_all), el_all

    def calculate_d_A(self, hkl) -> float:
        """Spacing of (hkl) in Å."""
        return self.cell.calculate_d_A(hkl)

    def is_space_group_absent_array(self, hkl) -> np.ndarray:
        """True where a reflection is systematically absent by the space group.

        A reflection h is absent when an operation (R, t) leaves it
        invariant (hR = h) with a phase h·t that is not an integer
        (centring, glide planes, screw axes). Zeros caused only by where
        the atoms sit (diamond-cubic 222) are not space-group absences.
        """
        h = np.atleast_2d(np.asarray(hkl, dtype=np.int64))
        rot = self.space_group.rotations
        tra = self.space_group.translations
        k = len(rot)
        hr = (h @ rot.transpose(1, 0, 2).reshape(3, 3 * k)).reshape(len(h), k, 3)  # h·R for every op
        invariant = np.all(hr == h[:, None, :], axis=2)
        phase = h @ tra.T
        frac = np.abs(phase - np.round(phase)) > 1e-6
        return np.any(invariant & frac, axis=1)

    def is_centring_absent_array(self, hkl) -> np.ndarray:
        """True where lattice centring forbids a reflection (never seen, even by double diffraction)."""
        h = np.atleast_2d(np.asarray(hkl, dtype=np.int64))
        ident = np.all(self.space_group.rotations == np.eye(3, dtype=int), axis=(1, 2))
        ph = h @ self.space_group.translations[ident].T
        return np.any(np.abs(ph - np.round(ph)) > 1e-6, axis=1)

    def calculate_equivalent_array(self, hkl) -> np.ndarray:
        """Symmetry-equivalent reflections of one (hkl) under the Laue group (with Friedel), (M, 3) unique."""
        h = np.asarray(hkl, dtype=np.int64)
        rots = self.space_group.rotations
        eq = np.concatenate([h @ rots, -(h @ rots)])
        return np.unique(eq, axis=0)

    def calculate_equivalent_directions(self, uvw) -> np.ndarray:
        """Symmetry-equivalent directions of [uvw] under the point group with inversion, (M, 3) unique."""
        u = np.asarray(uvw, dtype=np.int64)
        rots = self.space_group.rotations
        eq = np.einsum("kij,j->ki", rots, u)
        return np.unique(np.concatenate([eq, -eq]), axis=0)

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "formula": self.formula,
            "cell": self.cell.to_dict(),
            "space_group": self.space_group.hm,
            "space_group_number": self.space_group.number,
            "sites": [
                {"label": s.label, "element": s.element, "xyz": [s.x, s.y, s.z],
                 "occupancy": s.occupancy, "b_iso_A2": s.b_iso_A2}
                for s in self.sites
            ],
            "source": self.source,
            "path": self.path,
            "notes": list(self.notes),
        }

    def to_cif(self) -> str:
        """The phase as a CIF (IUCr) text, readable by :func:`read_phase_cif`."""
        c = self.cell
        lines = [
            f"data_{_cif_block_name(self.name)}",
            f"_chemical_name_common '{self.name}'",
            f"_chemical_formula_sum '{self.formula or self.name}'",
        ]
        if self.source:
            lines.append(";".join(["_publ_section_references\n", f"\n{self.source}\n", ""]))
        lines += [
            f"_cell_length_a {c.a:.6f}", f"_cell_length_b {c.b:.6f}", f"_cell_length_c {c.c:.6f}",
            f"_cell_angle_alpha {c.alpha:.4f}", f"_cell_angle_beta {c.beta:.4f}", f"_cell_angle_gamma {c.gamma:.4f}",
            f"_space_group_name_H-M_alt '{self.space_group.setting}'",
            f"_space_group_IT_number {self.space_group.number}",
            "loop_", "_atom_site_label", "_atom_site_type_symbol",
            "_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z",
            "_atom_site_occupancy", "_atom_site_B_iso_or_equiv",
        ]
        for s in self.sites:
            lines.append(f"{s.label} {s.element} {s.x:.6f} {s.y:.6f} {s.z:.6f} {s.occupancy:.4f} {s.b_iso_A2:.4f}")
        return "\n".join(lines) + "\n"


def _expand_site(site: Site, sg: SpaceGroupData) -> list[np.ndarray]:
    """The distinct images of one site under the space group (special positions merged)."""
    p = np.array([site.x, site.y, site.z])
    # 0.333333 in a CIF means 1/3: snap to multiples of 1/24 so that
    # site-only zeros (hcp 0001) come out exactly zero
    snapped = np.round(p * 24) / 24
    p = np.where(np.abs(p - snapped) < 5e-5, snapped, p)
    images = (np.einsum("nij,j->ni", sg.rotations, p) + sg.translations) % 1.0
    images[np.isclose(images, 1.0, atol=1e-6)] = 0.0
    uniq: list[np.ndarray] = []
    for q in images:
        if not any(np.all(np.abs(((q - u) + 0.5) % 1.0 - 0.5) < 1e-4) for u in uniq):
            uniq.append(q)
    return uniq


def _cif_block_name(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name) or "phase"


def make_phase(name: str, cell, space_group: str | int, sites, *, formula: str = "", source: str = "") -> Phase:
    """Build a phase from typed-in values.

    Parameters
    ----------
    name : str
        Name shown to the user.
    cell : UnitCell or sequence of 6 floats
        a, b, c (Å), α, β, γ (degrees).
    space_group : str or int
        Hermann–Mauguin symbol (e.g. ``"F m -3 m"``, ``"P6_3/mmc"``) or number.
    sites : sequence of Site or of tuples (element, x, y, z[, occupancy[, B]])
        Atom sites in fractional coordinates.

    Raises
    ------
    CrystalError
        For an impossible cell, an unknown space group or element, or no sites.

    Examples
    --------
    >>> au = make_phase("Au", (4.0782,) * 3 + (90,) * 3, "F m -3 m", [("Au", 0, 0, 0)])
    >>> round(au.calculate_d_A((2, 0, 0)), 4)
    2.0391
    """
    if not str(name).strip():
        raise CrystalError("phase name is empty")
    uc = cell if isinstance(cell, UnitCell) else UnitCell(*[float(v) for v in cell])
    sg = space_group if isinstance(space_group, SpaceGroupData) else _gm.find_space_group(space_group)
    site_objs = tuple(s if isinstance(s, Site) else Site(*s) for s in sites)
    if not site_objs:
        raise CrystalError(f"phase {name!r} has no atom sites")
    _check_cell_matches_system(uc, sg, name)
    return Phase(str(name).strip(), uc, sg, site_objs, formula=formula, source=source)


def _check_cell_matches_system(cell: UnitCell, sg: SpaceGroupData, name: str) -> None:
    """Refuse a cell whose shape contradicts the space group's crystal system."""
    system = sg.crystal_system
    a, b, c, al, be, ga = cell.parameters
    ok = True
    if system == "cubic":
        ok = np.allclose([a, a], [b, c], rtol=1e-4) and np.allclose([al, be, ga], 90, atol=1e-3)
    elif system == "tetragonal":
        ok = math.isclose(a, b, rel_tol=1e-4) and np.allclose([al, be, ga], 90, atol=1e-3)
    elif system == "orthorhombic":
        ok = np.allclose([al, be, ga], 90, atol=1e-3)
    elif system == "hexagonal" or (system == "trigonal" and sg.setting.endswith(":H")):
        ok = math.isclose(a, b, rel_tol=1e-4) and np.allclose([al, be], 90, atol=1e-3) and abs(ga - 120) < 1e-3
    if not ok:
        raise CrystalError(
            f"phase {name!r}: cell {cell.parameters} does not fit the {system} space group {sg.hm}"
        )


def read_phase_cif(path: str | Path, *, text: str | None = None) -> Phase:
    """Read a phase from a CIF file (the IUCr's Crystallographic Information File).

    Raises
    ------
    CrystalError
        Naming the file, for a missing cell, unknown space group, unknown
        element, impossible cell or no atom sites.
    """
    p = Path(path)
    if text is None and not p.is_file():
        raise CrystalError(f"{p}: no such CIF file")
    content = _gm.read_cif_block(str(p), text=text)
    notes = list(content.notes)
    try:
        cell = UnitCell(*content.cell)
        sites = tuple(Site(el, x, y, z, occ, b, label) for label, el, x, y, z, occ, b in content.sites)
        sg = content.space_group
        if content.setting_choices:
            sg, note = _choose_setting(cell, sites, content)
            notes.append(note)
        name = content.name.strip() or p.stem
        phase = make_phase(name, cell, sg, sites, formula=content.formula, source=content.source)
    except CrystalError as exc:
        raise CrystalError(f"{p}: {exc}") from None
    return Phase(phase.name, phase.cell, phase.space_group, phase.sites, phase.formula, phase.source, str(p),
                 tuple(notes))


_FORMULA_RE = re.compile(r"([A-Z][a-z]?)\s*(\d*\.?\d*)")


def _parse_formula(text: str) -> dict[str, float]:
    """Element counts of a CIF formula such as ``'Mg Al2 O4'`` ({} when it cannot be read)."""
    counts: dict[str, float] = {}
    for el, n in _FORMULA_RE.findall(str(text)):
        try:
            el = _gm.check_element(el)
        except CrystalError:
            return {}
        counts[el] = counts.get(el, 0.0) + (float(n) if n else 1.0)
    return counts


def _setting_problems(cell: UnitCell, sites: tuple[Site, ...], sg: SpaceGroupData, content) -> tuple[list[str], int]:
    """What contradicts reading the sites in one setting, and the number of atoms per cell it gives."""
    problems: list[str] = []
    xyz, owner, counts = [], [], {}
    for i, s in enumerate(sites):
        images = _expand_site(s, sg)
        mult = content.site_multiplicities[i] if i < len(content.site_multiplicities) else None
        if mult is not None and mult != len(images):
            problems.append(f"site {s.label} gives {len(images)} atoms, the CIF says multiplicity {mult}")
        xyz.extend(images)
        owner.extend([i] * len(images))
        counts[s.element] = counts.get(s.element, 0.0) + s.occupancy * len(images)
    n_atoms = len(xyz)
    formula = _parse_formula(content.formula)
    if formula and set(formula) == set(counts):
        z = content.formula_units_z
        ratios = {el: counts[el] / formula[el] for el in formula}
        if z is not None and z > 0:
            off = {el: r for el, r in ratios.items() if abs(r - z) > 0.02 * z}
            if off:
                got = ", ".join(f"{counts[el]:g} {el}" for el in formula)
                want = ", ".join(f"{z * formula[el]:g} {el}" for el in formula)
                problems.append(f"the cell holds {got}, while Z = {z:g} of {content.formula!r} needs {want}")
        elif max(ratios.values()) > 1.02 * min(ratios.values()):
            got = ", ".join(f"{counts[el]:g} {el}" for el in formula)
            problems.append(f"the cell holds {got}, not in the proportions of {content.formula!r}")
    if 1 < n_atoms <= 800:  # pairwise distances; larger cells skip this check
        f = np.array(xyz)
        occ = np.array([sites[i].occupancy for i in owner])
        diff = f[:, None, :] - f[None, :, :]
        diff -= np.round(diff)
        dist = np.linalg.norm(diff @ cell.direct_basis.T, axis=2)
        np.fill_diagonal(dist, np.inf)
        close = np.argwhere(np.triu(dist < 0.5, 1) & (occ[:, None] + occ[None, :] > 1 + 1e-3))
        if len(close):
            i, j = close[0]
            problems.append(f"atoms of sites {sites[owner[i]].label} and {sites[owner[j]].label} come "
                            f"{dist[i, j]:.2f} Å apart")
    return problems, n_atoms


def _choose_setting(cell: UnitCell, sites: tuple[Site, ...], content) -> tuple[SpaceGroupData, str]:
    """Pick the origin choice or axes a bare space-group symbol leaves open, with a note saying why.

    Hexagonal or rhombohedral axes follow from the cell's shape. Between two
    origin choices, the sites are expanded in each: a setting is ruled out
    when a site's image count differs from its stated multiplicity, when the
    element counts contradict the formula (and Z), or when fully occupied
    atoms come closer than 0.5 Å. When both remain, the one placing the
    sites on positions of higher symmetry (fewer atoms per cell) is taken,
    and on a tie origin choice 2. Raises CrystalError when neither fits.
    """
    first, second = content.setting_choices
    symbol = content.space_group.hm
    a, b, c, al, be, ga = cell.parameters
    if first.setting.endswith(":H"):
        if math.isclose(a, b, rel_tol=1e-4) and np.allclose([al, be], 90, atol=1e-3) and abs(ga - 120) < 1e-3:
            return first, (f"the CIF names {symbol!r} without symmetry operations or axes; the cell "
                           f"(a = b, γ = 120°) is on hexagonal axes, so it was read as {first.setting!r} "
                           "(add ':H' to the symbol to state it)")
        if np.allclose([a, a], [b, c], rtol=1e-4) and np.allclose([al, al], [be, ga], atol=1e-3):
            return second, (f"the CIF names {symbol!r} without symmetry operations or axes; the cell "
                            f"(a = b = c, α = β = γ) is on rhombohedral axes, so it was read as "
                            f"{second.setting!r} (add ':R' to the symbol to state it)")
        raise CrystalError(f"space group {symbol!r}: the cell {cell.parameters} fits neither hexagonal axes "
                           "(a = b, α = β = 90°, γ = 120°) nor rhombohedral axes (a = b = c, α = β = γ); "
                           "check the cell, or add ':H' or ':R' to the symbol")
    (p1, n1), (p2, n2) = (_setting_problems(cell, sites, sg, content) for sg in (first, second))
    head = f"the CIF names {symbol!r} (two origin choices) without symmetry operations; "
    if p1 and p2:
        raise CrystalError(
            f"space group {symbol!r}: the atom sites fit neither origin choice (origin choice 1: "
            f"{'; '.join(p1)}; origin choice 2: {'; '.join(p2)}); check the coordinates, or add ':1' or "
            "':2' to the symbol")
    if p2:
        return first, (head + f"read in origin choice 1 ({first.setting!r}): {n1} atoms per cell; origin "
                       f"choice 2 was ruled out ({'; '.join(p2)}). Add ':1' to the symbol to state it")
    if p1:
        return second, (head + f"read in origin choice 2 ({second.setting!r}): {n2} atoms per cell; origin "
                        f"choice 1 was ruled out ({'; '.join(p1)}). Add ':2' to the symbol to state it")
    if n1 < n2:
        return first, (head + f"both fit the sites; origin choice 1 ({first.setting!r}) puts them on positions "
                       f"of higher symmetry ({n1} atoms per cell, against {n2} in origin choice 2) and was "
                       "taken. The CIF gives no Z or site multiplicities to confirm it: add ':2' to the "
                       "symbol if its coordinates are origin choice 2, or ':1' to state this one")
    if n2 < n1:
        return second, (head + f"both fit the sites; origin choice 2 ({second.setting!r}) puts them on positions "
                        f"of higher symmetry ({n2} atoms per cell, against {n1} in origin choice 1) and was "
                        "taken. The CIF gives no Z or site multiplicities to confirm it: add ':1' to the "
                        "symbol if its coordinates are origin choice 1, or ':2' to state this one")
    return second, (head + f"both fit the sites equally ({n2} atoms per cell); origin choice 2 "
                    f"({second.setting!r}, the usual choice) was taken. Add ':1' to the symbol if the "
                    "coordinates are origin choice 1, or ':2' to state this one")


def to_four_index_plane(hkl) -> tuple[int, int, int, int]:
    """Miller–Bravais (hkil) of a hexagonal plane (hkl): i = −(h + k)."""
    h, k, l = (int(v) for v in hkl)
    return (h, k, -(h + k), l)


def to_four_index_direction(uvw) -> tuple[int, int, int, int]:
    """Four-index [uvtw] of a three-index hexagonal direction [UVW].

    u = (2U − V)/3, v = (2V − U)/3, t = −(u + v), w = W, scaled to the
    smallest integers.
    """
    U, V, W = (int(x) for x in uvw)
    four = np.array([2 * U - V, 2 * V - U, -(U + V), 3 * W])
    return tuple(int(x) for x in reduce_indices(four))


def from_four_index_direction(uvtw) -> tuple[int, int, int]:
    """Three-index [UVW] of a four-index direction [uvtw]: U = u − t, V = v − t, W = w."""
    u, v, t, w = (int(x) for x in uvtw)
    if u + v + t != 0:
        raise CrystalError(f"four-index direction {tuple(uvtw)} must have u + v + t = 0")
    return tuple(int(x) for x in reduce_indices([u - t, v - t, w]))


def format_indices(idx, *, brackets: str = "()") -> str:
    """Indices as text with overbars for negatives, e.g. (1̄11) or [01̄1]."""
    parts = []
    for v in idx:
        v = int(v)
        s = str(abs(v))
        parts.append("".join(ch + "\u0304" for ch in s) if v < 0 else s)
    sep = " " if any(abs(int(v)) > 9 for v in idx) else ""
    return brackets[0] + sep.join(parts) + brackets[1]
