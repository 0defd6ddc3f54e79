"""Frame series and 4-D scans, read lazily frame block by frame block.

A :class:`FrameSeries` describes where the frames are (a folder of images,
a multi-page TIFF, an MRC stack, a NumPy ``.npy`` array, or an HDF5 dataset)
and how they are arranged (a 1-D series of frames, or a 2-D scan of probe
positions, each holding a diffraction pattern of ``(ky, kx)`` pixels). It
holds no pixels: :meth:`FrameSeries.read_frames` opens the file, reads the
frames asked for and closes it again, so a block can be read in any worker
process, and :meth:`FrameSeries.to_dask` wraps the blocks as a lazy
``dask.array`` of shape ``(n_frames, ky, kx)``.

Frames are numbered in scan order (row by row: frame ``i`` of a
``(scan_y, scan_x)`` scan is at ``scan_y = i // scan_x``, ``scan_x = i % scan_x``).
"""

from __future__ import annotations

import logging
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from saedkit.core.errors import ImageReadError, InputError

__all__ = ["FrameSeries", "open_series", "split_dataset_path", "IMAGE_SUFFIXES"]

IMAGE_SUFFIXES = (".tif", ".tiff", ".mrc", ".npy", ".png", ".jpg", ".jpeg")
_HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".nxs", ".emd")
_MRC_SUFFIXES = (".mrc", ".mrcs", ".st", ".ali", ".map")
_KINDS = ("folder", "tiff", "mrc", "npy", "hdf5")


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text or type(exc).__name__


def split_dataset_path(spec: str | os.PathLike) -> tuple[str, str | None]:
    """Split ``"scan.h5:/entry/data"`` into the file and the dataset path.

    Only a colon after an HDF5 suffix separates a dataset path (Windows
    drive letters are left alone).

    Examples
    --------
    >>> split_dataset_path("run7/scan.h5:/entry/data")
    ('run7/scan.h5', '/entry/data')
    >>> split_dataset_path("frames/")
    ('frames/', None)
    """
    text = os.fspath(spec)
    low = text.lower()
    for suffix in _HDF5_SUFFIXES:
        i = low.rfind(suffix + ":")
        if i > 0:
            return text[: i + len(suffix)], text[i + len(suffix) + 1:] or None
    return text, None


def _check_dtype(where: str, dtype: np.dtype) -> np.dtype:
    dtype = np.dtype(dtype)
    if dtype.kind == "c":
        raise ImageReadError(f"{where}: complex pixel type {dtype} is not supported")
    if dtype.kind not in "uifb":
        raise ImageReadError(f"{where}: pixel type {dtype} is not supported (expected integers or floats)")
    return dtype


def _split_shape(where: str, shape: tuple[int, ...]) -> tuple[tuple[int, ...], tuple[int, int]]:
    if len(shape) not in (3, 4):
        raise ImageReadError(
            f"{where}: expected a stack (frames, ky, kx) or a scan (scan_y, scan_x, ky, kx), "
            f"got an array of shape {tuple(shape)}")
    scan, frame = tuple(int(v) for v in shape[:-2]), (int(shape[-2]), int(shape[-1]))
    if min(frame) < 8:
        raise ImageReadError(f"{where}: frames of shape {frame} are too small (at least 8x8 pixels)")
    if min(scan) < 1:
        raise ImageReadError(f"{where}: holds no frames (shape {tuple(shape)})")
    return scan, frame


