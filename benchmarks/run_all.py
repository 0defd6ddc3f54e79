"""Run every benchmark under benchmarks/ and print its figures.

Each ``bench_*.py`` is a script with a ``main()`` that measures its own
baseline in the same process and prints each figure as a ratio to it: the
machines are shared and noisy, so a bare time means little.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path


def main() -> int:
    here = Path(__file__).resolve().parent
    scripts = sorted(here.glob("bench_*.py"))
    only = sys.argv[1:]
    failed = []
    for script in scripts:
        if only and not any(o in script.stem for o in only):
            continue
        print(f"=== {script.stem} ===", flush=True)
        t0 = time.perf_counter()
        res = subprocess.run([sys.executable, str(script)])
        print(f"--- {script.stem}: {time.perf_counter() - t0:.1f} s, exit {res.returncode}\n", flush=True)
        if res.returncode:
            failed.append(script.stem)
    if failed:
        print("failed:", ", ".join(failed))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
