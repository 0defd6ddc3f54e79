"""Tests of pattern image reading and writing (saedkit.core.imageio)."""

from __future__ import annotations

import hashlib
import json
import re

import imageio.v3 as iio
import mrcfile
import numpy as np
import pytest
import tifffile

from saedkit.core import imageio as sio
from saedkit.core.errors import ImageReadError, InputError
from saedkit.core.imageio import (
    PatternImage,
    calculate_sha256,
    memory_limit_bytes,
    pattern_from_array,
    read_pattern,
    write_tiff,
)

# ITU-R BT.709 luminance weights (the ones scikit-image's rgb2gray uses): common practice.
LUMA = np.array([0.2125, 0.7154, 0.0721])


def _pattern(rng, shape=(48, 64), dtype=np.uint16, top=60000.0):
    """A non-constant test image of the given type."""
    values = rng.random(shape) * top
    if np.dtype(dtype).kind in "ui":
        return np.round(values).astype(dtype)
    return values.astype(dtype)


def _raises_naming(path, match):
    """pytest.raises(ImageReadError) whose message also names ``path``."""
    return pytest.raises(ImageReadError, match=f"^{re.escape(str(path))}: .*{match}")


# --------------------------------------------------------------------------- #
# Round trips
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize(
    "dtype, saturation",
    [
        (np.uint8, 255.0),
        (np.uint16, 65535.0),
        (np.int16, 32767.0),
        (np.uint32, 4294967295.0),
        (np.float32, None),
        (np.float64, None),
    ],
)
def test_tiff_round_trip_each_type(tmp_path, rng, dtype, saturation):
    top = 250.0 if dtype == np.uint8 else 30000.0
    a = _pattern(rng, dtype=dtype, top=top)
    path = tmp_path / "p.tif"
    tifffile.imwrite(path, a)
    img = read_pattern(path)
    assert img.shape == a.shape
    assert img.data.dtype == np.float32
    np.testing.assert_array_equal(img.data, a.astype(np.float32))
    assert img.dtype == np.dtype(dtype).name
    assert img.saturation_value == saturation
    assert img.source_path == str(path)
    assert img.page == 0
    assert img.pixel_size_um is None and img.voltage_kv is None
    assert not img.mask.any()


def test_tiff_multi_page_pick(tmp_path, rng):
    stack = _pattern(rng, shape=(3, 40, 50))
    path = tmp_path / "stack.tif"
    tifffile.imwrite(path, stack, photometric="minisblack")  # three pages
    for page in range(3):
        img = read_pattern(path, page=page)
        np.testing.assert_array_equal(img.data, stack[page])
        assert img.page == page
    with _raises_naming(path, r"page 3 is out of range: the file has 3 pages"):
        read_pattern(path, page=3)
    with _raises_naming(path, r"page -1 is out of range"):
        read_pattern(path, page=-1)


def test_tiff_rgb_becomes_grey(tmp_path, rng):
    rgb = rng.integers(0, 256, size=(40, 50, 3), dtype=np.uint8)
    path = tmp_path / "rgb.tif"
    tifffile.imwrite(path, rgb, photometric="rgb")
    img = read_pattern(path)
    assert img.shape == (40, 50)
    np.testing.assert_allclose(img.data, rgb @ LUMA, rtol=1e-5, atol=1e-3)
    assert img.dtype == "uint8"


def test_tiff_planar_rgb_becomes_grey(tmp_path, rng):
    rgb = rng.integers(0, 256, size=(3, 40, 50), dtype=np.uint8)
    path = tmp_path / "planar.tif"
    tifffile.imwrite(path, rgb, photometric="rgb", planarconfig="separate")
    img = read_pattern(path)
    np.testing.assert_allclose(img.data, np.moveaxis(rgb, 0, -1) @ LUMA, rtol=1e-5, atol=1e-3)


def test_grey_stored_as_rgb_keeps_values(tmp_path, rng):
    grey = rng.integers(1, 256, size=(40, 50), dtype=np.uint8)
    path = tmp_path / "grey_rgb.tif"
    tifffile.imwrite(path, np.stack([grey] * 3, axis=-1), photometric="rgb")
    np.testing.assert_allclose(read_pattern(path).data, grey, atol=1e-3)


