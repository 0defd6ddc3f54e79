"""The multi-page PDF report."""

from __future__ import annotations

import dataclasses
import math
import os

import pypdf
import pytest

from saedkit import __version__
from saedkit.core.workflow.analysis import Analysis
from saedkit.core.detection.spots import Spot
from saedkit.report import CAUTION, write_pdf_report
from saedkit.report.pdf import TABLE_ROWS_FIRST_PAGE, TABLE_ROWS_PER_PAGE, plan_pdf_pages


def _text(reader) -> str:
    return " ".join(" ".join(p.extract_text().split()) for p in reader.pages)


def _plain(s: str) -> str:
    return " ".join(s.split())


def test_spot_report_pages_text_and_metadata(spot_analysis, tmp_path):
    calls = []
    path = write_pdf_report(spot_analysis, tmp_path / "r.pdf", progress=lambda d, t: calls.append((d, t)))
    reader = pypdf.PdfReader(path)
    # pattern, measurements (12 spots: one page), candidates, record
    assert len(reader.pages) == 4
    assert [k for k, _ in plan_pdf_pages(spot_analysis)] == ["pattern", "measurements", "candidates", "record"]
    assert calls == [(i, 4) for i in range(1, 5)]
    text = _text(reader)
    cand = spot_analysis.candidate
    assert "Si" in text
    assert "[" + " ".join(str(v) for v in cand.zone) + "]" in text  # the zone, as signed integers
    assert "camera constant" in text.lower()
    assert _plain(CAUTION) in text
    assert spot_analysis.image.sha256 in text
    assert "page 4 of 4" in text
    assert "costs $5 $6" in text  # a parameter with dollar signs is text, not mathtext
    meta = reader.metadata
    assert meta.title == "Diffraction pattern report: grain_si_011.tif"
    assert meta.creator == f"saedkit {__version__}"
    assert "Si" in meta.subject


def test_ring_report_has_a_calibration_page(ring_analysis, tmp_path):
    path = write_pdf_report(ring_analysis, tmp_path / "ring.pdf")
    reader = pypdf.PdfReader(path)
    assert [k for k, _ in plan_pdf_pages(ring_analysis)] == ["pattern", "measurements", "calibration", "record"]
    assert len(reader.pages) == 4
    page = " ".join(reader.pages[2].extract_text().split())
    assert "Calibration" in page and "{111}" in page
    k = ring_analysis.calibration.camera_constant_px_A
    assert f"K = {k:.4f}" in page
    assert "Camera length" in page and "λL" in page
    assert "Au" in page
    assert _plain(CAUTION) in _text(reader)


def test_identification_report_pages(identified_analysis, tmp_path):
    kinds = [k for k, _ in plan_pdf_pages(identified_analysis)]
    assert kinds == ["pattern", "measurements", "calibration", "phase-identification", "record"]
    reader = pypdf.PdfReader(write_pdf_report(identified_analysis, tmp_path / "id.pdf"))
    assert len(reader.pages) == 5
    page = " ".join(reader.pages[3].extract_text().split())
    assert "Phase identification" in page and "Al" in page
    text = _text(reader)
    assert "CL 150 mm" in text and "best phase match Al" in text


def test_long_tables_are_paged(spot_analysis, tmp_path):
    n = TABLE_ROWS_FIRST_PAGE + TABLE_ROWS_PER_PAGE + 5
    spots = tuple(
        Spot(x=10.0 + (i % 40) * 12, y=10.0 + (i // 40) * 15, sigma_x=0.1, sigma_y=0.1, intensity=100.0 + i,
             intensity_sigma=3.0, background=1.0, peak=9.0, snr=12.0, width_px=1.5)
        for i in range(n)
    )
    a = dataclasses.replace(spot_analysis, spots=spots)
    kinds = [k for k, _ in plan_pdf_pages(a)]
    assert kinds.count("measurements") == 1 + math.ceil((n - TABLE_ROWS_FIRST_PAGE) / TABLE_ROWS_PER_PAGE) == 3
    reader = pypdf.PdfReader(write_pdf_report(a, tmp_path / "long.pdf"))
    assert len(reader.pages) == len(kinds)
    assert "part 3 of 3" in _text(reader)


def test_parts_that_are_missing_get_no_page(spot_analysis, tmp_path):
    a = Analysis(image=spot_analysis.image, parameters={"voltage_kv": 200})
    assert [k for k, _ in plan_pdf_pages(a)] == ["pattern", "record"]
    reader = pypdf.PdfReader(write_pdf_report(a, tmp_path / "bare.pdf"))
    assert len(reader.pages) == 2
    text = _text(reader)
    assert "voltage_kv" in text and _plain(CAUTION) in text
    # without an image: the record only
    assert [k for k, _ in plan_pdf_pages(Analysis())] == ["record"]


def test_failed_pdf_write_leaves_no_partial_file(spot_analysis, tmp_path, monkeypatch):
    from matplotlib.backends import backend_pdf

    real = backend_pdf.PdfPages.savefig
    calls = []

    def fail_on_second(self, *a, **k):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("stopped half-way")
        return real(self, *a, **k)

    monkeypatch.setattr(backend_pdf.PdfPages, "savefig", fail_on_second)
    target = tmp_path / "r.pdf"
    with pytest.raises(RuntimeError, match="half-way"):
        write_pdf_report(spot_analysis, target)
    assert os.listdir(tmp_path) == []


def test_long_records_continue_on_more_pages(spot_analysis, tmp_path):
    params = {f"option_{i:03d}": i * 0.5 for i in range(120)}
    a = dataclasses.replace(spot_analysis, parameters=params)
    kinds = [k for k, _ in plan_pdf_pages(a)]
    assert kinds.count("record") >= 2
    reader = pypdf.PdfReader(write_pdf_report(a, tmp_path / "p.pdf"))
    assert len(reader.pages) == len(kinds)
    last = " ".join(reader.pages[-1].extract_text().split())
    assert "option_119" in last and _plain(CAUTION) in last
