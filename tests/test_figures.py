"""Tests of areamap.figures: the locator map and the weekly curve (inspected through their artists)."""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from matplotlib.colors import to_rgba
from shapely.geometry import box

from areamap.errors import InputError, ParameterError
from areamap.figures import HIGHLIGHT_COLOUR, locator_keys, locator_map, weekly_curve


@pytest.fixture
def grid() -> gpd.GeoDataFrame:
    """A 4 x 4 grid of 1 km squares with invented names, metric CRS."""
    geoms = [box(c * 1000, r * 1000, (c + 1) * 1000, (r + 1) * 1000) for r in range(4) for c in range(4)]
    names = [f"Quarry Hollow {i}" for i in range(16)]
    return gpd.GeoDataFrame({"area_name": names}, geometry=geoms, crs=27700,
                            index=pd.Index([f"D{i:02d}" for i in range(16)], name="area_id"))


def _labels(ax):
    return [t for t in ax.texts if t.get_gid() == "locator-label"]


def test_locator_names_when_they_fit(grid):
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 8))
    locator_map(grid, ["D00", "D15"], ax=ax)
    assert ax.get_gid() == "locator-names"
    assert sorted(t.get_text() for t in _labels(ax)) == ["Quarry Hollow 0", "Quarry Hollow 15"]
    face = next(c for c in ax.collections if c.get_gid() == "areas").get_facecolors()
    np.testing.assert_allclose(face[0], HIGHLIGHT_COLOUR, atol=1e-6)
    np.testing.assert_allclose(face[1], to_rgba("#E9E7E3"), atol=1e-6)


def test_locator_falls_back_to_keys_in_table_order_when_names_collide(grid):
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(3, 3))
    # neighbouring squares with long names cannot both be written at this size
    locator_map(grid, ["D05", "D06", "D09"], order=["D09", "D05", "D06"], ax=ax)
    assert ax.get_gid() == "locator-keys"
    labels = _labels(ax)
    assert [t.get_text() for t in labels] == ["1", "2", "3"]
    # key "1" sits on the first district of the table order (D09: column 1, row 2)
    np.testing.assert_allclose(labels[0].xy, (1500, 2500), atol=1e-6)  # centre of the square, by construction


def test_locator_keys_and_errors(grid):
    assert locator_keys(0) == []
    with pytest.raises(ParameterError, match="The 'n' parameter of locator_keys"):
        locator_keys(-1)
    with pytest.raises(ParameterError, match="The 'labels' parameter of locator_map"):
        locator_map(grid, ["D00"], labels="codes")
    with pytest.raises(InputError, match="must list each highlighted district once"):
        locator_map(grid, ["D00", "D01"], order=["D00"])


def test_weekly_curve_marks_current_period_and_rate_axis():
    s = pd.Series([10, 12, 9, 30, 33], index=[f"2026-W{w}" for w in range(43, 48)])
    ax = weekly_curve(s, population=200_000, current=["2026-W46", "2026-W47"])
    bars = [p for p in ax.patches if p.get_gid() == "weekly-cases"]
    assert [b.get_height() for b in bars] == [10, 12, 9, 30, 33]
    np.testing.assert_allclose(bars[-1].get_facecolor(), HIGHLIGHT_COLOUR, atol=1e-6)
    span = next(p for p in ax.patches if p.get_gid() == "current-period")
    xs = span.get_patch_transform().transform(span.get_path().vertices)[:, 0]
    assert min(xs) == pytest.approx(2.5) and max(xs) == pytest.approx(4.5)
    rate_axis = next(a for a in ax.child_axes if a.get_gid() == "rate-axis")
    # 30 cases in 200,000 people = 15 per 100,000 (definition of a rate per 100,000)
    ax.figure.canvas.draw()  # the secondary axis takes its limits at draw time
    ylim = ax.get_ylim()
    np.testing.assert_allclose(rate_axis.get_ylim(), np.array(ylim) * 1e5 / 200_000, rtol=1e-12)
    assert any(t.get_text() == "this period" for t in ax.texts)


def test_weekly_curve_smallest_text_is_legible():
    """Every text at >= 7.5 pt, i.e. >= 10 px at 96 CSS px per inch (9 px is the page's floor)."""
    s = pd.Series(np.arange(30), index=[f"2026-W{w:02d}" for w in range(1, 31)])
    ax = weekly_curve(s, population=1e6, current=["2026-W30"], title="Weekly cases")
    fig = ax.figure
    fig.canvas.draw()
    sizes = [t.get_fontsize() for t in fig.findobj(lambda a: hasattr(a, "get_fontsize") and a.get_text())
             if t.get_visible()]
    assert min(sizes) >= 7.5


def test_weekly_curve_errors():
    with pytest.raises(ParameterError, match="The 'weekly_cases' parameter of weekly_curve"):
        weekly_curve([1, 2])
    s = pd.Series([1, 2], index=["2026-W01", "2026-W02"])
    with pytest.raises(InputError, match="not among the weeks"):
        weekly_curve(s, current=["2026-W05"])
    with pytest.raises(ParameterError, match="The 'population' parameter of weekly_curve"):
        weekly_curve(s, population=0)
