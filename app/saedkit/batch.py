"""Many patterns at once, on Dask.

Each pattern is analysed independently (centre, spots, zone-axis match — or
rings and calibration) by :mod:`saedkit.core.workflow.pipeline`; Dask runs them in
parallel on the local machine (threads or processes) or on a running
``dask.distributed`` cluster. A failure in one pattern is recorded with its
message and never stops the others. The summary is one CSV row per pattern,
written atomically; with an output folder each pattern also gets its full
JSON record (and, on request, the whole report bundle), under a safe and
distinct name; ``summary.csv`` is rewritten as results arrive, so an
interrupted batch leaves a consistent folder that ``resume=True`` continues.
The summary's ``calibrated`` column says whether the camera constant came
from a calibration, a typed-in K or a ring standard (``k_source``), or was
left free (a match scored without a known K can be far off in K).
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Sequence

__all__ = ["BatchItem", "BatchInterrupted", "output_stems", "read_finished", "run_batch", "safe_stem",
           "write_batch_summary"]


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


def _k_source(analysis, options: dict) -> str:
    """Where the pattern's camera constant came from (the summary's ``k_source`` column)."""
    from saedkit.core.calibration.camera import EnteredCalibration

    if options.get("standard") is not None:
        return "standard"
    if options.get("internal_standard") is not None:
        return "internal-standard"
    cal = getattr(analysis, "calibration", None)
    if isinstance(cal, EnteredCalibration):
        return "entered"
    if cal is not None:
        return "calibration"
    return "none"


def _pipeline_options(options: dict):
    """The PipelineOptions of a batch: ``options["options"]``, or the defaults with the dict's tolerances."""
    from saedkit.core.workflow.pipeline import DEFAULT_OPTIONS

    if options.get("options") is not None:
        return options["options"]
    keys = ("voltage_kv", "pixel_size_um", "min_snr", "d_tolerance_pct", "angle_tolerance_deg", "max_index", "top")
    return DEFAULT_OPTIONS.replace(**{k: options.get(k) for k in keys})


def _analyse_one(path: str, options: dict, out_dir: str | None, bundle: bool, stem: str | None = None) -> BatchItem:
    # runs in a worker: import here, catch every failure of this one pattern, return plain data
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
    except MemoryError:
        return BatchItem(str(path), False, "not enough memory to analyse this pattern")
    except Exception as exc:  # a bug in one pattern must not stop the batch: record it
        return BatchItem(str(path), False, f"internal error ({type(exc).__name__}: {' '.join(str(exc).split())})")
    summary = _summarise(analysis)
    k_source = _k_source(analysis, options)
    summary.update(calibrated=k_source != "none", k_source=k_source)
    record_path = None
    if out_dir is not None:
        stem = stem or safe_stem(path)
        try:
            if bundle:
                from saedkit.report import write_report_bundle

                files = write_report_bundle(analysis, Path(out_dir) / stem, stem=stem)
                record_path = str(files.get("json"))
            else:
                from saedkit.report import write_analysis_json

                record_path = str(write_analysis_json(analysis, Path(out_dir) / f"{stem}.json"))
        except (SaedkitError, OSError) as exc:
            return BatchItem(str(path), False, "analysed, but its record cannot be written: "
                             + " ".join(str(exc).split()), summary)
    return BatchItem(str(path), True, "", summary, record_path)


_UNSAFE = re.compile(r"[^A-Za-z0-9._+-]+")


def safe_stem(path: str | os.PathLike) -> str:
    """A file-name stem that is safe in any output folder: letters, digits, ``._+-``; no leading dot.

    ``../x.tif`` gives ``x``, ``...tif`` gives ``pattern``, ``a b\n.tif`` gives ``a_b_``.
    """
    name = Path(str(path)).name
    stem = name[:-len(Path(name).suffix)] if Path(name).suffix else name
    stem = _UNSAFE.sub("_", stem).lstrip(".").strip()
    stem = stem[:120]
    if not stem or set(stem) <= {".", "_"}:
        stem = "pattern"
    if stem.upper().split(".")[0] in _RESERVED:
        stem = "_" + stem
    return stem


_RESERVED = {"CON", "PRN", "AUX", "NUL", *(f"COM{i}" for i in range(1, 10)), *(f"LPT{i}" for i in range(1, 10))}


def output_stems(paths: Sequence[str | os.PathLike]) -> list[str]:
    """A distinct, safe output stem for every path (``same``, ``same-2``, ... case-insensitively)."""
    used: set[str] = {"summary"}
    out = []
    for p in paths:
        base = safe_stem(p)
        stem, n = base, 1
        while stem.casefold() in used:
            n += 1
            stem = f"{base}-{n}"
        used.add(stem.casefold())
        out.append(stem)
    return out


_TEXT_FIELDS = {"phase", "zone", "k_source"}


