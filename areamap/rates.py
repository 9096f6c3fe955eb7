"""Expected counts, standardized ratios and rates with exact intervals.

Everything here is vectorised over areas (and, where it makes sense, weeks):
inputs are 1-D per-area arrays/Series or 2-D areas x age-group tables
(DataFrames whose columns are the age groups, or arrays). Per-area outputs
keep the input's index and row order.

Cautions that apply to every function in this module:

* Ratios and rates from small counts are unstable; an area with 1 case and
  0.2 expected has a ratio of 5 with an interval from about 0.1 to 28. Read
  the interval, not the point estimate, and consider the smoothing methods.
* Each interval is for one area on its own. With many areas, some intervals
  will exclude 1 by chance alone.
* Area rates describe areas, not the people in them (ecological fallacy).
* Counts below the bulletin's suppression threshold may identify people;
  they are computed here but must not be published as they are.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import special, stats

from ._params import check_choice, check_interval, check_positive_int
from .errors import DataWarning, InputError, format_examples

__all__ = [
    "expected_counts",
    "poisson_interval",
    "standardized_ratio",
    "crude_rate",
    "direct_standardized_rate",
    "rolling_window_sum",
    "RatioResult",
    "RateResult",
    "DirectRateResult",
]

_INTERVAL_METHODS = ("exact", "mid-p")


# ----------------------------------------------------------------- helpers
def _labels(index: pd.Index | None, positions: np.ndarray) -> list:
    return list(index[positions]) if index is not None else [f"row {p}" for p in positions]


def _as_table(x, name: str) -> tuple[np.ndarray, pd.Index | None, pd.Index | None]:
    """2-D float array (areas x groups), plus row index and column labels when known."""
    if isinstance(x, pd.DataFrame):
        values, index, columns = x.to_numpy(), x.index, x.columns
    elif isinstance(x, pd.Series):
        values, index, columns = x.to_numpy()[:, None], x.index, None
    else:
        values, index, columns = np.asarray(x), None, None
        if values.ndim == 1:
            values = values[:, None]
    try:
        values = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"The {name} must be numbers; some values are not.") from None
    if values.ndim != 2:
        raise InputError(
            f"The {name} must be a table of areas x age groups (1-D or 2-D); got "
            f"{values.ndim} dimensions."
        )
    _check_counts(values, name, index)
    return values, index, columns


def _check_counts(values: np.ndarray, name: str, index: pd.Index | None) -> None:
    bad_rows = ~np.isfinite(values).reshape(values.shape[0], -1).all(axis=1)
    if bad_rows.any():
        raise InputError(
            f"The {name} have missing or infinite values in {bad_rows.sum()} area(s) "
            f"({format_examples(_labels(index, np.flatnonzero(bad_rows)))}). Fill them "
            "(0 where there were none) or drop those areas."
        )
    neg_rows = (values < 0).reshape(values.shape[0], -1).any(axis=1)
    if neg_rows.any():
        raise InputError(
            f"The {name} have negative values in {neg_rows.sum()} area(s) "
            f"({format_examples(_labels(index, np.flatnonzero(neg_rows)))}). They must be >= 0."
        )


def _align_tables(cases, population, func: str):
    """Check and align cases and population tables; return arrays, index, columns."""
    c, c_idx, c_cols = _as_table(cases, "cases")
    p, p_idx, p_cols = _as_table(population, "population")
    if c_cols is not None and p_cols is not None:
        missing = c_cols.difference(p_cols)
        extra = p_cols.difference(c_cols)
        if len(missing) or len(extra):
            raise InputError(
                f"{func}: the cases and population tables have different age groups "
                f"(only in cases: {format_examples(missing) or 'none'}; only in population: "
                f"{format_examples(extra) or 'none'}). Use the same age groups in both."
            )
        p = p[:, p_cols.get_indexer(c_cols)]
    if c_idx is not None and p_idx is not None and not c_idx.equals(p_idx):
        pos = p_idx.get_indexer(c_idx)
        missing = c_idx[pos < 0]
        extra = p_idx.difference(c_idx)
        if len(missing) or len(extra) or not p_idx.is_unique:
            raise InputError(
                f"{func}: the cases and population tables cover different areas "
                f"(no population for {format_examples(missing) or 'none'}; no cases row for "
                f"{format_examples(extra) or 'none'}). Give one row per area in both, "
                "with 0 where there were no cases."
            )
        p = p[pos]
    if c.shape != p.shape:
        raise InputError(
            f"{func}: cases have shape {c.shape} (areas x age groups) but population has "
            f"shape {p.shape}. Give one row per area and one column per age group in both."
        )
    index = c_idx if c_idx is not None else p_idx
    columns = c_cols if c_cols is not None else p_cols
    return c, p, index, columns


def _by_age_group(values, columns: pd.Index | None, n_groups: int, what: str, *, exact_set: bool) -> np.ndarray:
    """Per-age-group values (Series or array) in the order of ``columns``."""
    if isinstance(values, pd.Series):
        if columns is None:
            if len(values) != n_groups:
                raise InputError(f"Got {len(values)} {what} for {n_groups} age group(s).")
            out = values.to_numpy(dtype=float)
        else:
            by_text = {str(k): v for k, v in values.items()}
            got = [values[c] if c in values.index else by_text.get(str(c), np.nan) for c in columns]
            out = np.asarray(got, dtype=float)
            missing = [c for c, v in zip(columns, got) if pd.isna(v)]
            if missing:
                raise InputError(
                    f"The {what} have no value for age group(s) {format_examples(missing)} "
                    f"(available: {format_examples(values.index, limit=10)}). Add them, "
                    "or group the data into the same age groups."
                )
            if exact_set:
                col_text = {str(c) for c in columns}
                extra = [k for k in values.index if str(k) not in col_text]
                if extra:
                    raise InputError(
                        f"The {what} have age group(s) that are not in the data "
                        f"({format_examples(extra)}). Use the same age groups in both, so "
                        "that the weights cover the whole standard."
                    )
    else:
        out = np.asarray(values, dtype=float).reshape(-1)
        if out.size != n_groups:
            raise InputError(f"Got {out.size} {what} for {n_groups} age group(s).")
    if not np.isfinite(out).all() or (out < 0).any():
        raise InputError(f"The {what} must be finite numbers >= 0; got {format_examples(out)}.")
    return out


def _per_area(values: np.ndarray, index: pd.Index | None, name: str):
    return pd.Series(values, index=index, name=name) if index is not None else values


def _whole_counts(values: np.ndarray, name: str, index: pd.Index | None) -> None:
    frac = values != np.round(values)
    if frac.any():
        pos = np.flatnonzero(frac.reshape(frac.shape[0], -1).any(axis=1) if frac.ndim > 1 else frac)
        raise InputError(
            f"The {name} must be whole numbers of cases; {pos.size} are not "
            f"({format_examples(_labels(index, pos))}). Exact Poisson intervals need counts."
        )


def _alpha(level: float, func: str) -> float:
    return 1.0 - check_interval(level, "level", func, low=0.0, high=1.0)


# ------------------------------------------------------ Poisson intervals
def _exact_limits(o: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Garwood limits via gamma quantiles (chi2.ppf(q, 2o)/2 == gamma.ppf(q, o))."""
    with np.errstate(invalid="ignore"):
        low = np.where(o > 0, stats.gamma.ppf(alpha / 2, np.maximum(o, 1e-300)), 0.0)
    high = stats.gamma.ppf(1 - alpha / 2, o + 1)
    return low, high


