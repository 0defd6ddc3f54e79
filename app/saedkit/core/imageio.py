"""Reading and writing diffraction pattern images.

A pattern from a TEM camera is a square image of 1k–4k pixels, stored as 8-,
16- or 32-bit integers or as floats, in a TIFF, MRC, PNG, JPEG or NumPy file.
:func:`read_pattern` turns any of these into a :class:`PatternImage`: a
read-only float32 array with a mask of excluded pixels and whatever the file
says about the pixel size, the accelerating voltage and the camera length.

Every failure to read raises :class:`~saedkit.core.errors.ImageReadError`
with a one-line message that names the file and the problem; no library
traceback reaches the user.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import logging
import math
import os
import stat
import struct
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from saedkit.core._atomic import write_with_atomic
from saedkit.core._validate import check_positive
from saedkit.core.errors import ImageReadError, InputError

__all__ = [
    "PatternImage",
    "calculate_sha256",
    "memory_limit_bytes",
    "estimate_read_bytes",
    "find_saturation_value",
    "pattern_from_array",
    "read_pattern",
    "write_tiff",
]

#: Smallest image accepted, pixels per side.
MIN_SIDE_PX = 8

#: Resolutions (pixels per inch) that image programs write when they know no
#: physical size; they are not a detector pixel size (common practice).
_SCREEN_DPI = (72.0, 96.0)

#: Plausible detector or film-scan pixel sizes, µm (common practice: cameras
#: 5–30 µm, imaging plates and film scans up to a few hundred µm).
_PIXEL_SIZE_RANGE_UM = (0.05, 2000.0)

# Luminance weights of ITU-R BT.709 (the ones scikit-image's rgb2gray uses);
# they sum to 1, so a grey image stored as RGB keeps its values.
_LUMA_709 = np.array([0.2125, 0.7154, 0.0721], dtype=np.float32)

_TIFF_MAGIC = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")  # classic and BigTIFF
_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"
_JPEG_MAGIC = b"\xff\xd8\xff"
_NPY_MAGIC = b"\x93NUMPY"
_MRC_SUFFIXES = (".mrc", ".mrcs", ".map", ".st", ".ali")
_MRC_MODES = (0, 1, 2, 3, 4, 6, 12, 101)
_SUFFIX_KIND = {
    ".tif": "TIFF",
    ".tiff": "TIFF",
    ".png": "PNG",
    ".jpg": "JPEG",
    ".jpeg": "JPEG",
    ".npy": "NPY",
    **{s: "MRC" for s in _MRC_SUFFIXES},
}
_SUPPORTED = "TIFF, MRC, PNG, JPEG or NumPy .npy"


# --------------------------------------------------------------------------- #
# The image object
# --------------------------------------------------------------------------- #


@dataclass(frozen=True, eq=False, repr=False)
class PatternImage:
    """A diffraction pattern: read-only float32 pixels, a mask and metadata.

    Build one with :func:`read_pattern` or :func:`pattern_from_array`; both
    check the pixels (2-D, finite, not constant).

    Parameters
    ----------
    data : (rows, cols) array
        Pixel values. Stored as a read-only float32 array: a copy, unless the
        input already is one (images made from one another share pixels).
    mask : (rows, cols) bool array, optional
        True where a pixel is excluded from measurement (saturated, under the
        beam stop, dead). Default: nothing excluded. Stored as a read-only
        copy.
    source_path : str, optional
        File the pixels came from.
    sha256 : str
        SHA-256 of the file bytes, or of the array bytes when built from an
        array. Computed from ``data`` when left empty.
    dtype : str
        Pixel type of the original data, e.g. ``"uint16"``. Taken from
        ``data`` when left empty.
    pixel_size_um : float, optional
        Detector pixel size, µm, when the file records it.
    voltage_kv : float, optional
        Accelerating voltage, kV, when known.
    camera_length_mm : float, optional
        Nominal camera length, mm, when known.
    page : int
        Page (frame) of a multi-page file that was read.
    saturation_value : float, optional
        Pixel value at which the detector saturates (the type's maximum for
        integer images); None when unknown.

    Examples
    --------
    >>> import numpy as np
    >>> img = pattern_from_array(np.arange(64.0).reshape(8, 8))
    >>> img.shape, img.masked_fraction
    ((8, 8), 0.0)
    """

    data: np.ndarray
    mask: np.ndarray | None = None
    source_path: str | None = None
    sha256: str = ""
    dtype: str = ""
    pixel_size_um: float | None = None
    voltage_kv: float | None = None
    camera_length_mm: float | None = None
    page: int = 0
    saturation_value: float | None = None

    def __post_init__(self) -> None:
        data = self.data
        ready = (
            isinstance(data, np.ndarray)
            and data.dtype == np.float32
            and data.ndim == 2
            and not data.flags.writeable
        )
        if not ready:
            original = np.asarray(data)
            _check_pixels(original, "data", InputError)
            _check_float32_range(original, "data", InputError)
            if not self.dtype:
                object.__setattr__(self, "dtype", str(original.dtype))
            if not self.sha256:
                object.__setattr__(self, "sha256", _array_sha256(original))
            data = np.array(original, dtype=np.float32, copy=True)
            data.flags.writeable = False
            object.__setattr__(self, "data", data)
        if not self.dtype:
            object.__setattr__(self, "dtype", str(data.dtype))
        if not self.sha256:
            object.__setattr__(self, "sha256", _array_sha256(data))

        mask = self.mask
        if mask is None:
            mask = np.zeros(data.shape, dtype=bool)
            mask.flags.writeable = False
        else:
            mask = _checked_mask(mask, data.shape)
        object.__setattr__(self, "mask", mask)
        for name in ("pixel_size_um", "voltage_kv", "camera_length_mm", "saturation_value"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, check_positive(name, value))
        if isinstance(self.page, bool) or not isinstance(self.page, (int, np.integer)) or self.page < 0:
            raise InputError(f"page must be an integer >= 0, got {self.page!r}")
        object.__setattr__(self, "page", int(self.page))
        if self.source_path is not None:
            object.__setattr__(self, "source_path", str(self.source_path))

    # -- derived values ---------------------------------------------------- #

    @property
    def shape(self) -> tuple[int, int]:
        """Image size ``(rows, cols)``."""
        return (int(self.data.shape[0]), int(self.data.shape[1]))

    @property
    def masked_fraction(self) -> float:
        """Fraction of the pixels that the mask excludes (0 to 1)."""
        return float(np.count_nonzero(self.mask)) / self.mask.size

    def with_mask(self, mask: np.ndarray) -> PatternImage:
        """Return a copy of this image with another mask.

        Parameters
        ----------
        mask : (rows, cols) bool array
            True where a pixel is excluded.

        Raises
        ------
        InputError
            If ``mask`` is not a boolean array of the image's shape.
        """
        return dataclasses.replace(self, mask=mask)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready ``image`` record (path, shape, dtype, sha256, metadata)."""
        return {
            "path": self.source_path,
            "shape": list(self.shape),
            "dtype": self.dtype,
            "sha256": self.sha256,
            "page": self.page,
            "pixel_size_um": self.pixel_size_um,
            "voltage_kv": self.voltage_kv,
            "camera_length_mm": self.camera_length_mm,
            "saturation_value": self.saturation_value,
            "masked_fraction": self.masked_fraction,
        }

    def __repr__(self) -> str:
        rows, cols = self.shape
        parts = [
            f"shape=({rows}, {cols})",
            f"dtype={self.dtype!r}",
            f"source_path={self.source_path!r}",
        ]
        if self.page:
            parts.append(f"page={self.page}")
        for name in ("pixel_size_um", "voltage_kv", "camera_length_mm", "saturation_value"):
            value = getattr(self, name)
            if value is not None:
                parts.append(f"{name}={value:g}")
        parts.append(f"masked_fraction={self.masked_fraction:.4f}")
        return f"PatternImage({', '.join(parts)})"


