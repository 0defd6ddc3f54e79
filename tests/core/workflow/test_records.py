"""Session files name their records by stable names; files of saedkit 0.1 still open."""

from __future__ import annotations

import dataclasses
import json
import shutil
from pathlib import Path

import pytest

from saedkit.core.workflow.records import RECORD_TYPES, find_record_type, record_name
from saedkit.core.workflow.session import Session

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures"

# the stable names are part of the session format: never rename or drop one (add new ones here too)
STABLE_NAMES = {
    "Ellipse", "CentreResult", "Spot", "RadialProfile", "RingPeak", "EllipseFit", "RingFit", "Calibration",
    "RingAssignment", "RingIndexing", "SavedCalibration", "EnteredCalibration", "Lattice2D", "IndexedSpot",
    "PredictedSpot", "ZoneCandidate", "MatchResult", "PhaseIdentification", "PhaseScore", "RingMatch",
    "HolzRing", "ZoneTilt", "OrientationRelationship",
}


def test_every_stable_name_is_kept_and_resolves_to_a_dataclass():
    assert STABLE_NAMES <= set(RECORD_TYPES)
    for name in RECORD_TYPES:
        cls = find_record_type(name)
        assert cls is not None and dataclasses.is_dataclass(cls), name
        assert record_name(cls) == name


def test_unknown_and_foreign_names_are_refused():
    assert find_record_type("os.path:join") is None
    assert find_record_type("saedkit.core.nowhere:Spot") is None
    assert find_record_type("NoSuchRecord") is None
    with pytest.raises(TypeError, match="not a registered record type"):
        record_name(dict)


def test_a_session_written_by_0_1_opens_after_the_reshelving(tmp_path):
    # the fixture was saved by saedkit 0.1 (modules named saedkit.core.centre, .spots, .calibration, …)
    for name in ("v0_1_session.saedkit.json", "v0_1_ni_110.tif"):
        shutil.copy(FIXTURES / name, tmp_path / name)
    text = (tmp_path / "v0_1_session.saedkit.json").read_text()
    assert '"__type__": "saedkit.core.centre:CentreResult"' in text
    s = Session.load(tmp_path / "v0_1_session.saedkit.json")
    assert s.centre is not None and len(s.spots) == 3
    assert s.calibration.camera_constant_px_A == pytest.approx(200.0, rel=1e-3)  # simulated with K = 200
    assert s.candidate.phase == "Ni" and sorted(abs(v) for v in s.candidate.zone) == [0, 1, 1]
    # saved again, it names its records by the stable names only
    s.save(tmp_path / "again.saedkit.json")
    record = json.loads((tmp_path / "again.saedkit.json").read_text())
    text = json.dumps(record)
    assert '"__type__"' not in text and '"__record__": "CentreResult"' in text
    again = Session.load(tmp_path / "again.saedkit.json")
    assert again.candidate.zone == s.candidate.zone
