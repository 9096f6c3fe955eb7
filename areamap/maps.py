"""Maps and diagnostic plots for disease mapping.

Every function draws with matplotlib on the ``ax`` it is given (or on a new
figure), never calls ``show()``, and returns the Axes (or the Figure for
multi-panel layouts). Inputs are plain arrays or Series aligned with the
boundaries, so the plots do not depend on how the numbers were computed.

Colours
-------
* ``"sequential"``: lightness falls steadily from a pale cream to a deep blue
  (designed in CIELAB for this package); readable in greyscale and along the
  blue–yellow axis that red–green colour-vision deficiencies keep.
* ``"diverging"``: deep blue (fewer cases than expected) through a light
  neutral to a burnt orange (more cases than expected), interpolated in CIELAB;
  blue and orange stay distinct under the common colour-vision deficiencies,
  warm means "excess". For ratios the neutral centre sits at 1 on the log scale.
* ``"cividis"``: matplotlib's colour-vision-friendly map, reversed so light
  means low.
* Local clusters: the ends of the diverging palette; groups solid, outliers hatched
  inside a thick outline of the same hue (see :func:`cluster_map`).

All maps are analytic aids, not public-health directives.
"""

from __future__ import annotations

import difflib
import math
import re
import textwrap
from collections.abc import Sequence

import numpy as np
import pandas as pd
import scipy.stats as st
import shapely
from matplotlib import patheffects
from matplotlib.axes import Axes
from matplotlib.collections import PathCollection
from matplotlib.colors import to_rgba
from matplotlib.figure import Figure
from matplotlib.patches import Patch, Rectangle
from matplotlib.path import Path

from ._classify import (
    DEFAULT_RISK_STEPS,
    SCHEMES,
    Classification,
    bivariate_colours,
    class_colours,
    classify,
    natural_breaks,
    palette_colours,
    relative_risk_breaks,
)
from ._params import check_choice, check_interval
from .autocorrelation import CLUSTER_LABELS
from .errors import GraphError, InputError, ParameterError, format_examples

__all__ = [
    "CAUTION_TEXT",
    "CLUSTER_LABELS",
    "CLUSTER_COLOURS",
    "CLUSTER_STYLE",
    "DEFAULT_RISK_STEPS",
    "SCHEMES",
    "Classification",
    "classify",
    "natural_breaks",
    "relative_risk_breaks",
    "palette_colours",
    "class_colours",
    "uncertain_areas",
    "add_map_furniture",
    "choropleth",
    "raw_beside_smoothed",
    "bivariate_colours",
    "bivariate_map",
    "exceedance_map",
    "cluster_map",
    "funnel_limits",
    "funnel_plot",
    "moran_scatterplot",
    "shrinkage_plot",
    "ranked_interval_plot",
]

#: Caution printed under every map unless ``caption=False``.
CAUTION_TEXT = (
    "Analytic aid, not a public-health directive: decisions rest with the responsible health "
    "authority. Ratios from small counts are unstable; area figures describe places, not individuals."
)

#: How the local-cluster map draws each category of :data:`CLUSTER_LABELS`: the main colour of the
#: category (fill for groups, outline-and-hatch colour for outliers) and its legend name. Designed for
#: this package (see :func:`cluster_map`, Notes); the three colours are the two ends and the neutral
#: centre of the package's diverging palette, so "high" and "low" look the same on every map. Hue says whether the district's own value is high
#: (burnt orange, the package's "excess" colour) or low (deep blue); a solid fill says its neighbours
#: agree (a group), diagonal hatching inside a thick outline of the same hue says they do not (an
#: outlier); districts with no local pattern stay almost white so the signals stand out.
CLUSTER_STYLE = {
    "High-High": {"colour": "#9B3B09", "fill": True, "hatch": None,
                  "name": "high, in a high group"},
    "Low-Low": {"colour": "#005099", "fill": True, "hatch": None,
                "name": "low, in a low group"},
    "High-Low": {"colour": "#9B3B09", "fill": False, "hatch": "////",
                 "name": "high, neighbours low"},
    "Low-High": {"colour": "#005099", "fill": False, "hatch": "\\\\",
                 "name": "low, neighbours high"},
    "not significant": {"colour": "#F5F3F0", "fill": True, "hatch": None,
                        "name": "no local pattern"},
    "no neighbours": {"colour": "#FFFFFF", "fill": True, "hatch": "..",
                      "name": "not assessed (no neighbours)"},
}

#: Main colour per cluster category (kept for callers that colour other marks by category).
CLUSTER_COLOURS = {k: v["colour"] for k, v in CLUSTER_STYLE.items()}

_MISSING_FACE = "#FFFFFF"
#: Smallest text size (points). At 96 CSS px per inch 7.5 pt is 10 px, so a figure drawn at its display
#: width keeps every label at or above 9 px even when a print layout shrinks it by 10 %.
_SMALL_PT = 7.5
_HATCH_COLOUR = "#555555"
_EDGE = "#7A7A7A"
# ------------------------------------------------------------------------ input helpers
def _check_gdf(gdf, func: str) -> None:
    if not hasattr(gdf, "geometry"):
        raise InputError(f"{func} needs a GeoDataFrame of area boundaries; got {type(gdf).__name__}.")


def _area_values(gdf, values, func: str, name: str, *, numeric: bool = True) -> np.ndarray:
    """Per-area values aligned with ``gdf``'s rows: a column name, a Series on its index, or an array."""
    if isinstance(values, str):
        if values not in gdf.columns:
            close = difflib.get_close_matches(values, [str(c) for c in gdf.columns], n=1)
            hint = f" Did you mean '{close[0]}'?" if close else ""
            raise InputError(f"The boundaries have no column '{values}' ({name} of {func}).{hint}")
        s = gdf[values]
        out = s.to_numpy()
    elif isinstance(values, pd.Series):
        if not values.index.equals(gdf.index):
            missing = gdf.index.difference(values.index)
            if len(missing) or not values.index.is_unique:
                raise InputError(
                    f"The {name} given to {func} do not cover every area: {len(missing)} area id(s) "
                    f"have no value ({format_examples(missing)}). Give a Series indexed like the "
                    "boundaries (NaN for missing)."
                )
            values = values.reindex(gdf.index)
        out = values.to_numpy()
    else:
        out = np.asarray(values)
        if out.ndim != 1 or out.size != len(gdf):
            raise InputError(
                f"The {name} given to {func} have shape {out.shape} but there are {len(gdf)} areas. "
                "Give one value per area, in the boundaries' row order."
            )
    if not numeric:
        return out
    try:
        x = np.asarray(out, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"The {name} given to {func} must be numbers (NaN for missing).") from None
    if np.any(np.isinf(x)):
        bad = np.flatnonzero(np.isinf(x))
        raise InputError(
            f"{bad.size} of the {name} given to {func} are infinite (areas "
            f"{format_examples(gdf.index[bad])}). Use NaN for a missing value."
        )
    return x


def _area_mask(gdf, mask, func: str, name: str) -> np.ndarray:
    """Boolean per-area mask from None, a boolean array/Series, or a list of area ids."""
    n = len(gdf)
    if mask is None:
        return np.zeros(n, dtype=bool)
    if isinstance(mask, pd.Series) and mask.dtype == bool:
        return _area_values(gdf, mask, func, name, numeric=False).astype(bool)
    arr = np.asarray(mask)
    if arr.dtype == bool:
        if arr.shape != (n,):
            raise InputError(f"The '{name}' mask of {func} has shape {arr.shape} but there are {n} areas.")
        return arr
    ids = pd.Index(list(mask) if not isinstance(mask, str) else [mask])
    unknown = ids.difference(gdf.index)
    if len(unknown):
        raise InputError(
            f"The '{name}' list of {func} names {len(unknown)} area id(s) not in the boundaries "
            f"({format_examples(unknown)})."
        )
    return gdf.index.isin(ids)


def _series_or_array(x, name: str, func: str) -> tuple[np.ndarray, pd.Index | None]:
    idx = x.index if isinstance(x, pd.Series) else None
    try:
        arr = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"The '{name}' values of {func} must be numbers.") from None
    if arr.ndim != 1:
        raise InputError(f"The '{name}' values of {func} must be one-dimensional; got shape {arr.shape}.")
    return arr, idx


