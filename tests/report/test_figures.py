"""Annotated pattern figure (PNG, SVG) and the radial-profile figure."""

from __future__ import annotations

import dataclasses
import math
import os
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from saedkit.core.workflow.analysis import Analysis
from saedkit.core.errors import InputError
from saedkit.report import (
    OVERLAYS,
    render_pattern_figure,
    render_profile_figure,
    write_pattern_figure,
)
from saedkit.report.figures import calculate_display_array, index_mathtext


def _png_size(path):
    import matplotlib.image as mpimg

    img = mpimg.imread(path)
    return img.shape[1], img.shape[0]  # width, height


def _scalebar(fig):
    ax = fig.axes[0]
    bars = [p for p in ax.patches if p.get_gid() == "scalebar"]
    assert len(bars) == 1
    return bars[0]


def test_png_has_the_predicted_pixel_size(spot_analysis, tmp_path):
    p = write_pattern_figure(spot_analysis, tmp_path / "a.png", size_px=640)
    assert _png_size(p) == (640, 640)
    p = write_pattern_figure(spot_analysis, tmp_path / "b.png", size_px=640, dpi=150)
    assert _png_size(p) == (960, 960)
    p = write_pattern_figure(spot_analysis, tmp_path / "c.png")  # default: image side within 800–1600
    assert _png_size(p) == (800, 800)


def test_png_of_a_non_square_image_keeps_its_aspect(uncalibrated_analysis, tmp_path):
    # image 384 rows × 448 columns: long side 896 px → 896 × 768
    p = write_pattern_figure(uncalibrated_analysis, tmp_path / "u.png", size_px=896)
    assert _png_size(p) == (896, 768)
    p = write_pattern_figure(uncalibrated_analysis, tmp_path / "v.png", size_px=896, dpi=50)
    assert _png_size(p) == (448, 384)


def test_svg_parses_as_xml_with_text(spot_analysis, tmp_path):
    p = write_pattern_figure(spot_analysis, tmp_path / "a.svg")
    root = ET.parse(p).getroot()
    assert root.tag.endswith("svg")
    texts = "".join(t.text or "" for t in root.iter() if t.tag.endswith("text") or t.tag.endswith("tspan"))
    assert "Si" in texts and "nm" in texts  # SVG text stays text (editable)
    with pytest.raises(InputError, match="png' or 'svg"):
        write_pattern_figure(spot_analysis, tmp_path / "a.tif")
    assert not (tmp_path / "a.tif").exists()
    p = write_pattern_figure(spot_analysis, tmp_path / "no_suffix", fmt="svg")
    ET.parse(p)


def test_scale_bar_length_follows_the_camera_constant(spot_analysis, ring_analysis):
    # R = K·g (camera equation, g = 1/d): a bar of g nm⁻¹ spans K·g/10 pixels
    for analysis, k in ((spot_analysis, 300.0), (ring_analysis, ring_analysis.calibration.camera_constant_px_A)):
        fig = render_pattern_figure(analysis)
        bar = _scalebar(fig)
        g = float(bar.get_label().split()[2])
        ell = analysis.calibration.ellipse if analysis.calibration is not None else None
        stretch = float(np.hypot(*(ell.matrix @ [1.0, 0.0]))) if ell is not None else 1.0
        assert bar.get_width() == pytest.approx(k * g / 10.0 * stretch, rel=1e-9)
        cols = analysis.image.shape[1]
        assert 0.08 * cols <= bar.get_width() <= 0.21 * cols
        assert any(f"{g:g} nm⁻¹" in t.get_text() for t in fig.axes[0].texts)


def test_labels_sit_beside_their_reflections_without_overlap(spot_analysis):
    fig = render_pattern_figure(spot_analysis)
    ax = fig.axes[0]
    renderer = fig.canvas.get_renderer()
    labels = [t for t in ax.texts if t.get_text().startswith("$")]
    assert len(labels) >= 10
    boxes = [t.get_window_extent(renderer) for t in labels]
    for i, a in enumerate(boxes):
        for b in boxes[i + 1:]:
            assert not a.overlaps(b)
    # each label is anchored on a predicted reflection, and says its (hkl)
    pred = {index_mathtext(p.hkl, brackets=""): (p.x, p.y) for p in spot_analysis.candidate.predicted}
    for t in labels:
        assert t.get_text() in pred
        assert t.xy == pytest.approx(pred[t.get_text()])
    # the corner label names the phase and the zone
    corner = [t.get_text() for t in ax.texts if t.get_text().startswith("Si")]
    assert corner and index_mathtext(spot_analysis.candidate.zone, brackets="[]") in corner[0]


def test_ring_labels_name_the_families(ring_analysis):
    fig = render_pattern_figure(ring_analysis)
    texts = {t.get_text() for t in fig.axes[0].texts}
    for hkl in ((1, 1, 1), (2, 0, 0), (2, 2, 0)):
        assert index_mathtext(hkl, brackets="{}") in texts


