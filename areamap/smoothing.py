"""Empirical-Bayes and neighbourhood smoothing of area rates and standardized ratios.

Raw rates (cases / population) and standardized ratios (observed / expected)
swing wildly in areas with few people: one extra case can double the ratio.
The functions here pull each raw value towards a reference value, more
strongly the less information the area carries:

* :func:`global_eb_rates` - empirical Bayes towards the overall rate, with the
  method-of-moments prior of Marshall (1991);
* :func:`local_eb_rates` - the same, but the prior is estimated from each area
  and its neighbours (Marshall 1991, local version);
* :func:`poisson_gamma_eb` - the Poisson-gamma model of Clayton and Kaldor
  (1987) with maximum-likelihood hyperparameters; gives posterior means,
  intervals and exceedance probabilities for relative risks;
* :func:`spatial_window_rates` - the pooled rate of an area and its neighbours;
* :func:`shrinkage_table` and :func:`class_changes` - how far each area moved
  and which areas change map class.

Every function takes ``(counts, denominators)``: the denominator is the
population at risk (crude rates) or the expected count (standardized ratios).
Areas whose denominator is zero carry no information; they are left out of
every estimate, named in a :class:`~areamap.errors.DataWarning` and get NaN.

Cautions that apply to everything in this module
------------------------------------------------
* Shrinkage is strongest where counts are smallest. A smoothed map is easier
  to read, but a small area's smoothed value mostly reflects its reference
  (the overall or neighbourhood rate), not its own data.
* A smoothed area value describes the area as a whole. It is not an estimate
  of any individual resident's risk (ecological fallacy).
* Small counts may need suppression before publication even when the
  smoothed value looks harmless.
"""

from __future__ import annotations

import html
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp
from scipy import optimize, special, stats

from ._params import check_interval
from .errors import DataWarning, InputError, ModelError, ModelWarning, ParameterError, format_examples
from .graphs import AreaGraph

__all__ = [
    "SmoothedRates",
    "PoissonGammaResult",
    "global_eb_rates",
    "local_eb_rates",
    "spatial_window_rates",
    "poisson_gamma_eb",
    "shrinkage_table",
    "class_changes",
]

#: Fitted gamma shapes above this are treated as "no extra-Poisson variation".
_SHAPE_CAP = 1e8
#: Fitted gamma shapes below this mean the prior carries (almost) no information.
_SHAPE_FLOOR = 1e-8


# =============================================================== input checks
@dataclass(frozen=True, eq=False)
class _Prepared:
    index: pd.Index
    counts: np.ndarray  # float, NaN-free; zero where excluded
    counts_given: np.ndarray  # as passed (kept for the output tables)
    denominators: np.ndarray  # float, zero where excluded
    valid: np.ndarray  # bool: denominator > 0
    excluded: tuple  # ids of excluded areas


def _as_vector(x, what: str, func: str) -> tuple[np.ndarray, pd.Index | None]:
    if isinstance(x, pd.DataFrame):
        raise InputError(
            f"{func} expects a single column for '{what}', got a table with "
            f"{x.shape[1]} columns ({format_examples(x.columns)}). Pass one column, e.g. df['{what}']."
        )
    index = x.index if isinstance(x, pd.Series) else None
    try:
        arr = np.asarray(x, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"'{what}' passed to {func} must be numbers.") from None
    if arr.ndim != 1:
        raise InputError(
            f"'{what}' passed to {func} must be one value per area (1-D); got shape {arr.shape}."
        )
    return arr, index


def _prepare(
    counts,
    denominators,
    *,
    func: str,
    count_name: str = "counts",
    denominator_name: str = "denominators",
    graph: AreaGraph | None = None,
    whole_counts: bool = False,
) -> tuple[_Prepared, AreaGraph | None]:
    """Validate and align the per-area inputs; exclude zero denominators with a warning."""
    y, iy = _as_vector(counts, count_name, func)
    n, i_n = _as_vector(denominators, denominator_name, func)
    if iy is not None and i_n is not None:
        if not iy.is_unique:
            dup = iy[iy.duplicated()].unique()
            raise InputError(
                f"The index of '{count_name}' repeats {len(dup)} area id(s) ({format_examples(dup)}). "
                "Give one value per area."
            )
        if not iy.equals(i_n):
            pos = i_n.get_indexer(iy) if i_n.is_unique else np.full(len(iy), -1)
            if i_n.is_unique and len(i_n) == len(iy) and (pos >= 0).all():
                n = n[pos]
            else:
                missing = iy.difference(i_n)
                extra = i_n.difference(iy)
                raise InputError(
                    f"'{count_name}' and '{denominator_name}' passed to {func} cover different areas: "
                    f"{len(missing)} id(s) only in '{count_name}' ({format_examples(missing)}), "
                    f"{len(extra)} id(s) only in '{denominator_name}' ({format_examples(extra)}). "
                    "Give both for the same areas."
                )
        index = iy
    elif y.size != n.size:
        raise InputError(
            f"'{count_name}' has {y.size} values but '{denominator_name}' has {n.size}; "
            f"{func} needs one of each per area."
        )
    else:
        index = iy if iy is not None else i_n
    if index is not None and not index.is_unique:
        dup = index[index.duplicated()].unique()
        raise InputError(
            f"The area index passed to {func} repeats {len(dup)} id(s) ({format_examples(dup)}). "
            "Give one value per area."
        )

    if graph is not None:
        if index is not None:
            graph = graph.reorder(index)
        elif y.size != graph.n:
            raise InputError(
                f"{func} got {y.size} values but the graph has {graph.n} areas. Pass one value per "
                "graph area in the order of graph.ids, or pandas Series indexed by area id."
            )
        else:
            index = graph.ids
    if index is None:
        index = pd.RangeIndex(y.size)

    for arr, name in ((y, count_name), (n, denominator_name)):
        bad = ~np.isfinite(arr)
        if bad.any():
            raise InputError(
                f"'{name}' passed to {func} has {int(bad.sum())} missing or infinite value(s) "
                f"(areas {format_examples(index[bad])}). Fill them in (use 0 for none) or drop those areas."
            )
        neg = arr < 0
        if neg.any():
            raise InputError(
                f"'{name}' passed to {func} has {int(neg.sum())} negative value(s) "
                f"(areas {format_examples(index[neg])}). Values must be >= 0."
            )
    if whole_counts:
        frac = y != np.round(y)
        if frac.any():
            raise InputError(
                f"'{count_name}' passed to {func} has {int(frac.sum())} value(s) that are not whole "
                f"numbers (areas {format_examples(index[frac])}). The Poisson model needs counts of cases."
            )

    valid = n > 0
    excluded = tuple(index[~valid])
    if excluded:
        # name the denominator as the caller did (a named Series such as 'population'), else generically
        label = denominator_name
        if isinstance(denominators, pd.Series) and isinstance(denominators.name, str):
            label = denominators.name
        elif denominator_name == "denominators":
            label = "denominator (population or expected count)"
        with_cases = int((y[~valid] > 0).sum())
        extra = (
            f" {with_cases} of them have {count_name} > 0; check the {label} data."
            if with_cases
            else ""
        )
        warnings.warn(
            f"{len(excluded)} area(s) have zero {label} and are left out of {func} "
            f"(their results are NaN): {format_examples(excluded)}.{extra}",
            DataWarning,
            stacklevel=3,
        )
    return _Prepared(index, np.where(valid, y, 0.0), y, n, valid, excluded), graph