def _from_csv(key: str, value: str):
    if key == "calibrated":
        return value == "True"
    if key == "n_spots":
        return int(value)
    return value if key in _TEXT_FIELDS else float(value)


def read_finished(out_dir: str | os.PathLike) -> dict[str, BatchItem]:
    """The patterns an earlier run into ``out_dir`` finished (ok, with their record on disk), by path."""
    summary = Path(out_dir) / "summary.csv"
    if not summary.is_file():
        return {}
    done: dict[str, BatchItem] = {}
    try:
        with open(summary, newline="", encoding="utf-8") as fh:
            for row in csv.DictReader(fh):
                rp = row.get("record_path") or ""
                if row.get("ok") == "True" and rp and Path(rp).is_file():
                    extra = {k: _from_csv(k, v) for k, v in row.items()
                             if k not in ("path", "ok", "error", "record_path") and v not in ("", None)}
                    done[row["path"]] = BatchItem(row["path"], True, "", extra, rp)
    except (OSError, csv.Error, UnicodeDecodeError, KeyError, ValueError):
        return {}
    return done


def run_batch(paths: Sequence[str | os.PathLike], *, options: dict, out_dir: str | os.PathLike | None = None,
              bundle: bool = False, scheduler: str = "threads", workers: int | None = None,
              cluster: str | None = None, progress: Callable[[int, int], None] | None = None,
              resume: bool = False) -> list[BatchItem]:
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
        Where each pattern's JSON record (or report bundle) goes, and
        ``summary.csv``, rewritten (atomically) as results arrive.
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
    resume : bool
        Skip the patterns that ``summary.csv`` in ``out_dir`` lists as
        finished (with their record still there).

    Returns
    -------
    list of BatchItem
        In the order of ``paths``.

    Notes
    -----
    Output names are made safe and distinct (:func:`output_stems`), so
    ``a/same.tif`` and ``b/same.tif`` get ``same.json`` and ``same-2.json``
    and nothing is written outside ``out_dir``. A Ctrl-C
    (``KeyboardInterrupt``) stops the work, writes ``summary.csv`` with the
    patterns finished so far and the others marked "not run (interrupted)",
    and raises :class:`BatchInterrupted` carrying the items.
    """
    import dask

    jobs = [str(p) for p in paths]
    stems = output_stems(jobs)
    od = None if out_dir is None else str(out_dir)
    summary_path = None
    if od is not None:
        Path(od).mkdir(parents=True, exist_ok=True)
        summary_path = Path(od) / "summary.csv"
    finished = read_finished(od) if (resume and od is not None) else {}
    results: dict[int, BatchItem] = {i: finished[p] for i, p in enumerate(jobs) if p in finished}
    todo = [i for i in range(len(jobs)) if i not in results]

    def checkpoint(final: bool = False, why: str = "not run (interrupted)") -> list[BatchItem]:
        items = [results.get(i) or BatchItem(jobs[i], False, why) for i in range(len(jobs))]
        if summary_path is not None:
            write_batch_summary(items, summary_path)
        return items

    def make(i: int):
        return dask.delayed(_analyse_one, pure=False)(jobs[i], options, od, bundle, stems[i])

    try:
        if cluster:
            from distributed import Client, as_completed

            with Client(cluster) as client:
                futures = {client.compute(make(i)): i for i in todo}
                for fut in as_completed(list(futures)):
                    results[futures[fut]] = fut.result()
                    checkpoint()
                    if progress:
                        progress(len(results), len(jobs))
        else:
            step = max(workers or os.cpu_count() or 1, 1)
            for k in range(0, len(todo), step):
                chunk = todo[k:k + step]
                for i, item in zip(chunk, dask.compute(*[make(i) for i in chunk], scheduler=scheduler,
                                                       num_workers=workers)):
                    results[i] = item
                checkpoint()
                if progress:
                    progress(len(results), len(jobs))
    except KeyboardInterrupt:
        raise BatchInterrupted(checkpoint()) from None
    return checkpoint(final=True)


class BatchInterrupted(KeyboardInterrupt):
    """A batch stopped by Ctrl-C; ``items`` holds the finished and the not-run patterns."""

    def __init__(self, items: list[BatchItem]) -> None:
        super().__init__("batch interrupted")
        self.items = items


SUMMARY_FIELDS = ["path", "ok", "error", "calibrated", "k_source", "phase", "zone", "score", "d_error_pct", "angle_error_deg",
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
    try:
        return write_text_atomic(path, buf.getvalue())
    except OSError as exc:
        from saedkit.core.errors import InputError

        raise InputError(f"the batch summary {path} cannot be written: {exc}") from None


def items_to_json(items: Sequence[BatchItem]) -> str:
    """The batch as JSON text."""
    return json.dumps([it.to_dict() for it in items], indent=1)
