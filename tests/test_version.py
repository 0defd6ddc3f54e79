"""One version string: the package's, repeated by pyproject.toml, with a CHANGELOG entry."""

from pathlib import Path

import pytest

import saedkit

ROOT = Path(__file__).resolve().parents[1]


def test_one_version_string():
    tomllib = pytest.importorskip("tomllib")  # standard library from Python 3.11 (the project supports 3.10)

    meta = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    assert meta["project"]["version"] == saedkit.__version__
    changelog = (ROOT / "CHANGELOG.md").read_text(encoding="utf-8")
    assert f"## {saedkit.__version__}" in changelog
