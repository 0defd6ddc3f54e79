"""The rotation axis of a rotation series, on spots computed in the test from the Ewald construction."""

from __future__ import annotations

import numpy as np

from saedkit.core.series.rotation import find_rotation_axis, link_spot_tracks

A_NI = 3.5239  # Å, Taylor 1950 (REFERENCES.md)
LAMBDA_200KV_A = 0.025079  # Å, relativistic wavelength at 200 kV (REFERENCES.md)


def _rotation_series(axis_deg: float, *, seed: int, n_frames: int = 80, step_deg: float = 0.5,
                     K: float = 120.0, s_max: float = 0.012):
    """Spot offsets per frame of an fcc crystal turning about an in-plane axis (beam along z).

    A reciprocal lattice point g (fcc: h, k, l all even or all odd) is seen when its excitation error
    s = g_z + λ|g|²/2 (the Ewald sphere near the origin) is below s_max; it appears at K·(g_x, g_y).
    """
    rng = np.random.default_rng(seed)
    r = np.arange(-6, 7)
    hkl = np.array(np.meshgrid(r, r, r, indexing="ij")).reshape(3, -1).T
    par = hkl % 2
    hkl = hkl[(par.min(1) == par.max(1)) & np.any(hkl != 0, axis=1)]
    g0 = hkl / A_NI
    g0 = g0[np.linalg.norm(g0, axis=1) < 1.3]
    q, _ = np.linalg.qr(rng.normal(size=(3, 3)))  # a random crystal orientation
    g0 = g0 @ q.T
    a = np.array([np.cos(np.deg2rad(axis_deg)), np.sin(np.deg2rad(axis_deg)), 0.0])
    ax = np.array([[0, -a[2], a[1]], [a[2], 0, -a[0]], [-a[1], a[0], 0]])
    frames = []
    for i in range(n_frames):
        w = np.deg2rad(i * step_deg)
        R = np.eye(3) + np.sin(w) * ax + (1 - np.cos(w)) * ax @ ax  # Rodrigues' formula
        g = g0 @ R.T
        s = g[:, 2] + 0.5 * LAMBDA_200KV_A * np.sum(g ** 2, axis=1)
        seen = np.abs(s) < s_max
        frames.append(K * g[seen, :2] + rng.normal(0, 0.2, (int(seen.sum()), 2)))
    return frames


def test_rotation_axis_from_spot_lifetimes():
    # ten rotation series of 80° in 0.5° steps about axes at random directions
    errors = []
    for seed in range(10):
        axis_deg = 180.0 * np.random.default_rng(100 + seed).random()
        got = find_rotation_axis(_rotation_series(axis_deg, seed=seed, n_frames=160))
        assert got is not None and got.n_tracks >= 20
        err = abs(((got.angle_deg - axis_deg) + 90.0) % 180.0 - 90.0)
        assert err < 2.0 and err < 3 * got.sigma_deg, (seed, got, axis_deg)
        errors.append(err)
    assert np.median(errors) < 0.75


def test_tracks_link_a_spot_that_stays():
    frames = [np.array([[10.0, 0.0]]), np.array([[10.4, 0.1], [30.0, 5.0]]), np.array([[10.8, 0.2]]), np.zeros((0, 2))]
    tracks = sorted(link_spot_tracks(frames, link_px=1.0))
    assert [(a, b) for a, b, _ in tracks] == [(0, 2), (1, 1)]
    np.testing.assert_allclose(tracks[0][2], [10.4, 0.1])


def test_too_few_tracks_give_none():
    assert find_rotation_axis([np.array([[5.0, 5.0]])] * 3) is None


def test_the_series_run_takes_the_axis_from_each_frames_spots_about_its_centre():
    from saedkit.core.series import FrameResult
    from saedkit.series import calculate_series_rotation_axis

    axis_deg = 64.0
    frames = _rotation_series(axis_deg, seed=4, n_frames=160)
    results = []
    for i, xy in enumerate(frames):
        c = np.array([48.0 + 0.01 * i, 47.0 - 0.02 * i])  # a drifting centre
        spots = tuple((float(x), float(y), 100.0, float("nan")) for x, y in xy + c)
        results.append(FrameResult(i, (i,), True, centre_x_px=float(c[0]), centre_y_px=float(c[1]),
                                   n_spots=len(spots), spots=spots))
    results[7] = FrameResult(7, (7,), False, "frame 7: no signal")
    got = calculate_series_rotation_axis(results[::-1])  # any order
    assert abs(((got.angle_deg - axis_deg) + 90.0) % 180.0 - 90.0) < 2.0
