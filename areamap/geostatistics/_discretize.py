"""Discretising areas into weighted points for area-to-area and area-to-point kriging."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import shapely

from .._params import check_positive_int
from ..errors import InputError, format_examples

__all__ = ["AreaPoints", "discretize_areas"]


@dataclass(frozen=True, eq=False)
class AreaPoints:
    """Each area as a set of weighted points, padded to a common length.

    Attributes
    ----------
    ids : pandas.Index
        Area ids (order of the boundaries).
    coords : ndarray, shape (n, P, 2)
        Point coordinates; unused slots repeat the area's first point.
    weights : ndarray, shape (n, P)
        Point weights, summing to 1 within each area; 0 in unused slots.
    counts : ndarray of int, shape (n,)
        Number of real points per area.
    method : str
        ``"grid"`` (regular grid clipped to each polygon), ``"shared grid"``
        (one grid over the whole region) or ``"points"`` (given, population-weighted).
    grid : tuple or None
        For ``"shared grid"``: (xmin, ymax, cell width, cell height, ny, nx).
    """

    ids: pd.Index
    coords: np.ndarray
    weights: np.ndarray
    counts: np.ndarray
    method: str
    grid: tuple | None = None

    @property
    def centres(self) -> np.ndarray:
        """Weighted mean point of each area, shape (n, 2)."""
        return np.einsum("np,npk->nk", self.weights, self.coords)

    def to_frame(self) -> pd.DataFrame:
        """One row per real point: area id, x, y, weight."""
        mask = self.weights > 0
        area = np.broadcast_to(np.arange(len(self.ids))[:, None], mask.shape)[mask]
        return pd.DataFrame({"area": self.ids[area], "x": self.coords[..., 0][mask],
                             "y": self.coords[..., 1][mask], "weight": self.weights[mask]})


def _pad(owner: np.ndarray, x: np.ndarray, y: np.ndarray, w: np.ndarray, n: int):
    """Ragged points (sorted by owner) -> padded (n, P) arrays."""
    order = np.argsort(owner, kind="stable")
    owner, x, y, w = owner[order], x[order], y[order], w[order]
    counts = np.bincount(owner, minlength=n)
    start = np.concatenate([[0], np.cumsum(counts)[:-1]])
    slot = np.arange(owner.size) - start[owner]
    p = max(int(counts.max()), 1)
    coords = np.zeros((n, p, 2))
    weights = np.zeros((n, p))
    coords[owner, slot, 0] = x
    coords[owner, slot, 1] = y
    weights[owner, slot] = w
    first = coords[:, :1, :]
    coords = np.where((weights > 0)[..., None] | (np.arange(p) == 0)[None, :, None], coords, first)
    tot = weights.sum(axis=1, keepdims=True)
    weights = weights / np.where(tot > 0, tot, 1.0)
    return coords, weights, counts


def grid_cells(bounds, shape):
    """Cell centres of a regular grid over ``bounds`` (row 0 at the top) and its affine transform."""
    xmin, ymin, xmax, ymax = (float(b) for b in bounds)
    ny, nx = shape
    dx = (xmax - xmin) / nx
    dy = (ymax - ymin) / ny
    xs = xmin + (np.arange(nx) + 0.5) * dx
    ys = ymax - (np.arange(ny) + 0.5) * dy
    transform = (dx, 0.0, xmin, 0.0, -dy, ymax)
    return xs, ys, transform


def locate_points(geoms: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Position of the polygon containing each point (first one on shared borders), -1 outside all."""
    tree = shapely.STRtree(geoms)
    pts = shapely.points(x, y)
    pidx, gidx = tree.query(pts, predicate="intersects")
    owner = np.full(x.size, -1, dtype=np.int64)
    # reversed assignment so the smallest polygon position wins on shared borders
    order = np.lexsort((-gidx, pidx))
    owner[pidx[order]] = gidx[order]
    return owner


def _geoms(areas, func):
    if not hasattr(areas, "geometry"):
        raise InputError(f"{func} needs a GeoDataFrame or GeoSeries of polygons with the area ids as index.")
    geoms = np.asarray(areas.geometry.values, dtype=object)
    bad = np.flatnonzero(shapely.is_empty(geoms) | shapely.is_missing(geoms))
    if bad.size:
        raise InputError(f"{func}: areas {format_examples(areas.index[bad])} have empty or missing geometry.")
    return geoms