def _aligned(func: str, **arrays) -> tuple[dict[str, np.ndarray], pd.Index | None]:
    """Convert same-length arrays/Series; Series are aligned on the first Series' index."""
    out: dict[str, np.ndarray] = {}
    index = None
    for name, x in arrays.items():
        if x is None:
            out[name] = None
            continue
        if isinstance(x, pd.Series) and index is not None and not x.index.equals(index):
            if set(x.index) != set(index):
                raise InputError(f"The '{name}' Series of {func} has different ids from the first Series.")
            x = x.reindex(index)
        arr, idx = _series_or_array(x, name, func)
        if index is None and idx is not None:
            index = idx
        out[name] = arr
    sizes = {k: v.size for k, v in out.items() if v is not None}
    if len(set(sizes.values())) > 1:
        raise InputError(f"The inputs of {func} differ in length: {sizes}. Give one value per area for each.")
    return out, index


def _check_probabilities(gdf, p: np.ndarray, func: str) -> None:
    bad = np.flatnonzero((p < 0) | (p > 1))
    if bad.size:
        raise InputError(
            f"{bad.size} probabilities given to {func} are outside [0, 1] (areas "
            f"{format_examples(gdf.index[bad])}). Give probabilities, not percentages."
        )


def _labels_for(labels, index, n: int, func: str) -> list[str]:
    if labels is None:
        return [str(i) for i in index] if index is not None else [str(i) for i in range(n)]
    lab = [str(v) for v in (labels.to_numpy() if isinstance(labels, pd.Series) else labels)]
    if len(lab) != n:
        raise InputError(f"The 'labels' of {func} has {len(lab)} entries for {n} areas.")
    return lab


# --------------------------------------------------------------------------- drawing
def _new_ax(ax: Axes | None, figsize=(7.5, 6.5)) -> Axes:
    if ax is not None:
        return ax
    import matplotlib.pyplot as plt  # lazily: pyplot picks a backend on import

    _, ax = plt.subplots(figsize=figsize, layout="constrained")
    return ax


def _map_aspect(gdf) -> float:
    minx, miny, maxx, maxy = gdf.total_bounds
    if not np.all(np.isfinite([minx, miny, maxx, maxy])) or maxx <= minx:
        return 0.8
    a = (maxy - miny) / (maxx - minx)
    if gdf.crs is not None and gdf.crs.is_geographic:
        a /= max(math.cos(math.radians((miny + maxy) / 2)), 0.05)
    return float(np.clip(a, 0.2, 3.0))


def _new_map_ax(ax: Axes | None, gdf) -> Axes:
    """A new figure shaped to the map (map about 6 inches wide, room for legend and caption)."""
    if ax is not None:
        return ax
    height = float(np.clip(6.0 * _map_aspect(gdf) + 1.6, 3.4, 9.5))
    return _new_ax(None, figsize=(9.0, height))


def _area_paths(geoms) -> list[Path]:
    """One compound matplotlib Path per area (all parts and holes), built from shapely coordinates."""
    g = np.asarray(geoms, dtype=object)
    n = g.size
    g = shapely.orient_polygons(g, exterior_cw=False)  # holes run the other way: nonzero fill leaves them open
    parts, part_area = shapely.get_parts(g, return_index=True)
    poly = shapely.get_type_id(parts) == 3
    parts, part_area = parts[poly], part_area[poly]
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    coords, coord_ring = shapely.get_coordinates(rings, return_index=True)
    per_ring = np.bincount(coord_ring, minlength=len(rings))
    ends = np.cumsum(per_ring)
    codes = np.full(len(coords), Path.LINETO, dtype=Path.code_type)
    codes[ends[per_ring > 0] - per_ring[per_ring > 0]] = Path.MOVETO
    codes[ends[per_ring > 0] - 1] = Path.CLOSEPOLY
    coord_area = part_area[ring_part][coord_ring] if len(coords) else np.zeros(0, dtype=np.int64)
    cuts = np.searchsorted(coord_area, np.arange(1, n))
    return [Path(v, c) for v, c in zip(np.split(coords, cuts), np.split(codes, cuts))]


def _linewidth(n: int) -> float:
    return 0.5 if n <= 300 else (0.25 if n <= 3000 else 0.1)


def _draw(ax: Axes, paths, facecolors, *, gid: str, edgecolor=_EDGE, linewidth=0.4, hatch=None,
          zorder=1.0, linestyle="solid") -> PathCollection:
    coll = PathCollection(paths, facecolors=facecolors, edgecolors=edgecolor, linewidths=linewidth,
                          hatch=hatch, zorder=zorder, linestyles=linestyle)
    coll.set_gid(gid)
    ax.add_collection(coll, autolim=False)
    return coll


def _frame_map(ax: Axes, gdf) -> None:
    minx, miny, maxx, maxy = gdf.total_bounds
    if not np.all(np.isfinite([minx, miny, maxx, maxy])):
        return
    dx, dy = (maxx - minx) or 1.0, (maxy - miny) or 1.0
    ax.set_xlim(minx - 0.02 * dx, maxx + 0.02 * dx)
    ax.set_ylim(miny - 0.02 * dy, maxy + 0.02 * dy)
    crs = gdf.crs
    if crs is not None and crs.is_geographic:
        ax.set_aspect(1.0 / max(math.cos(math.radians((miny + maxy) / 2)), 0.05))
    else:
        ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    for s in ax.spines.values():
        s.set_visible(False)


def _nice(x: float) -> float:
    e = math.floor(math.log10(x))
    for m in (5, 2, 1):
        if m * 10**e <= x:
            return m * 10**e
    return 10**e


def _scale_bar(ax: Axes, gdf) -> str | None:
    """Draw a scale bar in map units; return a note instead when units are unknown or degrees."""
    crs = gdf.crs
    if crs is None:
        return "Map units unknown (no CRS): no scale bar."
    if crs.is_geographic:
        return "Coordinates in degrees: no scale bar (distances vary with latitude)."
    unit = crs.axis_info[0].unit_name if crs.axis_info else "unit"
    factor = crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0
    minx, miny, maxx, maxy = gdf.total_bounds
    width = maxx - minx
    if not width > 0:
        return None
    if unit in ("metre", "meter"):
        length_m = _nice(width * factor / 5)
        length = length_m / factor
        text = f"{length_m / 1000:g} km" if length_m >= 1000 else f"{length_m:g} m"
    else:
        length = _nice(width / 5)
        text = f"{length:g} {unit}"
    x0 = minx + 0.02 * width
    y0 = miny - 0.0 * (maxy - miny)
    h = 0.012 * (maxy - miny or width)
    for i, face in enumerate(("#222222", "#FFFFFF")):
        ax.add_patch(Rectangle((x0 + i * length / 2, y0), length / 2, h, facecolor=face,
                               edgecolor="#222222", linewidth=0.6, zorder=5, gid="scale-bar"))
    ax.text(x0 + length / 2, y0 + 1.8 * h, text, ha="center", va="bottom", fontsize=_SMALL_PT, zorder=5,
            path_effects=[patheffects.withStroke(linewidth=2, foreground="white")])
    return None


def _plain(text) -> str:
    """User text drawn literally: escape '$' (matplotlib mathtext) unless already escaped."""
    return re.sub(r"(?<!\\)\$", r"\\$", str(text))


def _caption(source: str | None, caption, note: str | None) -> str | None:
    if caption is False:
        return None
    parts = []
    if source:
        parts.append(f"Source: {source}.")
    if note:
        parts.append(note)
    parts.append(caption if isinstance(caption, str) else CAUTION_TEXT)
    return _plain("\n".join(textwrap.fill(p, 110) for p in parts))