def _checked_mask(mask: Any, shape: tuple[int, ...]) -> np.ndarray:
    """A read-only copy of ``mask``, checked to be bool of ``shape``."""
    arr = np.asarray(mask)
    if arr.dtype != np.bool_:
        raise InputError(f"mask must be a boolean array, got dtype {arr.dtype}")
    if arr.shape != tuple(shape):
        raise InputError(f"mask must have the image shape {tuple(shape)}, got shape {arr.shape}")
    out = arr.copy()
    out.flags.writeable = False
    return out


def _array_sha256(array: np.ndarray) -> str:
    """SHA-256 of an array's bytes in C order."""
    contiguous = np.ascontiguousarray(array)
    return hashlib.sha256(memoryview(contiguous).cast("B")).hexdigest()


def _check_pixels(array: np.ndarray, where: str, error: type[Exception]) -> None:
    """Raise ``error`` naming ``where`` unless ``array`` is a usable 2-D image."""
    kind = array.dtype.kind
    if kind == "c":
        raise error(f"{where}: complex pixel type {array.dtype} is not supported")
    if kind not in "uifb":
        raise error(f"{where}: pixel type {array.dtype} is not supported")
    if array.ndim != 2:
        raise error(f"{where}: expected a 2-D image, got an array of shape {array.shape}")
    if array.shape[0] < MIN_SIDE_PX or array.shape[1] < MIN_SIDE_PX:
        raise error(
            f"{where}: image of shape {array.shape} is too small "
            f"(at least {MIN_SIDE_PX}x{MIN_SIDE_PX} pixels)"
        )
    if kind == "f":
        finite = np.isfinite(array)
        if not finite.all():
            n_nan = int(np.count_nonzero(np.isnan(array)))
            n_inf = int(array.size - np.count_nonzero(finite) - n_nan)
            bad = []
            if n_nan:
                bad.append(f"{n_nan} NaN")
            if n_inf:
                bad.append(f"{n_inf} infinite")
            raise error(
                f"{where}: contains {' and '.join(bad)} pixel(s) out of {array.size}"
            )
    lo, hi = array.min(), array.max()
    if lo == hi:
        raise error(f"{where}: contains no signal (all pixels equal {lo.item()!r})")


