"""Poisson kriging next to empirical Bayes and BYM2 on invented regions with a known smooth risk, and speed.

Accuracy part: an invented square region (100 x 100 km) split into Voronoi districts around a dense town
(small districts) and a sparse countryside (large ones); people live on a density surface that is high in
the town, so district populations span two orders of magnitude. The true risk is a smooth surface
rho(x, y) (a broad wave plus a raised patch); a district's true relative risk is the population-weighted
mean of rho over it. Counts y_i ~ Poisson(n_i * base * RR_i). For each replicate the script reports, per
method, the RMSE of log risk (estimated vs true rate) and the share of districts whose true rate lies in
the method's 95% interval:

* Poisson kriging: risk_variogram (model "auto") + poisson_kriging (K = 32, 16 points per district), with
  the regional Poisson correction of the semivariogram (default) and with the pairwise one;
* EB: poisson_gamma_eb (Clayton-Kaldor) on the population;
* BYM2: fit_car on queen contiguity, expected = population * regional rate;
* raw: y / n (interval: exact Poisson), for reference.

Speed part: 10,000 Voronoi districts, K = 32 (target 30 s for area-to-area kriging), and a 500 x 500 cell
surface over the same districts (target 60 s for the surface step). Prints ratios to target and peak RSS.

Usage::

    PYTHONPATH=. python benchmarks/bench_geostatistics.py            # 5 replicates + speed
    PYTHONPATH=. python benchmarks/bench_geostatistics.py --quick    # 2 replicates, 2,000-district speed run
"""

from __future__ import annotations

import platform
import resource
import sys
import time
import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely

from areamap import build_graph, fit_car, poisson_gamma_eb, poisson_interval
from areamap.geostatistics import cross_validate_smoothers, discretize_areas, poisson_kriging, risk_variogram
from areamap.geostatistics._variogram import VariogramModel

SIDE = 100.0
BASE_RATE = 1.5e-3


def voronoi_districts(seeds: np.ndarray) -> gpd.GeoDataFrame:
    frame = shapely.box(0, 0, SIDE, SIDE)
    cells = shapely.voronoi_polygons(shapely.multipoints(seeds), extend_to=frame)
    geoms = shapely.intersection(np.asarray(shapely.get_parts(cells)), frame)
    # order cells like the seeds (voronoi_polygons does not keep the input order)
    tree = shapely.STRtree(geoms)
    si, gi = tree.query(shapely.points(seeds), predicate="within")
    order = np.empty(len(seeds), dtype=int)
    order[si] = gi
    return gpd.GeoDataFrame(geometry=geoms[order], index=pd.Index([f"D{i:05d}" for i in range(len(seeds))],
                                                                  name="district"))


def density(x, y):
    """People per km^2: a dense town around (30, 65) on a thin rural background (invented)."""
    return 20.0 + 4000.0 * np.exp(-((x - 30) ** 2 + (y - 65) ** 2) / (2 * 8.0**2))


def true_risk(x, y):
    return np.exp(0.35 * np.sin(x / 14.0) + 0.25 * np.cos(y / 18.0)
                  + 0.4 * np.exp(-((x - 72) ** 2 + (y - 28) ** 2) / (2 * 9.0**2)))


def region(rng: np.random.Generator, n: int):
    town = rng.normal([30, 65], 7.0, (int(0.55 * n), 2))
    rural = rng.uniform(0, SIDE, (n - town.shape[0], 2))
    seeds = np.clip(np.vstack([town, rural]), 0.01, SIDE - 0.01)
    areas = voronoi_districts(seeds)
    fine = discretize_areas(areas, points_per_area=64)
    X, W = fine.coords, fine.weights
    dens = density(X[..., 0], X[..., 1]) * (W > 0)
    area_km2 = shapely.area(areas.geometry.values)
    pop = np.maximum(np.round((dens * W).sum(1) * area_km2), 50.0)  # area x mean density
    pw = dens / dens.sum(1, keepdims=True)
    rr = (pw * true_risk(X[..., 0], X[..., 1])).sum(1)
    return areas, pop, rr


