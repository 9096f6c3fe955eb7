"""Time the smoothers of areamap.smoothing on square lattices of growing size.

Run: .venv/bin/python benchmarks/bench_smoothing.py [--quick]
Prints, per lattice size: areas, links, seconds per call for each smoother, and the ratio of the time at
this size to the time at the previous (10x smaller) size - about 10 means linear scaling.
"""

from __future__ import annotations

import platform
import sys
import time
import warnings

import numpy as np
import scipy.sparse as sp

from areamap.graphs import AreaGraph
from areamap.smoothing import global_eb_rates, local_eb_rates, poisson_gamma_eb, spatial_window_rates


def lattice(side: int) -> AreaGraph:
    """Queen lattice side x side, built directly as a sparse matrix."""
    n = side * side
    idx = np.arange(n).reshape(side, side)
    pairs = [
        (idx[:, :-1], idx[:, 1:]),
        (idx[:-1, :], idx[1:, :]),
        (idx[:-1, :-1], idx[1:, 1:]),
        (idx[:-1, 1:], idx[1:, :-1]),
    ]
    a = np.concatenate([p[0].ravel() for p in pairs])
    b = np.concatenate([p[1].ravel() for p in pairs])
    m = sp.csr_array((np.ones(2 * a.size), (np.r_[a, b], np.r_[b, a])), shape=(n, n))
    return AreaGraph.from_adjacency([f"a{i}" for i in range(n)], m, kind="queen")


def best_of(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    sides = [32, 100] if quick else [32, 100, 316]
    rng = np.random.default_rng(20261202)
    print(f"python {platform.python_version()} on {platform.machine()} ({platform.processor() or 'cpu'})")
    print(f"{'areas':>8} {'links':>8} {'global':>9} {'local':>9} {'window':>9} {'poisson-gamma':>14}")
    previous = None
    for side in sides:
        g = lattice(side)
        pop = rng.integers(500, 50_000, g.n).astype(float)
        cases = rng.poisson(pop * 1e-3 * rng.gamma(5.0, 0.2, g.n)).astype(float)
        expected = pop * cases.sum() / pop.sum()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t = {
                "global": best_of(lambda: global_eb_rates(cases, pop), 5),
                "local": best_of(lambda: local_eb_rates(cases, pop, g), 5),
                "window": best_of(lambda: spatial_window_rates(cases, pop, g), 5),
                "pg": best_of(lambda: poisson_gamma_eb(cases, expected), 3),
            }
        print(
            f"{g.n:>8} {g.adjacency.nnz // 2:>8} {t['global']:>8.4f}s {t['local']:>8.4f}s "
            f"{t['window']:>8.4f}s {t['pg']:>13.4f}s"
        )
        if previous is not None:
            ratios = "  ".join(f"{k} x{t[k] / previous[k]:.1f}" for k in t)
            print(f"{'':>8} time ratio vs previous size (~10x areas): {ratios}")
        previous = t
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
