"""All exports into one folder."""

from __future__ import annotations

import json

import pypdf
import pytest

from saedkit.core.workflow.analysis import Analysis
from saedkit.core.errors import InputError
from saedkit.report import read_measurements_csv, write_report_bundle


def test_bundle_writes_every_format_named_after_the_image(spot_analysis, tmp_path):
    done = []
    out = write_report_bundle(spot_analysis, tmp_path / "results", progress=lambda d, t: done.append((d, t)))
    assert set(out) == {"csv", "json", "png", "svg", "pdf"}
    assert {p.name for p in out.values()} == {
        "grain_si_011_measurements.csv", "grain_si_011.json", "grain_si_011_pattern.png",
        "grain_si_011_pattern.svg", "grain_si_011_report.pdf",
    }
    assert all(p.parent == tmp_path / "results" and p.stat().st_size > 0 for p in out.values())
    assert done == [(i, 5) for i in range(1, 6)]
    assert len(read_measurements_csv(out["csv"])) == len(spot_analysis.spots)
    assert json.loads(out["json"].read_text(encoding="utf-8"))["image"]["sha256"] == spot_analysis.image.sha256
    assert len(pypdf.PdfReader(out["pdf"]).pages) == 4


def test_bundle_with_a_stem_and_some_formats(spot_analysis, tmp_path):
    out = write_report_bundle(spot_analysis, tmp_path, stem="run 7", formats=("json", "csv", "json"))
    assert [p.name for p in out.values()] == ["run 7.json", "run 7_measurements.csv"]


def test_bundle_refuses_bad_requests(spot_analysis, tmp_path):
    with pytest.raises(InputError, match="unknown format"):
        write_report_bundle(spot_analysis, tmp_path, formats=("csv", "docx"))
    with pytest.raises(InputError, match="stem"):
        write_report_bundle(spot_analysis, tmp_path, stem="../escape")
    with pytest.raises(InputError, match="no image"):
        write_report_bundle(Analysis(), tmp_path, formats=("csv", "png"))
    (tmp_path / "file").write_text("x")
    with pytest.raises(InputError, match="not a folder"):
        write_report_bundle(spot_analysis, tmp_path / "file", formats=("csv",))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file"]
    # without an image the tables can still be written ("pattern" is the stem)
    out = write_report_bundle(Analysis(), tmp_path / "t", formats=("csv", "json"))
    assert {p.name for p in out.values()} == {"pattern_measurements.csv", "pattern.json"}
