"""How a pattern is shown: intensity mapping and colour tables (numpy only), the same on screen and in the
exported figures (the report shows the pattern as the user saw it).

A diffraction pattern spans five or six decades: a saturated central beam,
bright low-order spots and faint high-order ones on a falling background.
The screen image is 8-bit; it is computed once per display change:

1. display limits from percentiles of a subsample (every k-th pixel in each
   direction, about 250 000 pixels), so a 4096² image costs milliseconds;
2. each pixel scaled to ``t = (v − lo)/(hi − lo)`` in [0, 1] and quantised to
   65 536 levels, then one lookup table gives the 8-bit value of the chosen
   curve (log, gamma or linear);
3. the colour map (and inversion) is the colour table of an indexed 8-bit
   image, so changing it costs nothing here.

The work is split over row blocks run on a few threads (numpy releases the
GIL in these loops).
"""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace

import numpy as np

__all__ = [
    "DisplaySettings",
    "MAPPINGS",
    "COLOUR_MAPS",
    "calculate_display_limits",
    "calculate_display_lut",
    "calculate_display_image",
    "calculate_colour_table",
    "calculate_display_fraction",
]

MAPPINGS = ("log", "gamma", "linear")
COLOUR_MAPS = ("grey", "ember", "glacier", "moss")

_LEVELS = 65536
_LOG_STRETCH = 2000.0  # log curve: log(1 + s·t)/log(1 + s); 2000 spans about 3.3 decades
_SAMPLE_PIXELS = 250_000
_POOL: ThreadPoolExecutor | None = None


@dataclass(frozen=True)
class DisplaySettings:
    """The display of the pattern.

    Parameters
    ----------
    mapping : {"log", "gamma", "linear"}
    gamma : float
        Exponent of the gamma curve (< 1 brightens faint features).
    low_pct, high_pct : float
        Percentiles of the pixel values mapped to black and white.
    colour_map : str
        One of :data:`COLOUR_MAPS`.
    invert : bool
        Dark spots on a light background.
    """

    mapping: str = "log"
    gamma: float = 0.5
    low_pct: float = 0.5
    high_pct: float = 99.9
    colour_map: str = "grey"
    invert: bool = False

    def __post_init__(self) -> None:
        if self.mapping not in MAPPINGS:
            raise ValueError(f"mapping must be one of {MAPPINGS}, got {self.mapping!r}")
        if self.colour_map not in COLOUR_MAPS:
            raise ValueError(f"colour_map must be one of {COLOUR_MAPS}, got {self.colour_map!r}")
        if not (0.0 <= self.low_pct < self.high_pct <= 100.0):
            raise ValueError(f"need 0 <= low_pct < high_pct <= 100, got {self.low_pct}, {self.high_pct}")
        if not (0.05 <= self.gamma <= 5.0):
            raise ValueError(f"gamma must be between 0.05 and 5, got {self.gamma}")

    def replace(self, **changes) -> DisplaySettings:
        return replace(self, **changes)

    def to_dict(self) -> dict:
        return {"mapping": self.mapping, "gamma": self.gamma, "low_pct": self.low_pct, "high_pct": self.high_pct,
                "colour_map": self.colour_map, "invert": self.invert}

    @classmethod
    def from_dict(cls, d: dict) -> DisplaySettings:
        """Settings from :meth:`to_dict` (unknown keys ignored, missing ones at their defaults)."""
        names = ("mapping", "gamma", "low_pct", "high_pct", "colour_map", "invert")
        return cls(**{k: d[k] for k in names if k in d})

    def curve_key(self) -> tuple:
        """What the 8-bit image depends on (the colour table does not)."""
        return (self.mapping, round(self.gamma, 4), self.low_pct, self.high_pct)


def _pool() -> ThreadPoolExecutor:
    global _POOL
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=4, thread_name_prefix="saedkit-display")
    return _POOL


def calculate_display_limits(data: np.ndarray, low_pct: float, high_pct: float, *,
                             mask: np.ndarray | None = None) -> tuple[float, float]:
    """Pixel values at two percentiles, from a regular subsample of the image.

    Masked pixels (beam stop, saturated core) are left out when a mask is
    given. Returns ``(lo, hi)`` with ``hi > lo``.
    """
    rows, cols = data.shape
    step = max(1, int(math.sqrt(rows * cols / _SAMPLE_PIXELS)))
    sample = data[::step, ::step]
    if mask is not None and mask.shape == data.shape and mask.any():
        keep = ~mask[::step, ::step]
        if keep.sum() > 100:
            sample = sample[keep]
    sample = np.asarray(sample, dtype=np.float64).ravel()
    sample = sample[np.isfinite(sample)]
    if sample.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(sample, [low_pct, high_pct])
    lo, hi = float(lo), float(hi)
    if not hi > lo:
        hi = float(sample.max())
        lo = float(sample.min())
    if not hi > lo:
        hi = lo + 1.0
    return lo, hi


