"""Sparse Cholesky factorization and selected inversion for symmetric positive-definite matrices.

Private helpers of :mod:`areamap.models`. scipy has no sparse Cholesky. The repeated
numeric factorizations and solves run on the supernodal Cholesky of CHOLMOD
(SuiteSparse) as bundled in the ``cvxopt`` wheels; the rest is a small, deterministic
set of kernels compiled with numba:

* a fill-reducing ordering computed once per sparsity pattern (the multiple
  minimum degree ordering of SuperLU, taken from ``scipy.sparse.linalg.splu``
  on the pattern of A + Aᵀ; it is only used as an ordering);
* the elimination tree, the pattern of the factor L and its row patterns (symbolic
  phase, once), and CHOLMOD's supernodal symbolic analysis of the permuted pattern
  (once);
* numeric factorizations A = L Lᵀ that reuse the symbolic phase for every new set
  of values with the same (or a smaller) pattern: CHOLMOD's supernodal kernel (dense
  BLAS on blocks of columns with the same pattern) or, as a fallback and reference,
  an up-looking kernel;
* triangular solves and log-determinant;
* the selected inverse: the elements of A⁻¹ on the pattern of L (Takahashi
  recursions), computed only when asked for. The column-wise factor of the last
  values (up-looking kernel, same arithmetic as ever) is copied into dense blocks of
  relaxed supernodes of a postorder of the elimination tree, and the recursions run
  block by block (one gather of Σ_II per supernode instead of one per column, dense
  products for the large blocks). For large factors, disjoint subtrees of the
  elimination tree run in parallel; every entry is computed by the same operations
  whatever the schedule, so results are bit-identical on any number of threads.

References
----------
Chen, Y., Davis, T. A., Hager, W. W. & Rajamanickam, S. (2008). Algorithm 887:
CHOLMOD, supernodal sparse Cholesky factorization and update/downdate. *ACM
Transactions on Mathematical Software* 35(3), 22.

Davis, T. A. (2006). *Direct Methods for Sparse Linear Systems*. SIAM (elimination
tree, row-subtree reach, up-looking Cholesky).

Rue, H. & Held, L. (2005). *Gaussian Markov Random Fields: Theory and Applications*.
Chapman & Hall/CRC, section 2.3 (Takahashi recursions for the marginal variances).

Ashcraft, C. & Grimes, R. (1989). The influence of relaxed supernode partitions on the
multifrontal method. *ACM Transactions on Mathematical Software* 15(4), 291–309
(amalgamation of supernodes at the price of explicit zeros).

Takahashi, K., Fagan, J. & Chen, M.-S. (1973). Formation of a sparse bus impedance matrix
and its application to short circuit study. *Proc. 8th PICA Conference*, 63–69 (the
recursions; the blocked form follows from Σ L = L⁻ᵀ column block by column block).
"""

from __future__ import annotations

from typing import NamedTuple

import numba as nb
import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu

try:  # CHOLMOD's supernodal Cholesky, as bundled in the cvxopt wheels
    from cvxopt import cholmod as _cholmod
    from cvxopt import matrix as _cvx_matrix
    from cvxopt import spmatrix as _cvx_spmatrix
except ImportError:  # pragma: no cover - cvxopt is the optional 'fast' extra; the numba kernels remain usable
    _cholmod = _cvx_matrix = _cvx_spmatrix = None

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


@nb.njit(cache=True, inline="always")
def _numeric_row(k, ap, ai, ax, lp, li, rp, rc, rpos, lx, x):  # pragma: no cover - compiled
    """Row k of the up-looking factorization (x: zero workspace, left zero); False if not SPD."""
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
        return False
    lx[lp[k]] = np.sqrt(d)
    return True


@nb.njit(cache=True)
def _numeric_rows(n, ap, ai, ax, lp, li, rp, rc, rpos, lx):  # pragma: no cover - compiled
    """Up-looking numeric Cholesky into lx (Davis 2006, ch. 4), the row patterns of L precomputed;
    returns -1 on success or the failing column."""
    x = np.zeros(n)
    for k in range(n):
        if not _numeric_row(k, ap, ai, ax, lp, li, rp, rc, rpos, lx, x):
            return k
    return -1


@nb.njit(cache=True, parallel=True)
def _numeric_rows_groups(n, ap, ai, ax, lp, li, rp, rc, rpos, lx, label, ngroups):  # pragma: no cover
    """:func:`_numeric_rows` with the rows of disjoint subtrees of the elimination tree (label g >= 0)
    done in parallel, then the rest (label -1). Row k only reads rows of its own subtree, and every
    row does the same arithmetic as in :func:`_numeric_rows`, so the factor is bit-identical."""
    status = np.full(ngroups + 1, -1, np.int64)
    for g in nb.prange(ngroups):
        x = np.zeros(n)
        for k in range(n):
            if label[k] == g and not _numeric_row(k, ap, ai, ax, lp, li, rp, rc, rpos, lx, x):
                status[g] = k
                break
    x = np.zeros(n)
    for k in range(n):
        if label[k] < 0 and not _numeric_row(k, ap, ai, ax, lp, li, rp, rc, rpos, lx, x):
            status[ngroups] = k
            break
    for g in range(ngroups + 1):
        if status[g] >= 0:
            return status[g]
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
def _postorder(parent):  # pragma: no cover - compiled
    """Postorder of a forest (children visited in increasing order; Davis 2006, sec. 4.3)."""
    n = parent.size
    head = np.full(n, -1, np.int64)
    nxt = np.full(n, -1, np.int64)
    for j in range(n - 1, -1, -1):
        p = parent[j]
        if p != -1:
            nxt[j] = head[p]
            head[p] = j
    post = np.empty(n, np.int64)
    stack = np.empty(n, np.int64)
    k = 0
    for root in range(n):
        if parent[root] != -1:
            continue
        top = 0
        stack[0] = root
        while top >= 0:
            p = stack[top]
            i = head[p]
            if i == -1:
                top -= 1
                post[k] = p
                k += 1
            else:
                head[p] = nxt[i]
                top += 1
                stack[top] = i
    return post


