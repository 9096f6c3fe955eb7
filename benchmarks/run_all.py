"""Run every benchmark script in this folder, one after another, and print their reports.

Usage: ``.venv/bin/python benchmarks/run_all.py [--quick]``. Figures are recorded by hand in docs/performance.md
(date, machine, command). Benchmarks never run as part of the test suite: machines are shared and noisy, so each
script compares ratios measured within one run.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).parent


def main() -> int:
    scripts = sorted(p for p in HERE.glob("bench_*.py"))
    extra = sys.argv[1:]
    status = 0
    for script in scripts:
        print(f"=== {script.name} ===", flush=True)
        rc = subprocess.call([sys.executable, str(script), *extra])
        status = status or rc
    return status


if __name__ == "__main__":
    raise SystemExit(main())
