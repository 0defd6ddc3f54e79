"""Kinematic electron structure factors and reflection lists.

``F(g) = Σ_j occ_j · f_j(s) · exp(−B_j s²) · exp(2πi g·r_j)`` over every atom
of the cell, with ``s = sin θ/λ = 1/(2d)`` in Å⁻¹ and the electron scattering
factors ``f_j`` of International Tables Vol. C Table 4.3.2.2 (via gemmi).
``F`` is in Å; multiplied by the Lorentz factor γ when a voltage is given.

A reflection can be zero for two different reasons, and later steps need
to know which: the space group forbids it for every arrangement of atoms
(lattice centring, glide planes, screw axes: "space-group absent"), or the
atoms happen to sit where their waves cancel (diamond-cubic 222: "site
absent"). Dynamical double diffraction can bring back both kinds except
those forbidden by centring, so both are flagged, not dropped.

References
----------
.. [1] L.-M. Peng, G. Ren, S. L. Dudarev and M. J. Whelan, Acta Cryst. A52,
   257–276 (1996).
.. [2] International Tables for Crystallography Vol. C, Table 4.3.2.2.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from saedkit.core.crystallography import _gemmi_adapter as _gm
from saedkit.core._validate import check_positive
from saedkit.core.crystallography.crystal import Phase
from saedkit.core.optics import calculate_lorentz_factor

__all__ = [
    "ReflectionTable",
    "RingFamily",
    "calculate_scattering_factor_array",
    "calculate_structure_factor_array",
    "calculate_reflections",
    "calculate_ring_families",
    "canonical_indices",
]

# |F| below this fraction of the total scattering power counts as zero
_ZERO_FRACTION = 1e-5


def calculate_scattering_factor_array(element: str, s_per_A) -> np.ndarray:
    """Electron scattering factor f_e(s) in Å for s = sin θ/λ in Å⁻¹ (non-relativistic)."""
    a, b = _gm.electron_sf_coefficients(element)
    s2 = np.asarray(s_per_A, dtype=float) ** 2
    return np.sum(a[:, None] * np.exp(-b[:, None] * s2.ravel()[None, :]), axis=0).reshape(s2.shape)


def _structure_factor_and_power(phase: Phase, hkl: np.ndarray, voltage_kv: float | None):
    xyz, occ, biso, elements = phase.atom_positions
    g = phase.cell.calculate_g_array(hkl)
    s = g / 2.0
    F = np.zeros(len(hkl), dtype=complex)
    power = np.zeros(len(hkl))
    cache: dict[str, np.ndarray] = {}
    for el in set(elements):
        cache[el] = calculate_scattering_factor_array(el, s)
    phases = np.exp(2j * np.pi * (hkl @ xyz.T))  # (N, atoms)
    for j, el in enumerate(elements):
        fj = occ[j] * cache[el] * np.exp(-biso[j] * s**2)
        F += fj * phases[:, j]
        power += np.abs(fj)
    if voltage_kv is not None:
        gamma = calculate_lorentz_factor(voltage_kv)
        F *= gamma
        power *= gamma
    return F, power


def calculate_structure_factor_array(phase: Phase, hkl, *, voltage_kv: float | None = None) -> np.ndarray:
    """Complex kinematic structure factors F(hkl) in Å for an (N, 3) array.

    Parameters
    ----------
    phase : Phase
    hkl : (N, 3) int array
    voltage_kv : float, optional
        When given, multiply by the Lorentz factor γ (relativistic f_e).

    Examples
    --------
    >>> from saedkit.core.crystallography.library import find_phase
    >>> round(abs(calculate_structure_factor_array(find_phase("Si"), [[2, 0, 0]])[0]), 6)
    0.0
    """
    h = np.atleast_2d(np.asarray(hkl, dtype=np.int64))
    F, _ = _structure_factor_and_power(phase, h, voltage_kv)
    return F


def canonical_indices(equivalents: np.ndarray) -> np.ndarray:
    """The representative of a family: fewest negative indices, then the largest."""
    eq = np.asarray(equivalents)
    neg = np.sum(eq < 0, axis=1)
    best = eq[neg == neg.min()]
    order = np.lexsort(best.T[::-1])  # ascending lexicographic
    return best[order[-1]]


@dataclass(frozen=True)
class ReflectionTable:
    """Every reflection of a phase inside a sphere of reciprocal space.

    Arrays are aligned; (000) is excluded. ``structure_factor`` is complex, Å.
    """

    phase_name: str
    hkl: np.ndarray = field(repr=False)  # (N, 3) int
    d_A: np.ndarray = field(repr=False)
    g_per_A: np.ndarray = field(repr=False)
    structure_factor: np.ndarray = field(repr=False)
    absent_space_group: np.ndarray = field(repr=False)  # bool
    absent_sites: np.ndarray = field(repr=False)  # bool: zero only because of the atom positions

    @property
    def intensity(self) -> np.ndarray:
        """Kinematic |F|² in Å²."""
        return np.abs(self.structure_factor) ** 2

    @property
    def allowed(self) -> np.ndarray:
        """True where the reflection is kinematically present."""
        return ~(self.absent_space_group | self.absent_sites)

    def __len__(self) -> int:
        return len(self.hkl)

    def select(self, keep: np.ndarray) -> "ReflectionTable":
        """A table of the rows where ``keep`` is True."""
        return ReflectionTable(self.phase_name, self.hkl[keep], self.d_A[keep], self.g_per_A[keep],
                               self.structure_factor[keep], self.absent_space_group[keep], self.absent_sites[keep])


def calculate_reflections(phase: Phase, *, d_min_A: float | None = None, g_max_per_A: float | None = None,
                          voltage_kv: float | None = None) -> ReflectionTable:
    """All reflections with |g| ≤ g_max (d ≥ d_min), with F, d and absence flags.

    Parameters
    ----------
    phase : Phase
    d_min_A, g_max_per_A : float
        The limit, as a smallest spacing or a largest |g| = 1/d (give one).
    voltage_kv : float, optional
        For relativistic scattering factors.
    """
    if (d_min_A is None) == (g_max_per_A is None):
        raise ValueError("give exactly one of d_min_A or g_max_per_A")
    g_max = 1.0 / check_positive("d_min_A", d_min_A) if d_min_A is not None else check_positive("g_max_per_A", g_max_per_A)
    cell = phase.cell
    lim = [int(np.floor(g_max * L + 1e-9)) for L in (cell.a, cell.b, cell.c)]
    rng = [np.arange(-n, n + 1) for n in lim]
    hkl = np.stack(np.meshgrid(*rng, indexing="ij"), axis=-1).reshape(-1, 3)
    hkl = hkl[np.any(hkl != 0, axis=1)]
    g = cell.calculate_g_array(hkl) if len(hkl) else np.zeros(0)
    keep = g <= g_max * (1 + 1e-12)
    hkl, g = hkl[keep], g[keep]
    order = np.lexsort((-hkl[:, 2], -hkl[:, 1], -hkl[:, 0], np.round(g, 9)))
    hkl, g = hkl[order], g[order]
    F, power = _structure_factor_and_power(phase, hkl, voltage_kv)
    sg_absent = phase.is_space_group_absent_array(hkl) if len(hkl) else np.zeros(0, bool)
    zero = np.abs(F) < _ZERO_FRACTION * np.maximum(power, 1e-12)
    return ReflectionTable(phase.name, hkl, 1.0 / g, g, F, sg_absent, zero & ~sg_absent)


@dataclass(frozen=True)
class RingFamily:
    """A family of symmetry-equivalent reflections: one ring of a powder pattern."""

    hkl: tuple[int, int, int]  # representative
    d_A: float
    multiplicity: int
    intensity: float  # multiplicity · |F|² (Å²), kinematic, no Lorentz or texture factor
    absent_space_group: bool
    absent_sites: bool

    @property
    def allowed(self) -> bool:
        return not (self.absent_space_group or self.absent_sites)

    def to_dict(self) -> dict:
        return {"hkl": list(self.hkl), "d_A": self.d_A, "multiplicity": self.multiplicity,
                "intensity": self.intensity, "allowed": self.allowed}


def calculate_ring_families(phase: Phase, *, d_min_A: float, voltage_kv: float | None = None,
                            include_absent: bool = False) -> tuple[RingFamily, ...]:
    """Powder rings of a phase: reflection families with multiplicity, largest d first."""
    table = calculate_reflections(phase, d_min_A=d_min_A, voltage_kv=voltage_kv)
    seen: set[tuple[int, int, int]] = set()
    out = []
    index = {tuple(h): i for i, h in enumerate(table.hkl.tolist())}
    for i, h in enumerate(table.hkl.tolist()):
        if tuple(h) in seen:
            continue
        eq = phase.calculate_equivalent_array(h)
        members = [tuple(e) for e in eq.tolist() if tuple(e) in index]
        seen.update(members)
        fam = RingFamily(
            tuple(int(v) for v in canonical_indices(eq)),
            float(table.d_A[i]),
            len(members),
            float(len(members) * table.intensity[i]),
            bool(table.absent_space_group[i]),
            bool(table.absent_sites[i]),
        )
        if include_absent or fam.allowed:
            out.append(fam)
    out.sort(key=lambda f: (-f.d_A, f.hkl))
    return tuple(out)
