"""Many patterns at once, on Dask.

Each pattern is analysed independently (centre, spots, zone-axis match — or
rings and calibration) by :mod:`saedkit.core.workflow.pipeline`; Dask runs them in
parallel on the local machine (threads or processes) or on a running
``dask.distributed`` cluster. A failure in one pattern is recorded with its
message and never stops the others. The summary is one CSV row per pattern,
written atomically; with an output folder each pattern also gets its full
JSON record (and, on request, the whole report bundle).
"""

from __future__ import annotations

import csv
import io
import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

__all__ = ["BatchItem", "run_batch", "write_batch_summary"]


@dataclass(frozen=True)
class BatchItem:
    """The outcome of one pattern of a batch."""

    path: str
    ok: bool
    error: str = ""
    summary: dict = field(default_factory=dict)
    record_path: str | None = None

    def to_dict(self) -> dict:
        return {"path": self.path, "ok": self.ok, "error": self.error, **self.summary,
                "record_path": self.record_path}


def _summarise(analysis) -> dict:
    out = {"n_spots": len(analysis.spots)}
    c = analysis.centre
    if c is not None:
        out.update(centre_x_px=round(c.x, 3), centre_y_px=round(c.y, 3))
    cand = analysis.candidate
    if cand is not None:
        out.update(phase=cand.phase, zone=" ".join(str(v) for v in cand.zone), score=round(cand.score, 4),
                   d_error_pct=round(cand.d_error_pct, 3), angle_error_deg=round(cand.angle_error_deg, 3),
                   in_plane_rotation_deg=round(cand.in_plane_rotation_deg, 2),
                   camera_constant_px_A=round(cand.camera_constant_px_A, 3))
    cal = analysis.calibration
    if cal is not None and getattr(cal, "rings", None) is not None and analysis.match is None:
        out.update(camera_constant_px_A=round(cal.camera_constant_px_A, 3),
                   camera_constant_rel_sigma=cal.camera_constant_rel_sigma)
    return out


def _pipeline_options(options: dict):
    """The PipelineOptions of a batch: ``options["options"]``, or the defaults with the dict's tolerances."""
    from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS

    if options.get("options") is not None:
        return options["options"]
    keys = ("voltage_kv", "pixel_size_um", "min_snr", "d_tolerance_pct", "angle_tolerance_deg", "max_index", "top")
    return DEFAULT_OPTIONS.replace(**{k: options.get(k) for k in keys})


def _analyse_one(path: str, options: dict, out_dir: str | None, bundle: bool) -> BatchItem:
    # runs in a worker: import here, catch expected failures, return plain data
    from saedkit.core.errors import SaedkitError
    from saedkit.core.imageio import read_pattern
    from saedkit.core.workflow.pipeline import analyse_ring_pattern, analyse_spot_pattern

    try:
        image = read_pattern(path)
        opts = _pipeline_options(options)
        if options.get("standard") is not None:
            analysis = analyse_ring_pattern(image, standard=options["standard"], options=opts,
                                            reproducibility_pct=options.get("reproducibility_pct"))
        else:
            analysis = analyse_spot_pattern(
                image, phases=options.get("phases", ()), calibration=options.get("calibration"),
                camera_constant_px_A=options.get("camera_constant_px_A"),
                camera_constant_sigma_px_A=options.get("camera_constant_sigma_px_A"),
                reproducibility_pct=options.get("reproducibility_pct"),
                internal_standard=options.get("internal_standard"), options=opts)
    except SaedkitError as exc:
        return BatchItem(str(path), False, " ".join(str(exc).split()))
    record_path = None
    if out_dir is not None:
        stem = Path(path).stem
        if bundle:
            from saedkit.report import write_report_bundle

            files = write_report_bundle(analysis, Path(out_dir) / stem)
            record_path = str(files.get("json"))
        else:
            from saedkit.report import write_analysis_json

            record_path = str(write_analysis_json(analysis, Path(out_dir) / f"{stem}.json"))
    return BatchItem(str(path), True, "", _summarise(analysis), record_path)


def run_batch(paths: Sequence[str | os.PathLike], *, options: dict, out_dir: str | os.PathLike | None = None,
              bundle: bool = False, scheduler: str = "threads", workers: int | None = None,
              cluster: str | None = None, progress: Callable[[int, int], None] | None = None) -> list[BatchItem]:
    """Analyse many patterns in parallel.

    Parameters
    ----------
    paths : sequence of paths
        Pattern images.
    options : dict
        What to run: ``phases``, ``calibration`` (a camera model) or
        ``camera_constant_px_A`` (with ``camera_constant_sigma_px_A``),
        ``reproducibility_pct``, ``internal_standard`` (a Phase), and either
        ``options`` (a :class:`~saedkit.core.workflow.pipeline.PipelineOptions`)
        or its fields (``voltage_kv``, tolerances, ``top``...); or ``standard``
        (a Phase) to calibrate ring patterns.
    out_dir : path, optional
        Where each pattern's JSON record (or report bundle) goes.
    bundle : bool
        Write the whole report bundle (CSV, JSON, PNG, SVG, PDF) per pattern.
    scheduler : {"threads", "processes", "synchronous"}
        Local Dask scheduler (ignored with ``cluster``).
    workers : int, optional
        Number of local workers (default: the number of cores).
    cluster : str, optional
        Address of a running ``dask.distributed`` scheduler.
    progress : callable, optional
        ``progress(done, total)`` as results arrive (in order of completion).

    Returns
    -------
    list of BatchItem
        In the order of ``paths``.
    """
    import dask

    jobs = [str(p) for p in paths]
    od = None if out_dir is None else str(out_dir)
    if od is not None:
        Path(od).mkdir(parents=True, exist_ok=True)
    tasks = [dask.delayed(_analyse_one, pure=False)(p, options, od, bundle) for p in jobs]
    if cluster:
        from distributed import Client, as_completed

        with Client(cluster) as client:
            futures = client.compute(tasks)
            done = 0
            for _ in as_completed(futures):
                done += 1
                if progress:
                    progress(done, len(futures))
            return list(client.gather(futures))
    if progress is None:
        return list(dask.compute(*tasks, scheduler=scheduler, num_workers=workers))
    # report progress by computing in chunks of the worker count
    out: list[BatchItem] = []
    step = max(workers or os.cpu_count() or 1, 1)
    for i in range(0, len(tasks), step):
        out.extend(dask.compute(*tasks[i:i + step], scheduler=scheduler, num_workers=workers))
        progress(len(out), len(tasks))
    return out


SUMMARY_FIELDS = ["path", "ok", "error", "phase", "zone", "score", "d_error_pct", "angle_error_deg",
                  "in_plane_rotation_deg", "camera_constant_px_A", "camera_constant_rel_sigma", "n_spots",
                  "centre_x_px", "centre_y_px", "record_path"]


def write_batch_summary(items: Sequence[BatchItem], path: str | os.PathLike) -> Path:
    """One CSV row per pattern (atomic write)."""
    from saedkit.core._atomic import write_text_atomic

    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=SUMMARY_FIELDS, extrasaction="ignore")
    w.writeheader()
    for it in items:
        w.writerow({k: ("" if v is None else v) for k, v in it.to_dict().items()})
    return write_text_atomic(path, buf.getvalue())


def items_to_json(items: Sequence[BatchItem]) -> str:
    """The batch as JSON text."""
    return json.dumps([it.to_dict() for it in items], indent=1)
