"""`saedkit calibrate` on a gold ring pattern drawn in the test (not by saedkit's simulator).

The rings sit where the exact camera equation puts them, R = (K/λ)·tan(2·asin(λ/2d)), with
d = a/√(h²+k²+l²) for Au a = 4.0782 Å (Maeland & Flanagan, Can. J. Phys. 42, 2364, 1964) and
λ(200 kV) = 0.0250793 Å (REFERENCES.md table). The command line fits the exact form by default
and must recover K; the small-angle fit comes out high by about 1e-4 (the README table).
"""

import json
import math

import numpy as np
import pytest

from saedkit.cli import main

K_TRUE = 240.0
LAM_A = 0.0250793
AU_HKL = [(1, 1, 1), (2, 0, 0), (2, 2, 0), (3, 1, 1), (2, 2, 2), (4, 0, 0)]
HEIGHTS = [900.0, 600.0, 420.0, 380.0, 200.0, 130.0]  # falling with order, as in a film (invented)


@pytest.fixture(scope="module")
def drawn_film(tmp_path_factory):
    n = 512
    cx, cy = 255.3, 258.1
    y, x = np.mgrid[0:n, 0:n].astype(float)
    r = np.hypot(x - cx, y - cy)
    img = 60.0 + 400.0 * np.exp(-r / 40.0)  # background and the tail of the direct beam
    for hkl, h in zip(AU_HKL, HEIGHTS):
        d = 4.0782 / math.sqrt(sum(v * v for v in hkl))
        R = K_TRUE / LAM_A * math.tan(2 * math.asin(LAM_A / (2 * d)))
        img += h * np.exp(-0.5 * ((r - R) / 1.3) ** 2)
    img = np.random.default_rng(17).poisson(img).astype(np.uint16)
    path = tmp_path_factory.mktemp("drawn") / "au_drawn.npy"
    np.save(path, img)
    return path


def _k(capsys, argv):
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)["camera_constant_px_A"]


def test_default_exact_fit_recovers_k_of_a_hand_drawn_film(drawn_film, capsys):
    k_exact = _k(capsys, ["calibrate", str(drawn_film), "--standard", "Au", "--kv", "200", "--no-ellipse", "--json"])
    k_small = _k(capsys, ["calibrate", str(drawn_film), "--standard", "Au", "--kv", "200", "--no-ellipse",
                          "--small-angle", "--json"])
    assert k_exact == pytest.approx(K_TRUE, rel=3e-5)
    # small-angle on exact rings: K·(1 + ε) with ε = tan(2 asin(λ/2d))/(λ/d) − 1 between 4e-5 (111)
    # and 1.8e-4 (400) at 200 kV (closed form; README table)
    assert 3e-5 < k_small / K_TRUE - 1 < 2e-4
