"""Small helpers of the robustness tests: a library record and subprocess runs."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from saedkit.core.calibration.library import SavedCalibration

APP_DIR = str(Path(__file__).resolve().parents[2] / "app")


def saved_record(name: str = "cal A", *, K: float = 1500.0) -> SavedCalibration:
    """A valid calibration record (values typical of a 200 kV TEM, from memory)."""
    return SavedCalibration(
        name=name, instrument="TEM-1", voltage_kv=200.0, nominal_camera_length_mm=600.0, binning=1,
        pixel_size_um=15.0, camera_constant_px_A=K, camera_constant_sigma_px_A=K * 2e-4,
        ellipticity=0.01, major_axis_deg=30.0, standard="Au", date="2026-01-10T09:00:00Z",
        image_sha256="", software_version="0.1.0")


def child_env(**extra: str) -> dict:
    """The environment of a child Python that imports this tree's saedkit."""
    env = dict(os.environ)
    env["PYTHONPATH"] = APP_DIR + os.pathsep + env.get("PYTHONPATH", "")
    env["OPENBLAS_NUM_THREADS"] = "1"
    env.update(extra)
    return env


def run_python(code: str, *, timeout: float = 120, **env: str) -> subprocess.CompletedProcess:
    """Run ``code`` in a child Python (this tree on the path)."""
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=timeout,
                          env=child_env(**env))


def popen_python(code: str, **env: str) -> subprocess.Popen:
    """Start ``code`` in a child Python without waiting."""
    return subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=child_env(**env))
