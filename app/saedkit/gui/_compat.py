"""Work-arounds for known faults of the Qt binding.

PySide6 6.12 (at least) returns the result of ``SignalInstance.emit()`` (a
bool) without taking a reference to it. On Python < 3.12, where ``True`` and
``False`` are ordinary reference-counted objects, every ``emit()`` from
Python then takes one reference away from ``True``; after a few thousand
emits (a mouse moving over the pattern emits on every move) the interpreter
aborts with "bool_dealloc: deallocating True or False". :func:`emit` calls
``emit()`` and gives the reference back when the fault is present; the fault
is detected once, at import, so a fixed PySide6 (or Python ≥ 3.12, whose
``True`` is immortal) costs nothing.
"""

from __future__ import annotations

import ctypes
import sys

from PySide6.QtCore import QObject, Signal

__all__ = ["emit", "EMIT_LEAKS_RESULT"]


class _Probe(QObject):
    ping = Signal()


def _emit_leaks_result() -> bool:
    probe = _Probe()
    before = sys.getrefcount(True)
    for _ in range(16):
        probe.ping.emit()
    after = sys.getrefcount(True)
    leaked = before - after
    if leaked > 0:  # put back what the probe took
        for _ in range(leaked):
            ctypes.pythonapi.Py_IncRef(ctypes.py_object(True))
    return leaked >= 8


EMIT_LEAKS_RESULT = _emit_leaks_result()

_incref = ctypes.pythonapi.Py_IncRef
_incref.argtypes = [ctypes.py_object]
_incref.restype = None


def emit(signal, *args) -> None:
    """``signal.emit(*args)``, keeping the reference counts of True/False right."""
    result = signal.emit(*args)
    if EMIT_LEAKS_RESULT and (result is True or result is False):
        _incref(result)
