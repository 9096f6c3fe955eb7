"""Acceptance benchmark of the space-time model: detection, calibration, coverage and speed.

Invented regions (no real places): 300 districts on three geometries (Delaunay neighbours of
uniform random points, Delaunay neighbours of clustered points, a 15 x 20 rook lattice), 12
weeks, expected counts 1-10 per district-week, a smooth persistent spatial surface (SD about
0.3 on the log scale) and a smooth regional rise of 20 % over the 12 weeks. In the "patch"
scenario the 10 districts nearest a random centre have twice their risk in the last 3 weeks.

Reported, per geometry and overall:

* share of the patch flagged in the patch's 1st, 2nd and 3rd week by the default space-time run
  (emerging OR persistent; the local-cluster rule of the bulletin is not run here) and by the
  cross-sectional model (BYM2 on the newest week alone, P(RR > 1) >= 0.8), targets >= 80 % by
  the third week;
* the same for the previous rule (newest week only, ``forecast_window=1``), refitted on the same data;
* an oracle bound: the share of the patch a Poisson test with the true rates would find;
* share of the other districts (true risk at or below their own level) flagged "emerging",
  target <= 5 %; and the cross-sectional flag's share among them, for comparison;
* calibration without any planted change: share flagged "emerging", and coverage of the 95 %
  forecast intervals of the newest week's counts (target about 95 %);
* speed: 10,000 districts x 12 weeks (100 x 100 lattice), fit with both forecast checks, within 30 s
  (engine-speed target; 60 s when the model was introduced) and 4 GB (peak resident memory of this
  process), after a small warm-up fit (compilation of the numba kernels is not counted).

Usage::

    python benchmarks/bench_spacetime.py            # everything (about 5-10 min on 2 shared cores)
    python benchmarks/bench_spacetime.py --quick    # one geometry, no speed run
    python benchmarks/bench_spacetime.py --speed    # speed run only
    python benchmarks/bench_spacetime.py --speed --profile   # ... with a cProfile breakdown
    git archive REV areamap | tar -x -C /tmp/old    # an earlier version, to compare in one session:
    python benchmarks/bench_spacetime.py --speed --code /tmp/old
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd



def _code_dir() -> str:
    """Directory to import areamap from: ``--code DIR`` (an export of another version), else this checkout."""
    if "--code" in sys.argv[:-1]:
        return str(Path(sys.argv[sys.argv.index("--code") + 1]).resolve())
    return str(Path(__file__).resolve().parents[1])


sys.path.insert(0, _code_dir())

from areamap import fit_car, fit_spacetime  # noqa: E402
from areamap.graphs import AreaGraph  # noqa: E402

N, W, PATCH, PATCH_WEEKS = 300, 12, 10, 3


def _delaunay_graph(xy):
    from scipy.spatial import Delaunay

    tri = Delaunay(xy)
    edges = set()
    for s in tri.simplices:
        for a in range(3):
            for b in range(a + 1, 3):
                i, j = sorted((int(s[a]), int(s[b])))
                edges.add((i, j))
    return edges


def make_region(kind: str, seed: int):
    rng = np.random.default_rng(seed)
    if kind == "lattice":
        r, c = np.divmod(np.arange(N), 20)
        xy = np.column_stack([c / 20.0, r / 15.0]).astype(float)
        edges = {(i, i + 1) for i in range(N) if (i + 1) % 20}
        edges |= {(i, i + 20) for i in range(N - 20)}
    elif kind == "uniform":
        xy = rng.uniform(0, 1, (N, 2))
        edges = _delaunay_graph(xy)
    else:  # clustered points: dense towns and sparse countryside
        centres = rng.uniform(0.15, 0.85, (5, 2))
        town = rng.integers(0, 5, N // 2)
        xy = np.vstack([centres[town] + rng.normal(0, 0.05, (N // 2, 2)), rng.uniform(0, 1, (N - N // 2, 2))])
        edges = _delaunay_graph(xy)
    ids = [f"D{i:04d}" for i in range(N)]
    graph = AreaGraph.from_edges(ids, [(ids[i], ids[j]) for i, j in sorted(edges)])
    return ids, xy, graph


def simulate(xy, seed: int, *, patch: bool):
    rng = np.random.default_rng(seed)
    # smooth persistent surface (sum of a few random waves), SD about 0.3
    k = rng.normal(0, 3.0, (4, 2))
    ph = rng.uniform(0, 2 * np.pi, 4)
    surf = np.sum(np.cos(xy @ k.T + ph), axis=1)
    surf = 0.3 * (surf - surf.mean()) / surf.std()
    trend = np.log(np.linspace(1.0, 1.2, W))
    e = np.repeat(rng.uniform(1.0, 10.0, N)[:, None], W, axis=1)
    log_rr = surf[:, None] + trend[None, :] - trend.mean()
    in_patch = np.zeros(N, bool)
    if patch:
        centre = xy[rng.integers(N)]
        in_patch[np.argsort(np.sum((xy - centre) ** 2, axis=1))[:PATCH]] = True
        log_rr[in_patch, W - PATCH_WEEKS:] += np.log(2.0)
    y = rng.poisson(e * np.exp(log_rr))
    return y, e, in_patch


def cross_sectional_flag(y_week, e_week, graph, ids):
    # the bulletin's default: expected counts from the same week's regional rate (internal standardization)
    e_int = e_week * y_week.sum() / e_week.sum()
    fit = fit_car(pd.Series(y_week, index=ids), pd.Series(e_int, index=ids), graph)
    return fit.p_above_1 >= 0.8


def cluster_flag(y_week, e_week, graph, ids):
    # the bulletin's local-cluster rule: High-High local Moran of EB ratios, 9999 permutations, FDR 0.05
    from areamap.autocorrelation import rate_local_clusters

    res = rate_local_clusters(pd.Series(y_week, index=ids), pd.Series(e_week, index=ids), graph,
                              permutations=9999, seed=1, adjust="fdr", alpha=0.05)
    return (res.to_frame()["cluster"].astype(str) == "High-High").to_numpy()


def run_detection(kinds, seeds):
    rows = []
    for kind, seed in zip(kinds, seeds):
        ids, xy, graph = make_region(kind, seed)
        y, e, in_patch = simulate(xy, seed + 1, patch=True)
        weeks = [f"2026-W{t + 1:02d}" for t in range(W + PATCH_WEEKS - 1)]
        # the window always ends at the patch's k-th week; earlier weeks padded by the same process
        rng = np.random.default_rng(seed + 2)
        lead = rng.poisson(e[:, : PATCH_WEEKS - 1] * (y[:, :1] + 0.5) / (e[:, :1] + 0.5))
        y_all = np.hstack([lead, y])
        e_all = np.hstack([e[:, : PATCH_WEEKS - 1], e])
        for k in range(1, PATCH_WEEKS + 1):
            end = y_all.shape[1] - (PATCH_WEEKS - k)
            cols = weeks[end - W: end]
            yy = pd.DataFrame(y_all[:, end - W: end], index=ids, columns=cols)
            ee = pd.DataFrame(e_all[:, end - W: end], index=ids, columns=cols)
            t0 = time.perf_counter()
            fit = fit_spacetime(yy, ee, graph)
            old = fit_spacetime(yy, ee, graph, forecast_window=1)
            secs = time.perf_counter() - t0
            flag = fit.emerging | fit.persistent
            cs = cross_sectional_flag(yy.iloc[:, -1].to_numpy(), ee.iloc[:, -1].to_numpy(), graph, ids)
            hh = cluster_flag(yy.iloc[:, -1].to_numpy(), ee.iloc[:, -1].to_numpy(), graph, ids)
            rows.append({
                "geometry": kind, "seed": seed, "patch_week": k,
                "patch_flagged": flag[in_patch].mean(), "patch_emerging": fit.emerging[in_patch].mean(),
                "patch_persistent": fit.persistent[in_patch].mean(),
                "others_emerging": fit.emerging[~in_patch].mean(),
                "patch_window_fired": (fit.emerging & (fit.forecast_fired > 1))[in_patch].mean(),
                "old_patch_flagged": (old.emerging | old.persistent)[in_patch].mean(),
                "old_patch_emerging": old.emerging[in_patch].mean(),
                "old_others_emerging": old.emerging[~in_patch].mean(),
                "with_cluster_rule": (flag | hh)[in_patch].mean(),
                "cross_patch_flagged": cs[in_patch].mean(), "cross_others_flagged": cs[~in_patch].mean(),
                "cross_with_cluster_rule": (cs | hh)[in_patch].mean(),
                "seconds": secs,
            })
    return pd.DataFrame(rows)


def run_calibration(kinds, seeds):
    rows = []
    for kind, seed in zip(kinds, seeds):
        ids, xy, graph = make_region(kind, seed)
        y, e, _ = simulate(xy, seed + 7, patch=False)
        cols = [f"2026-W{t + 1:02d}" for t in range(W)]
        fit = fit_spacetime(pd.DataFrame(y, index=ids, columns=cols), pd.DataFrame(e, index=ids, columns=cols),
                            graph)
        old = fit_spacetime(pd.DataFrame(y, index=ids, columns=cols), pd.DataFrame(e, index=ids, columns=cols),
                            graph, forecast_window=1)
        newest = y[:, -1]
        covered = (newest >= fit.forecast_low) & (newest <= fit.forecast_high)
        cs = cross_sectional_flag(newest, e[:, -1], graph, ids)
        rows.append({"geometry": kind, "seed": seed, "emerging": fit.emerging.mean(),
                     "midp_below_0.05": (fit.forecast_midp < 0.05).mean(),
                     "window_midp_below_0.05": (fit.window_midp < 0.05).mean(),
                     "p_below_0.05": (fit.forecast_p < 0.05).mean(),
                     "old_emerging": old.emerging.mean(),
                     "coverage_95": covered.mean(), "persistent": fit.persistent.mean(),
                     "cross_flagged": cs.mean()})
    return pd.DataFrame(rows)


def oracle_power(reps=2000, seed=0):
    """Share of the patch found with the true rates known: Poisson mid-p of the 3-week sum (and of the
    newest week alone), Benjamini-Hochberg over the 300 districts at 0.05 -- an upper bound for any
    district-by-district forecast check in this scenario (levels: independent log-normal, SD 0.3)."""
    from scipy.stats import poisson

    rng = np.random.default_rng(seed)
    found = {PATCH_WEEKS: [], 1: []}
    in_patch = np.arange(N) < PATCH
    for _ in range(reps):
        mu = rng.uniform(1.0, 10.0, N) * np.exp(rng.normal(0.0, 0.3, N))
        for k in found:
            y = rng.poisson(k * mu * np.where(in_patch, 2.0, 1.0))
            p = poisson.sf(y, k * mu) + 0.5 * poisson.pmf(y, k * mu)
            srt = np.sort(p)
            ok = np.nonzero(srt <= 0.05 * np.arange(1, N + 1) / N)[0]
            cut = srt[ok.max()] if ok.size else -1.0
            found[k].append(np.mean(p[in_patch] <= cut))
    return {k: float(np.mean(v)) for k, v in found.items()}


def _lattice_case(side, w, seed=11):
    ids = [f"r{r}c{c}" for r in range(side) for c in range(side)]
    edges = [(ids[r * side + c], ids[r * side + c + 1]) for r in range(side) for c in range(side - 1)]
    edges += [(ids[r * side + c], ids[(r + 1) * side + c]) for r in range(side - 1) for c in range(side)]
    graph = AreaGraph.from_edges(ids, edges)
    xy = np.column_stack(np.divmod(np.arange(side * side), side)[::-1]) / side
    rng = np.random.default_rng(seed)
    surf = 0.3 * np.sin(6 * xy[:, 0]) * np.cos(4 * xy[:, 1])
    e = np.repeat(rng.uniform(1.0, 10.0, side * side)[:, None], w, axis=1)
    y = rng.poisson(e * np.exp(surf[:, None] + np.linspace(-0.1, 0.1, w)[None, :]))
    cols = [f"2026-W{t + 1:02d}" for t in range(w)]
    return pd.DataFrame(y, index=ids, columns=cols), pd.DataFrame(e, index=ids, columns=cols), graph


def run_speed(profile=False):
    fit_spacetime(*_lattice_case(6, 5))  # warm-up: compiles the numba kernels (cached on disk after the first run)
    yy, ee, graph = _lattice_case(100, 12)
    prof = None
    if profile:
        import cProfile

        prof = cProfile.Profile()
        prof.enable()
    c0, t0 = time.process_time(), time.perf_counter()
    fit = fit_spacetime(yy, ee, graph)
    secs, cpu = time.perf_counter() - t0, time.process_time() - c0
    if prof is not None:
        import pstats

        prof.disable()
        pstats.Stats(prof).sort_stats("tottime").print_stats(20)
    peak_gb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20
    newest = yy.to_numpy()[:, -1]
    cover = np.mean((newest >= fit.forecast_low) & (newest <= fit.forecast_high))
    evals = sum(d.n_evaluations for d in fit._designs.values())
    return secs, cpu, peak_gb, cover, fit.n_design_points, evals


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--speed", action="store_true")
    ap.add_argument("--profile", action="store_true", help="cProfile the speed run")
    ap.add_argument("--code", help="import areamap from this directory (e.g. an export of an earlier version)")
    args = ap.parse_args()
    pd.set_option("display.width", 160)
    if not args.quick:
        import areamap

        load = os.getloadavg()[0]
        secs, cpu, peak, cover, k, evals = run_speed(args.profile)
        print(f"speed ({Path(areamap.__file__).parent}): 10,000 districts x 12 weeks with both forecast checks: "
              f"{secs:.1f} s wall, {cpu:.1f} s CPU (ratio to 30 s target {secs / 30:.2f}), load average "
              f"{load:.1f} before / {os.getloadavg()[0]:.1f} after; peak resident memory {peak:.2f} GB (ratio to "
              f"4 GB {peak / 4:.2f}); {k} design points, {evals} Laplace evaluations; forecast coverage {cover:.3f}")
        if args.speed:
            return
    kinds = ["uniform", "clustered", "lattice"]
    seeds = [101, 202, 303]
    if args.quick:
        kinds, seeds = kinds[:1], seeds[:1]
    det = run_detection(kinds, seeds)
    print("\nDetection (patch of 10 of 300 districts at 2x risk for the last 3 weeks):")
    print(det.round(3).to_string(index=False))
    summ = det.groupby("patch_week")[["patch_flagged", "patch_emerging", "patch_window_fired", "patch_persistent",
                                       "others_emerging", "old_patch_flagged", "old_patch_emerging",
                                       "old_others_emerging", "with_cluster_rule", "cross_patch_flagged", "cross_others_flagged",
                                       "cross_with_cluster_rule"]].mean()
    print("\nMean over geometries:")
    print(summ.round(3).to_string())
    third = summ.loc[PATCH_WEEKS]
    print(f"\nBy the patch's third week: {third.patch_flagged:.0%} of the patch flagged (target >= 80 %, "
          f"ratio {third.patch_flagged / 0.8:.2f}); with the bulletin's local-cluster rule as well "
          f"{third.with_cluster_rule:.0%}; cross-sectional flag {third.cross_patch_flagged:.0%} "
          f"({third.cross_with_cluster_rule:.0%} with the cluster rule).")
    print(f"Other districts flagged emerging: {det.others_emerging.mean():.1%} over all runs (target <= 5 %); "
          f"cross-sectional flag among them {det.cross_others_flagged.mean():.1%}.")
    print(f"Newest-week check only (forecast_window=1, the previous rule): {third.old_patch_flagged:.0%} of the "
          f"patch flagged by its third week ({third.old_patch_emerging:.0%} emerging); other districts emerging "
          f"{det.old_others_emerging.mean():.1%}.")
    orc = oracle_power()
    print(f"Oracle (true rates known, BH over districts): {orc[PATCH_WEEKS]:.0%} of the patch from the "
          f"{PATCH_WEEKS}-week sum, {orc[1]:.0%} from the newest week alone.")
    cal = run_calibration(kinds, [s + 1000 for s in seeds] if not args.quick else seeds)
    print("\nCalibration (no planted change):")
    print(cal.round(3).to_string(index=False))
    print(f"Mean share emerging {cal.emerging.mean():.3f} (nominal: FDR control gives about 0 when nothing "
          f"changed); share with forecast mid-p < 0.05 {cal['midp_below_0.05'].mean():.3f} (nominal 0.05), "
          f"with the {PATCH_WEEKS}-week sum's mid-p < 0.05 {cal['window_midp_below_0.05'].mean():.3f} (nominal "
          f"0.05), with the combined p < 0.05 {cal['p_below_0.05'].mean():.3f} (at most 0.05); "
          f"forecast 95 % interval coverage {cal.coverage_95.mean():.3f}.")


if __name__ == "__main__":
    main()
