"""`saedkit phases` and the command line's error handling."""

import json
import subprocess
import sys

import pytest

from saedkit.cli import main


def test_phases_json_lists_library_with_sources(capsys):
    assert main(["phases", "--json"]) == 0
    rec = json.loads(capsys.readouterr().out)
    assert rec["software"]["name"] == "saedkit"
    names = [p["name"] for p in rec["phases"]]
    for n in ["Au", "Al", "Si", "Cu", "Ni", "Fe", "NaCl", "MgO", "TiO2", "Ti"]:
        assert n in names
    au = next(p for p in rec["phases"] if p["name"] == "Au")
    # Maeland & Flanagan (1964) is the named source of the Au lattice parameter
    assert "Maeland" in au["source"] and au["cell"]["a_A"] == 4.0782


def test_phases_text_and_one_phase(capsys):
    assert main(["phases"]) == 0
    out = capsys.readouterr().out
    assert "Walker" in out and "TiO2" in out
    assert main(["phases", "gold", "--json"]) == 0
    rec = json.loads(capsys.readouterr().out)
    assert rec["rings"][0]["hkl"] == [1, 1, 1]
    assert abs(rec["rings"][0]["d_A"] - 2.3545) < 1e-4  # Au 111, a = 4.0782 Å (Maeland & Flanagan 1964)


def test_unknown_phase_one_line_error_and_exit_status():
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "phases", "unobtainium"], capture_output=True, text=True)
    assert res.returncode == 1
    assert res.stderr.count("\n") == 1 and "unknown phase 'unobtainium'" in res.stderr
    assert "Traceback" not in res.stderr


def test_bad_argument_exit_status():
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "phases", "--d-min", "x"], capture_output=True, text=True)
    assert res.returncode == 2 and "Traceback" not in res.stderr


@pytest.mark.skipif(not sys.platform.startswith("linux"),
                    reason="only Linux runs without a screen here; elsewhere the window would open")
def test_gui_without_a_screen_says_so_in_one_line():
    import os

    env = {k: v for k, v in os.environ.items() if k not in ("DISPLAY", "WAYLAND_DISPLAY", "QT_QPA_PLATFORM")}
    res = subprocess.run([sys.executable, "-m", "saedkit.cli", "gui"], capture_output=True, text=True, env=env)
    assert res.returncode == 1 and "no screen" in res.stderr and res.stderr.count("\n") == 1
    assert "Traceback" not in res.stderr
