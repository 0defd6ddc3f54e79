"""The screen mapping: limits from percentiles, log/gamma/linear curves, colour tables (numpy only)."""

from __future__ import annotations

import numpy as np
import pytest

from saedkit.gui.display import (
    COLOUR_MAPS,
    DisplaySettings,
    calculate_colour_table,
    calculate_display_image,
    calculate_display_limits,
)


def test_limits_and_curves(rng):
    data = rng.exponential(100.0, size=(1200, 1100)).astype(np.float32)
    data[500:520, 500:520] = 65535.0  # a saturated central beam
    lo, hi = calculate_display_limits(data, 0.5, 99.9)
    ref_lo, ref_hi = np.percentile(data, [0.5, 99.9])
    assert lo == pytest.approx(ref_lo, rel=0.1, abs=1.0) and hi == pytest.approx(ref_hi, rel=0.1)
    lin, _ = calculate_display_image(data, DisplaySettings(mapping="linear"))
    log, _ = calculate_display_image(data, DisplaySettings(mapping="log"))
    gam, _ = calculate_display_image(data, DisplaySettings(mapping="gamma", gamma=0.5))
    assert lin.dtype == np.uint8 and lin.shape == data.shape and lin.flags.c_contiguous
    assert lin[510, 510] == log[510, 510] == gam[510, 510] == 255
    # faint pixels are brighter on the log and gamma curves than on the linear one
    faint = data < np.median(data)
    assert log[faint].mean() > gam[faint].mean() > lin[faint].mean()
    # the threaded path (> 1 Mpx) gives the same image as a single block
    small, _ = calculate_display_image(data[:900], DisplaySettings(mapping="log"), limits=(lo, hi))
    assert np.array_equal(small, log[:900])
    prev, _ = calculate_display_image(data, DisplaySettings(), step=4)
    assert prev.shape == (300, 275)


def test_colour_tables():
    for name in COLOUR_MAPS:
        table = calculate_colour_table(name)
        assert len(table) == 256 and table[0] == 0xFF000000
        inv = calculate_colour_table(name, invert=True)
        assert inv[0] == table[-1] and inv[-1] == table[0]
    grey = calculate_colour_table("grey")
    assert grey[128] == 0xFF808080
    with pytest.raises(ValueError):
        DisplaySettings(mapping="sqrt")
