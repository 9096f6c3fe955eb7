"""Sparse Cholesky factorization and selected inversion for symmetric positive-definite matrices.

Private helpers of :mod:`areamap.models`. scipy has no sparse Cholesky, so this
module provides a small, deterministic one compiled with numba:

* a fill-reducing ordering computed once per sparsity pattern (the multiple
  minimum degree ordering of SuperLU, taken from ``scipy.sparse.linalg.splu``
  on the pattern of A + Aᵀ; it is only used as an ordering);
* the elimination tree, the pattern of the factor L and its row patterns (symbolic
  phase, once);
* an up-looking numeric factorization A = L Lᵀ that reuses the symbolic phase
  for every new set of values with the same (or a smaller) pattern;
* triangular solves, log-determinant, and the selected inverse: the elements of
  A⁻¹ on the pattern of L (Takahashi recursions).

References
----------
Davis, T. A. (2006). *Direct Methods for Sparse Linear Systems*. SIAM (elimination
tree, row-subtree reach, up-looking Cholesky).

Rue, H. & Held, L. (2005). *Gaussian Markov Random Fields: Theory and Applications*.
Chapman & Hall/CRC, section 2.3 (Takahashi recursions for the marginal variances).
"""

from __future__ import annotations

import numba as nb
import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu

__all__: list[str] = []


# --------------------------------------------------------------------- kernels
@nb.njit(cache=True)
def _etree(n, ap, ai):  # pragma: no cover - compiled
    """Elimination tree of a matrix given by its upper triangle in CSC (rows i <= k in column k)."""
    parent = np.full(n, -1, np.int64)
    ancestor = np.full(n, -1, np.int64)
    for k in range(n):
        for p in range(ap[k], ap[k + 1]):
            i = ai[p]
            while i != -1 and i < k:
                inext = ancestor[i]
                ancestor[i] = k
                if inext == -1:
                    parent[i] = k
                i = inext
    return parent


@nb.njit(cache=True)
def _ereach(k, ap, ai, parent, s, w, n):  # pragma: no cover - compiled
    """Pattern of row k of L (columns < k) in s[top:n], topologically ordered."""
    top = n
    w[k] = k
    for p in range(ap[k], ap[k + 1]):
        i = ai[p]
        if i > k:
            continue
        ln = 0
        while w[i] != k:
            s[ln] = i
            ln += 1
            w[i] = k
            i = parent[i]
        while ln > 0:
            top -= 1
            ln -= 1
            s[top] = s[ln]
    return top


@nb.njit(cache=True)
def _symbolic(n, ap, ai, parent):  # pragma: no cover - compiled
    """Column pointers and row indices of L (sorted, diagonal first in each column)."""
    counts = np.ones(n, np.int64)
    s = np.empty(n, np.int64)
    w = np.full(n, -1, np.int64)
    for k in range(n):
        top = _ereach(k, ap, ai, parent, s, w, n)
        for t in range(top, n):
            counts[s[t]] += 1
    lp = np.zeros(n + 1, np.int64)
    for j in range(n):
        lp[j + 1] = lp[j] + counts[j]
    li = np.empty(lp[n], np.int64)
    c = lp[:n].copy()
    w[:] = -1
    for k in range(n):
        top = _ereach(k, ap, ai, parent, s, w, n)
        for t in range(top, n):
            i = s[t]
            li[c[i]] = k
            c[i] += 1
        li[c[k]] = k
        c[k] += 1
    return lp, li


