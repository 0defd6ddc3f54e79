"""Lazy readers of frame series and scans: every format, clear errors, memory set by the block size."""

from __future__ import annotations

import tracemalloc

import h5py
import mrcfile
import numpy as np
import pytest
import tifffile

from saedkit.core.errors import ImageReadError, InputError
from saedkit.core.series import calculate_virtual_images, open_series, split_dataset_path
from saedkit.core.series import reader as reader_module


@pytest.fixture
def stack(rng):
    return rng.integers(0, 4000, (6, 24, 20), dtype=np.uint16)


def test_every_format_gives_the_same_frames(tmp_path, stack):
    # the frames written by general libraries (tifffile, mrcfile, numpy, h5py) come back unchanged
    folder = tmp_path / "frames"
    folder.mkdir()
    for i, f in enumerate(stack):
        tifffile.imwrite(folder / f"f{i:03d}.tif", f)
    tifffile.imwrite(tmp_path / "stack.tif", stack)
    with mrcfile.new(tmp_path / "stack.mrc") as m:
        m.set_data(stack)
    np.save(tmp_path / "stack.npy", stack)
    with h5py.File(tmp_path / "stack.h5", "w") as fh:
        fh.create_dataset("entry/data", data=stack.reshape(2, 3, 24, 20), chunks=(1, 1, 24, 20))
        fh.create_dataset("entry/dark", data=np.zeros((24, 20)))
    sources = [folder, tmp_path / "stack.tif", tmp_path / "stack.mrc", tmp_path / "stack.npy",
               f"{tmp_path / 'stack.h5'}:/entry/data"]
    for src in sources:
        s = open_series(src)
        assert s.frame_shape == (24, 20) and s.n_frames == 6, src
        for a, b in [(0, 6), (1, 4), (4, 5)]:
            np.testing.assert_array_equal(s.read_frames(a, b).astype(np.uint16), stack[a:b], err_msg=str(src))
        np.testing.assert_array_equal(np.asarray(s.to_dask(4).compute()).astype(np.uint16), stack)
    h5 = open_series(f"{tmp_path / 'stack.h5'}:/entry/data")
    assert h5.scan_shape == (2, 3) and h5.scan_index(4) == (1, 1)
    # the only rank-3/4 dataset is found without naming it
    assert open_series(tmp_path / "stack.h5").dataset == "/entry/data"
    # a stack arranged as a scan
    assert open_series(tmp_path / "stack.npy", scan_shape=(3, 2)).scan_index(5) == (2, 1)


def test_four_d_npy_reads_across_scan_rows(tmp_path, rng):
    scan = rng.normal(size=(3, 4, 10, 12)).astype(np.float32)
    np.save(tmp_path / "scan.npy", scan)
    s = open_series(tmp_path / "scan.npy")
    flat = scan.reshape(12, 10, 12)
    np.testing.assert_array_equal(s.read_frames(2, 9), flat[2:9])  # frames of three scan rows


def test_dataset_path_split():
    assert split_dataset_path("a/b.h5:/entry/data") == ("a/b.h5", "/entry/data")
    assert split_dataset_path(r"C:\data\scan.hdf5:/x") == (r"C:\data\scan.hdf5", "/x")
    assert split_dataset_path("C:/frames") == ("C:/frames", None)


