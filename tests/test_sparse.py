"""Tests of the sparse Cholesky machinery: the supernodal selected inverse (blocked Takahashi
recursions) against numpy.linalg.inv and against the column-wise recursions it replaced."""

from __future__ import annotations

import numba as nb
import numpy as np
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from areamap import _car_engine as eng
from areamap import _sparse
from areamap._sparse import SparseCholesky, fill_reducing_order

from conftest import grid_graph


def _random_spd(n, density, seed):
    """Sparse symmetric, strictly diagonally dominant (hence SPD and well conditioned)."""
    a = sp.random(n, n, density=density, random_state=seed)
    a = a + a.T
    return sp.csr_matrix(a + sp.diags(np.asarray(abs(a).sum(axis=1)).ravel() + 1.0))


def _band(n, width, seed):
    """SPD band matrix in its natural order: relaxed supernodes of up to 16 columns with many rows."""
    rng = np.random.default_rng(seed)
    a = sp.diags([rng.uniform(-1.0, 1.0, n - d) for d in range(1, width + 1)], list(range(1, width + 1)),
                 shape=(n, n))
    a = a + a.T
    return sp.csr_matrix(a + sp.diags(np.asarray(abs(a).sum(axis=1)).ravel() + 1.0))


def _bym2_precision(nrow, ncol, seed):
    """Posterior precision of the BYM2 latent field (v, u, beta) of a queen grid (the engine's matrix)."""
    rng = np.random.default_rng(seed)
    graph = grid_graph(nrow, ncol, queen=True)
    n = graph.n
    e = rng.uniform(3.0, 8.0, n)
    lm = eng._LatentModel("bym2", rng.poisson(5.0, n).astype(float), e, rng.normal(size=(n, 2)),
                          eng._GraphStructure(graph.adjacency), intercept_sd=5.0, coefficient_sd=5.0)
    theta = np.array([np.log(0.6), 0.4])
    data = lm._prior_data(theta) + np.bincount(
        lm._pos, weights=lm._products(theta) * np.tile(e * rng.uniform(0.5, 2.0, n), len(lm._pairs)),
        minlength=lm.chol.n_upper)
    return lm.chol, data


def _dense(ch, data):
    """The matrix whose values ``data`` are on the analysed (permuted upper) pattern, in original indexing."""
    q = np.zeros((ch.n, ch.n))
    cols = np.repeat(np.arange(ch.n), np.diff(ch._ap))
    q[ch.order[ch._ai], ch.order[cols]] = data
    q[ch.order[cols], ch.order[ch._ai]] = data
    return q


def _in_pattern_pairs(ch):
    """All (row, col) pairs, in original indexing, of the pattern of L (both triangles)."""
    cols = np.repeat(np.arange(ch.n), np.diff(ch.lp))
    r, c = ch.order[ch.li], ch.order[cols]
    return np.concatenate([r, c]), np.concatenate([c, r])


CASES = {
    "random 40": lambda: _random_spd(40, 0.1, 0),
    "random 150": lambda: _random_spd(150, 0.03, 1),
    "one area": lambda: sp.csr_matrix(np.array([[2.5]])),
    "diagonal": lambda: sp.diags(np.linspace(1.0, 3.0, 12)).tocsr(),
    "two components": lambda: sp.block_diag([_random_spd(30, 0.1, 2), _random_spd(25, 0.12, 3)]).tocsr(),
    "dense": lambda: sp.csr_matrix(_random_spd(70, 1.0, 4).toarray()),
    "band": lambda: _band(400, 80, 5),
}