def _saturation_for(dtype: np.dtype) -> float | None:
    """The saturation value of an integer pixel type (its maximum), else None."""
    if dtype.kind in "ui":
        return float(np.iinfo(dtype).max)
    return None


# --------------------------------------------------------------------------- #
# Building from an array
# --------------------------------------------------------------------------- #


def pattern_from_array(
    array,
    *,
    source_path: str | os.PathLike | None = None,
    pixel_size_um: float | None = None,
    voltage_kv: float | None = None,
    camera_length_mm: float | None = None,
    mask=None,
) -> PatternImage:
    """Make a :class:`PatternImage` from an array in memory.

    Parameters
    ----------
    array : (rows, cols) array of real numbers
        Pixel values; copied to float32.
    source_path : str or path, optional
        Where the pixels came from, for the record.
    pixel_size_um, voltage_kv, camera_length_mm : float, optional
        Detector pixel size (µm), accelerating voltage (kV), nominal camera
        length (mm).
    mask : (rows, cols) bool array, optional
        True where pixels are excluded.

    Returns
    -------
    PatternImage
        ``sha256`` is the hash of the array's bytes; ``saturation_value`` the
        type's maximum for an integer array.

    Raises
    ------
    InputError
        If the array is not 2-D, is complex, has NaN or infinite pixels, or
        is constant; if a metadata value is not a positive number; if the mask
        does not fit.

    Examples
    --------
    >>> import numpy as np
    >>> img = pattern_from_array(np.eye(16, dtype=np.uint16) * 1000, pixel_size_um=14.0)
    >>> img.dtype, img.saturation_value
    ('uint16', 65535.0)
    """
    arr = np.asarray(array)
    _check_pixels(arr, "array", InputError)
    _check_float32_range(arr, "array", InputError)
    data = np.array(arr, dtype=np.float32, copy=True)
    data.flags.writeable = False
    return PatternImage(
        data=data,
        mask=mask,
        source_path=None if source_path is None else str(source_path),
        sha256=_array_sha256(arr),
        dtype=str(arr.dtype),
        pixel_size_um=pixel_size_um,
        voltage_kv=voltage_kv,
        camera_length_mm=camera_length_mm,
        saturation_value=_saturation_for(arr.dtype),
    )


# --------------------------------------------------------------------------- #
# Memory
# --------------------------------------------------------------------------- #


def _physical_memory_bytes() -> int | None:
    """Installed physical memory, bytes, or None when it cannot be asked."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):
        pass
    if sys.platform == "win32":  # pragma: no cover - exercised on Windows only
        import ctypes

        class _MemoryStatus(ctypes.Structure):
            _fields_ = [
                ("dwLength", ctypes.c_ulong),
                ("dwMemoryLoad", ctypes.c_ulong),
                ("ullTotalPhys", ctypes.c_ulonglong),
                ("ullAvailPhys", ctypes.c_ulonglong),
                ("ullTotalPageFile", ctypes.c_ulonglong),
                ("ullAvailPageFile", ctypes.c_ulonglong),
                ("ullTotalVirtual", ctypes.c_ulonglong),
                ("ullAvailVirtual", ctypes.c_ulonglong),
                ("ullAvailExtendedVirtual", ctypes.c_ulonglong),
            ]

        status = _MemoryStatus()
        status.dwLength = ctypes.sizeof(_MemoryStatus)
        if ctypes.windll.kernel32.GlobalMemoryStatusEx(ctypes.byref(status)):
            return int(status.ullTotalPhys)
    return None


def _available_memory_bytes() -> int | None:
    """Memory the system can give without swapping (``MemAvailable``), bytes, or None."""
    try:
        with open("/proc/meminfo", "rb") as fh:
            for line in fh:
                if line.startswith(b"MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    if sys.platform == "darwin":  # pragma: no cover - macOS has no /proc; physical memory as the bound
        return _physical_memory_bytes()
    return _physical_memory_bytes()


def _address_space_left_bytes() -> int | None:
    """What the process may still map under its ``RLIMIT_AS`` limit, bytes; None when unlimited."""
    try:
        import resource
    except ImportError:  # pragma: no cover - Windows
        return None
    try:
        soft, _hard = resource.getrlimit(resource.RLIMIT_AS)
    except (OSError, ValueError):
        return None
    if soft == resource.RLIM_INFINITY or soft <= 0:
        return None
    used = 0
    try:
        with open("/proc/self/statm", "rb") as fh:
            used = int(fh.read().split()[0]) * int(os.sysconf("SC_PAGE_SIZE"))
    except (OSError, ValueError, IndexError, AttributeError):
        pass
    return max(int(soft) - used, 0)


def memory_limit_bytes() -> int | None:
    """The most memory one image may take while it is read, bytes.

    The smaller of the memory available now (``MemAvailable`` on Linux, the
    physical memory elsewhere) and what the process may still map under its
    address-space limit (``resource.getrlimit(RLIMIT_AS)``); None when
    neither can be asked, in which case no limit is applied.
    """
    bounds = [b for b in (_available_memory_bytes(), _address_space_left_bytes()) if b is not None]
    return min(bounds) if bounds else None


#: Bytes needed per pixel while an image is read, besides the raw page: the float32 copy (4),
#: the finite-value check and the mask (1 + 1), and the decoder's own buffer of the page (raw again).
#: Measured: tests/robustness/test_image_robustness.py checks the estimate is above tracemalloc's peak.
_BYTES_PER_PIXEL_EXTRA = 6
_RAW_COPIES = 2
#: Fixed working memory of a read (decoder tables, metadata), bytes.
_READ_OVERHEAD_BYTES = 16 << 20


def estimate_read_bytes(shape_2d: tuple[int, int], raw_nbytes: int) -> int:
    """Peak memory of reading one image of ``shape_2d`` whose raw page takes ``raw_nbytes``."""
    n_px = int(shape_2d[0]) * int(shape_2d[1])
    return _RAW_COPIES * int(raw_nbytes) + _BYTES_PER_PIXEL_EXTRA * n_px + _READ_OVERHEAD_BYTES


def _check_memory(where: str, shape_2d: tuple[int, int], raw_nbytes: int, max_bytes: int | None) -> None:
    """Raise ImageReadError when reading would need more than the limit."""
    limit = memory_limit_bytes() if max_bytes is None else int(max_bytes)
    if limit is None:
        return
    need = estimate_read_bytes(shape_2d, raw_nbytes)
    if need > limit:
        raise ImageReadError(
            f"{where}: image of {shape_2d[0]}x{shape_2d[1]} pixels is too large to read: "
            f"needs about {_format_bytes(need)}, limit {_format_bytes(limit)} "
            "(the memory available and the process's address-space limit)"
        )


def _format_bytes(n: int) -> str:
    for unit, size in (("GB", 1 << 30), ("MB", 1 << 20), ("kB", 1 << 10)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{n} bytes"


# --------------------------------------------------------------------------- #
# Reading
# --------------------------------------------------------------------------- #


def calculate_sha256(path: str | os.PathLike, *, chunk_bytes: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, read in chunks.

    Parameters
    ----------
    path : str or path
        The file.
    chunk_bytes : int
        Bytes read at a time.

    Returns
    -------
    str
        Hexadecimal digest.

    Raises
    ------
    ImageReadError
        If the file cannot be read.
    """
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for chunk in iter(lambda: fh.read(chunk_bytes), b""):
                digest.update(chunk)
    except OSError as exc:
        raise ImageReadError(f"{path}: cannot be read ({exc.strerror or exc})") from exc
    return digest.hexdigest()