def _check_per(per: float, func: str) -> float:
    return check_interval(per, "per", func, low=0.0, high=math.inf)


def _shift(raw: np.ndarray, smoothed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    shift = smoothed - raw
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(raw > 0, shift / np.where(raw > 0, raw, 1.0), np.nan)
    return shift, rel


def _fmt(x: float) -> str:
    return "nan" if not np.isfinite(x) else f"{x:.4g}"


def _html(summary: str, frame: pd.DataFrame, rows: int = 20) -> str:
    head = frame.head(rows)
    more = f"<p>... {len(frame) - rows} more rows; use <code>to_frame()</code>.</p>" if len(frame) > rows else ""
    body = "<br>".join(html.escape(line) for line in summary.splitlines())
    return f"<div><p>{body}</p>{head.to_html(float_format=lambda v: f'{v:.4g}')}{more}</div>"


# ============================================================ result objects
@dataclass(frozen=True, eq=False)
class SmoothedRates:
    """Raw and smoothed rates per area, from :func:`global_eb_rates`, :func:`local_eb_rates`
    or :func:`spatial_window_rates`.

    Attributes
    ----------
    method : str
        ``"global empirical Bayes"``, ``"local empirical Bayes"`` or ``"spatial window"``.
    index : pandas.Index
        Area ids (input order).
    counts, denominators : ndarray, shape (n,)
        Inputs as given (in the order of ``index``).
    raw_rate, smoothed_rate : ndarray, shape (n,)
        ``counts / denominators`` and the smoothed value, both multiplied by ``per``.
        NaN for areas with a zero denominator.
    raw_weight : ndarray, shape (n,)
        Weight the smoothed value gives to the area's own raw rate (the
        shrinkage weight, in [0, 1]): 1 keeps the raw rate, 0 replaces it by
        the reference (prior mean or neighbourhood).
    prior_mean, prior_variance : ndarray or None
        Empirical-Bayes prior per area (constant for the global method; times
        ``per`` and ``per**2``). None for the spatial window.
    global_fallback : ndarray of bool or None
        Local method only: areas without neighbours holding data, which got the
        global estimate instead.
    areas_pooled : ndarray of int or None
        Spatial window only: areas with data in the pooled window (self included).
    overall_rate : float
        Sum of counts over sum of denominators (times ``per``).
    excluded : tuple
        Ids of areas left out because their denominator is zero.
    per : float
        Rates are per this many units of denominator (1 for ratios).
    """

    method: str
    index: pd.Index
    counts: np.ndarray
    denominators: np.ndarray
    raw_rate: np.ndarray
    smoothed_rate: np.ndarray
    raw_weight: np.ndarray
    prior_mean: np.ndarray | None
    prior_variance: np.ndarray | None
    global_fallback: np.ndarray | None
    areas_pooled: np.ndarray | None
    overall_rate: float
    excluded: tuple
    per: float

    def to_frame(self) -> pd.DataFrame:
        """Table indexed like the input.

        Columns: count, denominator, raw_rate, smoothed_rate, raw_weight,
        prior_mean and prior_variance (empirical Bayes), global_fallback (local
        EB), areas_pooled (window), shift (smoothed - raw) and relative_shift
        (shift / raw; NaN where raw is 0).
        """
        shift, rel = _shift(self.raw_rate, self.smoothed_rate)
        cols = {
            "count": self.counts,
            "denominator": self.denominators,
            "raw_rate": self.raw_rate,
            "smoothed_rate": self.smoothed_rate,
            "raw_weight": self.raw_weight,
        }
        if self.prior_mean is not None:
            cols["prior_mean"] = self.prior_mean
            cols["prior_variance"] = self.prior_variance
        if self.global_fallback is not None:
            cols["global_fallback"] = self.global_fallback
        if self.areas_pooled is not None:
            cols["areas_pooled"] = self.areas_pooled
        cols["shift"] = shift
        cols["relative_shift"] = rel
        return pd.DataFrame(cols, index=self.index)

    def summary(self) -> str:
        """Readable description: method, reference rate, spread of weights, biggest moves."""
        ok = np.isfinite(self.smoothed_rate)
        unit = "" if self.per == 1 else f" per {self.per:g}"
        lines = [
            f"{self.method[0].upper()}{self.method[1:]} smoothing of {int(ok.sum())} areas"
            + (f" ({len(self.excluded)} left out, zero denominator: {format_examples(self.excluded)})"
               if self.excluded else "")
            + ".",
            f"Overall rate{unit}: {_fmt(self.overall_rate)}.",
        ]
        if self.method == "global empirical Bayes" and ok.any():
            lines.append(
                f"Prior mean {_fmt(float(self.prior_mean[ok][0]))}, prior variance "
                f"{_fmt(float(self.prior_variance[ok][0]))}"
                + (" (truncated at 0: every area is shrunk to the overall rate)."
                   if self.prior_variance[ok][0] == 0 else ".")
            )
        if self.global_fallback is not None and self.global_fallback.any():
            lines.append(f"{int(self.global_fallback.sum())} area(s) without neighbours got the global estimate.")
        if ok.any():
            w = self.raw_weight[ok]
            shift = np.abs(self.smoothed_rate - self.raw_rate)[ok]
            big = int(np.argmax(shift))
            lines.append(
                f"Weight on the raw rate: min {_fmt(w.min())}, median {_fmt(float(np.median(w)))}, "
                f"max {_fmt(w.max())}. Largest move: area {self.index[ok][big]} from "
                f"{_fmt(self.raw_rate[ok][big])} to {_fmt(self.smoothed_rate[ok][big])}."
            )
        if self.method == "spatial window":
            lines.append(
                "Every area is pooled with its neighbours whatever its size; pooled rates describe "
                "areas, not individuals."
            )
        else:
            lines.append("Small areas are shrunk most; smoothed values describe areas, not individuals.")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return _html(self.summary(), self.to_frame())


@dataclass(frozen=True, eq=False)
class PoissonGammaResult:
    """Posterior relative risks from the Poisson-gamma model (:func:`poisson_gamma_eb`).

    Attributes
    ----------
    index : pandas.Index
        Area ids (input order).
    observed, expected : ndarray, shape (n,)
    prior_mean : float
        Prior mean relative risk, alpha / nu.
    prior_shape : float
        Gamma shape alpha (``inf`` when the data show no extra-Poisson variation).
    prior_rate : float
        Gamma rate nu = prior_shape / prior_mean.
    raw_ratio : ndarray
        observed / expected.
    rr_mean, rr_low, rr_high : ndarray
        Posterior mean relative risk and equal-tailed interval at ``level``.
    p_above_threshold : ndarray
        Posterior probability that the relative risk exceeds ``threshold``.
    raw_weight : ndarray
        expected / (nu + expected): weight of the raw ratio in the posterior mean.
    threshold, level : float
    estimated : tuple of str
        Which hyperparameters were estimated ("prior_mean", "prior_shape").
    log_likelihood : float
        Negative-binomial marginal log-likelihood at the hyperparameters.
    converged : bool
        Whether the optimizer met its tolerance (True when nothing was estimated).
    excluded : tuple
        Ids of areas left out because their expected count is zero.
    """

    index: pd.Index
    observed: np.ndarray
    expected: np.ndarray
    prior_mean: float
    prior_shape: float
    prior_rate: float
    raw_ratio: np.ndarray
    rr_mean: np.ndarray
    rr_low: np.ndarray
    rr_high: np.ndarray
    p_above_threshold: np.ndarray
    raw_weight: np.ndarray
    threshold: float
    level: float
    estimated: tuple[str, ...]
    log_likelihood: float
    converged: bool
    excluded: tuple

    def to_frame(self) -> pd.DataFrame:
        """Table indexed like the input.

        Columns: observed, expected, raw_ratio, rr_mean, rr_low, rr_high,
        p_above_threshold, raw_weight, shift (rr_mean - raw_ratio) and
        relative_shift (shift / raw_ratio; NaN where the raw ratio is 0).
        """
        shift, rel = _shift(self.raw_ratio, self.rr_mean)
        return pd.DataFrame(
            {
                "observed": self.observed,
                "expected": self.expected,
                "raw_ratio": self.raw_ratio,
                "rr_mean": self.rr_mean,
                "rr_low": self.rr_low,
                "rr_high": self.rr_high,
                "p_above_threshold": self.p_above_threshold,
                "raw_weight": self.raw_weight,
                "shift": shift,
                "relative_shift": rel,
            },
            index=self.index,
        )

    def summary(self) -> str:
        """Readable description of the prior, the weights and the exceedances."""
        ok = np.isfinite(self.rr_mean)
        how = "estimated by maximum likelihood" if self.estimated else "given"
        if self.estimated and len(self.estimated) < 2:
            how = f"{self.estimated[0]} estimated by maximum likelihood"
        prior_sd = self.prior_mean / math.sqrt(self.prior_shape) if self.prior_shape > 0 else math.inf
        lines = [
            f"Poisson-gamma empirical Bayes for {int(ok.sum())} areas"
            + (f" ({len(self.excluded)} left out, zero expected: {format_examples(self.excluded)})"
               if self.excluded else "")
            + ".",
            f"Gamma prior ({how}): mean {_fmt(self.prior_mean)}, shape {_fmt(self.prior_shape)}, "
            f"sd {_fmt(prior_sd)}; log-likelihood {_fmt(self.log_likelihood)}"
            + ("" if self.converged else " (optimizer did NOT converge)") + ".",
        ]
        if ok.any():
            w = self.raw_weight[ok]
            n_hi = int((self.p_above_threshold[ok] > 0.8).sum())
            lines.append(
                f"Weight on the raw ratio: min {_fmt(w.min())}, median {_fmt(float(np.median(w)))}, "
                f"max {_fmt(w.max())}. {n_hi} area(s) with P(RR > {self.threshold:g}) > 0.8."
            )
        lines.append(
            f"Intervals are {self.level:.0%} posterior intervals given the fitted prior; they ignore "
            "uncertainty in the prior itself, so they are somewhat too narrow. Smoothed values "
            "describe areas, not individuals."
        )
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return _html(self.summary(), self.to_frame())


# =========================================================== global / local
def _eb_weights(prior_variance: np.ndarray, prior_mean: np.ndarray, n: np.ndarray) -> np.ndarray:
    """C = A / (A + m / n), with C = 1 for A = inf and C = 0 for A = 0 (also when m = 0)."""
    a = np.asarray(prior_variance, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        noise = prior_mean / n
        c = a / (a + noise)
    c = np.where(np.isposinf(a), 1.0, c)
    c = np.where(a == 0, 0.0, c)
    return np.clip(c, 0.0, 1.0)


def _marshall_global(y, n, *, prior_mean=None, prior_variance=None):
    """Global moment estimates over the given (valid) areas; returns m, A untruncated, A used, C."""
    m = y.sum() / n.sum() if prior_mean is None else prior_mean
    r = y / n
    s2 = float(np.sum(n * (r - m) ** 2) / n.sum())
    nbar = n.sum() / n.size
    a_raw = s2 - m / nbar
    a = max(a_raw, 0.0) if prior_variance is None else prior_variance
    c = _eb_weights(np.full(n.size, a), np.full(n.size, m), n)
    return m, a_raw, a, c


def global_eb_rates(
    counts,
    denominators,
    *,
    prior_mean: float | None = None,
    prior_variance: float | None = None,
    per: float = 1.0,
) -> SmoothedRates:
    """Empirical-Bayes rates shrunk towards the overall rate (Marshall's global estimator).

    Parameters
    ----------
    counts : array-like or pandas.Series, shape (n,)
        Cases (or observed counts) per area, >= 0.
    denominators : array-like or pandas.Series, shape (n,)
        Population at risk (crude rates) or expected counts (standardized
        ratios), >= 0. Areas with 0 are left out with a ``DataWarning`` and get NaN.
    prior_mean : float, optional
        Override the prior mean m (on the count/denominator scale, not times ``per``).
    prior_variance : float, optional
        Override the prior variance A (>= 0; ``inf`` returns the raw rates, 0
        returns ``prior_mean`` everywhere).
    per : float, default=1.0
        Report rates per this many units of denominator (e.g. 100000).

    Returns
    -------
    SmoothedRates

    Warns
    -----
    DataWarning
        Areas with a zero denominator.
    ModelWarning
        The moment estimate of the prior variance is <= 0 (no variation beyond
        what chance explains), so every area is set to the overall rate.

    Notes
    -----
    With raw rates r_i = y_i / n_i, the moment estimates of Marshall (1991) are

    .. math::

        m = \\frac{\\sum y_i}{\\sum n_i}, \\quad
        s^2 = \\frac{\\sum n_i (r_i - m)^2}{\\sum n_i}, \\quad
        A = s^2 - \\frac{m}{\\bar n}, \\quad \\bar n = \\frac{\\sum n_i}{N},

    with A set to 0 when negative (then every area is shrunk all the way to
    m). The weight on the raw rate and the smoothed rate are

    .. math::

        C_i = \\frac{A}{A + m / n_i}, \\qquad \\theta_i = m + C_i (r_i - m).

    Small areas (small n_i) get small C_i and are pulled most. The smoothed
    rate is an area-level quantity: it says nothing about the risk of any one
    resident (ecological fallacy), and with very small counts it mostly
    reflects the overall rate rather than the area's own data.

    References
    ----------
    Marshall, R. J. (1991). Mapping disease and mortality rates using empirical
    Bayes estimators. Applied Statistics, 40(2), 283-294.

    Examples
    --------
    >>> res = global_eb_rates([20, 0, 50, 10, 120], [1000, 500, 2000, 800, 3000])
    >>> res.smoothed_rate.round(4).tolist()
    [0.0213, 0.0081, 0.0252, 0.0156, 0.0392]
    """
    func = "global_eb_rates"
    per = _check_per(per, func)
    if prior_mean is not None:
        prior_mean = check_interval(prior_mean, "prior_mean", func, low=0.0, closed="left")
    if prior_variance is not None:
        prior_variance = check_interval(
            prior_variance, "prior_variance", func, low=0.0, high=math.inf, closed="both"
        )
    d, _ = _prepare(counts, denominators, func=func)
    nvalid = int(d.valid.sum())
    if nvalid == 0:
        raise InputError(f"{func} needs at least one area with a denominator > 0; all are zero.")
    y, n = d.counts[d.valid], d.denominators[d.valid]
    m, a_raw, a, c = _marshall_global(y, n, prior_mean=prior_mean, prior_variance=prior_variance)
    if prior_variance is None and a_raw <= 0 and nvalid > 1:
        warnings.warn(
            f"The between-area variance estimate in {func} is {a_raw:.3g} <= 0: the rates vary no "
            "more than chance alone would make them, so every area is shrunk to the overall rate "
            f"{m * per:.4g}. A flat smoothed map here means 'no evidence of differences', not 'equal risk'.",
            ModelWarning,
            stacklevel=2,
        )
    r = y / n
    theta = m + c * (r - m)
    return _rates_result(
        "global empirical Bayes", d, r, theta, c,
        prior_mean=np.full(y.size, m), prior_variance=np.full(y.size, a), per=per,
    )


def _rates_result(method, d: _Prepared, r, theta, c, *, per, prior_mean=None, prior_variance=None,
                  global_fallback=None, areas_pooled=None) -> SmoothedRates:
    def full(v, fill=np.nan, dtype=float):
        out = np.full(d.index.size, fill, dtype=dtype)
        out[d.valid] = v
        return out

    overall = d.counts.sum() / d.denominators.sum() if d.denominators.sum() > 0 else np.nan
    return SmoothedRates(
        method=method,
        index=d.index,
        counts=d.counts_given,
        denominators=d.denominators,
        raw_rate=full(r * per),
        smoothed_rate=full(theta * per),
        raw_weight=full(c),
        prior_mean=None if prior_mean is None else full(prior_mean * per),
        prior_variance=None if prior_variance is None else full(prior_variance * per**2),
        global_fallback=None if global_fallback is None else full(global_fallback, False, bool),
        areas_pooled=None if areas_pooled is None else full(areas_pooled, 0, np.int64),
        overall_rate=float(overall * per),
        excluded=d.excluded,
        per=per,
    )


def _window_matrix(graph: AreaGraph) -> sp.csr_array:
    """Binary matrix W + I: row i marks area i and its neighbours."""
    m = sp.csr_array(graph.adjacency + sp.eye_array(graph.n, format="csr"))
    m.sort_indices()
    return m


def local_eb_rates(
    counts,
    denominators,
    graph: AreaGraph,
    *,
    per: float = 1.0,
) -> SmoothedRates:
    """Empirical-Bayes rates shrunk towards each area's neighbourhood rate (Marshall's local estimator).

    Parameters
    ----------
    counts, denominators : array-like or pandas.Series, shape (n,)
        As in :func:`global_eb_rates`. Arrays must follow ``graph.ids``;
        Series are matched to the graph by index (output keeps the Series order).
    graph : AreaGraph
        Neighbour graph; the neighbourhood of area i is i plus its neighbours.
    per : float, default=1.0
        Report rates per this many units of denominator.

    Returns
    -------
    SmoothedRates
        With a ``global_fallback`` column marking areas that got the global estimate.

    Warns
    -----
    DataWarning
        Zero denominators; areas without neighbours holding data (islands),
        which get the global empirical-Bayes estimate instead.

    Notes
    -----
    For area i let S_i be i and its neighbours with n_j > 0. Then, as in
    :func:`global_eb_rates` but over S_i (Marshall 1991),

    .. math::

        m_i = \\frac{\\sum_{S_i} y_j}{\\sum_{S_i} n_j}, \\quad
        s_i^2 = \\frac{\\sum_{S_i} n_j (r_j - m_i)^2}{\\sum_{S_i} n_j}, \\quad
        A_i = \\max\\Big(0,\\, s_i^2 - \\frac{m_i}{\\bar n_i}\\Big), \\quad
        \\bar n_i = \\frac{\\sum_{S_i} n_j}{|S_i|},

    .. math::

        C_i = \\frac{A_i}{A_i + m_i / n_i}, \\qquad \\theta_i = m_i + C_i (r_i - m_i).

    When S_i holds only the area itself (an island, or all neighbours have
    zero denominator) there is no neighbourhood to learn a prior from: s_i^2 = 0
    and the formula would return the raw rate unshrunk. Such areas get the
    global empirical-Bayes estimate instead (flagged in ``global_fallback``).
    With few neighbours the local prior is itself noisy; local smoothing also
    blurs genuine sharp boundaries between neighbouring areas.

    References
    ----------
    Marshall, R. J. (1991). Mapping disease and mortality rates using empirical
    Bayes estimators. Applied Statistics, 40(2), 283-294.

    Examples
    --------
    A path of five areas A - B - C - D - E; the small area C is pulled
    towards its neighbours B and D:

    >>> g = AreaGraph.from_edges(list("ABCDE"), [("A", "B"), ("B", "C"), ("C", "D"), ("D", "E")])
    >>> res = local_eb_rates([5, 40, 3, 60, 90], [1000, 1000, 200, 1500, 1500], g)
    >>> res.smoothed_rate.round(4).tolist()
    [0.0063, 0.0386, 0.0381, 0.0416, 0.0567]
    """
    func = "local_eb_rates"
    per = _check_per(per, func)
    if not isinstance(graph, AreaGraph):
        raise ParameterError(
            f"The 'graph' parameter of {func} must be an AreaGraph. Got {type(graph).__name__} instead."
        )
    d, g = _prepare(counts, denominators, func=func, graph=graph)
    if not d.valid.any():
        raise InputError(f"{func} needs at least one area with a denominator > 0; all are zero.")
    y, n, valid = d.counts, d.denominators, d.valid
    r = np.divide(y, n, out=np.zeros_like(y), where=valid)
    mw = _window_matrix(g)
    sum_n = mw @ n
    sum_y = mw @ y
    size = mw @ valid.astype(float)
    m_loc = np.divide(sum_y, sum_n, out=np.zeros_like(sum_y), where=sum_n > 0)
    # sum_j n_j (r_j - m_i)^2 over the window, one term per stored entry (exact, no cancellation)
    rows = np.repeat(np.arange(g.n), np.diff(mw.indptr))
    cols = mw.indices
    dev = n[cols] * (r[cols] - m_loc[rows]) ** 2
    ss = np.bincount(rows, weights=dev, minlength=g.n)
    s2 = np.divide(ss, sum_n, out=np.zeros_like(ss), where=sum_n > 0)
    nbar = np.divide(sum_n, size, out=np.ones_like(sum_n), where=size > 0)
    a = np.maximum(s2 - m_loc / nbar, 0.0)
    c = _eb_weights(a, m_loc, np.where(valid, n, 1.0))
    theta = m_loc + c * (r - m_loc)

    fallback = valid & (size < 2)
    if fallback.any():
        lab = g.labels()
        names = [lab[i] for i in np.flatnonzero(fallback)]
        warnings.warn(
            f"{int(fallback.sum())} area(s) have no neighbours with data ({format_examples(names)}); "
            f"{func} cannot estimate a local prior for them and uses the global empirical-Bayes "
            "estimate instead (column 'global_fallback'). Link islands to the mainland in the graph "
            "to smooth them locally.",
            DataWarning,
            stacklevel=2,
        )
        m_g, _, a_g, _ = _marshall_global(y[valid], n[valid])
        m_loc = np.where(fallback, m_g, m_loc)
        a = np.where(fallback, a_g, a)
        c_fb = _eb_weights(np.full(g.n, a_g), np.full(g.n, m_g), np.where(valid, n, 1.0))
        c = np.where(fallback, c_fb, c)
        theta = np.where(fallback, m_g + c_fb * (r - m_g), theta)
    return _rates_result(
        "local empirical Bayes", d, r[valid], theta[valid], c[valid],
        prior_mean=m_loc[valid], prior_variance=a[valid], global_fallback=fallback[valid], per=per,
    )


def spatial_window_rates(
    counts,
    denominators,
    graph: AreaGraph,
    *,
    per: float = 1.0,
) -> SmoothedRates:
    """Pooled rate of each area and its neighbours (spatial window / moving-average smoother).

    Parameters
    ----------
    counts, denominators : array-like or pandas.Series, shape (n,)
        As in :func:`global_eb_rates`. Arrays must follow ``graph.ids``.
    graph : AreaGraph
        Neighbour graph; the window of area i is i plus its neighbours.
    per : float, default=1.0
        Report rates per this many units of denominator.

    Returns
    -------
    SmoothedRates
        ``raw_weight`` is n_i / sum of n_j over the window (the share of the
        area's own rate in the pooled rate); ``areas_pooled`` the window size.

    Notes
    -----
    .. math::

        \\theta_i = \\frac{\\sum_{j \\in N(i) \\cup \\{i\\}} y_j}{\\sum_{j \\in N(i) \\cup \\{i\\}} n_j}
                  = w_i r_i + (1 - w_i) \\bar r_{N(i)}, \\qquad
        w_i = \\frac{n_i}{\\sum_{j \\in N(i) \\cup \\{i\\}} n_j}.

    Islands keep their raw rate (their window is themselves). Unlike empirical
    Bayes, the window pools every area the same way whatever its size, so a
    large area with a real excess is diluted by its neighbours, and sharp
    boundaries are blurred. The pooled rate describes the window, not any one
    area or person.

    References
    ----------
    Elliott, P., Wakefield, J. C., Best, N. G. and Briggs, D. J. (eds.) (2000).
    Spatial Epidemiology: Methods and Applications. Oxford University Press
    (chapter on disease mapping; moving-window smoothing).

    Examples
    --------
    >>> g = AreaGraph.from_edges(["A", "B", "C"], [("A", "B"), ("B", "C")])
    >>> spatial_window_rates([2, 10, 30], [100, 400, 900], g).smoothed_rate.round(4).tolist()
    [0.024, 0.03, 0.0308]
    """
    func = "spatial_window_rates"
    per = _check_per(per, func)
    if not isinstance(graph, AreaGraph):
        raise ParameterError(
            f"The 'graph' parameter of {func} must be an AreaGraph. Got {type(graph).__name__} instead."
        )
    d, g = _prepare(counts, denominators, func=func, graph=graph)
    if not d.valid.any():
        raise InputError(f"{func} needs at least one area with a denominator > 0; all are zero.")
    mw = _window_matrix(g)
    sum_y = mw @ d.counts
    sum_n = mw @ d.denominators
    v = d.valid
    r = d.counts[v] / d.denominators[v]
    theta = sum_y[v] / sum_n[v]
    w = d.denominators[v] / sum_n[v]
    pooled = (mw @ v.astype(float))[v].astype(np.int64)
    return _rates_result("spatial window", d, r, theta, w, areas_pooled=pooled, per=per)


# ============================================================ Poisson-gamma
def _nb_loglik(alpha, nu, y, e):
    """Negative-binomial marginal log-likelihood of the Poisson-gamma model (constant terms included)."""
    return float(np.sum(
        special.gammaln(alpha + y) - special.gammaln(alpha) - special.gammaln(y + 1)
        + alpha * np.log(nu / (nu + e)) + y * np.log(e / (nu + e))
    ))


def _nb_derivatives(u, y, e):
    """Log-likelihood, gradient and Hessian in u = (log alpha, log mu), nu = alpha / mu."""
    a, lm = u
    alpha = math.exp(a)
    nu = math.exp(a - lm)
    ll = _nb_loglik(alpha, nu, y, e)
    l_al = np.sum(special.digamma(alpha + y) - special.digamma(alpha) + np.log(nu / (nu + e)))
    l_nu = np.sum(alpha / nu - (alpha + y) / (nu + e))
    l_aa = np.sum(special.polygamma(1, alpha + y) - special.polygamma(1, alpha))
    l_an = np.sum(1.0 / nu - 1.0 / (nu + e))
    l_nn = np.sum(-alpha / nu**2 + (alpha + y) / (nu + e) ** 2)
    # coordinates (a, b) = (log alpha, log nu)
    g_ab = np.array([alpha * l_al, nu * l_nu])
    h_ab = np.array([
        [alpha**2 * l_aa + alpha * l_al, alpha * nu * l_an],
        [alpha * nu * l_an, nu**2 * l_nn + nu * l_nu],
    ])
    # b = a - log mu  ->  (a, b) = J (a, log mu)
    jac = np.array([[1.0, 0.0], [1.0, -1.0]])
    return ll, jac.T @ g_ab, jac.T @ h_ab @ jac


def _dispersion_score(y, mean):
    """Score for the NB2 dispersion 1/alpha at 0 (times 2): sum((y - mean)^2 - y).

    A value <= 0 means the likelihood increases towards alpha = inf (no extra-Poisson variation).
    """
    return float(np.sum((y - mean) ** 2 - y))


def _fit_poisson_gamma(y, e, *, prior_mean, prior_shape):
    """Maximum-likelihood hyperparameters; returns (mu, alpha, estimated, converged, boundary)."""
    free = [prior_shape is None, prior_mean is None]
    estimated = tuple(n for n, f in zip(("prior_shape", "prior_mean"), free) if f)
    if not any(free):
        return prior_mean, prior_shape, estimated, True, False
    if y.sum() == 0 and prior_mean is None:
        raise ModelError(
            "poisson_gamma_eb cannot estimate the prior: every observed count is zero. "
            "Give prior_mean (and prior_shape) explicitly, or use a longer period."
        )
    mu0 = y.sum() / e.sum() if prior_mean is None else prior_mean
    if prior_shape is None:
        t = _dispersion_score(y, mu0 * e)
        if t <= 0:
            return mu0, math.inf, estimated, True, True
        alpha0 = float(np.clip(mu0**2 * np.sum(e**2) / t, 1e-3, 1e6))
    else:
        alpha0 = prior_shape
        if math.isinf(alpha0) or alpha0 == 0:
            # the likelihood no longer involves mu through alpha; mu-hat is the pooled ratio
            # for alpha = inf, and the marginal degenerates for alpha = 0
            return mu0, alpha0, estimated, True, False
    u0 = np.array([math.log(alpha0), math.log(mu0)])
    idx = np.flatnonzero(free)
    scale = float(y.size)

    def fun(v):
        u = u0.copy()
        u[idx] = v
        ll, g, h = _nb_derivatives(u, y, e)
        return -ll / scale, -g[idx] / scale, -h[np.ix_(idx, idx)] / scale

    cache: dict = {}

    def cached(v):
        key = tuple(np.round(v, 15))
        if key not in cache:
            cache.clear()
            cache[key] = fun(v)
        return cache[key]

    res = optimize.minimize(
        lambda v: cached(v)[0], u0[idx], jac=lambda v: cached(v)[1], hess=lambda v: cached(v)[2],
        method="trust-exact", options={"gtol": 1e-10, "maxiter": 500},
    )
    u = u0.copy()
    u[idx] = res.x
    alpha, mu = math.exp(u[0]), math.exp(u[1])
    converged = bool(res.success) or float(np.max(np.abs(res.jac))) < 1e-8
    if prior_shape is None and alpha > _SHAPE_CAP:
        return y.sum() / e.sum() if prior_mean is None else prior_mean, math.inf, estimated, True, True
    return mu, alpha, estimated, converged, False


def poisson_gamma_eb(
    observed,
    expected,
    *,
    threshold: float = 1.0,
    level: float = 0.95,
    prior_mean: float | None = None,
    prior_shape: float | None = None,
) -> PoissonGammaResult:
    """Poisson-gamma empirical-Bayes relative risks (Clayton and Kaldor 1987).

    Parameters
    ----------
    observed : array-like or pandas.Series, shape (n,)
        Observed counts (whole numbers >= 0).
    expected : array-like or pandas.Series, shape (n,)
        Expected counts (> 0; areas with 0 are left out with a ``DataWarning``
        and get NaN). A population can be passed instead to smooth crude
        rates; then "relative risk" reads as "rate".
    threshold : float, default=1.0
        Report P(RR > threshold) for each area.
    level : float, default=0.95
        Coverage of the equal-tailed posterior interval.
    prior_mean, prior_shape : float, optional
        Fix the gamma prior's mean (alpha / nu) and/or shape alpha instead of
        estimating them. ``prior_shape=inf`` sets every area to the prior mean;
        ``prior_shape=0`` returns the raw ratios. A parameter left as None is
        estimated by maximum likelihood (given the other).

    Returns
    -------
    PoissonGammaResult

    Raises
    ------
    ModelError
        All observed counts are zero and the prior mean must be estimated.

    Warns
    -----
    DataWarning
        Areas with zero expected count.
    ModelWarning
        No extra-Poisson variation (the shape estimate diverges): the shape is
        set to infinity and every area gets the overall ratio; or the optimizer
        did not converge.

    Notes
    -----
    Model: y_i | theta_i ~ Poisson(E_i theta_i), theta_i ~ Gamma(shape alpha,
    rate nu), prior mean mu = alpha / nu. Marginally y_i is negative binomial
    with mean mu E_i and variance mu E_i + (mu E_i)^2 / alpha, log-likelihood

    .. math::

        \\ell(\\alpha, \\nu) = \\sum_i \\log\\Gamma(\\alpha + y_i) - \\log\\Gamma(\\alpha)
        - \\log y_i! + \\alpha \\log\\frac{\\nu}{\\nu + E_i} + y_i \\log\\frac{E_i}{\\nu + E_i},

    maximised over (log alpha, log mu) by a trust-region Newton method with
    analytic gradient and Hessian, started from moment estimates. When
    sum((y_i - mu E_i)^2 - y_i) <= 0 (the score for 1/alpha at 0, Dean 1992)
    or the estimate exceeds 1e8, the data show no extra-Poisson variation: the
    shape is set to infinity with a ``ModelWarning`` and every area equals the
    overall ratio sum(y) / sum(E).

    The posterior is theta_i | y ~ Gamma(alpha + y_i, nu + E_i), so

    .. math::

        E[\\theta_i | y] = \\frac{\\alpha + y_i}{\\nu + E_i}
        = w_i \\frac{y_i}{E_i} + (1 - w_i) \\mu, \\qquad w_i = \\frac{E_i}{\\nu + E_i},

    with interval from the gamma quantiles and P(theta_i > c) from its
    survival function. This is a plug-in ("empirical") Bayes interval: it
    treats alpha and nu as known, so it is somewhat too narrow, most of all
    with few areas. Areas with small expected counts are shrunk most; the
    relative risk describes the area, not any individual (ecological fallacy).

    References
    ----------
    Clayton, D. and Kaldor, J. (1987). Empirical Bayes estimates of
    age-standardized relative risks for use in disease mapping. Biometrics,
    43(3), 671-681.

    Dean, C. B. (1992). Testing for overdispersion in Poisson and binomial
    regression models. Journal of the American Statistical Association,
    87(418), 451-457.

    Examples
    --------
    >>> res = poisson_gamma_eb([0, 2, 5, 12], [2.0, 2.5, 4.0, 6.0], prior_mean=1.0, prior_shape=4.0)
    >>> res.rr_mean.round(3).tolist()
    [0.667, 0.923, 1.125, 1.6]
    >>> bool(res.p_above_threshold[3] > 0.9)
    True
    """
    func = "poisson_gamma_eb"
    threshold = check_interval(threshold, "threshold", func, low=0.0, high=math.inf)
    level = check_interval(level, "level", func, low=0.0, high=1.0)
    if prior_mean is not None:
        prior_mean = check_interval(prior_mean, "prior_mean", func, low=0.0, high=math.inf)
    if prior_shape is not None:
        prior_shape = check_interval(prior_shape, "prior_shape", func, low=0.0, high=math.inf, closed="both")
    d, _ = _prepare(
        observed, expected, func=func, count_name="observed", denominator_name="expected",
        whole_counts=True,
    )
    v = d.valid
    if not v.any():
        raise InputError(f"{func} needs at least one area with expected > 0; all are zero.")
    y, e = d.counts[v], d.denominators[v]
    mu, alpha, estimated, converged, boundary = _fit_poisson_gamma(
        y, e, prior_mean=prior_mean, prior_shape=prior_shape
    )
    if boundary:
        source = "the given prior_mean" if prior_mean is not None else "sum of observed / sum of expected"
        warnings.warn(
            f"{func}: the observed counts vary no more than Poisson chance allows, so the gamma "
            "shape estimate diverges; it is set to infinity and every area gets the same ratio "
            f"{mu:.4g} ({source}). This means 'no evidence of differences between areas', not 'equal risk'.",
            ModelWarning,
            stacklevel=2,
        )
    elif "prior_shape" in estimated and alpha < _SHAPE_FLOOR:
        warnings.warn(
            f"{func}: the gamma shape estimate collapses towards 0 ({alpha:.3g}); the prior carries "
            "almost no information, so the smoothed ratios are close to the raw ratios. Check for "
            "a few areas with extreme counts.",
            ModelWarning,
            stacklevel=2,
        )
    elif not converged:
        warnings.warn(
            f"{func}: the maximum-likelihood fit of the gamma prior did not converge "
            f"(shape {alpha:.4g}, mean {mu:.4g}); treat the smoothed ratios with caution.",
            ModelWarning,
            stacklevel=2,
        )
    raw = y / e
    lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2
    if math.isinf(alpha):
        nu = math.inf
        w = np.zeros_like(e)
        mean = np.full_like(e, mu)
        low = high = mean
        p_above = np.full_like(e, 1.0 if mu > threshold else 0.0)
        ll = float(np.sum(stats.poisson.logpmf(y, mu * e)))
    else:
        nu = alpha / mu
        shape = alpha + y
        rate = nu + e
        w = e / rate
        mean = shape / rate
        degenerate = shape == 0  # prior_shape = 0 and y = 0: posterior is a point mass at 0
        safe = np.where(degenerate, 1.0, shape)
        low = np.where(degenerate, 0.0, stats.gamma.ppf(lo_q, safe, scale=1.0 / rate))
        high = np.where(degenerate, 0.0, stats.gamma.ppf(hi_q, safe, scale=1.0 / rate))
        p_above = np.where(degenerate, 0.0, stats.gamma.sf(threshold, safe, scale=1.0 / rate))
        ll = _nb_loglik(alpha, nu, y, e) if alpha > 0 else math.nan

    def full(x):
        out = np.full(d.index.size, np.nan)
        out[v] = x
        return out

    return PoissonGammaResult(
        index=d.index,
        observed=d.counts_given,
        expected=d.denominators,
        prior_mean=float(mu),
        prior_shape=float(alpha),
        prior_rate=float(nu),
        raw_ratio=full(raw),
        rr_mean=full(mean),
        rr_low=full(low),
        rr_high=full(high),
        p_above_threshold=full(p_above),
        raw_weight=full(w),
        threshold=threshold,
        level=level,
        estimated=estimated,
        log_likelihood=ll,
        converged=converged,
        excluded=d.excluded,
    )


# =============================================================== diagnostics
def _values(x, name: str, func: str) -> tuple[np.ndarray, pd.Index | None]:
    arr, index = _as_vector(x, name, func)
    return arr, index


def shrinkage_table(raw, smoothed, *, weight=None) -> pd.DataFrame:
    """How far each area moved from its raw value to its smoothed value.

    Parameters
    ----------
    raw, smoothed : array-like or pandas.Series, shape (n,)
        Raw and smoothed values (rates or ratios) for the same areas, e.g.
        ``SmoothedRates.raw_rate`` and ``.smoothed_rate``, or a standardized
        ratio and a model's posterior mean.
    weight : array-like, optional
        Weight on the raw value (``raw_weight`` of a result), copied into the table.

    Returns
    -------
    pandas.DataFrame
        Index from ``raw`` (or ``smoothed``) when a Series, else 0..n-1. Columns
        raw, smoothed, shift (smoothed - raw), relative_shift (shift / raw; NaN
        where raw is 0), and raw_weight when given.

    Examples
    --------
    >>> shrinkage_table([0.5, 2.0], [0.8, 1.5])["relative_shift"].round(2).tolist()
    [0.6, -0.25]
    """
    func = "shrinkage_table"
    r, ir = _values(raw, "raw", func)
    s, is_ = _values(smoothed, "smoothed", func)
    if r.size != s.size:
        raise InputError(f"'raw' has {r.size} values but 'smoothed' has {s.size}; {func} needs pairs.")
    index = ir if ir is not None else (is_ if is_ is not None else pd.RangeIndex(r.size))
    if ir is not None and is_ is not None and not ir.equals(is_):
        raise InputError(f"'raw' and 'smoothed' passed to {func} have different indexes; align them first.")
    shift, rel = _shift(r, s)
    out = pd.DataFrame({"raw": r, "smoothed": s, "shift": shift, "relative_shift": rel}, index=index)
    if weight is not None:
        w, _ = _values(weight, "weight", func)
        if w.size != r.size:
            raise InputError(f"'weight' has {w.size} values but 'raw' has {r.size}.")
        out["raw_weight"] = w
    return out


def class_changes(raw, smoothed, breaks: Sequence[float]) -> pd.DataFrame:
    """Which areas change map class when the smoothed value replaces the raw one.

    Parameters
    ----------
    raw, smoothed : array-like or pandas.Series, shape (n,)
        Raw and smoothed values for the same areas.
    breaks : sequence of float
        Strictly increasing cut points b_1 < ... < b_k. Class 0 is x < b_1,
        class j is b_j <= x < b_(j+1), class k is x >= b_k.

    Returns
    -------
    pandas.DataFrame
        Columns raw, smoothed, raw_class, smoothed_class (nullable integers;
        missing where the value is NaN), class_step (smoothed_class -
        raw_class) and changed (True when the classes differ; False when
        either is missing).

    Notes
    -----
    Areas that move class are where the smoothed and the raw map tell
    different stories; with empirical Bayes these are mostly small areas
    whose extreme raw values were driven by one or two cases.

    Examples
    --------
    >>> t = class_changes([0.5, 1.3, 2.4], [0.9, 1.2, 1.4], breaks=[0.8, 1.25, 2.0])
    >>> t["changed"].tolist()
    [True, True, True]
    >>> t["class_step"].tolist()
    [1, -1, -1]
    """
    func = "class_changes"
    try:
        b = np.asarray(breaks, dtype=float)
    except (TypeError, ValueError):
        raise ParameterError(
            f"The 'breaks' parameter of {func} must be a sequence of numbers. Got {breaks!r} instead."
        ) from None
    if b.ndim != 1 or b.size == 0 or not np.all(np.isfinite(b)) or np.any(np.diff(b) <= 0):
        raise ParameterError(
            f"The 'breaks' parameter of {func} must be a non-empty, strictly increasing sequence of "
            f"finite numbers. Got {breaks!r} instead."
        )
    t = shrinkage_table(raw, smoothed)

    def classify(x: np.ndarray) -> pd.Series:
        k = np.searchsorted(b, x, side="right")
        return pd.Series(pd.array(np.where(np.isnan(x), pd.NA, k), dtype="Int64"), index=t.index)

    rc = classify(t["raw"].to_numpy())
    sc = classify(t["smoothed"].to_numpy())
    step = sc - rc
    changed = (step != 0).fillna(False).astype(bool)
    return pd.DataFrame(
        {
            "raw": t["raw"],
            "smoothed": t["smoothed"],
            "raw_class": rc,
            "smoothed_class": sc,
            "class_step": step,
            "changed": changed,
        },
        index=t.index,
    )