def add_map_furniture(
    ax: Axes,
    gdf,
    *,
    title: str | None = None,
    period: str | None = None,
    source: str | None = None,
    caption: bool | str = True,
    scale_bar: bool = True,
    label_areas=None,
    label_column: str | None = "area_name",
) -> Axes:
    """Title, period, scale bar, source-and-caution caption and area labels.

    Parameters
    ----------
    ax : matplotlib Axes
        A map drawn from ``gdf``.
    gdf : GeoDataFrame
        The boundaries (for the CRS, extent and label positions).
    title, period : str, optional
        Shown as the title, the period on a second line.
    source : str, optional
        Data source, first line of the caption.
    caption : bool or str, default=True
        ``True``: :data:`CAUTION_TEXT`; a string replaces it; ``False``: no caption.
    scale_bar : bool, default=True
        Draw a scale bar in map units (km for metric CRSs). With a geographic
        CRS or none, no bar is drawn and the caption says why.
    label_areas : boolean mask or list of area ids, optional
        Areas to name on the map (e.g. flagged ones).
    label_column : str, default="area_name"
        Column with the names; the index is used when it is missing.

    Returns
    -------
    matplotlib Axes
    """
    head = "\n".join(t for t in (title, period) if t)
    if head:
        ax.set_title(_plain(head), fontsize=11, loc="left")
    note = _scale_bar(ax, gdf) if scale_bar else None
    text = _caption(source, caption, note)
    if text:
        ax.text(0.0, -0.01, text, transform=ax.transAxes, ha="left", va="top", fontsize=_SMALL_PT,
                color="#333333", gid="caption")
    mask = _area_mask(gdf, label_areas, "add_map_furniture", "label_areas")
    if mask.any():
        names = (gdf[label_column] if label_column and label_column in gdf.columns
                 else pd.Series(gdf.index.astype(str), index=gdf.index))
        pts = gdf.geometry[mask].representative_point()
        for (x, y), name in zip(zip(pts.x, pts.y), names[mask]):
            ax.annotate(_plain(name), (x, y), fontsize=_SMALL_PT, ha="center", va="center", zorder=6,
                        path_effects=[patheffects.withStroke(linewidth=2.2, foreground="white")])
    return ax


def _legend(ax: Axes, handles, title: str | None, *, loc="upper left") -> None:
    leg = ax.legend(handles=handles, title=_plain(title) if title else None, loc=loc, bbox_to_anchor=(1.01, 1.0),
                    fontsize=_SMALL_PT, title_fontsize=8, frameon=False, handlelength=1.6, handleheight=1.1)
    leg.set_gid("map-legend")


# ---------------------------------------------------------------------- uncertainty
def uncertain_areas(low=None, high=None, *, max_ratio: float = 4.0, counts=None, min_count: float | None = None):
    """Mark areas whose interval is wide or whose count is small.

    Parameters
    ----------
    low, high : array-like or Series, optional
        Interval limits of a ratio (e.g. a 95% interval for the relative risk).
    max_ratio : float, default=4.0
        An interval is wide when ``high / low > max_ratio`` (or ``low <= 0``).
    counts : array-like or Series, optional
        Observed counts (or expected counts).
    min_count : float, optional
        With ``counts``: areas with ``counts < min_count`` are marked.

    Returns
    -------
    numpy.ndarray of bool or pandas.Series
        ``True`` for uncertain areas (a Series when an input was a Series).

    Notes
    -----
    The ratio ``high / low`` is the width of the interval on the log scale; a
    95% interval for a Poisson ratio is roughly ``exp(±1.96/sqrt(O))``, so
    ``max_ratio = 4`` corresponds to about 8 observed cases. Missing limits
    count as uncertain.

    Examples
    --------
    >>> uncertain_areas([0.5, 0.2, 0.9], [1.5, 2.0, 1.1], max_ratio=4).tolist()
    [False, True, False]
    """
    check_interval(max_ratio, "max_ratio", "uncertain_areas", low=1.0)
    arr, index = _aligned("uncertain_areas", low=low, high=high, counts=counts)
    if arr["low"] is None and arr["counts"] is None:
        raise ParameterError(
            "The 'low' parameter of uncertain_areas must be given (with 'high'), or 'counts' with "
            "'min_count'. Got None instead."
        )
    out = None
    if arr["low"] is not None:
        if arr["high"] is None:
            raise ParameterError("The 'high' parameter of uncertain_areas must be given with 'low'. Got None instead.")
        lo, hi = arr["low"], arr["high"]
        with np.errstate(divide="ignore", invalid="ignore"):
            wide = ~(hi / lo <= max_ratio) | (lo <= 0)
        out = wide
    if arr["counts"] is not None:
        if min_count is None:
            raise ParameterError(
                "The 'min_count' parameter of uncertain_areas must be a number when 'counts' is given. "
                "Got None instead."
            )
        small = ~(arr["counts"] >= min_count)
        out = small if out is None else (out | small)
    return pd.Series(out, index=index) if index is not None else out


# ------------------------------------------------------------------------ choropleth
def _missing_layers(ax, paths, handles, masks_labels):
    for mask, label, hatch, gid in masks_labels:
        if mask.any():
            _draw(ax, [paths[i] for i in np.flatnonzero(mask)], "none", gid=gid, edgecolor=_HATCH_COLOUR,
                  linewidth=0.0, hatch=hatch, zorder=2)
            handles.append(Patch(facecolor=_MISSING_FACE, edgecolor=_HATCH_COLOUR, hatch=hatch,
                                 linewidth=0.5, label=_plain(f"{label} ({int(mask.sum())})")))


def choropleth(
    gdf,
    column_or_values,
    *,
    scheme: str = "quantiles",
    k: int = 5,
    breaks: Sequence[float] | None = None,
    palette=None,
    centre: float | None = None,
    ax: Axes | None = None,
    title: str | None = None,
    legend: bool = True,
    legend_title: str | None = None,
    missing_label: str = "no data",
    suppressed=None,
    suppressed_label: str = "suppressed (small numbers)",
    uncertain=None,
    uncertain_style: str = "fade",
    uncertain_label: str = "uncertain (wide interval)",
    period: str | None = None,
    source: str | None = None,
    caption: bool | str = True,
    scale_bar: bool = True,
    label_areas=None,
    label_column: str | None = "area_name",
) -> Axes:
    """Map a per-area value in classes.

    Parameters
    ----------
    gdf : GeoDataFrame
        Area boundaries (polygons / multipolygons).
    column_or_values : str, Series or array
        A column of ``gdf``, a Series indexed like ``gdf`` or an array in its
        row order. NaN is drawn hatched and labelled ``missing_label``.
    scheme, k, breaks
        Passed to :func:`classify`.
    palette : {"sequential", "diverging", "cividis"} or list of colours, optional
        Default: ``"diverging"`` for ``scheme="relative_risk"`` (centred on 1 on
        the log scale), otherwise ``"sequential"``.
    centre : float, optional
        Value given the neutral colour of a diverging palette (default 1.0 for
        ``scheme="relative_risk"``).
    ax : matplotlib Axes, optional
    title, period, source, caption, scale_bar, label_areas, label_column
        Map furniture, see :func:`add_map_furniture`.
    legend : bool, default=True
        Legend with each class's range and number of areas.
    legend_title : str, optional
        Defaults to the column name.
    missing_label : str, default="no data"
        Legend text for NaN values (e.g. ``"suppressed"``).
    suppressed : boolean mask or list of ids, optional
        Areas whose values must not be shown (disclosure control); they are
        left out of the classes and drawn cross-hatched as ``suppressed_label``.
    uncertain : boolean mask or list of ids, optional
        Areas to fade (``uncertain_style="fade"``) or hatch (``"hatch"``),
        e.g. from :func:`uncertain_areas`.

    Returns
    -------
    matplotlib Axes

    Notes
    -----
    Large areas dominate the eye whatever their population; a ratio's colour
    says nothing about its precision, so pair maps of ratios with the
    uncertainty options, a funnel plot or a smoothed map. Area-level patterns
    do not describe individuals (ecological fallacy).

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame({"v": [1.0, 2.0, float("nan")]},
    ...                      geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1), box(2, 0, 3, 1)], crs=27700)
    >>> ax = choropleth(g, "v", scheme="user", breaks=[1.5])
    >>> [t.get_text() for t in ax.get_legend().get_texts()]
    ['≤ 1.5 (1)', '> 1.5 (1)', 'no data (1)']
    """
    func = "choropleth"
    _check_gdf(gdf, func)
    check_choice(uncertain_style, "uncertain_style", func, ("fade", "hatch"))
    x = _area_values(gdf, column_or_values, func, "values")
    hidden = _area_mask(gdf, suppressed, func, "suppressed")
    shown = np.where(hidden, np.nan, x)
    cls = classify(shown, scheme=scheme, k=k, breaks=breaks)
    if palette is None:
        palette = "diverging" if scheme == "relative_risk" else "sequential"
    if centre is None and scheme == "relative_risk":
        centre = 1.0
    cols = np.array(class_colours(cls, palette, centre=centre))
    face = np.tile(to_rgba(_MISSING_FACE), (len(gdf), 1))
    ok = cls.class_index >= 0
    face[ok] = cols[cls.class_index[ok]]
    unc = _area_mask(gdf, uncertain, func, "uncertain") & ok
    if uncertain_style == "fade":
        face[unc, 3] = 0.3
    ax = _new_map_ax(ax, gdf)
    paths = _area_paths(gdf.geometry)
    lw = _linewidth(len(gdf))
    _draw(ax, paths, face, gid="areas", linewidth=lw)
    handles = [Patch(facecolor=c, edgecolor=_EDGE, linewidth=0.5, label=f"{lab} ({n})")
               for c, lab, n in zip(cols, cls.labels, cls.counts)]
    _missing_layers(ax, paths, handles, [
        (np.isnan(x) & ~hidden, missing_label, "////", "missing"),
        (hidden, suppressed_label, "xxxx", "suppressed"),
    ])
    if unc.any():
        if uncertain_style == "hatch":
            _draw(ax, [paths[i] for i in np.flatnonzero(unc)], "none", gid="uncertain",
                  edgecolor=_HATCH_COLOUR, linewidth=0.0, hatch="....", zorder=2)
            handles.append(Patch(facecolor="#FFFFFF", edgecolor=_HATCH_COLOUR, hatch="....",
                                 label=_plain(f"{uncertain_label} ({int(unc.sum())})")))
        else:
            handles.append(Patch(facecolor=(0.5, 0.5, 0.5, 0.3), edgecolor=_EDGE,
                                 label=_plain(f"faded: {uncertain_label} ({int(unc.sum())})")))
    _frame_map(ax, gdf)
    if legend:
        default_title = column_or_values if isinstance(column_or_values, str) else (
            column_or_values.name if isinstance(column_or_values, pd.Series) else None)
        _legend(ax, handles, legend_title or default_title)
    add_map_furniture(ax, gdf, title=title, period=period, source=source, caption=caption,
                      scale_bar=scale_bar, label_areas=label_areas, label_column=label_column)
    return ax


