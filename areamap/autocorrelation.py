"""Spatial autocorrelation: global Moran's I and Geary's C, local clusters.

Global statistics say whether similar values sit next to each other more
often than chance over the whole map; local statistics point at the areas
where that happens (clusters of high values, clusters of low values and
outliers). Both come with analytic inference and permutation inference.

All functions take a variable aligned with an :class:`~areamap.graphs.AreaGraph`
(a numpy array in the graph's order, or a pandas Series indexed by the graph's
ids in any order) and never print.

Cautions
--------
* Autocorrelation of area rates is a statement about areas, not people
  (ecological fallacy): a cluster of high rates does not mean that individuals
  living there are at higher risk, nor that a common cause exists.
* Rates from small populations are noisy and produce spurious "outliers";
  use :func:`rate_morans_i` / :func:`rate_local_clusters`, which work on
  empirical-Bayes standardized rates, rather than raw rates.
* A local cluster label is a screening signal. With many areas, some labels
  are false discoveries even after the multiple-testing adjustment.
"""

from __future__ import annotations

import html
import math
import os
import queue
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy import stats

from ._params import check_choice, check_interval, check_positive_int
from ._permute import pcg64_state, permutation_counts, set_pcg64_state
from .errors import GraphError, InputError, ParameterError, format_examples
from .graphs import AreaGraph

__all__ = [
    "GlobalAutocorrelation",
    "LocalClusterResult",
    "morans_i",
    "gearys_c",
    "eb_standardized_rates",
    "rate_morans_i",
    "moran_scatter",
    "local_clusters",
    "rate_local_clusters",
    "adjust_pvalues",
    "CLUSTER_LABELS",
]

#: The labels of the ``cluster`` column of :meth:`LocalClusterResult.to_frame`.
CLUSTER_LABELS: tuple[str, ...] = (
    "High-High",
    "Low-Low",
    "High-Low",
    "Low-High",
    "not significant",
    "no neighbours",
)

_STATISTICS = ("local_moran", "gi_star")
_ADJUST = ("fdr", "bonferroni", "none")
_WEIGHTS = ("row", "binary")
# Working memory (bytes) for one block of permutations; the block size is
# derived from it so that peak memory does not grow with the number of
# permutations. About 16 bytes are needed per drawn neighbour slot.
_BLOCK_BYTES = 64 * 2**20
# Relative tolerance when comparing a permuted statistic with the observed
# one: sums of the same numbers in another order can differ by a few ulps, and
# such ties must count as "at least as extreme".
_TIE_RTOL = 1e-9


# --------------------------------------------------------------------- inputs
def _as_values(values, graph: AreaGraph, func: str, name: str = "values") -> np.ndarray:
    """Float array aligned with ``graph.ids``; checks length, ids and finiteness."""
    if not isinstance(graph, AreaGraph):
        raise ParameterError(
            f"The 'graph' parameter of {func} must be an AreaGraph. Got {type(graph).__name__} instead."
        )
    if isinstance(values, pd.DataFrame):
        raise InputError(
            f"'{name}' given to {func} is a table with {values.shape[1]} columns; "
            "pass one column (a Series) or a 1-D array."
        )
    if isinstance(values, pd.Series):
        index = values.index
        if not index.is_unique:
            dup = index[index.duplicated()].unique()
            raise InputError(
                f"'{name}' given to {func} has repeated area ids ({format_examples(dup)}). "
                "Each area must appear once."
            )
        if not index.equals(graph.ids):
            missing = graph.ids.difference(index)
            extra = index.difference(graph.ids)
            if len(missing) or len(extra):
                parts = []
                if len(missing):
                    parts.append(f"{len(missing)} graph id(s) have no value ({format_examples(missing)})")
                if len(extra):
                    parts.append(f"{len(extra)} id(s) are not in the graph ({format_examples(extra)})")
                raise GraphError(
                    f"'{name}' given to {func} and the graph cover different areas: "
                    + "; ".join(parts)
                    + ". Build the graph from the same boundaries as the data."
                )
            values = values.reindex(graph.ids)
        arr = values.to_numpy()
    else:
        arr = np.asarray(values)
    try:
        arr = np.asarray(arr, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"'{name}' given to {func} must be numbers.") from None
    if arr.ndim != 1:
        raise InputError(f"'{name}' given to {func} must be one-dimensional; got shape {arr.shape}.")
    if arr.size != graph.n:
        raise GraphError(
            f"'{name}' given to {func} has {arr.size} values but the graph has {graph.n} areas. "
            "Pass one value per graph area, in the order of graph.ids (or a Series indexed by area id)."
        )
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InputError(
            f"'{name}' given to {func} has {int(bad.sum())} missing or infinite value(s) "
            f"(areas {format_examples(graph.ids[bad])}). Fill or drop these areas first."
        )
    return arr


def _check_graph_size(graph: AreaGraph, func: str) -> None:
    if graph.n < 4:
        raise InputError(
            f"{func} needs at least 4 areas; the graph has {graph.n}. "
            "Spatial autocorrelation cannot be assessed on so few areas."
        )
    if graph.adjacency.nnz == 0:
        raise GraphError(
            f"The graph given to {func} has no links (every area is an island), so there is "
            "no neighbour to compare with. Use a different graph method or link islands."
        )


def _centred(x: np.ndarray, func: str, name: str = "values") -> np.ndarray:
    z = x - x.mean()
    scale = max(float(np.max(np.abs(x))), 1e-300)
    if float(np.max(np.abs(z))) <= 1e-12 * scale:
        raise InputError(
            f"'{name}' given to {func} is constant ({x[0]:g} in every area); spatial "
            "autocorrelation is undefined for a variable that does not vary."
        )
    return z


def _check_seed(seed, func: str):
    if seed is None:
        return None
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ParameterError(
            f"The 'seed' parameter of {func} must be an integer >= 0 or None. Got {seed!r} instead."
        )
    return int(seed)


def _permutation_streams(seed, start: int, stop: int) -> list[np.random.Generator]:
    """One independent generator per permutation index in [start, stop).

    Permutation ``r`` always uses the stream spawned from ``(seed, r)``, so
    results do not depend on how permutations are grouped into blocks.
    """
    ss = np.random.SeedSequence(seed)
    return [
        np.random.Generator(np.random.PCG64(np.random.SeedSequence(ss.entropy, spawn_key=(r,))))
        for r in range(start, stop)
    ]


def _resolve_seed(seed):
    # None -> fresh entropy, fixed once per call so every block uses the same root.
    return np.random.SeedSequence().entropy if seed is None else seed


