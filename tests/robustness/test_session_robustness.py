"""Session files edited by hand or by an attacker (issue 14, found 4 and 7)."""

from __future__ import annotations

import base64
import json
import time
import tracemalloc
import zlib

import numpy as np
import pytest

from saedkit.core.detection.centre import manual_centre
from saedkit.core.detection.spots import Spot
from saedkit.core.errors import SaedkitError
from saedkit.core.imageio import read_pattern, write_tiff
from saedkit.core.workflow.session import Session, SessionState


@pytest.fixture
def saved(tmp_path):
    """A session with a centre, two spots and a mask, saved beside its 64x64 image; returns (path, record)."""
    rng = np.random.default_rng(3)
    img_path = tmp_path / "p.tif"
    write_tiff(img_path, rng.random((64, 64)).astype(np.float32))
    s = Session(read_pattern(img_path))
    s.set_centre(manual_centre(32, 31))
    s.add_spot(Spot(40.0, 30.0, 0.1, 0.1, 100.0, 8.0, 10.0, 20.0, 5.0, 1.5))
    mask = np.zeros((64, 64), bool)
    mask[:4, :4] = True
    s.set_mask(mask)
    path = s.save(tmp_path / "s.saedkit.json")
    return path, json.loads(path.read_text())


def _write(path, record) -> None:
    path.write_text(json.dumps(record))


def _edit(record: dict, dotted: str, value) -> dict:
    rec = json.loads(json.dumps(record))
    keys = dotted.split(".")
    node = rec
    for k in keys[:-1]:
        node = node[k]
    node[keys[-1]] = value
    return rec


@pytest.mark.parametrize("dotted,value,field", [
    ("format_version", "1", "format_version"),
    ("format_version", 1.5, "format_version"),
    ("image", "p.tif", "image"),
    ("image.page", "0", "image.page"),
    ("image.page", -3, "image.page"),
    ("image.shape", [64, "64"], "image.shape"),
    ("image.path", 5, "image.path"),
    ("image.sha256", ["x"], "image.sha256"),
    ("settings", [1, 2], "settings"),
    ("match", 5, "match"),
    ("calibration", "x", "calibration"),
    ("centre", {"__tuple__": [1, 2]}, "centre"),
    ("spots", 5, "spots"),
    ("spots", [1, 2], "spots"),
    ("phases", [1], "phases"),
    ("chosen_candidate", 4, "chosen_candidate"),
    ("chosen_candidate", "0", "chosen_candidate"),
    ("match_current", "yes", "match_current"),
    ("mask", 5, "mask"),
])
def test_wrongly_typed_fields_are_refused_naming_file_and_field(saved, dotted, value, field):
    # found 7: wrongly typed header fields gave tracebacks; `match: 5` and `calibration: "x"` loaded
    path, record = saved
    _write(path, _edit(record, dotted, value))
    with pytest.raises(SaedkitError) as info:
        Session.load(path)
    msg = str(info.value)
    assert msg.startswith(str(path)), msg
    if field != "mask":
        assert f"'{field}'" in msg, msg
    else:
        assert "mask" in msg


@pytest.mark.parametrize("text", [
    '{"format": "saedkit-session", "x": ' + "[" * 200_000 + "]" * 200_000 + "}",
    '{"format": "saedkit-session", "format_version": ' + "9" * 5000 + "}",
    '{"format": "saedkit-session", "format_version": 1e999}',
    '{"format": "saedkit-session", "format_version": NaN}',
])
def test_deep_nesting_and_huge_numbers_are_refused(saved, text):
    path, record = saved
    path.write_text(text.replace("saedkit-session", record["format"]))
    with pytest.raises(SaedkitError, match="not a saedkit session"):
        Session.load(path)


def test_newer_format_version_is_refused(saved):
    path, record = saved
    _write(path, _edit(record, "format_version", 99))
    with pytest.raises(SaedkitError, match="newer saedkit"):
        Session.load(path)


def test_large_mask_shape_is_refused_without_allocating(saved):
    # found 4: a 34 KB session with a large mask shape asked for 9.3 GiB
    path, record = saved
    _write(path, _edit(record, "mask.shape", [100_000, 100_000]))
    tracemalloc.start()
    with pytest.raises(SaedkitError, match="mask"):
        Session.load(path)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 50e6


def test_zlib_bomb_mask_is_refused_without_unpacking_it(saved):
    path, record = saved
    bomb = base64.b64encode(zlib.compress(b"\xff" * 200_000_000, 9)).decode()  # ~200 kB of text
    rec = _edit(record, "mask.data", bomb)
    _write(path, rec)
    tracemalloc.start()
    with pytest.raises(SaedkitError, match="mask"):
        Session.load(path)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 50e6


def test_array_shape_larger_than_its_values_is_refused(saved):
    path, record = saved
    rec = _edit(record, "centre", {"__ndarray__": [1.0], "dtype": "<f8", "shape": [100_000, 100_000, 100]})
    _write(path, rec)
    with pytest.raises(SaedkitError, match="damaged"):
        Session.load(path)
    rec = _edit(record, "centre", {"__ndarray__": [1.0], "dtype": "|O", "shape": [1]})
    _write(path, rec)
    with pytest.raises(SaedkitError, match="not allowed"):
        Session.load(path)


def test_a_1_4_mb_session_loads_fast_and_small(saved):
    # found 4: a 1.4 MB session loaded after 12.8 s at 2.1 GB
    path, record = saved
    big = [record["spots"]["__tuple__"][0]] * 3000 if isinstance(record["spots"], dict) else record["spots"] * 3000
    rec = _edit(record, "spots", {"__tuple__": big})
    rec["spot_origins"] = ["auto"] * len(big)
    rec["padding"] = ["x" * 100] * 9000
    _write(path, rec)
    assert path.stat().st_size > 1.3e6
    tracemalloc.start()
    t0 = time.perf_counter()
    s = Session.load(path)
    elapsed = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert len(s.spots) == 3000
    print(f"1.4 MB session: {elapsed:.2f} s, peak {peak / 1e6:.0f} MB")
    assert elapsed < 5.0 and peak < 300e6


@pytest.mark.parametrize("target", ["/etc/passwd", "/dev/zero", "/proc/self/environ", "folder", "notes.txt"])
def test_session_pointing_at_a_system_file_or_non_image_is_refused(saved, target):
    path, record = saved
    if target == "folder":
        (path.parent / "folder.tif").mkdir()
        target = str(path.parent / "folder.tif")
    elif target == "notes.txt":
        (path.parent / "notes.txt").write_text("hello")
        target = str(path.parent / "notes.txt")
    (path.parent / "p.tif").unlink()
    rec = _edit(record, "image.path", target)
    rec["image"]["relative_path"] = None
    _write(path, rec)
    with pytest.raises(SaedkitError) as info:
        Session.load(path)
    assert str(path) in str(info.value)


def test_a_session_file_that_is_a_fifo_or_folder_is_refused(tmp_path):
    import os

    d = tmp_path / "d.saedkit.json"
    d.mkdir()
    with pytest.raises(SaedkitError, match="not a regular file"):
        Session.load(d)
    if hasattr(os, "mkfifo"):
        f = tmp_path / "f.saedkit.json"
        os.mkfifo(f)
        with pytest.raises(SaedkitError, match="not a regular file"):
            Session.load(f)


def test_a_good_session_still_round_trips(saved):
    path, record = saved
    s = Session.load(path)
    assert isinstance(s.state, SessionState) and len(s.spots) == 1 and s.centre.x == 32
    assert int(np.count_nonzero(s.mask)) == 16