def read_pattern(
    path: str | os.PathLike, *, page: int = 0, max_bytes: int | None = None,
    saturation_value: float | None = None,
    mask_nonfinite: bool = False,
) -> PatternImage:
    """Read a diffraction pattern from an image file.

    Parameters
    ----------
    path : str or path
        A TIFF (8/16/32-bit integer or float, multi-page, grey or RGB), MRC
        (image or stack), PNG, JPEG or NumPy ``.npy`` file. The type is
        decided by the file's first bytes, not only by its name.
    page : int
        Page of a multi-page TIFF or frame of an MRC stack (from 0).
    max_bytes : int, optional
        Most memory the image may take while read; default
        :func:`memory_limit_bytes`. Checked from the header before the pixels
        are read (for a compressed TIFF, the decompressed size).
    saturation_value : float, optional
        The detector's saturation level, when the user knows it; by default
        :func:`find_saturation_value` (the data's real bit depth).
    mask_nonfinite : bool
        Open an image with NaN or infinite pixels (up to half of them): they
        are set to the median of the others and excluded by the returned
        image's ``mask``. Default False: such an image is refused.

    Returns
    -------
    PatternImage
        Float32 pixels (colour turned to grey with the BT.709 luminance
        weights), no mask, and the metadata the file holds.

    Raises
    ------
    ImageReadError
        If the file is missing, a folder, a device or pipe, empty, of an
        unknown type, corrupt or truncated, too large for memory; if the page
        does not exist; if the pixels are not 2-D, complex, contain NaN or
        infinite values or values beyond the float32 range, or are all equal.
        The message names the file. Bool pixels become 0/1, int64 and
        float16 are converted to float32.
    InputError
        If ``page`` is not an integer.

    Notes
    -----
    Metadata read:

    - TIFF: the pixel size from XResolution with ResolutionUnit centimetre
      or inch (µm per pixel = 10⁴ / pixels-per-cm or 25400 / pixels-per-inch);
      72 and 96 pixels per inch, which image programs write when they know
      no size, are ignored, as are sizes outside 0.05–2000 µm. An
      ImageDescription holding a JSON object with a ``"saedkit"`` key (as
      :func:`write_tiff` writes) gives ``voltage_kv``, ``pixel_size_um`` and
      ``camera_length_mm``; it wins over the resolution tags.
    - MRC: the pixel size from the voxel size (Å → µm), as recorded. Rows
      are taken in file order (no flip).
    - PNG, JPEG, NPY: none.

    Examples
    --------
    >>> img = read_pattern("pattern.tif")  # doctest: +SKIP
    >>> img.shape, img.pixel_size_um  # doctest: +SKIP
    ((2048, 2048), 14.0)
    """
    if isinstance(page, bool) or not isinstance(page, (int, np.integer)):
        raise InputError(f"page must be an integer, got {page!r}")
    page = int(page)
    p = Path(path)
    where = str(p)
    try:
        if not p.exists():
            raise ImageReadError(f"{where}: file not found")
        if p.is_dir():
            raise ImageReadError(f"{where}: is a folder, not an image file")
        st = p.stat()
        if not stat.S_ISREG(st.st_mode):
            # a named pipe would block the open, a device never ends: never open them
            raise ImageReadError(f"{where}: not a regular file (a pipe, device or socket), not an image file")
        size = st.st_size
        with open(p, "rb") as fh:
            head = fh.read(1024)
    except OSError as exc:
        raise ImageReadError(f"{where}: cannot be opened ({exc.strerror or exc})") from exc
    if size == 0:
        raise ImageReadError(f"{where}: file is empty (0 bytes)")

    kind = _sniff(head, p.suffix.lower(), size)
    if kind is None:
        named = _SUFFIX_KIND.get(p.suffix.lower())
        if named:
            raise ImageReadError(
                f"{where}: the name says {named} but the content is not a {_SUPPORTED} image"
            )
        raise ImageReadError(f"{where}: not a {_SUPPORTED} image (unrecognised file header)")

    reader = {"TIFF": _read_tiff, "PNG": _read_pillow, "JPEG": _read_pillow,
              "NPY": _read_npy, "MRC": _read_mrc}[kind]
    raw, meta = reader(p, where, page, max_bytes, kind)

    if raw.dtype.kind == "c":
        raise ImageReadError(f"{where}: complex pixel type {raw.dtype} is not supported "
                             "(save the magnitude or the real part as a real image)")
    original_dtype = raw.dtype
    if saturation_value is not None:
        saturation_value = check_positive("saturation_value", saturation_value)
    bad = None
    try:
        if meta.pop("colour", False):
            raw = _to_grey(raw)
        raw = _squeeze_leading(raw)
        if raw.dtype == np.bool_:
            raw = raw.view(np.uint8)
        if mask_nonfinite and raw.dtype.kind == "f" and raw.ndim == 2:
            finite = np.isfinite(raw)
            if not finite.all() and finite.sum() >= raw.size / 2:
                bad = ~finite
                raw = np.where(finite, raw, np.median(raw[finite]))
        _check_pixels(raw, where, ImageReadError)
        _check_float32_range(raw, where)
        saturation = saturation_value if saturation_value is not None else find_saturation_value(
            raw, bits_per_sample=meta.get("bits_per_sample"), max_sample_value=meta.get("max_sample_value"))
        data = np.asarray(raw, dtype=np.float32)
        if data is raw or not data.flags.owndata:
            data = data.copy()
    except MemoryError as exc:
        raise ImageReadError(f"{where}: not enough memory to read the image") from exc
    data.flags.writeable = False
    return PatternImage(
        data=data,
        source_path=where,
        sha256=calculate_sha256(p),
        dtype=str(original_dtype),
        pixel_size_um=meta.get("pixel_size_um"),
        voltage_kv=meta.get("voltage_kv"),
        camera_length_mm=meta.get("camera_length_mm"),
        page=page,
        saturation_value=saturation,
        mask=bad,
    )