def test_index_mathtext():
    assert index_mathtext((-1, 1, 0), brackets="[]") == r"$[\overline{1}10]$"
    assert index_mathtext((-1, -1, 1)) == r"$(\overline{1}\,\overline{1}1)$"
    assert index_mathtext((1, 0, -12), brackets="") == r"$1\;0\;\overline{12}$"
    assert index_mathtext((1, -1, 1), brackets="{}", hexagonal=True) == r"$\{1\overline{1}01\}$"


def test_every_overlay_and_display_mode_renders(spot_analysis, ring_analysis):
    for analysis in (spot_analysis, ring_analysis):
        for display in ("log", "gamma", "linear"):
            fig = render_pattern_figure(analysis, overlays=OVERLAYS, display=display, size_px=300)
            assert fig.get_size_inches() * fig.dpi == pytest.approx([300, 300], abs=0.02)
    bare = render_pattern_figure(spot_analysis, overlays=(), size_px=200)
    assert not bare.axes[0].texts and not bare.axes[0].patches


def test_bad_arguments_are_refused(spot_analysis):
    with pytest.raises(InputError, match="unknown overlay"):
        render_pattern_figure(spot_analysis, overlays=("centre", "arrows"))
    with pytest.raises(InputError, match="display must be one of"):
        render_pattern_figure(spot_analysis, display="sqrt")
    with pytest.raises(InputError, match="size_px"):
        render_pattern_figure(spot_analysis, size_px=10)
    with pytest.raises(InputError, match="no image"):
        render_pattern_figure(Analysis())


def test_image_without_anything_else_renders(spot_analysis, tmp_path):
    a = Analysis(image=spot_analysis.image)
    assert _png_size(write_pattern_figure(a, tmp_path / "i.png", size_px=256)) == (256, 256)


def test_display_array_is_monotonic_and_bounded():
    rng = np.random.default_rng(5)
    data = rng.poisson(50, (64, 64)).astype(float)
    data[30:34, 30:34] = 5e4
    mask = np.zeros_like(data, bool)
    mask[:4] = True
    for mode in ("log", "gamma", "linear"):
        g = calculate_display_array(data, mask, display=mode)
        assert g.min() >= 0 and g.max() <= 1
        order = np.argsort(data.ravel())
        assert np.all(np.diff(g.ravel()[order]) >= -1e-6)
    small = calculate_display_array(np.arange(100 * 100.0).reshape(100, 100), display="log", max_side_px=30)
    assert max(small.shape) <= 30


def test_profile_figure(ring_analysis, spot_analysis):
    fig = render_profile_figure(ring_analysis)
    assert len(fig.axes) >= 2  # profile (+ its |g| axis) and residuals
    with pytest.raises(InputError, match="no radial profile"):
        render_profile_figure(spot_analysis)


def test_failed_figure_write_leaves_no_file(spot_analysis, tmp_path, monkeypatch):
    from matplotlib.figure import Figure

    def fail(self, fname, *a, **k):
        with open(fname, "wb") as fh:
            fh.write(b"\x89PNG half")
        raise RuntimeError("renderer failed")

    monkeypatch.setattr(Figure, "savefig", fail)
    with pytest.raises(RuntimeError, match="renderer failed"):
        write_pattern_figure(spot_analysis, tmp_path / "p.png")
    assert os.listdir(tmp_path) == []


def test_rendering_never_imports_pyplot(tmp_path):
    code = f"""
import sys, numpy as np
from saedkit.core.workflow.analysis import Analysis
from saedkit.core.imageio import pattern_from_array
from saedkit.report import write_pattern_figure, write_pdf_report
img = pattern_from_array(np.random.default_rng(0).poisson(20, (96, 96)))
write_pattern_figure(Analysis(image=img), r"{tmp_path / 'x.png'}")
write_pdf_report(Analysis(image=img), r"{tmp_path / 'x.pdf'}")
assert "matplotlib" in sys.modules
assert "matplotlib.pyplot" not in sys.modules
assert not any(m.startswith(("PySide6", "PyQt", "tkinter")) for m in sys.modules), sorted(sys.modules)
"""
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env={k: v for k, v in os.environ.items() if k != "MPLBACKEND"})
    assert res.returncode == 0, res.stderr


def test_hexagonal_labels_use_four_indices(spot_analysis):
    cand = spot_analysis.candidate
    hexed = dataclasses.replace(cand, zone_four_index=(0, 0, 0, 1))
    match = dataclasses.replace(spot_analysis.match, candidates=(hexed,))
    fig = render_pattern_figure(dataclasses.replace(spot_analysis, match=match))
    labels = [t.get_text() for t in fig.axes[0].texts if t.get_text().startswith("$")]
    assert labels
    # (hkl) → (hkil): four indices, i = −(h + k)
    p = cand.predicted[0]
    assert math.isfinite(p.x)
    four = {index_mathtext(q.hkl, brackets="", hexagonal=True) for q in cand.predicted}
    assert set(labels) <= four
