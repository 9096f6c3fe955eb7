"""Time and memory of local Moran's I with conditional permutations.

Run: .venv/bin/python benchmarks/bench_local_clusters.py [--quick]

* Local Moran's I with 999 permutations (FDR adjustment) on square grids of about
  10,000 and 100,000 areas with queen contiguity (built by hand with sparse
  matrices), and on 100,000 random points linked by their Delaunay triangulation
  (the neighbour structure of Voronoi polygons: irregular neighbour counts).
  Each size runs in its own subprocess so that the peak resident memory
  (``ru_maxrss``) belongs to that size alone.
* The speed-up over a straightforward per-area Python loop (one
  ``Generator.choice(..., replace=False)`` per area and permutation) on 2,000
  areas, both measured in this run.

Targets: 100,000 areas x 999 permutations in at most 3 s and at most 4 GB peak.
``--quick`` uses 99 permutations and skips the 100,000-area Delaunay case.
``--old REF`` (default: main) also times, back to back in the same run, the implementation of the git
revision REF (exported with ``git archive`` to a temporary folder) and checks that it gives the same
p-values for the same seed (the digest of all p-values); ``--old ""`` skips it. ``--no-loop`` skips the
comparison with the per-area loop (about 20 s) to keep runs short on a shared machine.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import time

import numpy as np
import scipy.sparse as sp
from _revision import export_revision

from areamap.autocorrelation import local_clusters
from areamap.graphs import AreaGraph

TARGET_SECONDS = 3.0
TARGET_BYTES = 4 * 2**30


def queen_grid(side: int) -> AreaGraph:
    """side x side lattice, queen contiguity, built directly as a sparse matrix."""
    n = side * side
    r, c = np.divmod(np.arange(n), side)
    rows, cols = [], []
    for dr, dc in ((0, 1), (1, 0), (1, 1), (1, -1)):
        rr, cc = r + dr, c + dc
        ok = (rr < side) & (cc >= 0) & (cc < side)
        rows.append(np.flatnonzero(ok))
        cols.append((rr * side + cc)[ok])
    a, b = np.concatenate(rows), np.concatenate(cols)
    adj = sp.csr_array((np.ones(2 * a.size), (np.r_[a, b], np.r_[b, a])), shape=(n, n))
    return AreaGraph.from_adjacency(np.arange(n), adj, kind="queen")


def delaunay_graph(n: int, seed: int = 0) -> AreaGraph:
    """Random points in the unit square linked along their Delaunay triangulation."""
    from scipy.spatial import Delaunay

    pts = np.random.default_rng(seed).random((n, 2))
    tri = Delaunay(pts).simplices
    a = np.concatenate([tri[:, 0], tri[:, 1], tri[:, 2]])
    b = np.concatenate([tri[:, 1], tri[:, 2], tri[:, 0]])
    adj = sp.csr_array((np.ones(2 * a.size), (np.r_[a, b], np.r_[b, a])), shape=(n, n))
    return AreaGraph.from_adjacency(np.arange(n), adj, kind="delaunay")


def _graph(kind: str, size: int) -> AreaGraph:
    return queen_grid(size) if kind == "grid" else delaunay_graph(size)


def _values(n: int) -> np.ndarray:
    # a smooth surface plus noise, so that some areas are labelled
    rng = np.random.default_rng(7)
    t = np.linspace(0, 6 * np.pi, n)
    return np.sin(t) + rng.normal(size=n)


def child(kind: str, size: int, permutations: int) -> None:
    """Runs in a subprocess; prints one JSON line."""
    local_clusters(_values(36), queen_grid(6), permutations=9, seed=1)  # load compiled kernels
    g = _graph(kind, size)
    x = _values(g.n)
    rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    t0, c0 = time.perf_counter(), time.process_time()
    res = local_clusters(x, g, permutations=permutations, seed=1)
    dt, cpu = time.perf_counter() - t0, time.process_time() - c0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({
        "kind": kind, "n": g.n, "links": int(g.adjacency.nnz // 2), "permutations": permutations,
        "seconds": dt, "cpu_seconds": cpu, "peak_bytes": peak, "rss_before_bytes": rss_before,
        "labelled": int(res.significant.sum()),
        "p_digest": hashlib.sha256(np.nan_to_num(res.p_value, nan=-1.0).tobytes()).hexdigest()[:16],
    }))


def naive_loop(x: np.ndarray, graph: AreaGraph, permutations: int, seed: int) -> np.ndarray:
    """The straightforward method: loop over areas and permutations in Python."""
    rng = np.random.default_rng(seed)
    n = x.size
    z = x - x.mean()
    indptr, indices = graph.adjacency.indptr, graph.adjacency.indices
    p = np.full(n, np.nan)
    for i in range(n):
        nb = indices[indptr[i] : indptr[i + 1]]
        k = nb.size
        if k == 0:
            continue
        others = np.delete(z, i)
        centre = k * others.mean()
        obs = abs(z[nb].sum() - centre)
        count = 0
        for _ in range(permutations):
            s = others[rng.choice(n - 1, size=k, replace=False)].sum()
            count += abs(s - centre) >= obs - 1e-9
        p[i] = (count + 1) / (permutations + 1)
    return p


def _run_child(kind: str, size: int, permutations: int, pythonpath: str | None = None) -> dict:
    env = dict(os.environ)
    if pythonpath:
        env["PYTHONPATH"] = pythonpath + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run(
        [sys.executable, __file__, "--child", kind, str(size), str(permutations)],
        check=True, capture_output=True, text=True, env=env,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(quick: bool, old: str = "main", loop: bool = True) -> int:
    old_path = export_revision(old) if old else None
    try:
        return _main(quick, old, old_path, loop)
    finally:
        if old_path:
            shutil.rmtree(old_path, ignore_errors=True)


def _main(quick: bool, old: str, old_path: str | None, loop: bool) -> int:
    perms = 99 if quick else 999
    load = " ".join(f"{v:.1f}" for v in os.getloadavg())
    print(f"load average at start: {load} (wall time is inflated on a busy machine; cpu s is not)")
    print(f"machine: {platform.machine()}, {platform.processor() or 'cpu'}; python {platform.python_version()}; "
          f"numpy {np.__version__}")
    cases = [("grid", 100), ("grid", 317)] + ([] if quick else [("delaunay", 100_000)])
    status = 0
    print(f"{'graph':<9}{'areas':>9}{'links':>9}{'perms':>7}{'seconds':>10}{'cpu s':>8}{'peak MB':>10}"
          f"{'base MB':>9}{'labelled':>9}")
    for kind, size in cases:
        r = _run_child(kind, size, perms)
        print(f"{r['kind']:<9}{r['n']:>9}{r['links']:>9}{r['permutations']:>7}"
              f"{r['seconds']:>10.2f}{r['cpu_seconds']:>8.2f}{r['peak_bytes'] / 2**20:>10.0f}{r['rss_before_bytes'] / 2**20:>9.0f}{r['labelled']:>9}"
              f"  load {os.getloadavg()[0]:.1f}")
        if old_path:
            o = _run_child(kind, size, perms, old_path)
            same = "same p-values" if o["p_digest"] == r["p_digest"] else "DIFFERENT p-values"
            print(f"{'  old (' + old + ')':<18}{'':>9}{'':>7}{o['seconds']:>10.2f}{o['cpu_seconds']:>8.2f}"
                  f"{o['peak_bytes'] / 2**20:>10.0f}{o['rss_before_bytes'] / 2**20:>9.0f}{o['labelled']:>9}"
                  f"  old / new wall {o['seconds'] / r['seconds']:.2f}, cpu {o['cpu_seconds'] / r['cpu_seconds']:.2f}, "
                  f"{same}  load {os.getloadavg()[0]:.1f}")
            status = status or (0 if o["p_digest"] == r["p_digest"] else 1)
        if r["n"] >= 100_000 and r["permutations"] == 999:
            ok = r["seconds"] <= TARGET_SECONDS and r["peak_bytes"] <= TARGET_BYTES
            print(f"  target ({TARGET_SECONDS:.0f} s, {TARGET_BYTES / 2**30:.0f} GB): "
                  f"time ratio {r['seconds'] / TARGET_SECONDS:.2f}, memory ratio "
                  f"{r['peak_bytes'] / TARGET_BYTES:.3f} -> {'met' if ok else 'MISSED'}")
            status = status or (0 if ok else 1)

    if not loop:
        return status
    # speed-up over the per-area loop, same graph, same permutations, this run
    g = delaunay_graph(2000, seed=3)
    x = _values(g.n)
    t0 = time.perf_counter()
    fast = local_clusters(x, g, permutations=perms, seed=1, adjust="none")
    t_fast = time.perf_counter() - t0
    t0 = time.perf_counter()
    slow = naive_loop(x, g, perms, seed=1)
    t_slow = time.perf_counter() - t0
    # both are Monte Carlo estimates of the same p-values: report their agreement
    diff = np.abs(fast.p_value - slow)
    print(f"per-area loop on {g.n} areas x {perms} permutations: {t_slow:.2f} s; "
          f"vectorised: {t_fast:.3f} s; speed-up {t_slow / t_fast:.0f}x; "
          f"median |p difference| {np.median(diff):.4f} (Monte Carlo noise)")
    return status


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        child(sys.argv[2], int(sys.argv[3]), int(sys.argv[4]))
    else:
        argv = sys.argv[1:]
        ref = argv[argv.index("--old") + 1] if "--old" in argv else "main"
        raise SystemExit(main("--quick" in argv, ref, "--no-loop" not in argv))
