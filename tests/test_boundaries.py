"""The layers stay apart: core/ and the non-GUI command line never import Qt or pyplot."""

import subprocess
import sys

import pytest

CODE = """
import sys
import saedkit, saedkit.core
{imports}
bad = [m for m in ("PySide6", "matplotlib.pyplot") if m in sys.modules]
assert not bad, bad
"""


@pytest.mark.parametrize(
    "imports",
    [
        "import saedkit.core.crystallography.crystal, saedkit.core.crystallography.structure_factors, saedkit.core.crystallography.library, saedkit.core.optics",
        "from saedkit.cli import main\nmain(['phases', '--json'])",
        "import saedkit.cli; saedkit.cli.build_parser().parse_args(['phases'])",
    ],
)
def test_no_qt_or_pyplot_in_core_and_cli(imports):
    res = subprocess.run([sys.executable, "-c", CODE.format(imports=imports)], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr


def test_import_saedkit_is_cheap():
    code = "import sys, saedkit; assert 'numpy' not in sys.modules and 'scipy' not in sys.modules, sorted(sys.modules)"
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
