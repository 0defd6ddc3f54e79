"""Phase identification from a ring pattern: which phases (or pairs of phases) explain the rings.

Each measured ring (d-spacing, rough intensity) is compared with the
allowed reflection families of every candidate phase. A phase scores by
how many measured rings its families explain within the tolerance (weighted
by ring strength) and how many of its own strong rings inside the measured
range are actually seen. Mixtures of two phases are scored on the union of
their explanations, with a small penalty so a single phase that explains
everything wins over a pair.

This is the same reasoning as a search of a powder-diffraction file, on
the phases the user supplies (the built-in library or CIFs).
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from saedkit.core._validate import check_positive
from saedkit.core.crystallography.crystal import Phase
from saedkit.core.errors import InputError
from saedkit.core.crystallography.structure_factors import calculate_ring_families

__all__ = ["RingMatch", "PhaseScore", "PhaseIdentification", "identify_phases"]


@dataclass(frozen=True)
class RingMatch:
    """One measured ring and the reflection family that explains it (or None)."""

    d_A: float
    phase: str | None
    hkl: tuple[int, int, int] | None
    d_error_pct: float | None

    def to_dict(self) -> dict:
        return {"d_A": self.d_A, "phase": self.phase, "hkl": None if self.hkl is None else list(self.hkl),
                "d_error_pct": self.d_error_pct}


@dataclass(frozen=True)
class PhaseScore:
    """A phase, or a mixture of two, ranked against the measured rings."""

    phases: tuple[str, ...]
    score: float
    fraction_explained: float  # intensity-weighted fraction of measured rings explained
    fraction_seen: float  # of the phase's strong rings in range, the fraction observed
    d_error_pct: float  # RMS error of the matched rings
    matches: tuple[RingMatch, ...] = field(repr=False)

    def to_dict(self) -> dict:
        return {"phases": list(self.phases), "score": self.score, "fraction_explained": self.fraction_explained,
                "fraction_seen": self.fraction_seen, "d_error_pct": self.d_error_pct,
                "rings": [m.to_dict() for m in self.matches]}


@dataclass(frozen=True)
class PhaseIdentification:
    """Phases ranked against one ring pattern, best first."""

    candidates: tuple[PhaseScore, ...]
    d_A: tuple[float, ...]
    d_tolerance_pct: float

    @property
    def best(self) -> PhaseScore | None:
        return self.candidates[0] if self.candidates else None

    def to_dict(self) -> dict:
        return {"d_A": list(self.d_A), "d_tolerance_pct": self.d_tolerance_pct,
                "candidates": [c.to_dict() for c in self.candidates]}


def _families(phase: Phase, d_min: float):
    fams = calculate_ring_families(phase, d_min_A=d_min)
    d = np.array([f.d_A for f in fams])
    inten = np.array([f.intensity / f.d_A for f in fams])  # ring peak ∝ m|F|²/R (spread over 2πR)
    inten = inten / inten.max() if len(inten) else inten
    return fams, d, inten


def _assign(d_meas, fams, d_fam, tol):
    out = []
    for d in d_meas:
        if len(d_fam) == 0:
            out.append((None, None))
            continue
        err = (d - d_fam) / d_fam
        j = int(np.argmin(np.abs(err)))
        out.append((j, float(err[j] * 100)) if abs(err[j]) <= tol else (None, None))
    return out


def identify_phases(d_A: Sequence[float], phases: Sequence[Phase], *, intensities: Sequence[float] | None = None,
                    d_tolerance_pct: float = 1.5, mixtures: bool = True, top: int = 10) -> PhaseIdentification:
    """Rank phases (and two-phase mixtures) by how well they explain measured ring spacings.

    Parameters
    ----------
    d_A : sequence of float
        Measured ring d-spacings in Å (calibrated).
    phases : sequence of Phase
        Candidates (the library, the user's CIFs).
    intensities : sequence of float, optional
        Rough ring intensities (peak heights); weight the explained fraction.
    d_tolerance_pct : float
        Largest relative d error for a match (1–2 % for routine SAED, common practice).
    mixtures : bool
        Also score every pair of phases.
    top : int
        Number of results.

    Returns
    -------
    PhaseIdentification
    """
    d = np.asarray(d_A, float)
    if d.ndim != 1 or len(d) == 0 or not np.all(np.isfinite(d)) or np.any(d <= 0):
        raise InputError(f"d_A must be a non-empty list of spacings > 0 Å, got {list(d_A)!r}")
    if not phases:
        raise InputError("phases must name at least one candidate phase")
    tol = check_positive("d_tolerance_pct", d_tolerance_pct) / 100
    w = np.ones(len(d)) if intensities is None else np.asarray(intensities, float)
    if w.shape != d.shape:
        raise InputError(f"intensities must have one value per ring ({len(d)}), got {len(w)}")
    w = np.clip(w, 0, None)
    w = w / w.sum() if w.sum() > 0 else np.full(len(d), 1 / len(d))
    d_lo, d_hi = d.min() * (1 - tol), d.max() * (1 + tol)

    per_phase = {}
    for ph in phases:
        fams, d_fam, i_fam = _families(ph, d_lo)
        assign = _assign(d, fams, d_fam, tol)
        in_range = (d_fam >= d_lo) & (d_fam <= d_hi)
        strong = in_range & (i_fam >= 0.1)
        seen_idx = {j for j, _ in assign if j is not None}
        per_phase[ph.name] = (fams, d_fam, i_fam, assign, strong, seen_idx)

    def score_of(names):
        matches, errs, expl = [], [], np.zeros(len(d), bool)
        seen_total, strong_total = 0, 0
        for k, dk in enumerate(d):
            best = None
            for n in names:
                fams, _, _, assign, _, _ = per_phase[n]
                j, e = assign[k]
                if j is not None and (best is None or abs(e) < abs(best[2])):
                    best = (n, fams[j].hkl, e)
            if best is None:
                matches.append(RingMatch(float(dk), None, None, None))
            else:
                matches.append(RingMatch(float(dk), best[0], tuple(best[1]), best[2]))
                errs.append(best[2])
                expl[k] = True
        for n in names:
            _, _, _, _, strong, seen_idx = per_phase[n]
            strong_total += int(strong.sum())
            seen_total += sum(1 for j in np.flatnonzero(strong) if j in seen_idx)
        f_exp = float(w[expl].sum())
        f_seen = seen_total / strong_total if strong_total else 0.0
        rms = float(math.sqrt(np.mean(np.square(errs)))) if errs else float("nan")
        # each matched ring counts with the likelihood of its error (σ = half the tolerance)
        sigma = 50 * tol
        like = np.zeros(len(d))
        for k, m in enumerate(matches):
            if m.d_error_pct is not None:
                like[k] = math.exp(-0.5 * (m.d_error_pct / sigma) ** 2)
        s = float(w @ like) * (0.5 + 0.5 * f_seen)
        if len(names) > 1:
            s *= 0.95  # prefer one phase that explains everything
        return PhaseScore(tuple(names), float(s), f_exp, float(f_seen), rms, tuple(matches))

    results = [score_of([ph.name]) for ph in phases]
    if mixtures and len(phases) > 1:
        for a, b in itertools.combinations([ph.name for ph in phases], 2):
            s = score_of([a, b])
            # a mixture is only worth listing when each phase explains something the other does not
            only_a = any(m.phase == a for m in s.matches)
            only_b = any(m.phase == b for m in s.matches)
            if only_a and only_b:
                results.append(s)
    results.sort(key=lambda r: -r.score)
    return PhaseIdentification(tuple(results[: max(int(top), 1)]), tuple(float(x) for x in d), float(d_tolerance_pct))
