"""An invented region with weekly case counts, for trying areamap end to end.

:func:`write_demo` writes the "Vale of Thessery": about 170 districts
(Voronoi cells of seeded points clipped to an invented coastline, plus one
offshore island district), population by three age groups, 30 weeks of case
counts ending in 2026-W47 and a ready ``run.toml``. Every name and number is
invented; the coordinates sit in open sea in a valid metric CRS (WGS 84 /
UTM zone 31N, EPSG:32631), chosen so that nothing overlaps a real place.

The counts are Poisson draws from a known relative-risk surface, written to
``truth.csv`` so that detection can be checked:

.. math::

    \\lambda_{i,t,g} = P_{i,g}\\, r_g\\, s_t\\, \\theta_i\\, c_{i,t}

with population :math:`P_{i,g}` of district *i* in age group *g*, baseline
weekly rate :math:`r_g`, a seasonal factor :math:`s_t`, a smooth spatial trend
:math:`\\theta_i` (geometric mean 1) and a planted cluster factor
:math:`c_{i,t}` (``CLUSTER_RR`` in ``CLUSTER_WEEKS`` contiguous districts
during the last ``CLUSTER_LAST_WEEKS`` weeks, 1 elsewhere).
"""

from __future__ import annotations

from collections import deque
from pathlib import Path

import numpy as np
import pandas as pd

from ._params import check_positive_int
from .intake import weeks_ending

__all__ = ["write_demo", "DEMO_LAST_WEEK", "DEMO_AGE_GROUPS", "DEMO_CRS"]

DEMO_CRS = "EPSG:32631"
"""WGS 84 / UTM zone 31N; the invented region lies in open sea near the equator."""
DEMO_LAST_WEEK = "2026-W47"
"""Last week of the demo counts (fixed, so outputs do not depend on today's date)."""
DEMO_N_WEEKS = 30
DEMO_AGE_GROUPS = ("0-14", "15-64", "65+")
N_MAINLAND = 170
CLUSTER_SIZE = 8
CLUSTER_RR = 2.5
CLUSTER_LAST_WEEKS = 4
# Baseline weekly notification rates per person by age group (invented).
BASE_RATES = np.array([30e-5, 12e-5, 45e-5])
_CENTRE = np.array([500_000.0, 150_000.0])  # metres, UTM 31N: open sea

_PREFIXES = (
    "Abrel", "Bessar", "Calvern", "Drenn", "Elvar", "Fennir", "Galven", "Hesker", "Ilvar", "Jorven",
    "Kelth", "Lunder", "Morvel", "Nesker", "Orvel", "Pellan", "Quenn", "Rasker", "Sollen", "Tarven",
    "Ulvar", "Vessen", "Wenner", "Yarrel", "Zellin", "Brannoch", "Cressel", "Dorvan", "Thessa",
)
_SUFFIXES = (
    "wick", "mere", "holt", "stead", "combe", "thorpe", "wold", "haven", "brook", "ford", "by", "ton", "dale",
)
_DECOR = ("{} Vale", "{} Marsh", "Upper {}", "Lower {}", "{} Heath", "{} Cross")


def _names(rng: np.random.Generator, n: int) -> list[str]:
    """Unique invented district names from syllable lists."""
    out: list[str] = []
    seen: set[str] = set()
    while len(out) < n:
        base = (rng.choice(_PREFIXES) + rng.choice(_SUFFIXES)).replace("thth", "th")
        name = rng.choice(_DECOR).format(base) if rng.random() < 0.25 else base
        if name not in seen:
            seen.add(name)
            out.append(str(name))
    return out


def _coastline(rng: np.random.Generator):
    """Irregular invented mainland: a radial function with random harmonics."""
    import shapely

    theta = np.linspace(0, 2 * np.pi, 360, endpoint=False)
    r = np.ones_like(theta)
    for k in range(2, 9):
        r += rng.uniform(0.05, 0.13) / (k / 2) * np.cos(k * theta + rng.uniform(0, 2 * np.pi))
    r += 0.01 * rng.standard_normal(theta.size)  # ragged shoreline
    x = _CENTRE[0] + 62_000 * r * np.cos(theta)
    y = _CENTRE[1] + 45_000 * r * np.sin(theta)
    return shapely.make_valid(shapely.Polygon(np.column_stack([x, y]))), theta, r


