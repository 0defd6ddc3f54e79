"""Shared test set-up: headless Qt, settings and data folders in tmp_path."""

from __future__ import annotations

import os

import numpy as np
import pytest

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
os.environ.setdefault("MPLBACKEND", "Agg")


@pytest.fixture(autouse=True)
def _isolated_user_dirs(tmp_path, monkeypatch):
    """Point saedkit's settings, data and log folders (calibration library, autosave, error log) at tmp_path."""
    monkeypatch.setenv("SAEDKIT_DATA_DIR", str(tmp_path / "saedkit-data"))
    monkeypatch.setenv("SAEDKIT_CONFIG_DIR", str(tmp_path / "saedkit-config"))
    monkeypatch.setenv("SAEDKIT_LOG_DIR", str(tmp_path / "saedkit-logs"))
    yield


@pytest.fixture
def rng():
    """A seeded random generator."""
    return np.random.default_rng(20261202)
