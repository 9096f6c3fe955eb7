"""Compiled kernels of the conditional-permutation tests (private helpers of autocorrelation.py).

The random indices are still drawn by numpy generators (one stream per permutation,
see ``autocorrelation._permutation_streams``), so results for a given seed are those of
the pure-numpy path; only the work on the drawn indices runs here: shifting the
indices past the focal area, detecting repeated indices (draws to be redrawn),
summing the neighbours' values and counting extreme sums, in parallel over areas.
"""

from __future__ import annotations

import numba as nb
import numpy as np

__all__: list[str] = []

#: neighbour counts up to which repeated indices are found by comparing all pairs
_PAIRWISE_MAX = 24
#: areas per parallel work item of :func:`block_counts`
CHUNK = 2048


@nb.njit(parallel=True, cache=True)
def block_counts(draws, chunks, g_c, g_off, g_m, g_start, t_pos, v, centre, threshold,
                 count, dup):  # pragma: no cover - compiled
    """Extreme-sum counts for one block of permutations.

    ``draws`` (P, n_slots): raw indices into the n - 1 other areas. Group g has g_m[g] tested
    areas (original indices ``t_pos[g_start[g]:g_start[g] + g_m[g]]``) with g_c[g] neighbours each;
    slot a of its area j is ``g_off[g] + a * g_m[g] + j``. ``chunks`` (K, 3) lists (g, j0, j1)
    ranges of areas, processed in parallel. For every permutation r and area: if its g_c indices
    are not all distinct, set ``dup[r, g_start[g] + j]`` (the caller redraws them); otherwise
    add 1 to ``count[t_pos[...]]`` when |sum of v over the shifted indices - centre| >= threshold.
    The sum runs over the slots in order a = 0, 1, ... (the floating-point order of the numpy
    path). Slots are read in runs of consecutive areas (cache-friendly). Groups with g_c = 0
    are skipped (handled by the caller).
    """
    n_perm = draws.shape[0]
    for k in nb.prange(chunks.shape[0]):
        g = chunks[k, 0]
        j0 = chunks[k, 1]
        j1 = chunks[k, 2]
        c = g_c[g]
        if c == 0:
            continue
        m = g_m[g]
        off = g_off[g]
        t0 = g_start[g]
        w = j1 - j0
        s = np.empty(w)
        bad = np.empty(w, np.uint8)
        hits = np.zeros(w, np.int64)
        buf = np.empty(c, draws.dtype)
        focal = t_pos[t0 + j0 : t0 + j1].astype(draws.dtype)
        for r in range(n_perm):
            row = draws[r]
            first = row[off + j0 : off + j1]
            for j in range(w):
                d = first[j]
                s[j] = v[d + (d >= focal[j])]
                bad[j] = 0
            for a in range(1, c):
                cur = row[off + a * m + j0 : off + a * m + j1]
                for j in range(w):
                    d = cur[j]
                    s[j] += v[d + (d >= focal[j])]
            if c <= _PAIRWISE_MAX:
                for a in range(1, c):
                    cur = row[off + a * m + j0 : off + a * m + j1]
                    for b in range(a):
                        other = row[off + b * m + j0 : off + b * m + j1]
                        for j in range(w):
                            bad[j] |= cur[j] == other[j]
            else:  # many neighbours: sort a copy instead of comparing all pairs
                for j in range(w):
                    for a in range(c):
                        buf[a] = row[off + a * m + j0 + j]
                    buf.sort()
                    for a in range(1, c):
                        if buf[a] == buf[a - 1]:
                            bad[j] = 1
                            break
            for j in range(w):
                i = focal[j]
                if bad[j]:
                    dup[r, t0 + j0 + j] = True
                elif abs(s[j] - centre[i]) >= threshold[i]:
                    hits[j] += 1
        for j in range(w):
            count[t_pos[t0 + j0 + j]] += hits[j]


def chunk_table(g_m, width):
    """(g, j0, j1) ranges of at most ``width`` consecutive areas of each group."""
    rows = []
    for g, m in enumerate(g_m):
        for j0 in range(0, int(m), width):
            rows.append((g, j0, min(int(m), j0 + width)))
    return np.array(rows, dtype=np.int64).reshape(-1, 3)
