"""Time build_graph on random Voronoi cells (a stand-in for small-area boundaries).

Run: .venv/bin/python benchmarks/bench_graphs.py [--quick] [n_areas ...]
Prints one line per method (areas, links, seconds, seconds per 1,000 areas), then the ratio of
time per area between the largest and smallest size (about 1 when the cost grows linearly).
"""

from __future__ import annotations

import sys
import time
import warnings

import geopandas as gpd
import numpy as np
import shapely

from areamap.graphs import build_graph


def voronoi_cells(n: int, seed: int = 0) -> gpd.GeoDataFrame:
    rng = np.random.default_rng(seed)
    side = 1000.0 * np.sqrt(n)  # about 1 km^2 per cell
    frame = shapely.box(0, 0, side, side)
    pts = shapely.MultiPoint(rng.uniform(0, side, (n, 2)))
    cells = shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=frame))
    cells = shapely.intersection(cells, frame)
    return gpd.GeoDataFrame(geometry=cells, crs="EPSG:3857")


CASES = [
    ("queen", {}),
    ("rook", {}),
    ("queen", {"snap": 1.0}),
    ("rook", {"snap": 1.0}),
    ("knn", {"k": 5}),
    ("distance", {"distance": 1500.0}),
]


def main(sizes: list[int]) -> None:
    build_graph(voronoi_cells(50), method="queen")  # warm-up: imports
    per_area: dict[tuple[int, str], float] = {}
    for n in sizes:
        cells = voronoi_cells(n)
        for method, opts in CASES:
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                g = build_graph(cells, method=method, **opts)
            dt = time.perf_counter() - t0
            label = method + "".join(f" {k}={v:g}" for k, v in opts.items())
            per_area[n, label] = dt / n
            print(
                f"{n:>7} areas  {label:<22} links {g.summary().n_links:>7}  "
                f"{dt:7.2f} s  ({1000 * dt / n:.3f} s per 1,000 areas)"
            )


    lo, hi = min(sizes), max(sizes)
    if lo != hi:
        for (n, label), t in per_area.items():
            if n == hi:
                print(f"time per area, {hi:,} vs {lo:,} areas, {label:<22} ratio {t / per_area[lo, label]:.2f}")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if a != "--quick"]
    default = [500, 2_000] if "--quick" in sys.argv[1:] else [1_000, 10_000]
    main([int(a) for a in args] or default)