@nb.njit(cache=True)
def _permuted_factor_pattern(lp, li, post, ipost):  # pragma: no cover - compiled
    """Pattern of P L Pᵀ for a postorder P (still lower triangular): column pointers, sorted row
    indices, and for each entry its position in the column-wise storage (lp, li)."""
    n = lp.size - 1
    plp = np.zeros(n + 1, np.int64)
    for t in range(n):
        plp[t + 1] = plp[t] + lp[post[t] + 1] - lp[post[t]]
    pli = np.empty(lp[n], np.int64)
    src = np.empty(lp[n], np.int64)
    for t in range(n):
        j = post[t]
        m = lp[j + 1] - lp[j]
        rr = np.empty(m, np.int64)
        for p in range(m):
            rr[p] = ipost[li[lp[j] + p]]
        srt = np.argsort(rr)
        for p in range(m):
            pli[plp[t] + p] = rr[srt[p]]
            src[plp[t] + p] = lp[j] + srt[p]
    return plp, pli, src


@nb.njit(cache=True)
def _scatter(dst, idx, values):  # pragma: no cover - compiled
    """dst[idx] = values."""
    for p in range(idx.size):
        dst[idx[p]] = values[p]


@nb.njit(cache=True)
def _gather(values, idx):  # pragma: no cover - compiled
    """values[idx]."""
    out = np.empty(idx.size)
    for p in range(idx.size):
        out[p] = values[idx[p]]
    return out


@nb.njit(cache=True)
def _relaxed_supernodes(lp, li, parent):  # pragma: no cover - compiled
    """Partition of the (postordered) columns into relaxed supernodes.

    A run of columns f..l-1 forms a supernode when each column's parent is the next column;
    the rows below the run are those of its last column. Runs are merged greedily along such
    chains while the explicit zeros this adds stay below the shares of Ashcraft & Grimes
    (1989)-style amalgamation (all merges up to 4 columns, 80 % zeros up to 16, 10 % up to 48,
    5 % beyond). Returns the first column of each supernode (and n at the end).
    """
    n = lp.size - 1
    cnt = np.diff(lp)
    starts = np.empty(n + 1, np.int64)
    ns = 0
    f = 0
    true_nnz = cnt[0]
    for j in range(1, n + 1):
        if j < n and parent[j - 1] == j:
            # candidate: merge column j into the current run f..j-1
            s = j - f + 1
            r = cnt[j] - 1  # rows below j (the rows below the merged run)
            padded = s * (s + 1) // 2 + s * r
            tn = true_nnz + cnt[j]
            zeros = padded - tn
            if cnt[j - 1] == cnt[j] + 1 or s <= 4:
                ok = True
            elif s <= 16:
                ok = zeros < 0.8 * padded
            elif s <= 48:
                ok = zeros < 0.1 * padded
            else:
                ok = zeros < 0.05 * padded
            if ok:
                true_nnz = tn
                continue
        starts[ns] = f
        ns += 1
        f = j
        if j < n:
            true_nnz = cnt[j]
    starts[ns] = n
    return starts[: ns + 1].copy()


@nb.njit(cache=True)
def _supernode_layout(lp, li, starts):  # pragma: no cover - compiled
    """Dense column-major blocks of the supernodes.

    Supernode K has columns f..l-1 and rows R_K = (f..l-1, then the rows below l-1); its block
    of ld = |R_K| rows and l - f columns starts at off[K], so entry (R_K[x], f + o) lives at
    off[K] + o * ld + x (the strictly upper part of the diagonal block is unused). Returns
    (rptr, rows, off, snode, pos): row lists, block offsets, the supernode of each column and
    the block position of every entry of the column-wise pattern (lp, li).
    """
    n = lp.size - 1
    ns = starts.size - 1
    rptr = np.zeros(ns + 1, np.int64)
    off = np.zeros(ns + 1, np.int64)
    snode = np.empty(n, np.int64)
    for k in range(ns):
        f = starts[k]
        l = starts[k + 1]
        ld = l - f + lp[l] - lp[l - 1] - 1
        rptr[k + 1] = rptr[k] + ld
        off[k + 1] = off[k] + ld * (l - f)
        for c in range(f, l):
            snode[c] = k
    rows = np.empty(rptr[ns], np.int64)
    pos = np.empty(lp[n], np.int64)
    for k in range(ns):
        f = starts[k]
        l = starts[k + 1]
        s = l - f
        r0 = rptr[k]
        for x in range(s):
            rows[r0 + x] = f + x
        for t in range(lp[l - 1] + 1, lp[l]):
            rows[r0 + s + t - lp[l - 1] - 1] = li[t]
        ld = rptr[k + 1] - r0
        for c in range(f, l):
            o = c - f
            x = o
            for p in range(lp[c], lp[c + 1]):
                while rows[r0 + x] < li[p]:
                    x += 1
                pos[p] = off[k] + o * ld + x
    return rptr, rows, off, snode, pos


@nb.njit(cache=True)
def _subtree_sums(parent, work):  # pragma: no cover - compiled
    """Work and number of nodes of every subtree of a postordered forest."""
    wsub = work.astype(np.float64).copy()
    count = np.ones(parent.size, np.int64)
    for k in range(parent.size):
        p = parent[k]
        if p >= 0:
            wsub[p] += wsub[k]
            count[p] += count[k]
    return wsub, count


