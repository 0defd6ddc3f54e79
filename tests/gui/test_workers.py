"""The task runner: results come back on the GUI thread; replaced and cancelled work is dropped."""

from __future__ import annotations

import threading
import time

import pytest

pytest.importorskip("PySide6")
pytestmark = pytest.mark.gui

from saedkit.gui.workers import TaskRunner  # noqa: E402


def test_a_newer_request_replaces_an_older_one(qtbot):
    runner = TaskRunner(max_threads=2)
    done, ended = [], []
    runner.task_ended.connect(lambda key, label, how: ended.append(how))
    main = threading.get_ident()
    release = threading.Event()

    def slow(progress, should_stop):
        for i in range(200):
            if should_stop():
                return "old, stopped"
            progress(i, 200)
            time.sleep(0.005)
            if release.is_set():
                break
        return "old"

    def fast(progress, should_stop):
        progress(1, 1)
        return "new"

    runner.submit("k", "slow", slow, on_done=lambda r: done.append((r, threading.get_ident())))
    runner.submit("k", "fast", fast, on_done=lambda r: done.append((r, threading.get_ident())))
    release.set()
    qtbot.waitUntil(lambda: not runner.is_busy, timeout=5000)
    assert done == [("new", main)]  # delivered on the GUI thread, the replaced result dropped
    assert sorted(ended) == ["done", "replaced"]


def test_cancel_and_errors(qtbot):
    runner = TaskRunner()
    errors, ended = [], []
    runner.task_ended.connect(lambda key, label, how: ended.append(how))

    def waits(progress, should_stop):
        while not should_stop():
            time.sleep(0.002)
        raise RuntimeError("stopped by request")

    runner.submit("a", "waits", waits, on_done=lambda r: pytest.fail("no result expected"),
                  on_error=errors.append)
    runner.cancel("a")
    qtbot.waitUntil(lambda: not runner.is_busy, timeout=5000)
    assert ended == ["cancelled"] and errors == []

    def fails(progress, should_stop):
        raise ValueError("bad value")

    runner.submit("b", "fails", fails, on_error=errors.append)
    qtbot.waitUntil(lambda: not runner.is_busy, timeout=5000)
    assert len(errors) == 1 and isinstance(errors[0], ValueError)
    assert "bad value" in errors[0].__saedkit_traceback__


def test_synchronous_mode_runs_at_once():
    runner = TaskRunner(synchronous=True)
    out = []
    runner.submit("x", "now", lambda p, s: 42, on_done=out.append)
    assert out == [42] and not runner.is_busy


def test_emit_keeps_the_reference_count_of_true():
    import sys

    from PySide6.QtCore import QObject, Signal

    from saedkit.gui._compat import emit

    class Source(QObject):
        moved = Signal(float, float)

    src = Source()
    got = []
    src.moved.connect(lambda x, y: got.append(x))
    before = sys.getrefcount(True)
    for i in range(3000):  # a mouse moving over the pattern emits this often
        emit(src.moved, float(i), 0.0)
    assert len(got) == 3000
    assert abs(sys.getrefcount(True) - before) < 20