@nb.njit(cache=True)
def _numeric(n, ap, ai, ax, parent, lp, li, lx):  # pragma: no cover - compiled
    """Up-looking numeric Cholesky into lx; returns -1 on success or the failing column."""
    x = np.zeros(n)
    s = np.empty(n, np.int64)
    w = np.full(n, -1, np.int64)
    c = lp[:n].copy()
    for k in range(n):
        top = _ereach(k, ap, ai, parent, s, w, n)
        x[k] = 0.0
        for p in range(ap[k], ap[k + 1]):
            if ai[p] <= k:
                x[ai[p]] += ax[p]
        d = x[k]
        x[k] = 0.0
        for t in range(top, n):
            i = s[t]
            lki = x[i] / lx[lp[i]]
            x[i] = 0.0
            for p in range(lp[i] + 1, c[i]):
                x[li[p]] -= lx[p] * lki
            d -= lki * lki
            lx[c[i]] = lki
            c[i] += 1
        if not d > 0.0:
            return k
        lx[c[k]] = np.sqrt(d)
        c[k] += 1
    return -1


@nb.njit(cache=True)
def _row_patterns(n, ap, ai, parent, lp):  # pragma: no cover - compiled
    """Row patterns of L below the diagonal, in the topological order of :func:`_ereach`.

    ``rc[rp[k]:rp[k+1]]`` are the columns i < k with L[k, i] != 0 and ``rpos`` the position
    of L[k, i] in the column-wise storage of L (symbolic phase, computed once).
    """
    rp = np.zeros(n + 1, np.int64)
    rc = np.empty(lp[n] - n, np.int64)
    rpos = np.empty(lp[n] - n, np.int64)
    s = np.empty(n, np.int64)
    w = np.full(n, -1, np.int64)
    c = lp[:n] + 1
    t0 = 0
    for k in range(n):
        top = _ereach(k, ap, ai, parent, s, w, n)
        for t in range(top, n):
            i = s[t]
            rc[t0] = i
            rpos[t0] = c[i]
            c[i] += 1
            t0 += 1
        rp[k + 1] = t0
    return rp, rc, rpos


@nb.njit(cache=True)
def _numeric_rows(n, ap, ai, ax, lp, li, rp, rc, rpos, lx):  # pragma: no cover - compiled
    """Same arithmetic as :func:`_numeric` (bit-identical), with the row patterns precomputed."""
    x = np.zeros(n)
    for k in range(n):
        x[k] = 0.0
        for p in range(ap[k], ap[k + 1]):
            if ai[p] <= k:
                x[ai[p]] += ax[p]
        d = x[k]
        x[k] = 0.0
        for t in range(rp[k], rp[k + 1]):
            i = rc[t]
            q = rpos[t]
            lki = x[i] / lx[lp[i]]
            x[i] = 0.0
            for p in range(lp[i] + 1, q):
                x[li[p]] -= lx[p] * lki
            d -= lki * lki
            lx[q] = lki
        if not d > 0.0:
            return k
        lx[lp[k]] = np.sqrt(d)
    return -1


@nb.njit(cache=True)
def _solve_inplace(n, lp, li, lx, b):  # pragma: no cover - compiled
    """Solve L Lᵀ x = b in place; b has shape (n, m)."""
    m = b.shape[1]
    for j in range(n):  # forward: L y = b
        d = lx[lp[j]]
        for r in range(m):
            b[j, r] /= d
        for p in range(lp[j] + 1, lp[j + 1]):
            i = li[p]
            v = lx[p]
            for r in range(m):
                b[i, r] -= v * b[j, r]
    for j in range(n - 1, -1, -1):  # backward: Lᵀ x = y
        for p in range(lp[j] + 1, lp[j + 1]):
            i = li[p]
            v = lx[p]
            for r in range(m):
                b[j, r] -= v * b[i, r]
        d = lx[lp[j]]
        for r in range(m):
            b[j, r] /= d


@nb.njit(cache=True)
def _find(li, lo, hi, row):  # pragma: no cover - compiled
    """Position of ``row`` in the sorted slice li[lo:hi] (binary search), -1 if absent."""
    while lo < hi:
        mid = (lo + hi) // 2
        v = li[mid]
        if v < row:
            lo = mid + 1
        elif v > row:
            hi = mid
        else:
            return mid
    return -1