#: supernodes with at least this many multiply-adds in a product form it densely (:func:`_gemm_rows`)
_DENSE_MIN = 1 << 12
#: largest Σ_II gathered densely (its buffer holds _DENSE_MAX_ROWS² values, 8 MB)
_DENSE_MAX_ROWS = 1024


@nb.njit(cache=True)
def _gemm_rows(a, b, c):  # pragma: no cover - compiled
    """c = a b for row-major a (m x k), b (k x n): rows of c updated four at a time by rows of b.

    Hand-written rather than BLAS: threaded BLAS calls are slow under CPU load, and the order of
    the sums is fixed (every c[i, j] sums over k in increasing order), so results are deterministic.
    """
    m, kk = a.shape
    nn = b.shape[1]
    for i in range(m):
        for j in range(nn):
            c[i, j] = 0.0
    i = 0
    while i + 4 <= m:
        for t in range(kk):
            a0 = a[i, t]
            a1 = a[i + 1, t]
            a2 = a[i + 2, t]
            a3 = a[i + 3, t]
            for j in range(nn):
                bv = b[t, j]
                c[i, j] += a0 * bv
                c[i + 1, j] += a1 * bv
                c[i + 2, j] += a2 * bv
                c[i + 3, j] += a3 * bv
        i += 4
    while i < m:
        for t in range(kk):
            a0 = a[i, t]
            for j in range(nn):
                c[i, j] += a0 * b[t, j]
        i += 1


@nb.njit(cache=True, inline="always")
def _dot_rows(u, i, v, j, lo, hi):  # pragma: no cover - compiled
    """Σ_t u[i, t] v[j, t] over lo <= t < hi, four partial sums in a fixed order (deterministic)."""
    s0 = 0.0
    s1 = 0.0
    s2 = 0.0
    s3 = 0.0
    t = lo
    while t + 4 <= hi:
        s0 += u[i, t] * v[j, t]
        s1 += u[i, t + 1] * v[j, t + 1]
        s2 += u[i, t + 2] * v[j, t + 2]
        s3 += u[i, t + 3] * v[j, t + 3]
        t += 4
    while t < hi:
        s0 += u[i, t] * v[j, t]
        t += 1
    return (s0 + s1) + (s2 + s3)


@nb.njit(cache=True)
def _selinv_node(k, starts, rptr, rows, off, snode, lb, sb, ws):  # pragma: no cover - compiled
    """Blocked Takahashi step of supernode k (see :func:`_takahashi_super`); ws = work buffers."""
    ybuf, zbuf, gcol, gbuf, wbuf, yrbuf, linv, rel, big_r = ws
    f = starts[k]
    s = starts[k + 1] - f
    r0 = rptr[k]
    ld = rptr[k + 1] - r0
    r = ld - s
    o0 = off[k]
    yt = ybuf[: s * r].reshape((s, r))
    zt = zbuf[: s * r].reshape((s, r))
    # Yᵀ = L_KK⁻ᵀ L_IKᵀ (back substitution over the columns of the supernode)
    for o in range(s - 1, -1, -1):
        col = o0 + o * ld
        for a in range(r):
            yt[o, a] = lb[col + s + a]
        for o2 in range(o + 1, s):
            lv = lb[col + o2]
            if lv != 0.0:
                for a in range(r):
                    yt[o, a] -= lv * yt[o2, a]
        d = lb[col + o]
        for a in range(r):
            yt[o, a] /= d
            zt[o, a] = 0.0
    # Zᵀ = (Σ_II Y)ᵀ: Σ_II is read one column (lower part) at a time from the ancestors;
    # large blocks gather the whole Σ_II and multiply it densely (:func:`_gemm_rows`)
    dense = s * r * r >= _DENSE_MIN and r <= _DENSE_MAX_ROWS
    g = gbuf[: r * r].reshape((r, r)) if dense else gbuf[:1].reshape((1, 1))
    b = 0
    while b < r:
        c = rows[r0 + s + b]
        p = snode[c]
        fp = starts[p]
        lpp = starts[p + 1]
        rp = rptr[p]
        ldp = rptr[p + 1] - rp
        b1 = b
        while b1 < r and rows[r0 + s + b1] < lpp:
            b1 += 1
        q = c - fp
        for a in range(b, r):
            i = rows[r0 + s + a]
            while rows[rp + q] < i:
                q += 1
            rel[a] = q
        for bb in range(b, b1):
            base = off[p] + (rows[r0 + s + bb] - fp) * ldp
            if dense:
                for a in range(bb, r):
                    v = sb[base + rel[a]]
                    g[bb, a] = v
                    g[a, bb] = v
                continue
            for a in range(bb, r):
                gcol[a] = sb[base + rel[a]]
            for o in range(s):
                ybo = yt[o, bb]
                for a in range(bb + 1, r):
                    zt[o, a] += ybo * gcol[a]
                s0 = gcol[bb] * ybo
                s1 = 0.0
                s2 = 0.0
                s3 = 0.0
                a = bb + 1
                while a + 3 < r:
                    s0 += gcol[a] * yt[o, a]
                    s1 += gcol[a + 1] * yt[o, a + 1]
                    s2 += gcol[a + 2] * yt[o, a + 2]
                    s3 += gcol[a + 3] * yt[o, a + 3]
                    a += 4
                while a < r:
                    s0 += gcol[a] * yt[o, a]
                    a += 1
                zt[o, bb] += (s0 + s1) + (s2 + s3)
        b = b1
    if dense:
        _gemm_rows(yt, g, zt)
    # L_KK⁻¹, stored by columns: linv[o, t] = (L_KK⁻¹)[t, o] (forward substitution)
    for o in range(s):
        for t in range(s):
            linv[o, t] = 0.0
        linv[o, o] = 1.0
        for u in range(o, s):
            col = o0 + u * ld
            xu = linv[o, u] / lb[col + u]
            linv[o, u] = xu
            for t in range(u + 1, s):
                linv[o, t] -= lb[col + t] * xu
    # Σ_KK = L_KK⁻ᵀ L_KK⁻¹ + Zᵀ Y (lower triangle); Σ_IK = −Z
    big = s * s * r >= _DENSE_MIN
    if big:  # W = Zᵀ Y with Y (r x s) stored by rows
        yr = yrbuf[: r * s].reshape((r, s))
        for a in range(r):
            for o in range(s):
                yr[a, o] = yt[o, a]
        w = wbuf[: s * s].reshape((s, s))
        _gemm_rows(zt, yr, w)
    for o in range(s):
        col = o0 + o * ld
        for x in range(o, s):
            v = _dot_rows(linv, x, linv, o, x, s)
            sb[col + x] = v + (w[x, o] if big else _dot_rows(zt, x, yt, o, 0, r))
        for a in range(r):
            sb[col + s + a] = -zt[o, a]


