"""Core AreaGraph behaviour on graphs built by hand."""

import numpy as np
import pytest
import scipy.sparse as sp

from areamap.errors import GraphError
from areamap.graphs import AreaGraph


def test_row_weights_sum_to_one_except_islands(graph_with_island):
    w = graph_with_island.weights("row")
    np.testing.assert_allclose(w.sum(axis=1), [1, 1, 1, 1, 0], atol=1e-12)  # exact arithmetic


def test_islands_reported_by_name(graph_with_island):
    s = graph_with_island.summary()
    assert s.islands == ("Eyot",)
    assert s.n_components == 2
    assert s.n_links == 4


def test_asymmetric_matrix_rejected():
    m = sp.csr_array(np.array([[0, 1], [0, 0]]))
    with pytest.raises(GraphError, match="not symmetric"):
        AreaGraph.from_adjacency(["a", "b"], m)


def test_reorder_matches_permuted_matrix(grid5_rook):
    rng = np.random.default_rng(1)
    perm = rng.permutation(grid5_rook.n)
    g2 = grid5_rook.reorder(grid5_rook.ids[perm])
    dense = grid5_rook.adjacency.toarray()
    np.testing.assert_array_equal(g2.adjacency.toarray(), dense[np.ix_(perm, perm)])


def test_reorder_different_set_names_both_sides(path3):
    with pytest.raises(GraphError, match=r"not in the graph \(Z\).*not in the data \(C\)"):
        path3.reorder(["A", "B", "Z"])


def test_edge_list_both_directions(path3):
    df = path3.to_frame()
    assert list(zip(df.focal_id, df.neighbour_id)) == [("A", "B"), ("B", "A"), ("B", "C"), ("C", "B")]


def test_laplacian_rows_sum_to_zero(grid5_queen):
    np.testing.assert_allclose(grid5_queen.laplacian().sum(axis=1), 0, atol=1e-12)  # exact arithmetic
