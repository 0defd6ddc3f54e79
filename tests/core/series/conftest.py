"""A small 4-D scan drawn in the tests from textbook zone geometry (not with saedkit's simulator).

Two grains on a 5 x 6 scan of 96 px frames:

- grain A, Ni (fcc, a = 3.5239 Å, Taylor 1950 in REFERENCES.md) along [001]:
  a square net of 200-type reflections, |g| = 2/a, at 90° (textbook fcc
  [001] zone: h, k even, l = 0);
- grain B, α-Fe (bcc, a = 2.8665 Å, REFERENCES.md) along [011]: a rectangular
  net of 200 (|g| = 2/a) and 01-1 (|g| = √2/a) at 90° (textbook bcc [011]
  zone: h + k + l even with k = -l, so h even);

each with a known in-plane rotation that grows by 0.5° per scan column,
a centre that drifts by 0.12 px per frame and jumps by 6 px at one frame,
a saturated direct beam, and two bad frames (one constant, one pure noise).
"""

from __future__ import annotations

import numpy as np
import pytest

A_NI, A_FE = 3.5239, 2.8665
K_PX_A = 45.0
FRAME = 96
SCAN = (5, 6)
BAD_CONSTANT = 14  # (2, 2)
BAD_NOISE = 27  # (4, 3)
JUMP_AT = 9  # from this frame on the centre sits 6 px further right
ROT0 = {"A": 12.0, "B": 40.0}


def grain_of(iy: int, ix: int, nx: int = SCAN[1]) -> str:
    return "A" if ix + 0.5 * iy < 3.5 * nx / 6 else "B"


def truth_of(i: int, *, scan=SCAN, frame: int | None = None, drift_px: float = 0.12) -> dict:
    frame = FRAME if frame is None else frame
    iy, ix = divmod(i, scan[1])
    g = grain_of(iy, ix, scan[1])
    cx = frame / 2 - 0.3 + drift_px * i + (6.0 if i >= JUMP_AT else 0.0)
    cy = frame / 2 + 0.4 - drift_px / 2.4 * i
    return {"grain": g, "phase": "Ni" if g == "A" else "Fe", "rotation_deg": ROT0[g] + 0.5 * ix * 6 / scan[1],
            "centre_xy": (cx, cy)}


def draw_frame(i: int, rng, *, scan=SCAN, frame: int | None = None, K: float = K_PX_A,
               drift_px: float = 0.12) -> np.ndarray:
    """Gaussian spots at c + K·R(θ)·(m g1 + n g2) (the camera equation R = K/d), a direct beam, noise."""
    size = FRAME if frame is None else frame
    t = truth_of(i, scan=scan, frame=size, drift_px=drift_px)
    if t["phase"] == "Ni":
        g1, g2 = np.array([2 / A_NI, 0.0]), np.array([0.0, 2 / A_NI])
    else:
        g1, g2 = np.array([2 / A_FE, 0.0]), np.array([0.0, np.sqrt(2) / A_FE])
    th = np.deg2rad(t["rotation_deg"])
    rot = np.array([[np.cos(th), -np.sin(th)], [np.sin(th), np.cos(th)]])
    yy, xx = np.indices((size, size), dtype=float)
    cx, cy = t["centre_xy"]
    img = np.full((size, size), 120.0)
    img += 30000.0 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / (2 * 2.2 ** 2))  # direct beam
    for m in range(-4, 5):
        for n in range(-4, 5):
            if m == n == 0:
                continue
            g = m * g1 + n * g2
            x, y = np.array([cx, cy]) + K * rot @ g
            if not (5 < x < size - 6 and 5 < y < size - 6):
                continue
            peak = 3000.0 * np.exp(-0.5 * (np.linalg.norm(g) / 1.1) ** 2)
            img += peak * np.exp(-((xx - x) ** 2 + (yy - y) ** 2) / (2 * 1.6 ** 2))
    img = rng.poisson(img).astype(np.float64) + rng.normal(0, 3.0, img.shape)
    return np.clip(np.round(img), 0, 65535).astype(np.uint16)


def build_scan(seed: int = 7) -> np.ndarray:
    rng = np.random.default_rng(seed)
    n = SCAN[0] * SCAN[1]
    frames = np.stack([draw_frame(i, rng) for i in range(n)])
    frames[BAD_CONSTANT] = 9
    frames[BAD_NOISE] = rng.poisson(120.0, (FRAME, FRAME)).astype(np.uint16)
    return frames.reshape(*SCAN, FRAME, FRAME)


@pytest.fixture(scope="session")
def scan_array() -> np.ndarray:
    return build_scan()


@pytest.fixture(scope="session")
def scan_npy(scan_array, tmp_path_factory):
    p = tmp_path_factory.mktemp("scan") / "scan.npy"
    np.save(p, scan_array)
    return p