@nb.njit(cache=True)
def _selinv_workspace(starts, rptr):  # pragma: no cover - compiled
    """Work buffers of :func:`_selinv_node`, sized for the largest supernode."""
    ns = starts.size - 1
    maxr = 1
    maxs = 1
    big_r = 1
    for k in range(ns):
        s = starts[k + 1] - starts[k]
        r = rptr[k + 1] - rptr[k] - s
        maxs = max(maxs, s)
        maxr = max(maxr, r)
        if s * r * r >= _DENSE_MIN and r <= _DENSE_MAX_ROWS:
            big_r = max(big_r, r)
    return (np.empty(maxr * maxs), np.empty(maxr * maxs), np.empty(maxr), np.empty(big_r * big_r),
            np.empty(maxs * maxs), np.empty(maxr * maxs), np.empty((maxs, maxs)),
            np.empty(maxr, np.int64), big_r)


@nb.njit(cache=True)
def _takahashi_super(starts, rptr, rows, off, snode, lb):  # pragma: no cover - compiled
    """Elements of (L Lᵀ)⁻¹ on the supernodal blocks of L (same layout as ``lb``), supernodes in
    decreasing order; see :func:`_takahashi_super_groups` for the recursions. Overwrites ``lb``."""
    sb = lb  # in place: a supernode reads its own block of L before writing Σ over it
    ws = _selinv_workspace(starts, rptr)
    for k in range(starts.size - 2, -1, -1):
        _selinv_node(k, starts, rptr, rows, off, snode, lb, sb, ws)
    return sb


@nb.njit(cache=True, parallel=True)
def _takahashi_super_groups(starts, rptr, rows, off, snode, lb, top, glo, ghi, gptr):  # pragma: no cover
    """Elements of (L Lᵀ)⁻¹ on the supernodal blocks of L (same layout as ``lb``).

    For supernode K with diagonal block L_KK and rows I below it (Σ_II known from the
    supernodes above): Y = L_IK L_KK⁻¹, Σ_IK = −Σ_II Y and Σ_KK = L_KK⁻ᵀ L_KK⁻¹ + Yᵀ Σ_II Y
    (the blocked form of the Takahashi recursions). Σ_II is read column by column from the
    blocks of the ancestors (every pair of rows of I lies in the block holding the smaller
    row) and multiplied at once into all columns of Y; no dense Σ_II is formed.

    The supernodes in ``top`` (ancestors of all the others, in decreasing order) come first;
    then the groups of disjoint subtrees (supernode ranges glo[t]:ghi[t] for gptr[g] <= t <
    gptr[g + 1]) run in parallel. Every supernode does the same arithmetic whatever the
    schedule, so results do not depend on the number of threads. Overwrites ``lb`` (each supernode
    reads its own block of L before writing Σ over it, and later only blocks holding Σ).
    """
    sb = lb
    ws = _selinv_workspace(starts, rptr)
    for t in range(top.size):
        _selinv_node(top[t], starts, rptr, rows, off, snode, lb, sb, ws)
    for g in nb.prange(gptr.size - 1):
        wg = _selinv_workspace(starts, rptr)
        for t in range(gptr[g], gptr[g + 1]):
            for k in range(ghi[t] - 1, glo[t] - 1, -1):
                _selinv_node(k, starts, rptr, rows, off, snode, lb, sb, wg)
    return sb


@nb.njit(cache=True)
def _lookup_super(starts, rptr, rows, off, snode, sb, ri, ci):  # pragma: no cover - compiled
    """sb at (max(r, c), min(r, c)) for each pair; NaN when the pair is outside the blocks."""
    out = np.empty(ri.size)
    for t in range(ri.size):
        r = ri[t]
        c = ci[t]
        if r < c:
            r, c = c, r
        k = snode[c]
        o = c - starts[k]
        q = _find(rows, rptr[k] + o, rptr[k + 1], r)
        out[t] = sb[off[k] + o * (rptr[k + 1] - rptr[k]) + q - rptr[k]] if q >= 0 else np.nan
    return out


@nb.njit(cache=True)
def _positions(ap, ai, rows, cols):  # pragma: no cover - compiled
    """Index into the data of an upper-triangular CSC pattern of each (row <= col) pair; -1 if absent."""
    out = np.empty(rows.size, np.int64)
    for t in range(rows.size):
        out[t] = _find(ai, ap[cols[t]], ap[cols[t] + 1], rows[t])
    return out


