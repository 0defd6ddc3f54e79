"""Phase identification from ring d-spacings."""

import math
from itertools import product

import numpy as np
import pytest

from saedkit.core.errors import InputError
from saedkit.core.indexing.identify import identify_phases
from saedkit.core.crystallography.library import LIBRARY, find_phase
from saedkit.core.crystallography.structure_factors import calculate_ring_families

PHASES = [find_phase(e.name) for e in LIBRARY]


# Published lattice parameters (REFERENCES.md, sources there) and the reflection rules of
# International Tables Vol. A, typed here: the ring spacings are computed in the test by the
# textbook formulas, not by saedkit's ring-family code.
PUBLISHED = {
    "Au": ("fcc", 4.0782, None),     # Maeland & Flanagan, Can. J. Phys. 42, 2364 (1964)
    "Al": ("fcc", 4.0495, None),     # Witt, Z. Naturforsch. 22A, 92 (1967)
    "Cu": ("fcc", 3.6150, None),     # NBS Circular 539 vol. I (from memory)
    "Ni": ("fcc", 3.5239, None),     # Taylor, J. Inst. Metals 77, 585 (1950)
    "Fe": ("bcc", 2.8665, None),     # NBS Circular 539 vol. IV (from memory)
    "Si": ("diamond", 5.431144, None),  # NIST SRM 640f, Black et al., Powder Diffraction 35 (2020)
    "NaCl": ("fcc", 5.6402, None),   # Walker et al., Am. Mineral. 89, 204 (2004)
    "MgO": ("fcc", 4.2112, None),    # from memory
    "TiO2": ("rutile", 4.593659, 2.958682),  # Abrahams & Bernstein, J. Chem. Phys. 55, 3206 (1971)
    "Ti": ("hcp", 2.9508, 4.6855),   # Wyckoff, Crystal Structures (1963), from memory
}


def _present(kind, h, k, l):
    if kind == "fcc":
        return len({h % 2, k % 2, l % 2}) == 1
    if kind == "bcc":
        return (h + k + l) % 2 == 0
    if kind == "diamond":
        return len({h % 2, k % 2, l % 2}) == 1 and (h % 2 == 1 or (h + k + l) % 4 == 0)
    if kind == "rutile":  # P4_2/mnm: 0kl with k + l odd and h00 with h odd absent (n-glide); 00l with l odd
        return not (h == 0 and (k + l) % 2) and not (k == 0 and (h + l) % 2) and not (h == k == 0 and l % 2)
    if kind == "hcp":  # 2c: zero when h + 2k = 3n and l odd
        return not ((h + 2 * k) % 3 == 0 and l % 2)
    raise ValueError(kind)


def _d(kind, a, c, h, k, l):
    if kind == "hcp":  # 1/d² = 4/3 (h² + hk + k²)/a² + l²/c²
        return 1 / math.sqrt(4 / 3 * (h * h + h * k + k * k) / a**2 + l * l / c**2)
    if kind == "rutile":  # 1/d² = (h² + k²)/a² + l²/c²
        return 1 / math.sqrt((h * h + k * k) / a**2 + l * l / c**2)
    return a / math.sqrt(h * h + k * k + l * l)


def _rings(name, d_min=0.9, noise=0.002, seed=0):
    """Distinct ring spacings (Å) of a phase down to d_min, with 0.2 % measurement noise."""
    kind, a, c = PUBLISHED[name]
    ds = set()
    for h, k, l in product(range(-7, 8), repeat=3):
        if (h, k, l) != (0, 0, 0) and _present(kind, h, k, l):
            d = _d(kind, a, c, h, k, l)
            if d >= d_min:
                ds.add(round(d, 5))
    d = np.array(sorted(ds, reverse=True))
    return d * (1 + np.random.default_rng(seed).normal(0, noise, len(d)))


@pytest.mark.parametrize("name", ["Au", "Al", "Cu", "Ni", "Fe", "Si", "NaCl", "MgO", "TiO2", "Ti"])
def test_single_phase_is_ranked_first(name):
    d = _rings(name)
    res = identify_phases(d, PHASES)
    assert res.best.phases == (name,)
    assert res.best.fraction_explained == pytest.approx(1.0)


