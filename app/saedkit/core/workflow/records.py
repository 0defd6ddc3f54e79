"""Stable names of the result records that session files store.

A session file names each stored record by a short, stable name (``"Spot"``,
``"CentreResult"``), never by the Python module that defines it, so that
moving code between modules never breaks a saved session or an autosave.
Add a record here when a new type can end up in a session; never rename or
reuse a name (tests/core/workflow/test_records.py holds the list fixed).

Session files of saedkit 0.1 named records as ``"saedkit.core.<module>:<Class>"``;
:func:`find_record_type` reads those through :data:`_LEGACY_MODULES`.
"""

from __future__ import annotations

import dataclasses
import importlib

__all__ = ["RECORD_TYPES", "find_record_type", "record_name"]

#: stable name -> (module, class name); the stable name is what session files store
RECORD_TYPES: dict[str, tuple[str, str]] = {
    "Ellipse": ("saedkit.core.distortion", "Ellipse"),
    "CentreResult": ("saedkit.core.detection.centre", "CentreResult"),
    "Spot": ("saedkit.core.detection.spot_model", "Spot"),
    "RadialProfile": ("saedkit.core.detection.radial_profile", "RadialProfile"),
    "RingPeak": ("saedkit.core.detection.ring_peaks", "RingPeak"),
    "EllipseFit": ("saedkit.core.detection.ellipse_fit", "EllipseFit"),
    "RingFit": ("saedkit.core.detection.rings", "RingFit"),
    "Calibration": ("saedkit.core.calibration.calibrate", "Calibration"),
    "RingAssignment": ("saedkit.core.calibration.calibrate", "RingAssignment"),
    "RingIndexing": ("saedkit.core.calibration.calibrate", "RingIndexing"),
    "SavedCalibration": ("saedkit.core.calibration.library", "SavedCalibration"),
    "EnteredCalibration": ("saedkit.core.calibration.camera", "EnteredCalibration"),
    "Lattice2D": ("saedkit.core.indexing.matching_types", "Lattice2D"),
    "IndexedSpot": ("saedkit.core.indexing.matching_types", "IndexedSpot"),
    "PredictedSpot": ("saedkit.core.indexing.matching_types", "PredictedSpot"),
    "ZoneCandidate": ("saedkit.core.indexing.matching_types", "ZoneCandidate"),
    "MatchResult": ("saedkit.core.indexing.matching_types", "MatchResult"),
    "HolzRing": ("saedkit.core.indexing.matching_types", "HolzRing"),
    "ZoneTilt": ("saedkit.core.indexing.matching_types", "ZoneTilt"),
    "OrientationRelationship": ("saedkit.core.indexing.matching_types", "OrientationRelationship"),
    "PhaseIdentification": ("saedkit.core.indexing.identify", "PhaseIdentification"),
    "PhaseScore": ("saedkit.core.indexing.identify", "PhaseScore"),
    "RingMatch": ("saedkit.core.indexing.identify", "RingMatch"),
}

#: the modules that held saved records in saedkit 0.1 (before core was split into sub-packages)
_LEGACY_MODULES = frozenset({
    "saedkit.core.distortion", "saedkit.core.centre", "saedkit.core.spots", "saedkit.core.rings",
    "saedkit.core.calibration", "saedkit.core.calibration_library", "saedkit.core.session",
    "saedkit.core.matching_types", "saedkit.core.identify",
})

_NAME_OF: dict[tuple[str, str], str] = {v: k for k, v in RECORD_TYPES.items()}


def record_name(cls: type) -> str:
    """The stable name under which a session file stores records of type ``cls``.

    Raises
    ------
    TypeError
        If ``cls`` is not a registered record type.
    """
    name = _NAME_OF.get((cls.__module__, cls.__qualname__))
    if name is None:
        raise TypeError(f"cannot save a {cls.__module__}.{cls.__qualname__}: it is not a registered record type")
    return name


def find_record_type(name: str) -> type | None:
    """The record type stored under ``name`` (a stable name, or a 0.1 ``module:Class``), or None."""
    name = str(name)
    if ":" in name:  # saedkit 0.1: "saedkit.core.<module>:<Class>"
        module, _, qual = name.partition(":")
        if module not in _LEGACY_MODULES:
            return None
        name = qual
    where = RECORD_TYPES.get(name)
    if where is None:
        return None
    obj = getattr(importlib.import_module(where[0]), where[1], None)
    if not (isinstance(obj, type) and dataclasses.is_dataclass(obj)):
        return None
    return obj