def accuracy(replicates: int, n: int) -> pd.DataFrame:
    rows = []
    rng = np.random.default_rng(20261202)
    for rep in range(replicates):
        areas, pop, rr = region(rng, n)
        truth = BASE_RATE * rr
        y = rng.poisson(pop * truth).astype(float)
        m = y.sum() / pop.sum()
        graph = build_graph(areas, method="queen", name_column=None)
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            v = risk_variogram(y, pop, areas)
            pk = poisson_kriging(y, pop, areas, variogram=v, per=1.0)
        t_pk = time.perf_counter() - t0
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            v2 = risk_variogram(y, pop, areas, poisson_correction="pairwise")
            pk2 = poisson_kriging(y, pop, areas, variogram=v2, per=1.0)
        t_pk2 = time.perf_counter() - t0
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            eb = poisson_gamma_eb(y, pop)
        t_eb = time.perf_counter() - t0
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            car = fit_car(pd.Series(y, areas.index), pd.Series(pop * m, areas.index), graph)
        t_car = time.perf_counter() - t0
        low, high = poisson_interval(y)
        est = {
            "Poisson kriging": (np.maximum(pk.rate, 1e-9), pk.rate_low, pk.rate_high, t_pk),
            "Poisson kriging, pairwise": (np.maximum(pk2.rate, 1e-9), pk2.rate_low, pk2.rate_high, t_pk2),
            "EB (Poisson-gamma)": (eb.rr_mean, eb.rr_low, eb.rr_high, t_eb),
            "BYM2": (car.rr_mean * m, car.rr_low * m, car.rr_high * m, t_car),
            "raw rate": (np.maximum(y, 0.5) / pop, np.asarray(low) / pop, np.asarray(high) / pop, 0.0),
        }
        if rep == 0:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                cv = cross_validate_smoothers(y, pop, areas, graph=graph, kriging=pk2, car_folds=10, seed=1)
            # check the noise-corrected MSE against the error of the held-out predictions vs the true risk
            e = pop * m
            true_rr = truth / m
            actual = {k: float(np.sum(e * (cv.predictions[k] - true_rr) ** 2) / e.sum()) for k in cv.scores.index}
            print("held-out prediction (replicate 0; kriging with the pairwise correction):")
            print(cv.scores.assign(mse_vs_truth=pd.Series(actual)).to_string(float_format=lambda x: f"{x:.4f}"))
        small = pop < np.median(pop)
        for name, (e, lo, hi, t) in est.items():
            err = np.log(e) - np.log(truth)
            cover = (lo <= truth) & (truth <= hi)
            rows.append({"replicate": rep, "method": name, "rmse_log": np.sqrt(np.mean(err**2)),
                         "rmse_log_small": np.sqrt(np.mean(err[small] ** 2)),
                         "coverage": cover.mean(), "coverage_small": cover[small].mean(), "seconds": t})
        print(f"replicate {rep}: {n} districts, population {pop.min():.0f}-{pop.max():.0f}, "
              f"{v.model} variogram (nugget {v.nugget:.3g}, sill {v.sill:.3g}, range {v.range:.3g} km), "
              f"{'' if v.spatial_structure else 'NO STRUCTURE, '}"
              f"{int((pk.negative_weight_count > 0).sum())} districts with negative weights; pairwise: {v2.model} "
              f"(nugget {v2.nugget:.3g}, sill {v2.sill:.3g}, range {v2.range:.3g} km)", flush=True)
    return pd.DataFrame(rows)


def speed(n: int, surface: int) -> None:
    rng = np.random.default_rng(7)
    areas = voronoi_districts(rng.uniform(0, SIDE, (n, 2)))
    pop = rng.integers(500, 50_000, n).astype(float)
    xy = np.column_stack([areas.centroid.x, areas.centroid.y])
    y = rng.poisson(pop * BASE_RATE * true_risk(xy[:, 0], xy[:, 1])).astype(float)
    vm = VariogramModel("exponential", nugget=0.05, partial_sill=0.1, range=15.0)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        risk_variogram(y, pop, areas)
    t_var = time.perf_counter() - t0
    t0 = time.perf_counter()
    pts = discretize_areas(areas)
    t_disc = time.perf_counter() - t0
    t0 = time.perf_counter()
    res = poisson_kriging(y, pop, areas, variogram=vm, points=pts, neighbours=32)
    t_area = time.perf_counter() - t0
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    t0 = time.perf_counter()
    res2 = poisson_kriging(y, pop, areas, variogram=vm, points=pts, neighbours=32,
                           surface_shape=(surface, surface))
    t_both = time.perf_counter() - t0
    rss2 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    assert np.allclose(res.relative_risk, res2.relative_risk)
    t_surf = t_both - t_area
    print(f"\nspeed: {n} districts, K = 32, {int(np.median(pts.counts))} points per district (median), "
          f"{pts.coords.shape[1]} slots")
    print(f"  semivariogram (all pairs within half the extent): {t_var:6.1f} s")
    print(f"  discretisation:                                   {t_disc:6.1f} s")
    print(f"  area-to-area kriging + leave-one-out:             {t_area:6.1f} s  "
          f"(ratio to 30 s target: {(t_disc + t_area) / 30:.2f}, incl. discretisation)   peak RSS {rss:.0f} MB")
    print(f"  {surface} x {surface} surface (extra time):             {t_surf:6.1f} s  "
          f"(ratio to 60 s target: {t_surf / 60:.2f})   peak RSS {rss2:.0f} MB")


def main(argv: list[str]) -> int:
    quick = "--quick" in argv
    print(f"python {platform.python_version()} on {platform.machine()}; numpy {np.__version__}")
    df = accuracy(2 if quick else 5, 300 if quick else 400)
    table = df.groupby("method", sort=False)[["rmse_log", "rmse_log_small", "coverage", "coverage_small",
                                               "seconds"]].mean()
    print("\nmean over replicates (small = districts below the median population):")
    print(table.to_string(float_format=lambda x: f"{x:.3f}"))
    if "--no-speed" not in argv:
        speed(2_000 if quick else 10_000, 200 if quick else 500)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