def _points(rng: np.random.Generator, coast, city: np.ndarray, n: int) -> np.ndarray:
    """Seed points inside the coastline: some spread evenly, a third crowded round the main town."""
    import shapely

    minx, miny, maxx, maxy = coast.bounds
    pts: list[np.ndarray] = []
    shapely.prepare(coast)
    n_city = n // 3
    tries = 0
    while len(pts) < n:
        tries += 1
        if tries > 200_000:  # pragma: no cover - geometry guarantees enough room
            raise RuntimeError("could not place demo districts")
        if len(pts) < n_city:
            p = city + rng.normal(0, 9_000, 2)
            min_gap = 1_800.0
        else:
            p = np.array([rng.uniform(minx, maxx), rng.uniform(miny, maxy)])
            min_gap = 4_500.0
        if not coast.contains(shapely.Point(p)):
            continue
        if pts and np.min(np.hypot(*(np.asarray(pts) - p).T)) < min_gap:
            continue
        if shapely.distance(coast.exterior, shapely.Point(p)) < 800:
            continue
        pts.append(p)
    return np.asarray(pts)


def _adjacency_lists(geoms: np.ndarray) -> list[list[int]]:
    import shapely

    tree = shapely.STRtree(geoms)
    i, j = tree.query(geoms, predicate="intersects")
    nb: list[list[int]] = [[] for _ in range(len(geoms))]
    for a, b in zip(i.tolist(), j.tolist()):
        if a != b:
            nb[a].append(b)
    return nb


def _grow_cluster(start: int, nb: list[list[int]], xy: np.ndarray, size: int) -> list[int]:
    """Contiguous set of ``size`` districts grown outward from ``start`` by distance."""
    chosen = [start]
    frontier = deque(nb[start])
    while len(chosen) < size and frontier:
        cand = sorted(set(frontier) - set(chosen), key=lambda k: np.hypot(*(xy[k] - xy[start])))
        if not cand:
            break
        nxt = cand[0]
        chosen.append(nxt)
        frontier.extend(nb[nxt])
    return chosen


