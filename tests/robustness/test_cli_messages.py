"""One line on stderr for a failure, never a library warning beside it; non-UTF-8 CIFs (issue 14, found 8)."""

from __future__ import annotations

import warnings

import pytest

from saedkit.cli import main
from saedkit.core.crystallography.library import find_phase
from saedkit.core.errors import CrystalError, SaedkitError


def test_warnings_raised_before_a_failure_do_not_reach_stderr(monkeypatch, capsys):
    import saedkit._commands.phases as phases_cmd

    def noisy(args):
        warnings.warn("a library's own complaint", RuntimeWarning)
        raise SaedkitError("the real problem")

    monkeypatch.setattr(phases_cmd, "run", noisy)
    from saedkit import cli

    parser = cli.build_parser()
    args = parser.parse_args(["phases"])
    monkeypatch.setattr(cli, "build_parser", lambda: _Fixed(parser, args, noisy))
    assert main(["phases"]) == 1
    err = capsys.readouterr().err
    assert err == "saedkit phases: error: the real problem\n"


def test_warnings_of_a_success_are_passed_on(monkeypatch, capsys):
    from saedkit import cli

    def fine(args):
        warnings.warn("kept", UserWarning)
        return 0

    parser = cli.build_parser()
    args = parser.parse_args(["phases"])
    monkeypatch.setattr(cli, "build_parser", lambda: _Fixed(parser, args, fine))
    with pytest.warns(UserWarning, match="kept"):
        assert main(["phases"]) == 0


class _Fixed:
    """A parser whose parse_args gives ``args`` with ``func`` replaced."""

    def __init__(self, parser, args, func):
        self.parser, self.args, self.func = parser, args, func

    def parse_args(self, argv):
        self.args.func = self.func
        return self.args


@pytest.mark.parametrize("where", [b"'nickel'", b"Taylor", b"'F m -3 m'"])
def test_a_cif_that_is_not_utf8_is_read_with_a_note(tmp_path, where, capsys):
    # a Latin-1 byte (an accented author name) must not stop the file: it is read as Latin-1 and the
    # phase says so, naming the line; never a traceback
    from saedkit.core.crystallography import library as phase_library

    src = phase_library.__file__.replace("library.py", "phases/Ni.cif")
    with open(src, "rb") as fh:
        data = fh.read()
    assert where in data
    bad = tmp_path / "latin1.cif"
    bad.write_bytes(data.replace(where, where[:-2] + b"\xe9" + where[-2:], 1))  # é in Latin-1
    try:
        phase = find_phase(str(bad))
    except CrystalError as exc:  # é inside the space-group symbol: a clear message is the right answer
        assert "latin1.cif" in str(exc)
        assert main(["phases", str(bad)]) == 1
        assert capsys.readouterr().err.count("\n") == 1
        return
    assert any("not UTF-8" in n and "line" in n for n in phase.notes)
    assert main(["phases", str(bad)]) == 0
    assert "not UTF-8" in capsys.readouterr().out