def _check_float32_range(raw: np.ndarray, where: str, error: type[Exception] = ImageReadError) -> None:
    """Refuse pixels a float32 cannot hold (they would become infinite)."""
    if raw.dtype.kind == "f" and raw.dtype.itemsize > 4:
        biggest = float(np.max(np.abs(raw)))
        if biggest > float(np.finfo(np.float32).max):
            raise error(f"{where}: pixel value {biggest:.3g} is beyond the float32 range "
                                 f"(±{float(np.finfo(np.float32).max):.3g}); rescale the image")


def find_saturation_value(raw: np.ndarray, *, bits_per_sample: int | None = None,
                          max_sample_value: float | None = None) -> float | None:
    """The pixel value at which the detector saturates, from the data's real bit depth.

    Parameters
    ----------
    raw : array
        The pixels as stored (integer or float).
    bits_per_sample : int, optional
        Significant bits the file records (TIFF BitsPerSample).
    max_sample_value : float, optional
        The largest value the file says a sample takes (TIFF MaxSampleValue).

    Returns
    -------
    float or None
        For integer data: ``max_sample_value`` when recorded below the
        type's maximum; else ``2**bits − 1`` when the file records fewer bits
        than the container holds; else ``2**n − 1`` when the image's maximum
        is exactly that (8 ≤ n < container bits) and at least 3 pixels reach
        it (12-bit data in a 16-bit container saturates at 4095); else the
        type's maximum. None for float data.
    """
    dtype = raw.dtype
    if dtype.kind not in "ui":
        return None
    type_max = int(np.iinfo(dtype).max)
    container_bits = dtype.itemsize * 8 - (1 if dtype.kind == "i" else 0)
    if max_sample_value is not None and 0 < max_sample_value < type_max:
        return float(max_sample_value)
    if bits_per_sample is not None and 1 <= int(bits_per_sample) < container_bits:
        return float((1 << int(bits_per_sample)) - 1)
    top = int(raw.max())
    n = top.bit_length()
    if 8 <= n < container_bits and top == (1 << n) - 1 and int(np.count_nonzero(raw == top)) >= 3:
        return float(top)
    return float(type_max)