def test_published_rings_match_textbook_ratios():
    # the test's own spacings against the fcc radius ratios of REFERENCES.md (1, 1.1547, 1.6330, ...)
    d = _rings("Au", noise=0.0)
    assert d[0] / d[:6] == pytest.approx([1, 1.1547, 1.6330, 1.9149, 2.0000, 2.3094], abs=1e-4)
    assert d[:3] == pytest.approx([2.3545, 2.0391, 1.4419], abs=1e-4)


def test_gold_ring_list_published_spacings():
    # Au rings 2.3545, 2.0391, 1.4419, 1.2296, 1.1773 Å (a = 4.0782 Å, Maeland & Flanagan 1964)
    res = identify_phases([2.3545, 2.0391, 1.4419, 1.2296, 1.1773], PHASES, d_tolerance_pct=0.5)
    assert res.best.phases == ("Au",)
    assert [m.hkl for m in res.best.matches] == [(1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1), (2, 2, 2)]


def test_two_phase_mixture():
    d1 = _rings("Si", d_min=1.0)
    d2 = _rings("TiO2", d_min=1.0, seed=1)
    res = identify_phases(np.concatenate([d1, d2]), PHASES)
    assert set(res.best.phases) == {"Si", "TiO2"}


def test_intensities_from_the_ring_families_still_rank_first():
    # with the program's own kinematic intensities as weights (a consistency check, not a known answer)
    for name in ("Au", "TiO2", "Ti"):
        fams = calculate_ring_families(find_phase(name), d_min_A=0.9)
        d = np.array([f.d_A for f in fams]) * (1 + np.random.default_rng(3).normal(0, 0.002, len(fams)))
        res = identify_phases(d, PHASES, intensities=np.array([f.intensity / f.d_A for f in fams]))
        assert res.best.phases == (name,)


def test_bad_input():
    with pytest.raises(InputError, match="d_A"):
        identify_phases([], PHASES)
    with pytest.raises(InputError, match="intensities"):
        identify_phases([2.0, 1.5], PHASES, intensities=[1.0])


def test_au_with_rock_salt_from_published_lattice_parameters():
    # Au a = 4.0782 Å (Maeland & Flanagan 1964) and NaCl a = 5.6402 Å (Walker et al. 2004):
    # rings d = a/√N on the fcc sequence; NaCl's all-odd rings are weak (Na and Cl in antiphase,
    # from memory of the powder-file intensities), so its 111, 311, 331 are left out here
    d_au = 4.0782 / np.sqrt([3, 4, 8, 11, 12])
    d_nacl = 5.6402 / np.sqrt([4, 8, 12, 16, 20, 24])
    d = np.concatenate([d_au, d_nacl])
    res = identify_phases(d, PHASES, d_tolerance_pct=1.0)
    assert set(res.best.phases) == {"Au", "NaCl"}
    # every ring goes to the phase it was made from (matches are in the order of d)
    assert [m.phase for m in res.best.matches] == ["Au"] * len(d_au) + ["NaCl"] * len(d_nacl)


@pytest.mark.parametrize("main,other,effect", [
    ("Au", "Cu", dict(spots_per_ring=40.0)),
    ("Au", "NaCl", dict(texture_arc_deg=25.0)),
    ("Ni", "MgO", dict(halo_counts=1000.0)),
    ("Fe", None, dict(texture_arc_deg=25.0)),
])
def test_phases_from_rings_found_on_real_looking_films(main, other, effect):
    # the whole chain on a simulated film (invented data): rings found on the image, d = K/R with the
    # known K, phases ranked — spotty, textured, halo and two-phase films
    from saedkit.core.detection.masks import find_auto_mask
    from saedkit.core.detection.rings import find_rings
    from saedkit.core.distortion import Ellipse
    from saedkit.core.simulation.render import BeamStop
    from saedkit.core.simulation.simulate import simulate_ring_pattern

    n, K = 512, 250.0
    img, t = simulate_ring_pattern(find_phase(main), shape=(n, n), camera_constant_px_A=K,
                                   ellipse=Ellipse(0.01, 30.0), centre_xy=(n / 2 + 6.8, n / 2 - 4.6),
                                   beam_stop=BeamStop(70.0), rng=np.random.default_rng(1),
                                   admixture=[(find_phase(other), 1.0)] if other else (), **effect)
    fit = find_rings(img, mask=find_auto_mask(img.astype(np.float32), saturation_value=65535))
    res = identify_phases([K / r.radius_px for r in fit.rings], PHASES,
                          intensities=[max(r.height, 0.0) for r in fit.rings])
    assert set(res.best.phases) == ({main, other} if other else {main})
