"""Mutation fuzzing of the image, CIF and session readers (issue 14).

Sample files are made here (a TIFF with and without compression, PNG, NPY, MRC, a built-in CIF, a session file)
and mutated with a fixed seed: bit flips, byte runs overwritten, truncation, insertion, and header fields (TIFF
dimensions, sample format, bits per sample, strip offsets; MRC sizes and mode; NPY header) set to hostile values.
Every case must either read or raise one of saedkit's own errors; a short run (a time budget of a few seconds per
reader) is in `make test`, the long one behind ``slow``.
"""

from __future__ import annotations

import json
import random
import struct
import time
from pathlib import Path

import mrcfile
import numpy as np
import pytest
import tifffile

from saedkit.core.crystallography.library import find_phase
from saedkit.core.errors import SaedkitError
from saedkit.core.imageio import read_pattern, write_tiff
from saedkit.core.workflow.session import Session

HOSTILE_INTS = [0, 1, 2, 3, 7, 8, 12, 16, 17, 31, 32, 33, 64, 255, 256, 65535, 65536, 2 ** 31 - 1, 2 ** 31,
                2 ** 32 - 1]


def _image(seed=0, n=48):
    rng = np.random.default_rng(seed)
    a = (rng.random((n, n)) * 3000).astype(np.uint16)
    a[20:23, 20:23] = 4095
    return a