def test_errors_name_the_file_and_the_problem(tmp_path, stack):
    with pytest.raises(ImageReadError, match="no such file"):
        open_series(tmp_path / "missing.h5")
    with h5py.File(tmp_path / "s.h5", "w") as fh:
        fh.create_dataset("a", data=stack)
        fh.create_dataset("b", data=stack)
        fh.create_dataset("flat", data=stack[0])
        fh.create_dataset("cplx", data=stack.astype(np.complex64))
    with pytest.raises(ImageReadError, match=r"s\.h5: has no dataset /nothing"):
        open_series(f"{tmp_path / 's.h5'}:/nothing")
    with pytest.raises(InputError, match="name the dataset"):
        open_series(tmp_path / "s.h5")
    with pytest.raises(ImageReadError, match=r"expected a stack .* got an array of shape \(24, 20\)"):
        open_series(f"{tmp_path / 's.h5'}:/flat")
    with pytest.raises(ImageReadError, match="complex pixel type"):
        open_series(f"{tmp_path / 's.h5'}:/cplx")
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}] * 3, dtype=object), allow_pickle=True)
    with pytest.raises(ImageReadError, match=r"obj\.npy: cannot read NumPy file"):  # pickles are never loaded
        open_series(tmp_path / "obj.npy")
    np.save(tmp_path / "five.npy", np.zeros((1, 2, 3, 16, 16)))
    with pytest.raises(ImageReadError, match=r"five\.npy: expected a stack"):
        open_series(tmp_path / "five.npy")
    (tmp_path / "empty").mkdir()
    with pytest.raises(ImageReadError, match="holds no frames"):
        open_series(tmp_path / "empty")
    np.save(tmp_path / "ok.npy", stack)
    with pytest.raises(InputError, match=r"scan shape \(4, 2\) does not fit .* holds 6 frames"):
        open_series(tmp_path / "ok.npy", scan_shape=(4, 2))
    with pytest.raises(InputError, match="outside"):
        open_series(tmp_path / "ok.npy").read_frames(5, 7)


def test_dask_array_reads_only_the_blocks_computed(tmp_path, stack, monkeypatch):
    np.save(tmp_path / "s.npy", stack)
    s = open_series(tmp_path / "s.npy")
    calls = []
    real = reader_module._READERS["npy"]
    monkeypatch.setitem(reader_module._READERS, "npy", lambda ser, a, b: calls.append((a, b)) or real(ser, a, b))
    arr = s.to_dask(2)
    assert calls == [] and arr.chunks[0] == (2, 2, 2)
    np.testing.assert_array_equal(arr[3].compute(), stack[3])
    assert calls == [(2, 4)]


def test_virtual_images_of_a_scan_larger_than_the_memory_budget(tmp_path):
    # a 16 x 16 scan of 128 px float32 frames (16.8 MB) streamed with a 4 MB budget
    ny, nx, k = 16, 16, 128
    path = tmp_path / "big.h5"
    rng = np.random.default_rng(3)
    bf_direct = np.zeros((ny, nx))
    df_direct = np.zeros((ny, nx))
    yy, xx = np.indices((k, k))
    r = np.hypot(xx - 60.3, yy - 66.8)  # x = column, y = row
    with h5py.File(path, "w") as fh:
        ds = fh.create_dataset("scan/frames", shape=(ny, nx, k, k), dtype=np.float32, chunks=(1, 4, k, k))
        for iy in range(ny):
            row = rng.random((nx, k, k), dtype=np.float32)
            ds[iy] = row
            # the sums written directly with numpy: a disc r <= 9 and an annulus 20 <= r <= 50
            bf_direct[iy] = row[:, r <= 9].astype(np.float64).sum(axis=1)
            df_direct[iy] = row[:, (r >= 20) & (r <= 50)].astype(np.float64).sum(axis=1)
    s = open_series(f"{path}:/scan/frames")
    nbytes = ny * nx * k * k * 4
    budget = 4 * 1024 ** 2
    assert nbytes >= 4 * budget
    tracemalloc.start()
    try:
        bf, df = calculate_virtual_images(s, centre_xy=(60.3, 66.8), bright_field_radius_px=9,
                                          dark_field_radii_px=(20, 50), frames_per_chunk=8)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < budget, f"peak {peak / 1e6:.1f} MB for a {nbytes / 1e6:.1f} MB scan"
    np.testing.assert_allclose(bf, bf_direct, rtol=1e-9)
    np.testing.assert_allclose(df, df_direct, rtol=1e-9)


def test_single_images_and_declared_types(tmp_path, stack):
    with mrcfile.new(tmp_path / "one.mrc") as m:
        m.set_data(stack[0])
    one = open_series(tmp_path / "one.mrc")
    assert one.n_frames == 1
    np.testing.assert_array_equal(one.read_frame(0), stack[0])
    folder = tmp_path / "frames"
    folder.mkdir()
    for i, f in enumerate(stack[:3]):
        tifffile.imwrite(folder / f"f{i}.tif", f)
    s = open_series(folder)
    block = s.to_dask(2).compute()
    assert s.dtype == "uint16" and block.dtype == np.uint16  # the dask array holds what it declares
    np.testing.assert_array_equal(block, stack[:3])
