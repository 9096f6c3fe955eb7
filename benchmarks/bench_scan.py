"""Speed, size and power of the Poisson scan statistic (areamap.scan).

Run: .venv/bin/python benchmarks/bench_scan.py [--quick] [--only speed|size|power]

Wall time depends on how busy the machine is; each speed line also prints the process CPU time and the load
average at the end of the run, so a figure taken on a shared machine can be read against its load.

Speed (each case in its own subprocess, so the peak resident memory belongs to it alone):
* purely spatial scan, 10,000 districts (random points, populations 500-5,000), circles up to 10% of
  the population, 999 replicates: target 60 s;
* prospective space-time scan, same region, 12 weeks, cylinders of 1..4 weeks, 999 replicates: target 120 s;
* connected zones grown through the Delaunay neighbour graph of the same points (reported, no target).

Size and power, on invented data (300 districts, populations 500-5,000, about 15 expected cases each):
* size: 200 runs under no cluster at 99 replicates; the share with p < 0.05 should be 0.05 within
  Monte Carlo error (binomial standard error sqrt(0.05 * 0.95 / 200) = 0.015);
* power: a compact planted zone (the 10 districts nearest a random centre) at relative risk 1.5, 1.75
  and 2; "found" = the most likely zone has p < 0.05 and holds at least 70% of the planted districts.
  Target: found in at least 80% of runs.

``--quick`` uses 99 replicates for the speed cases and 50 size / 25 power runs.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time

import numpy as np

TARGETS = {"spatial": 60.0, "prospective": 120.0}


def _region(n: int, seed: int):
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 100, (n, 2))
    pop = rng.uniform(500, 5000, n)
    return rng, xy, pop


def _speed_case(case: str, replicates: int) -> dict:
    from areamap.scan import prospective_scan, spatial_scan

    rng, xy, pop = _region(10_000, 0)
    e = pop / pop.sum() * 20_000
    # warm the compiled kernels on a small problem so compilation is not timed
    small = slice(0, 200)
    spatial_scan(rng.poisson(e[small]), e[small], xy[small], replicates=3)
    t, c0 = time.perf_counter(), time.process_time()
    if case == "spatial":
        res = spatial_scan(rng.poisson(e), e, xy, population=pop, replicates=replicates, seed=1)
    elif case == "prospective":
        y = rng.poisson(np.outer(e / 12, np.ones(12)))
        res = prospective_scan(y, e, xy, population=pop, max_weeks=4, replicates=replicates, seed=1)
    else:  # graph zones
        import scipy.sparse as sp
        from scipy.spatial import Delaunay

        from areamap.graphs import AreaGraph

        tri = Delaunay(xy).simplices
        a = np.concatenate([tri[:, 0], tri[:, 1], tri[:, 2]])
        b = np.concatenate([tri[:, 1], tri[:, 2], tri[:, 0]])
        adj = sp.csr_array((np.ones(2 * a.size), (np.r_[a, b], np.r_[b, a])), shape=(len(xy), len(xy)))
        g = AreaGraph.from_adjacency(np.arange(len(xy)), adj)
        t, c0 = time.perf_counter(), time.process_time()
        res = spatial_scan(rng.poisson(e), e, xy, population=pop, graph=g, replicates=replicates, seed=1)
    seconds = time.perf_counter() - t
    cpu = time.process_time() - c0
    return {"case": case, "seconds": seconds, "cpu_seconds": cpu, "zones": res.n_zones, "replicates": replicates,
            "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, "load": os.getloadavg()[0]}


def speed(quick: bool) -> None:
    reps = 99 if quick else 999
    print(f"speed: 10,000 districts, max share 0.1, {reps} replicates "
          f"({platform.processor() or platform.machine()}, {os.cpu_count()} cores)")
    for case in ("spatial", "prospective", "graph"):
        out = subprocess.run([sys.executable, __file__, "--child", case, str(reps)], capture_output=True, text=True)
        if out.returncode:
            print(out.stderr)
            continue
        r = json.loads(out.stdout.strip().splitlines()[-1])
        line = (f"  {case:<12} {r['seconds']:7.1f} s wall, {r['cpu_seconds']:7.1f} s CPU (2 threads)  "
                f"{r['zones']:>11,} zones/cylinders  peak {r['peak_mb']:.0f} MB  load average {r['load']:.1f}")
        if case in TARGETS:
            scaled = r["seconds"] * (999 / reps if quick else 1)
            line += f"  ratio to target {scaled / TARGETS[case]:.2f}" + (" (scaled to 999)" if quick else "")
        print(line, flush=True)


def _planted(xy, rng, size=10):
    centre = rng.integers(len(xy))
    return np.argsort(np.hypot(*(xy - xy[centre]).T))[:size]


def size_and_power(quick: bool, which: str) -> None:
    from areamap.scan import spatial_scan

    rng, xy, pop = _region(300, 42)
    e = pop / pop.sum() * 15 * 300
    n_null, n_power = (50, 25) if quick else (200, 100)
    if which in ("all", "size"):
        t = time.perf_counter()
        p = np.array([
            spatial_scan(rng.poisson(e), e, xy, population=pop, replicates=99, seed=int(s)).p_value[0]
            for s in range(n_null)
        ])
        share = float((p < 0.05).mean())
        se = np.sqrt(0.05 * 0.95 / n_null)
        print(f"size: {n_null} null runs, 99 replicates: share p < 0.05 = {share:.3f} "
              f"(0.05 +/- {2 * se:.3f} at 2 s.e.), share p < 0.10 = {(p < 0.10).mean():.3f}, "
              f"mean p = {p.mean():.3f}  [{time.perf_counter() - t:.0f} s]", flush=True)
    if which in ("all", "power"):
        for rr in (1.5, 1.75, 2.0):
            t = time.perf_counter()
            found, recall, precision = 0, [], []
            for s in range(n_power):
                zone = _planted(xy, rng)
                lam = e.copy()
                lam[zone] *= rr
                res = spatial_scan(rng.poisson(lam), e, xy, population=pop, replicates=99, seed=1000 + s)
                top = set(res.members[0].tolist()) if len(res.llr) else set()
                hit = len(top & set(zone.tolist()))
                recall.append(hit / len(zone))
                precision.append(hit / max(len(top), 1))
                found += bool(len(res.llr) and res.p_value[0] < 0.05 and hit >= 0.7 * len(zone))
            print(f"power: RR {rr:.2f}, {n_power} runs: found {found / n_power:.0%} (target >= 80%), "
                  f"mean share of planted districts recovered {np.mean(recall):.2f}, mean share of the "
                  f"zone that was planted {np.mean(precision):.2f}  [{time.perf_counter() - t:.0f} s]", flush=True)


def main() -> int:
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        print(json.dumps(_speed_case(sys.argv[2], int(sys.argv[3]))))
        return 0
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--only", choices=("speed", "size", "power"))
    args = ap.parse_args()
    if args.only in (None, "speed"):
        speed(args.quick)
    if args.only in (None, "size", "power"):
        size_and_power(args.quick, args.only or "all")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
