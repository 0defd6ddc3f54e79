"""Phase identification from ring d-spacings."""

import numpy as np
import pytest

from saedkit.core.errors import InputError
from saedkit.core.indexing.identify import identify_phases
from saedkit.core.crystallography.library import LIBRARY, find_phase
from saedkit.core.crystallography.structure_factors import calculate_ring_families

PHASES = [find_phase(e.name) for e in LIBRARY]


def _rings(name, d_min=0.9, noise=0.002, seed=0):
    fams = calculate_ring_families(find_phase(name), d_min_A=d_min)
    rng = np.random.default_rng(seed)
    d = np.array([f.d_A for f in fams]) * (1 + rng.normal(0, noise, len(fams)))
    inten = np.array([f.intensity / f.d_A for f in fams])
    return d, inten


@pytest.mark.parametrize("name", ["Au", "Al", "Cu", "Ni", "Fe", "Si", "NaCl", "MgO", "TiO2", "Ti"])
def test_single_phase_is_ranked_first(name):
    d, inten = _rings(name)
    res = identify_phases(d, PHASES, intensities=inten)
    assert res.best.phases == (name,)
    assert res.best.fraction_explained == pytest.approx(1.0)


def test_gold_ring_list_published_spacings():
    # Au rings 2.3545, 2.0391, 1.4419, 1.2296, 1.1773 Å (a = 4.0782 Å, Maeland & Flanagan 1964)
    res = identify_phases([2.3545, 2.0391, 1.4419, 1.2296, 1.1773], PHASES, d_tolerance_pct=0.5)
    assert res.best.phases == ("Au",)
    assert [m.hkl for m in res.best.matches] == [(1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1), (2, 2, 2)]


def test_two_phase_mixture():
    d1, i1 = _rings("Si", d_min=1.0)
    d2, i2 = _rings("TiO2", d_min=1.0, seed=1)
    res = identify_phases(np.concatenate([d1, d2]), PHASES, intensities=np.concatenate([i1, i2]))
    assert set(res.best.phases) == {"Si", "TiO2"}


def test_bad_input():
    with pytest.raises(InputError, match="d_A"):
        identify_phases([], PHASES)
    with pytest.raises(InputError, match="intensities"):
        identify_phases([2.0, 1.5], PHASES, intensities=[1.0])
