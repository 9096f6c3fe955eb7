"""Time the demo writer and the input readers.

Run: .venv/bin/python benchmarks/bench_intake.py [--quick] [n_rows]
Prints seconds for write_demo / load_study on the demo region, then read_cases on a synthetic counts file
(n_rows rows: 5,000 areas x 52 weeks x 3 age groups sampled) with seconds, rows per second and file size.
"""

from __future__ import annotations

import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from areamap.config import load_config
from areamap.demo import write_demo
from areamap.intake import load_study, read_cases


def _time(label: str, fn, reps: int = 3) -> float:
    fn()  # warm-up (imports, GDAL drivers)
    t0 = time.perf_counter()
    for _ in range(reps):
        fn()
    dt = (time.perf_counter() - t0) / reps
    print(f"{label:<46} {dt:8.3f} s")
    return dt


def main(n_rows: int) -> None:
    tmp = Path(tempfile.mkdtemp(prefix="bench-intake-"))
    _time("write_demo (171 districts, 30 weeks)", lambda: write_demo(tmp / "demo"))
    cfg = load_config(tmp / "demo" / "run.toml")
    _time("load_study on the demo", lambda: load_study(cfg))

    rng = np.random.default_rng(1)
    frame = pd.DataFrame({
        "area_id": [f"A{i:05d}" for i in rng.integers(0, 5_000, n_rows)],
        "week": [f"2026-W{w:02d}" for w in rng.integers(1, 53, n_rows)],
        "age_group": rng.choice(["0-14", "15-64", "65+"], n_rows),
        "cases": rng.integers(0, 20, n_rows),
    }).drop_duplicates(["area_id", "week", "age_group"])
    path = tmp / "cases.csv"
    frame.to_csv(path, index=False)
    rows = len(frame)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dt = _time(f"read_cases, {rows:,} rows", lambda: read_cases(path, age_column="age_group"), reps=1)
    print(f"read_cases throughput: {rows / dt:,.0f} rows/s; file {path.stat().st_size / 1e6:.1f} MB")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if a != "--quick"]
    default = 50_000 if "--quick" in sys.argv[1:] else 500_000
    main(int(args[0]) if args else default)