def _sniff(head: bytes, suffix: str, size: int) -> str | None:
    """The file type from its first bytes (and, for MRC, its name), or None."""
    if head[:4] in _TIFF_MAGIC:
        return "TIFF"
    if head.startswith(_PNG_MAGIC):
        return "PNG"
    if head.startswith(_JPEG_MAGIC):
        return "JPEG"
    if head.startswith(_NPY_MAGIC):
        return "NPY"
    # MRC has no magic at byte 0: accept the usual names, or the "MAP " stamp
    # of MRC2014 at byte 208, with a header whose sizes and mode make sense.
    if (suffix in _MRC_SUFFIXES or head[208:212] == b"MAP ") and _sane_mrc_header(head, size):
        return "MRC"
    return None


def _sane_mrc_header(head: bytes, size: int) -> bool:
    """True when the first 1024 bytes read as an MRC header of either byte order."""
    if len(head) < 1024 or size < 1024:
        return False
    for order in "<>":
        nx, ny, nz, mode = struct.unpack(order + "4i", head[:16])
        if 0 < nx < 1 << 20 and 0 < ny < 1 << 20 and 0 < nz < 1 << 24 and mode in _MRC_MODES:
            return True
    return False


def _page_error(where: str, page: int, n_pages: int) -> ImageReadError:
    noun = "page" if n_pages == 1 else "pages"
    span = "only page 0" if n_pages == 1 else f"pages 0 to {n_pages - 1}"
    return ImageReadError(
        f"{where}: page {page} is out of range: the file has {n_pages} {noun} ({span})"
    )


def _squeeze_leading(raw: np.ndarray) -> np.ndarray:
    """Drop leading axes of length 1, e.g. (1, rows, cols) -> (rows, cols)."""
    while raw.ndim > 2 and raw.shape[0] == 1:
        raw = raw[0]
    return raw


def _to_grey(raw: np.ndarray) -> np.ndarray:
    """Colour samples on the last axis -> one grey value per pixel (float32)."""
    n = raw.shape[-1]
    if n >= 3:
        rgb = raw[..., :3].astype(np.float32)
        return rgb @ _LUMA_709
    return raw[..., 0]  # grey + alpha: keep the grey


def _read_tiff(p: Path, where: str, page: int, max_bytes: int | None, kind: str):
    import tifffile

    meta: dict[str, Any] = {}
    # tifffile reports some damage through the logging module; we report it ourselves, in one line
    log = logging.getLogger("tifffile")
    level = log.level
    log.setLevel(logging.CRITICAL)
    try:
        with tifffile.TiffFile(p) as tf:
            pages = tf.pages
            n_pages = len(pages)
            if n_pages == 0:
                raise ImageReadError(f"{where}: the TIFF holds no image (corrupt or truncated file)")
            if not 0 <= page < n_pages:
                raise _page_error(where, page, n_pages)
            pg = pages[page]
            if isinstance(pg, tifffile.TiffFrame):
                pg = pg.aspage()
            shape, dtype = tuple(pg.shape), np.dtype(pg.dtype)
            axes = pg.axes
            yx = _tiff_yx(shape, axes)
            _check_memory(where, yx, int(np.prod(shape)) * dtype.itemsize, max_bytes)
            raw = pg.asarray()
            photometric = int(pg.photometric)
            colormap = getattr(pg, "colormap", None)
            meta.update(_tiff_pixel_size(pg) or {})
            meta.update(_tiff_bit_depth(pg))
            first = pages[0] if page else pg
            description = getattr(first, "description", "") or ""
            meta.update(_saedkit_description(description))
    except ImageReadError:
        raise
    except MemoryError as exc:
        raise ImageReadError(f"{where}: not enough memory to read the image") from exc
    except Exception as exc:  # a corrupt, truncated or unsupported TIFF
        raise ImageReadError(f"{where}: cannot read TIFF: {_one_line(exc)}") from exc
    finally:
        log.setLevel(level)

    raw = np.asarray(raw)
    if "S" in axes and raw.ndim == len(axes):
        raw = np.moveaxis(raw, axes.index("S"), -1)
        meta["colour"] = True
    elif photometric == 3 and colormap is not None and raw.dtype.kind in "ui":  # palette
        cmap = np.asarray(colormap)
        raw = np.moveaxis(cmap[:, np.clip(raw, 0, cmap.shape[1] - 1)], 0, -1)
        meta["colour"] = True
    return raw, meta


def _tiff_bit_depth(pg) -> dict[str, float]:
    """BitsPerSample and MaxSampleValue of a TIFF page, when recorded."""
    out: dict[str, float] = {}
    try:
        bps = pg.bitspersample
        if isinstance(bps, (tuple, list)):
            bps = bps[0]
        out["bits_per_sample"] = int(bps)
    except (AttributeError, TypeError, ValueError, IndexError):
        pass
    tag = pg.tags.get("MaxSampleValue")
    if tag is not None:
        value = tag.value
        if isinstance(value, (tuple, list)):
            value = value[0] if value else None
        try:
            out["max_sample_value"] = float(value)
        except (TypeError, ValueError):
            pass
    return out


