"""Shared fixtures: small hand-built graphs and the North Carolina county file shipped with libpysal."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest

from areamap.graphs import AreaGraph


@pytest.fixture(autouse=True)
def _close_figures():
    """Close every matplotlib figure a test opened."""
    yield
    import matplotlib.pyplot as plt

    plt.close("all")


def _grid_edges(nrow: int, ncol: int, queen: bool) -> list[tuple[str, str]]:
    ids = [[f"r{r}c{c}" for c in range(ncol)] for r in range(nrow)]
    steps = [(0, 1), (1, 0)] + ([(1, 1), (1, -1)] if queen else [])
    edges = []
    for r in range(nrow):
        for c in range(ncol):
            for dr, dc in steps:
                rr, cc = r + dr, c + dc
                if 0 <= rr < nrow and 0 <= cc < ncol:
                    edges.append((ids[r][c], ids[rr][cc]))
    return edges


def grid_graph(nrow: int, ncol: int, *, queen: bool = False) -> AreaGraph:
    """Regular lattice graph built by hand (rook by default), ids 'r{row}c{col}' in row-major order."""
    ids = [f"r{r}c{c}" for r in range(nrow) for c in range(ncol)]
    return AreaGraph.from_edges(ids, _grid_edges(nrow, ncol, queen), kind="queen" if queen else "rook")


@pytest.fixture
def path3() -> AreaGraph:
    """A - B - C."""
    return AreaGraph.from_edges(["A", "B", "C"], [("A", "B"), ("B", "C")])


@pytest.fixture
def grid5_rook() -> AreaGraph:
    return grid_graph(5, 5)


@pytest.fixture
def grid5_queen() -> AreaGraph:
    return grid_graph(5, 5, queen=True)


@pytest.fixture
def graph_with_island() -> AreaGraph:
    """A 2x2 rook square (A,B,C,D) plus an island E."""
    return AreaGraph.from_edges(
        ["A", "B", "C", "D", "E"], [("A", "B"), ("A", "C"), ("B", "D"), ("C", "D")],
        names=["Ashby", "Brook", "Cairn", "Dunmere", "Eyot"],
    )


@pytest.fixture(scope="session")
def sids2_dir() -> Path:
    """Folder of the North Carolina county file shipped inside libpysal (no download)."""
    import libpysal

    d = Path(libpysal.__file__).parent / "examples" / "sids2"
    if not (d / "sids2.shp").exists():  # pragma: no cover - depends on the installed wheel
        pytest.skip("libpysal's bundled sids2 example is not installed")
    return d


@pytest.fixture(scope="session")
def nc(sids2_dir):
    """North Carolina counties (100) with 1974/1979 births and SIDS deaths, as shipped by libpysal."""
    import geopandas as gpd

    return gpd.read_file(sids2_dir / "sids2.shp")


@pytest.fixture(scope="session")
def nc_expected_1974(nc) -> pd.DataFrame:
    """Observed 1974 SIDS deaths and expected deaths from 1974 births at the overall rate (common practice)."""
    births = nc["BIR74"].to_numpy(float)
    obs = nc["SID74"].to_numpy(float)
    expected = births * obs.sum() / births.sum()
    return pd.DataFrame({"observed": obs, "expected": expected, "births": births}, index=nc["FIPS"])


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261202)