@nb.njit(cache=True)
def _schur_data(data, diag_pos, pp, ea, eb, dst, c_src, c_dst, n_s):  # pragma: no cover - compiled
    """Values of S = C - B D⁻¹ Bᵀ on its upper pattern (see :class:`_DiagonalPrefix`).

    Returns (sdata, status): status -1, or the first prefix column whose pivot is not positive.
    """
    sdata = np.zeros(n_s)
    for t in range(c_src.size):
        sdata[c_dst[t]] += data[c_src[t]]
    for j in range(diag_pos.size):
        d = data[diag_pos[j]]
        if not d > 0.0:
            return sdata, j
        for t in range(pp[j], pp[j + 1]):
            sdata[dst[t]] -= data[ea[t]] * data[eb[t]] / d
    return sdata, -1


@nb.njit(cache=True)
def _prefix_pairs(bp, bi, bsrc, total):  # pragma: no cover - compiled
    """For each column j of B (CSC: rows bi, data positions bsrc), all pairs a <= b of its entries:
    data positions (ea, eb) and rows (ra <= rb)."""
    ea = np.empty(total, np.int64)
    eb = np.empty(total, np.int64)
    ra = np.empty(total, np.int64)
    rb = np.empty(total, np.int64)
    t = 0
    for j in range(bp.size - 1):
        for a in range(bp[j], bp[j + 1]):
            for b in range(a, bp[j + 1]):
                ea[t] = bsrc[a]
                eb[t] = bsrc[b]
                ra[t] = bi[a]
                rb[t] = bi[b]
                t += 1
    return ea, eb, ra, rb


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


class _CholmodFactor:
    """CHOLMOD's supernodal factorization of a fixed upper-triangular CSC pattern, in its given order.

    CHOLMOD gets the lower triangle (the transpose): dense rows such as those of the fixed
    effects then stay spread over many short columns (cvxopt builds a matrix with long
    columns in quadratic time). ``perm`` maps the upper-triangle data order to cvxopt's
    compressed-column order of the lower triangle.
    """

    def __init__(self, n: int, ap: np.ndarray, ai: np.ndarray):
        self.n = n
        cols = np.repeat(np.arange(n, dtype=np.int64), np.diff(ap))
        self.perm = np.lexsort((cols, ai))
        self.a = _cvx_spmatrix(_cvx_matrix(np.ones(ai.size)), _cvx_matrix(cols[self.perm]),
                               _cvx_matrix(ai[self.perm].astype(np.int64)), (n, n))
        # supernodal symbolic analysis, once, keeping the given elimination order
        self.f = _cholmod.symbolic(self.a, p=_cvx_matrix(np.arange(n, dtype=np.int64)), uplo="L")

    def factorize(self, data: np.ndarray) -> int:
        self.a.V = _cvx_matrix(data[self.perm])
        try:
            _cholmod.numeric(self.a, self.f)
        except ArithmeticError as err:
            return int(err.args[0]) if err.args and isinstance(err.args[0], int) else 0
        return -1

    def logdet(self) -> float:
        return float(2.0 * np.sum(np.log(np.asarray(_cholmod.diag(self.f)).ravel())))

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Solve in the factor's own (permuted) indexing; b has shape (n, m)."""
        cm = _cvx_matrix(np.asfortranarray(b))
        _cholmod.solve(self.f, cm)
        return np.asarray(cm)