def _tiff_yx(shape: tuple[int, ...], axes: str) -> tuple[int, int]:
    """(rows, cols) of a TIFF page from its shape and axes string."""
    if "Y" in axes and "X" in axes and len(axes) == len(shape):
        return shape[axes.index("Y")], shape[axes.index("X")]
    return (shape[-2], shape[-1]) if len(shape) >= 2 else (1, int(shape[0]) if shape else 1)


def _tiff_pixel_size(pg) -> dict[str, float] | None:
    """Pixel size in µm from the XResolution and ResolutionUnit tags, if usable."""
    tags = pg.tags
    xres_tag = tags.get("XResolution")
    if xres_tag is None:
        return None
    value = xres_tag.value
    try:
        if isinstance(value, tuple):
            ppu = float(value[0]) / float(value[1]) if value[1] else 0.0
        else:
            ppu = float(value)
    except (TypeError, ValueError, IndexError):
        return None
    unit_tag = tags.get("ResolutionUnit")
    unit = int(unit_tag.value) if unit_tag is not None else 2  # TIFF default: inch
    if not math.isfinite(ppu) or ppu <= 0:
        return None
    if unit == 3:  # centimetre
        size_um = 1.0e4 / ppu
    elif unit == 2:  # inch
        if any(abs(ppu - dpi) < 1e-6 for dpi in _SCREEN_DPI):
            return None
        size_um = 25400.0 / ppu
    else:  # no absolute unit
        return None
    lo, hi = _PIXEL_SIZE_RANGE_UM
    if not lo <= size_um <= hi:
        return None
    return {"pixel_size_um": size_um}


def _saedkit_description(description: str) -> dict[str, float]:
    """Voltage, pixel size and camera length from our own JSON description."""
    text = description.strip()
    if not text.startswith("{"):
        return {}
    try:
        doc = json.loads(text)
    except ValueError:
        return {}
    ours = doc.get("saedkit") if isinstance(doc, dict) else None
    if not isinstance(ours, dict):
        return {}
    out = {}
    for key in ("voltage_kv", "pixel_size_um", "camera_length_mm"):
        value = ours.get(key)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            if math.isfinite(value) and value > 0:
                out[key] = float(value)
    return out


def _read_pillow(p: Path, where: str, page: int, max_bytes: int | None, kind: str):
    import imageio.v3 as iio

    if page != 0:
        raise _page_error(where, page, 1)
    try:
        with iio.imopen(p, "r", plugin="pillow") as f:
            props = f.properties(index=0)
            shape, dtype = tuple(props.shape), np.dtype(props.dtype)
            _check_memory(where, shape[:2], int(np.prod(shape)) * dtype.itemsize, max_bytes)
            raw = np.asarray(f.read(index=0))
    except ImageReadError:
        raise
    except MemoryError as exc:
        raise ImageReadError(f"{where}: not enough memory to read the image") from exc
    except Exception as exc:  # corrupt or truncated PNG/JPEG, or one Pillow refuses
        raise ImageReadError(f"{where}: cannot read {kind}: {_one_line(exc)}") from exc
    meta: dict[str, Any] = {}
    if raw.ndim == 3:
        meta["colour"] = True
    return raw, meta


def _read_npy(p: Path, where: str, page: int, max_bytes: int | None, kind: str):
    try:
        arr = np.load(p, mmap_mode="r", allow_pickle=False)
    except Exception as exc:  # bad header, object array, truncated data
        raise ImageReadError(f"{where}: cannot read NumPy file: {_one_line(exc)}") from exc
    try:
        if not isinstance(arr, np.ndarray):
            raise ImageReadError(f"{where}: holds no array")
        if arr.ndim != 2:
            if arr.dtype.kind == "c":
                raise ImageReadError(f"{where}: complex pixel type {arr.dtype} is not supported")
            raise ImageReadError(
                f"{where}: expected a 2-D image, got an array of shape {arr.shape}"
            )
        if page != 0:
            raise _page_error(where, page, 1)
        _check_memory(where, arr.shape, arr.nbytes, max_bytes)
        try:
            raw = np.array(arr)
        except MemoryError as exc:
            raise ImageReadError(f"{where}: not enough memory to read the image") from exc
    finally:
        mm = getattr(arr, "_mmap", None)
        del arr
        if mm is not None:
            try:
                mm.close()
            except (BufferError, ValueError):
                pass
    return raw, {}


def _read_mrc(p: Path, where: str, page: int, max_bytes: int | None, kind: str):
    try:
        return _read_mrc_with(p, where, page, max_bytes, permissive=False)
    except ImageReadError as exc:
        # Files written before MRC2014 often lack the "MAP " stamp or a valid
        # machine stamp; read those permissively (the header was already
        # checked for sane sizes and mode by _sniff).
        cause = str(exc.__cause__ or "")
        if "Map ID" not in cause and "machine stamp" not in cause:
            raise
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return _read_mrc_with(p, where, page, max_bytes, permissive=True)


