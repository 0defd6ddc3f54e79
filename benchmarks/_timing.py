"""Timing helper shared by the benchmark scripts (they run with benchmarks/ on sys.path)."""

from __future__ import annotations

import time
from typing import Any, Callable


def best_of(fn: Callable[[], Any], repeat: int = 3) -> tuple[float, Any]:
    """Smallest wall time of ``repeat`` calls of ``fn`` (the least disturbed by a shared machine),
    and the last result."""
    best = float("inf")
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out