def _build(seed: int):
    import geopandas as gpd
    import shapely

    rng = np.random.default_rng(seed)
    coast, theta, r = _coastline(rng)
    city = _CENTRE + np.array([-18_000.0, 9_000.0]) + rng.normal(0, 3_000, 2)
    pts = _points(rng, coast, city, N_MAINLAND)

    cells = shapely.voronoi_polygons(
        shapely.multipoints(pts), extend_to=coast.buffer(20_000), ordered=True
    )
    cells = np.asarray(shapely.get_parts(cells), dtype=object)
    cells = shapely.intersection(cells, coast)
    # Snap to a 1 m grid so that neighbouring districts share exactly the same vertices.
    cells = shapely.set_precision(cells, grid_size=1.0)
    cells = np.array([shapely.make_valid(g) if not g.is_valid else g for g in cells], dtype=object)

    # offshore island: beyond the coast's widest bulge on the east side
    k = int(np.argmax(np.where(np.cos(theta) > 0.5, r, -np.inf)))
    direction = np.array([np.cos(theta[k]) * 62_000 * r[k], np.sin(theta[k]) * 45_000 * r[k]])
    centre = _CENTRE + direction * (1 + 16_000 / np.hypot(*direction))
    ang = np.linspace(0, 2 * np.pi, 24, endpoint=False)
    rad = 3_500 * (1 + 0.2 * rng.uniform(-1, 1, ang.size))
    island = shapely.set_precision(
        shapely.Polygon(np.column_stack([centre[0] + rad * np.cos(ang), centre[1] + 0.7 * rad * np.sin(ang)])),
        grid_size=1.0,
    )

    xy = np.vstack([pts, centre])
    # ids numbered north to south, west to east; the island last
    order = np.lexsort((np.round(pts[:, 0], -3), -np.round(pts[:, 1], -4)))
    geoms = np.concatenate([cells[order], [island]])
    xy = xy[np.concatenate([order, [len(pts)]])]
    n = len(geoms)
    ids = [f"TV{i + 1:03d}" for i in range(n)]
    names = _names(rng, n - 1) + ["Skerrowholm Isle"]

    # --- population by age group
    dist_city = np.hypot(*(xy - city).T)
    total = np.exp(rng.normal(np.log(7_000), 0.6, n)) * (1 + 5 * np.exp(-(dist_city**2) / (2 * 9_000.0**2)))
    urban = np.exp(-(dist_city**2) / (2 * 20_000.0**2))
    shares = np.vstack([rng.dirichlet(80 * np.array([0.16 + 0.03 * u, 0.60 + 0.08 * u, 0.24 - 0.11 * u])) for u in urban])

    # --- planted cluster: away from the main town and the coast, all-mainland neighbourhood
    nb = _adjacency_lists(geoms)
    dist_coast = shapely.distance(coast.exterior, shapely.points(xy))
    candidates = [
        i for i in range(n - 1)
        if len(nb[i]) >= 5 and dist_coast[i] > 15_000 and dist_city[i] > 25_000
    ]
    start = int(rng.choice(candidates))
    cluster = sorted(_grow_cluster(start, nb, xy, CLUSTER_SIZE))
    in_cluster = np.zeros(n, bool)
    in_cluster[cluster] = True

    # a few very small districts (small-number problems), outside the cluster, plus a small island
    small_pool = np.flatnonzero(~in_cluster[: n - 1] & (dist_city[: n - 1] > 15_000))
    small = rng.choice(small_pool, size=4, replace=False)
    total[small] = rng.uniform(220, 900, small.size)
    total[n - 1] = 1_450
    pop = np.rint(total[:, None] * shares).astype(np.int64)

    # --- relative-risk surface and counts
    span = np.ptp(xy, axis=0)
    u = (xy - xy.min(axis=0)) / span * 2 - 1
    log_trend = 0.35 * u[:, 0] + 0.25 * np.sin(2.5 * u[:, 1])
    trend = np.exp(log_trend - log_trend.mean())
    weeks = weeks_ending(DEMO_LAST_WEEK, DEMO_N_WEEKS)
    t = np.arange(DEMO_N_WEEKS)
    season = np.exp(0.6 * t / (DEMO_N_WEEKS - 1) - 0.3) * (1 + 0.08 * np.sin(t / 3.0))
    recent = t >= DEMO_N_WEEKS - CLUSTER_LAST_WEEKS
    cluster_factor = np.where(in_cluster[:, None] & recent[None, :], CLUSTER_RR, 1.0)  # (n, T)
    lam = (
        pop[:, None, :] * BASE_RATES[None, None, :]
        * season[None, :, None] * trend[:, None, None] * cluster_factor[:, :, None]
    )  # (n, T, G)
    counts = rng.poisson(lam)

    boundaries = gpd.GeoDataFrame(
        {"district_id": ids, "district_name": names}, geometry=list(geoms), crs=DEMO_CRS
    )
    a_idx, t_idx, g_idx = np.nonzero(counts)
    cases = pd.DataFrame({
        "district_id": np.asarray(ids)[a_idx],
        "week": np.asarray(weeks)[t_idx],
        "age_group": np.asarray(DEMO_AGE_GROUPS)[g_idx],
        "cases": counts[a_idx, t_idx, g_idx],
    }).sort_values(["week", "district_id", "age_group"], kind="stable")
    population = pd.DataFrame({
        "district_id": np.repeat(ids, len(DEMO_AGE_GROUPS)),
        "age_group": np.tile(DEMO_AGE_GROUPS, n),
        "population": pop.reshape(-1),
    })
    truth = pd.DataFrame({
        "district_id": ids,
        "district_name": names,
        "population": pop.sum(axis=1),
        "trend_rr": trend,
        "in_planted_cluster": in_cluster.astype(int),
        "cluster_rr": np.where(in_cluster, CLUSTER_RR, 1.0),
        "recent_rr": trend * np.where(in_cluster, CLUSTER_RR, 1.0),
        "island": (np.arange(n) == n - 1).astype(int),
    })
    return boundaries, cases, population, truth, weeks


