"""Compiled kernels of the scan statistic (see :mod:`areamap.scan`).

Candidate zones are stored as *prefix lists*: for each centre ``i`` the
districts ``members[offsets[i]:offsets[i + 1]]`` in the order they join the
zone (nearest first). Every prefix ending at a position with ``valid == True``
is a candidate zone, so one running sum per centre gives the counts of all its
zones. Counts of several replicates are summed side by side
(``counts[district, height, replicate]``) so each pass over the zone lists
serves a whole block of replicates.

The Poisson log likelihood ratio, with expected counts scaled to the total
``C`` (so ``E = C``), is

    LLR = c log(c / e) + (C - c) log((C - c) / (C - e))

and is evaluated as ``xlogx[c] - c log e + xlogx[C - c] - (C - c) log(C - e)``
with ``xlogx[k] = k log k`` tabulated once, so the inner loop computes no
logarithm of a count.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from numba import njit

_TIE = 1e-12  # relative tolerance for equal distances from a centre (common practice)


def xlogx_table(total: int) -> np.ndarray:
    """``k log k`` for k = 0..total (0 log 0 = 0)."""
    k = np.arange(total + 1, dtype=np.float64)
    out = np.zeros(total + 1)
    out[1:] = k[1:] * np.log(k[1:])
    return out


# ----------------------------------------------------------------- zone lists
@njit(cache=True)
def _cut_rows(order, dist, pop, cap, full_row):
    """Lengths and tie-aware validity of each centre's distance-sorted list, cut at the population cap."""
    m, k = order.shape
    length = np.zeros(m, dtype=np.int64)
    valid = np.zeros((m, k), dtype=np.bool_)
    for r in range(m):
        acc = 0.0
        n_in = 0
        for j in range(k):
            acc += pop[order[r, j]]
            if acc > cap:
                break
            n_in += 1
        length[r] = n_in
        for j in range(n_in):
            if j + 1 < k:
                d0 = dist[r, j]
                d1 = dist[r, j + 1]
                valid[r, j] = d1 - d0 > _TIE * max(d1, 1.0)
            else:
                valid[r, j] = full_row
    return length, valid


@njit(cache=True, nogil=True)
def _nearest_rows(coords, first, kmax, order, dist):
    """The ``kmax`` nearest points of centres first.. (one row each), nearest first, the centre itself first."""
    n = coords.shape[0]
    d = np.empty(n)
    for r in range(order.shape[0]):
        c = first + r
        for j in range(n):
            dx = coords[j, 0] - coords[c, 0]
            dy = coords[j, 1] - coords[c, 1]
            d[j] = dx * dx + dy * dy
        d[c] = -1.0  # the centre leads even when another point shares its location
        if kmax < n:
            thr = np.partition(d, kmax - 1)[kmax - 1]
            cand = np.flatnonzero(d <= thr)
        else:
            cand = np.arange(n)
        srt = cand[np.argsort(d[cand], kind="mergesort")][:kmax]
        for j in range(kmax):
            order[r, j] = srt[j]
            dist[r, j] = math.sqrt(max(d[srt[j]], 0.0))


def _threads() -> int:
    return max(1, min(4, os.cpu_count() or 1))


