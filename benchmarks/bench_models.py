"""Benchmark of areamap.models.fit_car: BYM2 with 2 covariates on queen grids of 10,000 and 100,000 areas.

Run:  .venv/bin/python benchmarks/bench_models.py [--sizes 10000,100000] [--mcmc]

Each size runs in a fresh subprocess that reports wall time (split into graph constants, fit) and its
peak resident memory (resource.getrusage, ru_maxrss). Targets: <= 10 s for 10,000 areas, <= 120 s for
100,000 areas, each within 4 GB peak memory. Prints ratios to the targets. With --mcmc, and when
benchmarks/_mcmc_reference.py and its library are importable, also times a general-purpose MCMC sampler
on the same model with 900 areas and prints the ratio.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time

TARGETS = {10_000: 10.0, 100_000: 120.0}
MEMORY_LIMIT_MB = 4096.0


def queen_grid(nrow: int, ncol: int):
    """Queen-contiguity AreaGraph of an nrow x ncol lattice, built with sparse matrices."""
    import numpy as np
    import scipy.sparse as sp

    from areamap.graphs import AreaGraph

    def band(m):
        return sp.diags([np.ones(m - 1), np.ones(m - 1)], [-1, 1], shape=(m, m))

    tr, tc = band(nrow), band(ncol)
    ir, ic = sp.eye(nrow), sp.eye(ncol)
    adj = sp.kron(tr, ic) + sp.kron(ir, tc) + sp.kron(tr, tc)
    ids = [f"d{i:06d}" for i in range(nrow * ncol)]
    return AreaGraph.from_adjacency(ids, (adj != 0).astype(float), kind="queen")


def simulate(graph, seed: int = 20261202):
    """Counts from a smooth spatial field + 2 covariates; expected counts 2-20 per area."""
    import numpy as np

    rng = np.random.default_rng(seed)
    n = graph.n
    w = graph.weights("row")
    field = rng.normal(size=n)
    for _ in range(5):
        field = w @ field
    field = 0.3 * field / field.std() + 0.1 * rng.normal(size=n)
    x = rng.normal(size=(n, 2))
    e = rng.uniform(2.0, 20.0, n)
    y = rng.poisson(e * np.exp(field + x @ np.array([0.15, -0.1])))
    return y.astype(float), e, x


def _child(n: int) -> None:
    import resource

    import numpy as np

    from areamap.models import fit_car

    side = int(round(np.sqrt(n)))
    t0 = time.perf_counter()
    g = queen_grid(side, side)
    y, e, x = simulate(g)
    t1 = time.perf_counter()
    fit = fit_car(y, e, g, covariates=x)
    t2 = time.perf_counter()
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    d = fit._design
    print(json.dumps({
        "n": g.n, "setup_s": t1 - t0, "fit_s": t2 - t1, "peak_mb": peak_mb,
        "design_points": fit.n_design_points, "laplace_evaluations": d.n_evaluations,
        "coef": fit.coefficients["mean"].round(4).tolist(),
        "sigma": float(fit.hyperparameters.loc["sigma", "mean"]),
        "phi": float(fit.hyperparameters.loc["phi", "mean"]),
    }))


def _warm() -> None:
    """Compile the numba kernels once (cached on disk) so timings exclude compilation."""
    from areamap.models import fit_car

    g = queen_grid(6, 6)
    y, e, x = simulate(g)
    fit_car(y, e, g, covariates=x)


def _mcmc(n_side: int = 30) -> None:
    import importlib.util
    from pathlib import Path

    path = Path(__file__).with_name("_mcmc_reference.py")
    if not path.exists():
        print("MCMC comparison skipped: benchmarks/_mcmc_reference.py is not present.")
        return
    spec = importlib.util.spec_from_file_location("_mcmc_reference", path)
    mod = importlib.util.module_from_spec(spec)
    try:
        spec.loader.exec_module(mod)
    except ImportError as exc:
        print(f"MCMC comparison skipped: {exc}. Install the probabilistic-programming library named in "
              "benchmarks/_mcmc_reference.py and rerun with --mcmc.")
        return
    from areamap.models import fit_car

    g = queen_grid(n_side, n_side)
    y, e, x = simulate(g)
    t0 = time.perf_counter()
    fit_car(y, e, g, covariates=x)
    t_fit = time.perf_counter() - t0
    runner = getattr(mod, "time_bym2", None) or getattr(mod, "run", None)
    if runner is None:
        print("MCMC comparison skipped: _mcmc_reference.py has no time_bym2(...) or run(...) function.")
        return
    try:
        t_mcmc = runner(y=y, expected=e, graph=g, covariates=x)
    except Exception as exc:  # noqa: BLE001 - report whatever the optional backend raised
        print(f"MCMC comparison skipped: the sampler failed ({type(exc).__name__}: {exc}).")
        return
    if isinstance(t_mcmc, dict):
        t_mcmc = t_mcmc.get("seconds", t_mcmc.get("time_s"))
    print(f"{g.n} areas: fit_car {t_fit:.2f} s, MCMC {float(t_mcmc):.1f} s, ratio {float(t_mcmc) / t_fit:.0f}x")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="10000,100000")
    ap.add_argument("--mcmc", action="store_true", help="also time the MCMC reference sampler (900 areas)")
    ap.add_argument("--child", type=int, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--warm", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.warm:
        _warm()
        return 0
    if args.child:
        _child(args.child)
        return 0
    subprocess.run([sys.executable, __file__, "--warm"], check=True)
    print(f"{'areas':>8} {'fit s':>8} {'target s':>8} {'ratio':>6} {'peak MB':>8} {'mem ratio':>9} "
          f"{'points':>6} {'evals':>6}")
    for n in [int(s) for s in args.sizes.split(",") if s]:
        out = subprocess.run([sys.executable, __file__, "--child", str(n)], capture_output=True, text=True)
        if out.returncode != 0:
            print(f"{n:>8} failed:\n{out.stderr[-2000:]}")
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        tgt = TARGETS.get(n, float("nan"))
        print(f"{r['n']:>8} {r['fit_s']:>8.2f} {tgt:>8.0f} {r['fit_s'] / tgt:>6.2f} {r['peak_mb']:>8.0f} "
              f"{r['peak_mb'] / MEMORY_LIMIT_MB:>9.2f} {r['design_points']:>6} {r['laplace_evaluations']:>6}"
              f"   (sigma {r['sigma']:.3f}, phi {r['phi']:.3f}, coef {r['coef']})")
    if args.mcmc:
        _mcmc()
    else:
        print("MCMC comparison not run (add --mcmc; needs benchmarks/_mcmc_reference.py and its library).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
