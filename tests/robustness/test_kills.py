"""A process killed at random moments of saving a session, a calibration or a report (issue 14).

Every kill must leave the previous file intact and loadable; the next save removes the temporary file
the killed process left (no stray temporary files). A few kills per kind run in `make test`, 50 each
behind the ``slow`` marker.
"""

from __future__ import annotations

import json
import os
import random
import signal
import time
from pathlib import Path

import numpy as np
import pytest

from saedkit.core.calibration.library import CalibrationLibrary
from saedkit.core.imageio import write_tiff
from saedkit.core.workflow.session import Session
from tests.robustness._helpers import popen_python, saved_record

SESSION_CHILD = """
import sys
import numpy as np
from saedkit.core.detection.centre import manual_centre
from saedkit.core.imageio import read_pattern
from saedkit.core.workflow.session import Session
s = Session(read_pattern(sys.argv[1]))
i = 0
while True:
    s.set_centre(manual_centre(20 + i % 20, 30))
    mask = np.zeros((256, 256), bool); mask[: 1 + i % 200] = True
    s.set_mask(mask)
    s.save(sys.argv[2])
    i += 1
    if i == 1:
        print("ready", flush=True)
"""

LIBRARY_CHILD = """
import sys
from saedkit.core.calibration.library import CalibrationLibrary, SavedCalibration
lib = CalibrationLibrary(sys.argv[2])
i = 0
while True:
    lib.save(SavedCalibration(
        name=f"kill test {i}", instrument="x" * 5000, voltage_kv=200.0, nominal_camera_length_mm=600.0,
        binning=1, pixel_size_um=None, camera_constant_px_A=1500.0 + i, camera_constant_sigma_px_A=0.3,
        ellipticity=0.0, major_axis_deg=0.0, standard="Au", date="2026-01-10T09:00:00Z",
        image_sha256="", software_version="0.1.0"), overwrite=True)
    i += 1
    if i == 1:
        print("ready", flush=True)
"""

REPORT_CHILD = """
import sys
from pathlib import Path
from saedkit.core.imageio import read_pattern
from saedkit.core.workflow.pipeline import analyse_spot_pattern
from saedkit.report import write_report_bundle
analysis = analyse_spot_pattern(read_pattern(sys.argv[1]))
out = Path(sys.argv[2]).parent
i = 0
while True:
    write_report_bundle(analysis, out, stem="rep", formats=("json", "pdf"))
    i += 1
    if i == 1:
        print("ready", flush=True)
"""


@pytest.fixture(scope="module")
def image_path(tmp_path_factory):
    rng = np.random.default_rng(9)
    a = rng.random((256, 256)).astype(np.float32)
    yy, xx = np.mgrid[:256, :256]
    for cx, cy in [(128, 128), (168, 128), (88, 128), (128, 168), (128, 88)]:
        a += 50 * np.exp(-((xx - cx) ** 2 + (yy - cy) ** 2) / 4.0)
    p = tmp_path_factory.mktemp("img") / "k.tif"
    write_tiff(p, a)
    return p


def _check_session(target: Path) -> None:
    assert Session.load(target).centre is not None


def _check_library(target: Path) -> None:
    assert len(CalibrationLibrary(target).list()) >= 1


def _check_report(target: Path) -> None:
    from pypdf import PdfReader

    json.loads(target.read_text())
    assert len(PdfReader(str(target.with_name("rep_report.pdf"))).pages) >= 1


KINDS = {
    "session": (SESSION_CHILD, "s.saedkit.json", _check_session),
    "calibration": (LIBRARY_CHILD, "calibrations.json", _check_library),
    "report": (REPORT_CHILD, "rep.json", _check_report),
}


def _temp_files(folder: Path) -> list[str]:
    return sorted(f.name for f in folder.iterdir() if f.name.endswith(".tmp"))


def _kill_runs(kind: str, n_kills: int, image_path: Path, folder: Path, seed: int) -> None:
    code, name, check = KINDS[kind]
    target = folder / name
    rnd = random.Random(seed)
    for k in range(n_kills):
        proc = popen_python(code.replace("sys.argv[1]", repr(str(image_path))).replace("sys.argv[2]",
                                                                                       repr(str(target))))
        try:
            line = proc.stdout.readline()
            assert line.strip() == "ready", proc.stderr.read()
            time.sleep(rnd.uniform(0.0, 0.4))
        finally:
            proc.send_signal(signal.SIGKILL)
            proc.communicate(timeout=60)
        check(target)  # the file there is a whole, loadable earlier version
    # the next save (here, in this process) removes what the killed writers left behind
    if kind == "calibration":
        CalibrationLibrary(target).save(saved_record("after the kills"))
    elif kind == "session":
        Session.load(target).save(target)
    else:
        from saedkit.core._atomic import write_text_atomic

        write_text_atomic(target, target.read_text())
        write_text_atomic(target.with_name("rep_report.pdf"), "")  # the next write of the PDF
    assert _temp_files(folder) == []


@pytest.mark.parametrize("kind", list(KINDS))
def test_kills_mid_save_leave_the_old_file_intact(kind, image_path, tmp_path):
    _kill_runs(kind, 1 if kind == "report" else 2, image_path, tmp_path, seed=len(kind))


@pytest.mark.slow
@pytest.mark.parametrize("kind", list(KINDS))
def test_fifty_kills_mid_save(kind, image_path, tmp_path):
    _kill_runs(kind, 50, image_path, tmp_path, seed=50)


def test_stale_temp_files_only_of_our_pattern_are_removed(tmp_path):
    from saedkit.core._atomic import STALE_AFTER_S, remove_stale_temp_files, write_text_atomic

    target = tmp_path / "a.json"
    dead_pid = 2 ** 22 + 12345  # above the default pid_max of Linux: never a running process
    mine = tmp_path / f".a.json.{os.getpid()}.abcdefgh.tmp"  # this process: kept unless old
    dead = tmp_path / f".a.json.{dead_pid}.abcdefgh.tmp"
    old = tmp_path / ".a.json.zzzzzzzz.tmp"  # the pattern without a pid, from an older saedkit
    other = tmp_path / ".b.json.12.abcdefgh.tmp"  # another target's
    unrelated = tmp_path / "a.json.tmp"
    for f in (mine, dead, old, other, unrelated):
        f.write_text("x")
    write_text_atomic(target, "{}")
    assert not dead.exists() and mine.exists() and old.exists() and other.exists() and unrelated.exists()
    removed = remove_stale_temp_files(target, now=time.time() + STALE_AFTER_S + 10)
    assert set(removed) == {mine, old} and other.exists() and unrelated.exists()