def discretize_areas(
    areas,
    *,
    points_per_area: int = 16,
    grid_shape: tuple[int, int] | None = None,
    points: pd.DataFrame | None = None,
    point_area: str = "area",
    point_weight: str = "population",
) -> AreaPoints:
    """Discretise each area into weighted points.

    Parameters
    ----------
    areas : geopandas.GeoDataFrame or GeoSeries
        Area polygons; the index holds the area ids.
    points_per_area : int, default=16
        Target number of points per area for the per-area grid: each polygon
        gets a regular grid of spacing sqrt(area / points_per_area) clipped to
        the polygon (so small and large areas get about the same number of
        points), capped at twice the target by even thinning.
    grid_shape : (ny, nx), optional
        Use one regular grid of ny x nx cells over the whole region instead
        (the same cells as a risk surface of that shape, which makes the
        surface exactly coherent with the area estimates).
    points : pandas.DataFrame, optional
        Population-weighted points instead of a grid: columns ``x``, ``y``,
        ``point_area`` (area id) and ``point_weight`` (population >= 0),
        e.g. from a population raster or a settlement file.
    point_area, point_weight : str
        Column names in ``points``.

    Returns
    -------
    AreaPoints
        Areas that contain no grid cell centre get their representative point.

    Raises
    ------
    InputError
        Empty geometries; point ids not among the areas; areas without points
        or with zero total weight; negative weights.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely.geometry import box
    >>> areas = gpd.GeoSeries([box(0, 0, 2, 2), box(2, 0, 3, 1)], index=["A", "B"])
    >>> d = discretize_areas(areas, points_per_area=4)
    >>> d.counts.tolist()
    [4, 4]
    """
    func = "discretize_areas"
    geoms = _geoms(areas, func)
    ids = pd.Index(areas.index)
    n = geoms.size
    if points is not None:
        for col in ("x", "y", point_area, point_weight):
            if col not in points.columns:
                raise InputError(f"{func}: the points table has no column '{col}'. It needs x, y, "
                                 f"'{point_area}' (area id) and '{point_weight}' (population).")
        owner = ids.get_indexer(points[point_area])
        if (owner < 0).any():
            bad = pd.unique(points[point_area][owner < 0])
            raise InputError(f"{func}: points refer to area ids not in the boundaries: {format_examples(bad)}.")
        w = points[point_weight].to_numpy(dtype=float)
        if not np.isfinite(w).all() or (w < 0).any():
            raise InputError(f"{func}: column '{point_weight}' of the points has negative or missing weights.")
        tot = np.bincount(owner, weights=w, minlength=n)
        empty = np.flatnonzero(tot <= 0)
        if empty.size:
            raise InputError(f"{func}: areas {format_examples(ids[empty])} have no point with positive "
                             "weight. Give each area at least one populated point.")
        keep = w > 0
        coords, weights, counts = _pad(owner[keep], points["x"].to_numpy(float)[keep],
                                       points["y"].to_numpy(float)[keep], w[keep], n)
        return AreaPoints(ids, coords, weights, counts, "points")
    if grid_shape is not None:
        ny, nx = (check_positive_int(v, "grid_shape", func) for v in grid_shape)
        bounds = shapely.total_bounds(geoms)
        xs, ys, tr = grid_cells(bounds, (ny, nx))
        gx, gy = np.meshgrid(xs, ys)
        owner = locate_points(geoms, gx.ravel(), gy.ravel())
        inside = owner >= 0
        owner, x, y = owner[inside], gx.ravel()[inside], gy.ravel()[inside]
        method, grid = "shared grid", (bounds[0], bounds[3], tr[0], -tr[4], ny, nx)
    else:
        t = check_positive_int(points_per_area, "points_per_area", func)
        b = shapely.bounds(geoms)
        w_, h_ = b[:, 2] - b[:, 0], b[:, 3] - b[:, 1]
        s = np.sqrt(shapely.area(geoms) / t)
        s = np.where(s > 0, s, np.maximum(w_, h_) + 1e-12)
        nx_ = np.clip(np.ceil(w_ / s), 1, None).astype(np.int64)
        ny_ = np.clip(np.ceil(h_ / s), 1, None).astype(np.int64)
        cand = nx_ * ny_
        cap = 64 * t  # very elongated diagonal slivers: bound the candidate count
        shrink = cand > cap
        f = np.sqrt(cand / cap)
        nx_ = np.where(shrink, np.maximum(1, (nx_ / f).astype(np.int64)), nx_)
        ny_ = np.where(shrink, np.maximum(1, (ny_ / f).astype(np.int64)), ny_)
        cand = nx_ * ny_
        owner = np.repeat(np.arange(n), cand)
        k = np.arange(owner.size) - np.repeat(np.cumsum(cand) - cand, cand)
        col, row = k % nx_[owner], k // nx_[owner]
        x = b[owner, 0] + (col + 0.5) * w_[owner] / nx_[owner]
        y = b[owner, 1] + (row + 0.5) * h_[owner] / ny_[owner]
        inside = shapely.contains_xy(geoms[owner], x, y)
        owner, x, y = owner[inside], x[inside], y[inside]
        # thin areas with more than 2 * target points evenly
        cnt = np.bincount(owner, minlength=n)
        rank = np.arange(owner.size) - np.repeat(np.cumsum(cnt) - cnt, cnt)
        limit = 2 * t
        c = cnt[owner]
        keep = (c <= limit) | ((rank * limit) // c != ((rank - 1) * limit) // c) | (rank == 0)
        owner, x, y = owner[keep], x[keep], y[keep]
        method, grid = "grid", None
    missing = np.setdiff1d(np.arange(n), owner)
    if missing.size:
        rp = shapely.get_coordinates(shapely.point_on_surface(geoms[missing]))
        owner = np.concatenate([owner, missing])
        x = np.concatenate([x, rp[:, 0]])
        y = np.concatenate([y, rp[:, 1]])
    coords, weights, counts = _pad(owner, x, y, np.ones(owner.size), n)
    return AreaPoints(ids, coords, weights, counts, method, grid)