class _DiagonalPrefix:
    """Factorization of [[D, Bᵀ], [B, C]] with D diagonal (the first k columns of the elimination
    order are coupled to no earlier column): D is eliminated in closed form and only the Schur
    complement S = C − B D⁻¹ Bᵀ is factorized by CHOLMOD.

    In the BYM2 latent field these are the unstructured effects v: the matrix CHOLMOD sees is
    half the size and its supernodes are not split by a hundred thousand one-column nodes.
    log det A = Σ log D_jj + log det S; solves by block elimination.
    """

    def __init__(self, n: int, k: int, ap: np.ndarray, ai: np.ndarray):
        self.n, self.k = n, k
        cols = np.repeat(np.arange(n, dtype=np.int64), np.diff(ap))
        rows = ai
        self.diag_pos = ap[1 : k + 1] - 1  # column j < k holds its diagonal only
        in_b = (rows < k) & (cols >= k)
        in_c = rows >= k
        m2 = n - k
        # B (m2 x k) with entries pointing at their data positions (+1, so that 0 means none)
        b_pos = np.flatnonzero(in_b)
        bmat = sp.csr_matrix((b_pos + 1.0, (cols[b_pos] - k, rows[b_pos])), shape=(m2, k))
        bmat.sort_indices()
        self.b_struct = bmat
        self.b_src = (bmat.data - 1).astype(np.int64)
        bt = sp.csr_matrix(bmat.T)
        bt.sort_indices()
        self.bt_struct = bt
        self.bt_src = (bt.data - 1).astype(np.int64)
        # pattern of S: C plus B Bᵀ
        c_pos = np.flatnonzero(in_c)
        cpat = sp.csc_matrix((np.ones(c_pos.size), (rows[c_pos] - k, cols[c_pos] - k)), shape=(m2, m2))
        bone = sp.csr_matrix((np.ones(b_pos.size), bmat.indices, bmat.indptr), shape=(m2, k))
        spat = sp.triu(cpat + sp.csr_matrix(bone @ bone.T), format="csc")
        spat.sort_indices()
        self.s_ap = spat.indptr.astype(np.int64)
        self.s_ai = spat.indices.astype(np.int64)
        self.c_src = c_pos.astype(np.int64)
        self.c_dst = _positions(self.s_ap, self.s_ai, rows[c_pos] - k, cols[c_pos] - k)
        # every pair (p <= q) of B entries in the same column j of D, grouped by j
        bc = sp.csc_matrix((b_pos + 1.0, (cols[b_pos] - k, rows[b_pos])), shape=(m2, k))
        bc.sort_indices()
        cnt = np.diff(bc.indptr)
        npair = cnt * (cnt + 1) // 2
        self.pp = np.concatenate([[0], np.cumsum(npair)]).astype(np.int64)
        ea, eb, ra, rb = _prefix_pairs(bc.indptr.astype(np.int64), bc.indices.astype(np.int64),
                                       (bc.data - 1).astype(np.int64), int(self.pp[-1]))
        self.ea, self.eb = ea, eb
        self.dst = _positions(self.s_ap, self.s_ai, ra, rb)
        if np.any(self.c_dst < 0) or np.any(self.dst < 0):  # pragma: no cover - internal consistency
            raise ValueError("Schur complement outside its pattern")
        self.s_factor = _CholmodFactor(m2, self.s_ap, self.s_ai)
        self.d = None

    def factorize(self, data: np.ndarray) -> int:
        sdata, status = _schur_data(data, self.diag_pos, self.pp, self.ea, self.eb, self.dst,
                                    self.c_src, self.c_dst, int(self.s_ai.size))
        if status >= 0:
            return int(status)
        self.d = data[self.diag_pos]
        self.b = sp.csr_matrix((data[self.b_src], self.b_struct.indices, self.b_struct.indptr),
                               shape=self.b_struct.shape)
        self.bt = sp.csr_matrix((data[self.bt_src], self.bt_struct.indices, self.bt_struct.indptr),
                                shape=self.bt_struct.shape)
        status = self.s_factor.factorize(sdata)
        return status if status < 0 else status + self.k

    def logdet(self) -> float:
        return float(np.sum(np.log(self.d))) + self.s_factor.logdet()

    def solve(self, b: np.ndarray) -> np.ndarray:
        k = self.k
        b1 = b[:k] / self.d[:, None]
        x2 = self.s_factor.solve(b[k:] - self.b @ b1)
        x1 = b1 - (self.bt @ x2) / self.d[:, None]
        return np.vstack([x1, x2])


class _Supernodes(NamedTuple):
    """Supernodal blocks of L for the selected inverse (see :meth:`SparseCholesky._supernodal`)."""

    starts: np.ndarray  # first (postordered) column of each supernode, then n
    rptr: np.ndarray  # row lists rows[rptr[k]:rptr[k + 1]] of the supernodes
    rows: np.ndarray
    off: np.ndarray  # first position of each block
    snode: np.ndarray  # supernode of each postordered column
    to_block: np.ndarray  # block position of each entry of the column-wise storage of L
    diag: np.ndarray  # block position of each diagonal entry (postordered)
    where: np.ndarray  # postordered position of each original index
    top: np.ndarray  # supernodes done first, in decreasing order
    glo: np.ndarray  # subtrees (supernode ranges glo:ghi) done in parallel, grouped by gptr
    ghi: np.ndarray
    gptr: np.ndarray
    label: np.ndarray  # group of each column in the given order (-1: top)


def _subtree_groups(sparent: np.ndarray, work: np.ndarray, parts: int):
    """Split a postordered forest into a top part and ``parts`` groups of disjoint subtrees of
    about equal work: the heaviest subtree is opened (its root goes to the top) until a
    largest-first assignment of the subtrees balances the groups within 5 % (or the top holds
    half of the work). Returns (top in decreasing order, range starts, range ends, group pointers).
    """
    wsub, count = _subtree_sums(sparent, work)
    total = float(work.sum())
    cands = [int(k) for k in np.flatnonzero(sparent < 0)]
    top: list[int] = []
    top_work = 0.0
    groups: list[list[int]] = [cands]
    while parts > 1 and cands:
        cands.sort(key=lambda k: (-wsub[k], k))
        bins = np.zeros(parts)
        groups = [[] for _ in range(parts)]
        for c in cands:
            g = int(np.argmin(bins))
            bins[g] += wsub[c]
            groups[g].append(c)
        if bins.max() <= 1.05 * bins.mean() or top_work >= 0.5 * total or len(top) >= 4096:
            break
        heavy = cands.pop(0)
        top.append(heavy)
        top_work += work[heavy]
        cands.extend(int(c) for c in np.flatnonzero(sparent[max(0, heavy - count[heavy] + 1):heavy]
                                                   == heavy) + max(0, heavy - count[heavy] + 1))
        groups = [cands]
    glo, ghi, gptr = [], [], [0]
    for grp in groups:
        for k in sorted(grp):
            glo.append(k - count[k] + 1)
            ghi.append(k + 1)
        gptr.append(len(glo))
    as_int = lambda v: np.asarray(v, dtype=np.int64)  # noqa: E731
    return as_int(sorted(top, reverse=True)), as_int(glo), as_int(ghi), as_int(gptr)


#: estimated multiply-adds of a selected inverse from which subtrees run in parallel (below it, waking
#: threads costs more than it saves; about 4e7 for 10,000 areas of BYM2, 8e8 for 100,000)
_PARALLEL_WORK = 2e8

#: smallest share of the columns in a diagonal prefix for which it is eliminated in closed form
_PREFIX_SHARE = 0.1