def raw_beside_smoothed(
    gdf,
    raw,
    smoothed,
    *,
    breaks: Sequence[float] | None = None,
    palette="diverging",
    titles: tuple[str, str] = ("Standardized ratio (raw)", "Smoothed relative risk"),
    title: str | None = None,
    period: str | None = None,
    source: str | None = None,
    caption: bool | str = True,
    missing_label: str = "no data",
    figsize: tuple[float, float] | None = None,
) -> Figure:
    """Raw standardized ratios and smoothed relative risks side by side, same classes and colours.

    Parameters
    ----------
    gdf : GeoDataFrame
    raw, smoothed : str, Series or array
        Per-area ratios (columns of ``gdf`` or aligned values).
    breaks : sequence of float, optional
        Cut points shared by both maps; default :func:`relative_risk_breaks`.
    palette : default="diverging"
        Centred on 1 on the log scale.
    titles : pair of str
        Panel titles.
    title, period, source, caption
        Figure title and caption (one caption under both panels).

    Returns
    -------
    matplotlib Figure
        Two map axes; each legend counts the areas per class, so the move of
        areas towards the middle classes shows the shrinkage.

    Notes
    -----
    Smoothing pulls ratios based on few cases towards the overall (or local)
    level; extreme raw ratios in small areas are mostly noise. Smoothed values
    are model estimates, not observations.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame(geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1)], crs=27700)
    >>> fig = raw_beside_smoothed(g, [0.4, 2.5], [0.8, 1.3])
    >>> len(fig.axes)
    2
    """
    cuts = tuple(breaks) if breaks is not None else relative_risk_breaks()
    if figsize is None:
        figsize = (15.0, float(np.clip(4.8 * _map_aspect(gdf) + 2.0, 3.6, 9.5)))
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=figsize, layout="constrained")
    for i, (ax, vals, sub) in enumerate(zip(axes, (raw, smoothed), titles)):
        choropleth(gdf, vals, scheme="relative_risk", breaks=cuts, palette=palette, centre=1.0, ax=ax,
                   title=sub, legend_title="ratio (areas)", missing_label=missing_label,
                   caption=False, scale_bar=(i == 0))
    head = "\n".join(t for t in (title, period) if t)
    if head:
        fig.suptitle(_plain(head), fontsize=12)
    text = _caption(source, caption, None)
    if text:
        fig.supxlabel(text, fontsize=_SMALL_PT, x=0.01, ha="left", color="#333333")
    return fig


# ----------------------------------------------------------------------- bivariate
def bivariate_map(
    gdf,
    relative_risk,
    exceedance,
    *,
    risk_breaks: Sequence[float] = (0.9, 1.1),
    probability_breaks: Sequence[float] = (0.2, 0.8),
    threshold: float = 1.0,
    ax: Axes | None = None,
    title: str | None = None,
    legend: bool = True,
    missing_label: str = "no data",
    period: str | None = None,
    source: str | None = None,
    caption: bool | str = True,
    scale_bar: bool = True,
    label_areas=None,
    label_column: str | None = "area_name",
) -> Axes:
    """Relative-risk class crossed with exceedance-probability class, with a 3 × 3 legend.

    Parameters
    ----------
    gdf : GeoDataFrame
    relative_risk : str, Series or array
        Estimated relative risk per area (e.g. posterior mean).
    exceedance : str, Series or array
        ``P(relative risk > threshold)`` per area, in [0, 1].
    risk_breaks : pair of float, default=(0.9, 1.1)
        Two cut points giving three risk classes (right-closed).
    probability_breaks : pair of float, default=(0.2, 0.8)
        Two cut points giving three probability classes.
    threshold : float, default=1.0
        Only used in the legend text.
    ax, title, legend, missing_label, period, source, caption, scale_bar, label_areas, label_column
        As in :func:`choropleth`.

    Returns
    -------
    matplotlib Axes
        The legend is an inset axes (``gid="bivariate-legend"``) of nine
        rectangles, each labelled with its number of areas.

    Notes
    -----
    Colours come from :func:`bivariate_colours`: the inconclusive column is
    pale whatever the risk class, so a high estimate the data barely support
    looks pale, and only clear signals are saturated.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame(geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1)], crs=27700)
    >>> ax = bivariate_map(g, [0.7, 1.6], [0.1, 0.95])
    >>> len(ax.child_axes[0].patches)
    9
    """
    func = "bivariate_map"
    _check_gdf(gdf, func)
    rb = np.asarray(risk_breaks, dtype=float)
    pb = np.asarray(probability_breaks, dtype=float)
    if rb.shape != (2,) or not rb[0] < rb[1] or rb[0] <= 0:
        raise ParameterError(
            f"The 'risk_breaks' parameter of {func} must be two increasing positive numbers. "
            f"Got {list(risk_breaks)!r} instead."
        )
    if pb.shape != (2,) or not 0 < pb[0] < pb[1] < 1:
        raise ParameterError(
            f"The 'probability_breaks' parameter of {func} must be two increasing numbers in (0, 1). "
            f"Got {list(probability_breaks)!r} instead."
        )
    rr = _area_values(gdf, relative_risk, func, "relative risks")
    pr = _area_values(gdf, exceedance, func, "exceedance probabilities")
    _check_probabilities(gdf, pr, func)
    cr = classify(rr, scheme="user", breaks=rb)
    cp = classify(pr, scheme="user", breaks=pb)
    ok = (cr.class_index >= 0) & (cp.class_index >= 0)
    grid = bivariate_colours()
    face = np.tile(to_rgba(_MISSING_FACE), (len(gdf), 1))
    face[ok] = grid[cr.class_index[ok], cp.class_index[ok]]
    ax = _new_map_ax(ax, gdf)
    paths = _area_paths(gdf.geometry)
    lw = _linewidth(len(gdf))
    _draw(ax, paths, face, gid="areas", linewidth=lw)
    handles: list = []
    _missing_layers(ax, paths, handles, [(~ok, missing_label, "////", "missing")])
    _frame_map(ax, gdf)
    if legend:
        counts = np.zeros((3, 3), dtype=int)
        np.add.at(counts, (cr.class_index[ok], cp.class_index[ok]), 1)
        leg = ax.inset_axes([1.12, 0.4, 0.32, 0.32])
        leg.set_gid("bivariate-legend")
        for r in range(3):
            for c in range(3):
                leg.add_patch(Rectangle((c, r), 1, 1, facecolor=grid[r, c], edgecolor="white",
                                        linewidth=1.0, gid=f"bivariate-cell-{r}-{c}"))
                lum = 0.2126 * grid[r, c, 0] + 0.7152 * grid[r, c, 1] + 0.0722 * grid[r, c, 2]
                leg.text(c + 0.5, r + 0.5, str(counts[r, c]), ha="center", va="center", fontsize=_SMALL_PT,
                         color="white" if lum < 0.45 else "#222222")
        leg.set_xlim(0, 3)
        leg.set_ylim(0, 3)
        leg.set_aspect("equal")
        leg.set_xticks([0.5, 1.5, 2.5], [s.replace(" – ", "–") for s in cp.labels], fontsize=_SMALL_PT,
                       rotation=35, ha="right", rotation_mode="anchor")
        leg.set_yticks([0.5, 1.5, 2.5], [s.replace(" – ", "–") for s in cr.labels], fontsize=_SMALL_PT)
        leg.set_xlabel(f"P(relative risk > {threshold:g})", fontsize=_SMALL_PT)
        leg.set_ylabel("Relative risk", fontsize=_SMALL_PT)
        leg.tick_params(length=0)
        for s in leg.spines.values():
            s.set_visible(False)
        leg.set_title("areas per class", fontsize=_SMALL_PT)
        if handles:
            _legend(ax, handles, None, loc="upper left")
    add_map_furniture(ax, gdf, title=title, period=period, source=source, caption=caption,
                      scale_bar=scale_bar, label_areas=label_areas, label_column=label_column)
    return ax