@dataclass(frozen=True)
class FrameSeries:
    """Where the frames of a series or scan are, and their arrangement (no pixels).

    Parameters
    ----------
    source : str
        The file or folder, as given (with ``:/dataset`` for HDF5).
    kind : {"folder", "tiff", "mrc", "npy", "hdf5"}
    scan_shape : tuple of int
        ``(n,)`` for a series, ``(scan_y, scan_x)`` for a scan.
    frame_shape : (ky, kx)
        Pixels of one frame (rows, cols).
    dtype : str
        Pixel type in the file.
    files : tuple of str
        The frame files of a folder (sorted by name); empty otherwise.
    dataset : str, optional
        Dataset path inside an HDF5 file.
    stored_scan_shape : tuple of int
        The arrangement in the file (before :meth:`with_scan_shape`).
    """

    source: str
    kind: str
    scan_shape: tuple[int, ...]
    frame_shape: tuple[int, int]
    dtype: str
    files: tuple[str, ...] = ()
    dataset: str | None = None
    stored_scan_shape: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        if self.kind not in _KINDS:
            raise InputError(f"kind must be one of {', '.join(_KINDS)}, got {self.kind!r}")
        if not self.stored_scan_shape:
            object.__setattr__(self, "stored_scan_shape", tuple(self.scan_shape))

    # -- shape ------------------------------------------------------------- #

    @property
    def n_frames(self) -> int:
        """Number of frames."""
        return int(np.prod(self.scan_shape))

    @property
    def path(self) -> str:
        """The file or folder (without the HDF5 dataset path)."""
        return split_dataset_path(self.source)[0]

    def scan_index(self, i: int) -> tuple[int, ...]:
        """Scan position of frame ``i``: ``(i,)`` or ``(scan_y, scan_x)``."""
        return tuple(int(v) for v in np.unravel_index(int(i), self.scan_shape))

    def with_scan_shape(self, scan_shape) -> FrameSeries:
        """The same frames arranged as another scan, e.g. a stack of 600 frames as a 20 x 30 scan.

        Raises
        ------
        InputError
            When the new shape does not hold the same number of frames.
        """
        shape = tuple(int(v) for v in scan_shape)
        if len(shape) not in (1, 2) or min(shape) < 1 or int(np.prod(shape)) != self.n_frames:
            raise InputError(f"scan shape {shape} does not fit {self.source}: it holds {self.n_frames} frames "
                             f"(expected (n,) or (scan_y, scan_x) with scan_y * scan_x = {self.n_frames})")
        return FrameSeries(self.source, self.kind, shape, self.frame_shape, self.dtype, self.files, self.dataset,
                           self.stored_scan_shape)

    def to_dict(self) -> dict:
        """JSON-ready description."""
        return {"source": self.source, "kind": self.kind, "scan_shape": list(self.scan_shape),
                "frame_shape": list(self.frame_shape), "dtype": self.dtype, "n_frames": self.n_frames,
                "dataset": self.dataset}

    # -- reading ----------------------------------------------------------- #

    def read_frame(self, i: int) -> np.ndarray:
        """Frame ``i`` as a (ky, kx) array in the file's pixel type."""
        return self.read_frames(i, i + 1)[0]

    def read_frames(self, start: int, stop: int) -> np.ndarray:
        """Frames ``start`` to ``stop - 1`` as an (n, ky, kx) array; only they are read.

        Raises
        ------
        InputError
            When the range is outside the series.
        ImageReadError
            When the file cannot be read.
        """
        n = self.n_frames
        if not (0 <= int(start) < int(stop) <= n):
            raise InputError(f"frames {start}..{stop - 1} are outside {self.source} (frames 0..{n - 1})")
        start, stop = int(start), int(stop)
        try:
            out = _READERS[self.kind](self, start, stop)
        except (ImageReadError, InputError):
            raise
        except MemoryError as exc:
            raise ImageReadError(f"{self.source}: not enough memory to read frames {start}..{stop - 1}") from exc
        except Exception as exc:  # truncated or damaged file
            raise ImageReadError(f"{self.source}: cannot read frames {start}..{stop - 1}: {_one_line(exc)}") from exc
        out = np.asarray(out)
        if out.shape != (stop - start, *self.frame_shape):
            raise ImageReadError(f"{self.source}: frames {start}..{stop - 1} have shape {out.shape[1:]}, "
                                 f"expected {self.frame_shape}")
        return out

    def chunk_bounds(self, frames_per_chunk: int) -> list[tuple[int, int]]:
        """``(start, stop)`` of consecutive blocks of at most ``frames_per_chunk`` frames."""
        if isinstance(frames_per_chunk, bool) or int(frames_per_chunk) < 1:
            raise InputError(f"frames_per_chunk must be an integer >= 1, got {frames_per_chunk!r}")
        step = int(frames_per_chunk)
        return [(a, min(a + step, self.n_frames)) for a in range(0, self.n_frames, step)]

    def to_dask(self, frames_per_chunk: int = 16):
        """The frames as a lazy ``dask.array`` of shape (n_frames, ky, kx), one task per block.

        Nothing is read until a block is computed; each block opens the file
        itself, so the array can be computed on a distributed cluster whose
        workers see the same file system.
        """
        import dask
        import dask.array as da

        dtype = np.dtype(self.dtype)
        blocks = [da.from_delayed(dask.delayed(_read_block, pure=True)(self, a, b),
                                  shape=(b - a, *self.frame_shape), dtype=dtype)
                  for a, b in self.chunk_bounds(frames_per_chunk)]
        return da.concatenate(blocks, axis=0)