def _read_mrc_with(p: Path, where: str, page: int, max_bytes: int | None, *, permissive: bool):
    import mrcfile

    meta: dict[str, Any] = {}
    try:
        with mrcfile.mmap(p, mode="r", permissive=permissive) as mrc:
            data = mrc.data
            if data is None:
                raise ImageReadError(f"{where}: cannot read MRC: the data block is missing or short")
            if data.dtype.kind == "c":
                raise ImageReadError(f"{where}: complex pixel type {data.dtype} is not supported")
            if data.ndim == 2:
                if page != 0:
                    raise _page_error(where, page, 1)
                frame = data
            elif data.ndim == 3:
                n_pages = data.shape[0]
                if not 0 <= page < n_pages:
                    raise _page_error(where, page, n_pages)
                frame = data[page]
            else:
                raise ImageReadError(
                    f"{where}: expected a 2-D image or a stack, got shape {data.shape}"
                )
            _check_memory(where, frame.shape, frame.nbytes, max_bytes)
            raw = np.array(frame)
            try:
                vx = float(mrc.voxel_size.x)
            except (TypeError, ValueError, AttributeError):
                vx = 0.0
            size_um = vx * 1.0e-4  # Å -> µm
            if math.isfinite(size_um) and _PIXEL_SIZE_RANGE_UM[0] <= size_um <= _PIXEL_SIZE_RANGE_UM[1]:
                meta["pixel_size_um"] = size_um
    except ImageReadError:
        raise
    except MemoryError as exc:
        raise ImageReadError(f"{where}: not enough memory to read the image") from exc
    except Exception as exc:  # corrupt or truncated MRC
        raise ImageReadError(f"{where}: cannot read MRC: {_one_line(exc)}") from exc
    return raw, meta


def _one_line(exc: BaseException) -> str:
    """An exception as one short line: its message, or its type's name."""
    text = " ".join(str(exc).split())
    if not text:
        text = type(exc).__name__
    return text if len(text) <= 200 else text[:197] + "..."


# --------------------------------------------------------------------------- #
# Writing
# --------------------------------------------------------------------------- #


def write_tiff(
    path: str | os.PathLike,
    array,
    *,
    pixel_size_um: float | None = None,
    voltage_kv: float | None = None,
    camera_length_mm: float | None = None,
    compress: bool = True,
) -> Path:
    """Write a pattern as a TIFF that :func:`read_pattern` reads back fully.

    Parameters
    ----------
    path : str or path
        Target file; written atomically (a temporary file renamed into place).
    array : (rows, cols) array of real numbers
        Pixels; the type is kept (bool is written as uint8).
    pixel_size_um : float, optional
        Detector pixel size, µm; also written as XResolution/YResolution in
        pixels per centimetre.
    voltage_kv, camera_length_mm : float, optional
        Accelerating voltage (kV) and nominal camera length (mm).
    compress : bool
        Deflate (zlib) compression, lossless.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        If the array is not a 2-D real image with finite pixels, or a
        metadata value is not a positive number.

    Notes
    -----
    The ImageDescription holds ``{"saedkit": {"voltage_kv": ...,
    "pixel_size_um": ..., "camera_length_mm": ...}}`` (null when unknown).

    Examples
    --------
    >>> import numpy as np
    >>> write_tiff("out.tif", np.eye(64, dtype=np.uint16), pixel_size_um=14.0)  # doctest: +SKIP
    PosixPath('out.tif')
    """
    import tifffile

    from saedkit import __version__

    arr = np.asarray(array)
    if arr.dtype == np.bool_:
        arr = arr.astype(np.uint8)
    if arr.dtype.kind == "c":
        raise InputError(f"array: complex pixel type {arr.dtype} cannot be written")
    if arr.dtype.kind not in "uif":
        raise InputError(f"array: pixel type {arr.dtype} cannot be written")
    if arr.ndim != 2:
        raise InputError(f"array must be 2-D, got shape {arr.shape}")
    if arr.dtype.kind == "f" and not np.all(np.isfinite(arr)):
        raise InputError("array contains NaN or infinite pixels")
    meta = {
        "voltage_kv": None if voltage_kv is None else check_positive("voltage_kv", voltage_kv),
        "pixel_size_um": None
        if pixel_size_um is None
        else check_positive("pixel_size_um", pixel_size_um),
        "camera_length_mm": None
        if camera_length_mm is None
        else check_positive("camera_length_mm", camera_length_mm),
    }
    description = json.dumps({"saedkit": meta})
    kwargs: dict[str, Any] = {
        "photometric": "minisblack",
        "description": description,
        "metadata": None,
        "software": f"saedkit {__version__}",
        "compression": "zlib" if compress else None,
    }
    if meta["pixel_size_um"] is not None:
        ppcm = 1.0e4 / meta["pixel_size_um"]
        kwargs["resolution"] = (ppcm, ppcm)
        kwargs["resolutionunit"] = "CENTIMETER"
    contiguous = np.ascontiguousarray(arr)

    def _write(tmp: str) -> None:
        tifffile.imwrite(tmp, contiguous, **kwargs)

    return write_with_atomic(path, _write)
