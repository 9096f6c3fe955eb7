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


@nb.njit(parallel=True, cache=True)
def block_counts(draws, t_group, t_local, t_pos, g_c, g_off, g_m, v, centre, threshold,
                 count, dup):  # pragma: no cover - compiled
    """Extreme-sum counts for one block of permutations.

    ``draws`` (P, n_slots): raw indices into the n - 1 other areas; tested area t of
    group g (``t_group[t]``, position ``t_local[t]`` in the group, original index
    ``t_pos[t]``) owns the slots ``g_off[g] + a * g_m[g] + t_local[t]``, a < g_c[g].
    For every permutation r: if the g_c[g] indices are not all distinct, set
    ``dup[r, t]`` (the caller redraws them); otherwise add 1 to ``count[t_pos[t]]`` when
    |sum of v over the shifted indices - centre| >= threshold. The sum runs over the
    slots in order a = 0, 1, ... (the same floating-point order as the numpy path).
    Groups with g_c = 0 are skipped (handled by the caller).
    """
    n_perm = draws.shape[0]
    n_tested = t_pos.size
    for t in nb.prange(n_tested):
        g = t_group[t]
        c = g_c[g]
        if c == 0:
            continue
        i = t_pos[t]
        base = g_off[g] + t_local[t]
        m = g_m[g]
        ce = centre[i]
        th = threshold[i]
        hits = 0
        buf = np.empty(c if c > _PAIRWISE_MAX else 0, draws.dtype)
        for r in range(n_perm):
            repeated = False
            if c > _PAIRWISE_MAX:  # many neighbours: sort a copy instead of comparing all pairs
                for a in range(c):
                    buf[a] = draws[r, base + a * m]
                buf.sort()
                for a in range(1, c):
                    if buf[a] == buf[a - 1]:
                        repeated = True
                        break
            else:
                for a in range(1, c):
                    da = draws[r, base + a * m]
                    for b in range(a):
                        if draws[r, base + b * m] == da:
                            repeated = True
                            break
                    if repeated:
                        break
            if repeated:
                dup[r, t] = True
                continue
            d = draws[r, base]
            s = v[d + (d >= i)]
            for a in range(1, c):
                d = draws[r, base + a * m]
                s += v[d + (d >= i)]
            if abs(s - ce) >= th:
                hits += 1
        count[i] += hits
