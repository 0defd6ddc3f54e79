"""Image readers against hostile files: pipes, memory bombs, odd dtypes, bit depth, pickles (issue 14, found 3, 4, 8)."""

from __future__ import annotations

import os
import pickle
import threading
import tracemalloc

import numpy as np
import pytest
import tifffile

from saedkit.core.errors import ImageReadError, InputError
from saedkit.core.imageio import estimate_read_bytes, find_saturation_value, memory_limit_bytes, read_pattern
from tests.robustness._helpers import run_python


def _pattern(dtype=np.uint16, top=4095, n=64, seed=1):
    """A small image with a few pixels at ``top`` (a saturated spot)."""
    rng = np.random.default_rng(seed)
    a = (rng.random((n, n)) * top * 0.5).astype(dtype)
    a[30:32, 30:32] = top
    return a


def test_named_pipe_is_refused_without_blocking(tmp_path):
    if not hasattr(os, "mkfifo"):
        pytest.skip("no named pipes here")
    fifo = tmp_path / "x.tif"
    os.mkfifo(fifo)
    box = {}

    def read():
        try:
            read_pattern(fifo)
        except ImageReadError as exc:
            box["error"] = str(exc)

    t = threading.Thread(target=read, daemon=True)
    t.start()
    t.join(10)
    if t.is_alive():  # unblock the reader so the thread can end, then fail
        with open(fifo, "wb"):
            pass
        pytest.fail("read_pattern blocked on a named pipe")
    assert "not a regular file" in box["error"] and str(fifo) in box["error"]


def test_compressed_tiff_is_checked_by_its_decompressed_size_before_reading(tmp_path):
    # found 4: a 152 KB zlib TIFF passed the size check and decompressed 1.6 GB
    p = tmp_path / "bomb.tif"
    tifffile.imwrite(p, np.zeros((4096, 4096), np.uint16), compression="zlib")
    assert p.stat().st_size < 200_000
    tracemalloc.start()
    with pytest.raises(ImageReadError, match="too large to read"):
        read_pattern(p, max_bytes=20_000_000)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert peak < 10_000_000


