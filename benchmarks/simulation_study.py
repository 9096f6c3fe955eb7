"""Simulation study of areamap's CAR smoothing (``areamap.models.fit_car``) on grids with known risks.

For each scenario and replicate the script draws counts y_i ~ Poisson(E_i RR_i) from a known
relative-risk surface, fits the model, and compares the smoothed estimates with the truth:

* coverage: share of areas whose true RR lies inside the reported 95% interval (rr_low, rr_high);
  a well-calibrated method gives about 95% (we look for 90-99%);
* MSE of the posterior mean rr_mean against the true RR, next to the MSE of the raw ratio y/E;
* flags: share of truly raised areas (RR > 1.25) with P(RR > 1) >= 0.8, and share of areas
  with RR <= 1 flagged all the same.

Scenarios (rook grids, row-major cells; expected counts log-uniform on [1, 50], new draw per replicate):

* ``bym2``: log RR = b, b a fresh BYM2 draw (sigma = 0.4, phi = 0.7, scaled ICAR; Riebler et al. 2016);
* ``smooth+cluster``: log RR = 0.3 * sin(pi x) cos(pi y) (x, y in [0, 1]) + log(1.8) on a 3x3 block
  centred at (0.3, 0.7) of the grid, the same surface in every replicate.

Usage (keeps well under 10 minutes on 2 cores with the defaults)::

    .venv/bin/python benchmarks/simulation_study.py              # 20x20 and 30x30, 10 replicates
    .venv/bin/python benchmarks/simulation_study.py --quick      # 10x10 and 20x20, 3 replicates
    .venv/bin/python benchmarks/simulation_study.py --markdown out.md

Not part of the test suite: the numbers are Monte Carlo estimates and are recorded by hand, with date,
machine and command, in docs/performance.md.
"""

from __future__ import annotations

import argparse
import platform
import sys
import time
from datetime import datetime, timezone

import numpy as np
import pandas as pd


def grid_adjacency(n_side: int) -> np.ndarray:
    """Dense 0/1 rook adjacency of an n_side x n_side lattice (row-major)."""
    n = n_side * n_side
    a = np.zeros((n, n))
    idx = np.arange(n).reshape(n_side, n_side)
    for p, q in ((idx[:, :-1], idx[:, 1:]), (idx[:-1, :], idx[1:, :])):
        a[p.ravel(), q.ravel()] = 1.0
        a[q.ravel(), p.ravel()] = 1.0
    return a


def _scaled_icar_factor(adj: np.ndarray) -> np.ndarray:
    """Matrix F with F F' = (cR)^+ (sum-to-zero ICAR scaled so the geometric mean marginal variance is 1)."""
    R = np.diag(adj.sum(1)) - adj
    lam, V = np.linalg.eigh(R)
    lam, V = lam[1:], V[:, 1:]  # connected grid: drop the single zero eigenvalue
    diag = np.einsum("ik,k,ik->i", V, 1.0 / lam, V)
    c = np.exp(np.mean(np.log(diag)))
    return V / np.sqrt(c * lam)


def true_log_rr(scenario: str, n_side: int, rng: np.random.Generator, factor: np.ndarray) -> np.ndarray:
    n = n_side * n_side
    if scenario == "bym2":
        sigma, phi = 0.4, 0.7
        u = factor @ rng.standard_normal(factor.shape[1])
        v = rng.standard_normal(n)
        return sigma * (np.sqrt(phi) * u + np.sqrt(1.0 - phi) * v)
    if scenario == "smooth+cluster":
        r, c = np.divmod(np.arange(n), n_side)
        x, y = c / (n_side - 1), r / (n_side - 1)
        lr = 0.3 * np.sin(np.pi * x) * np.cos(np.pi * y)
        cr, cc = round(0.7 * (n_side - 1)), round(0.3 * (n_side - 1))
        block = (np.abs(r - cr) <= 1) & (np.abs(c - cc) <= 1)
        return lr + np.log(1.8) * block
    raise ValueError(scenario)