# ------------------------------------------------------------ global results
@dataclass(frozen=True)
class GlobalAutocorrelation:
    """Result of a global autocorrelation test (Moran's I or Geary's C).

    Attributes
    ----------
    statistic : float
        Observed Moran's I or Geary's C.
    expected : float
        Expected value under no spatial autocorrelation (-1/(n-1) for I, 1 for C).
    variance_normal, z_normal, p_normal : float
        Variance, z-score and two-sided p-value assuming the values are
        independent draws from a normal distribution.
    variance_randomization, z_randomization, p_randomization : float
        The same under randomization (all arrangements of the observed values
        over the areas equally likely); uses the sample kurtosis.
    permutations : int
        Number of random permutations (0: no permutation test).
    p_permutation : float
        Two-sided (folded) pseudo p-value ``(M + 1) / (R + 1)`` where ``M`` counts
        permutations whose distance from ``expected`` is at least the observed
        distance. NaN when ``permutations == 0``.
    permutation_mean, permutation_sd : float
        Mean and standard deviation of the permuted statistics.
    method : str
        "Moran's I" or "Geary's C".
    n_areas, n_islands : int
        Areas used (islands included, see Notes of :func:`morans_i`) and how many
        of them have no neighbours.
    weights : str
        "row" or "binary".
    """

    statistic: float
    expected: float
    variance_normal: float
    z_normal: float
    p_normal: float
    variance_randomization: float
    z_randomization: float
    p_randomization: float
    permutations: int
    p_permutation: float
    permutation_mean: float
    permutation_sd: float
    method: str = "Moran's I"
    n_areas: int = 0
    n_islands: int = 0
    weights: str = "row"

    def to_frame(self) -> pd.DataFrame:
        """Table with one row per kind of inference (normal, randomization, permutation)."""
        return pd.DataFrame(
            {
                "statistic": [self.statistic] * 3,
                "expected": [self.expected] * 3,
                "variance": [self.variance_normal, self.variance_randomization, self.permutation_sd**2],
                "z_score": [
                    self.z_normal,
                    self.z_randomization,
                    (self.statistic - self.permutation_mean) / self.permutation_sd
                    if self.permutations and self.permutation_sd > 0
                    else math.nan,
                ],
                "p_value": [self.p_normal, self.p_randomization, self.p_permutation],
            },
            index=pd.Index(["normality", "randomization", "permutation"], name="inference"),
        )

    def summary(self) -> str:
        """Readable text (the library never prints; the caller decides)."""
        lines = [
            f"{self.method} = {self.statistic:.4f} (expected {self.expected:.4f} without autocorrelation), "
            f"{self.n_areas} areas ({self.n_islands} without neighbours), {self.weights} weights",
            f"  normality:     z = {self.z_normal:.3f}, two-sided p = {self.p_normal:.4g}",
            f"  randomization: z = {self.z_randomization:.3f}, two-sided p = {self.p_randomization:.4g}",
        ]
        if self.permutations:
            lines.append(
                f"  permutation:   two-sided pseudo p = {self.p_permutation:.4g} from "
                f"{self.permutations} permutations (mean {self.permutation_mean:.4f}, "
                f"sd {self.permutation_sd:.4f}; smallest possible p = {1 / (self.permutations + 1):.4g})"
            )
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return f"<p><b>{html.escape(self.method)}</b></p>" + self.to_frame().to_html(float_format="%.4g")


def _weight_sums(w: sp.csr_array) -> tuple[float, float, float, np.ndarray]:
    """S0, S1, S2 of Cliff & Ord (1981) and the vector w_i. + w_.i."""
    s0 = float(w.sum())
    ws = w + w.T
    s1 = 0.5 * float((ws.multiply(ws)).sum())
    rc = np.asarray(w.sum(axis=1)).ravel() + np.asarray(w.sum(axis=0)).ravel()
    s2 = float(np.sum(rc**2))
    return s0, s1, s2, rc


def _two_sided(z: float) -> float:
    return float(2.0 * stats.norm.sf(abs(z))) if np.isfinite(z) else math.nan