def test_limit_follows_the_process_address_space_limit(tmp_path):
    # found 4: under a 4 GB cap a big image failed with a traceback instead of refusing up front
    p = tmp_path / "giant.tif"
    tifffile.imwrite(p, _pattern(), compression="zlib")
    with tifffile.TiffFile(p, mode="r+b") as tf:  # a header claiming 40000 x 40000 (3.2 GB of uint16)
        tf.pages[0].tags["ImageWidth"].overwrite(40000)
        tf.pages[0].tags["ImageLength"].overwrite(40000)
    code = f"""
import resource, sys
resource.setrlimit(resource.RLIMIT_AS, (3 * 2**30, resource.RLIM_INFINITY))
from saedkit.core.errors import ImageReadError
from saedkit.core.imageio import memory_limit_bytes, read_pattern
assert memory_limit_bytes() < 3 * 2**30
try:
    read_pattern({str(p)!r})
except ImageReadError as exc:
    print("REFUSED", exc)
"""
    res = run_python(code, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "REFUSED" in res.stdout and "too large to read" in res.stdout and "giant.tif" in res.stdout


def test_memory_limit_is_not_half_the_ram():
    limit = memory_limit_bytes()
    with open("/proc/meminfo") as fh:
        info = {line.split(":")[0]: int(line.split()[1]) * 1024 for line in fh}
    assert limit is not None and limit <= info["MemAvailable"]


@pytest.mark.parametrize("dtype,compression", [(np.uint16, "zlib"), (np.float32, None), (np.float64, None)])
def test_estimate_is_above_the_measured_peak(tmp_path, dtype, compression):
    # the estimate the refusal is based on must not be below what a read really takes (tracemalloc)
    a = _pattern(np.uint16, n=512).astype(dtype)
    p = tmp_path / "m.tif"
    tifffile.imwrite(p, a, compression=compression)
    tracemalloc.start()
    read_pattern(p)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert estimate_read_bytes(a.shape, a.nbytes) >= peak


@pytest.mark.parametrize("compression", ["lzw", "zlib", "jpeg"])
def test_lzw_zlib_and_jpeg_tiffs_read(tmp_path, compression):
    # found 8: LZW-compressed TIFFs needed imagecodecs
    a = _pattern(np.uint8, top=255)
    p = tmp_path / f"{compression}.tif"
    tifffile.imwrite(p, a, compression=compression)
    img = read_pattern(p)
    assert img.shape == a.shape
    if compression != "jpeg":  # lossless: the same pixels
        np.testing.assert_array_equal(img.data, a.astype(np.float32))


def test_twelve_bit_data_in_sixteen_bit_containers_saturate_at_4095(tmp_path):
    # 12-bit cameras: 2**12 - 1 = 4095 is the largest count (common practice)
    p = tmp_path / "12bit.tif"
    tifffile.imwrite(p, _pattern(np.uint16, top=4095))
    assert read_pattern(p).saturation_value == 4095.0
    # a 16-bit image whose maximum is not 2**n - 1 keeps the container's maximum
    tifffile.imwrite(p, _pattern(np.uint16, top=3000))
    assert read_pattern(p).saturation_value == 65535.0
    # the user's value wins
    assert read_pattern(p, saturation_value=3000).saturation_value == 3000.0
    with pytest.raises(InputError, match="saturation_value"):
        read_pattern(p, saturation_value=-1)
    # BitsPerSample and MaxSampleValue recorded by the file win over the heuristic
    assert find_saturation_value(_pattern(np.uint16, top=100), bits_per_sample=14) == 2 ** 14 - 1
    assert find_saturation_value(_pattern(np.uint16, top=100), max_sample_value=1023) == 1023
    a = _pattern(np.uint16, top=1000)
    tifffile.imwrite(p, a, extratags=[(281, "H", 1, 1023, False)])  # MaxSampleValue tag
    assert read_pattern(p).saturation_value == 1023.0
    # a single pixel at 4095 is not taken as the saturation level (it must repeat)
    b = _pattern(np.uint16, top=3000)
    b[0, 0] = 4095
    assert find_saturation_value(b) == 65535.0


def _npy(tmp_path, name, array):
    p = tmp_path / name
    np.save(p, array)
    return p


def test_odd_dtypes_are_answered_clearly(tmp_path):
    base = _pattern(np.uint16, top=4000).astype(np.float64)
    with pytest.raises(ImageReadError, match="complex"):
        read_pattern(_npy(tmp_path, "c.npy", base.astype(np.complex64)))
    img = read_pattern(_npy(tmp_path, "b.npy", base > 1000))
    assert img.dtype == "bool" and set(np.unique(img.data)) == {0.0, 1.0}
    img = read_pattern(_npy(tmp_path, "i.npy", base.astype(np.int64)))
    assert img.dtype == "int64" and img.data.max() == 4000.0
    img = read_pattern(_npy(tmp_path, "h.npy", base.astype(np.float16)))
    assert img.dtype == "float16" and img.data.max() == 4000.0
    for bad in (np.array([["a"] * 16] * 16), np.zeros((16, 16), dtype="M8[s]"),
                np.zeros((16, 16), dtype=[("a", "f4"), ("b", "f4")])):
        with pytest.raises(ImageReadError):
            read_pattern(_npy(tmp_path, "bad.npy", bad))


def test_float64_beyond_float32_is_refused_never_infinite(tmp_path):
    # found 8: a float64 pixel of 1e308 became +inf
    a = _pattern(np.uint16).astype(np.float64)
    a[3, 3] = 1e308
    with pytest.raises(ImageReadError, match="beyond the float32 range"):
        read_pattern(_npy(tmp_path, "big.npy", a))
    p = tmp_path / "big.tif"
    tifffile.imwrite(p, a)
    with pytest.raises(ImageReadError, match="beyond the float32 range"):
        read_pattern(p)


class _Evil:
    def __reduce__(self):
        return (open, (os.environ.get("SAEDKIT_TEST_PWNED", "/nonexistent/pwned"), "w"))


def test_npy_with_a_pickle_is_refused_and_nothing_runs(tmp_path, monkeypatch):
    marker = tmp_path / "pwned"
    monkeypatch.setenv("SAEDKIT_TEST_PWNED", str(marker))
    arr = np.empty((16, 16), dtype=object)
    arr[...] = _Evil()
    p = tmp_path / "evil.npy"
    np.save(p, arr, allow_pickle=True)
    with pytest.raises(ImageReadError, match="cannot read NumPy"):
        read_pattern(p)
    assert not marker.exists()
    assert pickle  # the attack needs pickle; the reader must never unpickle