def _read_block(series: FrameSeries, start: int, stop: int) -> np.ndarray:
    return series.read_frames(start, stop)


# --------------------------------------------------------------------------- #
# Per-format block readers (flat frame indices, in the stored arrangement)
# --------------------------------------------------------------------------- #


def _rows_of(array_like, stored: tuple[int, ...], start: int, stop: int) -> np.ndarray:
    """Frames start..stop-1 of an array-like of shape stored + (ky, kx), slicing only what is needed."""
    if len(stored) == 1:
        return np.asarray(array_like[start:stop])
    nx = stored[1]
    parts = []
    i = start
    while i < stop:
        iy, ix = divmod(i, nx)
        j = min(stop, (iy + 1) * nx)
        parts.append(np.asarray(array_like[iy, ix:ix + (j - i)]))
        i = j
    return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=0)


def _read_folder(s: FrameSeries, start: int, stop: int) -> np.ndarray:
    from saedkit.core.imageio import read_pattern

    frames = []
    for f in s.files[start:stop]:
        img = read_pattern(f)
        if img.shape != s.frame_shape:
            raise ImageReadError(f"{f}: frame of shape {img.shape} in a series of {s.frame_shape} frames")
        frames.append(np.asarray(img.data))
    # read_pattern gives float32; integer frames go back to their own type (exact below 2**24)
    return np.stack(frames).astype(np.dtype(s.dtype), copy=False)


def _read_tiff(s: FrameSeries, start: int, stop: int) -> np.ndarray:
    import tifffile

    log = logging.getLogger("tifffile")
    level = log.level
    log.setLevel(logging.CRITICAL)
    try:
        with tifffile.TiffFile(s.path) as tf:
            if len(tf.series) == 1 and len(tf.series[0].shape) >= 3 and len(tf.pages) == 1:
                # one page holding a whole volume: read it through a memory map when tifffile can
                arr = tf.series[0].asarray(out="memmap")
                return np.array(arr.reshape(-1, *s.frame_shape)[start:stop])
            return np.stack([tf.pages[i].asarray() for i in range(start, stop)])
    finally:
        log.setLevel(level)


def _read_mrc(s: FrameSeries, start: int, stop: int) -> np.ndarray:
    import mrcfile

    with mrcfile.mmap(s.path, mode="r", permissive=True) as mrc:
        data = mrc.data if mrc.data.ndim == 3 else mrc.data[None]  # a single 2-D image is a series of one
        return np.array(data[start:stop])


def _read_npy(s: FrameSeries, start: int, stop: int) -> np.ndarray:
    arr = np.load(s.path, mmap_mode="r", allow_pickle=False)
    try:
        return np.array(_rows_of(arr, s.stored_scan_shape, start, stop))
    finally:
        mm = getattr(arr, "_mmap", None)
        del arr
        if mm is not None:
            try:
                mm.close()
            except (BufferError, ValueError):
                pass


