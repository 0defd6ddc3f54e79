"""Long work off the GUI thread: a task runner on a QThreadPool.

A task is a plain callable ``fn(progress, should_stop)`` that calls a core
function and returns its result; it never touches a widget. The runner runs
it on a pool thread and brings ``progress``, the result and any exception
back to the GUI thread as Qt signals (queued across threads).

Tasks are submitted under a *key* ("spots", "search", ...). A newer task
with the same key replaces the older one: the older is asked to stop
(``should_stop()`` turns True) and its result, if it still arrives, is
dropped. :meth:`TaskRunner.cancel` stops tasks on request. With
``synchronous=True`` (tests) a task runs at once in the calling thread.
"""

from __future__ import annotations

import os
import sys
import threading
import time
import traceback
from dataclasses import dataclass, field
from typing import Any, Callable

from PySide6.QtCore import QObject, QRunnable, QThreadPool, Signal, Slot

from saedkit.gui._compat import emit

__all__ = ["TaskRunner", "TaskCancelled", "TaskInfo"]

_PROGRESS_INTERVAL_S = 0.05


class TaskCancelled(Exception):
    """Raised inside a task (or reported for it) when it was asked to stop."""


@dataclass
class TaskInfo:
    """Book-keeping of one submitted task."""

    job_id: int
    key: str
    label: str
    on_done: Callable[[Any], None] | None
    on_error: Callable[[BaseException], None] | None
    stop: threading.Event = field(default_factory=threading.Event)
    started: float = field(default_factory=time.perf_counter)
    done: int = 0
    total: int = 0


class _Signals(QObject):
    progress = Signal(int, int, int)  # job id, done, total
    finished = Signal(int, object)  # job id, result
    errored = Signal(int, object, str)  # job id, exception, formatted traceback


class _Job(QRunnable):
    def __init__(self, info: TaskInfo, fn: Callable, signals: _Signals) -> None:
        super().__init__()
        self.setAutoDelete(True)
        self._info = info
        self._fn = fn
        self._signals = signals

    def run(self) -> None:  # pool thread
        _lower_thread_priority()
        _execute(self._info, self._fn, self._signals)


_LOWERED: set[int] = set()


def _lower_thread_priority() -> None:
    """Give this worker thread a lower scheduling priority than the GUI thread (Linux: per-thread nice).

    Keeps the window responsive when the machine is busy; the work still gets
    the CPU whenever the GUI thread is idle.
    """
    if not sys.platform.startswith("linux"):
        return
    tid = threading.get_native_id()
    if tid in _LOWERED:
        return
    _LOWERED.add(tid)
    try:
        os.setpriority(os.PRIO_PROCESS, tid, min(19, os.getpriority(os.PRIO_PROCESS, tid) + 5))
    except OSError:
        pass


def _execute(info: TaskInfo, fn: Callable, signals: _Signals) -> None:
    last = [0.0]

    def progress(done: int, total: int) -> None:
        now = time.perf_counter()
        if now - last[0] >= _PROGRESS_INTERVAL_S or done >= total:
            last[0] = now
            emit(signals.progress, info.job_id, int(done), int(total))

    def should_stop() -> bool:
        return info.stop.is_set()

    try:
        if info.stop.is_set():
            raise TaskCancelled(info.label)
        result = fn(progress, should_stop)
    except BaseException as exc:  # noqa: BLE001 - every failure goes back to the GUI thread
        emit(signals.errored, info.job_id, exc, traceback.format_exc())
        return
    emit(signals.finished, info.job_id, result)


