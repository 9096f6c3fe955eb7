"""Figures of the space-time model: the regional weekly curve and small multiples of districts.

Both take a :class:`~areamap.spacetime.SpaceTimeFit`. Weekly counts are drawn as they are:
small counts are not hidden, so check local disclosure rules before publishing a figure of
districts with few cases.
"""

from __future__ import annotations

import numpy as np

from ._params import check_positive_int
from .errors import InputError

__all__ = ["plot_regional_trend", "plot_district_trends"]

#: observed counts (dark grey), model band (blue), forecast (orange): distinct under the common
#: colour-vision deficiencies and in greyscale by lightness
_OBSERVED = "#333333"
_BAND = "#4a90c8"
_FORECAST = "#e08a1e"


def _week_labels(weeks) -> list[str]:
    return [str(w) for w in weeks]


def plot_regional_trend(fit, *, ax=None):
    """Observed cases per week in the whole region with the model's regional trend and 95% band.

    The trend line is the expected count of each week times exp(b0 + g_t), the regional
    level of the space-time model; the band is its 95% credible interval.

    Parameters
    ----------
    fit : SpaceTimeFit
    ax : matplotlib Axes, optional

    Returns
    -------
    matplotlib.axes.Axes

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> from areamap import fit_spacetime
    >>> from areamap.graphs import AreaGraph
    >>> ids = [f"d{i}" for i in range(4)]
    >>> g = AreaGraph.from_edges(ids, [("d0", "d1"), ("d1", "d2"), ("d2", "d3")])
    >>> y = pd.DataFrame(np.arange(20).reshape(4, 5) % 7, index=ids, columns=range(5))
    >>> e = pd.DataFrame(np.full((4, 5), 3.0), index=ids, columns=range(5))
    >>> ax = plot_regional_trend(fit_spacetime(y, e, g, forecast=False))
    >>> len(ax.lines) >= 2
    True
    """
    import matplotlib.pyplot as plt

    if ax is None:
        _, ax = plt.subplots(figsize=(8.0, 4.0), layout="constrained")
    wk = fit.week_table()
    x = np.arange(len(wk))
    ax.fill_between(x, wk["trend_cases_low"], wk["trend_cases_high"], color=_BAND, alpha=0.25, linewidth=0,
                    label="regional trend, 95% interval")
    ax.plot(x, wk["trend_cases"], color=_BAND, linewidth=2, label="regional trend (model)")
    ax.plot(x, wk["observed"], "o-", color=_OBSERVED, linewidth=1, markersize=4, label="observed cases")
    ax.set_xticks(x, _week_labels(wk.index), rotation=45, ha="right", fontsize=9)
    ax.set_ylabel("cases per week")
    ax.set_ylim(bottom=0)
    ax.legend(loc="upper left", fontsize=9, frameon=False)
    ax.set_title("Cases per week in the region and the model's regional trend", fontsize=10)
    return ax


def plot_district_trends(fit, districts, *, names=None, ncols: int = 3, max_panels: int = 12):
    """Small multiples: each district's weekly counts against the model's band and its forecast.

    For every week the band is E_it times the approximate 95% band of RR_it from the fit
    with all weeks; the newest week also shows the forecast (predictive mean and 95%
    interval of the count from the fit without that week), the comparison behind the
    "emerging" flag.

    Parameters
    ----------
    fit : SpaceTimeFit
    districts : sequence of district ids
        At most ``max_panels`` are drawn (in the order given).
    names : mapping of id to display name, optional
    ncols : int, default=3
    max_panels : int, default=12

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib.pyplot as plt

    ncols = check_positive_int(ncols, "ncols", "plot_district_trends")
    max_panels = check_positive_int(max_panels, "max_panels", "plot_district_trends")
    districts = list(districts)[:max_panels]
    pos = {k: i for i, k in enumerate(fit.ids)}
    unknown = [d for d in districts if d not in pos]
    if unknown:
        raise InputError(f"District id(s) {unknown[:5]} are not in the space-time fit.")
    n = max(len(districts), 1)
    ncols = min(ncols, n)
    nrows = int(np.ceil(n / ncols))
    fig, axes = plt.subplots(nrows, ncols, figsize=(2.9 * ncols, 2.5 * nrows), squeeze=False,
                             layout="constrained")
    w = len(fit.weeks)
    x = np.arange(w)
    for ax, d in zip(axes.ravel(), districts):
        i = pos[d]
        e = fit.expected[i]
        ax.fill_between(x, e * fit.risk_band_low[i], e * fit.risk_band_high[i], color=_BAND, alpha=0.25,
                        linewidth=0)
        ax.plot(x, e * fit.risk_mean[i], color=_BAND, linewidth=1.5)
        ax.plot(x, fit.observed[i], "o", color=_OBSERVED, markersize=3.5)
        if np.isfinite(fit.forecast_mean[i]):
            ax.errorbar([w - 1 + 0.25], [fit.forecast_mean[i]],
                        yerr=[[fit.forecast_mean[i] - fit.forecast_low[i]], [fit.forecast_high[i] - fit.forecast_mean[i]]],
                        fmt="s", color=_FORECAST, markersize=4, capsize=2, linewidth=1.2)
        label = names.get(d, d) if names is not None else d
        ax.set_title(str(label), fontsize=10)
        ax.set_xticks([0, w - 1], [str(fit.weeks[0]), str(fit.weeks[-1])], fontsize=10)
        ax.tick_params(axis="y", labelsize=10)
        ax.set_ylim(bottom=0)
    for ax in axes.ravel()[len(districts):]:
        ax.set_visible(False)
    if not districts:
        axes.ravel()[0].set_visible(True)
        axes.ravel()[0].text(0.5, 0.5, "no districts to show", ha="center", va="center")
        axes.ravel()[0].set_axis_off()
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = [Line2D([], [], marker="o", linestyle="", color=_OBSERVED, label="observed"),
               Patch(color=_BAND, alpha=0.4, label="model, 95% band"),
               Line2D([], [], marker="s", color=_FORECAST, label="forecast of newest week, 95% interval")]
    fig.legend(handles=handles, loc="outside lower center", ncols=2, fontsize=10, frameon=False)
    return fig