def _samples(folder: Path) -> dict[str, bytes]:
    a = _image()
    out = {}
    tifffile.imwrite(folder / "plain.tif", a)
    tifffile.imwrite(folder / "zlib.tif", a, compression="zlib")
    tifffile.imwrite(folder / "lzw.tif", a.astype(np.float32), compression="lzw", tile=(16, 16))
    tifffile.imwrite(folder / "multi.tif", np.stack([a, a[::-1]]))
    import imageio.v3 as iio

    iio.imwrite(folder / "p.png", a)
    iio.imwrite(folder / "p.jpg", (a // 16).astype(np.uint8))
    np.save(folder / "p.npy", a)
    with mrcfile.new(folder / "p.mrc") as mrc:
        mrc.set_data(a.astype(np.float32))
    for f in folder.iterdir():
        out[f.name] = f.read_bytes()
    return out


def _tiff_field_offsets(data: bytes) -> list[tuple[int, str]]:
    """Offsets of the value fields of the first IFD's entries (little-endian classic TIFF)."""
    if data[:4] != b"II*\x00":
        return []
    ifd = struct.unpack_from("<I", data, 4)[0]
    n = struct.unpack_from("<H", data, ifd)[0]
    offs = []
    for i in range(n):
        entry = ifd + 2 + 12 * i
        tag, typ = struct.unpack_from("<HH", data, entry)
        offs.append((entry + 8, "<H" if typ == 3 else "<I"))
        offs.append((entry + 4, "<I"))  # the count
    return offs


def _mutate(data: bytes, rnd: random.Random, name: str) -> tuple[bytes, str]:
    b = bytearray(data)
    how = rnd.choice(["flip", "flip", "run", "truncate", "insert", "field", "field", "header"])
    if how == "flip":
        for _ in range(rnd.randint(1, 8)):
            i = rnd.randrange(len(b))
            b[i] ^= 1 << rnd.randrange(8)
    elif how == "run":
        i = rnd.randrange(len(b))
        b[i:i + rnd.randint(1, 64)] = bytes([rnd.choice([0, 0xFF, rnd.randrange(256)])]) * rnd.randint(1, 64)
    elif how == "truncate":
        b = b[:rnd.randrange(len(b))]
    elif how == "insert":
        i = rnd.randrange(len(b))
        b[i:i] = bytes(rnd.randrange(256) for _ in range(rnd.randint(1, 32)))
    elif how == "field" and name.endswith(".tif") and _tiff_field_offsets(data):
        off, fmt = rnd.choice(_tiff_field_offsets(data))
        value = rnd.choice(HOSTILE_INTS) % (1 << (8 * struct.calcsize(fmt)))
        struct.pack_into(fmt, b, off, value)
    elif how == "field" and name.endswith(".mrc"):
        word = rnd.choice([0, 1, 2, 3, 7, 8, 9, 23])  # nx, ny, nz, mode, mx, my, mz, nsymbt
        struct.pack_into("<i", b, 4 * word, rnd.choice(HOSTILE_INTS + [-1, -(2 ** 31)]) % (1 << 31))
    else:  # the first bytes: the header of every format
        i = rnd.randrange(min(len(b), 256))
        b[i] = rnd.randrange(256)
    return bytes(b), how


def _fuzz(fn, cases, budget_s: float) -> int:
    """Run ``fn(case)`` over cases until the budget is spent; only SaedkitError may escape."""
    t0 = time.monotonic()
    n = 0
    for label, case in cases:
        if time.monotonic() - t0 > budget_s:
            break
        try:
            fn(case)
        except SaedkitError:
            pass
        except Exception as exc:  # anything else is a bug: name the case
            raise AssertionError(f"{label}: {type(exc).__name__}: {exc}") from exc
        n += 1
    return n


def _image_cases(folder: Path, seed: int, count: int):
    samples = _samples(folder)
    rnd = random.Random(seed)
    names = sorted(samples)
    for k in range(count):
        name = rnd.choice(names)
        data, how = _mutate(samples[name], rnd, name)
        p = folder / f"case{k % 4}{Path(name).suffix}"
        p.write_bytes(data)
        yield f"image case {k} ({name}, {how})", p


def _read_image(p: Path) -> None:
    img = read_pattern(p, max_bytes=100_000_000)
    assert np.all(np.isfinite(img.data))


def test_fuzz_image_readers_short(tmp_path):
    n = _fuzz(_read_image, _image_cases(tmp_path, 14, 2000), budget_s=5.0)
    assert n >= 200


@pytest.mark.slow
def test_fuzz_image_readers_long(tmp_path):
    assert _fuzz(_read_image, _image_cases(tmp_path, 1400, 5000), budget_s=600.0) == 5000


def _cif_cases(folder: Path, seed: int, count: int):
    rnd = random.Random(seed)
    from saedkit.core.crystallography import library as phase_library

    sources = [Path(phase_library.__file__).parent / "phases" / f"{n}.cif" for n in ("Ni", "Si", "Au")]
    texts = [s.read_bytes() for s in sources if s.exists()]
    hostile = [b"_cell_length_a 1e999\n", b"_cell_length_a 0.0001\n", b"_cell_length_a 30000\n",
               b"_cell_angle_alpha 179.99\n", b"_space_group_IT_number 999\n", b"loop_\n_symmetry_equiv_pos_as_xyz\n"
               + b"x,y,z\n" * 5000, b"_atom_site_occupancy NaN\n", b"\x00\xff\xfe", b"data_\n" * 1000]
    for k in range(count):
        base = rnd.choice(texts)
        if rnd.random() < 0.3:
            i = rnd.randrange(len(base))
            data = base[:i] + rnd.choice(hostile) + base[i:]
            how = "hostile field"
        else:
            data, how = _mutate(base, rnd, "x.cif")
        p = folder / f"case{k % 4}.cif"
        p.write_bytes(data)
        yield f"CIF case {k} ({how})", p


def _read_cif(p: Path) -> None:
    find_phase(str(p))


def test_fuzz_cif_reader_short(tmp_path):
    assert _fuzz(_read_cif, _cif_cases(tmp_path, 7, 1500), budget_s=4.0) >= 100


@pytest.mark.slow
def test_fuzz_cif_reader_long(tmp_path):
    assert _fuzz(_read_cif, _cif_cases(tmp_path, 700, 4000), budget_s=600.0) == 4000


def _session_sample(folder: Path) -> bytes:
    from saedkit.core.detection.centre import manual_centre
    from saedkit.core.detection.spots import Spot

    img = folder / "img.tif"
    write_tiff(img, _image().astype(np.float32))
    s = Session(read_pattern(img))
    s.set_centre(manual_centre(24, 23))
    s.add_spot(Spot(30.0, 20.0, 0.1, 0.1, 100.0, 8.0, 10.0, 20.0, 5.0, 1.5))
    m = np.zeros((48, 48), bool)
    m[:3] = True
    s.set_mask(m)
    return s.save(folder / "s.saedkit.json").read_bytes()


_JSON_VALUES = [None, True, 0, -1, 1e308, "x", "", [], {}, [1, 2], {"__record__": "nothing"},
                {"__ndarray__": [1], "dtype": "<f8", "shape": [10 ** 6]}, {"__tuple__": 5}, {"__float__": "nan"},
                "/etc/passwd", "../../../../etc/shadow", 10 ** 20]


def _session_cases(folder: Path, seed: int, count: int):
    data = _session_sample(folder)
    record = json.loads(data)
    rnd = random.Random(seed)
    for k in range(count):
        if rnd.random() < 0.5:
            rec = json.loads(data)
            node = rec
            path = []
            while isinstance(node, dict) and node and rnd.random() < 0.7:
                key = rnd.choice(sorted(node))
                path.append(key)
                if not isinstance(node[key], (dict, list)) or rnd.random() < 0.4:
                    node[key] = rnd.choice(_JSON_VALUES)
                    break
                node = node[key] if isinstance(node[key], dict) else node
            text = json.dumps(rec).encode()
            how = "field " + ".".join(path)
        else:
            text, how = _mutate(data, rnd, "x.json")
        p = folder / "case.saedkit.json"
        p.write_bytes(text)
        yield f"session case {k} ({how})", p
    assert record


def _read_session(p: Path) -> None:
    Session.load(p)


def test_fuzz_session_reader_short(tmp_path):
    assert _fuzz(_read_session, _session_cases(tmp_path, 3, 2000), budget_s=4.0) >= 200


@pytest.mark.slow
def test_fuzz_session_reader_long(tmp_path):
    assert _fuzz(_read_session, _session_cases(tmp_path, 300, 5000), budget_s=600.0) == 5000
