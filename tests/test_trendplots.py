"""Tests of areamap.trendplots (figures of the space-time model)."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np
import pandas as pd
import pytest

from areamap import fit_spacetime
from areamap.errors import InputError
from areamap.trendplots import plot_district_trends, plot_regional_trend
from conftest import grid_graph


@pytest.fixture(scope="module")
def fit():
    g = grid_graph(3, 3)
    rng = np.random.default_rng(4)
    cols = [f"2026-W{t:02d}" for t in range(40, 46)]
    e = pd.DataFrame(np.full((9, 6), 4.0), index=g.ids, columns=cols)
    y = pd.DataFrame(rng.poisson(4.0, (9, 6)), index=g.ids, columns=cols)
    return fit_spacetime(y, e, g)


def test_regional_trend_draws_observed_trend_and_band(fit):
    ax = plot_regional_trend(fit)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert labels == ["regional trend, 95% interval", "regional trend (model)", "observed cases"]
    observed = ax.lines[1].get_ydata()
    np.testing.assert_allclose(observed, np.nansum(fit.observed, axis=0))  # the plotted totals are the data
    assert [t.get_text() for t in ax.get_xticklabels()] == [str(w) for w in fit.weeks]


def test_district_trends_one_panel_per_district_with_forecast(fit):
    fig = plot_district_trends(fit, ["r0c0", "r1c1"], names={"r0c0": "Alder"})
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert len(visible) == 2
    assert visible[0].get_title() == "Alder"
    # the forecast error bar sits at the newest week
    bars = [c for c in visible[0].containers]
    assert len(bars) == 1
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    assert legend[0] == "observed"


def test_district_trends_rejects_unknown_ids(fit):
    with pytest.raises(InputError, match="not in the space-time fit"):
        plot_district_trends(fit, ["nowhere"])
