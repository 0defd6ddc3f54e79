"""Maps of a measured series: one value per scan position.

:func:`calculate_series_maps` arranges the per-frame results of
:mod:`saedkit.core.series.frames` on the scan grid: phase, zone axis,
in-plane rotation, score, spot count, virtual bright-field and annular
dark-field sums, and the centre (which shows the beam's drift).
:func:`write_series_maps` and :func:`read_series_maps` store them in HDF5.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np

from saedkit.core.errors import ImageReadError, InputError

__all__ = ["SeriesMaps", "calculate_series_maps", "write_series_maps", "read_series_maps", "MAP_NAMES"]

MAP_NAMES = ("ok", "phase_index", "zone_uvw", "orientation_index", "in_plane_rotation_deg", "score", "n_spots",
             "bright_field", "dark_field", "centre_x_px", "centre_y_px")


@dataclass(frozen=True)
class SeriesMaps:
    """Per-position maps of a series (arrays of the scan's shape).

    Attributes
    ----------
    scan_shape : tuple of int
    phases : tuple of str
        ``phase_index`` codes: ``phases[k]`` for code ``k``, -1 where no phase matched.
    orientations : tuple of str
        ``orientation_index`` codes: labels ``"Ni <0 0 1>"`` of the distinct
        (phase, zone family) results, -1 where none.
    ok : bool array
        False for frames that could not be measured.
    phase_index, orientation_index, n_spots : int arrays
    zone_uvw : int array of shape scan_shape + (3,)
        Zone axis family's representative [uvw] (0 0 0 where none).
    in_plane_rotation_deg
        Folded into ``[0, period)`` of the zone pattern's rotational symmetry,
        so that one grain has one value.
    in_plane_rotation_deg, score, bright_field, dark_field, centre_x_px, centre_y_px : float arrays
        NaN where unknown.
    """

    scan_shape: tuple[int, ...]
    phases: tuple[str, ...]
    orientations: tuple[str, ...]
    ok: np.ndarray = field(repr=False)
    phase_index: np.ndarray = field(repr=False)
    zone_uvw: np.ndarray = field(repr=False)
    orientation_index: np.ndarray = field(repr=False)
    in_plane_rotation_deg: np.ndarray = field(repr=False)
    score: np.ndarray = field(repr=False)
    n_spots: np.ndarray = field(repr=False)
    bright_field: np.ndarray = field(repr=False)
    dark_field: np.ndarray = field(repr=False)
    centre_x_px: np.ndarray = field(repr=False)
    centre_y_px: np.ndarray = field(repr=False)

    def to_dict(self) -> dict:
        """A short JSON-ready summary (counts per phase and orientation, no arrays)."""
        counts = {name: int(np.count_nonzero(self.phase_index == k)) for k, name in enumerate(self.phases)}
        orient = {name: int(np.count_nonzero(self.orientation_index == k))
                  for k, name in enumerate(self.orientations)}
        return {"scan_shape": list(self.scan_shape), "n_frames": int(np.prod(self.scan_shape)),
                "n_ok": int(np.count_nonzero(self.ok)), "phase_counts": counts,
                "no_phase": int(np.count_nonzero(self.phase_index < 0)), "orientation_counts": orient}


def calculate_series_maps(results: Sequence, scan_shape, *, phases: Sequence[str] = ()) -> SeriesMaps:
    """Arrange per-frame results on the scan grid.

    Parameters
    ----------
    results : sequence of FrameResult
        One per frame (any order); frames not present stay empty (NaN, -1).
    scan_shape : (n,) or (scan_y, scan_x)
    phases : sequence of str
        Phase names in the order of their codes; phases found in the results
        but not named are appended.

    Returns
    -------
    SeriesMaps
    """
    shape = tuple(int(v) for v in scan_shape)
    if len(shape) not in (1, 2) or min(shape) < 1:
        raise InputError(f"scan_shape must be (n,) or (scan_y, scan_x), got {scan_shape!r}")
    names = list(phases)
    for r in results:
        if r.phase and r.phase not in names:
            names.append(r.phase)
    labels: list[str] = []
    ok = np.zeros(shape, bool)
    ph = np.full(shape, -1, np.int16)
    orient = np.full(shape, -1, np.int32)
    zone = np.zeros(shape + (3,), np.int32)
    nan = lambda: np.full(shape, np.nan)  # noqa: E731
    rot, score, bf, df, cx, cy = nan(), nan(), nan(), nan(), nan(), nan()
    n_spots = np.zeros(shape, np.int32)
    n = int(np.prod(shape))
    for r in results:
        if not 0 <= r.frame < n:
            raise InputError(f"frame {r.frame} is outside a scan of shape {shape}")
        at = np.unravel_index(r.frame, shape)
        ok[at] = r.ok
        n_spots[at] = r.n_spots
        bf[at], df[at], cx[at], cy[at] = r.bright_field, r.dark_field, r.centre_x_px, r.centre_y_px
        if r.phase:
            ph[at] = names.index(r.phase)
            fam = r.zone_family if r.zone_family is not None else r.zone
            zone[at] = fam
            label = f"{r.phase} <{' '.join(str(v) for v in fam)}>"
            if label not in labels:
                labels.append(label)
            orient[at] = labels.index(label)
            period = r.rotation_period_deg if np.isfinite(r.rotation_period_deg) else 360.0
            rot[at], score[at] = float(np.mod(r.in_plane_rotation_deg, period)), r.score
    return SeriesMaps(shape, tuple(names), tuple(labels), ok, ph, zone, orient, rot, score, n_spots, bf, df, cx, cy)


def write_series_maps(maps: SeriesMaps, path: str | os.PathLike, *, attrs: dict | None = None) -> Path:
    """Write the maps as datasets of an HDF5 file (atomically), with the code tables as attributes.

    Layout: ``/maps/<name>`` for every name of :data:`MAP_NAMES`; the root's
    attributes ``scan_shape``, ``phases`` and ``orientations`` (JSON text) and
    any ``attrs`` given.
    """
    import json

    import h5py

    from saedkit.core._atomic import write_with_atomic

    def _write(tmp: str) -> None:
        with h5py.File(tmp, "w") as fh:
            g = fh.create_group("maps")
            for name in MAP_NAMES:
                g.create_dataset(name, data=getattr(maps, name))
            fh.attrs["scan_shape"] = json.dumps(list(maps.scan_shape))
            fh.attrs["phases"] = json.dumps(list(maps.phases))
            fh.attrs["orientations"] = json.dumps(list(maps.orientations))
            for k, v in (attrs or {}).items():
                fh.attrs[k] = v if isinstance(v, (int, float, str)) else json.dumps(v)

    return write_with_atomic(path, _write)


def read_series_maps(path: str | os.PathLike) -> SeriesMaps:
    """Read maps written by :func:`write_series_maps`.

    Raises
    ------
    ImageReadError
        When the file is missing or is not a saedkit maps file.
    """
    import json

    import h5py

    p = Path(path)
    try:
        with h5py.File(p, "r") as fh:
            arrays = {name: np.asarray(fh["maps"][name]) for name in MAP_NAMES}
            shape = tuple(json.loads(fh.attrs["scan_shape"]))
            phases = tuple(json.loads(fh.attrs["phases"]))
            orient = tuple(json.loads(fh.attrs["orientations"]))
    except (OSError, KeyError) as exc:
        raise ImageReadError(f"{p}: not a saedkit series maps file ({' '.join(str(exc).split())})") from exc
    return SeriesMaps(shape, phases, orient, **arrays)
