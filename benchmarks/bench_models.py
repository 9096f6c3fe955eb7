"""Benchmark of areamap.models.fit_car: BYM2 with 2 covariates on queen grids of 10,000 and 100,000 areas.

Run:  .venv/bin/python benchmarks/bench_models.py [--sizes 10000,100000] [--old main] [--profile] [--mcmc]

Each size runs in a fresh subprocess that reports wall time (split into graph constants, fit) and its
peak resident memory (resource.getrusage, ru_maxrss). Targets: <= 3 s for 10,000 areas, <= 45 s for
100,000 areas, each within 2 GB peak memory. Prints ratios to the targets and the load average.

With --old REF (default: main) each size is also fitted, back to back in the same run, by the engine of
the git revision REF (exported with ``git archive`` to a temporary folder and put first on PYTHONPATH),
and the ratio old / new is printed; ``--old ""`` skips it. --profile prints where the time of the new
engine goes (cProfile, top functions by own time). With --mcmc, and when benchmarks/_mcmc_reference.py
and its library are importable, also times a general-purpose MCMC sampler on the same model with 900
areas and prints the ratio.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

from _revision import export_revision

TARGETS = {10_000: 3.0, 100_000: 45.0}
MEMORY_LIMIT_MB = 2048.0


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
    smooth = rng.normal(size=n)
    for _ in range(3):
        smooth = w @ smooth
    smooth = (smooth - smooth.mean()) / smooth.std()
    # BYM2-like area effect: sigma = 0.35, spatial share 0.6
    field = 0.35 * (np.sqrt(0.6) * smooth + np.sqrt(0.4) * rng.normal(size=n))
    x = rng.normal(size=(n, 2))
    e = rng.uniform(2.0, 20.0, n)
    y = rng.poisson(e * np.exp(field + x @ np.array([0.15, -0.1])))
    return y.astype(float), e, x


def _child(n: int, profile: bool = False) -> None:
    import resource

    import numpy as np

    import areamap
    from areamap.models import fit_car

    side = int(round(np.sqrt(n)))
    t0 = time.perf_counter()
    g = queen_grid(side, side)
    y, e, x = simulate(g)
    t1 = time.perf_counter()
    c1 = time.process_time()
    if profile:
        import cProfile
        import io
        import pstats

        prof = cProfile.Profile()
        prof.enable()
    fit = fit_car(y, e, g, covariates=x)
    t2 = time.perf_counter()
    cpu = time.process_time() - c1
    if profile:
        prof.disable()
        buf = io.StringIO()
        stats = pstats.Stats(prof, stream=buf)
        stats.sort_stats("tottime").print_stats(14)
        print(buf.getvalue(), file=sys.stderr)
        print(_breakdown(stats, t2 - t1), file=sys.stderr)
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    d = fit._design
    print(json.dumps({"engine": str(Path(areamap.__file__).parent),
        "n": g.n, "setup_s": t1 - t0, "fit_s": t2 - t1, "cpu_s": cpu, "peak_mb": peak_mb,
        "design_points": fit.n_design_points, "laplace_evaluations": d.n_evaluations,
        "coef": fit.coefficients["mean"].round(4).tolist(),
        "sigma": float(fit.hyperparameters.loc["sigma", "mean"]),
        "phi": float(fit.hyperparameters.loc["phi", "mean"]),
    }))


#: where a fit's time goes: (label, file suffix, function name, own time only?)
_PARTS = [
    ("numeric factorizations (CHOLMOD)", "~", "<built-in method cvxopt.cholmod.numeric>", True),
    ("triangular solves (CHOLMOD)", "~", "<built-in method cvxopt.cholmod.solve>", True),
    ("selected inversion (marginal variances)", "_sparse.py", "selected_inverse", False),
    ("Schur complement of the closed-form block", "_sparse.py", "_schur_data", False),
    ("Laplace evaluations, all (nested: includes the rows above)", "_car_engine.py", "laplace", False),
    ("graph constants and PC prior of phi", "_car_engine.py", "__init__", False),
    ("mixture quantiles of the relative risks", "_car_engine.py", "mixture_quantiles", False),
    ("model criteria (DIC, WAIC, predictive mid-p)", "models.py", "_criteria", False),
    ("hyperparameter marginals", "_car_engine.py", "hyper_marginals", False),
]


def _breakdown(stats, total: float) -> str:
    """Share of the fit's wall time per part (cumulative times from cProfile; rows may nest)."""
    from areamap import _car_engine

    graph_init = _car_engine._GraphStructure.__init__.__code__.co_firstlineno
    lines = [f"breakdown of {total:.2f} s (cProfile; profiling adds overhead):"]
    for label, suffix, name, own in _PARTS:
        sec, calls = 0.0, 0
        for (path, _line, func), (_cc, nc, tt, ct, _callers) in stats.stats.items():
            if func == name and (suffix == "~" and path == "~" or path.endswith(suffix)):
                if name == "__init__" and _line != graph_init:
                    continue  # only _GraphStructure.__init__
                sec += tt if own else ct
                calls += nc
        lines.append(f"  {label:<60} {sec:8.2f} s {100 * sec / total:5.1f} %  ({calls} calls)")
    return "\n".join(lines)


def _run(args: list[str], pythonpath: str | None = None) -> subprocess.CompletedProcess:
    """Run this script in a subprocess, with ``pythonpath`` (an exported old engine) first on the path."""
    env = dict(os.environ)
    if pythonpath:
        env["PYTHONPATH"] = pythonpath + os.pathsep + env.get("PYTHONPATH", "")
    return subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True, env=env)