class TaskRunner(QObject):
    """Runs tasks on a thread pool and reports back on the GUI thread.

    Signals
    -------
    busy_changed(bool)
        True when the first task starts, False when the last one ends.
    task_started(str key, str label)
    task_progress(str label, int done, int total)
    task_ended(str key, str label, str outcome)
        ``outcome`` is ``"done"``, ``"failed"``, ``"cancelled"`` or ``"replaced"``.
    """

    busy_changed = Signal(bool)
    task_started = Signal(str, str)
    task_progress = Signal(str, int, int)
    task_ended = Signal(str, str, str)

    def __init__(self, parent: QObject | None = None, *, synchronous: bool = False, max_threads: int = 2) -> None:
        super().__init__(parent)
        self.synchronous = synchronous
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(max_threads)
        self._signals = _Signals()
        self._signals.progress.connect(self._on_progress)
        self._signals.finished.connect(self._on_finished)
        self._signals.errored.connect(self._on_errored)
        self._next_id = 1
        self._tasks: dict[int, TaskInfo] = {}
        self._latest: dict[str, int] = {}

    # -- public ------------------------------------------------------------ #

    @property
    def is_busy(self) -> bool:
        return bool(self._tasks)

    def running_labels(self) -> list[str]:
        return [t.label for t in self._tasks.values()]

    def submit(self, key: str, label: str, fn: Callable[[Callable, Callable], Any], *,
               on_done: Callable[[Any], None] | None = None,
               on_error: Callable[[BaseException], None] | None = None) -> int:
        """Run ``fn(progress, should_stop)``; call ``on_done(result)`` or ``on_error(exc)`` on the GUI thread.

        A running task with the same ``key`` is asked to stop and its result is dropped.
        Returns the task's id.
        """
        old = self._latest.get(key)
        if old is not None and old in self._tasks:
            self._tasks[old].stop.set()
        job_id = self._next_id
        self._next_id += 1
        info = TaskInfo(job_id, key, label, on_done, on_error)
        was_busy = self.is_busy
        self._tasks[job_id] = info
        self._latest[key] = job_id
        if not was_busy:
            emit(self.busy_changed, True)
        emit(self.task_started, key, label)
        if self.synchronous:
            _execute(info, fn, self._signals)
        else:
            self._pool.start(_Job(info, fn, self._signals))
        return job_id

    def cancel(self, key: str | None = None) -> None:
        """Ask the running task ``key`` (or every task) to stop."""
        for info in list(self._tasks.values()):
            if key is None or info.key == key:
                info.stop.set()

    def wait(self, timeout_ms: int = 30000) -> bool:
        """Block until the pool is idle (tests and shutdown); pending signals are not delivered."""
        return self._pool.waitForDone(timeout_ms)

    # -- slots (GUI thread) ------------------------------------------------- #

    def _end(self, info: TaskInfo, outcome: str) -> None:
        self._tasks.pop(info.job_id, None)
        if self._latest.get(info.key) == info.job_id:
            del self._latest[info.key]
        emit(self.task_ended, info.key, info.label, outcome)
        if not self._tasks:
            emit(self.busy_changed, False)

    @Slot(int, int, int)
    def _on_progress(self, job_id: int, done: int, total: int) -> None:
        info = self._tasks.get(job_id)
        if info is None or self._latest.get(info.key) != job_id:
            return
        info.done, info.total = done, total
        emit(self.task_progress, info.label, done, total)

    @Slot(int, object)
    def _on_finished(self, job_id: int, result: object) -> None:
        info = self._tasks.get(job_id)
        if info is None:
            return
        if self._latest.get(info.key) != job_id:
            self._end(info, "replaced")
            return
        if info.stop.is_set():
            self._end(info, "cancelled")
            return
        self._end(info, "done")
        if info.on_done is not None:
            info.on_done(result)

    @Slot(int, object, str)
    def _on_errored(self, job_id: int, exc: object, tb: str) -> None:
        info = self._tasks.get(job_id)
        if info is None:
            return
        if self._latest.get(info.key) != job_id:
            self._end(info, "replaced")
            return
        if info.stop.is_set() or isinstance(exc, TaskCancelled):
            self._end(info, "cancelled")
            return
        self._end(info, "failed")
        if isinstance(exc, BaseException):
            exc.__saedkit_traceback__ = tb  # type: ignore[attr-defined]
        if info.on_error is not None:
            info.on_error(exc)  # type: ignore[arg-type]
        else:
            raise exc  # type: ignore[misc]  # goes to the excepthook
