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


# --------------------------------------------------------------------------- #
# Import contracts over every module (static, from the source) and every core module (imported)
# --------------------------------------------------------------------------- #

import ast  # noqa: E402
from pathlib import Path  # noqa: E402

PACKAGE = Path(__file__).resolve().parents[1] / "app" / "saedkit"

# layer -> module prefixes it must never import
CONTRACTS = {
    "core": ("saedkit.gui", "saedkit.cli", "saedkit._commands", "saedkit.report", "saedkit.batch",
             "saedkit.demo", "PySide6", "matplotlib"),
    "report": ("saedkit.gui", "saedkit.cli", "saedkit._commands", "PySide6"),
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = _module_name(path) if path.name == "__init__.py" else _module_name(path).rpartition(".")[0]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            found.add(mod)
            found.update(f"{mod}.{a.name}" for a in node.names)
    return found


@pytest.mark.parametrize("layer", sorted(CONTRACTS))
def test_import_contracts_hold_in_every_module(layer):
    forbidden = CONTRACTS[layer]
    broken = []
    files = sorted((PACKAGE / layer).rglob("*.py"))
    assert files, layer
    for f in files:
        for name in _imports(f):
            if any(name == p or name.startswith(p + ".") for p in forbidden):
                broken.append(f"{f.relative_to(PACKAGE)} imports {name}")
    assert not broken, "\n".join(broken)


def test_every_core_module_imports_without_qt_or_plotting():
    names = sorted(_module_name(f) for f in (PACKAGE / "core").rglob("*.py"))
    code = ("import importlib, sys\n"
            f"for n in {names!r}:\n    importlib.import_module(n)\n"
            "bad = [m for m in ('PySide6', 'matplotlib') if m in sys.modules]\n"
            "assert not bad, bad\n")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert res.returncode == 0, res.stderr
