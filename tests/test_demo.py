"""Tests of areamap.demo: the invented demo region."""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from scipy import stats
from scipy.sparse.csgraph import connected_components

from areamap.config import load_config
from areamap.demo import CLUSTER_LAST_WEEKS, DEMO_LAST_WEEK, write_demo
from areamap.errors import ParameterError
from areamap.intake import load_study, week_range

SEED = 7


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory) -> Path:
    return write_demo(tmp_path_factory.mktemp("demo"), seed=SEED).parent


@pytest.fixture(scope="module")
def demo_study(demo_dir):
    return load_study(load_config(demo_dir / "run.toml"))


@pytest.fixture(scope="module")
def districts(demo_dir) -> gpd.GeoDataFrame:
    return gpd.read_file(demo_dir / "districts.gpkg")


def _touch_matrix(geoms) -> np.ndarray:
    arr = np.asarray(geoms, dtype=object)
    i, j = shapely.STRtree(arr).query(arr, predicate="intersects")
    m = np.zeros((len(arr), len(arr)), bool)
    m[i, j] = True
    np.fill_diagonal(m, False)
    return m


def test_files_written(demo_dir):
    names = {p.name for p in demo_dir.iterdir()}
    assert {"districts.gpkg", "cases.csv", "population.csv", "run.toml", "truth.csv", "README.txt"} <= names
    assert "invented" in (demo_dir / "README.txt").read_text().lower()


def test_region_shape(districts):
    assert len(districts) >= 150
    assert districts["district_id"].is_unique and districts["district_name"].is_unique
    assert districts.geometry.is_valid.all() and not districts.geometry.is_empty.any()
    assert set(districts.geom_type) <= {"Polygon", "MultiPolygon"}
    assert districts.crs.is_projected and districts.crs.axis_info[0].unit_name == "metre"
    # districts tile the land without overlaps (sum of areas = area of the union, up to float rounding)
    union = shapely.union_all(districts.geometry.to_numpy())
    np.testing.assert_allclose(districts.area.sum(), union.area, rtol=1e-6)  # 1 m grid snapping, float sums


def test_at_least_one_island(districts):
    m = _touch_matrix(districts.geometry.to_numpy())
    isolated = np.flatnonzero(m.sum(axis=1) == 0)
    assert len(isolated) >= 1
    for k in isolated:
        others = districts.geometry.drop(index=districts.index[k])
        assert others.distance(districts.geometry.iloc[k]).min() > 1_000  # metres offshore, clearly separate


def test_mainland_is_connected(districts):
    m = _touch_matrix(districts.geometry.to_numpy())
    n_comp, _ = connected_components(m, directed=False)
    n_isolated = int((m.sum(axis=1) == 0).sum())
    assert n_comp == 1 + n_isolated


def test_age_groups_weeks_and_counts(demo_study):
    assert len(demo_study.age_groups) >= 2
    assert len(demo_study.weeks) >= 26
    assert demo_study.weeks[-1] == DEMO_LAST_WEEK
    assert list(demo_study.weeks) == week_range(demo_study.weeks[0], DEMO_LAST_WEEK)
    assert demo_study.total_cases > 1000


def test_population_varies_with_small_districts(demo_study):
    total = demo_study.population_matrix().sum(axis=1)
    assert total.min() < 1000  # small-number districts on purpose
    assert total.max() / total.min() > 20
    assert any("fewer than 1,000 people" in n for n in demo_study.notes)


def test_planted_cluster_is_contiguous(demo_dir, districts):
    truth = pd.read_csv(demo_dir / "truth.csv", dtype={"district_id": str})
    ids = truth.loc[truth["in_planted_cluster"] == 1, "district_id"]
    assert 6 <= len(ids) <= 10
    assert truth.loc[truth["in_planted_cluster"] == 1, "cluster_rr"].between(2, 3).all()
    sub = districts.set_index("district_id").loc[ids]
    n_comp, _ = connected_components(_touch_matrix(sub.geometry.to_numpy()), directed=False)
    assert n_comp == 1
    assert (truth["island"] == 1).sum() >= 1
    assert not truth.loc[truth["island"] == 1, "in_planted_cluster"].any()


def test_planted_cluster_shows_in_recent_counts(demo_dir, demo_study):
    # Indirect standardization with internal age-specific rates of the recent weeks (common practice), then an
    # exact Poisson test of the cluster's observed total against its expected total (scipy.stats.poisson).
    truth = pd.read_csv(demo_dir / "truth.csv", dtype={"district_id": str}).set_index("district_id")
    recent = demo_study.weeks[-CLUSTER_LAST_WEEKS:]
    cases = demo_study.case_matrix(recent)
    pop = demo_study.population_matrix()
    rates = cases.sum() / pop.sum()
    expected = (pop * rates).sum(axis=1)
    observed = cases.sum(axis=1)
    in_cl = truth.loc[observed.index, "in_planted_cluster"].to_numpy() == 1
    o, e = observed[in_cl].sum(), expected[in_cl].sum()
    assert o / e > 1.5  # planted relative risk 2.5 times a trend near 1
    assert stats.poisson.sf(o - 1, e) < 1e-6
    # Earlier weeks: no excess in the same districts beyond the smooth trend (ratio well below the planted 2.5)
    early = demo_study.case_matrix(demo_study.weeks[:-CLUSTER_LAST_WEEKS])
    rates0 = early.sum() / pop.sum()
    e0 = (pop * rates0).sum(axis=1)[in_cl].sum()
    assert early.sum(axis=1)[in_cl].sum() / e0 < 1.5


def test_same_seed_same_bytes(tmp_path, demo_dir):
    again = write_demo(tmp_path / "again", seed=SEED).parent
    for name in ("cases.csv", "population.csv", "truth.csv", "run.toml"):
        assert (again / name).read_bytes() == (demo_dir / name).read_bytes(), name


def test_other_seed_other_data(tmp_path, demo_dir):
    other = write_demo(tmp_path / "other", seed=SEED + 1).parent
    assert (other / "cases.csv").read_bytes() != (demo_dir / "cases.csv").read_bytes()


def test_names_are_invented(districts):
    # A few real place names that syllable lists of this kind could produce; none may appear (common practice:
    # demo data must not point at real places).
    real = {"Ashford", "Selby", "Bramley", "Ashcombe", "Fenwick", "Usk", "Zennor", "Corley", "Oakley"}
    assert not real & set(districts["district_name"])


def test_bad_seed():
    with pytest.raises(ParameterError, match="'seed' parameter of write_demo must be an integer >= 0"):
        write_demo("unused", seed=-1)


def test_example_script_runs(tmp_path, monkeypatch, capsys):
    import runpy
    import sys

    script = Path(__file__).resolve().parents[1] / "examples" / "check_demo.py"
    monkeypatch.setattr(sys, "argv", [str(script), str(tmp_path / "ex")])
    runpy.run_path(str(script), run_name="__main__")
    out = capsys.readouterr().out
    assert "Inputs are usable." in out and "Highest crude rates per 100,000" in out
