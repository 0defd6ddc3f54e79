"""``import saedkit.report`` stays cheap: matplotlib only when a figure is drawn."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest


def _run(code: str) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "MPLBACKEND"}
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)


def test_import_report_does_not_import_matplotlib():
    res = _run("import sys, saedkit.report as r; r.__all__; dir(r)\n"
               "assert 'matplotlib' not in sys.modules, [m for m in sys.modules if 'matplotlib' in m]")
    assert res.returncode == 0, res.stderr


def test_tables_are_written_without_matplotlib(tmp_path):
    res = _run(f"""
import sys, numpy as np
from saedkit.core.workflow.analysis import Analysis
from saedkit.core.imageio import pattern_from_array
from saedkit.report import write_measurements_csv, write_analysis_json, read_measurements_csv
a = Analysis(image=pattern_from_array(np.arange(256.0).reshape(16, 16)))
write_measurements_csv(a, r"{tmp_path / 'm.csv'}")
write_analysis_json(a, r"{tmp_path / 'a.json'}")
read_measurements_csv(r"{tmp_path / 'm.csv'}")
assert 'matplotlib' not in sys.modules
""")
    assert res.returncode == 0, res.stderr


def test_unknown_names_raise_attribute_error():
    import saedkit.report as r

    with pytest.raises(AttributeError, match="no attribute 'nonsense'"):
        r.nonsense  # noqa: B018
    for name in r.__all__:
        assert getattr(r, name) is not None