def test_bigtiff(tmp_path, rng):
    a = _pattern(rng)
    path = tmp_path / "big.tif"
    tifffile.imwrite(path, a, bigtiff=True)
    np.testing.assert_array_equal(read_pattern(path).data, a)


@pytest.mark.parametrize(
    "resolution, unit, expected_um",
    [
        ((1.0e4 / 14.0, 1.0e4 / 14.0), "CENTIMETER", 14.0),  # 714.29 px/cm = 14 µm
        ((25400.0 / 15.0, 25400.0 / 15.0), "INCH", 15.0),  # 1693.3 px/inch = 15 µm
        ((72.0, 72.0), "INCH", None),  # a screen default, not a detector pixel
        ((96.0, 96.0), "INCH", None),
        ((1.0, 1.0), "NONE", None),  # no absolute unit
    ],
)
def test_tiff_pixel_size_from_resolution_tags(tmp_path, rng, resolution, unit, expected_um):
    path = tmp_path / "res.tif"
    tifffile.imwrite(path, _pattern(rng), resolution=resolution, resolutionunit=unit)
    img = read_pattern(path)
    if expected_um is None:
        assert img.pixel_size_um is None
    else:
        # the tags are stored as rationals, good to ~1e-6
        assert img.pixel_size_um == pytest.approx(expected_um, rel=1e-5)


def test_tiff_description_json(tmp_path, rng):
    path = tmp_path / "desc.tif"
    meta = {"saedkit": {"voltage_kv": 200, "pixel_size_um": 15.5, "camera_length_mm": 600.0}}
    tifffile.imwrite(path, _pattern(rng), description=json.dumps(meta), metadata=None)
    img = read_pattern(path)
    assert (img.voltage_kv, img.pixel_size_um, img.camera_length_mm) == (200.0, 15.5, 600.0)


def test_tiff_foreign_description_is_ignored(tmp_path, rng):
    path = tmp_path / "foreign.tif"
    tifffile.imwrite(path, _pattern(rng), description='{"other": {"voltage_kv": 300}}', metadata=None)
    assert read_pattern(path).voltage_kv is None
    tifffile.imwrite(path, _pattern(rng), description="{not json", metadata=None)
    assert read_pattern(path).voltage_kv is None


def test_write_tiff_round_trip(tmp_path, rng):
    a = _pattern(rng, shape=(64, 80))
    path = write_tiff(
        tmp_path / "sub" / "w.tif", a, pixel_size_um=14.0, voltage_kv=200.0, camera_length_mm=800.0
    )
    assert path == tmp_path / "sub" / "w.tif"
    assert sorted(p.name for p in path.parent.iterdir()) == ["w.tif"]  # no temporary left
    img = read_pattern(path)
    np.testing.assert_array_equal(img.data, a)
    assert img.dtype == "uint16"
    assert img.pixel_size_um == 14.0
    assert img.voltage_kv == 200.0
    assert img.camera_length_mm == 800.0
    with tifffile.TiffFile(path) as tf:
        page = tf.pages[0]
        assert page.compression in (tifffile.COMPRESSION.ADOBE_DEFLATE, tifffile.COMPRESSION.DEFLATE)
        assert int(page.tags["ResolutionUnit"].value) == 3  # centimetre
        x_num, x_den = page.tags["XResolution"].value
        assert 1.0e4 / (x_num / x_den) == pytest.approx(14.0, rel=1e-6)
        assert json.loads(page.description)["saedkit"]["voltage_kv"] == 200.0


def test_write_tiff_float_uncompressed_and_unknowns(tmp_path, rng):
    a = _pattern(rng, dtype=np.float32)
    path = write_tiff(tmp_path / "f.tif", a, compress=False)
    img = read_pattern(path)
    np.testing.assert_array_equal(img.data, a)
    assert img.pixel_size_um is None and img.voltage_kv is None and img.camera_length_mm is None
    with tifffile.TiffFile(path) as tf:
        assert tf.pages[0].compression == tifffile.COMPRESSION.NONE


def test_write_tiff_replaces_atomically(tmp_path, rng):
    path = tmp_path / "x.tif"
    write_tiff(path, _pattern(rng))
    b = _pattern(rng)
    write_tiff(path, b)
    np.testing.assert_array_equal(read_pattern(path).data, b)


