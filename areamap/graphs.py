"""Neighbour graphs between areas.

:class:`AreaGraph` is the one graph type the rest of areamap uses: a symmetric,
binary adjacency matrix over an ordered index of area ids. Builders (contiguity,
k-nearest neighbours, distance band, extra links, island policies) construct
it; the statistics only ever need ``adjacency``, ``weights()`` and
``components()``.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
import shapely
from scipy.sparse.csgraph import connected_components

from ._params import check_choice, check_interval, check_positive_int
from .errors import DataWarning, GraphError, InputError, ParameterError, format_examples

__all__ = ["AreaGraph", "GraphSummary", "build_graph", "read_extra_links", "write_edge_list"]


@dataclass(frozen=True)
class GraphSummary:
    """Counts that describe a neighbour graph.

    Attributes
    ----------
    n_areas, n_links : int
        Areas and undirected links.
    min_neighbours, median_neighbours, max_neighbours : float
        Distribution of the number of neighbours per area.
    mean_neighbours : float
    n_components : int
        Connected components (an island is a component of size one).
    islands : tuple of str
        Ids (or names, when the graph has names) of areas with no neighbours.
    """

    n_areas: int
    n_links: int
    min_neighbours: int
    median_neighbours: float
    max_neighbours: int
    mean_neighbours: float
    n_components: int
    islands: tuple[str, ...]

    def to_frame(self) -> pd.DataFrame:
        """One-row table of the summary."""
        row = {k: getattr(self, k) for k in self.__dataclass_fields__}
        row["islands"] = ", ".join(self.islands)
        return pd.DataFrame([row])

    def summary(self) -> str:
        """Readable text, as printed by ``areamap check``."""
        isl = ", ".join(self.islands) if self.islands else "none"
        return (
            f"{self.n_areas} areas, {self.n_links} links; neighbours per area "
            f"min {self.min_neighbours}, median {self.median_neighbours:g}, "
            f"max {self.max_neighbours} (mean {self.mean_neighbours:.2f}); "
            f"{self.n_components} connected component(s); islands: {isl}"
        )

    def _repr_html_(self) -> str:
        return self.to_frame().to_html(index=False)


@dataclass(frozen=True, eq=False)
class AreaGraph:
    """Undirected neighbour graph over an ordered set of areas.

    Parameters
    ----------
    ids : pandas.Index
        Area ids in the order of the matrix rows (unique).
    adjacency : scipy.sparse.csr_array, shape (n, n)
        Symmetric 0/1 matrix, zero diagonal; ``adjacency[i, j] == 1`` when
        areas ``i`` and ``j`` are neighbours.
    names : tuple of str or None, default=None
        Human-readable area names in the same order (used in messages and summaries).
    kind : str, default="custom"
        How the graph was built (``"queen"``, ``"rook"``, ``"knn"``...), for provenance.

    Use :meth:`from_adjacency` or :meth:`from_edges` rather than the
    constructor: they check symmetry and normalise the matrix.

    Examples
    --------
    A path of three areas A - B - C:

    >>> g = AreaGraph.from_edges(["A", "B", "C"], [("A", "B"), ("B", "C")])
    >>> g.neighbour_counts().tolist()
    [1, 2, 1]
    >>> g.summary().n_links
    2
    """

    ids: pd.Index
    adjacency: sp.csr_array
    names: tuple[str, ...] | None = None
    kind: str = "custom"
    _meta: dict = field(default_factory=dict, repr=False, compare=False)

    # ------------------------------------------------------------------ build
    @classmethod
    def from_adjacency(
        cls,
        ids: Sequence | pd.Index,
        adjacency,
        *,
        names: Sequence[str] | None = None,
        kind: str = "custom",
    ) -> AreaGraph:
        """Build from any square (sparse or dense) matrix; nonzeros become links.

        Raises
        ------
        GraphError
            If the matrix is not square, does not match ``ids``, is not
            symmetric, or ids repeat.
        """
        index = pd.Index(ids)
        if not index.is_unique:
            dup = index[index.duplicated()].unique()
            raise GraphError(
                f"Graph area ids must be unique; {len(dup)} repeat ({format_examples(dup)})."
            )
        a = sp.csr_array(adjacency, dtype=float)
        n = len(index)
        if a.shape != (n, n):
            raise GraphError(
                f"Adjacency matrix has shape {a.shape} but there are {n} area ids."
            )
        a = (a != 0).astype(np.float64)
        a.setdiag(0)
        a.eliminate_zeros()
        asym = a - a.T
        asym.eliminate_zeros()
        if asym.nnz:
            r, c = asym.nonzero()
            pairs = [f"{index[i]}->{index[j]}" for i, j in zip(r[:5], c[:5])]
            raise GraphError(
                f"Adjacency matrix is not symmetric: {asym.nnz} one-way links "
                f"({format_examples(pairs)}). Neighbour links must go both ways."
            )
        a.sort_indices()
        nm = tuple(str(x) for x in names) if names is not None else None
        if nm is not None and len(nm) != n:
            raise GraphError(f"Got {len(nm)} names for {n} areas.")
        return cls(ids=index, adjacency=a, names=nm, kind=kind)

    @classmethod
    def from_edges(
        cls,
        ids: Sequence | pd.Index,
        edges: Iterable[tuple[object, object]],
        *,
        names: Sequence[str] | None = None,
        kind: str = "custom",
    ) -> AreaGraph:
        """Build from pairs of area ids (each pair linked both ways)."""
        index = pd.Index(ids)
        pairs = list(edges)
        n = len(index)
        if not pairs:
            return cls.from_adjacency(index, sp.csr_array((n, n)), names=names, kind=kind)
        a_ids, b_ids = zip(*pairs)
        ia = index.get_indexer(list(a_ids))
        ib = index.get_indexer(list(b_ids))
        bad = [p for p, x, y in zip(pairs, ia, ib) if x < 0 or y < 0]
        if bad:
            raise GraphError(
                f"{len(bad)} link(s) name areas that are not in the graph "
                f"({format_examples(bad)})."
            )
        rows = np.concatenate([ia, ib])
        cols = np.concatenate([ib, ia])
        m = sp.csr_array((np.ones(rows.size), (rows, cols)), shape=(n, n))
        return cls.from_adjacency(index, m, names=names, kind=kind)

    # --------------------------------------------------------------- queries
    @property
    def n(self) -> int:
        """Number of areas."""
        return len(self.ids)

    @property
    def provenance(self) -> dict:
        """How the graph was built, when known (a copy).

        Filled by :func:`build_graph`: ``method``, ``snap``/``k``/``distance``,
        ``crs_used`` (distance methods), ``extra_links`` (number added),
        ``islands``, ``island_k`` and ``linked_islands`` (labels of the areas
        that were islands and got linked). Empty for graphs built by hand.
        """
        return dict(self._meta)

    def neighbour_counts(self) -> np.ndarray:
        """Number of neighbours of each area, shape (n,)."""
        return np.diff(self.adjacency.indptr).astype(np.int64)

    def island_mask(self) -> np.ndarray:
        """Boolean mask of areas with no neighbours."""
        return self.neighbour_counts() == 0

    def labels(self) -> list[str]:
        """Names when known, otherwise ids, as strings."""
        return list(self.names) if self.names is not None else [str(i) for i in self.ids]

    def islands(self) -> list[str]:
        """Labels (names when known) of areas with no neighbours."""
        lab = self.labels()
        return [lab[i] for i in np.flatnonzero(self.island_mask())]

    def components(self) -> np.ndarray:
        """Connected-component label of each area, shape (n,), labels 0..k-1."""
        _, lab = connected_components(self.adjacency, directed=False)
        return lab

    def weights(self, style: str = "row") -> sp.csr_array:
        """Spatial weights as a sparse matrix.

        Parameters
        ----------
        style : {"row", "binary"}, default="row"
            ``"binary"``: w_ij = 1 for neighbours. ``"row"``: each row divided
            by its number of neighbours so rows sum to one (islands keep an
            all-zero row).
        """
        check_choice(style, "style", "AreaGraph.weights", ("row", "binary"))
        a = self.adjacency.copy()
        if style == "binary":
            return a
        k = self.neighbour_counts().astype(float)
        inv = np.divide(1.0, k, out=np.zeros_like(k), where=k > 0)
        return sp.csr_array(sp.diags_array(inv) @ a)

    def laplacian(self) -> sp.csr_array:
        """Structure matrix R = D - W of the intrinsic CAR model (D = diag(neighbour counts))."""
        return sp.csr_array(sp.diags_array(self.neighbour_counts().astype(float)) - self.adjacency)

    def summary(self) -> GraphSummary:
        """Counts describing the graph (areas, links, neighbours, components, islands)."""
        k = self.neighbour_counts()
        n_comp = int(self.components().max() + 1) if self.n else 0
        return GraphSummary(
            n_areas=self.n,
            n_links=int(self.adjacency.nnz // 2),
            min_neighbours=int(k.min()) if self.n else 0,
            median_neighbours=float(np.median(k)) if self.n else 0.0,
            max_neighbours=int(k.max()) if self.n else 0,
            mean_neighbours=float(k.mean()) if self.n else 0.0,
            n_components=n_comp,
            islands=tuple(self.islands()),
        )

    def to_frame(self, style: str = "binary") -> pd.DataFrame:
        """Edge list with columns ``focal_id``, ``neighbour_id``, ``weight`` (both directions)."""
        w = sp.coo_array(self.weights(style))
        order = np.lexsort((w.col, w.row))
        return pd.DataFrame(
            {
                "focal_id": self.ids.take(w.row[order]),
                "neighbour_id": self.ids.take(w.col[order]),
                "weight": w.data[order],
            }
        )

    def reorder(self, ids: Sequence | pd.Index) -> AreaGraph:
        """The same graph with rows in the order of ``ids`` (which must be the same set).

        Raises
        ------
        GraphError
            If ``ids`` and the graph's ids are not the same set.
        """
        target = pd.Index(ids)
        pos = self.ids.get_indexer(target)
        missing = target[pos < 0]
        extra = self.ids.difference(target)
        if len(missing) or len(extra) or len(target) != self.n:
            parts = []
            if len(missing):
                parts.append(f"{len(missing)} data id(s) not in the graph ({format_examples(missing)})")
            if len(extra):
                parts.append(f"{len(extra)} graph id(s) not in the data ({format_examples(extra)})")
            raise GraphError(
                "The graph and the data cover different areas: " + "; ".join(parts)
                + ". Build the graph from the same boundaries as the data."
            )
        a = self.adjacency[pos][:, pos]
        nm = tuple(self.names[i] for i in pos) if self.names is not None else None
        out = AreaGraph.from_adjacency(target, a, names=nm, kind=self.kind)
        out._meta.update(self._meta)
        return out


# ====================================================================== builders
# Everything below constructs an AreaGraph from boundaries. libpysal does the
# neighbour search for exact contiguity, k-nearest neighbours and distance
# bands; shapely's spatial index does the tolerant (snapped) contiguity.

_METHODS = ("queen", "rook", "knn", "distance")
_ISLAND_POLICIES = ("keep", "link")


def _geometry_of(boundaries, func: str):
    """Return the GeoSeries of ``boundaries`` (GeoDataFrame or GeoSeries), checking it."""
    import geopandas as gpd

    if isinstance(boundaries, gpd.GeoDataFrame):
        geoms = boundaries.geometry
    elif isinstance(boundaries, gpd.GeoSeries):
        geoms = boundaries
    else:
        raise InputError(
            f"{func} needs boundaries as a geopandas GeoDataFrame or GeoSeries; got "
            f"{type(boundaries).__name__}. Read the boundary file with "
            "geopandas.read_file or areamap's read_boundaries."
        )
    if len(geoms) == 0:
        raise InputError(f"{func} got boundaries with no areas.")
    bad = geoms.isna().to_numpy() | geoms.is_empty.to_numpy()
    if bad.any():
        ids = geoms.index[bad]
        raise InputError(
            f"{bad.sum()} area(s) have a missing or empty geometry "
            f"({format_examples(ids)}). Repair or remove them before building a graph."
        )
    return geoms


def _labels_of(boundaries, name_column: str | None) -> tuple[str, ...] | None:
    import geopandas as gpd

    if (
        name_column is None
        or not isinstance(boundaries, gpd.GeoDataFrame)
        or name_column not in boundaries.columns
    ):
        return None
    names = boundaries[name_column]
    fallback = pd.Series([str(i) for i in boundaries.index], index=boundaries.index)
    return tuple(str(x) for x in names.astype(object).where(names.notna(), fallback))


def _local_equal_area_crs(geoms):
    """Lambert azimuthal equal-area projection centred on the data (metres)."""
    from pyproj import CRS
    from pyproj.crs import ProjectedCRS
    from pyproj.crs.coordinate_operation import LambertAzimuthalEqualAreaConversion

    lonlat = geoms.to_crs(geoms.crs.geodetic_crs or CRS.from_epsg(4326))
    minx, miny, maxx, maxy = lonlat.total_bounds
    lat0, lon0 = (miny + maxy) / 2.0, (minx + maxx) / 2.0
    conv = LambertAzimuthalEqualAreaConversion(
        latitude_natural_origin=round(lat0, 6), longitude_natural_origin=round(lon0, 6)
    )
    return ProjectedCRS(conversion=conv, geodetic_crs=geoms.crs.geodetic_crs)


def _planar(geoms, *, purpose: str, require_crs: bool, stacklevel: int):
    """Geometries in a planar CRS for distance work (projected when geographic).

    Returns the (possibly projected) GeoSeries and a description of the CRS used.
    """
    if geoms.crs is None:
        if require_crs:
            raise InputError(
                f"The boundaries have no coordinate reference system (CRS), so {purpose} "
                "cannot measure distances. Set the CRS of the boundary file (for a "
                "shapefile, the .prj file beside it; in Python, "
                "boundaries.set_crs('EPSG:<code>')), or build the graph with "
                "method='queen' or 'rook', which need no CRS."
            )
        return geoms, "none (coordinates used as planar)"
    if geoms.crs.is_geographic:
        target = _local_equal_area_crs(geoms)
        conv = target.coordinate_operation.params
        lat0, lon0 = conv[0].value, conv[1].value
        warnings.warn(
            f"The boundaries use a geographic CRS ({geoms.crs.name}, degrees); for "
            f"{purpose} they were projected to a Lambert azimuthal equal-area "
            f"projection centred at latitude {lat0:.4f}, longitude {lon0:.4f}, so "
            "distances are in metres. Give a projected boundary file to control this.",
            DataWarning,
            stacklevel=stacklevel,
        )
        return geoms.to_crs(target), f"local Lambert azimuthal equal-area ({lat0:.4f}, {lon0:.4f})"
    return geoms, str(geoms.crs.name)


def _libpysal_adjacency(lp_graph, n: int) -> sp.csr_array:
    """0/1 symmetric csr matrix from a libpysal Graph built on ids 0..n-1."""
    adj = lp_graph.adjacency
    focal = adj.index.get_level_values(0).to_numpy()
    neigh = adj.index.get_level_values(1).to_numpy()
    keep = (adj.to_numpy() != 0) & (focal != neigh)
    r = focal[keep].astype(np.int64)
    c = neigh[keep].astype(np.int64)
    m = sp.csr_array((np.ones(r.size), (r, c)), shape=(n, n))
    return _symmetric_binary(m)


def _symmetric_binary(m) -> sp.csr_array:
    """Union with the transpose, 0/1 entries, zero diagonal."""
    m = sp.csr_array(m)
    m = sp.csr_array(((m + m.T) != 0).astype(np.float64))
    m.setdiag(0)
    m.eliminate_zeros()
    return m


def _pairs_matrix(i: np.ndarray, j: np.ndarray, n: int) -> sp.csr_array:
    return _symmetric_binary(sp.csr_array((np.ones(len(i)), (i, j)), shape=(n, n)))


def _check_polygons(geoms, method: str) -> None:
    kinds = geoms.geom_type.to_numpy()
    bad = ~np.isin(kinds, ["Polygon", "MultiPolygon"])
    if bad.any():
        raise InputError(
            f"method={method!r} needs polygon boundaries, but {bad.sum()} area(s) have "
            f"other geometry types ({format_examples(geoms.index[bad])}: "
            f"{format_examples(pd.unique(kinds[bad]))}). Use method='knn' or 'distance' "
            "for point locations."
        )


def _contiguity(geoms, *, rook: bool, snap: float) -> sp.csr_array:
    """Queen/rook adjacency, exact (shared vertices) or tolerant (within ``snap``)."""
    import geopandas as gpd

    n = len(geoms)
    if snap == 0:
        from libpysal.graph import Graph

        plain = gpd.GeoSeries(geoms.to_numpy(), index=pd.RangeIndex(n), crs=geoms.crs)
        return _libpysal_adjacency(Graph.build_contiguity(plain, rook=rook, strict=False), n)

    arr = np.asarray(geoms.to_numpy(), dtype=object)
    i, j = shapely.STRtree(arr).query(arr, predicate="dwithin", distance=snap)
    keep = i < j
    i, j = i[keep], j[keep]
    if rook and i.size:
        # Snap each area's vertices (and segments) onto the other's vertices within
        # `snap`, then measure the boundary the two then share. A point contact
        # stays a point (length 0); a shared border becomes common segments.
        try:
            edges = shapely.boundary(arr)
            len_ij = shapely.length(
                shapely.intersection(shapely.boundary(shapely.snap(arr[i], arr[j], snap)), edges[j])
            )
            len_ji = shapely.length(
                shapely.intersection(shapely.boundary(shapely.snap(arr[j], arr[i], snap)), edges[i])
            )
        except shapely.errors.GEOSException as exc:
            invalid = geoms.index[~shapely.is_valid(arr)]
            raise InputError(
                f"Rook contiguity with snap={snap:g} failed on the boundary geometry ({exc}). "
                f"{len(invalid)} area(s) have invalid geometry"
                + (f" ({format_examples(invalid)})" if len(invalid) else "")
                + "; repair them (e.g. shapely.make_valid) or use method='queen'."
            ) from exc
        keep = np.maximum(len_ij, len_ji) > 0
        i, j = i[keep], j[keep]
    return _pairs_matrix(i, j, n)


def _points(geoms, which: str) -> np.ndarray:
    pts = geoms.representative_point() if which == "representative" else geoms.centroid
    return shapely.get_coordinates(pts.to_numpy())


def _knn(points: np.ndarray, ids: pd.Index, k: int) -> sp.csr_array:
    from libpysal.graph import Graph

    n = len(points)
    dup = pd.DataFrame(points).duplicated(keep=False).to_numpy()
    if dup.any():
        raise InputError(
            f"{dup.sum()} areas share a representative point with another area "
            f"({format_examples(ids[dup])}), so their nearest neighbours are ambiguous. "
            "Check for duplicate boundaries, or use method='queen' or 'distance'."
        )
    return _libpysal_adjacency(Graph.build_knn(points, k=k), n)


def _distance_band(points: np.ndarray, distance: float) -> sp.csr_array:
    from libpysal.graph import Graph

    return _libpysal_adjacency(Graph.build_distance_band(points, distance, binary=True), len(points))


def _nearest_links(points: np.ndarray, sources: np.ndarray, candidates: np.ndarray, k: int):
    """For each source position, the k nearest candidate positions (never itself)."""
    from scipy.spatial import cKDTree

    tree = cKDTree(points[candidates])
    kk = min(k + 1, len(candidates))
    _, nn = tree.query(points[sources], k=kk)
    nn = candidates[np.asarray(nn).reshape(len(sources), kk)]
    src = np.repeat(sources, kk).reshape(len(sources), kk)
    not_self = nn != src
    # keep the first k non-self hits of each row
    rank = np.cumsum(not_self, axis=1)
    keep = not_self & (rank <= k)
    return src[keep], nn[keep]


def _resolve_links(links, ids: pd.Index) -> list[tuple[object, object]]:
    """Map user-given id pairs onto ``ids`` (matching by value, then by text)."""
    pairs = [tuple(p) for p in links]
    wrong = [p for p in pairs if len(p) != 2]
    if wrong:
        raise GraphError(
            f"Extra links must be pairs of area ids; {len(wrong)} are not "
            f"({format_examples(wrong)})."
        )
    as_text = {str(x): x for x in ids}
    known = set(ids)
    out, unknown, selfs = [], [], []
    for a, b in pairs:
        ra = a if a in known else as_text.get(str(a).strip())
        rb = b if b in known else as_text.get(str(b).strip())
        for raw, got in ((a, ra), (b, rb)):
            if got is None:
                unknown.append(raw)
        if ra is not None and rb is not None:
            if ra == rb:
                selfs.append(ra)
            out.append((ra, rb))
    if unknown:
        unknown = list(dict.fromkeys(unknown))
        raise GraphError(
            f"{len(unknown)} id(s) in the extra links are not areas of the boundaries "
            f"({format_examples(unknown)}). Use the boundary file's area ids."
        )
    if selfs:
        raise GraphError(
            f"Extra links must join two different areas; {len(selfs)} link an area "
            f"to itself ({format_examples(selfs)})."
        )
    return out


def read_extra_links(path, ids: Sequence | pd.Index, *, encoding: str = "utf-8") -> list[tuple]:
    """Read extra neighbour links (ferries, bridges...) from a two-column CSV file.

    Parameters
    ----------
    path : str or path-like
        CSV file with a header row and exactly two columns; each row names two
        area ids to be linked (in both directions).
    ids : sequence or pandas.Index
        The area ids of the boundaries. Ids in the file are matched to these
        (as text, so ``7`` in the file matches an integer id ``7``).
    encoding : str, default="utf-8"

    Returns
    -------
    list of tuple
        Pairs of area ids (as found in ``ids``), in file order.

    Raises
    ------
    InputError
        If the file cannot be read or does not have two columns.
    GraphError
        If ids are not in ``ids`` (all listed) or a row links an area to itself.

    Examples
    --------
    >>> import io
    >>> read_extra_links(io.StringIO("from,to\\nA,C\\n"), ["A", "B", "C"])
    [('A', 'C')]
    """
    label = getattr(path, "name", str(path)) if not hasattr(path, "read") else "extra links"
    try:
        table = pd.read_csv(path, dtype=str, encoding=encoding, skipinitialspace=True)
    except (OSError, UnicodeDecodeError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"Cannot read the extra links file {label}: {exc}") from exc
    if table.shape[1] != 2:
        raise InputError(
            f"The extra links file {label} must have exactly two columns (a header row, "
            f"then one pair of area ids per row); it has {table.shape[1]} "
            f"({format_examples(table.columns)})."
        )
    blank = table.isna().any(axis=1).to_numpy()
    if blank.any():
        rows = np.flatnonzero(blank) + 2  # 1-based, after the header
        raise InputError(
            f"The extra links file {label} has {blank.sum()} row(s) with a missing id "
            f"(rows {format_examples(rows)}). Every row needs two area ids."
        )
    pairs = list(zip(table.iloc[:, 0].str.strip(), table.iloc[:, 1].str.strip()))
    return _resolve_links(pairs, pd.Index(ids))


def build_graph(
    boundaries,
    *,
    method: str = "queen",
    snap: float = 0.0,
    k: int = 5,
    distance: float | None = None,
    islands: str = "keep",
    island_k: int = 1,
    extra_links=None,
    name_column: str | None = "area_name",
) -> AreaGraph:
    """Build a neighbour graph from area boundaries.

    Parameters
    ----------
    boundaries : geopandas.GeoDataFrame or GeoSeries
        One row per area; the index holds the area ids (the graph keeps its
        order). Polygons for ``"queen"``/``"rook"``.
    method : {"queen", "rook", "knn", "distance"}, default="queen"
        ``"queen"``: areas sharing at least a boundary point. ``"rook"``: areas
        sharing a stretch of boundary. ``"knn"``: each area linked to its ``k``
        nearest areas (representative points), made symmetric. ``"distance"``:
        areas whose centroids are at most ``distance`` apart.
    snap : float, default=0.0
        Contiguity tolerance in map units. ``0`` needs exactly shared vertices;
        ``snap > 0`` treats areas at most ``snap`` apart as touching (bridges
        slivers, small gaps and overlaps).
    k : int, default=5
        Neighbours per area for ``"knn"``.
    distance : float, optional
        Band for ``"distance"``, in map units (metres when a geographic CRS is
        projected, see Notes). Required for that method.
    islands : {"keep", "link"}, default="keep"
        Areas without neighbours: ``"keep"`` leaves them isolated (they are
        listed by :meth:`AreaGraph.summary`); ``"link"`` joins each to its
        ``island_k`` nearest areas.
    island_k : int, default=1
        Links added per island with ``islands="link"``.
    extra_links : str, path-like or sequence of pairs, optional
        Links to add (ferries, bridges): a CSV file for :func:`read_extra_links`
        or a list of ``(id, id)`` pairs. Added before the island policy.
    name_column : str or None, default="area_name"
        Column with area names, used in summaries when present.

    Returns
    -------
    AreaGraph
        ``ids`` = ``boundaries.index`` (same order), ``kind`` = ``method``.

    Raises
    ------
    InputError
        Missing/empty geometries, points for contiguity, or no CRS for
        ``"knn"``/``"distance"``/island linking that measures distances.
    GraphError
        Bad extra links.
    ParameterError
        Options out of range.

    Warns
    -----
    DataWarning
        When a geographic CRS (degrees) is projected for distance work.

    Notes
    -----
    *Exact contiguity* (``snap=0``): queen neighbours share a boundary vertex,
    rook neighbours share a boundary segment (two consecutive vertices), as
    in files whose neighbouring polygons were digitised with common vertices.

    *Tolerant contiguity* (``snap > 0``): queen neighbours are areas whose
    distance is ``<= snap`` (so slivers, gaps and small overlaps up to
    ``snap`` are bridged). Rook neighbours are the queen pairs that share a
    stretch of boundary after snapping: the vertices of one area are moved
    onto vertices of the other lying within ``snap`` (and the other's
    vertices are inserted into its nearby segments, see ``shapely.snap``);
    the pair is a rook neighbour when the two snapped boundaries then
    overlap along a line of positive length, in either direction. A corner
    contact snaps to a single point and stays a queen-only link. Keep
    ``snap`` well below the length of the shortest real shared border and
    the spacing of boundary vertices, or distinct vertices may be merged.

    *k nearest neighbours* uses representative points (always inside the
    area) and is symmetrised: ``i`` and ``j`` are linked when either is among
    the other's ``k`` nearest, so areas can have more than ``k`` neighbours.
    Ties at equal distance are broken by the search order.

    *Distance band* links areas whose centroids are ``<= distance`` apart.

    Distances need a CRS. With a geographic CRS (degrees) the geometries are
    projected to a Lambert azimuthal equal-area projection centred on the
    middle of the data's bounding box (metres) and a DataWarning says so.
    Island linking uses representative-point distances, in the boundaries'
    own units when there is no CRS.

    *Island linking* links each area without neighbours (after extra links)
    to its ``island_k`` nearest areas that have neighbours (or nearest areas
    of any kind, if fewer than ``island_k`` areas have neighbours); links
    are symmetric.

    Neighbour definitions change every spatial statistic built on them;
    report which one was used.

    Examples
    --------
    >>> import geopandas as gpd
    >>> from shapely import box
    >>> squares = gpd.GeoDataFrame(
    ...     {"area_name": ["West", "Middle", "East"]},
    ...     geometry=[box(0, 0, 1, 1), box(1, 0, 2, 1), box(2, 0, 3, 1)],
    ...     index=pd.Index(["W", "M", "E"], name="area_id"),
    ... )
    >>> g = build_graph(squares, method="rook")
    >>> g.neighbour_counts().tolist()
    [1, 2, 1]
    >>> g.kind
    'rook'
    """
    func = "build_graph"
    check_choice(method, "method", func, _METHODS)
    check_choice(islands, "islands", func, _ISLAND_POLICIES)
    snap = check_interval(snap, "snap", func, low=0.0, closed="left")
    island_k = check_positive_int(island_k, "island_k", func)
    geoms = _geometry_of(boundaries, func)
    ids = pd.Index(geoms.index)
    n = len(ids)
    names = _labels_of(boundaries, name_column)
    meta: dict = {"method": method, "islands": islands}

    if method in ("queen", "rook"):
        _check_polygons(geoms, method)
        adj = _contiguity(geoms, rook=method == "rook", snap=snap)
        meta["snap"] = snap
    elif method == "knn":
        k = check_positive_int(k, "k", func)
        if k >= n:
            raise ParameterError(
                f"The 'k' parameter of build_graph must be smaller than the number of "
                f"areas ({n}). Got {k} instead."
            )
        planar, crs_used = _planar(
            geoms, purpose="k-nearest neighbours", require_crs=True, stacklevel=3
        )
        adj = _knn(_points(planar, "representative"), ids, k)
        meta.update(k=k, crs_used=crs_used)
    else:
        if distance is None:
            raise ParameterError(
                "The 'distance' parameter of build_graph must be a number > 0 (map "
                "units) when method='distance'. Got None instead."
            )
        distance = check_interval(distance, "distance", func, low=0.0)
        planar, crs_used = _planar(
            geoms, purpose="a distance band", require_crs=True, stacklevel=3
        )
        adj = _distance_band(_points(planar, "centroid"), distance)
        meta.update(distance=distance, crs_used=crs_used)

    if extra_links is not None:
        if isinstance(extra_links, str | os.PathLike):
            pairs = read_extra_links(extra_links, ids)
        else:
            pairs = _resolve_links(extra_links, ids)
        if pairs:
            a = ids.get_indexer([p[0] for p in pairs])
            b = ids.get_indexer([p[1] for p in pairs])
            adj = _symmetric_binary(adj + _pairs_matrix(a, b, n))
        meta["extra_links"] = len(pairs)

    linked: tuple[str, ...] = ()
    if islands == "link":
        counts = np.diff(adj.indptr)
        lonely = np.flatnonzero(counts == 0)
        if lonely.size and n > 1:
            planar, crs_used = _planar(
                geoms, purpose="linking islands", require_crs=False, stacklevel=3
            )
            pts = _points(planar, "representative")
            connected = np.flatnonzero(counts > 0)
            pool = connected if connected.size >= island_k else np.arange(n)
            a, b = _nearest_links(pts, lonely, pool, island_k)
            adj = _symmetric_binary(adj + _pairs_matrix(a, b, n))
            labels = names if names is not None else tuple(str(x) for x in ids)
            linked = tuple(labels[i] for i in lonely)
            meta["island_crs_used"] = crs_used
        meta.update(island_k=island_k, linked_islands=linked)

    graph = AreaGraph.from_adjacency(ids, adj, names=names, kind=method)
    graph._meta.update(meta)
    return graph


def write_edge_list(graph: AreaGraph, path, *, style: str = "binary") -> pd.DataFrame:
    """Write the graph as a CSV edge list with columns focal_id, neighbour_id, weight.

    Every link appears twice (once from each end); islands do not appear.

    Parameters
    ----------
    graph : AreaGraph
    path : str or path-like
        Output CSV file (overwritten).
    style : {"binary", "row"}, default="binary"
        Weights written: 1 per link, or row-standardised (1 / number of
        neighbours of the focal area).

    Returns
    -------
    pandas.DataFrame
        The table written.

    Examples
    --------
    >>> import io
    >>> g = AreaGraph.from_edges(["A", "B"], [("A", "B")])
    >>> buf = io.StringIO()
    >>> _ = write_edge_list(g, buf)
    >>> print(buf.getvalue().strip())
    focal_id,neighbour_id,weight
    A,B,1.0
    B,A,1.0
    """
    check_choice(style, "style", "write_edge_list", ("binary", "row"))
    table = graph.to_frame(style)
    table.to_csv(path, index=False)
    return table