class SparseCholesky:
    """Symbolic analysis of a symmetric pattern, reusable for numeric factorizations.

    Parameters
    ----------
    pattern : sparse matrix, shape (n, n)
        Symmetric matrix whose nonzero pattern contains that of every matrix
        factorized later.
    order : ndarray of int, shape (n,)
        Elimination order (``order[k]`` is the original index eliminated k-th).
    backend : {"auto", "cholmod", "numba"}
        Kernel of the numeric factorizations and solves: CHOLMOD's supernodal
        factorization (``"auto"`` when cvxopt is importable) or the up-looking numba
        kernel. Both use the same ordering; results agree to rounding error. The
        selected inverse always comes from the column-wise factor of the numba
        kernel, computed on demand from the last factorized values.
    """

    def __init__(self, pattern, order: np.ndarray, *, backend: str = "auto"):
        if backend == "auto":
            backend = "cholmod" if _cholmod is not None else "numba"
        if backend not in ("cholmod", "numba"):  # pragma: no cover - private
            raise ValueError(f"unknown backend {backend!r}")
        if backend == "cholmod" and _cholmod is None:  # pragma: no cover - private
            raise ImportError("the cholmod backend needs cvxopt")
        self.backend = backend
        self.n = int(pattern.shape[0])
        self.order = np.asarray(order, dtype=np.int64)
        self.inverse_order = np.empty_like(self.order)
        self.inverse_order[self.order] = np.arange(self.n)
        up = self._permuted_upper(sp.csr_matrix(pattern, dtype=float), check=False)
        up.sort_indices()
        self._ap = up.indptr.astype(np.int64)
        self._ai = up.indices.astype(np.int64)
        self.n_upper = int(self._ap[-1])
        self._sym = None  # column-wise symbolic factor (numba kernels), built on first use
        self._super = None  # supernodal blocks for the selected inverse, built on first use
        self._sb = None  # last selected inverse on those blocks
        self._sx = None
        self._lx = None
        self._data = None  # last factorized values on the analysed pattern
        self._factor = None
        if backend == "cholmod":
            # columns (in elimination order) coupled to no earlier column: a leading run of them
            # is eliminated in closed form before CHOLMOD sees the matrix
            lonely = (np.diff(self._ap) == 1) & (self._ai[np.minimum(self._ap[:-1], self.n_upper - 1)]
                                                  == np.arange(self.n))
            k = int(np.argmin(lonely)) if not lonely.all() else self.n - 1
            if k >= _PREFIX_SHARE * self.n and k > 0:
                self._cm = _DiagonalPrefix(self.n, k, self._ap, self._ai)
            else:
                self._cm = _CholmodFactor(self.n, self._ap, self._ai)
        else:
            self._symbolic()

    # ------------------------------------------------ column-wise symbolic factor
    def _symbolic(self):
        if self._sym is None:
            parent = _etree(self.n, self._ap, self._ai)
            lp, li = _symbolic(self.n, self._ap, self._ai, parent)
            # row patterns of L (the numeric factorizations then skip the elimination-tree walks)
            rp, rc, rpos = _row_patterns(self.n, self._ap, self._ai, parent, lp)
            self._sym = (parent, lp, li, rp, rc, rpos)
        return self._sym

    @property
    def parent(self) -> np.ndarray:
        """Elimination tree (parent of each column in the elimination order; -1 for roots)."""
        return self._symbolic()[0]

    @property
    def lp(self) -> np.ndarray:
        """Column pointers of L (column-wise storage)."""
        return self._symbolic()[1]

    @property
    def li(self) -> np.ndarray:
        """Row indices of L (sorted, diagonal first in each column)."""
        return self._symbolic()[2]

    @property
    def lx(self) -> np.ndarray | None:
        """Values of L in the column-wise storage of :attr:`lp`, :attr:`li` (None before a factorization)."""
        if self._lx is None and self._data is not None:
            _, lp, li, rp, rc, rpos = self._symbolic()
            lx = np.zeros(int(lp[-1]))
            _numeric_rows(self.n, self._ap, self._ai, self._data, lp, li, rp, rc, rpos, lx)
            self._lx = lx
        return self._lx

    @lx.setter
    def lx(self, value):
        self._lx = value

    @property
    def nnz(self) -> int:
        """Nonzeros of the factor L (column-wise, without the padding of supernodes)."""
        return int(self.lp[-1])

    def _permuted_upper(self, a, check=True):
        p = self.order
        b = sp.csr_matrix(a)[p][:, p]
        return sp.triu(b, format="csc")

    def factorize(self, a) -> int:
        """Numeric factorization of ``a`` (same or smaller pattern than the analysed one); -1 on success."""
        up = self._permuted_upper(a)
        up.sort_indices()
        ap = up.indptr.astype(np.int64)
        ai = up.indices.astype(np.int64)
        if np.array_equal(ap, self._ap) and np.array_equal(ai, self._ai):
            data = up.data.astype(np.float64)
        else:
            # a smaller pattern than the analysed one: scatter into it (explicit zeros elsewhere)
            cols = np.repeat(np.arange(self.n, dtype=np.int64), np.diff(ap))
            pos = _positions(self._ap, self._ai, ai, cols)
            if np.any(pos < 0):  # pragma: no cover - internal consistency
                raise ValueError("matrix outside the analysed sparsity pattern")
            data = np.zeros(self.n_upper)
            data[pos] = up.data
        return self.factorize_data(data)

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
        """Numeric factorization from values on the analysed pattern (order of :meth:`positions`).

        Returns -1 on success, otherwise a column (>= 0) at which the matrix was found not
        positive definite.
        """
        data = np.ascontiguousarray(data, dtype=np.float64)
        self._data = data
        self._lx = None
        self._sb = None
        self._sx = None
        if self.backend == "numba":
            _, lp, li, rp, rc, rpos = self._symbolic()
            lx = np.zeros(int(lp[-1]))
            status = _numeric_rows(self.n, self._ap, self._ai, data, lp, li, rp, rc, rpos, lx)
            self._lx = lx
            self._factor = lx
            return int(status)
        self._factor = None
        status = self._cm.factorize(data)
        if status >= 0:
            self._data = None
            return int(status)
        self._factor = self._cm
        return -1

    def logdet(self) -> float:
        """log det of the factorized matrix."""
        if self.backend == "numba":
            return float(2.0 * np.sum(np.log(self.lx[self.lp[:-1]])))
        return self._cm.logdet()

    def solve(self, b: np.ndarray) -> np.ndarray:
        """Solve A x = b for a vector or a matrix of right-hand sides."""
        b = np.asarray(b, dtype=float)
        vec = b.ndim == 1
        bb = (b[:, None] if vec else b)[self.order]
        if self.backend == "numba":
            bb = np.ascontiguousarray(bb)
            _solve_inplace(self.n, self.lp, self.li, self.lx, bb)
        else:
            bb = self._cm.solve(bb)
        out = np.empty_like(bb)
        out[self.order] = bb
        return out[:, 0] if vec else out

    # ------------------------------------------------ selected inverse
    def _supernodal(self) -> _Supernodes:
        """Relaxed supernodes of L in a postorder of the elimination tree (once per pattern).

        A postorder is an equivalent reordering (same fill, same factor up to the symmetric
        permutation), so the column-wise factor is copied into the dense blocks as it is.
        """
        if self._super is None:
            parent, lp, li = self._symbolic()[:3]
            n = self.n
            post = _postorder(parent)
            ipost = np.empty(n, np.int64)
            ipost[post] = np.arange(n)
            plp, pli, src = _permuted_factor_pattern(lp, li, post, ipost)
            ppar = np.where(parent[post] >= 0, ipost[np.maximum(parent[post], 0)], -1).astype(np.int64)
            starts = _relaxed_supernodes(plp, pli, ppar)
            rptr, rows, off, snode, pos = _supernode_layout(plp, pli, starts)
            to_block = np.empty(int(lp[-1]), np.int64)
            to_block[src] = pos
            d = np.arange(n, dtype=np.int64)
            diag = off[snode[d]] + (d - starts[snode[d]]) * (rptr[snode[d] + 1] - rptr[snode[d]] + 1)
            # tree of supernodes and the split into a sequential top and parallel groups
            last = starts[1:] - 1
            sparent = np.where(ppar[last] >= 0, snode[np.maximum(ppar[last], 0)], -1).astype(np.int64)
            s = np.diff(starts).astype(float)
            r = (np.diff(rptr) - np.diff(starts)).astype(float)
            work = s * r * r + s * s * r + s ** 3 / 3.0 + r * r + 8.0
            parts = max(1, nb.get_num_threads()) if work.sum() >= _PARALLEL_WORK else 1
            top, glo, ghi, gptr = _subtree_groups(sparent, work, parts)
            sgroup = np.full(starts.size - 1, -1, np.int64)
            for g in range(gptr.size - 1):
                for t in range(gptr[g], gptr[g + 1]):
                    sgroup[glo[t]:ghi[t]] = g
            self._super = _Supernodes(starts, rptr, rows, off, snode, to_block, diag,
                                      ipost[self.inverse_order], top, glo, ghi, gptr, sgroup[snode[ipost]])
        return self._super

    def selected_inverse(self) -> np.ndarray:
        """Elements of A⁻¹ on the pattern of L (permuted layout of :attr:`lp`, :attr:`li`; use
        :meth:`inverse_at` and :meth:`inverse_diagonal` for original indexing)."""
        b = self._supernodal()
        split = b.gptr.size > 2  # parallel groups of subtrees (large factors only)
        if self._lx is None and split:  # the column-wise factor of the last values
            _, lp, li, rp, rc, rpos = self._symbolic()
            lx = np.zeros(int(lp[-1]))
            _numeric_rows_groups(self.n, self._ap, self._ai, self._data, lp, li, rp, rc, rpos, lx,
                                 b.label, b.gptr.size - 1)
            self._lx = lx
        lb = np.zeros(int(b.off[-1]))
        _scatter(lb, b.to_block, self.lx)
        if split:
            self._sb = _takahashi_super_groups(b.starts, b.rptr, b.rows, b.off, b.snode, lb, b.top, b.glo,
                                               b.ghi, b.gptr)
        else:
            self._sb = _takahashi_super(b.starts, b.rptr, b.rows, b.off, b.snode, lb)
        self._sx = None
        return self.sx

    @property
    def sx(self) -> np.ndarray | None:
        """Last selected inverse on the pattern of L (layout of :attr:`lp`, :attr:`li`), or None."""
        if self._sx is None and self._sb is not None:
            self._sx = _gather(self._sb, self._supernodal().to_block)
        return self._sx

    def inverse_at(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Elements (A⁻¹)[rows, cols] in original indexing; must lie in the pattern of L + Lᵀ
        (NaN outside the supernodal blocks of L, a superset of that pattern)."""
        b = self._supernodal()
        r = b.where[np.asarray(rows, dtype=np.int64)]
        c = b.where[np.asarray(cols, dtype=np.int64)]
        return _lookup_super(b.starts, b.rptr, b.rows, b.off, b.snode, self._sb, r, c)

    def inverse_diagonal(self) -> np.ndarray:
        """Diagonal of A⁻¹ in original indexing."""
        b = self._supernodal()
        return self._sb[b.diag[b.where]]