def _read_hdf5(s: FrameSeries, start: int, stop: int) -> np.ndarray:
    import h5py

    with h5py.File(s.path, "r") as fh:
        return _rows_of(fh[s.dataset], s.stored_scan_shape, start, stop)


_READERS = {"folder": _read_folder, "tiff": _read_tiff, "mrc": _read_mrc, "npy": _read_npy, "hdf5": _read_hdf5}


# --------------------------------------------------------------------------- #
# Opening
# --------------------------------------------------------------------------- #


def _open_folder(p: Path) -> FrameSeries:
    from saedkit.core.imageio import read_pattern

    files = sorted(str(f) for f in p.iterdir() if f.is_file() and f.suffix.lower() in IMAGE_SUFFIXES
                   and not f.name.startswith("."))
    if not files:
        raise ImageReadError(f"{p}: the folder holds no frames (expected {', '.join(IMAGE_SUFFIXES)} files)")
    first = read_pattern(files[0])
    return FrameSeries(str(p), "folder", (len(files),), first.shape, first.dtype, tuple(files))


def _open_tiff(p: Path) -> FrameSeries:
    import tifffile

    log = logging.getLogger("tifffile")
    level = log.level
    log.setLevel(logging.CRITICAL)
    try:
        with tifffile.TiffFile(p) as tf:
            n = len(tf.pages)
            if n == 0:
                raise ImageReadError(f"{p}: the TIFF holds no image (corrupt or truncated file)")
            if n == 1 and len(tf.series) == 1 and len(tf.series[0].shape) >= 3:
                shape, dtype = tuple(tf.series[0].shape), tf.series[0].dtype  # one page holding a volume
            else:
                pg = tf.pages[0]
                shape, dtype = (n, *pg.shape), pg.dtype
                if len(pg.shape) != 2:
                    raise ImageReadError(f"{p}: pages of shape {tuple(pg.shape)} are not grey-level frames")
    except ImageReadError:
        raise
    except Exception as exc:
        raise ImageReadError(f"{p}: cannot read TIFF: {_one_line(exc)}") from exc
    finally:
        log.setLevel(level)
    dtype = _check_dtype(str(p), dtype)
    scan, frame = _split_shape(str(p), shape)
    # TIFF frames are read by their flat page (or plane) number
    return FrameSeries(str(p), "tiff", scan, frame, str(dtype), stored_scan_shape=(int(np.prod(scan)),))


def _open_mrc(p: Path) -> FrameSeries:
    import warnings

    import mrcfile

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            with mrcfile.mmap(p, mode="r", permissive=True) as mrc:
                if mrc.data is None:
                    raise ImageReadError(f"{p}: cannot read MRC: the data block is missing or short")
                shape, dtype = tuple(mrc.data.shape), mrc.data.dtype
    except ImageReadError:
        raise
    except Exception as exc:
        raise ImageReadError(f"{p}: cannot read MRC: {_one_line(exc)}") from exc
    dtype = _check_dtype(str(p), dtype)
    if len(shape) == 2:
        shape = (1, *shape)
    scan, frame = _split_shape(str(p), shape)
    return FrameSeries(str(p), "mrc", scan, frame, str(dtype))


def _open_npy(p: Path) -> FrameSeries:
    try:
        arr = np.load(p, mmap_mode="r", allow_pickle=False)
    except Exception as exc:  # bad header, object (pickled) array, truncated data
        raise ImageReadError(f"{p}: cannot read NumPy file: {_one_line(exc)}") from exc
    if not isinstance(arr, np.ndarray):
        raise ImageReadError(f"{p}: holds no array")
    shape, dtype = tuple(arr.shape), arr.dtype
    del arr
    dtype = _check_dtype(str(p), dtype)
    scan, frame = _split_shape(str(p), shape)
    return FrameSeries(str(p), "npy", scan, frame, str(dtype))