def exceedance_map(
    gdf,
    probability,
    *,
    threshold: float = 1.0,
    bands: tuple[float, float] = (0.2, 0.8),
    ax: Axes | None = None,
    title: str | None = None,
    legend: bool = True,
    missing_label: str = "no data",
    period: str | None = None,
    source: str | None = None,
    caption: bool | str = True,
    scale_bar: bool = True,
    label_areas=None,
    label_column: str | None = "area_name",
) -> Axes:
    """Map of ``P(relative risk > threshold)`` with the 0.2 / 0.8 decision bands marked.

    Parameters
    ----------
    gdf : GeoDataFrame
    probability : str, Series or array
        Posterior exceedance probabilities in [0, 1].
    threshold : float, default=1.0
        The threshold the probabilities refer to (legend text only).
    bands : pair of float, default=(0.2, 0.8)
        Areas with probability above ``bands[1]`` are outlined solid ("evidence
        of raised risk"), below ``bands[0]`` dashed ("evidence of lowered risk").
    ax, title, legend, missing_label, period, source, caption, scale_bar, label_areas, label_column
        As in :func:`choropleth`.

    Returns
    -------
    matplotlib Axes

    Notes
    -----
    Five right-closed classes with cut points ``bands[0]/4, bands[0], bands[1],
    1 - (1 - bands[1])/4`` (0.05, 0.2, 0.8, 0.95 by default), coloured with the
    diverging palette so "inconclusive" is neutral. Richardson et al. (2004)
    found that calling an area raised when the probability exceeds 0.8 (lowered
    below 0.2) keeps false alarms low, at the cost of missing true excesses
    that are small (about 1.5-fold) unless counts are large.

    References
    ----------
    Richardson, S., Thomson, A., Best, N. & Elliott, P. (2004). Interpreting
    posterior relative risk estimates in disease-mapping studies.
    Environmental Health Perspectives 112(9), 1016–1025.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame(geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1)], crs=27700)
    >>> ax = exceedance_map(g, [0.1, 0.9])
    >>> any("raised risk" in t.get_text() for t in ax.get_legend().get_texts())
    True
    """
    func = "exceedance_map"
    _check_gdf(gdf, func)
    b = np.asarray(bands, dtype=float)
    if b.shape != (2,) or not 0 < b[0] < b[1] < 1:
        raise ParameterError(
            f"The 'bands' parameter of {func} must be two increasing numbers in (0, 1). Got {list(bands)!r} instead."
        )
    p = _area_values(gdf, probability, func, "probabilities")
    _check_probabilities(gdf, p, func)
    cuts = (b[0] / 4, b[0], b[1], 1 - (1 - b[1]) / 4)
    ax = choropleth(gdf, p, scheme="user", breaks=cuts, palette="diverging", ax=ax, title=title,
                    legend=False, missing_label=missing_label, period=period, source=source,
                    caption=caption, scale_bar=scale_bar, label_areas=label_areas, label_column=label_column)
    cls = classify(p, scheme="user", breaks=cuts)
    cols = palette_colours("diverging", 5)
    paths = _area_paths(gdf.geometry)
    high, low = p > b[1], p < b[0]
    if high.any():
        _draw(ax, [paths[i] for i in np.flatnonzero(high)], "none", gid="band-raised",
              edgecolor="#000000", linewidth=1.2, zorder=3)
    if low.any():
        _draw(ax, [paths[i] for i in np.flatnonzero(low)], "none", gid="band-lowered",
              edgecolor="#000000", linewidth=1.0, zorder=3, linestyle="dashed")
    if legend:
        labels = ["≤ {0:g}", "{0:g} – {1:g}", "{1:g} – {2:g} inconclusive", "{2:g} – {3:g}", "> {3:g}"]
        handles = [Patch(facecolor=c, edgecolor=_EDGE, linewidth=0.5,
                         label=f"{lab.format(*cuts)} ({n})") for c, lab, n in zip(cols, labels, cls.counts)]
        handles.append(Patch(facecolor="none", edgecolor="#000000", linewidth=1.2,
                             label=f"above {b[1]:g}: evidence of raised risk ({int(high.sum())})"))
        handles.append(Patch(facecolor="none", edgecolor="#000000", linewidth=1.0, linestyle="dashed",
                             label=f"below {b[0]:g}: evidence of lowered risk ({int(low.sum())})"))
        if np.isnan(p).any():
            handles.append(Patch(facecolor=_MISSING_FACE, edgecolor=_HATCH_COLOUR, hatch="////",
                                 label=_plain(f"{missing_label} ({int(np.isnan(p).sum())})")))
        _legend(ax, handles, f"P(relative risk > {threshold:g})\ndecision bands: Richardson et al. 2004")
    return ax


