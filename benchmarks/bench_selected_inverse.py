"""Benchmark of the selected inverse (marginal variances) of the CAR engine's sparse Cholesky.

Run:  .venv/bin/python benchmarks/bench_selected_inverse.py [--sizes 10000,100000] [--repeat 3]

On the BYM2 posterior precision (unstructured and structured effects, intercept and 2 coefficients) of
queen grids of 10,000 and 99,856 areas, times back to back in one process:

* old: the column-wise route (up-looking numba refactorization of the last factorized values, then the
  column-wise Takahashi recursions ``_takahashi``), the kernels that served ``selected_inverse`` before;
* new: ``SparseCholesky.selected_inverse()`` as it is now (the same column-wise factor, computed in
  parallel over subtrees of the elimination tree, then blocked recursions on relaxed supernodes), on
  numba's default number of threads and on one thread.

Prints the best wall time of ``--repeat`` runs and the CPU seconds of each route, the ratio old / new,
the largest difference between the two results relative to the largest entry, the load average and the
peak resident memory. The 2x target of issue 13 is printed as a ratio (new time x 2 / old time <= 1).
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_models import queen_grid  # noqa: E402


def bym2_precision(side: int, seed: int = 20261202):
    """The engine's latent model on a side x side queen grid and values of its posterior precision."""
    import numpy as np

    import areamap._car_engine as eng

    g = queen_grid(side, side)
    rng = np.random.default_rng(seed)
    n = g.n
    e = rng.uniform(2.0, 20.0, n)
    y = rng.poisson(e).astype(float)
    x = rng.normal(size=(n, 2))
    lm = eng._LatentModel("bym2", y, e, x, eng._GraphStructure(g.adjacency),
                          intercept_sd=5.0, coefficient_sd=5.0)
    theta = np.array([np.log(0.35), 0.6])
    # Poisson curvature E exp(eta) at a plausible eta around 0
    w = e * np.exp(0.3 * rng.normal(size=n))
    data = lm._prior_data(theta) + np.bincount(
        lm._pos, weights=lm._products(theta) * np.tile(w, len(lm._pairs)), minlength=lm.chol.n_upper)
    return lm.chol, data


def _timed(fn, repeat):
    best, cpu = np.inf, np.inf
    out = None
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        best = min(best, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
    return out, best, cpu


def main(argv=None) -> int:
    global np
    import numba as nb
    import numpy as np

    from areamap import _sparse

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="10000,100000")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    print(f"load average at start: {os.getloadavg()[0]:.2f}")
    for size in (int(s) for s in args.sizes.split(",")):
        side = int(round(np.sqrt(size)))
        chol, data = bym2_precision(side)
        assert chol.factorize_data(data) == -1
        n = chol.n
        _, lp, li, rp, rc, rpos = chol._symbolic()

        def old():
            lx = np.zeros(int(lp[-1]))
            _sparse._numeric_rows(n, chol._ap, chol._ai, data, lp, li, rp, rc, rpos, lx)
            return _sparse._takahashi(n, lp, li, lx)

        def new():
            chol._lx = None  # as after a new factorization: the column-wise factor is recomputed
            return chol.selected_inverse()

        t0 = time.perf_counter()
        chol._supernodal()  # once per pattern, like the symbolic analysis
        t_setup = time.perf_counter() - t0
        old(), new()  # compile / warm up
        sx_old, w_old, c_old = _timed(old, args.repeat)
        sx_new, w_new, c_new = _timed(new, args.repeat)
        threads = nb.get_num_threads()
        nb.set_num_threads(1)
        try:
            sx_one, w_one, c_one = _timed(new, args.repeat)
        finally:
            nb.set_num_threads(threads)
        diff = float(np.max(np.abs(sx_new - sx_old)) / np.max(np.abs(sx_old)))
        d = lp[:-1]
        diag = float(np.max(np.abs(sx_new[d] - sx_old[d]) / sx_old[d]))
        sup = chol._supernodal()
        print(f"{side}x{side} grid ({side * side} areas, latent size {n}, nnz(L) {int(lp[-1])}, "
              f"{sup.starts.size - 1} supernodes, blocks {int(sup.off[-1])} entries, setup {t_setup:.2f} s):")
        print(f"  old {w_old:.3f} s wall ({c_old:.3f} s CPU); new {w_new:.3f} s wall ({c_new:.3f} s CPU) on "
              f"{threads} threads, {w_one:.3f} s wall ({c_one:.3f} s CPU) on 1 thread")
        print(f"  old / new {w_old / w_new:.2f} ({w_old / w_one:.2f} on 1 thread); ratio to the 2x target "
              f"{2.0 * w_new / w_old:.2f}; max |new - old| / max |old| {diff:.1e}, diagonal {diag:.1e}; "
              f"1 thread bit-identical: {bool(np.array_equal(sx_one, sx_new))}")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(f"peak memory {peak:.0f} MB; load average at end: {os.getloadavg()[0]:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
