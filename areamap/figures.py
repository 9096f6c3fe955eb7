"""Figures for a bulletin page: a labelled locator map and the regional weekly curve.

Like :mod:`areamap.maps`, every function draws on the ``ax`` it is given (or a
new figure), never calls ``show()`` and returns the Axes. Text is at least
7.5 pt, so a figure drawn at its display width (96 CSS px per inch) keeps every
label at 10 px or more.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.colors import to_rgba

from ._classify import _DIVERGING_LAB, _lab_to_rgb
from .errors import InputError, ParameterError, format_examples
from .maps import (
    _SMALL_PT,
    _area_mask,
    _area_paths,
    _check_gdf,
    _draw,
    _frame_map,
    _new_ax,
    _plain,
)

__all__ = ["locator_keys", "locator_map", "weekly_curve"]

#: Fill of highlighted districts on the locator map: the warm end of the diverging palette
#: ("excess"), the same colour that means "raised" on every other map of the bulletin.
HIGHLIGHT_COLOUR = (*(float(v) for v in _lab_to_rgb(_DIVERGING_LAB[2])[0]), 1.0)
_CONTEXT_FACE = "#E9E7E3"
_CONTEXT_EDGE = "#FFFFFF"


def locator_keys(n: int) -> list[str]:
    """Short keys ``"1"``, ``"2"``, ... for ``n`` labelled districts (table order).

    Examples
    --------
    >>> locator_keys(3)
    ['1', '2', '3']
    """
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
        raise ParameterError(f"The 'n' parameter of locator_keys must be an integer >= 0. Got {n!r} instead.")
    return [str(i + 1) for i in range(int(n))]


def _overlaps(boxes: np.ndarray) -> bool:
    """True when any two boxes (x0, y0, x1, y1) intersect."""
    if len(boxes) < 2:
        return False
    x0, y0, x1, y1 = (boxes[:, j] for j in range(4))
    hit = (x0[:, None] < x1[None, :]) & (x0[None, :] < x1[:, None]) & (y0[:, None] < y1[None, :]) & (
        y0[None, :] < y1[:, None])
    np.fill_diagonal(hit, False)
    return bool(hit.any())


def _nudge_apart(ax: Axes, texts: list) -> None:
    """Move key labels that collide with an earlier one up or down by their height (a few tries each).

    Keys are short, so a small move keeps them on or next to their district; the label's anchor point
    stays recorded in ``xy`` and only the drawn position changes.
    """
    renderer = ax.figure.canvas.get_renderer()
    placed: list[np.ndarray] = []
    to_data = ax.transData.inverted()
    for t in texts:
        box = np.array(t.get_window_extent(renderer).extents)
        h = box[3] - box[1]
        x0, y0 = ax.transData.transform(t.xy)
        for dy in (0.0, 0.9 * h, -0.9 * h, 1.8 * h, -1.8 * h):
            trial = box + np.array([0, dy, 0, dy])
            if not any(_overlaps(np.vstack([p_, trial])) for p_ in placed):
                break
        if dy:
            t.set_position(tuple(to_data.transform((x0, y0 + dy))))
        placed.append(box + np.array([0, dy, 0, dy]))


def locator_map(
    gdf,
    highlight,
    *,
    order: Sequence | None = None,
    labels: str = "auto",
    label_column: str = "area_name",
    ax: Axes | None = None,
    title: str | None = None,
) -> Axes:
    """A plain map that says where the highlighted districts are, each one labelled.

    Parameters
    ----------
    gdf : GeoDataFrame
        Boundaries with a name column.
    highlight : boolean mask or list of area ids
        The districts to show and label (e.g. the flagged ones).
    order : sequence of area ids, optional
        Order of the highlighted districts in the table beside the map; key
        ``"1"`` is the first. Default: the boundaries' order.
    labels : {"auto", "names", "keys"}, default="auto"
        ``"names"`` writes each district's name, ``"keys"`` its short key
        (matching a "key" column in the table), ``"auto"`` names unless two
        names would overlap or leave the map, then keys.
    label_column : str, default="area_name"
    ax : matplotlib Axes, optional
    title : str, optional

    Returns
    -------
    matplotlib Axes
        Labels are texts with ``gid="locator-label"``; the Axes' gid is
        ``"locator-names"`` or ``"locator-keys"`` to say which were used.

    Notes
    -----
    Other districts are a light warm grey with white borders, so the map is
    a background that only says "where"; the highlighted ones take the
    package's "excess" orange. Labels have a white halo so they read over any
    fill. Overlap is tested on the drawn text boxes (display coordinates).

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame({"area_name": ["Ashby", "Brook"]},
    ...                      geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1)], crs=27700)
    >>> ax = locator_map(g, [True, False])
    >>> [t.get_text() for t in ax.texts if t.get_gid() == "locator-label"]
    ['Ashby']
    """
    func = "locator_map"
    _check_gdf(gdf, func)
    if labels not in ("auto", "names", "keys"):
        raise ParameterError(
            f"The 'labels' parameter of {func} must be one of 'auto', 'names', 'keys'. Got {labels!r} instead."
        )
    mask = _area_mask(gdf, highlight, func, "highlight")
    ids = gdf.index[mask]
    if order is not None:
        order = list(order)
        missing = [i for i in order if i not in set(ids)]
        if missing or len(set(order)) != len(ids):
            raise InputError(
                f"The 'order' of {func} must list each highlighted district once; "
                f"{format_examples(missing) if missing else 'some are missing or repeated'}."
            )
        ids = pd.Index(order)
    names = (gdf[label_column] if label_column in gdf.columns else pd.Series(gdf.index.astype(str), index=gdf.index))
    ax = _new_ax(ax, figsize=(4.6, 4.6))
    paths = _area_paths(gdf.geometry)
    face = np.tile(to_rgba(_CONTEXT_FACE), (len(gdf), 1))
    face[mask] = HIGHLIGHT_COLOUR
    _draw(ax, paths, face, gid="areas", edgecolor=_CONTEXT_EDGE, linewidth=0.6)
    _frame_map(ax, gdf)
    pts = gdf.geometry.loc[ids].representative_point()
    keys = locator_keys(len(ids))
    halo = [patheffects.withStroke(linewidth=2.6, foreground="white")]

    def put(texts: list[str]) -> list:
        return [ax.annotate(_plain(t), (x, y), fontsize=8, ha="center", va="center", zorder=6,
                            path_effects=halo, gid="locator-label", annotation_clip=False)
                for t, x, y in zip(texts, pts.x, pts.y)]

    use = "keys" if labels == "keys" else "names"
    drawn = put([str(names.loc[i]) for i in ids] if use == "names" else keys)
    if labels == "auto" and drawn:
        renderer = ax.figure.canvas.get_renderer()
        boxes = np.array([t.get_window_extent(renderer).extents for t in drawn])
        frame = ax.get_window_extent(renderer).extents
        outside = (boxes[:, 0] < frame[0]) | (boxes[:, 2] > frame[2]) | (boxes[:, 1] < frame[1]) | (
            boxes[:, 3] > frame[3])
        if _overlaps(boxes) or outside.any():
            for t in drawn:
                t.remove()
            use = "keys"
            drawn = put(keys)
    if use == "keys" and len(drawn) > 1:
        _nudge_apart(ax, drawn)
    ax.set_gid(f"locator-{use}")
    if title:
        ax.set_title(_plain(title), loc="left", fontsize=10)
    return ax


def weekly_curve(
    weekly_cases,
    *,
    population: float | None = None,
    current: Sequence[str] | None = None,
    ax: Axes | None = None,
    title: str | None = None,
    cases_label: str = "cases per week",
    rate_label: str = "per 100,000 per week",
    current_label: str = "this period",
) -> Axes:
    """The region's cases per ISO week, with the analysed period shaded.

    Parameters
    ----------
    weekly_cases : Series
        Cases per week, indexed by ISO week (``"2026-W47"``), oldest first.
    population : float, optional
        Regional population; adds a right-hand axis with the weekly rate per
        100,000 (the same bars read on a second scale).
    current : sequence of str, optional
        The weeks of the analysed period (shaded and labelled).
    ax : matplotlib Axes, optional
    title : str, optional
    cases_label, rate_label, current_label : str
        Axis and marker texts (for translation).

    Returns
    -------
    matplotlib Axes
        Bars have ``gid="weekly-cases"``; the shaded span ``gid="current-period"``.

    Notes
    -----
    Rate per 100,000 = ``100000 * cases / population``. The population is
    taken as constant over the weeks shown, so the rate axis is a rescaling
    of the count axis. The curve shows all reported cases; the last weeks may
    still grow with late reports.

    Examples
    --------
    >>> import pandas as pd
    >>> s = pd.Series([3, 5, 4], index=["2026-W45", "2026-W46", "2026-W47"])
    >>> ax = weekly_curve(s, population=50_000, current=["2026-W47"])
    >>> len([p for p in ax.patches if p.get_gid() == "weekly-cases"])
    3
    """
    func = "weekly_curve"
    if not isinstance(weekly_cases, pd.Series):
        raise ParameterError(
            f"The 'weekly_cases' parameter of {func} must be a pandas Series indexed by ISO week. "
            f"Got {type(weekly_cases).__name__} instead."
        )
    y = pd.to_numeric(weekly_cases, errors="coerce").to_numpy(float)
    if len(y) == 0 or not np.all(np.isfinite(y)) or (y < 0).any():
        raise InputError(f"{func} needs at least one week and finite counts >= 0 for every week.")
    if population is not None and not (np.isfinite(population) and population > 0):
        raise ParameterError(f"The 'population' parameter of {func} must be a positive number. "
                             f"Got {population!r} instead.")
    weeks = [str(w) for w in weekly_cases.index]
    cur = set(current or ())
    unknown = sorted(cur - set(weeks))
    if unknown:
        raise InputError(f"{func}: current week(s) {format_examples(unknown)} are not among the weeks given.")
    ax = _new_ax(ax, figsize=(7.0, 2.8))
    x = np.arange(len(weeks))
    in_cur = np.array([w in cur for w in weeks])
    colours = np.where(in_cur[:, None], np.array(HIGHLIGHT_COLOUR)[None, :], np.array(to_rgba("#8C8A86"))[None, :])
    bars = ax.bar(x, y, width=0.8, color=colours, gid="weekly-cases")
    for b in bars:
        b.set_gid("weekly-cases")
    if in_cur.any():
        lo, hi = np.flatnonzero(in_cur)[[0, -1]]
        span = ax.axvspan(lo - 0.5, hi + 0.5, color="#F3E6DA", zorder=0, gid="current-period")
        span.set_gid("current-period")
        ax.text((lo + hi) / 2, 1.0, _plain(current_label), transform=ax.get_xaxis_transform(), ha="center",
                va="bottom", fontsize=_SMALL_PT, color="#5A2A0A")
    step = max(1, int(np.ceil(len(weeks) / 10)))
    ticks = x[::-1][::step][::-1]
    ax.set_xticks(ticks, [weeks[i] for i in ticks], fontsize=_SMALL_PT, rotation=30, ha="right",
                  rotation_mode="anchor")
    ax.tick_params(axis="y", labelsize=_SMALL_PT)
    ax.set_xlim(-0.6, len(weeks) - 0.4)
    ax.set_ylabel(_plain(cases_label), fontsize=8)
    for side in ("top",):
        ax.spines[side].set_visible(False)
    if population is not None:
        f = 1e5 / float(population)
        sec = ax.secondary_yaxis("right", functions=(lambda v: v * f, lambda v: v / f))
        sec.set_ylabel(_plain(rate_label), fontsize=8)
        sec.tick_params(labelsize=_SMALL_PT)
        sec.set_gid("rate-axis")
    if title:
        ax.set_title(_plain(title), loc="left", fontsize=10)
    return ax