def calculate_display_lut(settings: DisplaySettings) -> np.ndarray:
    """The 65 536-entry table from quantised ``t`` to the 8-bit value of the curve."""
    t = np.linspace(0.0, 1.0, _LEVELS)
    if settings.mapping == "log":
        y = np.log1p(_LOG_STRETCH * t) / math.log1p(_LOG_STRETCH)
    elif settings.mapping == "gamma":
        y = t ** settings.gamma
    else:
        y = t
    return np.clip(np.rint(y * 255.0), 0, 255).astype(np.uint8)


def _map_block(src: np.ndarray, out: np.ndarray, lo: float, scale: float, lut: np.ndarray) -> None:
    buf = np.subtract(src, np.float32(lo), dtype=np.float32)
    buf *= np.float32(scale)
    np.clip(buf, 0, _LEVELS - 1, out=buf)
    np.take(lut, buf.astype(np.uint16), out=out)


def calculate_display_image(data: np.ndarray, settings: DisplaySettings, *, step: int = 1,
                            limits: tuple[float, float] | None = None,
                            mask: np.ndarray | None = None) -> tuple[np.ndarray, tuple[float, float]]:
    """The 8-bit screen image of a pattern.

    Parameters
    ----------
    data : (rows, cols) array
        The pattern.
    settings : DisplaySettings
    step : int
        Take every ``step``-th pixel in each direction (a quick preview).
    limits : (lo, hi), optional
        Display limits to use instead of the percentiles.
    mask : bool array, optional
        Excluded pixels, left out of the percentiles.

    Returns
    -------
    image : (rows/step, cols/step) uint8 C-contiguous array
    limits : (lo, hi)
    """
    if limits is None:
        limits = calculate_display_limits(data, settings.low_pct, settings.high_pct, mask=mask)
    lo, hi = limits
    src = data[::step, ::step] if step > 1 else data
    out = np.empty(src.shape, dtype=np.uint8)
    lut = calculate_display_lut(settings)
    scale = (_LEVELS - 1) / (hi - lo)
    rows = src.shape[0]
    if src.size < 1_000_000:
        _map_block(src, out, lo, scale, lut)
    else:
        n = 8
        edges = np.linspace(0, rows, n + 1).astype(int)
        futures = [_pool().submit(_map_block, src[a:b], out[a:b], lo, scale, lut)
                   for a, b in zip(edges[:-1], edges[1:]) if b > a]
        for f in futures:
            f.result()
    return out, (lo, hi)


def _interpolate(stops: list[tuple[float, tuple[int, int, int]]]) -> np.ndarray:
    t = np.linspace(0, 1, 256)
    pos = np.array([s[0] for s in stops])
    rgb = np.array([s[1] for s in stops], dtype=float)
    return np.stack([np.interp(t, pos, rgb[:, i]) for i in range(3)], axis=1)


def calculate_colour_table(name: str, *, invert: bool = False) -> list[int]:
    """256 colours (0xAARRGGBB integers) of a colour map for an indexed 8-bit image.

    ``grey`` is the plain grey ramp; ``ember`` runs black → deep red →
    orange → pale yellow; ``glacier`` black → navy → teal → white; ``moss``
    black → dark green → yellow-green → cream. All rise monotonically in
    lightness, so brightness still reads as intensity.
    """
    if name == "grey":
        rgb = np.repeat(np.arange(256, dtype=float)[:, None], 3, axis=1)
    elif name == "ember":
        rgb = _interpolate([(0.0, (0, 0, 0)), (0.3, (110, 10, 20)), (0.6, (225, 95, 20)),
                            (0.85, (250, 200, 80)), (1.0, (255, 252, 230))])
    elif name == "glacier":
        rgb = _interpolate([(0.0, (0, 0, 0)), (0.3, (15, 30, 105)), (0.6, (20, 140, 160)),
                            (0.85, (150, 225, 215)), (1.0, (255, 255, 255))])
    elif name == "moss":
        rgb = _interpolate([(0.0, (0, 0, 0)), (0.3, (20, 70, 30)), (0.65, (140, 170, 40)),
                            (0.88, (225, 225, 140)), (1.0, (255, 252, 235))])
    else:
        raise ValueError(f"unknown colour map {name!r}; choose one of {COLOUR_MAPS}")
    if invert:
        rgb = rgb[::-1]
    c = np.clip(np.rint(rgb), 0, 255).astype(np.uint32)
    return [int(0xFF000000 | (r << 16) | (g << 8) | b) for r, g, b in c]


def calculate_display_fraction(data: np.ndarray, settings: DisplaySettings, *,
                               mask: np.ndarray | None = None) -> np.ndarray:
    """Display levels 0–1 of a pattern, with the screen's limits and curve (float, not quantised to 8 bits)."""
    a = np.asarray(data, dtype=np.float32)
    lo, hi = calculate_display_limits(a, settings.low_pct, settings.high_pct, mask=mask)
    t = np.clip((a - np.float32(lo)) / np.float32(hi - lo), 0, 1)
    if settings.mapping == "log":
        out = np.log1p(_LOG_STRETCH * t) / math.log1p(_LOG_STRETCH)
    elif settings.mapping == "gamma":
        out = t ** settings.gamma
    else:
        out = t
    return np.nan_to_num(np.clip(out, 0, 1), nan=0.0).astype(np.float32)
