"""The calibration library: records, queries, atomic saves and broken files."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from saedkit.core import _atomic
from saedkit.core.calibration.calibrate import Calibration
from saedkit.core.calibration.library import (
    LIBRARY_FORMAT,
    CalibrationLibrary,
    SavedCalibration,
    default_library_path,
    resolve_calibration,
)
from saedkit.core.detection.centre import CentreResult
from saedkit.core.distortion import Ellipse
from saedkit.core.errors import InputError, LibraryError


def _rec(name="cal A", *, kv=200.0, cl=600.0, binning=1, K=1500.0, date="2026-01-10T09:00:00Z", **kw):
    return SavedCalibration(
        name=name, instrument="TEM-1 / 2k camera", voltage_kv=kv, nominal_camera_length_mm=cl, binning=binning,
        pixel_size_um=15.0 * binning, camera_constant_px_A=K, camera_constant_sigma_px_A=K * 2e-4,
        ellipticity=0.012, major_axis_deg=33.0, standard="Au", date=date, image_sha256="ab" * 32,
        software_version="0.1.0", **kw)


def _files(folder: Path) -> list[str]:
    # the lock file of concurrent saves stays beside the library by design (flock on an existing file)
    return sorted(p.name for p in folder.iterdir() if not p.name.endswith(".lock"))


def test_default_path_follows_the_data_dir(tmp_path):
    # the autouse fixture in tests/conftest.py points SAEDKIT_DATA_DIR at tmp_path
    assert default_library_path() == Path(os.environ["SAEDKIT_DATA_DIR"]) / "calibrations.json"
    assert CalibrationLibrary().path == default_library_path()


def test_save_list_get_rename_delete():
    lib = CalibrationLibrary()
    assert lib.list() == []
    a, b = _rec("cal A"), _rec("cal B", K=1510.0)
    lib.save(a)
    lib.save(b)
    assert [c.name for c in lib.list()] == ["cal A", "cal B"]
    assert lib.get("cal B") == b
    assert lib.get("CAL b") == b  # case-insensitive fallback
    with pytest.raises(LibraryError, match="already saved"):
        lib.save(_rec("cal A", K=1.0))
    lib.save(_rec("cal A", K=1499.0), overwrite=True)
    assert lib.get("cal A").camera_constant_px_A == 1499.0
    with pytest.raises(LibraryError, match=r"no saved calibration named 'nope'.*'cal A', 'cal B'"):
        lib.get("nope")
    lib.rename("cal A", "cal A2")
    assert lib.names() == ["cal A2", "cal B"]
    with pytest.raises(LibraryError, match="already saved"):
        lib.rename("cal A2", "cal B")
    assert lib.delete("cal B").name == "cal B"
    assert lib.names() == ["cal A2"]
    with pytest.raises(LibraryError, match="no saved calibration"):
        lib.delete("cal B")
    doc = json.loads(lib.path.read_text())
    assert doc["format"] == LIBRARY_FORMAT and doc["version"] == 1 and len(doc["calibrations"]) == 1


def test_record_round_trip_and_validation():
    a = _rec(notes="after gun alignment")
    assert SavedCalibration.from_dict(json.loads(json.dumps(a.to_dict()))) == a
    assert a.ellipse == Ellipse(0.012, 33.0)
    assert a.camera_constant_rel_sigma == pytest.approx(2e-4)
    # L = K·p/λ, λL = K·p (camera equation; DESIGN.md)
    assert a.lambda_L_mm_A == pytest.approx(1500.0 * 15e-3)
    bad = a.to_dict()
    del bad["camera_constant_px_A"]
    with pytest.raises(LibraryError, match="'camera_constant_px_A' is missing"):
        SavedCalibration.from_dict(bad)
    for field, value, msg in [("voltage_kv", -200, "must be > 0"), ("binning", 1.5, "whole number"),
                              ("date", "yesterday", "ISO 8601"), ("ellipticity", 0.9, "between"),
                              ("camera_constant_sigma_px_A", "x", "must be a number"), ("name", " ", "empty")]:
        rec = {**a.to_dict(), field: value}
        with pytest.raises(LibraryError, match=msg):
            SavedCalibration.from_dict(rec)
    with pytest.raises(InputError, match="binning"):
        _rec(binning=0)


def test_from_calibration():
    cal = Calibration(camera_constant_px_A=1234.5, camera_constant_sigma_px_A=0.4, ellipse=Ellipse(0.02, 100.0),
                      ellipticity_sigma=1e-4, major_axis_sigma_deg=0.3, voltage_kv=300.0, pixel_size_um=14.0,
                      standard="Al", centre=CentreResult(1.0, 2.0, 0.1, 0.1, "rings"), image_sha256="f" * 64,
                      quality="good")
    s = SavedCalibration.from_calibration(cal, name="300 kV CL 1 m", instrument="x", nominal_camera_length_mm=1000,
                                          binning=2)
    assert s.camera_constant_px_A == 1234.5 and s.voltage_kv == 300.0 and s.binning == 2
    assert s.ellipse == Ellipse(0.02, 100.0) and s.standard == "Al" and s.image_sha256 == "f" * 64
    assert s.pixel_size_um == 14.0 and s.quality == "good"
    assert s.date.endswith("Z") and s.datetime.tzinfo is not None
    assert s.software_version


def test_find_best():
    lib = CalibrationLibrary()
    lib.save(_rec("200 600 old", cl=600, date="2025-01-01T00:00:00Z", K=1500))
    lib.save(_rec("200 600 new", cl=600, date="2026-01-01T00:00:00Z", K=1503))
    lib.save(_rec("200 800", cl=800, K=2000))
    lib.save(_rec("200 600 bin2", cl=600, binning=2, K=750, date="2026-06-01T00:00:00Z"))
    lib.save(_rec("300 600", kv=300, cl=600, K=1200))
    lib.save(_rec("200 no CL", cl=None, K=1700, date="2027-01-01T00:00:00Z"))
    assert lib.find_best(voltage_kv=200, nominal_camera_length_mm=610, binning=1).name == "200 600 new"
    assert lib.find_best(voltage_kv=200.5, nominal_camera_length_mm=760, binning=1).name == "200 800"
    assert lib.find_best(voltage_kv=200, nominal_camera_length_mm=600, binning=2).name == "200 600 bin2"
    assert lib.find_best(voltage_kv=300, nominal_camera_length_mm=10).name == "300 600"
    assert lib.find_best(voltage_kv=200).name == "200 no CL"  # no camera length asked: the newest
    assert lib.find_best(voltage_kv=120) is None
    assert lib.find_best(voltage_kv=200, binning=4) is None


def test_history_of_k_drift():
    lib = CalibrationLibrary()
    lib.save(_rec("c", date="2026-03-01T00:00:00Z", K=1506.0))
    lib.save(_rec("a", date="2026-01-01T00:00:00Z", K=1500.0))
    lib.save(_rec("b", date="2026-02-01T00:00:00Z", K=1497.0))
    lib.save(_rec("other CL", cl=800, K=2000.0))
    lib.save(_rec("other kV", kv=120, K=1000.0))
    hist = lib.history(voltage_kv=200, nominal_camera_length_mm=600)
    assert [h.name for h in hist] == ["a", "b", "c"]
    assert [h.relative_change for h in hist] == pytest.approx([0.0, -0.002, 0.004])
    assert hist[1].relative_change_sigma == pytest.approx(0.998 * (2e-4 * 2**0.5), rel=1e-6)
    assert hist[0].to_dict()["camera_constant_px_A"] == 1500.0
    assert lib.history(voltage_kv=200, nominal_camera_length_mm=400) == []


def test_crash_during_save_keeps_old_file_and_leaves_no_temp(monkeypatch):
    lib = CalibrationLibrary()
    lib.save(_rec("kept"))
    before = lib.path.read_bytes()

    def boom(*args, **kwargs):
        raise OSError("disk unplugged")

    # the crash hits after the new content is written to the temporary file, before the rename
    monkeypatch.setattr(_atomic.os, "replace", boom)
    with pytest.raises(LibraryError, match="cannot be written: disk unplugged"):
        lib.save(_rec("new one"))
    monkeypatch.undo()
    assert lib.path.read_bytes() == before
    assert _files(lib.path.parent) == ["calibrations.json"]
    assert lib.names() == ["kept"]

    # and a crash while writing the temporary file itself
    monkeypatch.setattr(_atomic.os, "fsync", boom)
    with pytest.raises(LibraryError):
        lib.save(_rec("new two"))
    monkeypatch.undo()
    assert lib.path.read_bytes() == before
    assert _files(lib.path.parent) == ["calibrations.json"]


@pytest.mark.parametrize("content,problem", [
    ("{not json", "not valid JSON"),
    ('{"format": "something else", "version": 1, "calibrations": []}', "not a saedkit calibration library"),
    ('{"format": "saedkit-calibrations", "version": 99, "calibrations": []}', "version 99"),
    ('{"format": "saedkit-calibrations", "version": 1, "calibrations": [{"name": "x"}]}', "is missing"),
])
def test_broken_file_is_reported_kept_and_set_aside_on_next_save(content, problem):
    lib = CalibrationLibrary()
    lib.path.parent.mkdir(parents=True, exist_ok=True)
    lib.path.write_text(content)
    with pytest.raises(LibraryError, match=problem) as info:
        lib.list()
    assert str(lib.path) in str(info.value)
    with pytest.raises(LibraryError):
        lib.get("x")
    with pytest.raises(LibraryError):
        lib.delete("x")
    with pytest.raises(LibraryError):
        lib.find_best(voltage_kv=200)
    assert lib.path.read_text() == content  # never silently replaced
    assert lib.is_broken()
    lib.save(_rec("fresh"))
    assert lib.set_aside_path is not None and lib.set_aside_path.name.startswith("calibrations.json.broken-")
    assert lib.set_aside_path.read_text() == content
    assert lib.names() == ["fresh"]


def test_recover_moves_broken_file_aside():
    lib = CalibrationLibrary()
    assert lib.recover() is None  # nothing there
    lib.path.parent.mkdir(parents=True, exist_ok=True)
    lib.path.write_text("garbage")
    moved = lib.recover()
    assert moved is not None and moved.read_text() == "garbage"
    assert lib.list() == [] and not lib.is_broken()
    lib.save(_rec("x"))
    assert lib.recover() is None and lib.names() == ["x"]


def test_resolve_calibration_from_name_and_files(tmp_path):
    lib = CalibrationLibrary()
    lib.save(_rec("by name"))
    assert resolve_calibration("by name").name == "by name"
    one = tmp_path / "one.json"
    one.write_text(json.dumps(_rec("single").to_dict()))
    assert resolve_calibration(str(one)).name == "single"
    libfile = tmp_path / "lib1.json"
    CalibrationLibrary(libfile).save(_rec("only"))
    assert resolve_calibration(libfile).name == "only"
    CalibrationLibrary(libfile).save(_rec("second"))
    with pytest.raises(LibraryError, match="holds 2 calibrations"):
        resolve_calibration(libfile)
    with pytest.raises(LibraryError, match="does not exist"):
        resolve_calibration(str(tmp_path / "missing.json"))
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"name": "half"}))
    with pytest.raises(LibraryError, match="is missing"):
        resolve_calibration(bad)
    with pytest.raises(LibraryError, match="no saved calibration named"):
        resolve_calibration("unknown name")
