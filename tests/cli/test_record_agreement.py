"""`batch` and `index` give the same record; every calibrated command records its calibration; the schema holds."""

from __future__ import annotations

import json

import numpy as np
import pytest

from saedkit.cli import main
from saedkit.core.crystallography.library import find_phase
from saedkit.core.imageio import write_tiff
from saedkit.core.simulation.simulate import simulate_ring_pattern, simulate_spot_pattern
from tests.record_schema import assert_record_schema

K_TRUE = 320.0


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("agree")
    img, _ = simulate_spot_pattern(find_phase("Ni"), (0, 1, 1), shape=(384, 384), camera_constant_px_A=K_TRUE,
                                   rotation_deg=15, rng=np.random.default_rng(4))
    grain = d / "grain.tif"
    write_tiff(grain, img, voltage_kv=200.0, pixel_size_um=15.0)
    rimg, _ = simulate_ring_pattern(find_phase("Au"), shape=(384, 384), camera_constant_px_A=K_TRUE,
                                    rng=np.random.default_rng(6))
    film = d / "film.tif"
    write_tiff(film, rimg, voltage_kv=200.0, pixel_size_um=15.0)
    return grain, film


def _json(capsys, argv):
    assert main(argv) == 0
    rec = json.loads(capsys.readouterr().out)
    assert_record_schema(argv, rec)
    return rec


def _strip(rec: dict) -> dict:
    return {k: v for k, v in rec.items() if k not in ("created", "software")}


def test_batch_and_index_records_agree_field_for_field(files, tmp_path, capsys):
    grain, _ = files
    opts = ["--phase", "Ni", "--camera-constant", str(K_TRUE), "--camera-constant-sigma", "4", "--top", "3"]
    index = _json(capsys, ["index", str(grain), *opts, "--json"])
    batch = _json(capsys, ["batch", str(grain), *opts, "--out", str(tmp_path), "--scheduler", "synchronous", "--json"])
    record = json.loads((tmp_path / "grain.json").read_text())
    assert _strip(record) == _strip(index)
    # batch keeps the typed σ of K (it used to record 0)
    assert record["calibration"]["camera_constant_sigma_px_A"] == 4.0
    assert record["parameters"]["top"] == 3 and len(record["candidates"]) <= 3
    assert batch["n_ok"] == 1


def test_identify_and_index_record_the_named_calibration(files, capsys):
    grain, film = files
    _json(capsys, ["calibrate", str(film), "--standard", "Au", "--save", "film-cal", "--reproducibility-pct", "0.4",
                   "--json"])
    ident = _json(capsys, ["identify", str(film), "--calibration", "film-cal", "--phase", "Au", "--phase", "Al",
                           "--json"])
    assert ident["calibration"]["name"] == "film-cal"  # it used to be null
    assert ident["calibration"]["reproducibility_pct"] == 0.4  # stored with the calibration
    assert ident["camera"]["source"] == "library"
    assert list(ident["phase_identification"]["candidates"][0]["phases"]) == ["Au"]
    idx = _json(capsys, ["index", str(grain), "--phase", "Ni", "--calibration", "film-cal",
                         "--reproducibility-pct", "2", "--json"])
    assert idx["camera"]["reproducibility_pct"] == 2.0  # overridden for this run
    s = idx["spots"][0]
    assert s["d_sys_sigma_A"] == pytest.approx(0.02 * s["d_A"], rel=1e-3)  # exact form: ∂ln d/∂ln K = 1 − O((λ/d)²)
    for cmd in (["spots", str(grain)], ["rings", str(film)]):
        rec = _json(capsys, [*cmd, "--calibration", "film-cal", "--json"])
        assert rec["calibration"]["name"] == "film-cal" and rec["camera"]["source"] == "library"


def test_report_and_bad_reproducibility(files, tmp_path, capsys):
    grain, _ = files
    rec = _json(capsys, ["report", str(grain), "--phase", "Ni", "--camera-constant", str(K_TRUE), "--out",
                         str(tmp_path / "r"), "--json"])
    assert rec["analysis"]["camera"]["camera_constant_px_A"] == K_TRUE
    assert main(["spots", str(grain), "--reproducibility-pct", "1", "--json"]) == 1
    assert "--reproducibility-pct needs" in capsys.readouterr().err
