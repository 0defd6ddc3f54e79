"""The mask overlay: automatic masks shown, edited, saved as the camera's detector mask and reused."""

from __future__ import annotations

import numpy as np
import pytest

from saedkit.core.detection.detector_mask import (
    detector_mask_path,
    find_detector_mask,
    read_detector_mask,
    write_detector_mask,
)
from saedkit.core.errors import ImageReadError, InputError


def test_detector_mask_file_round_trip(tmp_path):
    m = np.zeros((40, 50), bool)
    m[3:5, 10:30] = True
    path = detector_mask_path(tmp_path, "Cam A/1", m.shape)
    assert path.name == "Cam_A_1_50x40.saedmask.npz"
    write_detector_mask(path, m, camera="Cam A/1")
    back = read_detector_mask(path)
    assert back.camera == "Cam A/1" and np.array_equal(back.mask, m) and back.n_excluded == 40
    assert find_detector_mask(tmp_path, (40, 50)).camera == "Cam A/1"
    assert find_detector_mask(tmp_path, (50, 40)) is None
    with pytest.raises(InputError):
        write_detector_mask(tmp_path / "x.saedmask.npz", np.zeros(5), camera="c")
    (tmp_path / "bad.saedmask.npz").write_text("no")
    with pytest.raises(ImageReadError):
        read_detector_mask(tmp_path / "bad.saedmask.npz")


@pytest.mark.gui
def test_mask_edit_save_and_reuse(window, open_pattern, tmp_path):
    pytest.importorskip("PySide6")
    from saedkit.core.imageio import write_tiff

    rng = np.random.default_rng(9)
    paths = []
    for n in range(2):
        img = rng.poisson(30, (128, 160)).astype(np.uint16)
        img[60:64, 70:74] = 65535  # saturated: the automatic mask finds it
        paths.append(tmp_path / f"p{n}.tif")
        write_tiff(paths[-1], img)
    s = open_pattern(paths[0])
    auto = np.array(s.mask)
    assert auto[61, 71] and window.view.mask_layer.isVisible()  # the automatic mask is on show
    # edit: paint a detector gap (a column of pixels) with the brush
    window.paint_mask([(20.0, y) for y in range(0, 128, 2)], 1.5)
    edited = np.array(s.mask)
    assert edited[:, 20].all() and edited.sum() > auto.sum()
    path = window.save_detector_mask("test camera")
    assert path.is_file() and np.array_equal(read_detector_mask(path).mask, edited)
    # another pattern of the same camera: the gap is masked from the start, without an undo step
    s2 = open_pattern(paths[1])
    assert np.asarray(s2.mask)[:, 20].all() and not s2.can_undo and not s2.is_modified
    assert "detector mask of 'test camera'" in window.statusBar().currentMessage()
