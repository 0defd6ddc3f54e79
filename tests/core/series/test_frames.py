"""Per-frame measurement pieces: the series mask, per-worker phases, failed frames, virtual detectors."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from saedkit.core.crystallography.library import find_phase
from saedkit.core.errors import InputError
from saedkit.core.series import SeriesOptions, analyse_frames, calculate_series_mask, calculate_virtual_detector_sums
from saedkit.core.series.frames import _worker_phases

from .conftest import K_PX_A, draw_frame


def test_series_mask_keeps_a_shadowing_beam_stop_and_drops_a_false_one(rng):
    yy, xx = np.indices((96, 96))
    frames = rng.poisson(200.0, (8, 96, 96)).astype(float)
    bar = (np.abs(yy - 47.5) < 5) & (xx > 40)  # a beam-stop bar from the centre to the right edge
    shadowed = frames.copy()
    shadowed[:, bar] *= 0.02  # 2 % transmission (common practice for a beam stop's shadow)
    mask = calculate_series_mask(shadowed.sum(0), shadowed.max(0), saturation_value=None)
    assert mask[bar].mean() > 0.9 and mask[~bar].mean() < 0.1
    # the sum of unshadowed frames has nothing to hide
    assert not calculate_series_mask(frames.sum(0), frames.max(0), saturation_value=None)[~bar].any()
    # a pixel saturated in any one frame is masked
    sat = frames.copy()
    sat[3, 10, 12] = 65535
    assert calculate_series_mask(sat.sum(0), sat.max(0), saturation_value=65535)[10, 12]


def test_phases_are_resolved_once_per_worker():
    # equal phases arriving as unpickled copies (one per task) map to one object, so the matcher's
    # reflection tables, cached per phase object, are built once per worker process
    ni = find_phase("Ni")
    a = _worker_phases([pickle.loads(pickle.dumps(ni))])[0]
    b = _worker_phases([pickle.loads(pickle.dumps(ni))])[0]
    assert a is b
    assert _worker_phases(["Fe"])[0] is _worker_phases(["Fe"])[0]


def test_a_failed_frame_is_recorded_and_tracking_goes_on():
    rng = np.random.default_rng(2)
    block = np.stack([np.full((96, 96), 5, np.uint16), draw_frame(1, rng), draw_frame(2, rng)])
    res = analyse_frames(block, first_frame=7, scan_shape=(10,), options=SeriesOptions(
        phases=("Ni",), camera_constant_px_A=K_PX_A, max_index=4), mask=np.zeros((96, 96), bool))
    assert [r.frame for r in res] == [7, 8, 9]
    assert not res[0].ok and res[0].error == "frame 7: contains no signal (all pixels equal 5)"
    assert [r.centre_method for r in res[1:]] == ["searched", "tracked"]
    assert all(r.phase == "Ni" for r in res[1:])


def test_virtual_detector_sums_by_hand():
    f = np.zeros((1, 9, 9))
    f[0, 4, 4] = 1.0  # on the centre
    f[0, 4, 7] = 10.0  # 3 px to the right (x = column)
    f[0, 8, 8] = 100.0  # 4√2 ≈ 5.66 px away
    bf, df = calculate_virtual_detector_sums(f, [[4.0, 4.0]], bright_field_radius_px=1.0,
                                             dark_field_radii_px=(2.5, 5.0))
    assert bf[0] == 1.0 and df[0] == 10.0
    with pytest.raises(InputError, match="one centre each"):
        calculate_virtual_detector_sums(f, [[4.0, 4.0], [1.0, 1.0]], bright_field_radius_px=1.0,
                                        dark_field_radii_px=(2.5, 5.0))


def test_options_are_checked():
    with pytest.raises(InputError, match="not both"):
        SeriesOptions(camera_constant_px_A=40.0, calibration=object())
    with pytest.raises(InputError, match="dark_field_radii_px"):
        SeriesOptions(dark_field_radii_px=(20.0, 10.0))
    with pytest.raises(InputError, match="drift_tolerance_px must be a number > 0"):
        SeriesOptions(drift_tolerance_px=0.0)