def _poisson_pmf(o: np.ndarray, mu: np.ndarray) -> np.ndarray:
    return np.exp(special.xlogy(o, mu) - mu - special.gammaln(o + 1))


def _midp_tail_low(o: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """P(X > o) + P(X = o)/2 for X ~ Poisson(mu); increases with mu."""
    return special.pdtrc(o, mu) + 0.5 * _poisson_pmf(o, mu)


def _midp_tail_high(o: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """P(X < o) + P(X = o)/2 for X ~ Poisson(mu); decreases with mu."""
    below = np.where(o > 0, special.pdtr(np.maximum(o - 1, 0), mu), 0.0)
    return below + 0.5 * _poisson_pmf(o, mu)


def _bisect(fun, target: float, lo: np.ndarray, hi: np.ndarray, *, increasing: bool) -> np.ndarray:
    """Vectorised bisection for fun(mu) == target on brackets [lo, hi]."""
    lo, hi = lo.astype(float).copy(), hi.astype(float).copy()
    for _ in range(200):
        mid = 0.5 * (lo + hi)
        above = fun(mid) > target
        go_left = above if increasing else ~above
        hi = np.where(go_left, mid, hi)
        lo = np.where(go_left, lo, mid)
        if np.all(hi - lo <= 4 * np.finfo(float).eps * np.maximum(hi, 1e-300)):
            break
    return 0.5 * (lo + hi)


def _midp_limits(o: np.ndarray, alpha: float) -> tuple[np.ndarray, np.ndarray]:
    ex_low, ex_high = _exact_limits(o, alpha)
    flat = o.reshape(-1)
    lo_b, hi_b = ex_low.reshape(-1), ex_high.reshape(-1)
    low = np.zeros_like(flat, dtype=float)
    pos = flat > 0
    if pos.any():
        op = flat[pos]
        low[pos] = _bisect(
            lambda m: _midp_tail_low(op, m), alpha / 2, lo_b[pos], hi_b[pos], increasing=True
        )
    high = _bisect(lambda m: _midp_tail_high(flat, m), alpha / 2, np.zeros_like(hi_b), hi_b, increasing=False)
    return low.reshape(o.shape), high.reshape(o.shape)


def _limits(o: np.ndarray, alpha: float, method: str) -> tuple[np.ndarray, np.ndarray]:
    """Exact or mid-p limits, computed once per distinct count (counts repeat a lot)."""
    values, inverse = np.unique(o, return_inverse=True)
    low, high = (_exact_limits if method == "exact" else _midp_limits)(values, alpha)
    return low[inverse].reshape(o.shape), high[inverse].reshape(o.shape)


def poisson_interval(observed, *, level: float = 0.95, method: str = "exact"):
    """Confidence interval for the mean of a Poisson count.

    Parameters
    ----------
    observed : int, array-like or pandas.Series
        Observed counts (whole numbers >= 0), any shape.
    level : float, default=0.95
        Confidence level, in (0, 1).
    method : {"exact", "mid-p"}, default="exact"
        ``"exact"``: Garwood's limits, coverage at least ``level`` for every
        mean. ``"mid-p"``: limits from mid-p tail probabilities, narrower
        and with coverage close to ``level`` on average (sometimes below).

    Returns
    -------
    low, high : float, numpy.ndarray or pandas.Series
        Limits with the shape (and index) of ``observed``. The lower limit
        is 0 when the count is 0.

    Notes
    -----
    With ``alpha = 1 - level`` and observed count ``O``, the exact limits
    (Garwood 1936) are

        low = chi2.ppf(alpha/2, 2 O) / 2   (0 when O = 0),
        high = chi2.ppf(1 - alpha/2, 2 O + 2) / 2,

    i.e. the means at which ``P(X >= O) = alpha/2`` and ``P(X <= O) = alpha/2``.
    The mid-p limits (Lancaster 1961; Miettinen 1974) count only half the
    probability of the observed value:

        low solves  P(X > O | low) + P(X = O | low) / 2 = alpha/2   (0 when O = 0),
        high solves P(X < O | high) + P(X = O | high) / 2 = alpha/2,

    found here by bisection on all counts at once, inside the exact limits
    (mid-p limits always lie inside them). For ``O = 0`` the mid-p upper
    limit is ``-log(alpha)``.

    The interval describes the uncertainty of one count taken on its own; it
    says nothing about other areas and does not allow for multiple testing.

    References
    ----------
    Garwood F (1936). Fiducial limits for the Poisson distribution.
    Biometrika 28:437-442.
    Lancaster HO (1961). Significance tests in discrete distributions.
    JASA 56:223-234.
    Miettinen OS (1974). Comment. JASA 69:380-382.
    Rothman KJ, Greenland S, Lash TL (2008). Modern Epidemiology, 3rd ed.,
    chapter 14 (mid-p limits).

    Examples
    --------
    >>> low, high = poisson_interval(5)
    >>> round(low, 3), round(high, 3)
    (1.623, 11.668)
    >>> low, high = poisson_interval([0, 10], method="mid-p")
    >>> high.round(3).tolist()
    [2.996, 17.825]
    """
    func = "poisson_interval"
    alpha = _alpha(level, func)
    check_choice(method, "method", func, _INTERVAL_METHODS)
    index = observed.index if isinstance(observed, pd.Series) else None
    o = np.asarray(observed.to_numpy() if index is not None else observed, dtype=float)
    flat = o.reshape(-1, 1) if o.ndim else o.reshape(1, 1)
    _check_counts(flat, "observed counts", index)
    _whole_counts(flat.reshape(-1), "observed counts", index)
    low, high = _limits(o, alpha, method)
    if index is not None:
        return pd.Series(low, index=index, name="low"), pd.Series(high, index=index, name="high")
    if o.ndim == 0:
        return float(low), float(high)
    return np.asarray(low, dtype=float), np.asarray(high, dtype=float)


# ------------------------------------------------------- result objects
class _TableResult:
    """Shared notebook display for result dataclasses."""

    def _repr_html_(self) -> str:
        text = self.summary().replace("&", "&amp;").replace("<", "&lt;")
        return f"<pre>{text}</pre>" + self.to_frame().to_html(max_rows=20, float_format="{:.4g}".format)


@dataclass(frozen=True, eq=False)
class RatioResult(_TableResult):
    """Standardized ratios O/E per area with Poisson intervals.

    Attributes
    ----------
    observed, expected, ratio, low, high : numpy.ndarray, shape (n,)
        Counts, expected counts, ``observed / expected`` and interval limits
        (NaN where both counts are 0).
    small_expected : numpy.ndarray of bool, shape (n,)
        ``expected < min_expected``: ratios too unstable to read on their own.
    index : pandas.Index
        Area ids (a RangeIndex when the input had none).
    level : float
    method : str
        ``"exact"`` or ``"mid-p"``.
    min_expected : float
    """

    observed: np.ndarray
    expected: np.ndarray
    ratio: np.ndarray
    low: np.ndarray
    high: np.ndarray
    small_expected: np.ndarray
    index: pd.Index
    level: float
    method: str
    min_expected: float

    def to_frame(self) -> pd.DataFrame:
        """Per-area table: observed, expected, ratio, low, high, small_expected."""
        return pd.DataFrame(
            {
                "observed": self.observed,
                "expected": self.expected,
                "ratio": self.ratio,
                "low": self.low,
                "high": self.high,
                "small_expected": self.small_expected,
            },
            index=self.index,
        )

    def summary(self) -> str:
        """Readable overview: totals, overall ratio, areas whose interval excludes 1."""
        o, e = float(self.observed.sum()), float(self.expected.sum())
        lines = [
            f"Standardized ratios (observed / expected) for {len(self.index)} areas; "
            f"{self.level:.0%} {self.method} Poisson intervals."
        ]
        if e > 0:
            lo, hi = poisson_interval(round(o), level=self.level, method=self.method)
            lines.append(
                f"All areas: observed {o:,.0f}, expected {e:,.1f}, ratio {o / e:.3f} "
                f"({lo / e:.3f} to {hi / e:.3f})."
            )
        with np.errstate(invalid="ignore"):
            above, below = int(np.sum(self.low > 1)), int(np.sum(self.high < 1))
        lines.append(f"Interval entirely above 1: {above} area(s); entirely below 1: {below} area(s).")
        n_small = int(self.small_expected.sum())
        if n_small:
            lines.append(
                f"Expected count below {self.min_expected:g} in {n_small} area(s): their ratios "
                "are unstable; read the interval, not the ratio."
            )
        lines.append(
            "Each interval concerns one area alone; among many areas some exclude 1 by chance."
        )
        return "\n".join(lines)


@dataclass(frozen=True, eq=False)
class RateResult(_TableResult):
    """Crude rates per area with exact Poisson intervals.

    Attributes
    ----------
    cases, population, rate, low, high : numpy.ndarray, shape (n,)
        Rates and limits are per ``per`` people.
    index : pandas.Index
    per : float
    level : float
    """

    cases: np.ndarray
    population: np.ndarray
    rate: np.ndarray
    low: np.ndarray
    high: np.ndarray
    index: pd.Index
    per: float
    level: float

    def to_frame(self) -> pd.DataFrame:
        """Per-area table: cases, population, rate, low, high."""
        return pd.DataFrame(
            {"cases": self.cases, "population": self.population, "rate": self.rate,
             "low": self.low, "high": self.high},
            index=self.index,
        )

    def summary(self) -> str:
        """Readable overview of the crude rates."""
        c, p = float(self.cases.sum()), float(self.population.sum())
        lines = [f"Crude rates per {self.per:,.0f} for {len(self.index)} areas; {self.level:.0%} exact intervals."]
        if p > 0:
            lines.append(f"All areas: {c:,.0f} cases in {p:,.0f} people, rate {self.per * c / p:,.2f}.")
        if len(self.index):
            lines.append(
                f"Area rates range from {np.nanmin(self.rate):,.2f} to {np.nanmax(self.rate):,.2f}; "
                "small populations give the extremes."
            )
        return "\n".join(lines)


@dataclass(frozen=True, eq=False)
class DirectRateResult(_TableResult):
    """Directly age-standardized rates per area with Fay-Feuer gamma intervals.

    Attributes
    ----------
    cases, population : numpy.ndarray, shape (n,)
        Totals over age groups.
    crude_rate, rate, low, high : numpy.ndarray, shape (n,)
        Crude rate, standardized rate and its limits, per ``per`` people
        (NaN for areas with no population in an age group of the standard).
    weights : pandas.Series
        Share of the standard population in each age group (sums to 1).
    index : pandas.Index
    per, level : float
    """

    cases: np.ndarray
    population: np.ndarray
    crude_rate: np.ndarray
    rate: np.ndarray
    low: np.ndarray
    high: np.ndarray
    weights: pd.Series
    index: pd.Index
    per: float
    level: float

    def to_frame(self) -> pd.DataFrame:
        """Per-area table: cases, population, crude_rate, rate, low, high."""
        return pd.DataFrame(
            {"cases": self.cases, "population": self.population, "crude_rate": self.crude_rate,
             "rate": self.rate, "low": self.low, "high": self.high},
            index=self.index,
        )

    def summary(self) -> str:
        """Readable overview of the standardized rates."""
        lines = [
            f"Directly age-standardized rates per {self.per:,.0f} for {len(self.index)} areas "
            f"({len(self.weights)} age groups); {self.level:.0%} gamma intervals (Fay & Feuer).",
        ]
        n_nan = int(np.isnan(self.rate).sum())
        if n_nan:
            lines.append(f"{n_nan} area(s) have no rate: no population in some age group.")
        lines.append(
            "Standardized rates compare areas as if they had the standard's age structure; "
            "they are not the rates their residents experience."
        )
        return "\n".join(lines)


# ------------------------------------------------------------ functions
def expected_counts(cases, population, *, reference_rates=None):
    """Expected counts by indirect age standardization.

    Parameters
    ----------
    cases : DataFrame, array-like or None, shape (n_areas, n_age_groups)
        Observed cases per area (rows) and age group (columns). A 1-D input
        is one age group. Only used for the internal reference (may be None
        when ``reference_rates`` is given).
    population : DataFrame or array-like, same shape
        People at risk per area and age group; DataFrame columns are matched
        to the cases' columns by label, rows by index.
    reference_rates : pandas.Series or array-like, optional
        Rate per person in each age group (e.g. from
        :func:`areamap.intake.read_reference_rates`; a Series is matched to the age groups
        by label). Default: the study's own rates (internal reference).

    Returns
    -------
    pandas.Series or numpy.ndarray, shape (n_areas,)
        Expected counts, named ``"expected"``; a Series with the areas'
        index when an input had one.

    Raises
    ------
    InputError
        Negative or missing values, mismatched tables, an age group with no
        population (internal reference), or reference rates missing an age
        group.

    Notes
    -----
    With ``c_ia`` cases and ``n_ia`` people in area ``i`` and age group
    ``a``, the reference rate is ``r_a = sum_i c_ia / sum_i n_ia`` (internal)
    or given (external), and

        E_i = sum_a n_ia r_a.

    With the internal reference, ``sum_i E_i = sum_i O_i`` (also within each
    age group), so the overall ratio is 1 by construction: areas are
    compared with the study region, not with an outside standard.

    References
    ----------
    Breslow NE, Day NE (1987). Statistical Methods in Cancer Research, vol.
    II, chapter 2. IARC Scientific Publications 82.

    Examples
    --------
    >>> cases = pd.DataFrame({"0-39": [2, 6], "40+": [8, 4]}, index=["A", "B"])
    >>> pop = pd.DataFrame({"0-39": [1000, 3000], "40+": [1000, 1000]}, index=["A", "B"])
    >>> expected_counts(cases, pop).round(2).tolist()
    [8.0, 12.0]
    """
    func = "expected_counts"
    if cases is None:
        if reference_rates is None:
            raise InputError("expected_counts needs cases for the internal reference; got None.")
        p, index, columns = _as_table(population, "population")
        c = None
    else:
        c, p, index, columns = _align_tables(cases, population, func)
    if reference_rates is None:
        totals = p.sum(axis=0)
        empty = np.flatnonzero(totals <= 0)
        if empty.size:
            names = list(columns[empty]) if columns is not None else [f"column {j}" for j in empty]
            raise InputError(
                f"Age group(s) {format_examples(names)} have no population in any area, so "
                "their rate is undefined. Remove or merge them, or give reference_rates."
            )
        rates = c.sum(axis=0) / totals
    else:
        rates = _by_age_group(reference_rates, columns, p.shape[1], "reference rates", exact_set=False)
    return _per_area(p @ rates, index, "expected")


def standardized_ratio(
    observed,
    expected,
    *,
    level: float = 0.95,
    method: str = "exact",
    min_expected: float = 5.0,
) -> RatioResult:
    """Standardized ratio observed / expected per area, with a Poisson interval.

    Parameters
    ----------
    observed : array-like or pandas.Series, shape (n,)
        Observed counts (whole numbers >= 0).
    expected : array-like or pandas.Series, shape (n,)
        Expected counts (>= 0), e.g. from :func:`expected_counts`. Series are
        matched by index.
    level : float, default=0.95
    method : {"exact", "mid-p"}, default="exact"
        Interval for the Poisson mean, see :func:`poisson_interval`.
    min_expected : float, default=5.0
        Areas with ``expected < min_expected`` are marked in
        ``small_expected``.

    Returns
    -------
    RatioResult

    Raises
    ------
    InputError
        Negative, missing or fractional counts; mismatched areas; expected 0
        where cases were observed.

    Warns
    -----
    DataWarning
        When areas have 0 observed and 0 expected (ratio undefined, NaN).

    Notes
    -----
    ``ratio = O / E``; limits are the Poisson limits for ``O`` divided by
    ``E``, treating ``E`` as known (its own sampling error is ignored, which
    is reasonable when the reference rates come from a much larger
    population). Common practice treats ratios with an expected count below
    about 5 as too unstable to interpret on their own (some producers use
    10); ``small_expected`` marks them. Publishing small observed counts is a
    separate, disclosure question.

    References
    ----------
    Breslow NE, Day NE (1987). Statistical Methods in Cancer Research, vol.
    II, chapter 2.
    Garwood F (1936). Biometrika 28:437-442.

    Examples
    --------
    >>> r = standardized_ratio([5, 0], [2.5, 1.0])
    >>> r.ratio.tolist()
    [2.0, 0.0]
    >>> r.low.round(3).tolist(), r.high.round(3).tolist()
    ([0.649, 0.0], [4.667, 3.689])
    """
    func = "standardized_ratio"
    alpha = _alpha(level, func)
    check_choice(method, "method", func, _INTERVAL_METHODS)
    min_expected = check_interval(min_expected, "min_expected", func, low=0.0, closed="left")
    o, o_idx, _ = _as_table(observed, "observed counts")
    e, e_idx, _ = _as_table(expected, "expected counts")
    if o.shape[1] != 1 or e.shape[1] != 1:
        raise InputError("standardized_ratio needs one observed and one expected count per area (1-D).")
    o, e = o[:, 0], e[:, 0]
    if o_idx is not None and e_idx is not None and not o_idx.equals(e_idx):
        pos = e_idx.get_indexer(o_idx)
        if (pos < 0).any() or len(o_idx) != len(e_idx) or not e_idx.is_unique:
            raise InputError(
                "standardized_ratio: observed and expected cover different areas "
                f"(no expected for {format_examples(o_idx[pos < 0]) or 'none'}). "
                "Give both for the same areas."
            )
        e = e[pos]
    if o.shape != e.shape:
        raise InputError(f"Got {o.size} observed counts but {e.size} expected counts.")
    index = o_idx if o_idx is not None else (e_idx if e_idx is not None else pd.RangeIndex(o.size))
    _whole_counts(o, "observed counts", index)
    impossible = (e == 0) & (o > 0)
    if impossible.any():
        raise InputError(
            f"{impossible.sum()} area(s) have cases but an expected count of 0 "
            f"({format_examples(index[impossible])}): the ratio would be infinite. Check "
            "their population (0 people at risk?) and the reference rates."
        )
    empty = (e == 0) & (o == 0)
    if empty.any():
        warnings.warn(
            f"{empty.sum()} area(s) have 0 observed and 0 expected cases "
            f"({format_examples(index[empty])}); their ratio is undefined (NaN).",
            DataWarning,
            stacklevel=2,
        )
    low_o, high_o = _limits(o, alpha, method)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(e > 0, o / e, np.nan)
        low = np.where(e > 0, low_o / e, np.nan)
        high = np.where(e > 0, high_o / e, np.nan)
    return RatioResult(
        observed=o, expected=e, ratio=ratio, low=low, high=high,
        small_expected=e < min_expected, index=index, level=1 - alpha, method=method,
        min_expected=min_expected,
    )


def _totals(x, name: str) -> tuple[np.ndarray, pd.Index | None]:
    values, index, _ = _as_table(x, name)
    return values.sum(axis=1), index


def crude_rate(cases, population, *, per: float = 100_000, level: float = 0.95) -> RateResult:
    """Crude rate per area (cases per ``per`` people) with an exact Poisson interval.

    Parameters
    ----------
    cases, population : array-like, Series or DataFrame
        Per area (1-D), or areas x age groups (2-D, summed over age groups).
    per : float, default=100_000
        Rates are expressed per this many people.
    level : float, default=0.95

    Returns
    -------
    RateResult

    Raises
    ------
    InputError
        Negative, missing or fractional counts, mismatched tables, or cases
        in an area with no population.

    Warns
    -----
    DataWarning
        For areas with no cases and no population (rate NaN).

    Notes
    -----
    ``rate = per * c / n`` with limits ``per * L / n`` and ``per * U / n``
    where ``(L, U)`` is the exact Poisson interval for ``c`` (Garwood 1936).
    Crude rates mix age structure with risk; compare areas with
    :func:`direct_standardized_rate` or standardized ratios instead.

    References
    ----------
    Garwood F (1936). Biometrika 28:437-442.

    Examples
    --------
    >>> r = crude_rate([3, 0], [20_000, 5_000])
    >>> r.rate.tolist()
    [15.0, 0.0]
    >>> r.low.tolist()[1]
    0.0
    """
    func = "crude_rate"
    alpha = _alpha(level, func)
    per = check_interval(per, "per", func, low=0.0)
    c, p, index, _ = _align_tables(cases, population, func)
    c, p = c.sum(axis=1), p.sum(axis=1)
    index = index if index is not None else pd.RangeIndex(c.size)
    _whole_counts(c, "cases", index)
    _check_zero_population(c, p, index, func)
    lo_c, hi_c = _limits(c, alpha, "exact")
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = np.where(p > 0, per * c / p, np.nan)
        low = np.where(p > 0, per * lo_c / p, np.nan)
        high = np.where(p > 0, per * hi_c / p, np.nan)
    return RateResult(cases=c, population=p, rate=rate, low=low, high=high, index=index,
                      per=per, level=1 - alpha)


def _check_zero_population(c: np.ndarray, p: np.ndarray, index: pd.Index, func: str) -> None:
    bad = (p == 0) & (c > 0)
    if bad.any():
        raise InputError(
            f"{func}: {bad.sum()} area(s) have cases but no population "
            f"({format_examples(index[bad])}). Check the population table."
        )
    empty = (p == 0) & (c == 0)
    if empty.any():
        warnings.warn(
            f"{empty.sum()} area(s) have no population and no cases "
            f"({format_examples(index[empty])}); their rate is undefined (NaN).",
            DataWarning,
            stacklevel=3,
        )


def direct_standardized_rate(
    cases,
    population,
    standard_population,
    *,
    per: float = 100_000,
    level: float = 0.95,
) -> DirectRateResult:
    """Directly age-standardized rate per area with the Fay-Feuer gamma interval.

    Parameters
    ----------
    cases, population : DataFrame or array-like, shape (n_areas, n_age_groups)
        Cases and people at risk per area and age group.
    standard_population : pandas.Series or array-like, shape (n_age_groups,)
        Standard population by age group (any scale; only the shares
        matter). A Series is matched to the age-group columns by label and
        must cover exactly the same age groups.
    per : float, default=100_000
    level : float, default=0.95

    Returns
    -------
    DirectRateResult

    Raises
    ------
    InputError
        Bad or mismatched tables, cases where the population is 0, or a
        standard population summing to 0.

    Warns
    -----
    DataWarning
        For areas with no population in an age group that has standard
        weight (their standardized rate is undefined: NaN).

    Notes
    -----
    With standard shares ``w_a`` (summing to 1),

        y = sum_a w_a c_a / n_a,      v = sum_a w_a^2 c_a / n_a^2,
        w_M = max_a w_a / n_a.

    Fay & Feuer (1997) approximate the distribution of the rate by gamma
    distributions, giving

        low  = v / y * G^{-1}(alpha/2; y^2 / v)             (0 when y = 0),
        high = (v + w_M^2) / (y + w_M) * G^{-1}(1 - alpha/2; (y + w_M)^2 / (v + w_M^2)),

    where ``G^{-1}(q; s)`` is the quantile of a gamma distribution with shape
    ``s`` and scale 1. With a single age group the limits reduce to the
    exact Poisson limits divided by the population; their coverage is at
    least nominal in the authors' simulations, conservative for small counts.

    References
    ----------
    Fay MP, Feuer EJ (1997). Confidence intervals for directly standardized
    rates: a method based on the gamma distribution. Statistics in Medicine
    16:791-801.

    Examples
    --------
    >>> cases = np.array([[1, 4], [0, 0]])
    >>> pop = np.array([[1000, 2000], [500, 500]])
    >>> r = direct_standardized_rate(cases, pop, [0.5, 0.5], per=1000)
    >>> r.rate.round(3).tolist()
    [1.5, 0.0]
    >>> float(r.low[1])
    0.0
    """
    func = "direct_standardized_rate"
    alpha = _alpha(level, func)
    per = check_interval(per, "per", func, low=0.0)
    c, p, index, columns = _align_tables(cases, population, func)
    index = index if index is not None else pd.RangeIndex(c.shape[0])
    _whole_counts(c, "cases", index)
    std = _by_age_group(standard_population, columns, c.shape[1], "standard population", exact_set=True)
    if std.sum() <= 0:
        raise InputError("The standard population sums to 0; give people per age group.")
    w = std / std.sum()
    bad = ((p == 0) & (c > 0)).any(axis=1)
    if bad.any():
        raise InputError(
            f"{func}: {bad.sum()} area(s) have cases in an age group with no population "
            f"({format_examples(index[bad])}). Check the population table."
        )
    undefined = ((p == 0) & (w > 0)).any(axis=1)
    if undefined.any():
        warnings.warn(
            f"{undefined.sum()} area(s) have no population in an age group of the standard "
            f"({format_examples(index[undefined])}); their standardized rate is undefined "
            "(NaN). Merge age groups or use standardized ratios for them.",
            DataWarning,
            stacklevel=2,
        )
    with np.errstate(divide="ignore", invalid="ignore"):
        wn = np.where(p > 0, w / p, 0.0)  # w_a / n_a
        y = (wn * c).sum(axis=1)
        v = (wn**2 * c).sum(axis=1)
        w_m = wn.max(axis=1)
        low = np.where(y > 0, v / y * stats.gamma.ppf(alpha / 2, y**2 / np.where(v > 0, v, 1.0)), 0.0)
        high = (v + w_m**2) / (y + w_m) * stats.gamma.ppf(1 - alpha / 2, (y + w_m) ** 2 / (v + w_m**2))
        tot_c, tot_p = c.sum(axis=1), p.sum(axis=1)
        crude = np.where(tot_p > 0, per * tot_c / tot_p, np.nan)
    nan = np.full(y.shape, np.nan)
    return DirectRateResult(
        cases=tot_c, population=tot_p, crude_rate=crude,
        rate=np.where(undefined, nan, per * y), low=np.where(undefined, nan, per * low),
        high=np.where(undefined, nan, per * high),
        weights=pd.Series(w, index=columns, name="weight"), index=index, per=per, level=1 - alpha,
    )


# ------------------------------------------------------------ week cubes
def rolling_window_sum(counts, window: int, *, axis: int = 0):
    """Sum of counts over the last ``window`` periods, for every period at once.

    Parameters
    ----------
    counts : array-like or DataFrame
        Counts with time along ``axis`` (e.g. weeks x areas, or weeks x
        areas x age groups). A DataFrame has weeks as rows.
    window : int
        Number of periods summed, ending at (and including) each period. The
        first ``window - 1`` periods sum what is available.
    axis : int, default=0
        Time axis of an array.

    Returns
    -------
    numpy.ndarray or DataFrame
        Same shape (and labels) as ``counts``.

    Examples
    --------
    >>> rolling_window_sum([[1, 0], [2, 1], [3, 5]], 2).tolist()
    [[1.0, 0.0], [3.0, 1.0], [5.0, 6.0]]
    """
    window = check_positive_int(window, "window", "rolling_window_sum")
    frame = counts if isinstance(counts, pd.DataFrame) else None
    x = np.asarray(frame.to_numpy() if frame is not None else counts, dtype=float)
    ax = 0 if frame is not None else axis
    csum = np.cumsum(x, axis=ax)
    shifted = np.zeros_like(csum)
    n = x.shape[ax]
    if window < n:
        src = [slice(None)] * x.ndim
        dst = [slice(None)] * x.ndim
        src[ax] = slice(0, n - window)
        dst[ax] = slice(window, n)
        shifted[tuple(dst)] = csum[tuple(src)]
    out = csum - shifted
    if frame is not None:
        return pd.DataFrame(out, index=frame.index, columns=frame.columns)
    return out
