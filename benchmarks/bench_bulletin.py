"""Benchmark: the whole weekly bulletin for a generated region of 10,000 districts.

Usage: ``.venv/bin/python benchmarks/bench_bulletin.py [--quick] [--areas N] [--keep DIR]``

Generates an invented region (Voronoi cells of jittered grid points, population in three age groups, four weeks of
Poisson counts with a planted raised-risk patch), then times :func:`areamap.run_bulletin` end to end (intake to
archive) and prints each step's time, the ratio to the 3-minute target, peak memory and output sizes. ``--quick``
uses 2,000 districts. Nothing here is a test: machines are shared and noisy.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

TARGET_SECONDS = 180.0
AGE_GROUPS = ("0-14", "15-64", "65+")
WEEKS = ("2026-W44", "2026-W45", "2026-W46", "2026-W47")


def generate_region(folder: Path, n_areas: int, *, seed: int = 7) -> Path:
    """Write districts.gpkg, cases.csv, population.csv and run.toml for ``n_areas`` invented districts."""
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(n_areas)))
    gx, gy = np.meshgrid(np.arange(side), np.arange(side))
    pts = np.column_stack([gx.ravel(), gy.ravel()])[:n_areas].astype(float)
    pts += rng.uniform(-0.35, 0.35, size=pts.shape)
    pts *= 2000.0  # metres
    box = shapely.box(pts[:, 0].min() - 1000, pts[:, 1].min() - 1000, pts[:, 0].max() + 1000, pts[:, 1].max() + 1000)
    cells = shapely.get_parts(shapely.voronoi_polygons(shapely.multipoints(pts), extend_to=box))
    cells = shapely.intersection(cells, box)
    # match each cell to its generating point
    tree = shapely.STRtree(cells)
    idx = tree.query(shapely.points(pts), predicate="within")
    order = np.empty(n_areas, dtype=int)
    order[idx[0]] = idx[1]
    geoms = cells[order]
    ids = [f"G{i:05d}" for i in range(n_areas)]
    names = [f"Gridholm {i}" for i in range(n_areas)]
    gpd.GeoDataFrame({"district_id": ids, "district_name": names}, geometry=geoms, crs="EPSG:32631").to_file(
        folder / "districts.gpkg", layer="districts", driver="GPKG")

    pop = np.rint(rng.lognormal(np.log(4000), 0.6, size=(n_areas, 3)) * np.array([0.2, 0.65, 0.15])).astype(int) + 1
    population = pd.DataFrame({
        "district_id": np.repeat(ids, 3), "age_group": np.tile(AGE_GROUPS, n_areas), "population": pop.ravel()})
    population.to_csv(folder / "population.csv", index=False)

    base = np.array([30e-5, 12e-5, 45e-5])
    centre = pts.mean(axis=0)
    raised = np.linalg.norm(pts - centre, axis=1) < 8000  # planted patch
    rr = np.where(raised, 2.0, 1.0) * np.exp(rng.normal(0, 0.15, n_areas))
    rows = []
    for week in WEEKS:
        lam = pop * base * rr[:, None]
        counts = rng.poisson(lam)
        rows.append(pd.DataFrame({"district_id": np.repeat(ids, 3), "week": week,
                                  "age_group": np.tile(AGE_GROUPS, n_areas), "cases": counts.ravel()}))
    pd.concat(rows).to_csv(folder / "cases.csv", index=False)
    config = folder / "run.toml"
    config.write_text("""\
title = "Benchmark bulletin"
region = "Gridholm (generated)"
data_source = "Generated benchmark data"
seed = 1
[boundaries]
file = "districts.gpkg"
id_column = "district_id"
name_column = "district_name"
[cases]
file = "cases.csv"
id_column = "district_id"
age_column = "age_group"
[population]
file = "population.csv"
id_column = "district_id"
age_column = "age_group"
[period]
week = "latest"
window_weeks = 2
""", encoding="utf-8")
    return config


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="2,000 districts instead of 10,000")
    parser.add_argument("--areas", type=int, default=None, help="number of districts")
    parser.add_argument("--keep", default=None, help="folder to keep the generated region and outputs in")
    args = parser.parse_args(argv)
    n = args.areas or (2_000 if args.quick else 10_000)

    import matplotlib

    matplotlib.use("Agg")
    from areamap.bulletin import run_bulletin

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(args.keep) if args.keep else Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        t0 = time.perf_counter()
        config = generate_region(folder, n)
        t_gen = time.perf_counter() - t0
        steps: list[tuple[str, float]] = []
        t1 = time.perf_counter()

        def progress(message: str) -> None:
            steps.append((message, time.perf_counter() - t1))
            print(f"  {time.perf_counter() - t1:7.2f} s  {message}", flush=True)

        result = run_bulletin(config, out=folder / "bulletin", progress=progress)
        total = time.perf_counter() - t1
        peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # Linux: kilobytes
        print(f"districts: {n:,}; region generated in {t_gen:.1f} s")
        print("step timings (s): " + ", ".join(f"{k} {v:.2f}" for k, v in result.run_info["timings_seconds"].items()))
        print(f"bulletin total: {total:.1f} s; target {TARGET_SECONDS:.0f} s; ratio to target {total / TARGET_SECONDS:.2f}")
        print(f"peak resident memory: {peak_mb:,.0f} MB")
        for name, path in result.files.items():
            print(f"  {name:<11} {path.stat().st_size / 1e6:8.2f} MB")
        print(f"flagged: {result.run_info['flags']['total']}; Moran's I {result.run_info['morans_i']['statistic']:.3f}")
        return 0 if total <= TARGET_SECONDS or n != 10_000 else 1


if __name__ == "__main__":
    sys.exit(main())