@nb.njit(cache=True)
def _takahashi(n, lp, li, lx):  # pragma: no cover - compiled
    """Elements of (L Lᵀ)⁻¹ on the pattern of L (same layout as lx).

    Column j needs Sigma[i, k] for every pair i, k in the pattern I_j of column
    j below the diagonal; the pattern of column k contains I_j ∩ (k, n), so one
    merge walk down column k finds them all.
    """
    sx = np.zeros(lx.size)
    acc = np.zeros(n)
    for j in range(n - 1, -1, -1):
        p0 = lp[j]
        p1 = lp[j + 1]
        ljj = lx[p0]
        m = p1 - p0 - 1
        for a in range(m):
            acc[a] = 0.0
        for b in range(m):
            k = li[p0 + 1 + b]
            lkj = lx[p0 + 1 + b]
            acc[b] += lkj * sx[lp[k]]
            q = lp[k] + 1
            for a in range(b + 1, m):
                i = li[p0 + 1 + a]
                while li[q] < i:
                    q += 1
                s = sx[q]
                acc[a] += lkj * s
                acc[b] += lx[p0 + 1 + a] * s
        diag = 0.0
        for a in range(m):
            v = -acc[a] / ljj
            sx[p0 + 1 + a] = v
            diag += lx[p0 + 1 + a] * v
        sx[p0] = 1.0 / (ljj * ljj) - diag / ljj
    return sx


@nb.njit(cache=True)
def _lookup(lp, li, sx, rows, cols):  # pragma: no cover - compiled
    """sx at (max(r, c), min(r, c)) for each pair; NaN when the pair is not in the pattern."""
    out = np.empty(rows.size)
    for t in range(rows.size):
        r = rows[t]
        c = cols[t]
        if r < c:
            r, c = c, r
        q = _find(li, lp[c], lp[c + 1], r)
        out[t] = sx[q] if q >= 0 else np.nan
    return out


@nb.njit(cache=True)
def _positions(ap, ai, rows, cols):  # pragma: no cover - compiled
    """Index into the data of an upper-triangular CSC pattern of each (row <= col) pair; -1 if absent."""
    out = np.empty(rows.size, np.int64)
    for t in range(rows.size):
        out[t] = _find(ai, ap[cols[t]], ap[cols[t] + 1], rows[t])
    return out


# --------------------------------------------------------------------- wrapper
def fill_reducing_order(pattern: sp.spmatrix | sp.sparray) -> np.ndarray:
    """Multiple-minimum-degree ordering of a symmetric pattern (from SuperLU, used as an ordering only)."""
    a = sp.csc_matrix(pattern, dtype=float)
    n = a.shape[0]
    if n == 0:
        return np.zeros(0, np.int64)
    a = abs(a) + abs(a.T)
    # A diagonally dominant matrix with the same pattern: SuperLU never pivots on it.
    deg = np.asarray(a.sum(axis=1)).ravel()
    m = (a + sp.diags(deg + 1.0)).tocsc()
    lu = splu(m, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
              options={"SymmetricMode": True})
    # perm_c maps original column j to position perm_c[j]; the elimination order is its inverse.
    return np.argsort(np.asarray(lu.perm_c, dtype=np.int64)).astype(np.int64)