def _in_threads(work, n: int, k: int) -> None:
    """Run ``work(j, first, last)`` over [0, n) split into ``k`` slices, one thread each (the compiled
    work releases the GIL)."""
    cuts = [(n * j) // k for j in range(k + 1)]
    if k == 1:
        work(0, 0, n)
        return
    with ThreadPoolExecutor(max_workers=k) as pool:
        for f in [pool.submit(work, j, cuts[j], cuts[j + 1]) for j in range(k)]:
            f.result()


def _nearest_sorted(coords, first, last, kmax):
    order = np.empty((last - first, kmax), dtype=np.int64)
    dist = np.empty((last - first, kmax))

    def work(j, a, b):
        _nearest_rows(coords, first + a, kmax, order[a:b], dist[a:b])

    _in_threads(work, last - first, min(_threads(), max(last - first, 1)))
    return order, dist


def circle_lists(coords: np.ndarray, pop: np.ndarray, cap: float):
    """Prefix lists of circular zones around each point, up to ``cap`` population.

    Returns ``members`` (int32), ``offsets`` (int64, n + 1) and ``valid`` (bool).
    A prefix is valid only when the next district is strictly farther away, so
    districts at the same distance enter a zone together (a circle cannot
    split them).
    """
    coords = np.ascontiguousarray(coords, dtype=np.float64)
    pop = np.ascontiguousarray(pop, dtype=np.float64)
    n = len(coords)
    srt = np.cumsum(np.sort(pop))
    kmax = int(min(n, np.searchsorted(srt, cap, side="right") + 1))
    chunk = max(1, int(4_000_000 // kmax))
    lengths = np.zeros(n, dtype=np.int64)
    parts_m, parts_v = [], []
    for a in range(0, n, chunk):
        b = min(n, a + chunk)
        order, dist = _nearest_sorted(coords, a, b, kmax)
        ln, vd = _cut_rows(order, dist, pop, cap, kmax == n)
        lengths[a:b] = ln
        keep = np.arange(kmax)[None, :] < ln[:, None]
        parts_m.append(order[keep].astype(np.int32))
        parts_v.append(vd[keep])
    offsets = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    members = np.concatenate(parts_m) if parts_m else np.zeros(0, np.int32)
    valid = np.concatenate(parts_v) if parts_v else np.zeros(0, np.bool_)
    return members, offsets, valid


@njit(cache=True, inline="always")
def _swap(hd, hn, i, j):
    hd[i], hd[j] = hd[j], hd[i]
    hn[i], hn[j] = hn[j], hn[i]


@njit(cache=True)
def _grow_one(c, coords, pop, cap, indptr, indices, stamp, out, write):
    """Grow a connected zone from centre ``c``: repeatedly add the nearest district adjacent to it.

    ``stamp`` marks districts already queued for this centre; a binary heap
    keyed on distance to the centre holds the frontier. Returns the length.
    """
    n = len(pop)
    hd = np.empty(n)
    hn = np.empty(n, dtype=np.int64)
    size = 0
    hd[0] = 0.0
    hn[0] = c
    size = 1
    stamp[c] = c
    acc = 0.0
    length = 0
    while size > 0:
        node = hn[0]
        # pop the heap root
        size -= 1
        hd[0] = hd[size]
        hn[0] = hn[size]
        i = 0
        while True:
            lft = 2 * i + 1
            if lft >= size:
                break
            s = lft
            if lft + 1 < size and hd[lft + 1] < hd[lft]:
                s = lft + 1
            if hd[s] >= hd[i]:
                break
            _swap(hd, hn, i, s)
            i = s
        acc += pop[node]
        if acc > cap:
            break
        if write:
            out[length] = node
        length += 1
        for p in range(indptr[node], indptr[node + 1]):
            nb = indices[p]
            if stamp[nb] == c:
                continue
            stamp[nb] = c
            dx = coords[nb, 0] - coords[c, 0]
            dy = coords[nb, 1] - coords[c, 1]
            # push
            j = size
            hd[j] = dx * dx + dy * dy
            hn[j] = nb
            size += 1
            while j > 0:
                par = (j - 1) // 2
                if hd[j] >= hd[par]:
                    break
                _swap(hd, hn, j, par)
                j = par
    return length


@njit(cache=True)
def _graph_lists_nb(coords, pop, cap, indptr, indices):
    n = len(pop)
    stamp = np.full(n, -1, dtype=np.int64)
    dummy = np.empty(0, dtype=np.int32)
    lengths = np.zeros(n, dtype=np.int64)
    for c in range(n):
        lengths[c] = _grow_one(c, coords, pop, cap, indptr, indices, stamp, dummy, False)
    offsets = np.zeros(n + 1, dtype=np.int64)
    for c in range(n):
        offsets[c + 1] = offsets[c] + lengths[c]
    members = np.empty(offsets[n], dtype=np.int32)
    stamp[:] = -1
    for c in range(n):
        _grow_one(c, coords, pop, cap, indptr, indices, stamp, members[offsets[c]:offsets[c + 1]], True)
    return members, offsets


def graph_lists(coords, pop, cap, indptr, indices):
    """Prefix lists of connected zones grown through the neighbour graph (every prefix is a zone)."""
    members, offsets = _graph_lists_nb(
        np.ascontiguousarray(coords, dtype=np.float64), np.ascontiguousarray(pop, dtype=np.float64),
        float(cap), np.asarray(indptr, dtype=np.int64), np.asarray(indices, dtype=np.int64))
    return members, offsets, np.ones(len(members), dtype=np.bool_)


# ----------------------------------------------------------------- statistics
@njit(cache=True, inline="always")
def _llr(c, e, total, xl, direction):
    # 0 unless the zone departs in the scanned direction (Kulldorff's indicator)
    if direction > 0 and c <= e:
        return 0.0
    if direction < 0 and c >= e:
        return 0.0
    rest = total - e
    if e <= 0.0 or rest <= 0.0:
        return 0.0
    return xl[c] - c * np.log(e) + xl[total - c] - (total - c) * np.log(rest)


@njit(cache=True)
def best_zones(members, offsets, valid, counts, expected, total, xl, direction, taken, llr_out):
    """Best zone per centre among zones that avoid ``taken`` districts.

    ``counts[district, height]`` are observed counts inside the cylinder of
    that height (height 1 for a purely spatial scan); ``expected`` likewise.
    Returns the best LLR, its prefix length and height index per centre. When
    ``llr_out`` has one row per list position it receives every candidate's
    LLR (``nan`` where the prefix is not a zone or is cut by ``taken``).
    """
    n = len(offsets) - 1
    nh = counts.shape[1]
    best = np.zeros(n)
    best_len = np.zeros(n, dtype=np.int64)
    best_h = np.zeros(n, dtype=np.int64)
    acc = np.zeros(nh, dtype=np.int64)
    eacc = np.zeros(nh)
    record = llr_out.shape[0] == len(members)
    for i in range(n):
        acc[:] = 0
        eacc[:] = 0.0
        for pos in range(offsets[i], offsets[i + 1]):
            m = members[pos]
            if taken[m]:
                break
            for h in range(nh):
                acc[h] += counts[m, h]
                eacc[h] += expected[m, h]
            if not valid[pos]:
                continue
            for h in range(nh):
                v = _llr(acc[h], eacc[h], total, xl, direction)
                if record:
                    llr_out[pos, h] = v
                if v > best[i]:
                    best[i] = v
                    best_len[i] = pos - offsets[i] + 1
                    best_h[i] = h
    return best, best_len, best_h


@njit(cache=True, nogil=True)
def _maxima_range(members, offsets, valid, counts, expected, total, xl, direction, nh, nb, first, last, out):
    """Replicate maxima over the zones of centres [first, last) (updates ``out`` in place).

    ``counts[district, h * nb + b]``: count of replicate ``b`` in the cylinder of height ``h``, so one
    contiguous row per district is added for all heights and replicates at once.

    Scanning for high risk, a zone can only raise ``out[b]`` when its count reaches ``need``, the
    smallest integer c with LLR(c, e) > t, where t = min_b out[b]. LLR(c, e) falls as e grows
    (for c > e) and t only rises, so ``need`` never falls along a centre's list: a zone whose largest
    count over the block is below the previous ``need`` is skipped without any logarithm.
    """
    width = nh * nb
    acc = np.zeros(width, dtype=np.int32)
    amax = np.zeros(nh, dtype=np.int32)
    need = np.zeros(nh, dtype=np.int64)
    eacc = np.zeros(nh)
    t = out.min()
    for i in range(first, last):
        acc[:] = 0
        eacc[:] = 0.0
        need[:] = 0
        for pos in range(offsets[i], offsets[i + 1]):
            m = members[pos]
            row = counts[m]
            for q in range(width):
                acc[q] += row[q]
            for h in range(nh):
                eacc[h] += expected[m, h]
            if not valid[pos]:
                continue
            if direction > 0:
                skip = True
                for h in range(nh):
                    top = np.int32(0)
                    base = h * nb
                    for b in range(nb):
                        top = max(top, acc[base + b])
                    amax[h] = top
                    if top >= need[h]:
                        skip = False
                if skip:
                    continue
            for h in range(nh):
                e = eacc[h]
                rest = total - e
                if e <= 0.0 or rest <= 0.0:
                    continue
                base = h * nb
                if direction > 0:
                    if amax[h] < need[h]:
                        continue
                    le = np.log(e)
                    lr = np.log(rest)
                    c = max(need[h], int(np.floor(e)) + 1)
                    while c <= total and xl[c] - c * le + xl[total - c] - (total - c) * lr <= t:
                        c += 1
                    need[h] = c
                    if amax[h] < c:
                        continue
                    changed = False
                    for b in range(nb):
                        c = acc[base + b]
                        if c >= need[h]:
                            v = xl[c] - c * le + xl[total - c] - (total - c) * lr
                            if v > out[b]:
                                out[b] = v
                                changed = True
                    if changed:
                        t = out.min()
                else:
                    le = np.log(e)
                    lr = np.log(rest)
                    for b in range(nb):
                        c = acc[base + b]
                        if c == e or (direction < 0 and c > e):
                            continue
                        v = xl[c] - c * le + xl[total - c] - (total - c) * lr
                        if v > out[b]:
                            out[b] = v


def replicate_maxima(members, offsets, valid, counts, expected, total, xl, direction):
    """Largest LLR over all zones for each replicate: ``counts[district, height, replicate]``.

    Centres are split into slices run in threads; the maximum does not depend on the split, so
    results are the same on any number of threads.
    """
    n = len(offsets) - 1
    k = min(_threads(), max(n, 1))
    nh, nb = counts.shape[1], counts.shape[2]
    flat = np.ascontiguousarray(counts, dtype=np.int32).reshape(counts.shape[0], nh * nb)
    outs = np.zeros((k, nb))

    def work(j, a, b):
        _maxima_range(members, offsets, valid, flat, expected, total, xl, direction, nh, nb, a, b, outs[j])

    _in_threads(work, n, k)
    return outs.max(axis=0)
