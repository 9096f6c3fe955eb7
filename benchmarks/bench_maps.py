"""Benchmark: draw a choropleth of 10,000 areas (Voronoi polygons) and save it to PNG.

Target: under 10 s from values to PNG file on one core of an ordinary machine.

Usage: ``.venv/bin/python benchmarks/bench_maps.py [--quick] [--areas N]``. Prints the time of each stage,
the ratio of the total to the 10 s target, and the file sizes. Synthetic data only (random points in a
100 km square, metric CRS); the values are invented ratios.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import tempfile
import time
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import geopandas as gpd  # noqa: E402
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import shapely  # noqa: E402

from areamap.maps import _area_paths, choropleth, classify  # noqa: E402

TARGET_S = 10.0


def voronoi_areas(n: int, seed: int = 20261202) -> gpd.GeoDataFrame:
    """``n`` Voronoi cells of uniform random points, clipped to a 100 km square (EPSG:27700 metres)."""
    rng = np.random.default_rng(seed)
    pts = rng.uniform(0, 100_000, size=(n, 2))
    frame = shapely.box(0, 0, 100_000, 100_000)
    cells = shapely.get_parts(shapely.voronoi_polygons(shapely.multipoints(pts), extend_to=frame))
    cells = shapely.intersection(cells, frame)
    # Voronoi output order is not the input order: attach each cell to the point inside it
    tree = shapely.STRtree(cells)
    pt_idx, cell_idx = tree.query(shapely.points(pts), predicate="within")
    order = np.empty(n, dtype=np.int64)
    order[pt_idx] = cell_idx
    gdf = gpd.GeoDataFrame({"area_name": [f"Area {i:05d}" for i in range(n)]},
                           geometry=cells[order], crs=27700)
    # smooth invented ratio surface plus noise, a few missing values
    x, y = pts[:, 0] / 100_000, pts[:, 1] / 100_000
    ratio = np.exp(0.5 * np.sin(6 * x) * np.cos(4 * y) + rng.normal(0, 0.25, n))
    ratio[rng.choice(n, n // 200, replace=False)] = np.nan
    gdf["ratio"] = ratio
    return gdf


def timed(label: str, fn, results: list):
    t0 = time.perf_counter()
    out = fn()
    dt = time.perf_counter() - t0
    results.append((label, dt))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="2,000 areas instead of 10,000")
    ap.add_argument("--areas", type=int, default=None)
    args = ap.parse_args(argv)
    n = args.areas or (2_000 if args.quick else 10_000)
    print(f"machine: {platform.machine()} {platform.processor() or ''} cpus={os.cpu_count()} "
          f"python {sys.version.split()[0]} matplotlib {matplotlib.__version__}")
    gdf = voronoi_areas(n)
    print(f"areas: {len(gdf)}, vertices: {shapely.get_num_coordinates(gdf.geometry.values).sum()}")
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        for scheme in ("relative_risk", "natural_breaks"):
            stages: list = []
            t_all = time.perf_counter()
            timed("classify", lambda: classify(gdf["ratio"], scheme=scheme, k=7), stages)
            timed("paths (shapely -> matplotlib)", lambda: _area_paths(gdf.geometry), stages)
            ax = timed("choropleth (classify + draw)",
                       lambda: choropleth(gdf, "ratio", scheme=scheme, k=7, title="Benchmark map",
                                          source="synthetic data"), stages)
            png = out / f"map_{scheme}.png"
            timed("save PNG (dpi 150)", lambda: ax.figure.savefig(png, dpi=150), stages)
            total = time.perf_counter() - t_all - stages[0][1] - stages[1][1]  # end-to-end: choropleth + save
            svg = out / f"map_{scheme}.svg"
            timed("save SVG (extra)", lambda: ax.figure.savefig(svg), stages)
            plt.close(ax.figure)
            print(f"\nscheme={scheme}")
            for label, dt in stages:
                print(f"  {label:<32} {dt:7.2f} s")
            print(f"  values -> PNG total              {total:7.2f} s   ratio to {TARGET_S:g} s target: "
                  f"{total / TARGET_S:.2f}  ({'OK' if total < TARGET_S else 'OVER TARGET'})")
            print(f"  PNG size {png.stat().st_size / 1e6:.2f} MB, SVG size {svg.stat().st_size / 1e6:.2f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