class SparseCholesky:
    """Symbolic analysis of a symmetric pattern, reusable for numeric factorizations.

    Parameters
    ----------
    pattern : sparse matrix, shape (n, n)
        Symmetric matrix whose nonzero pattern contains that of every matrix
        factorized later.
    order : ndarray of int, shape (n,)
        Elimination order (``order[k]`` is the original index eliminated k-th).
    """

    def __init__(self, pattern, order: np.ndarray):
        self.n = int(pattern.shape[0])
        self.order = np.asarray(order, dtype=np.int64)
        self.inverse_order = np.empty_like(self.order)
        self.inverse_order[self.order] = np.arange(self.n)
        up = self._permuted_upper(sp.csr_matrix(pattern, dtype=float), check=False)
        self._ap = up.indptr.astype(np.int64)
        self._ai = up.indices.astype(np.int64)
        self.parent = _etree(self.n, self._ap, self._ai)
        self.lp, self.li = _symbolic(self.n, self._ap, self._ai, self.parent)
        # row patterns of L (the numeric factorizations then skip the elimination-tree walks)
        self._rp, self._rc, self._rpos = _row_patterns(self.n, self._ap, self._ai, self.parent, self.lp)
        self.n_upper = int(self._ap[-1])
        self.lx: np.ndarray | None = None

    @property
    def nnz(self) -> int:
        """Nonzeros of the factor L."""
        return int(self.lp[-1])

    def _permuted_upper(self, a, check=True):
        p = self.order
        b = sp.csr_matrix(a)[p][:, p]
        return sp.triu(b, format="csc")

    def factorize(self, a) -> int:
        """Numeric factorization of ``a`` (same pattern as the analysed one); -1 on success."""
        up = self._permuted_upper(a)
        lx = np.zeros(self.nnz)
        ap = up.indptr.astype(np.int64)
        ai = up.indices.astype(np.int64)
        if not (np.array_equal(ap, self._ap) and np.array_equal(ai, self._ai)):
            # a smaller pattern than the analysed one: row patterns do not apply
            status = _numeric(self.n, ap, ai, up.data.astype(np.float64), self.parent, self.lp, self.li, lx)
        else:
            status = _numeric_rows(self.n, ap, ai, up.data.astype(np.float64), self.lp, self.li,
                                   self._rp, self._rc, self._rpos, lx)
        self.lx = lx
        return int(status)

    def positions(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Indices into the permuted upper-triangular data (see :meth:`factorize_data`) of the
        entries (rows, cols) given in original indexing; raises if one is outside the pattern."""
        r = self.inverse_order[np.asarray(rows, dtype=np.int64)]
        c = self.inverse_order[np.asarray(cols, dtype=np.int64)]
        lo = np.minimum(r, c)
        hi = np.maximum(r, c)
        pos = _positions(self._ap, self._ai, lo, hi)
        if np.any(pos < 0):  # pragma: no cover - internal consistency
            raise ValueError("entry outside the analysed sparsity pattern")
        return pos

    def factorize_data(self, data: np.ndarray) -> int:
        """Numeric factorization from values on the analysed pattern (order of :meth:`positions`)."""
        lx = np.zeros(self.nnz)
        status = _numeric_rows(self.n, self._ap, self._ai, data, self.lp, self.li,
                               self._rp, self._rc, self._rpos, lx)
        self.lx = lx
        return int(status)

    def logdet(self) -> float:
        """log det of the factorized matrix."""
        return float(2.0 * np.sum(np.log(self.lx[self.lp[:-1]])))

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Solve A x = b for a vector or a matrix of right-hand sides."""
        b = np.asarray(b, dtype=float)
        vec = b.ndim == 1
        bb = np.ascontiguousarray((b[:, None] if vec else b)[self.order])
        _solve_inplace(self.n, self.lp, self.li, self.lx, bb)
        out = np.empty_like(bb)
        out[self.order] = bb
        return out[:, 0] if vec else out

    def selected_inverse(self) -> np.ndarray:
        """Elements of A⁻¹ on the pattern of L (permuted layout; use :meth:`inverse_at`)."""
        self.sx = _takahashi(self.n, self.lp, self.li, self.lx)
        return self.sx

    def inverse_at(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Elements (A⁻¹)[rows, cols] in original indexing; must lie in the pattern of L + Lᵀ."""
        r = self.inverse_order[np.asarray(rows, dtype=np.int64)]
        c = self.inverse_order[np.asarray(cols, dtype=np.int64)]
        return _lookup(self.lp, self.li, self.sx, r, c)

    def inverse_diagonal(self) -> np.ndarray:
        """Diagonal of A⁻¹ in original indexing."""
        d = self.sx[self.lp[:-1]]
        return d[self.inverse_order]