def cluster_map(
    gdf,
    clusters,
    *,
    ax: Axes | None = None,
    title: str | None = None,
    legend: bool = True,
    missing_label: str = "no data",
    period: str | None = None,
    source: str | None = None,
    caption: bool | str = True,
    scale_bar: bool = True,
    label_areas=None,
    label_column: str | None = "area_name",
    names: dict[str, str] | None = None,
) -> Axes:
    """Map local-cluster categories: groups as solid fills, outliers as hatched outlines.

    Parameters
    ----------
    gdf : GeoDataFrame
    clusters : str, Series or array of str
        One of :data:`CLUSTER_LABELS` per area (None/NaN for missing).
    ax, title, legend, missing_label, period, source, caption, scale_bar, label_areas, label_column
        As in :func:`choropleth`.
    names : dict, optional
        Legend names per category (keys from :data:`CLUSTER_LABELS`), e.g. a
        translation; default the ``name`` entries of :data:`CLUSTER_STYLE`.

    Returns
    -------
    matplotlib Axes
        The legend is an inset axes (``gid="cluster-legend"``) with three
        columns: the swatch, the category name and the number of districts.

    Notes
    -----
    Encoding (chosen for this package): two visual channels for the two
    questions a reader asks. Hue answers "is this district's own value high or
    low?" (burnt orange high, deep blue low; the same directions as the ratio
    maps, and the pair stays apart under red-green colour-vision deficiency).
    Texture answers "do its neighbours agree?": a solid fill marks a group
    (the published quadrant terms High-High and Low-Low), a thick outline
    with diagonal hatching in the same hue marks an outlier (High-Low,
    Low-High), so an outlier never reads as a weaker version of a group, and
    it stays recognisable in greyscale print. Districts without a local
    pattern are almost white and recede. The number of districts per category
    sits in its own legend column so names and counts align.

    A cluster label says the area and its neighbours together are unusual
    under random placement of the values; it depends on the neighbour graph
    and the multiple-testing rule, and a single area's label is less reliable
    than the pattern.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> g = gpd.GeoDataFrame(geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1)], crs=27700)
    >>> ax = cluster_map(g, ["High-High", "not significant"])
    >>> leg = next(a for a in ax.child_axes if a.get_gid() == "cluster-legend")
    >>> [t.get_text() for t in leg.texts][1:4]
    ['districts', 'high, in a high group', '1']
    """
    func = "cluster_map"
    _check_gdf(gdf, func)
    lab = _area_values(gdf, clusters, func, "cluster labels", numeric=False)
    s = pd.Series(lab, dtype=object)
    miss = s.isna().to_numpy()
    bad = sorted(set(s[~miss].astype(str)) - set(CLUSTER_LABELS))
    if bad:
        raise InputError(
            f"{func} got unknown cluster label(s) {format_examples(repr(b) for b in bad)}. "
            f"Use one of {', '.join(repr(c) for c in CLUSTER_LABELS)} (None for missing)."
        )
    legend_names = {k: v["name"] for k, v in CLUSTER_STYLE.items()}
    if names is not None:
        unknown = sorted(set(names) - set(CLUSTER_LABELS))
        if unknown:
            raise ParameterError(
                f"The 'names' parameter of {func} must map categories from CLUSTER_LABELS to legend names. "
                f"Got unknown key(s) {format_examples(repr(u) for u in unknown)} instead."
            )
        legend_names.update({k: str(v) for k, v in names.items()})
    face = np.tile(to_rgba(_MISSING_FACE), (len(gdf), 1))
    for name, style in CLUSTER_STYLE.items():
        if style["fill"]:
            face[(s == name).to_numpy()] = to_rgba(style["colour"])
    ax = _new_map_ax(ax, gdf)
    paths = _area_paths(gdf.geometry)
    lw = _linewidth(len(gdf))
    _draw(ax, paths, face, gid="areas", linewidth=lw)
    for name, style in CLUSTER_STYLE.items():
        members = np.flatnonzero((s == name).to_numpy())
        if style["hatch"] is None or not len(members):
            continue
        outlier = not style["fill"]
        _draw(ax, [paths[i] for i in members], "none", gid=f"cluster-{name.lower().replace(' ', '-')}",
              edgecolor=style["colour"] if outlier else _HATCH_COLOUR,
              linewidth=max(1.6 * lw, 1.0) if outlier else 0.0, hatch=style["hatch"], zorder=2)
    handles: list = []
    _missing_layers(ax, paths, handles, [(miss, missing_label, "////", "missing")])
    _frame_map(ax, gdf)
    if legend:
        _cluster_legend(ax, s, legend_names, miss, missing_label)
    add_map_furniture(ax, gdf, title=title, period=period, source=source, caption=caption,
                      scale_bar=scale_bar, label_areas=label_areas, label_column=label_column)
    return ax


def _cluster_legend(ax: Axes, s: pd.Series, names: dict[str, str], miss: np.ndarray, missing_label: str) -> Axes:
    """Legend as a small table: swatch | category name | number of districts (right-aligned)."""
    rows = [(CLUSTER_STYLE[k], names[k], int((s == k).sum())) for k in CLUSTER_LABELS]
    if miss.any():
        rows.append(({"colour": _HATCH_COLOUR, "fill": False, "hatch": "////", "thin": True},
                      missing_label, int(miss.sum())))
    n = len(rows) + 1
    leg = ax.inset_axes([1.03, 1.0 - 0.075 * n, 0.62, 0.075 * n])
    leg.set_gid("cluster-legend")
    leg.set_xlim(0, 10)
    leg.set_ylim(n, 0)
    leg.axis("off")
    leg.text(0, 0.5, "Local pattern", fontsize=8, fontweight="bold", va="center")
    leg.text(10, 0.5, "districts", fontsize=_SMALL_PT, va="center", ha="right", color="#444444")
    for i, (style, name, count) in enumerate(rows, start=1):
        y = i + 0.5
        outline = not style["fill"]
        leg.add_patch(Rectangle((0, y - 0.35), 1.2, 0.7, facecolor="white" if outline else style["colour"],
                                edgecolor=style["colour"] if outline else _EDGE,
                                linewidth=0.6 if style.get("thin") or not outline else 1.4,
                                hatch=style["hatch"], gid=f"cluster-swatch-{i - 1}"))
        leg.text(1.6, y, _plain(name), fontsize=_SMALL_PT, va="center")
        leg.text(10, y, str(count), fontsize=_SMALL_PT, va="center", ha="right")
    return leg


