"""Time the vectorised rate functions on many areas.

Run: .venv/bin/python benchmarks/bench_rates.py [--quick] [n_areas]
Prints seconds per call and microseconds per area, then the cost of mid-p limits relative to exact ones.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from areamap.rates import direct_standardized_rate, expected_counts, poisson_interval, standardized_ratio


def _time(label: str, n: int, fn) -> float:
    fn()  # warm-up
    t0 = time.perf_counter()
    reps = 3
    for _ in range(reps):
        fn()
    dt = (time.perf_counter() - t0) / reps
    print(f"{label:<42} {n:>8} areas  {dt:8.4f} s  ({1e6 * dt / n:.2f} us per area)")
    return dt


def main(n: int) -> None:
    rng = np.random.default_rng(1)
    ages = 18
    pop = rng.integers(50, 5_000, (n, ages)).astype(float)
    cases = rng.poisson(pop * 1e-3).astype(float)
    obs = cases.sum(axis=1)
    exp = expected_counts(cases, pop)
    std = rng.integers(1_000, 9_000, ages).astype(float)
    _time("expected_counts (18 age groups)", n, lambda: expected_counts(cases, pop))
    t_exact = _time("poisson_interval exact", n, lambda: poisson_interval(obs))
    t_midp = _time("poisson_interval mid-p (bisection)", n, lambda: poisson_interval(obs, method="mid-p"))
    distinct = np.arange(n, dtype=float)  # worst case: every count different
    _time("poisson_interval mid-p, all counts distinct", n, lambda: poisson_interval(distinct, method="mid-p"))
    _time("standardized_ratio exact", n, lambda: standardized_ratio(obs, exp))
    _time("direct_standardized_rate (18 age groups)", n, lambda: direct_standardized_rate(cases, pop, std))
    print(f"mid-p / exact time ratio (typical counts): {t_midp / t_exact:.1f}")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if a != "--quick"]
    default = 10_000 if "--quick" in sys.argv[1:] else 100_000
    main(int(args[0]) if args else default)
