"""The calibration library under attack: concurrent saves, damaged files, hostile names (issue 14, found 1, 6, 8)."""

from __future__ import annotations

import json

import pytest

from saedkit.core.calibration.library import LIBRARY_FORMAT, CalibrationLibrary, resolve_calibration
from saedkit.core.errors import InputError, LibraryError, SaedkitError
from tests.robustness._helpers import popen_python, saved_record

_SAVER = """
import sys
from saedkit.core.calibration.library import CalibrationLibrary, SavedCalibration
lib = CalibrationLibrary(sys.argv[1] if len(sys.argv) > 1 else {path!r})
for i in range(20):
    lib.save(SavedCalibration(
        name=f"proc {worker} save {{i}}", instrument="", voltage_kv=200.0, nominal_camera_length_mm=600.0,
        binning=1, pixel_size_um=None, camera_constant_px_A=1500.0 + i, camera_constant_sigma_px_A=0.3,
        ellipticity=0.0, major_axis_deg=0.0, standard="Au", date="2026-01-10T09:00:00Z",
        image_sha256="", software_version="0.1.0"))
"""


def test_four_processes_saving_twenty_each_lose_nothing(tmp_path):
    # found 1: four processes saving at once kept 32 of 100 entries
    path = tmp_path / "lib" / "calibrations.json"
    procs = [popen_python(_SAVER.format(path=str(path), worker=w)) for w in range(4)]
    for p in procs:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
    names = CalibrationLibrary(path).names()
    assert len(names) == 80
    assert set(names) == {f"proc {w} save {i}" for w in range(4) for i in range(20)}


_RECORD = {"name": "x", "voltage_kv": 200, "camera_constant_px_A": 1500, "camera_constant_sigma_px_A": 0.1,
           "ellipticity": 0, "major_axis_deg": 0, "date": "2026-01-10T09:00:00Z"}


def _library_text(**changes) -> str:
    rec = dict(_RECORD, **changes)
    return json.dumps({"format": LIBRARY_FORMAT, "version": 1, "calibrations": [rec]})


DAMAGED = {
    "deep nesting": '{"format": "saedkit-calibrations", "version": 1, "calibrations": ' + "[" * 100_000
                    + "]" * 100_000 + "}",
    "binning NaN": _library_text().replace('"major_axis_deg": 0', '"major_axis_deg": 0, "binning": NaN'),
    "binning 1e999": _library_text().replace('"major_axis_deg": 0', '"major_axis_deg": 0, "binning": 1e999'),
    "5000-digit number": _library_text().replace('"voltage_kv": 200', '"voltage_kv": ' + "9" * 5000),
    "K as text": _library_text(camera_constant_px_A="1500"),
    "record is a number": json.dumps({"format": LIBRARY_FORMAT, "version": 1, "calibrations": [5]}),
    "calibrations is a dict": json.dumps({"format": LIBRARY_FORMAT, "version": 1, "calibrations": {"a": 1}}),
    "version as text": json.dumps({"format": LIBRARY_FORMAT, "version": "1", "calibrations": []}),
    "date far out": _library_text(date="9999-12-31T23:59:59-23:59"),
    "binning huge float": _library_text(binning=1e300),
    "name is a list": _library_text(name=["a"]),
    "control characters in a name": _library_text(name="ok\n  fake line\x1b[31m"),
    "top level is a list": "[1, 2, 3]",
    "not UTF-8": None,
}


@pytest.mark.parametrize("kind", list(DAMAGED))
def test_damaged_library_is_reported_then_moved_aside_and_saving_works(tmp_path, kind):
    # found 6: tracebacks from list, calibrate --save and recover; never moved aside
    lib = CalibrationLibrary(tmp_path / "calibrations.json")
    if DAMAGED[kind] is None:
        lib.path.write_bytes(b'{"format": "saedkit-calibrations", "name": "\xff\xfe"}')
    else:
        lib.path.write_text(DAMAGED[kind])
    before = lib.path.read_bytes()
    with pytest.raises(LibraryError) as info:
        lib.list()
    assert str(lib.path) in str(info.value)
    assert "\n" not in str(info.value) and "\x1b" not in str(info.value)
    assert lib.is_broken()
    lib.save(saved_record("fresh"))
    assert lib.set_aside_path is not None and lib.set_aside_path.read_bytes() == before
    assert lib.names() == ["fresh"]
    # recover on a second damaged copy
    lib.path.write_bytes(before)
    moved = lib.recover()
    assert moved is not None and moved.read_bytes() == before and lib.list() == []


@pytest.mark.parametrize("name", ["../../etc/passwd", "a/b", "a\\b", "two\nlines", "bell\x07", "esc\x1b[2J",
                                  "rtl\u202eoverride", "x" * 500])
def test_hostile_calibration_names_are_refused(tmp_path, name):
    with pytest.raises(InputError, match="calibration name"):
        saved_record(name)
    lib = CalibrationLibrary(tmp_path / "calibrations.json")
    lib.save(saved_record("plain"))
    with pytest.raises(LibraryError, match="calibration name"):
        lib.rename("plain", name)
    assert lib.names() == ["plain"]


def test_resolve_calibration_file_with_hostile_json_is_a_library_error(tmp_path):
    p = tmp_path / "one.json"
    for text in ["[" * 50_000 + "]" * 50_000, '{"name": "x", "voltage_kv": NaN}', '{"name": 1e999}',
                 '{"calibration": {"name": "x", "binning": ' + "7" * 5000 + "}}"]:
        p.write_text(text)
        with pytest.raises(SaedkitError, match="one.json"):
            resolve_calibration(p)


def test_cli_list_and_recover_on_a_damaged_library(capsys):
    # found 6 and 8: tracebacks from `calibrations list` and `recover`; control characters printed raw
    from saedkit.cli import main

    lib = CalibrationLibrary()
    lib.path.parent.mkdir(parents=True, exist_ok=True)
    lib.path.write_text(DAMAGED["control characters in a name"])
    assert main(["calibrations", "list"]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "\x1b" not in err and "fake line" in err  # escaped, on one line
    assert main(["calibrations", "recover"]) == 0
    capsys.readouterr()
    assert lib.list() == [] and len(list(lib.path.parent.glob("calibrations.json.broken-*"))) == 1
