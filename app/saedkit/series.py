"""Every frame of a series or 4-D scan, measured in chunks on Dask, resumable.

:func:`run_series` cuts the series into chunks of consecutive frames (the
blocks of :meth:`FrameSeries.to_dask`, read lazily by the task that measures
them), measures each chunk with :func:`saedkit.core.series.frames.analyse_frames`
on a local Dask scheduler, a local ``dask.distributed`` cluster or a running
scheduler, and keeps each finished chunk in ``OUT/chunks/`` as one small JSON
file written atomically. A run that was killed (or stopped with
``should_stop``) resumes where it stopped: finished chunks are read back, only
the rest is computed. When every chunk is done the outputs are written:

- ``frames.csv``: one row per frame (centre, spot count, phase, zone, rotation,
  score, virtual detector sums, error of a failed frame);
- ``spots.csv``: one row per spot (position, intensity, d);
- ``maps.h5``: the maps of :func:`~saedkit.core.series.maps.calculate_series_maps`
  (and, for a 1-D rotation series, the rotation axis direction in its attributes);
- ``mask.npy``: the mask used for every frame;
- ``maps/*.png``: figures of the maps (matplotlib, Agg canvas).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from saedkit.core.errors import InputError

__all__ = ["SeriesRun", "run_series", "prepare_series_mask", "read_series_run", "default_detector_radii",
           "calculate_series_rotation_axis",
           "write_frames_csv", "write_spots_csv", "write_series_figures"]

_CHUNK_DIR = "chunks"
_MANIFEST = "run.json"


@dataclass(frozen=True)
class SeriesRun:
    """The outcome of :func:`run_series`.

    ``complete`` is False when the run was stopped before every chunk was
    done (run it again with the same arguments to resume); ``frames`` and
    ``maps`` are then those of the finished chunks only.
    """

    out_dir: str
    series: dict
    complete: bool
    n_chunks: int
    n_chunks_done: int
    n_chunks_computed: int
    frames: tuple = field(repr=False)
    maps: object = field(default=None, repr=False)
    files: dict = field(default_factory=dict)
    rotation_axis: object = None  # RotationAxis of a 1-D (rotation) series, when its spots give one

    @property
    def n_frames_ok(self) -> int:
        return sum(1 for r in self.frames if r.ok)

    def to_dict(self) -> dict:
        """The summary record (no per-frame data)."""
        rec = {"out_dir": self.out_dir, "series": self.series, "complete": self.complete,
               "n_chunks": self.n_chunks, "n_chunks_done": self.n_chunks_done,
               "n_chunks_computed": self.n_chunks_computed, "n_frames_done": len(self.frames),
               "n_frames_ok": self.n_frames_ok,
               "failed_frames": [{"frame": r.frame, "error": r.error} for r in self.frames if not r.ok][:50],
               "files": {k: str(v) for k, v in self.files.items()}}
        if self.maps is not None:
            rec["maps"] = self.maps.to_dict()
        if self.rotation_axis is not None:
            rec["rotation_axis"] = self.rotation_axis.to_dict()
        return rec


# --------------------------------------------------------------------------- #
# Set-up
# --------------------------------------------------------------------------- #


def _sample(n: int, k: int) -> list[int]:
    if n <= k:
        return list(range(n))
    return sorted({int(round(v)) for v in np.linspace(0, n - 1, k)})


def prepare_series_mask(series, *, max_frames: int = 64) -> np.ndarray:
    """The series mask from the sum and maximum of up to ``max_frames`` frames spread over the series.

    Frames are read one at a time; see
    :func:`~saedkit.core.series.frames.calculate_series_mask`.
    """
    from saedkit.core.series.frames import calculate_series_mask

    total = np.zeros(series.frame_shape, np.float64)
    peak = None
    for i in _sample(series.n_frames, max_frames):
        f = series.read_frame(i)
        finite = np.isfinite(f) if f.dtype.kind == "f" else None
        g = f if finite is None else np.where(finite, f, 0)
        total += g
        peak = g.copy() if peak is None else np.maximum(peak, g)
    dtype = np.dtype(series.dtype)
    sat = float(np.iinfo(dtype).max) if dtype.kind in "ui" else None
    return calculate_series_mask(total, peak, saturation_value=sat)


def default_detector_radii(frame_shape) -> tuple[float, tuple[float, float]]:
    """Default virtual detectors of a frame shape: the bright-field radius and the dark-field annulus, pixels.

    Bright field: 6 % of the frame's smaller side (at least 3 pixels);
    annular dark field: from twice that radius to 45 % of the smaller side.
    These are starting values (common practice is to match the bright-field
    disc to the direct beam); give the radii explicitly for real data.
    """
    side = float(min(frame_shape))
    bf = max(3.0, 0.06 * side)
    return bf, (2.0 * bf, max(0.45 * side, 2.0 * bf + 1.0))


def _fingerprint(series, options, frames_per_chunk: int) -> dict:
    return {"series": series.to_dict(), "options": options.to_dict(), "frames_per_chunk": int(frames_per_chunk)}


def _chunk_path(out: Path, k: int) -> Path:
    return out / _CHUNK_DIR / f"chunk_{k:06d}.json"


def _analyse_chunk(block, k: int, start: int, scan_shape, options, mask) -> dict:
    # runs in a worker: plain data out
    from saedkit.core.series.frames import analyse_frames

    results = analyse_frames(block, first_frame=start, scan_shape=tuple(scan_shape), options=options, mask=mask)
    return {"chunk": k, "start": start, "stop": start + len(results), "frames": [r.to_dict() for r in results]}


def _write_chunk(out: Path, rec: dict, key: str) -> None:
    from saedkit.core._atomic import write_text_atomic

    write_text_atomic(_chunk_path(out, rec["chunk"]), json.dumps({"run": key, **rec}, allow_nan=False))


def _read_chunk(path: Path, key: str, scan_ndim: int):
    from saedkit.core.series.frames import FrameResult

    try:
        rec = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None  # unreadable: computed again
    if rec.get("run") != key:
        return None
    return [FrameResult.from_dict(f, scan_ndim) for f in rec["frames"]]


# --------------------------------------------------------------------------- #
# The run
# --------------------------------------------------------------------------- #


def run_series(source, *, options, out_dir: str | os.PathLike, frames_per_chunk: int = 16,
               scheduler: str = "threads", workers: int | None = None, cluster=None,
               scan_shape=None, restart: bool = False, write_figures: bool = True,
               progress: Callable[[int, int], None] | None = None,
               should_stop: Callable[[], bool] | None = None) -> SeriesRun:
    """Measure every frame of a series or scan in parallel chunks; resumable.

    Parameters
    ----------
    source : str, path or FrameSeries
        What :func:`~saedkit.core.series.reader.open_series` opens (e.g.
        ``"scan.h5:/entry/data"``), or an opened series.
    options : SeriesOptions
    out_dir : path
        Folder for the finished chunks and the outputs.
    frames_per_chunk : int
        Frames per task; a worker holds one chunk's pixels at a time.
    scheduler : {"threads", "processes", "synchronous", "local-cluster"}
        Local Dask scheduler, or a ``distributed.LocalCluster`` of ``workers``
        single-threaded processes ("local-cluster"). Ignored with ``cluster``.
    workers : int, optional
        Local workers (default: the number of cores).
    cluster : str or distributed.Client, optional
        Address of a running ``dask.distributed`` scheduler (its workers must
        see ``source`` at the same path), or a connected client.
    scan_shape : (n,) or (scan_y, scan_x), optional
        Arrange the frames as a scan.
    restart : bool
        Discard the finished chunks of an earlier run in ``out_dir`` instead of
        refusing to mix runs with other settings.
    write_figures : bool
        Write ``maps/*.png``.
    progress : callable, optional
        ``progress(frames_done, n_frames)`` after each finished chunk.
    should_stop : callable, optional
        Checked after each finished chunk; True stops the run (finished chunks are kept).

    Returns
    -------
    SeriesRun

    Raises
    ------
    InputError
        When ``out_dir`` holds chunks of a run with other settings (and not
        ``restart``), or an option is invalid.
    ImageReadError
        When the series cannot be opened.
    """
    import dask

    from saedkit.core._atomic import write_text_atomic, write_with_atomic
    from saedkit.core.series.frames import FrameResult
    from saedkit.core.series.reader import FrameSeries, open_series

    series = source if isinstance(source, FrameSeries) else open_series(source)
    if scan_shape is not None:
        series = series.with_scan_shape(scan_shape)
    if scheduler not in ("threads", "processes", "synchronous", "local-cluster"):
        raise InputError(f"scheduler must be threads, processes, synchronous or local-cluster, got {scheduler!r}")
    if workers is not None and (isinstance(workers, bool) or int(workers) < 1):
        raise InputError(f"workers must be an integer >= 1, got {workers!r}")
    out = Path(out_dir)
    chunk_dir = out / _CHUNK_DIR
    finger = _fingerprint(series, options, frames_per_chunk)
    key = hashlib.sha256(json.dumps(finger, sort_keys=True).encode()).hexdigest()[:16]
    manifest = out / _MANIFEST
    if manifest.exists():
        try:
            old = json.loads(manifest.read_text(encoding="utf-8")).get("key")
        except (OSError, ValueError):
            old = None
        if old != key:
            if not restart:
                raise InputError(f"{out}: holds a series run with other settings (input, options or chunk size); "
                                 "give another output folder, or restart to discard it")
            shutil.rmtree(chunk_dir, ignore_errors=True)
            (out / "mask.npy").unlink(missing_ok=True)
    elif restart:
        shutil.rmtree(chunk_dir, ignore_errors=True)
    chunk_dir.mkdir(parents=True, exist_ok=True)
    write_text_atomic(manifest, json.dumps({"key": key, **finger}, indent=1))

    mask_path = out / "mask.npy"
    mask = None
    if mask_path.exists():
        try:
            mask = np.load(mask_path, allow_pickle=False)
            if mask.shape != series.frame_shape or mask.dtype != bool:
                mask = None
        except (OSError, ValueError):
            mask = None
    if mask is None:
        mask = prepare_series_mask(series)

        def _save(tmp: str) -> None:
            with open(tmp, "wb") as fh:
                np.save(fh, mask, allow_pickle=False)

        write_with_atomic(mask_path, _save)

    bounds = series.chunk_bounds(frames_per_chunk)
    ndim = len(series.scan_shape)
    done: dict[int, list] = {}
    for k in range(len(bounds)):
        p = _chunk_path(out, k)
        if p.exists():
            got = _read_chunk(p, key, ndim)
            if got is not None and len(got) == bounds[k][1] - bounds[k][0]:
                done[k] = got
    pending = [k for k in range(len(bounds)) if k not in done]
    total = series.n_frames
    n_done_frames = sum(len(v) for v in done.values())
    if progress is not None:
        progress(n_done_frames, total)

    blocks = series.to_dask(frames_per_chunk).to_delayed().ravel()
    # the mask and options enter the graph once, shared by every task (sent once to each worker)
    mask_d, options_d = dask.delayed(mask), dask.delayed(options)
    tasks = [dask.delayed(_analyse_chunk, pure=True)(blocks[k], k, bounds[k][0], series.scan_shape, options_d, mask_d)
             for k in pending]
    computed = 0
    stopped = False

    def _take(rec: dict) -> bool:
        nonlocal computed, n_done_frames
        _write_chunk(out, rec, key)
        done[rec["chunk"]] = [FrameResult.from_dict(f, ndim) for f in rec["frames"]]
        computed += 1
        n_done_frames += len(rec["frames"])
        if progress is not None:
            progress(n_done_frames, total)
        return bool(should_stop and should_stop())

    if tasks:
        if cluster is not None or scheduler == "local-cluster":
            stopped = _run_distributed(tasks, cluster, workers, _take)
        else:
            step = 1 if scheduler == "synchronous" else max(int(workers or os.cpu_count() or 1), 1)
            for i in range(0, len(tasks), step):
                for rec in dask.compute(*tasks[i:i + step], scheduler=scheduler, num_workers=workers):
                    if _take(rec):
                        stopped = True
                if stopped:
                    break

    results = tuple(r for k in sorted(done) for r in done[k])
    complete = len(done) == len(bounds)
    files: dict = {"manifest": manifest, "mask": mask_path, "chunks": chunk_dir}
    maps = None
    if complete:
        from saedkit.core.series.maps import calculate_series_maps, write_series_maps

        maps = calculate_series_maps(results, series.scan_shape, phases=options.phase_names())
        files["frames_csv"] = write_frames_csv(results, out / "frames.csv")
        files["spots_csv"] = write_spots_csv(results, out / "spots.csv")
        axis = calculate_series_rotation_axis(results) if len(series.scan_shape) == 1 else None
        attrs = {"software": "saedkit", "source": series.source, "options": options.to_dict()}
        if axis is not None:
            attrs["rotation_axis"] = axis.to_dict()
        files["maps_h5"] = write_series_maps(maps, out / "maps.h5", attrs=attrs)
        if write_figures:
            files.update(write_series_figures(maps, out / "maps"))
    else:
        axis = None
    return SeriesRun(str(out), series.to_dict(), complete, len(bounds), len(done), computed, results, maps, files,
                     axis)


def calculate_series_rotation_axis(results):
    """The rotation axis of a 1-D rotation series from its frames' spots (offsets from each frame's centre).

    See :func:`saedkit.core.series.rotation.find_rotation_axis`; None when
    the spots give too few tracks (e.g. a crystal that does not turn).
    """
    from saedkit.core.series.rotation import find_rotation_axis

    per_frame = []
    for r in sorted(results, key=lambda r: r.frame):
        if not r.ok:
            per_frame.append(None)
            continue
        if not r.spots:
            per_frame.append(np.zeros((0, 2)))
            continue
        xy = np.array([[x, y] for x, y, _i, _d in r.spots], float)
        per_frame.append(xy - [r.centre_x_px, r.centre_y_px])
    return find_rotation_axis(per_frame)


def _run_distributed(tasks, cluster, workers, take) -> bool:
    from distributed import Client, LocalCluster, as_completed

    own_cluster = None
    if cluster is None:
        own_cluster = LocalCluster(n_workers=int(workers or os.cpu_count() or 1), threads_per_worker=1,
                                   processes=True, dashboard_address=":0")
        client = Client(own_cluster)
    elif isinstance(cluster, str):
        client = Client(cluster)
    else:
        client = cluster
    try:
        futures = client.compute(tasks)
        stopped = False
        for fut in as_completed(futures):
            if take(fut.result()):
                stopped = True
                client.cancel(futures)
                break
        return stopped
    finally:
        if client is not cluster:
            client.close()
        if own_cluster is not None:
            own_cluster.close()


# --------------------------------------------------------------------------- #
# Outputs
# --------------------------------------------------------------------------- #


def _cell(v) -> object:
    if v is None:
        return ""
    if isinstance(v, float):
        return "" if not math.isfinite(v) else round(v, 6)
    if isinstance(v, (list, tuple)):
        return " ".join(str(x) for x in v)
    return v


def write_frames_csv(results, path) -> Path:
    """One row per frame (atomic write); columns :data:`~saedkit.core.series.frames.FRAME_FIELDS`."""
    from saedkit.core._atomic import write_text_atomic
    from saedkit.core.series.frames import FRAME_FIELDS

    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=FRAME_FIELDS, extrasaction="ignore", lineterminator="\n")
    w.writeheader()
    for r in sorted(results, key=lambda r: r.frame):
        w.writerow({k: _cell(v) for k, v in r.to_dict().items()})
    return write_text_atomic(path, buf.getvalue())


def write_spots_csv(results, path) -> Path:
    """One row per spot of every frame: frame, scan position, x_px, y_px, intensity, d_A (atomic write)."""
    from saedkit.core._atomic import write_text_atomic

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["frame", "scan_y", "scan_x", "x_px", "y_px", "intensity", "d_A"])
    for r in sorted(results, key=lambda r: r.frame):
        d = r.to_dict()
        for x, y, inten, dA in r.spots:
            w.writerow([r.frame, d["scan_y"], d["scan_x"], _cell(x), _cell(y), _cell(inten), _cell(dA)])
    return write_text_atomic(path, buf.getvalue())


_FIGURES = (("phase_index", "phase", "categorical"), ("orientation_index", "zone axis (orientation)", "categorical"),
            ("in_plane_rotation_deg", "in-plane rotation (°)", "cyclic"), ("score", "match score", "value"),
            ("n_spots", "spots", "value"), ("bright_field", "virtual bright field (counts)", "value"),
            ("dark_field", "virtual annular dark field (counts)", "value"))


def write_series_figures(maps, folder) -> dict:
    """PNG figures of the maps (images for a scan, curves against frame number for a 1-D series)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    from saedkit.core._atomic import write_with_atomic

    folder = Path(folder)
    files = {}
    for name, title, kind in _FIGURES:
        a = np.asarray(getattr(maps, name), float)
        fig = Figure(figsize=(5.0, 4.0), dpi=100)
        FigureCanvasAgg(fig)
        ax = fig.add_subplot(1, 1, 1)
        labels = maps.phases if name == "phase_index" else maps.orientations if name == "orientation_index" else ()
        if a.ndim == 1:
            ax.plot(np.arange(len(a)), np.where(a < 0, np.nan, a) if kind == "categorical" else a, ".-")
            ax.set_xlabel("frame")
            if labels:
                ax.set_yticks(range(len(labels)), labels)
        else:
            if kind == "categorical":
                import matplotlib

                cmap = matplotlib.colormaps["tab10"].resampled(max(len(labels), 1))
                shown = np.ma.masked_less(a, 0)
                ax.imshow(shown, cmap=cmap, vmin=-0.5, vmax=max(len(labels), 1) - 0.5, interpolation="nearest")
                ax.legend(handles=[Patch(color=cmap(i), label=t) for i, t in enumerate(labels)],
                          loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7)
            else:
                im = ax.imshow(np.ma.masked_invalid(a), cmap="twilight" if kind == "cyclic" else "viridis",
                               interpolation="nearest")
                fig.colorbar(im, ax=ax)
            ax.set_xlabel("scan x")
            ax.set_ylabel("scan y")
        ax.set_title(title)
        fig.tight_layout()
        target = folder / f"{name}.png"
        write_with_atomic(target, lambda tmp: fig.savefig(tmp, format="png"))
        files[f"png_{name}"] = target
    return files


def read_series_run(out_dir):
    """The frames and maps of a finished run, for browsing: ``(series, frames, maps)``.

    ``series`` is the run's :class:`~saedkit.core.series.reader.FrameSeries`
    (``series.read_frame(i)`` gives frame ``i``'s pixels), ``frames`` the
    :class:`~saedkit.core.series.frames.FrameResult` of every frame in order,
    ``maps`` the :class:`~saedkit.core.series.maps.SeriesMaps`.

    Raises
    ------
    InputError
        When ``out_dir`` holds no finished run.
    """
    from saedkit.core.series.maps import read_series_maps
    from saedkit.core.series.reader import open_series

    out = Path(out_dir)
    try:
        man = json.loads((out / _MANIFEST).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{out}: holds no series run ({_MANIFEST} missing or damaged)") from exc
    if not (out / "maps.h5").exists():
        raise InputError(f"{out}: the series run is not finished (no maps.h5); run it again to resume")
    s = man["series"]
    series = open_series(s["source"], scan_shape=s["scan_shape"])
    ndim = len(series.scan_shape)
    frames = []
    for k in range(len(series.chunk_bounds(man["frames_per_chunk"]))):
        got = _read_chunk(_chunk_path(out, k), man["key"], ndim)
        if got is None:
            raise InputError(f"{_chunk_path(out, k)}: missing or damaged; run the series again to resume")
        frames.extend(got)
    return series, tuple(frames), read_series_maps(out / "maps.h5")