@pytest.mark.parametrize("backend", ["cholmod", "numba"])
@pytest.mark.parametrize("case", sorted(CASES))
def test_selected_inverse_equals_dense_inverse(case, backend):
    """Blocked Takahashi recursions (Rue & Held 2005, sec. 2.3) vs numpy.linalg.inv on every entry
    of the pattern of L, in both triangles. The matrices are diagonally dominant (condition number
    below ~10), so 1e-10 relative is rounding error; the diagonal is checked at 1e-12."""
    a = CASES[case]()
    ch = SparseCholesky(a, fill_reducing_order(a), backend=backend)
    assert ch.factorize(a) == -1
    ch.selected_inverse()
    dense = np.linalg.inv(a.toarray())
    assert_allclose(ch.inverse_diagonal(), np.diag(dense), rtol=1e-12)
    r, c = _in_pattern_pairs(ch)
    assert_allclose(ch.inverse_at(r, c), dense[r, c], rtol=1e-10, atol=1e-14 * np.abs(dense).max())


def test_band_case_uses_the_dense_products():
    """The band case above reaches the dense branch of the recursions (both products), so that branch
    is checked against numpy too."""
    a = _band(400, 80, 5)
    b = SparseCholesky(a, fill_reducing_order(a))._supernodal()
    s = np.diff(b.starts)
    r = np.diff(b.rptr) - s
    assert np.any(s * r * r >= _sparse._DENSE_MIN)
    assert np.any(s * s * r >= _sparse._DENSE_MIN)


@pytest.mark.parametrize("nrow, ncol, seed", [(5, 5, 0), (9, 9, 1), (30, 30, 2)])
def test_supernodal_and_column_recursions_agree(nrow, ncol, seed):
    """The new recursions against the column-wise kernel they replaced (``_takahashi``), from the
    same factor, on the BYM2 posterior precision (condition number up to ~1e9 here): 1e-13 of the
    largest entry and 1e-11 relative on the diagonal (rounding of two exact recursions)."""
    ch, data = _bym2_precision(nrow, ncol, seed)
    assert ch.factorize_data(data) == -1
    new = ch.selected_inverse().copy()
    old = _sparse._takahashi(ch.n, ch.lp, ch.li, ch.lx)
    assert_allclose(new, old, rtol=0, atol=1e-13 * np.abs(old).max())
    d = ch.lp[:-1]
    assert_allclose(new[d], old[d], rtol=1e-11)
    # same diagonal through the public accessor, in original indexing
    assert_allclose(ch.inverse_diagonal()[ch.order], old[d], rtol=1e-11)
    if ch.n < 200:  # and the dense truth (numpy.linalg.inv of the assembled matrix)
        assert_allclose(ch.inverse_diagonal(), np.diag(np.linalg.inv(_dense(ch, data))), rtol=1e-9)


def test_selected_inverse_is_deterministic_on_any_number_of_threads(monkeypatch):
    """Repeated selected inverses are bit-identical, with the parallel groups on one thread or on
    all of them (every supernode and every row do the same arithmetic whatever the schedule), and
    equal to the undivided sequential order."""
    monkeypatch.setattr(_sparse, "_PARALLEL_WORK", 0.0)  # split this small case too
    ch, data = _bym2_precision(30, 30, 3)
    ch.factorize_data(data)
    if nb.get_num_threads() > 1:
        assert ch._supernodal().gptr.size > 2  # really split into groups
    first = ch.selected_inverse().copy()
    lx_first = ch.lx.copy()
    ch.factorize_data(data)
    assert_array_equal(ch.selected_inverse(), first)
    threads = nb.get_num_threads()
    try:
        nb.set_num_threads(1)
        ch.factorize_data(data)
        assert_array_equal(ch.selected_inverse(), first)
        assert_array_equal(ch.lx, lx_first)
    finally:
        nb.set_num_threads(threads)
    # the grouped column factor is the sequential one, bit for bit
    _, lp, li, rp, rc, rpos = ch._symbolic()
    lx = np.zeros(int(lp[-1]))
    assert _sparse._numeric_rows(ch.n, ch._ap, ch._ai, data, lp, li, rp, rc, rpos, lx) == -1
    assert_array_equal(lx, lx_first)
    monkeypatch.setattr(_sparse, "_PARALLEL_WORK", np.inf)
    ch._super = None  # no split: one sequential pass
    ch.factorize_data(data)
    assert ch._supernodal().gptr.size == 2
    assert_array_equal(ch.selected_inverse(), first)