@pytest.mark.parametrize(
    "array, match",
    [
        (np.ones((2, 8, 8)), "2-D"),
        (np.full((8, 8), np.nan), "NaN"),
        (np.ones((8, 8), np.complex64), "complex"),
    ],
)
def test_write_tiff_rejects_bad_arrays(tmp_path, array, match):
    with pytest.raises(InputError, match=match):
        write_tiff(tmp_path / "bad.tif", array)
    assert not list(tmp_path.iterdir())


def test_write_tiff_rejects_bad_metadata(tmp_path, rng):
    with pytest.raises(InputError, match="pixel_size_um"):
        write_tiff(tmp_path / "bad.tif", _pattern(rng), pixel_size_um=-1.0)


def test_png_grey_8_and_16_bit(tmp_path, rng):
    for dtype in (np.uint8, np.uint16):
        a = _pattern(rng, dtype=dtype, top=250.0 if dtype == np.uint8 else 60000.0)
        path = tmp_path / f"g{np.dtype(dtype).itemsize}.png"
        iio.imwrite(path, a)
        img = read_pattern(path)
        np.testing.assert_array_equal(img.data, a)
        assert img.dtype == np.dtype(dtype).name


def test_png_colour_becomes_grey(tmp_path, rng):
    rgb = rng.integers(0, 256, size=(40, 50, 3), dtype=np.uint8)
    path = tmp_path / "c.png"
    iio.imwrite(path, rgb)
    np.testing.assert_allclose(read_pattern(path).data, rgb @ LUMA, rtol=1e-5, atol=1e-3)


def test_jpeg_grey_and_colour(tmp_path):
    yy, xx = np.indices((64, 64))
    grey = (100 + 80 * np.cos(xx / 9.0) * np.cos(yy / 7.0)).astype(np.uint8)  # smooth: JPEG-friendly
    path = tmp_path / "g.jpg"
    iio.imwrite(path, grey, quality=95)
    img = read_pattern(path)
    assert img.shape == (64, 64) and img.dtype == "uint8"
    assert np.abs(img.data - grey).mean() < 2.0  # lossy
    path = tmp_path / "c.jpeg"
    iio.imwrite(path, np.stack([grey] * 3, axis=-1), quality=95)
    assert np.abs(read_pattern(path).data - grey).mean() < 2.0


def test_type_decided_by_content_not_name(tmp_path, rng):
    a = _pattern(rng, dtype=np.uint8, top=250.0)
    path = tmp_path / "really_a_png.tif"
    iio.imwrite(path, a, extension=".png")
    np.testing.assert_array_equal(read_pattern(path).data, a)


def test_npy(tmp_path, rng):
    for dtype in (np.float32, np.uint16, np.int32):
        a = _pattern(rng, dtype=dtype, top=1000.0)
        path = tmp_path / f"a_{np.dtype(dtype).name}.npy"
        np.save(path, a)
        img = read_pattern(path)
        np.testing.assert_array_equal(img.data, a.astype(np.float32))
        assert img.dtype == np.dtype(dtype).name
    a = np.asfortranarray(_pattern(rng, dtype=np.float64))
    np.save(tmp_path / "f.npy", a)
    np.testing.assert_allclose(read_pattern(tmp_path / "f.npy").data, a, rtol=1e-6)


def test_mrc_image_with_pixel_size(tmp_path, rng):
    a = _pattern(rng, dtype=np.float32)
    path = tmp_path / "one.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(a)
        mrc.voxel_size = 140000.0  # Å = 14 µm
    img = read_pattern(path)
    np.testing.assert_array_equal(img.data, a)
    assert img.pixel_size_um == pytest.approx(14.0)
    assert img.dtype == "float32"


def test_mrc_int16_without_pixel_size(tmp_path, rng):
    a = _pattern(rng, dtype=np.int16, top=3000.0)
    path = tmp_path / "i.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(a)
    img = read_pattern(path)
    np.testing.assert_array_equal(img.data, a)
    assert img.pixel_size_um is None  # voxel size 0: unknown
    assert img.saturation_value == 32767.0


