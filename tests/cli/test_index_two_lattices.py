"""`saedkit index` on a pattern of two lattices (matrix and precipitate): both indexed, the orientation
relationship in the text and the JSON record."""

import json

import numpy as np

from saedkit.cli import main
from saedkit.core.crystallography.library import find_phase
from saedkit.core.crystallography.structure_factors import canonical_indices
from saedkit.core.imageio import write_tiff
from saedkit.core.simulation.simulate import SecondCrystal, simulate_spot_pattern


def _ks():
    # Kurdjumov–Sachs: (111)fcc ∥ (011)bcc, [1̄10]... written as [1 −1 0]fcc ∥ [1 1 −1]bcc
    # (Kurdjumov & Sachs, Z. Phys. 64, 325 (1930); from memory); cubic Cartesian = normalised indices
    def triad(n, d):
        n = np.array(n, float) / np.linalg.norm(n)
        d = np.array(d, float) / np.linalg.norm(d)
        return np.column_stack([n, d, np.cross(n, d)])
    return triad((1, 1, 1), (1, -1, 0)) @ triad((0, 1, 1), (1, 1, -1)).T


def test_index_reports_the_second_lattice_and_its_orientation_relationship(tmp_path, capsys):
    ni, fe = find_phase("Ni"), find_phase("Fe")
    img, t = simulate_spot_pattern(ni, (1, -1, 0), shape=(640, 640), camera_constant_px_A=300.0, rotation_deg=17,
                                   thickness_A=120.0, second=SecondCrystal(fe, _ks(), relative_intensity=0.8),
                                   rng=np.random.default_rng(4))
    p = tmp_path / "ks.tif"
    write_tiff(p, img, voltage_kv=200.0, pixel_size_um=30.0)
    assert main(["index", str(p), "--phase", "Ni", "--phase", "Fe", "--camera-constant", "300", "--json"]) == 0
    rec = json.loads(capsys.readouterr().out)
    fam = lambda ph, z: tuple(canonical_indices(ph.calculate_equivalent_directions(z)))  # noqa: E731
    # the lattice with more spots on the image comes first; either way both are indexed
    first, second = rec["candidates"][0], rec["match"]["second"]
    assert second is not None and {first["phase"], second["phase"]} == {"Ni", "Fe"}
    by = {first["phase"]: first, second["phase"]: second}
    assert fam(ni, by["Ni"]["zone"]) == fam(ni, (1, 1, 0)) and fam(fe, by["Fe"]["zone"]) == fam(fe, (1, 1, 1))
    orel = rec["match"]["orientation_relationship"]
    assert orel["plane_deviation_deg"] < 1.0
    planes = {orel["phase_1"]: orel["plane_1"], orel["phase_2"]: orel["plane_2"]}
    assert sorted(map(abs, planes["Ni"])) == [1, 1, 1] and sorted(map(abs, planes["Fe"])) == [0, 1, 1]
    assert "holz" in first and first["holz"] is None  # one family of the other lattice is not a HOLZ ring
    assert main(["index", str(p), "--phase", "Ni", "--phase", "Fe", "--camera-constant", "300"]) == 0
    out = capsys.readouterr().out
    assert "second lattice: " in out and "orientation relationship:" in out and "∥" in out


def test_index_a_tilted_dynamical_image(tmp_path, capsys):
    # an image tilted 0.6° off Ni [011] with scrambled intensities: detection, then the zone from positions
    # and the tilt from the detected spots' intensities (truth: the simulator's inputs)
    ni = find_phase("Ni")
    img, _ = simulate_spot_pattern(ni, (0, 1, 1), shape=(640, 640), camera_constant_px_A=300.0, rotation_deg=40,
                                   tilt_mrad=10.4, tilt_azimuth_deg=15, intensity_scatter=0.7, thickness_A=500,
                                   rng=np.random.default_rng(0))
    p = tmp_path / "tilted.tif"
    write_tiff(p, img, voltage_kv=200.0, pixel_size_um=30.0)
    assert main(["index", str(p), "--phase", "Ni", "--json"]) == 0
    best = json.loads(capsys.readouterr().out)["candidates"][0]
    fam = tuple(canonical_indices(ni.calculate_equivalent_directions(best["zone"])))
    assert fam == tuple(canonical_indices(ni.calculate_equivalent_directions((0, 1, 1))))
    assert abs(best["camera_constant_px_A"] / 300.0 - 1) < 0.01
    assert best["tilt"]["method"] == "intensities"
    assert abs((best["tilt"]["azimuth_deg"] - 15 + 180) % 360 - 180) < 30
    assert 5 < best["tilt"]["tilt_mrad"] < 16