def _open_hdf5(p: Path, dataset: str | None) -> FrameSeries:
    import h5py

    try:
        fh = h5py.File(p, "r")
    except Exception as exc:
        raise ImageReadError(f"{p}: cannot read HDF5: {_one_line(exc)}") from exc
    with fh:
        if dataset is None:
            found: list[str] = []
            fh.visititems(lambda name, obj: found.append(name) if isinstance(obj, h5py.Dataset)
                          and obj.ndim in (3, 4) else None)
            if len(found) != 1:
                listing = ", ".join("/" + f for f in found[:6]) or "none of rank 3 or 4"
                raise InputError(f"{p}: name the dataset as {p}:/path/to/data (datasets: {listing})")
            dataset = "/" + found[0]
        if dataset not in fh:
            raise ImageReadError(f"{p}: has no dataset {dataset}")
        ds = fh[dataset]
        if not isinstance(ds, h5py.Dataset):
            raise ImageReadError(f"{p}: {dataset} is a group, not a dataset")
        shape, dtype = tuple(ds.shape), ds.dtype
    dtype = _check_dtype(f"{p}:{dataset}", dtype)
    scan, frame = _split_shape(f"{p}:{dataset}", shape)
    return FrameSeries(f"{p}:{dataset}", "hdf5", scan, frame, str(dtype), dataset=dataset)


def open_series(source: str | os.PathLike, *, scan_shape=None) -> FrameSeries:
    """Describe the frames of a folder, multi-page TIFF, MRC stack, ``.npy`` array or HDF5 dataset.

    Parameters
    ----------
    source : str or path
        A folder of frames (sorted by name), a TIFF of several pages, an MRC
        stack, a NumPy ``.npy`` array of rank 3 ``(n, ky, kx)`` or 4
        ``(scan_y, scan_x, ky, kx)`` (memory-mapped; pickled arrays are
        refused), or an HDF5 file with its dataset path, ``scan.h5:/entry/data``
        (the path may be left out when the file holds one dataset of rank 3 or 4).
    scan_shape : (n,) or (scan_y, scan_x), optional
        Arrange the frames as a scan (e.g. a stack saved frame by frame).

    Returns
    -------
    FrameSeries
        Shapes and where to read; no pixels are read beyond the headers (a
        folder's first frame gives the frame shape).

    Raises
    ------
    ImageReadError
        When the file is missing, unreadable, of the wrong rank or pixel type,
        or the dataset does not exist.
    InputError
        When an HDF5 file holds several candidate datasets and none was named,
        or ``scan_shape`` does not fit.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> path = os.path.join(tempfile.mkdtemp(), "scan.npy")
    >>> np.save(path, np.zeros((3, 4, 16, 16), np.uint16))
    >>> s = open_series(path)
    >>> s.scan_shape, s.frame_shape, s.n_frames
    ((3, 4), (16, 16), 12)
    """
    text = os.fspath(source)
    file_part, dataset = split_dataset_path(text)
    p = Path(file_part)
    if not p.exists():
        raise ImageReadError(f"{p}: no such file or folder")
    if p.is_dir():
        series = _open_folder(p)
    else:
        suffix = p.suffix.lower()
        if suffix in _HDF5_SUFFIXES:
            series = _open_hdf5(p, dataset)
        elif dataset is not None:
            raise InputError(f"{text}: a dataset path is only read from HDF5 files ({', '.join(_HDF5_SUFFIXES)})")
        elif suffix in (".tif", ".tiff"):
            series = _open_tiff(p)
        elif suffix in _MRC_SUFFIXES:
            series = _open_mrc(p)
        elif suffix == ".npy":
            series = _open_npy(p)
        else:
            raise ImageReadError(f"{p}: not a frame series (expected a folder, TIFF, MRC, .npy or HDF5 file)")
    if scan_shape is not None:
        series = series.with_scan_shape(scan_shape)
    return series
