"""--centre X Y and --mask FILE of spots, index, rings and report (invented frames)."""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile

from saedkit.cli import main
from saedkit.core.imageio import write_tiff
from saedkit.core.simulation.render import ChipGaps, Detector, render_pattern


@pytest.fixture(scope="module")
def frame(tmp_path_factory):
    """A 12-bit frame with a chip-gap cross, hot pixels, an unsaturated beam and a square net
    of spots 40 px apart (a cubic [001] zone: 90° between g(200) and g(020), from memory)."""
    d = tmp_path_factory.mktemp("frames")
    centre = (250.3, 261.7)
    ij = np.array([(i, j) for i in range(-5, 6) for j in range(-5, 6) if (i, j) != (0, 0)], float)
    img, _ = render_pattern((512, 512), centre, spot_offsets_xy=40.0 * ij, spot_intensity=800.0, spot_sigma_px=1.2,
                            central_beam_intensity=3000.0, central_beam_sigma_px=2.5, background_intensity=40.0,
                            chip_gaps=ChipGaps(hot_pixels=10), detector=Detector(full_well=4095.0, offset=0.0),
                            rng=np.random.default_rng(4))
    p = d / "frame.tif"
    write_tiff(p, img, voltage_kv=200.0)
    return p, np.array(centre)


def _json(capsys, argv):
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)


def test_spots_finds_the_centre_and_keeps_spots_off_the_gaps(frame, capsys):
    p, centre = frame
    rec = _json(capsys, ["spots", str(p), "--camera-constant", "400", "--json"])
    assert np.hypot(*(np.array(rec["centre_px"]) - centre)) < 0.5  # project target
    assert rec["centre_method"] in ("direct-beam", "friedel-pairs") and rec["centre_confidence"] >= 0.5
    xy = np.array([[s["x"], s["y"]] for s in rec["spots"]])
    r = np.hypot(*(xy - centre).T)
    assert np.all(r > 5)  # the direct beam is no spot
    assert all(s["snr"] >= 5 and s["saturated"] is False for s in rec["spots"])
    # every spot sits on the net within 1 px (the drawn positions)
    on_net = (xy - centre) / 40.0
    assert np.all(np.abs(on_net - np.round(on_net)) * 40.0 < 1.0)


def test_given_centre_and_mask_are_used(frame, capsys, tmp_path):
    p, centre = frame
    m = np.zeros((512, 512), np.uint8)
    m[:, :200] = 1  # exclude the left part
    mp = tmp_path / "left.tif"
    tifffile.imwrite(mp, m)
    rec = _json(capsys, ["spots", str(p), "--centre", "250.3", "261.7", "--mask", str(mp), "--json"])
    assert rec["centre_px"] == [250.3, 261.7] and rec["centre_method"] == "manual"
    assert rec["spots"] and all(s["x"] > 200 for s in rec["spots"])
    np.save(tmp_path / "none.npy", np.zeros((512, 512)))  # an all-clear mask is fine
    rec = _json(capsys, ["index", str(p), "--phase", "Fe", "--mask", str(tmp_path / "none.npy"), "--json"])
    assert np.hypot(*(np.array(rec["centre_px"]) - centre)) < 0.5
    assert main(["rings", str(p), "--centre", "250", "262", "--mask", str(mp), "--json"]) in (0, 1)
    capsys.readouterr()


@pytest.mark.parametrize("argv, words", [
    (["--centre", "600", "10"], "outside the image"),
    (["--mask", "@missing.tif"], "file not found"),
    (["--mask", "@small.npy"], "has shape 8 x 8"),
    (["--mask", "@junk.tif"], "cannot be read"),
])
def test_bad_centre_or_mask_gives_one_line(frame, capsys, tmp_path, argv, words):
    p, _ = frame
    np.save(tmp_path / "small.npy", np.zeros((8, 8)))
    (tmp_path / "junk.tif").write_text("not an image")
    argv = [str(tmp_path / a[1:]) if a.startswith("@") else a for a in argv]
    for command in (["spots", str(p)], ["index", str(p), "--phase", "Fe"]):
        assert main(command + argv) == 1
        err = capsys.readouterr().err
        assert words in err and err.count("\n") == 1