def _warm() -> None:
    """Compile the numba kernels once (cached on disk) so timings exclude compilation."""
    from areamap.models import fit_car

    g = queen_grid(6, 6)
    y, e, x = simulate(g)
    fit_car(y, e, g, covariates=x)


def _mcmc(n_side: int = 30) -> None:
    """Time the reference engineer's MCMC sampler and fit_car on the same simulated 900-area data.

    The sampler's library is not an areamap dependency. It is imported in this process when
    available; otherwise, if the environment variable AREAMAP_MCMC_PYTHON names a Python that has it
    (e.g. /work/refenv/bin/python), the sampler runs there in a subprocess.
    """
    import importlib.util
    import os
    from pathlib import Path

    import numpy as np

    from areamap.graphs import AreaGraph
    from areamap.models import fit_car

    path = Path(__file__).with_name("_mcmc_reference.py")
    if not path.exists():
        print("MCMC comparison skipped: benchmarks/_mcmc_reference.py is not present.")
        return
    spec = importlib.util.spec_from_file_location("_mcmc_reference", path)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    data = mod.simulate_grid_data(n_side=n_side, seed=0)
    n = data["adjacency"].shape[0]
    g = AreaGraph.from_adjacency([f"a{i}" for i in range(n)], data["adjacency"])
    t0 = time.perf_counter()
    fit_car(np.asarray(data["observed"], float), np.asarray(data["expected"], float), g,
            covariates=np.asarray(data["covariates"], float))
    t_fit = time.perf_counter() - t0
    try:
        res = mod.time_mcmc_bym2(n_side=n_side, seed=0)
    except ImportError:
        other = os.environ.get("AREAMAP_MCMC_PYTHON")
        if not other:
            print(f"MCMC comparison skipped: the sampler's library is not installed here. fit_car took "
                  f"{t_fit:.2f} s on {n} areas. To compare, set AREAMAP_MCMC_PYTHON to a Python with "
                  "numpyro and jax (see benchmarks/_mcmc_reference.py) and rerun with --mcmc.")
            return
        code = ("import json, sys; sys.path.insert(0, sys.argv[1]); import _mcmc_reference as m; "
                f"r = m.time_mcmc_bym2(n_side={n_side}, seed=0); "
                "print(json.dumps({k: r[k] for k in ('seconds', 'ess_min')}))")
        out = subprocess.run([other, "-c", code, str(path.parent)], capture_output=True, text=True)
        if out.returncode != 0:
            print(f"MCMC comparison skipped: the sampler failed in {other}:\n{out.stderr[-1500:]}")
            return
        res = json.loads(out.stdout.strip().splitlines()[-1])
    t_mcmc = float(res["seconds"])
    print(f"{n} areas: fit_car {t_fit:.2f} s, MCMC (NUTS, min bulk ESS {float(res['ess_min']):.0f}) "
          f"{t_mcmc:.1f} s, ratio {t_mcmc / t_fit:.0f}x")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="10000,100000")
    ap.add_argument("--mcmc", action="store_true", help="also time the MCMC reference sampler (900 areas)")
    ap.add_argument("--old", default="main", help="git revision whose engine is timed back to back "
                    "with the working tree (empty: skip)")
    ap.add_argument("--profile", action="store_true", help="print where the new engine's time goes")
    ap.add_argument("--child", type=int, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--warm", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.warm:
        _warm()
        return 0
    if args.child:
        _child(args.child, args.profile)
        return 0
    old_path = export_revision(args.old) if args.old else None
    try:
        engines = [("new", None)] + ([(f"old ({args.old})", old_path)] if old_path else [])
        for _, path in engines:
            out = _run(["--warm"], path)
            if out.returncode != 0:
                print(f"warm-up failed:\n{out.stderr[-2000:]}")
                return 1
        print(f"load average at start: {' '.join(f'{v:.1f}' for v in os.getloadavg())} "
              "(shared machine: compare old and new within this run)")
        print(f"{'areas':>8} {'engine':<12} {'fit s':>8} {'cpu s':>8} {'target s':>8} {'ratio':>6} {'peak MB':>8} "
              f"{'mem ratio':>9} {'points':>6} {'evals':>6} {'load':>5}")
        for n in [int(s) for s in args.sizes.split(",") if s]:
            walls = {}
            for name, path in engines:
                load = os.getloadavg()[0]
                child = ["--child", str(n)] + (["--profile"] if args.profile and path is None else [])
                out = _run(child, path)
                if out.returncode != 0:
                    print(f"{n:>8} {name:<12} failed:\n{out.stderr[-2000:]}")
                    continue
                r = json.loads(out.stdout.strip().splitlines()[-1])
                walls[name] = r["fit_s"]
                tgt = TARGETS.get(n, float("nan"))
                print(f"{r['n']:>8} {name:<12} {r['fit_s']:>8.2f} {r['cpu_s']:>8.2f} {tgt:>8.0f} {r['fit_s'] / tgt:>6.2f} "
                      f"{r['peak_mb']:>8.0f} {r['peak_mb'] / MEMORY_LIMIT_MB:>9.2f} {r['design_points']:>6} "
                      f"{r['laplace_evaluations']:>6} {load:>5.1f}"
                      f"   (sigma {r['sigma']:.4f}, phi {r['phi']:.4f}, coef {r['coef']})")
                if args.profile and path is None:
                    print(out.stderr[-6000:])
            if len(walls) == 2:
                old_s = walls[engines[1][0]]
                print(f"{'':>8} old / new wall time: {old_s / walls['new']:.2f}")
    finally:
        if old_path:
            shutil.rmtree(old_path, ignore_errors=True)
    if args.mcmc:
        _mcmc()
    else:
        print("MCMC comparison not run (add --mcmc; needs benchmarks/_mcmc_reference.py and its library).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