def test_inverse_at_outside_the_blocks_is_nan_and_symmetric():
    a = _random_spd(60, 0.03, 6)
    ch = SparseCholesky(a, fill_reducing_order(a))
    ch.factorize(a)
    ch.selected_inverse()
    dense = np.linalg.inv(a.toarray())
    r, c = np.nonzero(np.ones((60, 60)))
    got = ch.inverse_at(r, c)
    inside = ~np.isnan(got)
    assert 0 < inside.sum() < r.size  # a sparse factor: some pairs are outside
    assert_array_equal(got, ch.inverse_at(c, r))
    assert_allclose(got[inside], dense[r[inside], c[inside]], rtol=1e-10, atol=1e-14)


@settings(max_examples=30, deadline=None)
@given(st.integers(min_value=1, max_value=40), st.floats(min_value=0.02, max_value=0.5),
       st.integers(min_value=0, max_value=10_000))
def test_postorder_and_supernodes_are_valid(n, density, seed):
    """Property (Davis 2006, ch. 4): a postorder lists every subtree contiguously, ending at its
    root; a supernode is a chain of columns, each the parent of the previous one; the top part and
    the groups of subtrees cover every supernode exactly once, and no group holds an ancestor of
    another group's supernode."""
    a = _random_spd(n, density, seed)
    ch = SparseCholesky(a, fill_reducing_order(a))
    parent = ch.parent
    post = _sparse._postorder(parent)
    assert_array_equal(np.sort(post), np.arange(n))
    ipost = np.empty(n, np.int64)
    ipost[post] = np.arange(n)
    _, count = _sparse._subtree_sums(np.where(parent[post] >= 0, ipost[np.maximum(parent[post], 0)], -1),
                                     np.ones(n))
    for t in range(n):  # descendants of post[t] are exactly the count[t] - 1 positions before t
        desc = set()
        for j in range(n):
            k = j
            while parent[k] != -1 and k != post[t]:
                k = parent[k]
            if k == post[t] and j != post[t]:
                desc.add(j)
        assert desc == set(post[t - count[t] + 1:t])
    b = ch._supernodal()
    ppar = np.where(parent[post] >= 0, ipost[np.maximum(parent[post], 0)], -1)
    for k in range(b.starts.size - 1):
        cols = np.arange(b.starts[k], b.starts[k + 1])
        assert np.all(ppar[cols[:-1]] == cols[1:])
    covered = np.zeros(b.starts.size - 1, int)
    covered[b.top] += 1
    owner = np.full(b.starts.size - 1, -1)
    for g in range(b.gptr.size - 1):
        for t in range(b.gptr[g], b.gptr[g + 1]):
            covered[b.glo[t]:b.ghi[t]] += 1
            owner[b.glo[t]:b.ghi[t]] = g
    assert_array_equal(covered, 1)
    sparent = b.snode[np.maximum(ppar[b.starts[1:] - 1], 0)]
    sparent[ppar[b.starts[1:] - 1] < 0] = -1
    for k in np.flatnonzero(owner >= 0):  # ancestors are in the same group or in the top part
        p = sparent[k]
        while p != -1:
            assert owner[p] in (owner[k], -1)
            p = sparent[p]


@pytest.mark.parametrize("m, k, n", [(1, 1, 1), (3, 5, 2), (4, 7, 9), (13, 6, 11)])
def test_dense_product_kernel(m, k, n):
    """The hand-written product against numpy's matmul (rounding, 1e-13 relative)."""
    rng = np.random.default_rng(m * 100 + n)
    a, b = rng.normal(size=(m, k)), rng.normal(size=(k, n))
    c = np.full((m, n), np.nan)
    _sparse._gemm_rows(a, b, c)
    assert_allclose(c, a @ b, rtol=1e-13, atol=1e-13)
