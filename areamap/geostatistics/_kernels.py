"""Compiled kernels: average point covariances between areas, and between points and areas.

One pass over the point pairs with no temporaries (the numpy version built four arrays of
pairs x P x P values); only the real points of each area are visited, not the padding.
"""

from __future__ import annotations

import numba as nb
import numpy as np

MODEL_CODES = {"exponential": 0, "spherical": 1, "gaussian": 2}


@nb.njit(cache=True, inline="always")
def _cov(h, code, c0, c1, a):
    if h == 0.0:
        return c0 + c1
    u = h / a
    if code == 0:
        return c1 * np.exp(-3.0 * u)
    if code == 2:
        return c1 * np.exp(-3.0 * u * u)
    if u >= 1.0:
        return 0.0
    return c1 * (1.0 - 1.5 * u + 0.5 * u * u * u)


@nb.njit(cache=True)
def area_pair_covariance(X, W, counts, a, b, code, c0, c1, rng):  # pragma: no cover - compiled
    """sum_p sum_q w_p w_q C(|u_p - u_q|) for each pair (a[k], b[k])."""
    out = np.empty(a.size)
    for k in range(a.size):
        i = a[k]
        j = b[k]
        s = 0.0
        for p in range(counts[i]):
            xp = X[i, p, 0]
            yp = X[i, p, 1]
            t = 0.0
            for q in range(counts[j]):
                dx = xp - X[j, q, 0]
                dy = yp - X[j, q, 1]
                t += W[j, q] * _cov(np.sqrt(dx * dx + dy * dy), code, c0, c1, rng)
            s += W[i, p] * t
        out[k] = s
    return out


@nb.njit(cache=True)
def point_area_covariance(px, py, nbs, X, W, counts, code, c0, c1, rng):  # pragma: no cover - compiled
    """sum_q w_q C(|u - u_q|) for each point u = (px[b], py[b]) and each area nbs[b, k]."""
    nb_, k1 = nbs.shape
    out = np.empty((nb_, k1))
    for b in range(nb_):
        for k in range(k1):
            j = nbs[b, k]
            t = 0.0
            for q in range(counts[j]):
                dx = px[b] - X[j, q, 0]
                dy = py[b] - X[j, q, 1]
                t += W[j, q] * _cov(np.sqrt(dx * dx + dy * dy), code, c0, c1, rng)
            out[b, k] = t
    return out