def test_mrc_stack_page_pick(tmp_path, rng):
    stack = _pattern(rng, shape=(4, 32, 40), dtype=np.float32)
    path = tmp_path / "stack.mrcs"
    with mrcfile.new(path) as mrc:
        mrc.set_data(stack)
        mrc.set_image_stack()
        mrc.voxel_size = 155000.0
    img = read_pattern(path, page=2)
    np.testing.assert_array_equal(img.data, stack[2])
    assert img.pixel_size_um == pytest.approx(15.5)
    with _raises_naming(path, r"page 4 is out of range: the file has 4 pages"):
        read_pattern(path, page=4)


def test_sha256_of_file_and_of_array(tmp_path, rng):
    a = _pattern(rng)
    path = tmp_path / "h.tif"
    tifffile.imwrite(path, a)
    expected = hashlib.sha256(path.read_bytes()).hexdigest()
    assert read_pattern(path).sha256 == expected
    assert calculate_sha256(path) == expected
    assert calculate_sha256(path, chunk_bytes=7) == expected
    assert pattern_from_array(a).sha256 == hashlib.sha256(a.tobytes()).hexdigest()
    with _raises_naming(tmp_path / "none.bin", "cannot be read"):
        calculate_sha256(tmp_path / "none.bin")


# --------------------------------------------------------------------------- #
# Errors: one line, naming the file
# --------------------------------------------------------------------------- #


def test_missing_file(tmp_path):
    path = tmp_path / "absent.tif"
    with _raises_naming(path, "file not found"):
        read_pattern(path)


def test_folder(tmp_path):
    with _raises_naming(tmp_path, "is a folder"):
        read_pattern(tmp_path)


def test_empty_file(tmp_path):
    path = tmp_path / "empty.tif"
    path.write_bytes(b"")
    with _raises_naming(path, r"empty \(0 bytes\)"):
        read_pattern(path)


def test_garbage_with_tif_suffix(tmp_path, rng):
    path = tmp_path / "garbage.tif"
    path.write_bytes(rng.integers(0, 256, 5000, dtype=np.uint8).tobytes())
    with _raises_naming(path, "the name says TIFF but the content is not"):
        read_pattern(path)


def test_text_renamed_png(tmp_path):
    path = tmp_path / "notes.png"
    path.write_text("these are my notes, not an image\n")
    with _raises_naming(path, "the name says PNG but the content is not"):
        read_pattern(path)


def test_unknown_suffix_and_content(tmp_path):
    path = tmp_path / "data.xyz"
    path.write_bytes(b"\x00\x01\x02" * 100)
    with _raises_naming(path, "unrecognised file header"):
        read_pattern(path)


def test_mrc_suffix_with_nonsense_header(tmp_path):
    path = tmp_path / "bad.mrc"
    path.write_bytes(b"\xff" * 2048)
    with _raises_naming(path, "the name says MRC"):
        read_pattern(path)


@pytest.mark.parametrize("compression", [None, "zlib"])
def test_truncated_tiff(tmp_path, rng, compression):
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, _pattern(rng, shape=(64, 64)), compression=compression)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with _raises_naming(path, "cannot read TIFF") as info:
        read_pattern(path)
    assert "\n" not in str(info.value)


def test_truncated_png(tmp_path, rng):
    path = tmp_path / "cut.png"
    iio.imwrite(path, _pattern(rng, shape=(64, 64)))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with _raises_naming(path, "cannot read PNG"):
        read_pattern(path)


def test_truncated_npy(tmp_path, rng):
    path = tmp_path / "cut.npy"
    np.save(path, _pattern(rng, shape=(64, 64)))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with _raises_naming(path, "cannot read NumPy file"):
        read_pattern(path)


