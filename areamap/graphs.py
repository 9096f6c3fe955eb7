"""Neighbour graphs between areas.

:class:`AreaGraph` is the one graph type the rest of areamap uses: a symmetric,
binary adjacency matrix over an ordered index of area ids. Builders (contiguity,
k-nearest neighbours, distance band, extra links, island policies) construct
it; the statistics only ever need ``adjacency``, ``weights()`` and
``components()``.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from ._params import check_choice
from .errors import GraphError, format_examples

__all__ = ["AreaGraph", "GraphSummary"]


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
        return AreaGraph.from_adjacency(target, a, names=nm, kind=self.kind)