# ------------------------------------------------------------------------ funnel
def funnel_limits(expected, *, level: float = 0.95, interpolate: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Exact Poisson control limits for a standardized ratio ``O / E`` at expected count ``E``.

    Parameters
    ----------
    expected : array-like of float
        Expected counts (> 0).
    level : float, default=0.95
        Two-sided coverage; the limits use ``p = (1 - level)/2`` and ``1 - p``.
    interpolate : bool, default=True
        Smooth the steps caused by the discreteness of the Poisson
        distribution (Spiegelhalter 2005, below). ``False`` returns the plain
        quantiles divided by ``E``.

    Returns
    -------
    low, high : numpy.ndarray
        Limits for the ratio at each ``E``.

    Notes
    -----
    Let ``r_p`` be the ``p``-quantile of Poisson(``E``), the smallest ``r`` with
    ``F(r) = P(Y <= r) >= p``. Without interpolation the limit is ``r_p / E``.
    With interpolation (Spiegelhalter 2005, appendix; recalled from memory)

    ``alpha = (F(r_p) - p) / (F(r_p) - F(r_p - 1))``,   limit = ``(r_p - alpha) / E``,

    which runs linearly from ``(r_p - 1)/E`` at ``p = F(r_p - 1)`` to ``r_p/E`` at
    ``p = F(r_p)``, making the limits continuous in ``E``. A lower limit below
    zero is set to 0. The limits assume the target ratio is 1 and ignore
    overdispersion; with many areas some fall outside the 95% limits by chance
    (about 1 in 20), which is why the 99.8% limits are the ones to act on.

    References
    ----------
    Spiegelhalter, D. J. (2005). Funnel plots for comparing institutional
    performance. Statistics in Medicine 24, 1185–1202.

    Examples
    --------
    >>> lo, hi = funnel_limits([10.0], level=0.95, interpolate=False)
    >>> float(lo[0]), float(hi[0])
    (0.4, 1.7)
    """
    check_interval(level, "level", "funnel_limits", low=0.0, high=1.0)
    e = np.asarray(expected, dtype=float)
    if np.any(~(e > 0)):
        raise ParameterError(
            f"The 'expected' parameter of funnel_limits must be counts > 0. Got "
            f"{format_examples(e[~(e > 0)])} instead."
        )
    out = []
    for p in ((1 - level) / 2, 1 - (1 - level) / 2):
        r = st.poisson.ppf(p, e)
        if interpolate:
            f_r = st.poisson.cdf(r, e)
            f_below = st.poisson.cdf(r - 1, e)
            alpha = (f_r - p) / (f_r - f_below)
            out.append(np.maximum(r - alpha, 0.0) / e)
        else:
            out.append(r / e)
    return out[0], out[1]



def _plain_log_ticks(axis) -> None:
    """Label a log-scaled axis with plain numbers (0.5, 1, 2) instead of powers of ten."""
    from matplotlib.ticker import FuncFormatter, LogLocator

    fmt = FuncFormatter(lambda v, _pos: f"{v:g}")
    axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(fmt)
    axis.set_minor_formatter(FuncFormatter(lambda _v, _pos: ""))

def funnel_plot(
    observed,
    expected,
    *,
    labels=None,
    ax: Axes | None = None,
    levels: tuple[float, float] = (0.95, 0.998),
    title: str | None = None,
    log_x: bool = False,
    caption: bool | str = True,
) -> Axes:
    """Standardized ratio against expected count with exact Poisson control limits.

    Parameters
    ----------
    observed, expected : array-like or Series
        Observed and expected counts per area; areas with ``expected <= 0``
        are left out (stated in the caption).
    labels : sequence of str or Series, optional
        Area names for the out-of-control points (default: the Series index).
    ax : matplotlib Axes, optional
    levels : pair of float, default=(0.95, 0.998)
        Inner (dashed) and outer (solid) limits.
    title : str, optional
    log_x : bool, default=False
        Log scale for the expected counts.
    caption : bool or str, default=True
        Caution under the plot.

    Returns
    -------
    matplotlib Axes
        Points beyond the outer limits are vermillion and named; beyond the
        inner limits orange; others grey.

    Notes
    -----
    Limits from :func:`funnel_limits` (interpolated), evaluated on a grid for the
    lines and at each area's own ``E`` for the flags. The funnel shows that
    ratios from small expected counts vary widely by chance alone.

    References
    ----------
    Spiegelhalter, D. J. (2005). Funnel plots for comparing institutional
    performance. Statistics in Medicine 24, 1185–1202.

    Examples
    --------
    >>> ax = funnel_plot([5, 30, 12], [10.0, 12.0, 11.0], labels=["A", "B", "C"])
    >>> [t.get_text() for t in ax.texts if t.get_gid() == "funnel-label"]
    ['B']
    """
    func = "funnel_plot"
    arr, index = _aligned(func, observed=observed, expected=expected)
    o, e = arr["observed"], arr["expected"]
    lv = tuple(check_interval(v, "levels", func, low=0.0, high=1.0) for v in levels)
    if len(lv) != 2 or not lv[0] < lv[1]:
        raise ParameterError(
            f"The 'levels' parameter of {func} must be two increasing coverages. Got {levels!r} instead."
        )
    if np.any(o < 0):
        raise InputError(f"{func} got {int((o < 0).sum())} negative observed counts; counts must be >= 0.")
    names = _labels_for(labels, index, o.size, func)
    use = (e > 0) & np.isfinite(e) & np.isfinite(o)
    ax = _new_ax(ax, figsize=(7.5, 5.5))
    if not use.any():
        raise InputError(f"{func} has no area with expected count > 0 to plot.")
    eu, ou = e[use], o[use]
    ratio = ou / eu
    emin, emax = eu.min(), eu.max()
    grid = np.geomspace(max(emin * 0.7, 1e-3), emax * 1.1, 400)
    styles = {lv[0]: ("dashed", 0.9), lv[1]: ("solid", 1.1)}
    for lev in lv:
        lo, hi = funnel_limits(grid, level=lev)
        ls, lw = styles[lev]
        ax.plot(grid, lo, color="#333333", linestyle=ls, linewidth=lw, label=f"{100 * lev:g}% limits",
                gid=f"funnel-limit-{lev:g}")
        ax.plot(grid, hi, color="#333333", linestyle=ls, linewidth=lw, gid=f"funnel-limit-{lev:g}")
    ax.axhline(1.0, color="#777777", linewidth=0.8, zorder=0)
    lo_in, hi_in = funnel_limits(eu, level=lv[0])
    lo_out, hi_out = funnel_limits(eu, level=lv[1])
    outer = (ratio < lo_out) | (ratio > hi_out)
    inner = ((ratio < lo_in) | (ratio > hi_in)) & ~outer
    rest = ~(outer | inner)
    for mask, colour, lab in ((rest, "#8C8C8C", "within limits"),
                              (inner, "#E69F00", f"outside {100 * lv[0]:g}% limits"),
                              (outer, "#D55E00", f"outside {100 * lv[1]:g}% limits")):
        ax.scatter(eu[mask], ratio[mask], s=18, color=colour, edgecolor="#333333", linewidth=0.3,
                   label=f"{lab} ({int(mask.sum())})", zorder=3, gid=f"funnel-points-{lab.split()[0]}")
    used_names = np.array(names, dtype=object)[use]
    for x, y, nm in zip(eu[outer], ratio[outer], used_names[outer]):
        ax.annotate(_plain(nm), (x, y), xytext=(4, 3), textcoords="offset points", fontsize=_SMALL_PT, gid="funnel-label")
    if log_x:
        ax.set_xscale("log")
        _plain_log_ticks(ax.xaxis)
    ax.set_xlabel("Expected count")
    ax.set_ylabel("Standardized ratio (observed / expected)")
    # The limits explode as E -> 0; scale the axis to the points, not to the limits at tiny E.
    ax.set_ylim(0, max(2.0, 1.15 * float(ratio.max())))
    ax.legend(fontsize=_SMALL_PT, frameon=False, loc="upper right")
    if title:
        ax.set_title(_plain(title), loc="left", fontsize=11)
    note = f"{int((~use).sum())} area(s) with no expected count left out." if (~use).any() else None
    method = "Exact Poisson limits (Spiegelhalter 2005) around a ratio of 1." + (f" {note}" if note else "")
    text = _caption(None, caption, method)
    if text:
        ax.text(0.0, -0.12, text, transform=ax.transAxes, ha="left", va="top", fontsize=_SMALL_PT,
                color="#333333", gid="caption")
    return ax


# ------------------------------------------------------------------ other plots
def moran_scatterplot(values, graph, *, ax: Axes | None = None, title: str | None = None) -> Axes:
    """Standardized value against its spatial lag, with a line of slope Moran's I.

    Parameters
    ----------
    values : array-like or Series
        One value per area of ``graph`` (a Series is aligned on ``graph.ids``).
    graph : AreaGraph
    ax : matplotlib Axes, optional
    title : str, optional

    Returns
    -------
    matplotlib Axes
        The fitted line has ``gid="moran-slope"``.

    Notes
    -----
    With ``z = (x - mean(x)) / sd(x)`` (population sd) and row-standardised
    weights ``W`` (rows summing to 1; islands all zero), the lag is ``Wz`` and

    ``I = (n / S0) * (z' W z) / (z' z)``,  ``S0 = sum_ij w_ij``.

    Without islands ``S0 = n`` and ``I`` is exactly the least-squares slope of
    ``Wz`` on ``z``; the line drawn always has slope ``I``. Islands (lag
    undefined) are not plotted.

    References
    ----------
    Anselin, L. (1996). The Moran scatterplot as an exploratory spatial data analysis tool to assess local
    instability in spatial association. In Fischer, Scholten & Unwin (eds),
    Spatial Analytical Perspectives on GIS, 111–125.

    Examples
    --------
    >>> from areamap.graphs import AreaGraph
    >>> g = AreaGraph.from_edges(["A", "B", "C"], [("A", "B"), ("B", "C")])
    >>> ax = moran_scatterplot([1.0, 2.0, 4.0], g)
    >>> [ln.get_label() for ln in ax.lines if ln.get_gid() == "moran-slope"]
    ["slope = Moran's I = -0.036"]
    """
    func = "moran_scatterplot"
    if isinstance(values, pd.Series):
        if not values.index.equals(graph.ids):
            if set(values.index) != set(graph.ids) or not values.index.is_unique:
                raise GraphError(
                    f"The values given to {func} are indexed by different ids from the graph; "
                    "build the graph from the same boundaries as the data."
                )
            values = values.reindex(graph.ids)
    x = np.asarray(values, dtype=float)
    if x.shape != (graph.n,):
        raise GraphError(f"{func} got {x.size} values for a graph of {graph.n} areas.")
    if np.isnan(x).any():
        raise InputError(f"{func} got {int(np.isnan(x).sum())} missing values; Moran's I needs a value for every area.")
    sd = x.std()
    if not sd > 0:
        raise InputError(f"The values given to {func} are all equal; Moran's I is undefined.")
    z = (x - x.mean()) / sd
    w = graph.weights("row")
    lag = w @ z
    s0 = float(w.sum())
    if s0 == 0:
        raise GraphError(f"The graph given to {func} has no links; Moran's I is undefined.")
    moran = (graph.n / s0) * float(z @ lag) / float(z @ z)
    keep = ~graph.island_mask()
    ax = _new_ax(ax, figsize=(6.0, 6.0))
    ax.axhline(0, color="#999999", linewidth=0.8, zorder=0)
    ax.axvline(0, color="#999999", linewidth=0.8, zorder=0)
    ax.scatter(z[keep], lag[keep], s=16, color="#0072B2", alpha=0.75, edgecolor="none", gid="moran-points")
    span = np.array([z.min(), z.max()]) * 1.05
    ax.plot(span, moran * span, color="#D55E00", linewidth=1.5, gid="moran-slope",
            label=f"slope = Moran's I = {moran:.3f}")
    for (xx, yy, txt) in ((0.98, 0.98, "High-High"), (0.02, 0.02, "Low-Low"),
                          (0.98, 0.02, "High-Low"), (0.02, 0.98, "Low-High")):
        ax.text(xx, yy, txt, transform=ax.transAxes, ha="right" if xx > 0.5 else "left",
                va="top" if yy > 0.5 else "bottom", fontsize=8, color="#555555")
    ax.set_xlabel("Standardized value z")
    ax.set_ylabel("Spatial lag of z (mean of neighbours, row-standardised weights)")
    ax.legend(loc="upper center", fontsize=8, frameon=False)
    ax.set_title(_plain(title or "Moran scatterplot"), loc="left", fontsize=11)
    if (~keep).any():
        ax.text(0.0, -0.1, f"{int((~keep).sum())} area(s) without neighbours not plotted.",
                transform=ax.transAxes, fontsize=_SMALL_PT, va="top")
    return ax


def shrinkage_plot(
    raw,
    smoothed,
    *,
    population=None,
    ax: Axes | None = None,
    title: str | None = None,
    log: bool = False,
) -> Axes:
    """Raw ratio against smoothed ratio, point area proportional to population, with the 1:1 line.

    Parameters
    ----------
    raw, smoothed : array-like or Series
        Per-area raw standardized ratios and smoothed relative risks.
    population : array-like or Series, optional
        Population (or expected count); marker *area* is proportional to it.
    ax : matplotlib Axes, optional
    title : str, optional
    log : bool, default=False
        Log scales (areas with a zero ratio are then not shown).

    Returns
    -------
    matplotlib Axes
        The 1:1 line has ``gid="identity-line"``.

    Notes
    -----
    Points far below the 1:1 line on the right (and above it on the left) are
    small areas whose extreme raw ratios were pulled towards the overall level.

    Examples
    --------
    >>> ax = shrinkage_plot([0.5, 1.0, 3.0], [0.8, 1.0, 1.6], population=[100, 5000, 200])
    >>> ax.collections[0].get_sizes().size
    3
    """
    func = "shrinkage_plot"
    arr, _ = _aligned(func, raw=raw, smoothed=smoothed, population=population)
    r, s, pop = arr["raw"], arr["smoothed"], arr["population"]
    if pop is not None and np.any(pop < 0):
        raise InputError(f"{func} got negative populations; give sizes >= 0.")
    ok = np.isfinite(r) & np.isfinite(s)
    if log:
        ok &= (r > 0) & (s > 0)
    # marker area (points^2) proportional to population; the largest area gets 300
    sizes = np.full(r.size, 20.0) if pop is None else 300.0 * pop / max(np.nanmax(pop), 1e-12)
    ax = _new_ax(ax, figsize=(6.0, 6.0))
    ax.scatter(r[ok], s[ok], s=sizes[ok], color="#0072B2", alpha=0.5, edgecolor="#00375A",
               linewidth=0.4, gid="shrinkage-points")
    lo = min(r[ok].min(), s[ok].min()) if ok.any() else 0.5
    hi = max(r[ok].max(), s[ok].max()) if ok.any() else 2.0
    ax.plot([lo, hi], [lo, hi], color="#333333", linewidth=1.0, linestyle="dashed",
            gid="identity-line", label="1:1 (no shrinkage)")
    if log:
        ax.set_xscale("log")
        ax.set_yscale("log")
        _plain_log_ticks(ax.xaxis)
        _plain_log_ticks(ax.yaxis)
    ax.set_xlabel("Raw standardized ratio")
    ax.set_ylabel("Smoothed relative risk")
    ax.legend(loc="upper left", fontsize=8, frameon=False)
    default = "Shrinkage: raw against smoothed" + (" (point area ∝ population)" if pop is not None else "")
    ax.set_title(_plain(title or default), loc="left", fontsize=10)
    return ax


def ranked_interval_plot(
    estimate,
    low,
    high,
    *,
    labels=None,
    ax: Axes | None = None,
    reference: float = 1.0,
    log: bool = True,
    title: str | None = None,
) -> Axes:
    """Relative risks ranked from lowest to highest with their intervals ("caterpillar" plot).

    Parameters
    ----------
    estimate, low, high : array-like or Series
        Per-area estimates and interval limits (e.g. 95%).
    labels : sequence of str or Series, optional
        Area names (default: Series index); shown when there are at most 40 areas.
    ax : matplotlib Axes, optional
    reference : float, default=1.0
        Horizontal reference line.
    log : bool, default=True
        Log scale; zero lower limits are drawn at a floor below the smallest
        positive value (said in the axis label).
    title : str, optional

    Returns
    -------
    matplotlib Axes
        Intervals wholly above ``reference`` orange-red, wholly below blue,
        others grey.

    Notes
    -----
    The intervals overlap for most areas; ranks of areas with wide intervals
    are very uncertain, so the order itself should not be read as a league table.

    Examples
    --------
    >>> ax = ranked_interval_plot([1.2, 0.8, 2.0], [0.9, 0.5, 1.4], [1.6, 1.2, 2.9], labels=["A", "B", "C"])
    >>> [t.get_text() for t in ax.get_xticklabels()]
    ['B', 'A', 'C']
    """
    func = "ranked_interval_plot"
    arr, index = _aligned(func, estimate=estimate, low=low, high=high)
    est, lo, hi = arr["estimate"], arr["low"], arr["high"]
    names = np.array(_labels_for(labels, index, est.size, func), dtype=object)
    keep = np.isfinite(est)
    order = np.flatnonzero(keep)[np.argsort(est[keep], kind="stable")]
    est, lo, hi, names = est[order], lo[order], hi[order], names[order]
    ylabel = "Relative risk"
    if log:
        pos = np.concatenate([est[est > 0], lo[lo > 0], hi[hi > 0]])
        floor = pos.min() / 2 if pos.size else 0.01
        if np.any(lo <= 0) or np.any(est <= 0):
            ylabel += f" (log scale; values of 0 drawn at {floor:.2g})"
        else:
            ylabel += " (log scale)"
        est, lo = np.maximum(est, floor), np.maximum(lo, floor)
    above, below = lo > reference, hi < reference
    colour = np.where(above, "#D55E00", np.where(below, "#0072B2", "#8C8C8C"))
    xs = np.arange(est.size)
    ax = _new_ax(ax, figsize=(max(6.0, min(14.0, 0.18 * est.size + 3)), 5.0))
    ax.vlines(xs, lo, hi, colors=colour, linewidth=1.2, gid="intervals")
    ax.scatter(xs, est, s=10, c=colour, zorder=3, gid="estimates")
    ax.axhline(reference, color="#333333", linewidth=0.9, linestyle="dashed", gid="reference-line")
    if log:
        ax.set_yscale("log")
        _plain_log_ticks(ax.yaxis)
    if est.size <= 40:
        ax.set_xticks(xs, [_plain(n) for n in names], rotation=90, fontsize=_SMALL_PT)
    else:
        ax.set_xlabel("Areas ranked by estimate")
    ax.set_ylabel(ylabel)
    ax.set_title(_plain(title) if title else f"Ranked relative risks with intervals ({int(above.sum())} above, "
                 f"{int(below.sum())} below {reference:g})", loc="left", fontsize=10)
    return ax