def _global_permutation(
    z: np.ndarray, kernel, observed: float, centre: float, permutations: int, seed, block_size
) -> tuple[float, float, float]:
    """Permutation p-value (folded around ``centre``), mean and sd of ``kernel(Z)``.

    ``kernel`` maps a (P, n) array of permuted values to P statistics.
    """
    n = z.size
    if permutations == 0:
        return math.nan, math.nan, math.nan
    root = _resolve_seed(seed)
    if block_size is None:
        block_size = max(1, min(permutations, _BLOCK_BYTES // (24 * n)))
    tol = _TIE_RTOL * (1.0 + abs(centre) + abs(observed))
    dev_obs = abs(observed - centre)
    count = 0
    total = 0.0
    total_sq = 0.0
    for start in range(0, permutations, block_size):
        stop = min(permutations, start + block_size)
        gens = _permutation_streams(root, start, stop)
        zp = np.stack([z[g.permutation(n)] for g in gens])
        vals = kernel(zp)
        count += int(np.count_nonzero(np.abs(vals - centre) >= dev_obs - tol))
        total += float(vals.sum())
        total_sq += float(np.sum((vals - centre) ** 2))
    mean = total / permutations
    var = max(total_sq / permutations - (mean - centre) ** 2, 0.0)
    sd = math.sqrt(var * permutations / (permutations - 1)) if permutations > 1 else math.nan
    return (count + 1) / (permutations + 1), mean, sd


def _global_common(values, graph, func, weights, permutations, seed, block_size):
    x = _as_values(values, graph, func)
    _check_graph_size(graph, func)
    check_choice(weights, "weights", func, _WEIGHTS)
    permutations = check_positive_int(permutations, "permutations", func, minimum=0)
    if block_size is not None:
        block_size = check_positive_int(block_size, "block_size", func)
    seed = _check_seed(seed, func)
    z = _centred(x, func)
    w = graph.weights(weights)
    return x, z, w, permutations, seed, block_size


def morans_i(
    values,
    graph: AreaGraph,
    *,
    weights: str = "row",
    permutations: int = 999,
    seed: int | None = 0,
    block_size: int | None = None,
) -> GlobalAutocorrelation:
    r"""Global Moran's I with normal, randomization and permutation inference.

    Parameters
    ----------
    values : array-like or pandas.Series, shape (n,)
        The variable, aligned with ``graph.ids`` (a Series is reordered by its index).
    graph : AreaGraph
        Neighbour graph.
    weights : {"row", "binary"}, default="row"
        Row-standardised weights (each area's neighbours share a total weight
        of one) or binary weights (1 for each neighbour).
    permutations : int, default=999
        Random permutations for the pseudo p-value; 0 skips the permutation test.
    seed : int or None, default=0
        Seed of the permutations; the same seed gives the same result. None
        draws fresh entropy (not reproducible).
    block_size : int or None, default=None
        Permutations evaluated together; chosen from a memory budget when None.
        It does not change the result.

    Returns
    -------
    GlobalAutocorrelation

    Notes
    -----
    With :math:`z_i = x_i - \bar x` and weights :math:`w_{ij}`,

    .. math:: I = \frac{n}{S_0} \frac{\sum_i\sum_j w_{ij} z_i z_j}{\sum_i z_i^2},
       \quad S_0 = \sum_{ij} w_{ij}.

    Moments (Cliff & Ord 1981), with :math:`S_1 = \tfrac12\sum_{ij}(w_{ij}+w_{ji})^2`,
    :math:`S_2 = \sum_i (w_{i\cdot} + w_{\cdot i})^2` and sample kurtosis
    :math:`b_2 = n\sum z_i^4 / (\sum z_i^2)^2`:

    .. math::
       E[I] = -\frac{1}{n-1}, \qquad
       \mathrm{Var}_N[I] = \frac{n^2 S_1 - n S_2 + 3 S_0^2}{(n^2-1) S_0^2} - E[I]^2,

       E_R[I^2] = \frac{n[(n^2-3n+3)S_1 - nS_2 + 3S_0^2]
                  - b_2[(n^2-n)S_1 - 2nS_2 + 6S_0^2]}{(n-1)(n-2)(n-3)S_0^2}.

    The permutation p-value is two-sided ("folded"): with R permutations and M
    of them at least as far from :math:`E[I]` as the observed I,
    :math:`p = (M+1)/(R+1)`. Permutation ``r`` uses a random stream derived
    from ``(seed, r)``.

    Islands (areas without neighbours) keep their value in the mean, in
    :math:`\sum z_i^2` and in ``n``, and have an all-zero row of weights; this is
    the usual convention for zero rows. It keeps the randomization moments
    exact for the permutation test, which shuffles all n values. With
    row-standardised weights, :math:`S_0` is the number of areas with neighbours.

    References
    ----------
    Moran, P. A. P. (1950). Notes on continuous stochastic phenomena. Biometrika 37, 17-23.
    Cliff, A. D. & Ord, J. K. (1981). Spatial Processes: Models and Applications. Pion, London.

    Examples
    --------
    >>> g = AreaGraph.from_edges(list("ABCDEF"), [("A", "B"), ("B", "C"), ("C", "D"),
    ...                                            ("D", "E"), ("E", "F")])
    >>> res = morans_i([1, 2, 3, 4, 5, 6], g, permutations=99)
    >>> round(res.statistic, 4), round(res.expected, 4)
    (0.7143, -0.2)
    """
    func = "morans_i"
    x, z, w, permutations, seed, block_size = _global_common(
        values, graph, func, weights, permutations, seed, block_size
    )
    n = x.size
    s0, s1, s2, _ = _weight_sums(w)
    m2sum = float(z @ z)
    observed = n / s0 * float(z @ (w @ z)) / m2sum
    expected = -1.0 / (n - 1)
    var_n = (n * n * s1 - n * s2 + 3 * s0 * s0) / ((n * n - 1) * s0 * s0) - expected**2
    b2 = n * float(np.sum(z**4)) / m2sum**2
    e_i2 = (
        n * ((n * n - 3 * n + 3) * s1 - n * s2 + 3 * s0 * s0)
        - b2 * ((n * n - n) * s1 - 2 * n * s2 + 6 * s0 * s0)
    ) / ((n - 1) * (n - 2) * (n - 3) * s0 * s0)
    var_r = e_i2 - expected**2

    wt = sp.csr_array(w.T)

    def kernel(zp: np.ndarray) -> np.ndarray:
        lag = (wt @ zp.T).T  # row r: (W z_r) since (W z)^T = z^T W^T
        return n / s0 * np.einsum("ij,ij->i", zp, lag) / m2sum

    perm = _global_permutation(z, kernel, observed, expected, permutations, seed, block_size)
    return _global_result("Moran's I", observed, expected, var_n, var_r, perm, permutations, graph, weights)


def gearys_c(
    values,
    graph: AreaGraph,
    *,
    weights: str = "row",
    permutations: int = 999,
    seed: int | None = 0,
    block_size: int | None = None,
) -> GlobalAutocorrelation:
    r"""Global Geary's C with normal, randomization and permutation inference.

    Parameters are those of :func:`morans_i`.

    Returns
    -------
    GlobalAutocorrelation
        ``expected`` is 1. Values below 1 mean neighbours are alike (positive
        autocorrelation), above 1 that they differ.

    Notes
    -----
    .. math:: C = \frac{(n-1)\sum_{ij} w_{ij}(x_i - x_j)^2}{2 S_0 \sum_i (x_i-\bar x)^2}

    Moments (Cliff & Ord 1981), with :math:`S_0, S_1, S_2, b_2` as in :func:`morans_i`:

    .. math::
       E[C] = 1,\qquad
       \mathrm{Var}_N[C] = \frac{(2S_1 + S_2)(n-1) - 4S_0^2}{2(n+1)S_0^2},

       \mathrm{Var}_R[C] = \frac{(n-1)S_1[n^2-3n+3-(n-1)b_2]
           - \tfrac14(n-1)S_2[n^2+3n-6-(n^2-n+2)b_2]
           + S_0^2[n^2-3-(n-1)^2 b_2]}{n(n-2)(n-3)S_0^2}.

    Permutation p-values are folded around 1, as for :func:`morans_i`; islands
    are handled as there.

    References
    ----------
    Geary, R. C. (1954). The contiguity ratio and statistical mapping. The
    Incorporated Statistician 5, 115-145.
    Cliff, A. D. & Ord, J. K. (1981). Spatial Processes: Models and Applications. Pion, London.

    Examples
    --------
    >>> g = AreaGraph.from_edges(list("ABCDEF"), [("A", "B"), ("B", "C"), ("C", "D"),
    ...                                            ("D", "E"), ("E", "F")])
    >>> res = gearys_c([1, 2, 3, 4, 5, 6], g, weights="binary", permutations=0)
    >>> round(res.statistic, 4), res.expected
    (0.1429, 1.0)
    """
    func = "gearys_c"
    x, z, w, permutations, seed, block_size = _global_common(
        values, graph, func, weights, permutations, seed, block_size
    )
    n = x.size
    s0, s1, s2, rc = _weight_sums(w)
    m2sum = float(z @ z)
    wt = sp.csr_array(w.T)

    def numerator(zp: np.ndarray) -> np.ndarray:
        # sum_ij w_ij (z_i - z_j)^2 = sum_i z_i^2 (w_i. + w_.i) - 2 z'Wz
        lag = (wt @ zp.T).T
        return (zp**2) @ rc - 2.0 * np.einsum("ij,ij->i", zp, lag)

    scale = (n - 1) / (2.0 * s0 * m2sum)
    observed = scale * float(numerator(z[None, :])[0])
    expected = 1.0
    var_n = ((2 * s1 + s2) * (n - 1) - 4 * s0 * s0) / (2 * (n + 1) * s0 * s0)
    b2 = n * float(np.sum(z**4)) / m2sum**2
    var_r = (
        (n - 1) * s1 * (n * n - 3 * n + 3 - (n - 1) * b2)
        - 0.25 * (n - 1) * s2 * (n * n + 3 * n - 6 - (n * n - n + 2) * b2)
        + s0 * s0 * (n * n - 3 - (n - 1) ** 2 * b2)
    ) / (n * (n - 2) * (n - 3) * s0 * s0)
    perm = _global_permutation(
        z, lambda zp: scale * numerator(zp), observed, expected, permutations, seed, block_size
    )
    return _global_result("Geary's C", observed, expected, var_n, var_r, perm, permutations, graph, weights)


def _global_result(method, observed, expected, var_n, var_r, perm, permutations, graph, weights):
    """Assemble a GlobalAutocorrelation from the statistic, its two analytic variances and the permutation test."""
    z_n = (observed - expected) / math.sqrt(var_n) if var_n > 0 else math.nan
    z_r = (observed - expected) / math.sqrt(var_r) if var_r > 0 else math.nan
    p_perm, mean, sd = perm
    return GlobalAutocorrelation(
        statistic=observed,
        expected=expected,
        variance_normal=var_n,
        z_normal=z_n,
        p_normal=_two_sided(z_n),
        variance_randomization=var_r,
        z_randomization=z_r,
        p_randomization=_two_sided(z_r),
        permutations=permutations,
        p_permutation=p_perm,
        permutation_mean=mean,
        permutation_sd=sd,
        method=method,
        n_areas=graph.n,
        n_islands=int(graph.island_mask().sum()),
        weights=weights,
    )


# ---------------------------------------------------------------------- rates
def _rate_inputs(cases, population, graph, func):
    y = _as_values(cases, graph, func, "cases")
    p = _as_values(population, graph, func, "population")
    return y, p


def _eb_core(y: np.ndarray, pop: np.ndarray, func: str, ids=None) -> np.ndarray:
    lab = ids if ids is not None else np.arange(y.size)
    neg = y < 0
    if neg.any():
        raise InputError(
            f"'cases' given to {func} has {int(neg.sum())} negative value(s) (areas "
            f"{format_examples(lab[neg])}). Counts must be >= 0."
        )
    bad = pop <= 0
    if bad.any():
        raise InputError(
            f"'population' given to {func} has {int(bad.sum())} value(s) <= 0 (areas "
            f"{format_examples(lab[bad])}). Every area needs a positive population; drop "
            "unpopulated areas or merge them with a neighbour."
        )
    total_y = float(y.sum())
    total_p = float(pop.sum())
    if total_y <= 0:
        raise InputError(
            f"'cases' given to {func} are zero in every area; rates are all zero, so there "
            "is nothing to standardize."
        )
    r = y / pop
    b = total_y / total_p
    s2 = float(np.sum(pop * (r - b) ** 2)) / total_p
    a = s2 - b / (total_p / y.size)
    v = a + b / pop
    v = np.where(v > 0, v, b / pop)
    return (r - b) / np.sqrt(v)


def eb_standardized_rates(cases, population) -> np.ndarray | pd.Series:
    r"""Empirical-Bayes standardized rates of Assunção & Reis (1999).

    Parameters
    ----------
    cases : array-like or pandas.Series, shape (n,)
        Case counts (>= 0).
    population : array-like or pandas.Series, shape (n,)
        Population at risk (> 0), aligned with ``cases``.

    Returns
    -------
    numpy.ndarray or pandas.Series
        :math:`z_i`; a Series with the index of ``cases`` when ``cases`` is a Series.

    Notes
    -----
    With rates :math:`r_i = y_i/n_i`, :math:`b = \sum y_i / \sum n_i`,
    :math:`s^2 = \sum n_i (r_i - b)^2 / \sum n_i` and
    :math:`a = s^2 - b / (\sum n_i / N)` (method-of-moments estimates of the mean
    and between-area variance of the underlying risks),

    .. math:: v_i = a + b / n_i, \qquad z_i = (r_i - b) / \sqrt{v_i}.

    When :math:`v_i \le 0` (negative estimate of the between-area variance and a
    large population) :math:`v_i = b / n_i` is used, i.e. Poisson variance only.
    The standardization removes most of the extra variance of rates from small
    populations, so that Moran's I is not dominated by them.

    References
    ----------
    Assunção, R. M. & Reis, E. A. (1999). A new proposal to adjust Moran's I for
    population density. Statistics in Medicine 18, 2147-2162.

    Examples
    --------
    >>> z = eb_standardized_rates([1, 4, 10], [1000, 1000, 2000])
    >>> [round(float(v), 3) for v in z]
    [-1.444, 0.131, 0.945]
    """
    func = "eb_standardized_rates"
    index = cases.index if isinstance(cases, pd.Series) else None
    y = np.asarray(cases, dtype=np.float64)
    if isinstance(population, pd.Series) and index is not None:
        missing = index.difference(population.index)
        if len(missing) or len(population) != len(index):
            raise InputError(
                f"'population' given to {func} does not cover the same areas as 'cases' "
                f"({format_examples(missing) or 'different lengths'}). Align them first."
            )
        pop = population.reindex(index).to_numpy(dtype=np.float64)
    else:
        pop = np.asarray(population, dtype=np.float64)
    if y.ndim != 1 or pop.shape != y.shape:
        raise InputError(
            f"'cases' and 'population' given to {func} must be 1-D of the same length; "
            f"got shapes {y.shape} and {pop.shape}."
        )
    if not (np.isfinite(y).all() and np.isfinite(pop).all()):
        raise InputError(f"'cases' or 'population' given to {func} has missing or infinite values.")
    z = _eb_core(y, pop, func, index)
    return pd.Series(z, index=index, name="eb_standardized_rate") if index is not None else z


def rate_morans_i(
    cases,
    population,
    graph: AreaGraph,
    *,
    weights: str = "row",
    permutations: int = 999,
    seed: int | None = 0,
    block_size: int | None = None,
) -> GlobalAutocorrelation:
    """Moran's I of empirical-Bayes standardized rates (Assunção & Reis 1999).

    The default global statistic for rates: :func:`morans_i` applied to
    :func:`eb_standardized_rates`. Prefer its permutation p-value: the analytic
    moments assume exchangeable values, which standardized rates only
    approximately are.

    Parameters
    ----------
    cases, population : array-like or pandas.Series, shape (n,)
        Counts and populations aligned with ``graph`` (Series are reordered by id).
    graph : AreaGraph
    weights, permutations, seed, block_size
        As in :func:`morans_i`.

    Returns
    -------
    GlobalAutocorrelation

    References
    ----------
    Assunção, R. M. & Reis, E. A. (1999). Statistics in Medicine 18, 2147-2162.

    Examples
    --------
    >>> g = AreaGraph.from_edges(list("ABCDEF"), [("A", "B"), ("B", "C"), ("C", "D"),
    ...                                            ("D", "E"), ("E", "F")])
    >>> res = rate_morans_i([1, 2, 2, 6, 8, 9], [900, 1000, 1100, 1000, 950, 1000], g,
    ...                     permutations=0)
    >>> res.statistic > 0
    True
    """
    func = "rate_morans_i"
    y, p = _rate_inputs(cases, population, graph, func)
    z = _eb_core(y, p, func, graph.ids)
    return morans_i(
        z, graph, weights=weights, permutations=permutations, seed=seed, block_size=block_size
    )


def moran_scatter(values, graph: AreaGraph) -> pd.DataFrame:
    r"""Data of the Moran scatterplot: standardized value against its spatial lag.

    Parameters
    ----------
    values : array-like or pandas.Series, shape (n,)
    graph : AreaGraph

    Returns
    -------
    pandas.DataFrame
        Index ``graph.ids``; columns ``standardized_value`` (:math:`(x_i-\bar x)/s`
        with the population standard deviation), ``spatial_lag`` (mean of the
        neighbours' standardized values, row-standardised weights; NaN for
        islands so they are not drawn at zero) and ``neighbours``.

    Notes
    -----
    Without islands, the least-squares slope of ``spatial_lag`` on
    ``standardized_value`` is Moran's I with row-standardised weights.

    References
    ----------
    Anselin, L. (1996). The Moran scatterplot as an exploratory spatial data analysis tool to assess local
    instability in spatial association. In Fischer, Scholten & Unwin (eds.),
    Spatial Analytical Perspectives on GIS. Taylor & Francis, London.

    Examples
    --------
    >>> g = AreaGraph.from_edges(list("ABCD"), [("A", "B"), ("B", "C"), ("C", "D")])
    >>> moran_scatter([1.0, 2.0, 3.0, 4.0], g)["spatial_lag"].round(3).tolist()
    [-0.447, -0.447, 0.447, 0.447]
    """
    func = "moran_scatter"
    x = _as_values(values, graph, func)
    z = _centred(x, func)
    z = z / math.sqrt(float(z @ z) / z.size)
    lag = graph.weights("row") @ z
    k = graph.neighbour_counts()
    lag = np.where(k > 0, lag, np.nan)
    out = pd.DataFrame(
        {"standardized_value": z, "spatial_lag": lag, "neighbours": k}, index=graph.ids
    )
    return out


# ----------------------------------------------------- multiple-testing control
def adjust_pvalues(p, method: str = "fdr") -> np.ndarray:
    r"""Adjust p-values for multiple testing; NaN entries are ignored.

    Parameters
    ----------
    p : array-like, shape (m,)
        P-values in [0, 1]; NaN for untested areas (e.g. islands). NaNs are not
        counted in the number of tests and stay NaN.
    method : {"fdr", "bonferroni", "none"}, default="fdr"
        ``"fdr"``: Benjamini–Hochberg step-up adjusted p-values (control the false
        discovery rate); ``"bonferroni"``: ``min(m p, 1)`` (controls the chance of
        any false label); ``"none"``: unchanged.

    Returns
    -------
    numpy.ndarray

    Notes
    -----
    Benjamini–Hochberg: with the m tested p-values sorted,
    :math:`p_{(1)} \le \dots \le p_{(m)}`,

    .. math:: \tilde p_{(i)} = \min_{j \ge i} \min\{1, m\, p_{(j)} / j\},

    which is monotone in :math:`p`; rejecting :math:`\tilde p \le \alpha` is the
    step-up procedure at level :math:`\alpha`.

    References
    ----------
    Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a
    practical and powerful approach to multiple testing. JRSS B 57, 289-300.

    Examples
    --------
    >>> adjust_pvalues([0.01, 0.04, float("nan"), 0.03], "fdr").round(3).tolist()
    [0.03, 0.04, nan, 0.04]
    >>> adjust_pvalues([0.01, 0.04, float("nan"), 0.03], "bonferroni").round(3).tolist()
    [0.03, 0.12, nan, 0.09]
    """
    check_choice(method, "method", "adjust_pvalues", _ADJUST)
    arr = np.array(p, dtype=np.float64, copy=True).ravel()
    ok = ~np.isnan(arr)
    vals = arr[ok]
    if ((vals < 0) | (vals > 1)).any():
        raise ParameterError(
            "The 'p' parameter of adjust_pvalues must hold values in [0, 1] (or NaN). "
            f"Got {format_examples(vals[(vals < 0) | (vals > 1)])} instead."
        )
    m = vals.size
    if m == 0 or method == "none":
        return arr
    if method == "bonferroni":
        arr[ok] = np.minimum(vals * m, 1.0)
        return arr
    order = np.argsort(vals, kind="stable")
    ranked = vals[order] * m / np.arange(1, m + 1)
    ranked = np.minimum.accumulate(ranked[::-1])[::-1]
    adj = np.empty(m)
    adj[order] = np.minimum(ranked, 1.0)
    arr[ok] = adj
    return arr


# ---------------------------------------------------------- local statistics
@dataclass(frozen=True, eq=False)
class LocalClusterResult:
    """Local cluster statistics for each area.

    Attributes
    ----------
    ids : pandas.Index
        Area ids (the graph's order).
    method : str
        "local_moran" or "gi_star".
    statistic : ndarray, shape (n,)
        Local Moran's I_i or Gi*; NaN for islands (and for Gi* of a variable
        with negative values, where the ratio is undefined).
    z_score : ndarray, shape (n,)
        Analytic z-score: for Gi* the Ord & Getis (1995) z; for local Moran the
        z-score under conditional randomization (see :func:`local_clusters`).
    p_value, p_adjusted : ndarray, shape (n,)
        Two-sided conditional-permutation pseudo p-value and its
        multiple-testing adjustment (NaN for islands).
    significant : ndarray of bool, shape (n,)
        ``p_adjusted <= alpha``.
    cluster : ndarray of str, shape (n,)
        One of :data:`CLUSTER_LABELS`.
    standardized_value, spatial_lag : ndarray, shape (n,)
        The area's standardized value and the mean of its neighbours'.
    neighbours : ndarray of int, shape (n,)
    adjust : str
    alpha : float
    permutations : int
    seed : int or None
    """

    ids: pd.Index
    method: str
    statistic: np.ndarray
    z_score: np.ndarray
    p_value: np.ndarray
    p_adjusted: np.ndarray
    significant: np.ndarray
    cluster: np.ndarray
    standardized_value: np.ndarray
    spatial_lag: np.ndarray
    neighbours: np.ndarray
    adjust: str = "fdr"
    alpha: float = 0.05
    permutations: int = 999
    seed: int | None = 0
    notes: tuple[str, ...] = field(default=())

    def to_frame(self) -> pd.DataFrame:
        """Per-area table indexed by area id.

        Columns: statistic, z_score, p_value, p_adjusted, significant, cluster,
        standardized_value, spatial_lag, neighbours.
        """
        return pd.DataFrame(
            {
                "statistic": self.statistic,
                "z_score": self.z_score,
                "p_value": self.p_value,
                "p_adjusted": self.p_adjusted,
                "significant": self.significant,
                "cluster": pd.Categorical(self.cluster, categories=list(CLUSTER_LABELS)),
                "standardized_value": self.standardized_value,
                "spatial_lag": self.spatial_lag,
                "neighbours": self.neighbours,
            },
            index=self.ids,
        )

    def counts(self) -> pd.Series:
        """Number of areas per cluster label (all labels, zeros included)."""
        return (
            pd.Series(self.cluster)
            .value_counts()
            .reindex(list(CLUSTER_LABELS), fill_value=0)
            .rename("areas")
        )

    def summary(self) -> str:
        """Readable counts per label and the settings used."""
        name = {"local_moran": "Local Moran's I", "gi_star": "Getis-Ord Gi*"}[self.method]
        adj = {"fdr": "false discovery rate (Benjamini-Hochberg)", "bonferroni": "Bonferroni",
               "none": "no multiple-testing adjustment"}[self.adjust]
        lines = [
            f"{name}: {len(self.ids)} areas, {self.permutations} conditional permutations, "
            f"{adj} at {self.alpha:g}",
        ]
        for label, cnt in self.counts().items():
            lines.append(f"  {label:<16} {cnt}")
        if self.method == "gi_star":
            lines.append("  (Gi*: High-High = hot spot, Low-Low = cold spot)")
        lines.extend(f"  note: {n}" for n in self.notes)
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return (
            "<pre>" + html.escape(self.summary()) + "</pre>"
            + self.to_frame().head(20).to_html(float_format="%.4g")
        )


def _neighbour_sum_pvalues(
    v: np.ndarray,
    graph: AreaGraph,
    permutations: int,
    seed,
    block_size: int | None,
) -> np.ndarray:
    """Two-sided conditional-permutation p-values of the neighbour sums of ``v``.

    For area i with k_i neighbours, each permutation replaces the neighbours'
    values by k_i values drawn without replacement from the other n - 1 areas
    (i's own value stays). The statistic is the neighbour sum S_i; it is folded
    around its exact conditional mean k_i (sum(v) - v_i)/(n - 1). Islands get NaN.
    """
    n = v.size
    k = graph.neighbour_counts()
    adj = graph.adjacency
    observed = adj @ v
    centre = k * (v.sum() - v) / (n - 1)
    dev_obs = np.abs(observed - centre)
    tol = _TIE_RTOL * np.maximum(k, 1) * float(np.max(np.abs(v)))
    threshold = dev_obs - tol

    # Slot layout: areas grouped by neighbour count (ascending); a group with
    # count c and m areas occupies c*m consecutive slots laid out as (c, m).
    tested = np.flatnonzero(k > 0)
    order = tested[np.argsort(k[tested], kind="stable")]
    ks = k[order]
    bounds = np.flatnonzero(np.diff(ks)) + 1
    groups = []
    offset = 0
    for chunk in np.split(np.arange(order.size), bounds):
        if chunk.size == 0:
            continue
        pos = order[chunk]
        c = int(ks[chunk[0]])
        groups.append((c, pos, offset))
        offset += c * pos.size
    if n >= 2**31 - 1:  # pragma: no cover - far beyond any graph that fits in memory
        raise InputError(f"local permutation tests support fewer than 2**31 - 1 areas; the graph has {n}.")

    # Groups with many neighbours relative to n are sampled by Floyd's algorithm instead of
    # rejection (in numpy, below); the compiled kernel draws and discards their main slots.
    floyd = [np.prod(1.0 - np.arange(c) / (n - 1)) < 0.5 for c, _, _ in groups]
    g_c = np.array([c for c, _, _ in groups], dtype=np.int64)
    g_m = np.array([pos.size for _, pos, _ in groups], dtype=np.int64)
    g_skip = np.array(floyd, dtype=np.bool_)
    g_start = np.concatenate([[0], np.cumsum(g_m)]).astype(np.int64)
    focal = order.astype(np.uint32)
    floyd_slots = sum(c * pos.size for (c, pos, _), f in zip(groups, floyd) if f)
    if block_size is None:
        # per permutation of a block: the Floyd groups' indices (rejected areas are few)
        block_size = max(1, min(permutations, _BLOCK_BYTES // (16 * floyd_slots + 64)))
    root = _resolve_seed(seed)
    workers = max(1, min(len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else
                         (os.cpu_count() or 1), permutations))
    # one set of work space per worker thread (each with its own counts, summed at the end)
    spaces: queue.SimpleQueue = queue.SimpleQueue()
    all_counts = []
    for _ in range(workers):
        cnt = np.zeros(n, dtype=np.int64)
        all_counts.append(cnt)
        spaces.put((cnt, np.empty(int((g_c * g_m).max(initial=0)), np.uint32),
                    np.empty(order.size, np.int64)))
    count = np.zeros(n, dtype=np.int64)

    def run(gen):
        # the permutation's main draws and counts, compiled (the GIL is released inside)
        state = pcg64_state(gen.bit_generator)
        space = spaces.get()
        try:
            cnt, buf, dup = space
            n_dup = permutation_counts(state, n, g_c, g_m, g_skip, focal, v, centre, threshold,
                                       cnt, buf, dup)
            rejected = dup[:n_dup].copy()
        finally:
            spaces.put(space)
        set_pcg64_state(gen.bit_generator, state)
        return rejected

    with ThreadPoolExecutor(max_workers=workers) as pool:
        for start in range(0, permutations, block_size):
            stop = min(permutations, start + block_size)
            gens = _permutation_streams(root, start, stop)
            P = stop - start
            rejected = list(pool.map(run, gens))
            # (permutation, tested position) of every rejected area: sorted by permutation,
            # then by position (the order in which the redraws consume each stream)
            rej_r = np.repeat(np.arange(P), [a.size for a in rejected])
            rej_t = np.concatenate(rejected)
            for gi, (c, pos, _) in enumerate(groups):
                if floyd[gi]:
                    view = np.empty((P, c, pos.size), dtype=np.int32)
                    _floyd_draws(view, pos, gens, n)
                    sums = v.take(view[:, 0, :])
                    for j in range(1, c):
                        sums += v.take(view[:, j, :])
                    extreme = np.abs(sums - centre[pos]) >= threshold[pos]
                    count[pos] += np.count_nonzero(extreme, axis=0)
                    continue
                in_group = (rej_t >= g_start[gi]) & (rej_t < g_start[gi + 1])
                rs, cols = rej_r[in_group], rej_t[in_group] - g_start[gi]
                if rs.size:
                    idx = _redraw_duplicates(rs, cols, c, pos, gens, n)
                    sums = v.take(idx[0])
                    for j in range(1, c):
                        sums += v.take(idx[j])
                    extreme = np.abs(sums - centre[pos[cols]]) >= threshold[pos[cols]]
                    np.add.at(count, pos[cols], extreme.astype(np.int64))
    for cnt in all_counts:
        count += cnt
    p = (count + 1.0) / (permutations + 1.0)
    p[k == 0] = np.nan
    return p


def _duplicate_mask(view: np.ndarray) -> np.ndarray:
    """(P, m) mask of draws with a repeated index among the c slots (axis 1)."""
    P, c, m = view.shape
    dup = np.zeros((P, m), dtype=bool)
    if c < 2:
        return dup
    if c <= 16:
        for a in range(1, c):
            for b in range(a):
                dup |= view[:, a, :] == view[:, b, :]
        return dup
    s = np.sort(view, axis=1)
    return (s[:, 1:, :] == s[:, :-1, :]).any(axis=1)


def _redraw_duplicates(rs: np.ndarray, cols: np.ndarray, c: int, pos: np.ndarray, gens,
                       n: int) -> np.ndarray:
    """Exact sampling without replacement: redraw every (permutation, area) whose
    c indices were not all distinct, from that permutation's own stream, until
    they are (rejection sampling; accepted draws are uniform c-subsets).

    ``rs``, ``cols``: permutation (within the block, sorted) and area (within the group)
    of each rejected draw. Returns the accepted indices (c, rs.size), shifted past the
    focal areas ``pos[cols]``. The stream of permutation r is consumed in an order that
    depends only on permutation r's own draws, so results do not depend on the block size.
    """
    out = np.empty((c, rs.size), dtype=np.int64)
    todo = np.arange(rs.size)
    while todo.size:
        r_todo = rs[todo]
        new = np.empty((c, todo.size), dtype=np.int64)
        starts = np.flatnonzero(np.r_[True, r_todo[1:] != r_todo[:-1]])
        ends = np.r_[starts[1:], todo.size]
        for a, b in zip(starts, ends):
            new[:, a:b] = gens[r_todo[a]].integers(0, n - 1, size=(c, b - a), dtype=np.int32
                                                   if n < 2**31 - 1 else np.int64)
        new += new >= pos[cols[todo]]
        bad = _duplicate_mask(new[None])[0]
        out[:, todo[~bad]] = new[:, ~bad]
        todo = todo[bad]
    return out


def _floyd_draws(view: np.ndarray, pos: np.ndarray, gens, n: int) -> None:
    """Exact sampling without replacement by Floyd's algorithm, for groups whose
    neighbour count is large relative to n (where rejection rarely succeeds).

    For j = N-c, ..., N-1 (N = n - 1): draw t uniform on 0..j; keep t unless it
    was already chosen, in which case keep j. Every c-subset is equally likely
    (Bentley & Floyd 1987). Indices are then shifted past the focal area.
    """
    P, c, m = view.shape
    N = n - 1
    for r in range(P):
        chosen = np.empty((c, m), dtype=view.dtype)
        for step, j in enumerate(range(N - c, N)):
            t = gens[r].integers(0, j + 1, size=m, dtype=view.dtype)
            taken = (chosen[:step] == t).any(axis=0) if step else np.zeros(m, dtype=bool)
            chosen[step] = np.where(taken, j, t)
        chosen += chosen >= pos
        view[r] = chosen


def _labels(high: np.ndarray, lag_high: np.ndarray, significant: np.ndarray, island: np.ndarray) -> np.ndarray:
    lab = np.full(high.size, "not significant", dtype=object)
    lab[significant & high & lag_high] = "High-High"
    lab[significant & ~high & ~lag_high] = "Low-Low"
    lab[significant & high & ~lag_high] = "High-Low"
    lab[significant & ~high & lag_high] = "Low-High"
    lab[island] = "no neighbours"
    return lab


def _local_core(
    x: np.ndarray,
    graph: AreaGraph,
    func: str,
    statistic: str,
    weights: str,
    permutations: int,
    seed,
    adjust: str,
    alpha: float,
    block_size,
    name: str = "values",
) -> LocalClusterResult:
    check_choice(statistic, "statistic", func, _STATISTICS)
    check_choice(weights, "weights", func, _WEIGHTS)
    check_choice(adjust, "adjust", func, _ADJUST)
    alpha = check_interval(alpha, "alpha", func, low=0, high=1)
    permutations = check_positive_int(permutations, "permutations", func, minimum=1)
    if block_size is not None:
        block_size = check_positive_int(block_size, "block_size", func)
    seed = _check_seed(seed, func)
    _check_graph_size(graph, func)
    z = _centred(x, func, name)
    n = x.size
    k = graph.neighbour_counts()
    island = k == 0
    m2 = float(z @ z) / n
    sd = math.sqrt(m2)
    zs = z / sd
    adj = graph.adjacency
    nsum = adj @ z  # neighbour sums of centred values
    kk = np.maximum(k, 1).astype(float)
    lag_std = np.where(island, np.nan, nsum / kk / sd)
    notes = []

    # Exact conditional moments of the neighbour sum S_i (k_i draws without
    # replacement from the other n-1 centred values): mean k mu_i and
    # variance k sigma_i^2 (N-k)/(N-1), N = n-1 (finite-population correction).
    N = n - 1
    mu = -z / N
    sigma2 = (float(z @ z) - z**2) / N - mu**2
    fpc = np.where(N > 1, (N - k) / max(N - 1, 1), 0.0)
    s_mean = k * mu
    s_var = np.maximum(k * sigma2 * fpc, 0.0)  # clip rounding below zero

    if statistic == "local_moran":
        c = 1.0 / kk if weights == "row" else np.ones(n)
        stat = z * c * nsum / m2
        e_stat = z * c * s_mean / m2
        sd_stat = np.abs(z) * c * np.sqrt(s_var) / m2
        with np.errstate(divide="ignore", invalid="ignore"):
            zscore = np.where(sd_stat > 0, (stat - e_stat) / sd_stat, np.nan)
        high = z > 0
        lag_high = nsum > 0
    else:
        # Ord & Getis (1995) Gi*: binary weights with w_ii = 1.
        wstar = k + 1.0
        xbar = x.mean()
        s = math.sqrt(float(np.mean(x**2)) - xbar**2)
        local_sum = adj @ x + x
        total = x.sum()
        if (x < 0).any() or total <= 0:
            stat = np.full(n, np.nan)
            notes.append(
                "Gi* ratio left blank: the variable has negative values, so only z-scores are reported"
            )
        else:
            stat = local_sum / total
        denom = s * np.sqrt((n * wstar - wstar**2) / (n - 1))
        with np.errstate(divide="ignore", invalid="ignore"):
            zscore = np.where(denom > 0, (local_sum - wstar * xbar) / denom, np.nan)
        # direction of the permutation test: neighbours above their conditional mean
        high = nsum - s_mean > 0
        lag_high = high

    p = _neighbour_sum_pvalues(z, graph, permutations, seed, block_size)
    if statistic == "local_moran":
        # I_i = 0 whatever the neighbours are when z_i = 0: never extreme.
        p[(z == 0) & ~island] = 1.0
    stat = np.where(island, np.nan, stat)
    zscore = np.where(island, np.nan, zscore)
    p_adj = adjust_pvalues(p, adjust)
    significant = np.where(island, False, p_adj <= alpha)
    cluster = _labels(high, lag_high, significant, island)
    m = int((~island).sum())
    floor = 1.0 / (permutations + 1)
    if floor > alpha or (adjust == "bonferroni" and floor * m > alpha):
        notes.append(
            f"with {permutations} permutations the smallest possible "
            f"{'adjusted ' if adjust == 'bonferroni' else ''}p-value is "
            f"{floor * (m if adjust == 'bonferroni' else 1):.3g} > alpha = {alpha:g}; "
            "no area can be labelled. Increase 'permutations'."
        )
    elif adjust == "fdr" and floor * m > alpha:
        # Benjamini-Hochberg labels the k smallest p-values only if p_(k) <= k alpha / m.
        need = math.ceil(floor * m / alpha)
        notes.append(
            f"with {permutations} permutations and {m} tested areas, the false-discovery-rate control can "
            f"label areas only when at least {need} of them reach the smallest possible p-value "
            f"{floor:.3g}; isolated hot spots cannot be detected. Use at least {math.ceil(m / alpha) - 1} "
            "permutations so that a single area can reach significance."
        )
    return LocalClusterResult(
        ids=graph.ids,
        method=statistic,
        statistic=stat,
        z_score=zscore,
        p_value=p,
        p_adjusted=p_adj,
        significant=significant.astype(bool),
        cluster=cluster,
        standardized_value=zs,
        spatial_lag=lag_std,
        neighbours=k,
        adjust=adjust,
        alpha=alpha,
        permutations=permutations,
        seed=seed,
        notes=tuple(notes),
    )


def local_clusters(
    values,
    graph: AreaGraph,
    *,
    statistic: str = "local_moran",
    permutations: int = 999,
    seed: int | None = 0,
    adjust: str = "fdr",
    alpha: float = 0.05,
    weights: str = "row",
    block_size: int | None = None,
) -> LocalClusterResult:
    r"""Local clusters and outliers: local Moran's I or Getis–Ord Gi*.

    Parameters
    ----------
    values : array-like or pandas.Series, shape (n,)
        The variable, aligned with ``graph.ids`` (a Series is reordered by id).
        For rates use :func:`rate_local_clusters`.
    graph : AreaGraph
    statistic : {"local_moran", "gi_star"}, default="local_moran"
    permutations : int, default=999
        Conditional permutations per area; the smallest possible p-value is
        1/(permutations + 1).
    seed : int or None, default=0
        Seed; the same seed gives the same p-values. None: fresh entropy.
    adjust : {"fdr", "bonferroni", "none"}, default="fdr"
        Multiple-testing control (see :func:`adjust_pvalues`); the adjusted
        p-values decide significance and labels.
    alpha : float, default=0.05
        Level for ``p_adjusted``.
    weights : {"row", "binary"}, default="row"
        Weights of local Moran's I (only its scale changes; p-values do not).
        Gi* always uses binary weights including the area itself.
    block_size : int or None, default=None
        Permutations drawn together; chosen from a memory budget (about 64 MB of
        working arrays) when None. It does not change the result.

    Returns
    -------
    LocalClusterResult

    Notes
    -----
    **Local Moran's I** (Anselin 1995), with :math:`z_i = x_i - \bar x` and
    :math:`m_2 = \sum_j z_j^2 / n`:

    .. math:: I_i = \frac{z_i \sum_j w_{ij} z_j}{m_2},

    so that :math:`\sum_i I_i = S_0\, I` (global Moran's I with the same weights).
    Labels: High-High (:math:`z_i>0`, neighbours' mean above average), Low-Low,
    High-Low and Low-High for significant areas.

    **Gi*** (Ord & Getis 1995), binary weights with :math:`w_{ii}=1`,
    :math:`W_i^* = \sum_j w_{ij}`, :math:`S_{1i}^* = \sum_j w_{ij}^2`:

    .. math:: G_i^* = \frac{\sum_j w_{ij}x_j}{\sum_j x_j},\qquad
       Z(G_i^*) = \frac{\sum_j w_{ij}x_j - W_i^*\bar x}
       {s\sqrt{(nS_{1i}^* - W_i^{*2})/(n-1)}},

    with :math:`s^2 = \sum_j x_j^2/n - \bar x^2`. A significant area whose
    neighbours are above their expected level is labelled "High-High" (hot
    spot), below "Low-Low" (cold spot).

    **Conditional permutation.** For each area i, each permutation keeps
    :math:`x_i` and replaces its :math:`k_i` neighbours by :math:`k_i` values drawn
    without replacement from the other n - 1 areas. Both statistics are
    monotone in the neighbour sum :math:`S_i = \sum_{j \in N(i)} z_j`, whose
    conditional mean is :math:`k_i(\sum_j z_j - z_i)/(n-1)`. The pseudo p-value
    is two-sided and folded around that exact mean:
    :math:`p_i = (M_i+1)/(R+1)`, :math:`M_i` = number of permutations with
    :math:`|S_i^{(r)} - E S_i| \ge |S_i - E S_i|`. Hence local Moran's I and
    Gi* give the same p-values (except local Moran's p = 1 where
    :math:`z_i=0`); they differ in labels. The z-score of local Moran's I uses
    the exact conditional moments (sampling without replacement: variance
    :math:`k_i\sigma_i^2(N-k_i)/(N-1)`, N = n - 1) and is for description only.

    Sampling: for every (permutation, area), k_i indices are drawn uniformly
    from 0..n-2 and those >= i are shifted by one (excluding i itself); draws
    with a repeated index are redrawn whole until all indices differ, which is
    exact sampling without replacement (areas whose neighbour count is large
    relative to n use Floyd's algorithm instead, also exact). Permutation r uses a random stream
    derived from (seed, r), so results do not depend on ``block_size``; they do
    depend on the order of the areas (the same seed assigns other draws to
    other areas after reordering).

    Islands are never tested: statistic, z-score and p-value are NaN and the
    label is "no neighbours"; they are not counted in the multiple-testing
    adjustment. Their values still take part, as candidate neighbour values,
    in other areas' permutations.

    References
    ----------
    Anselin, L. (1995). Local indicators of spatial association - LISA.
    Geographical Analysis 27, 93-115.
    Ord, J. K. & Getis, A. (1995). Local spatial autocorrelation statistics:
    distributional issues and an application. Geographical Analysis 27, 286-306.
    Benjamini, Y. & Hochberg, Y. (1995). JRSS B 57, 289-300.

    Examples
    --------
    >>> g = AreaGraph.from_edges(list("ABCDEFGH"), [(a, b) for a, b in
    ...     zip("ABCDEFG", "BCDEFGH")])
    >>> res = local_clusters([9, 8, 9, 1, 2, 1, 2, 1], g, permutations=99, adjust="none")
    >>> res.to_frame()["cluster"].tolist()[:3]
    ['not significant', 'High-High', 'not significant']
    >>> round(float(res.statistic.sum()), 6) == round(8 * morans_i(
    ...     [9, 8, 9, 1, 2, 1, 2, 1], g, permutations=0).statistic, 6)
    True
    """
    func = "local_clusters"
    x = _as_values(values, graph, func)
    return _local_core(x, graph, func, statistic, weights, permutations, seed, adjust, alpha, block_size)


def rate_local_clusters(
    cases,
    population,
    graph: AreaGraph,
    *,
    statistic: str = "local_moran",
    permutations: int = 999,
    seed: int | None = 0,
    adjust: str = "fdr",
    alpha: float = 0.05,
    weights: str = "row",
    block_size: int | None = None,
) -> LocalClusterResult:
    """Local clusters of rates, computed on empirical-Bayes standardized rates.

    :func:`local_clusters` applied to :func:`eb_standardized_rates` (Assunção &
    Reis 1999), the default for rates: areas with small populations no longer
    dominate the High-Low / Low-High outliers. With ``statistic="gi_star"``
    the Gi* ratio is not defined (standardized rates can be negative) and only
    the z-score and p-value are reported.

    Parameters
    ----------
    cases, population : array-like or pandas.Series, shape (n,)
        Counts (>= 0) and populations (> 0) aligned with ``graph``.
    graph : AreaGraph
    statistic, permutations, seed, adjust, alpha, weights, block_size
        As in :func:`local_clusters`.

    Returns
    -------
    LocalClusterResult

    Examples
    --------
    >>> g = AreaGraph.from_edges(list("ABCDEF"), [("A", "B"), ("B", "C"), ("C", "D"),
    ...                                            ("D", "E"), ("E", "F")])
    >>> res = rate_local_clusters([1, 2, 2, 6, 8, 9], [900, 1000, 1100, 1000, 950, 1000], g,
    ...                           permutations=99)
    >>> set(res.cluster) <= set(CLUSTER_LABELS)
    True
    """
    func = "rate_local_clusters"
    y, p = _rate_inputs(cases, population, graph, func)
    z = _eb_core(y, p, func, graph.ids)
    return _local_core(
        z, graph, func, statistic, weights, permutations, seed, adjust, alpha, block_size,
        name="EB-standardized rates",
    )

