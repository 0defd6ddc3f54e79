"""Real frames: a multi-frame TIFF opens with a notice and a frame choice; NaN pixels open masked."""

from __future__ import annotations

import numpy as np
import pytest

from saedkit.core.errors import ImageReadError
from saedkit.core.imageio import read_pattern


def _nan_file(tmp_path):
    import tifffile

    img = np.random.default_rng(2).normal(100, 5, (96, 112)).astype(np.float32)
    bad = np.zeros(img.shape, bool)
    bad[10:20, 30:50] = True  # 200 pixels
    img[bad] = np.nan
    img[50, 60] = np.inf
    bad[50, 60] = True
    path = tmp_path / "nan.tif"
    tifffile.imwrite(path, img)
    return path, bad


def test_reader_masks_non_finite_pixels_only_when_asked(tmp_path):
    path, bad = _nan_file(tmp_path)
    with pytest.raises(ImageReadError, match="NaN"):
        read_pattern(path)
    img = read_pattern(path, mask_nonfinite=True)
    assert np.array_equal(img.mask, bad) and np.all(np.isfinite(img.data))


@pytest.mark.gui
def test_nan_pixels_open_masked_in_the_window(window, open_pattern, tmp_path):
    path, bad = _nan_file(tmp_path)
    s = open_pattern(path)
    assert np.all(np.asarray(s.mask)[bad])
    assert any("201 pixels are NaN or infinite" in t for _, t in window.notices)


@pytest.mark.gui
def test_a_three_frame_tiff_says_so_and_offers_the_frames(window, open_pattern, tmp_path, monkeypatch):
    import tifffile
    from PySide6.QtWidgets import QInputDialog

    frames = np.stack([np.full((64, 64), 10 * (n + 1), np.uint16) + np.eye(64, dtype=np.uint16) * (n + 1)
                       for n in range(3)])
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, frames, photometric="minisblack")
    s = open_pattern(path)
    assert s.image.page == 0
    level, text = window.notices[-1]
    assert "3 frames" in text and "frame 1" in text
    buttons = [b for b in window.notice.findChildren(type(window.notice.close_button)) if b.text() == "Choose frame…"]
    assert buttons
    monkeypatch.setattr(QInputDialog, "getInt", staticmethod(lambda *a, **k: (3, True)))
    buttons[0].click()
    assert window.session.image.page == 2
    assert float(window.session.image.data[0, 1]) == 30.0  # the third frame's own value, written above