_RUN_TOML = """\
# Run configuration of the invented demo region (every name and number is invented).
# Relative paths are resolved against the folder of this file.
title = "Weekly respiratory infection bulletin"
region = "Vale of Thessery"
data_source = "District notifications, invented demo data"
seed = {seed}

[boundaries]
file = "districts.gpkg"
id_column = "district_id"
name_column = "district_name"

[cases]
file = "cases.csv"
format = "counts"
id_column = "district_id"
week_column = "week"
age_column = "age_group"
count_column = "cases"
encoding = "utf-8"

[population]
file = "population.csv"
id_column = "district_id"
age_column = "age_group"
population_column = "population"

[standardization]
reference = "internal"

[graph]
method = "queen"
snap = 0.0
islands = "keep"

[period]
week = "latest"
window_weeks = 1

[clusters]
statistic = "local_moran"
permutations = 9999
adjust = "fdr"
alpha = 0.05

[smoothing]
model = "bym2"
covariates = []
threshold = 1.0

[smoothing.priors]
sigma_upper = 1.0
sigma_tail = 0.01
phi_upper = 0.5
phi_tail = 0.6667
intercept_sd = 5.0

[flags]
min_probability = 0.8
use_clusters = true
min_observed = 0

[output]
suppress_below = 5
archive = "history.sqlite"
"""

_README = """\
Vale of Thessery - invented demonstration data for areamap
==========================================================

EVERYTHING IN THIS FOLDER IS INVENTED. The region, its {n} district names,
populations and case counts do not describe any real place or person. The
coordinates use a real metric CRS ({crs}) only so that distances are in
metres; they fall in open sea.

Files
-----
districts.gpkg   district polygons (district_id, district_name); {n_island} offshore island district
cases.csv        weekly case counts by district, ISO week and age group ({first} to {last});
                 rows with zero cases are left out (they count as zero)
population.csv   population by district and age group ({ages})
truth.csv        the relative risks used to simulate the counts:
                 trend_rr (smooth spatial trend), in_planted_cluster (1 for the
                 {k} districts with raised risk), cluster_rr ({rr:g} in the last {w}
                 weeks), recent_rr = trend_rr * cluster_rr
run.toml         run configuration for `areamap check run.toml` and the bulletin

Counts were drawn as Poisson(population x age-specific weekly rate x seasonal
factor x trend_rr x cluster_rr) with seed {seed}. A few districts have only a
few hundred people, so their ratios are very unstable - on purpose.
"""


def write_demo(out_dir: str | Path, *, seed: int = 20261202) -> Path:
    """Write the invented demo region and return the path of its ``run.toml``.

    Parameters
    ----------
    out_dir : path-like
        Folder to write to (created when missing; existing demo files are
        overwritten).
    seed : int, default=20261202
        Seed of the random geometry, populations and counts. The same seed
        gives byte-identical CSV files.

    Returns
    -------
    pathlib.Path
        ``out_dir / "run.toml"``.

    Notes
    -----
    Files: ``districts.gpkg``, ``cases.csv``, ``population.csv``,
    ``truth.csv``, ``run.toml``, ``README.txt``. The planted cluster is
    ``CLUSTER_SIZE`` contiguous mainland districts with relative risk
    ``CLUSTER_RR`` in the last ``CLUSTER_LAST_WEEKS`` weeks; ``truth.csv``
    lists them. The data are invented and must not be read as describing
    any real place.

    Examples
    --------
    >>> import tempfile
    >>> cfg = write_demo(tempfile.mkdtemp(), seed=1)
    >>> cfg.name, sorted(p.name for p in cfg.parent.iterdir())[:3]
    ('run.toml', ['README.txt', 'cases.csv', 'districts.gpkg'])
    """
    seed = check_positive_int(seed, "seed", "write_demo", minimum=0)
    out = Path(out_dir).expanduser()
    out.mkdir(parents=True, exist_ok=True)
    boundaries, cases, population, truth, weeks = _build(seed)
    gpkg = out / "districts.gpkg"
    if gpkg.exists():
        gpkg.unlink()
    boundaries.to_file(gpkg, layer="districts", driver="GPKG")
    cases.to_csv(out / "cases.csv", index=False, lineterminator="\n")
    population.to_csv(out / "population.csv", index=False, lineterminator="\n")
    truth.to_csv(out / "truth.csv", index=False, float_format="%.6f", lineterminator="\n")
    (out / "run.toml").write_text(_RUN_TOML.format(seed=seed), encoding="utf-8")
    (out / "README.txt").write_text(
        _README.format(
            n=len(boundaries), crs=DEMO_CRS, n_island=int(truth["island"].sum()), first=weeks[0], last=weeks[-1],
            ages=", ".join(DEMO_AGE_GROUPS), k=int(truth["in_planted_cluster"].sum()), rr=CLUSTER_RR,
            w=CLUSTER_LAST_WEEKS, seed=seed,
        ),
        encoding="utf-8",
    )
    return out / "run.toml"