def run(sizes, scenarios, reps, model="bym2", seed=20261202) -> tuple[pd.DataFrame, pd.DataFrame]:
    from areamap.graphs import AreaGraph
    from areamap.models import fit_car

    rows = []
    for n_side in sizes:
        adj = grid_adjacency(n_side)
        n = adj.shape[0]
        ids = [f"r{i // n_side}c{i % n_side}" for i in range(n)]
        graph = AreaGraph.from_adjacency(ids, adj, kind="rook")
        factor = _scaled_icar_factor(adj)
        for scenario in scenarios:
            for rep in range(reps):
                rng = np.random.default_rng([seed, n_side, rep, scenarios.index(scenario)])
                rr = np.exp(true_log_rr(scenario, n_side, rng, factor))
                E = np.exp(rng.uniform(np.log(1.0), np.log(50.0), n))
                y = rng.poisson(E * rr).astype(float)
                t0 = time.perf_counter()
                fit = fit_car(pd.Series(y, index=graph.ids), pd.Series(E, index=graph.ids), graph, model=model)
                secs = time.perf_counter() - t0
                f = fit.to_frame()
                lo, hi, mean = (f[c].to_numpy(float) for c in ("rr_low", "rr_high", "rr_mean"))
                p1 = f["p_above_1"].to_numpy(float)
                covered = (lo <= rr) & (rr <= hi)
                raw = y / E
                raised = rr > 1.25
                for band, m in (("all", np.ones(n, bool)), ("E < 5", E < 5), ("5 <= E < 20", (E >= 5) & (E < 20)),
                                ("E >= 20", E >= 20)):
                    rows.append({
                        "grid": f"{n_side}x{n_side}", "scenario": scenario, "rep": rep, "band": band,
                        "areas": int(m.sum()), "coverage": covered[m].mean(),
                        "mse_smoothed": np.mean((mean[m] - rr[m]) ** 2),
                        "mse_raw": np.mean((raw[m] - rr[m]) ** 2),
                        "width": np.mean(hi[m] - lo[m]),
                        "seconds": secs,
                        "flag_sensitivity": (p1[m & raised] >= 0.8).mean() if (m & raised).any() else np.nan,
                        "false_flag_rate": (p1[m & (rr <= 1)] >= 0.8).mean() if (m & (rr <= 1)).any() else np.nan,
                    })
                print(f"{n_side}x{n_side} {scenario} rep {rep}: coverage {covered.mean():.3f}, "
                      f"MSE smoothed {np.mean((mean - rr) ** 2):.4f} vs raw {np.mean((raw - rr) ** 2):.4f}, "
                      f"{secs:.2f} s", flush=True)
    per_fit = pd.DataFrame(rows)
    g = per_fit.groupby(["grid", "scenario", "band"], sort=False)
    table = g.agg(fits=("rep", "size"), areas_per_fit=("areas", "mean"), coverage=("coverage", "mean"),
                  coverage_min=("coverage", "min"), mse_smoothed=("mse_smoothed", "mean"),
                  mse_raw=("mse_raw", "mean"), width=("width", "mean"),
                  flag_sensitivity=("flag_sensitivity", "mean"), false_flag_rate=("false_flag_rate", "mean"),
                  seconds_per_fit=("seconds", "mean")).reset_index()
    table["mse_ratio"] = table["mse_smoothed"] / table["mse_raw"]
    return per_fit, table


def _markdown(df: pd.DataFrame) -> str:
    """Plain Markdown table (no extra dependency)."""
    lines = ["| " + " | ".join(map(str, df.columns)) + " |", "|" + "---|" * len(df.columns)]
    lines += ["| " + " | ".join(map(str, row)) + " |" for row in df.itertuples(index=False)]
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Coverage and MSE of fit_car on simulated grids.")
    ap.add_argument("--quick", action="store_true", help="small grids, 3 replicates")
    ap.add_argument("--reps", type=int, default=10)
    ap.add_argument("--model", default="bym2", choices=["bym2", "leroux"])
    ap.add_argument("--markdown", default=None, help="write the summary table as Markdown to this file")
    args = ap.parse_args(argv)
    sizes, reps = ((10, 20), 3) if args.quick else ((20, 30), args.reps)
    scenarios = ("bym2", "smooth+cluster")
    t0 = time.perf_counter()
    try:
        _, table = run(sizes, scenarios, reps, model=args.model)
    except ImportError as exc:
        print(f"areamap.models.fit_car is not available: {exc}", file=sys.stderr)
        return 1
    total = time.perf_counter() - t0
    fmt = {"coverage": "{:.3f}", "coverage_min": "{:.3f}", "mse_smoothed": "{:.4f}", "mse_raw": "{:.4f}",
           "mse_ratio": "{:.3f}", "width": "{:.3f}", "flag_sensitivity": "{:.3f}", "false_flag_rate": "{:.4f}",
           "seconds_per_fit": "{:.2f}", "areas_per_fit": "{:.1f}"}
    shown = table.copy()
    for k, f in fmt.items():
        shown[k] = shown[k].map(lambda v, f=f: "n/a" if pd.isna(v) else f.format(v))
    header = (f"model={args.model}, replicates={reps}, grids={', '.join(f'{s}x{s}' for s in sizes)}, "
              f"total {total:.0f} s, {datetime.now(timezone.utc):%Y-%m-%d %H:%M} UTC, "
              f"python {platform.python_version()}, {platform.machine()}")
    print(header)
    print(shown.to_string(index=False))
    if args.markdown:
        with open(args.markdown, "w") as fh:
            fh.write(header + "\n\n" + _markdown(shown) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