def test_truncated_mrc(tmp_path, rng):
    path = tmp_path / "cut.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(_pattern(rng, shape=(64, 64), dtype=np.float32))
    data = path.read_bytes()
    path.write_bytes(data[: 1024 + (len(data) - 1024) // 2])
    with _raises_naming(path, "cannot read MRC"):
        read_pattern(path)


def test_npy_3d_names_shape(tmp_path):
    path = tmp_path / "cube.npy"
    np.save(path, np.ones((3, 64, 64), np.float32))
    with _raises_naming(path, re.escape("got an array of shape (3, 64, 64)")):
        read_pattern(path)


def test_npy_with_objects(tmp_path):
    path = tmp_path / "obj.npy"
    np.save(path, np.array([[{"a": 1}] * 8] * 8, dtype=object), allow_pickle=True)
    with _raises_naming(path, "cannot read NumPy file"):
        read_pattern(path)


def test_single_image_has_one_page(tmp_path, rng):
    path = tmp_path / "one.png"
    iio.imwrite(path, _pattern(rng))
    with _raises_naming(path, r"page 1 is out of range: the file has 1 page \(only page 0\)"):
        read_pattern(path, page=1)


def test_page_must_be_an_integer(tmp_path, rng):
    path = tmp_path / "p.npy"
    np.save(path, _pattern(rng))
    with pytest.raises(InputError, match="page must be an integer"):
        read_pattern(path, page=1.5)


@pytest.mark.parametrize("writer", ["tiff", "npy"])
def test_all_zero_has_no_signal(tmp_path, writer):
    zeros = np.zeros((32, 32), np.uint16)
    path = tmp_path / f"zero.{'tif' if writer == 'tiff' else 'npy'}"
    if writer == "tiff":
        tifffile.imwrite(path, zeros)
    else:
        np.save(path, zeros)
    with _raises_naming(path, r"contains no signal \(all pixels equal 0\)"):
        read_pattern(path)


def test_nan_and_inf_pixels_are_counted(tmp_path, rng):
    a = _pattern(rng, dtype=np.float32)
    a[1, 2] = a[5, 6] = a[7, 8] = np.nan
    a[3, 3] = np.inf
    path = tmp_path / "nan.npy"
    np.save(path, a)
    with _raises_naming(path, "contains 3 NaN and 1 infinite pixel"):
        read_pattern(path)
    path = tmp_path / "nan.tif"
    tifffile.imwrite(path, a)
    with _raises_naming(path, "3 NaN"):
        read_pattern(path)


def test_complex_pixels(tmp_path, rng):
    path = tmp_path / "c.npy"
    np.save(path, _pattern(rng, dtype=np.float32).astype(np.complex64))
    with _raises_naming(path, "complex pixel type complex64"):
        read_pattern(path)
    path = tmp_path / "c.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(_pattern(rng, dtype=np.float32).astype(np.complex64))
    with _raises_naming(path, "complex pixel type"):
        read_pattern(path)


@pytest.mark.parametrize("suffix", ["tif", "png", "npy", "mrc"])
def test_too_large_for_memory(tmp_path, rng, suffix, monkeypatch):
    a = _pattern(rng, shape=(64, 64), dtype=np.uint16 if suffix != "mrc" else np.float32)
    path = tmp_path / f"big.{suffix}"
    if suffix == "tif":
        tifffile.imwrite(path, a)
    elif suffix == "png":
        iio.imwrite(path, a)
    elif suffix == "npy":
        np.save(path, a)
    else:
        with mrcfile.new(path) as mrc:
            mrc.set_data(a)
    with _raises_naming(path, "too large to read: needs about .*, limit 1000 bytes"):
        read_pattern(path, max_bytes=1000)
    # the default limit comes from memory_limit_bytes(), which a test can lower
    monkeypatch.setattr(sio, "memory_limit_bytes", lambda: 2048)
    with _raises_naming(path, "too large to read"):
        read_pattern(path)
    monkeypatch.setattr(sio, "memory_limit_bytes", lambda: None)  # unknown: no limit
    assert read_pattern(path).shape == (64, 64)


def test_memory_limit_is_known_and_plausible():
    limit = memory_limit_bytes()
    assert limit is None or limit > 64 * 2**20  # any machine that runs the tests has more


# --------------------------------------------------------------------------- #
# PatternImage
# --------------------------------------------------------------------------- #


def test_pattern_is_read_only_and_copied(rng):
    a = _pattern(rng, dtype=np.float32)
    img = pattern_from_array(a, pixel_size_um=14, voltage_kv=200, camera_length_mm=500)
    with pytest.raises(ValueError):
        img.data[0, 0] = 1.0
    with pytest.raises(ValueError):
        img.mask[0, 0] = True
    a[0, 0] = -5.0  # the caller's array stays theirs
    assert a.flags.writeable and img.data[0, 0] != -5.0
    assert (img.pixel_size_um, img.voltage_kv, img.camera_length_mm) == (14.0, 200.0, 500.0)
    assert img.saturation_value is None  # float image
    assert pattern_from_array(a.astype(np.uint16)).saturation_value == 65535.0


def test_with_mask(rng):
    img = pattern_from_array(_pattern(rng, shape=(10, 20)))
    mask = np.zeros((10, 20), bool)
    mask[:5, :4] = True
    masked = img.with_mask(mask)
    assert masked is not img and not img.mask.any()
    assert masked.masked_fraction == pytest.approx(20 / 200)
    assert masked.data is img.data  # the pixels are shared, not copied
    mask[:] = True  # later edits of the caller's array do not leak in
    assert masked.masked_fraction == pytest.approx(0.1)
    with pytest.raises(ValueError):
        masked.mask[0, 0] = False
    with pytest.raises(InputError, match="boolean"):
        img.with_mask(np.zeros((10, 20), np.uint8))
    with pytest.raises(InputError, match=re.escape("shape (10, 20), got shape (20, 10)")):
        img.with_mask(np.zeros((20, 10), bool))


def test_to_dict_is_the_image_record(rng, tmp_path):
    path = write_tiff(tmp_path / "r.tif", _pattern(rng), pixel_size_um=15.0, voltage_kv=300)
    record = read_pattern(path).to_dict()
    assert record["path"] == str(path)
    assert record["shape"] == [48, 64]
    assert record["dtype"] == "uint16"
    assert record["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert record["pixel_size_um"] == 15.0 and record["voltage_kv"] == 300.0
    assert record["camera_length_mm"] is None
    assert record["masked_fraction"] == 0.0
    assert json.loads(json.dumps(record)) == record


def test_repr_is_short(rng):
    text = repr(pattern_from_array(_pattern(rng, shape=(300, 300)), voltage_kv=200))
    assert text.startswith("PatternImage(shape=(300, 300)") and "voltage_kv=200" in text
    assert len(text) < 200


@pytest.mark.parametrize(
    "array, match",
    [
        (np.ones((3, 16, 16)), re.escape("shape (3, 16, 16)")),
        (np.zeros((16, 16)), "no signal"),
        (np.ones((16, 16), np.complex128), "complex"),
        (np.array([["a"] * 16] * 16), "pixel type"),
        (np.arange(16.0).reshape(4, 4), "too small"),
    ],
)
def test_pattern_from_array_checks(array, match):
    with pytest.raises(InputError, match=match):
        pattern_from_array(array)


def test_pattern_from_array_nan(rng):
    a = _pattern(rng, dtype=np.float64)
    a[0, :5] = np.nan
    with pytest.raises(InputError, match="5 NaN"):
        pattern_from_array(a)


def test_pattern_from_array_mask_and_metadata_checks(rng):
    a = _pattern(rng, shape=(16, 16))
    with pytest.raises(InputError, match="mask"):
        pattern_from_array(a, mask=np.zeros((8, 8), bool))
    with pytest.raises(InputError, match="voltage_kv"):
        pattern_from_array(a, voltage_kv=0)
    assert pattern_from_array(a, mask=np.ones((16, 16), bool)).masked_fraction == 1.0


def test_direct_construction_fills_defaults(rng):
    a = _pattern(rng, shape=(16, 16))
    img = PatternImage(a)
    assert img.dtype == "uint16"
    assert img.sha256 == hashlib.sha256(a.tobytes()).hexdigest()
    assert img.data.dtype == np.float32 and not img.data.flags.writeable


def test_old_mrc_without_map_stamp(tmp_path, rng):
    """Files from before MRC2014 may lack the "MAP " stamp and machine stamp."""
    a = _pattern(rng, dtype=np.float32)
    path = tmp_path / "old.mrc"
    with mrcfile.new(path) as mrc:
        mrc.set_data(a)
    raw = bytearray(path.read_bytes())
    raw[208:216] = b"\x00" * 8  # map stamp and machine stamp
    path.write_bytes(bytes(raw))
    np.testing.assert_array_equal(read_pattern(path).data, a)
