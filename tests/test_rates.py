"""Expected counts, Poisson intervals, standardized ratios and rates, checked against outside references."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from areamap.errors import DataWarning, InputError, ParameterError
from areamap.rates import (
    crude_rate,
    direct_standardized_rate,
    expected_counts,
    poisson_interval,
    rolling_window_sum,
    standardized_ratio,
)

# --------------------------------------------------------------------------- fixtures

AGES = ["0-14", "15-44", "45-64", "65+"]


@pytest.fixture
def tables(rng) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Invented areas x age-group cases and population (20 areas, 4 age groups)."""
    ids = pd.Index([f"D{i:02d}" for i in range(20)], name="area_id")
    pop = pd.DataFrame(rng.integers(200, 20_000, (20, 4)), index=ids, columns=AGES).astype(float)
    risk = np.array([2e-4, 5e-4, 1e-3, 4e-3])
    cases = pd.DataFrame(rng.poisson(pop.to_numpy() * risk), index=ids, columns=AGES).astype(float)
    return cases, pop


# ---------------------------------------------------------------- exact Poisson limits

# Exact 95% limits for a Poisson count, as tabulated to 3 decimals in handbook tables
# derived from Garwood (1936) (from memory).
GARWOOD_95 = [
    (0, 0.0, 3.689),
    (1, 0.025, 5.572),
    (2, 0.242, 7.225),
    (5, 1.623, 11.668),
    (10, 4.795, 18.390),
    (20, 12.217, 30.888),
]


@pytest.mark.parametrize(("o", "low", "high"), GARWOOD_95)
def test_exact_limits_match_tabulated_values(o, low, high):
    got = poisson_interval(o)
    # the table is rounded to 3 decimals and recalled from memory: allow one unit in the last place
    np.testing.assert_allclose(got, (low, high), atol=1.01e-3)


@pytest.mark.parametrize("level", [0.8, 0.9, 0.95, 0.99, 0.999])
def test_exact_limits_equal_chi_square_quantiles(level):
    """Garwood (1936): low = chi2.ppf(a/2, 2O)/2, high = chi2.ppf(1 - a/2, 2O + 2)/2 (scipy reference)."""
    o = np.arange(0, 400)
    a = 1 - level
    low, high = poisson_interval(o, level=level)
    with np.errstate(invalid="ignore"):
        ref_low = np.where(o > 0, stats.chi2.ppf(a / 2, 2 * o) / 2, 0.0)
    ref_high = stats.chi2.ppf(1 - a / 2, 2 * o + 2) / 2
    # two routes through scipy's incomplete-gamma inverse: agree to rounding
    np.testing.assert_allclose(low, ref_low, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(high, ref_high, rtol=1e-10)


@pytest.mark.parametrize("o", [1, 3, 8, 25, 120])
def test_exact_limits_tail_definition(o):
    """At the limits P(X >= O | low) = a/2 and P(X <= O | high) = a/2 (definition, Garwood 1936)."""
    low, high = poisson_interval(o, level=0.95)
    # solved quantiles: agreement to near machine precision of the tail functions
    np.testing.assert_allclose(stats.poisson.sf(o - 1, low), 0.025, rtol=1e-8)
    np.testing.assert_allclose(stats.poisson.cdf(o, high), 0.025, rtol=1e-8)


# ------------------------------------------------------------------ mid-p limits


@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_midp_tail_identity_holds_at_solved_limits(level):
    """Mid-p definition (Lancaster 1961; Rothman & Greenland, Modern Epidemiology):
    P(X > O | low) + P(X = O | low)/2 = a/2 and P(X < O | high) + P(X = O | high)/2 = a/2."""
    o = np.arange(0, 300)
    a = 1 - level
    low, high = poisson_interval(o, level=level, method="mid-p")
    pos = o > 0
    lower_tail = stats.poisson.sf(o[pos], low[pos]) + 0.5 * stats.poisson.pmf(o[pos], low[pos])
    upper_tail = stats.poisson.cdf(o - 1, high) + 0.5 * stats.poisson.pmf(o, high)
    # bisection to ~1e-15 relative in the limit; tail probabilities then agree to ~1e-12
    np.testing.assert_allclose(lower_tail, a / 2, atol=1e-10)
    np.testing.assert_allclose(upper_tail, a / 2, atol=1e-10)
    assert low[0] == 0.0


@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_midp_upper_limit_for_zero_is_minus_log_alpha(level):
    # P(X = 0 | U)/2 = a/2  =>  U = -log(a)  (analytic, from the mid-p definition)
    _, high = poisson_interval(0, level=level, method="mid-p")
    np.testing.assert_allclose(high, -np.log(1 - level), rtol=1e-12)  # root found to machine precision


@pytest.mark.parametrize("o", [1, 2, 4, 10, 50])
def test_midp_limits_match_statsmodels(o):
    """statsmodels.stats.rates.confint_poisson(method='midp-c') as the reference library."""
    from statsmodels.stats.rates import confint_poisson

    ref = confint_poisson(o, 1, method="midp-c", alpha=0.05)
    # statsmodels solves with a general-purpose optimiser (~1e-8 relative)
    np.testing.assert_allclose(poisson_interval(o, method="mid-p"), ref, rtol=1e-6)


@pytest.mark.parametrize("o", [0, 1, 3, 10, 50])
def test_exact_limits_match_statsmodels(o):
    """statsmodels.stats.rates.confint_poisson(method='exact-c') (Garwood) as the reference library."""
    from statsmodels.stats.rates import confint_poisson

    ref = confint_poisson(o, 1, method="exact-c", alpha=0.05)
    np.testing.assert_allclose(poisson_interval(o), np.nan_to_num(ref), rtol=1e-9)  # same closed form


def test_midp_narrower_than_exact():
    o = np.arange(0, 200)
    lo_e, hi_e = poisson_interval(o)
    lo_m, hi_m = poisson_interval(o, method="mid-p")
    assert np.all(hi_m - lo_m < hi_e - lo_e)


# ---------------------------------------------------------------- property tests

counts = st.integers(min_value=0, max_value=5_000)
levels = st.floats(min_value=0.5, max_value=0.999)
methods = st.sampled_from(["exact", "mid-p"])


@settings(max_examples=60, deadline=None)
@given(o=counts, level=levels, method=methods)
def test_limits_bracket_the_count_and_increase_with_it(o, level, method):
    low, high = poisson_interval(np.array([o, o + 1]), level=level, method=method)
    assert 0.0 <= low[0] <= o <= high[0]
    assert low[1] > low[0] and high[1] > high[0]


@settings(max_examples=60, deadline=None)
@given(o=counts, level=levels)
def test_midp_nested_inside_exact(o, level):
    lo_e, hi_e = poisson_interval(o, level=level)
    lo_m, hi_m = poisson_interval(o, level=level, method="mid-p")
    assert lo_e <= lo_m and hi_m <= hi_e


@settings(max_examples=30, deadline=None)
@given(o=st.integers(0, 200), lo_level=st.floats(0.5, 0.95), step=st.floats(0.01, 0.04))
def test_higher_level_gives_wider_interval(o, lo_level, step):
    lo1, hi1 = poisson_interval(o, level=lo_level)
    lo2, hi2 = poisson_interval(o, level=lo_level + step)
    assert lo2 <= lo1 and hi2 > hi1


@pytest.mark.parametrize("mean", [0.3, 1.0, 2.5, 7.7, 20.0, 64.0])
@pytest.mark.parametrize("level", [0.9, 0.95])
def test_exact_interval_coverage_at_least_nominal(mean, level):
    """Exact coverage sum_x pmf(x; mu) 1[low(x) <= mu <= high(x)] >= level (Garwood 1936 guarantee)."""
    x = np.arange(0, int(mean + 20 * np.sqrt(mean) + 40))  # tail beyond this has probability < 1e-15
    low, high = poisson_interval(x, level=level)
    coverage = stats.poisson.pmf(x, mean)[(low <= mean) & (mean <= high)].sum()
    assert coverage >= level


# ---------------------------------------------------------- interval inputs / outputs


def test_interval_keeps_series_index_and_scalars_give_floats():
    s = pd.Series([0, 3], index=pd.Index(["A", "B"], name="area_id"))
    low, high = poisson_interval(s)
    assert list(low.index) == ["A", "B"] and low.name == "low" and high.name == "high"
    lo, hi = poisson_interval(3)
    assert isinstance(lo, float) and isinstance(hi, float)


@pytest.mark.parametrize(
    ("observed", "kwargs", "error", "match"),
    [
        ([1, -2], {}, InputError, "negative values"),
        ([1.5], {}, InputError, "whole numbers"),
        ([np.nan], {}, InputError, "missing or infinite"),
        ([1], {"level": 1.5}, ParameterError, r"The 'level' parameter of poisson_interval must be in \(0, 1\)"),
        ([1], {"method": "wald"}, ParameterError, "The 'method' parameter of poisson_interval must be one of"),
    ],
)
def test_interval_input_errors(observed, kwargs, error, match):
    with pytest.raises(error, match=match):
        poisson_interval(observed, **kwargs)


# ---------------------------------------------------------------- expected counts


def test_internal_standardization_reproduces_totals_overall_and_by_age(tables):
    """Indirect standardization with internal rates: sum E = sum O, also within each age group (common practice)."""
    cases, pop = tables
    e = expected_counts(cases, pop)
    # float sums of ~20 terms: relative rounding ~1e-15
    np.testing.assert_allclose(e.sum(), cases.to_numpy().sum(), rtol=1e-12)
    for age in AGES:
        np.testing.assert_allclose(expected_counts(cases[[age]], pop[[age]]).sum(), cases[age].sum(), rtol=1e-12)


def test_expected_counts_formula(tables):
    """E_i = sum_a n_ia r_a with r_a = sum_i c_ia / sum_i n_ia (Breslow & Day 1987, ch. 2), computed with pandas."""
    cases, pop = tables
    ref = (pop * (cases.sum() / pop.sum())).sum(axis=1)
    e = expected_counts(cases, pop)
    assert e.name == "expected" and e.index.equals(cases.index)
    np.testing.assert_allclose(e, ref, rtol=1e-12)  # same arithmetic, different order


def test_rescaling_population_leaves_expected_unchanged(tables):
    """Invariance: rates are cases per person, so multiplying every population by k cancels."""
    cases, pop = tables
    np.testing.assert_allclose(expected_counts(cases, pop * 37.5), expected_counts(cases, pop), rtol=1e-12)


def test_expected_follows_area_order_and_column_labels(tables, rng):
    cases, pop = tables
    perm = rng.permutation(len(pop))
    shuffled = pop.iloc[perm][AGES[::-1]]  # rows and columns in another order
    e = expected_counts(cases, shuffled)
    assert e.index.equals(cases.index)
    np.testing.assert_allclose(e, expected_counts(cases, pop), rtol=1e-12)


def test_expected_with_plain_arrays_returns_array(tables):
    cases, pop = tables
    e = expected_counts(cases.to_numpy(), pop.to_numpy())
    assert isinstance(e, np.ndarray)
    np.testing.assert_allclose(e, expected_counts(cases, pop).to_numpy(), rtol=1e-12)


def test_expected_single_group_matches_nc_overall_rate(nc_expected_1974, nc):
    """One age group: E_i = births_i * total deaths / total births (fixture built the common-practice way)."""
    births = pd.Series(nc["BIR74"].to_numpy(float), index=nc["FIPS"])
    deaths = pd.Series(nc["SID74"].to_numpy(float), index=nc["FIPS"])
    np.testing.assert_allclose(expected_counts(deaths, births), nc_expected_1974["expected"], rtol=1e-12)


def test_external_reference_rates_from_csv(tables, tmp_path):
    from areamap.intake import read_reference_rates

    cases, pop = tables
    f = tmp_path / "rates.csv"
    f.write_text("age_band,rate_per_100k\n65+,400\n0-14,20\n15-44,50\n45-64,100\n85+,900\n")
    rates = read_reference_rates(f, age_column="age_band", rates_column="rate_per_100k")
    e = expected_counts(cases, pop, reference_rates=rates)
    ref = pop @ np.array([20, 50, 100, 400]) / 100_000  # matched by label; unused extra group ignored
    np.testing.assert_allclose(e, ref, rtol=1e-12)
    np.testing.assert_allclose(expected_counts(None, pop, reference_rates=rates), ref, rtol=1e-12)


def test_zero_population_age_group_rejected(tables):
    cases, pop = tables
    pop = pop.assign(**{"65+": 0.0})
    with pytest.raises(InputError, match=r"Age group\(s\) 65\+ have no population"):
        expected_counts(cases, pop)


def test_reference_rates_missing_group_rejected(tables):
    cases, pop = tables
    with pytest.raises(InputError, match=r"no value for age group\(s\) 45-64, 65\+"):
        expected_counts(cases, pop, reference_rates=pd.Series([1e-4, 1e-4], index=["0-14", "15-44"]))


def test_mismatched_tables_rejected(tables):
    cases, pop = tables
    with pytest.raises(InputError, match="different age groups"):
        expected_counts(cases, pop.rename(columns={"65+": "65-99"}))
    with pytest.raises(InputError, match=r"different areas \(no population for D00"):
        expected_counts(cases, pop.iloc[1:])
    with pytest.raises(InputError, match="negative values in 1 area"):
        expected_counts(cases.assign(**{"0-14": -1.0}).iloc[:1], pop.iloc[:1])


# ------------------------------------------------------------- standardized ratios


def test_ratio_and_limits_are_poisson_limits_over_expected():
    o = pd.Series([0, 3, 12, 40], index=list("ABCD"))
    e = pd.Series([2.0, 1.5, 10.0, 55.0], index=list("DCBA"))[::-1]  # same areas, reversed order
    r = standardized_ratio(o, e)
    lo, hi = poisson_interval(o.to_numpy())
    np.testing.assert_allclose(r.ratio, o / e, rtol=1e-15)  # plain division
    np.testing.assert_allclose(r.low, lo / e.to_numpy(), rtol=1e-15)
    np.testing.assert_allclose(r.high, hi / e.to_numpy(), rtol=1e-15)
    frame = r.to_frame()
    assert list(frame.columns) == ["observed", "expected", "ratio", "low", "high", "small_expected"]
    assert list(frame.index) == list("ABCD")
    assert frame["small_expected"].tolist() == [False, False, True, True]  # expected 55, 10, 1.5, 2 vs 5


def test_ratio_series_aligned_by_index():
    o = pd.Series([3, 12], index=["A", "B"])
    e = pd.Series([10.0, 1.5], index=["B", "A"])
    np.testing.assert_allclose(standardized_ratio(o, e).ratio, [2.0, 1.2], rtol=1e-15)  # 3/1.5, 12/10


def test_ratio_midp_method_used():
    r = standardized_ratio([4], [2.0], method="mid-p")
    lo, hi = poisson_interval(4, method="mid-p")
    np.testing.assert_allclose([r.low[0], r.high[0]], [lo / 2, hi / 2], rtol=1e-15)


def test_ratio_zero_expected():
    with pytest.raises(InputError, match=r"1 area\(s\) have cases but an expected count of 0 \(B\)"):
        standardized_ratio(pd.Series([1, 2], index=["A", "B"]), pd.Series([1.0, 0.0], index=["A", "B"]))
    with pytest.warns(DataWarning, match=r"0 observed and 0 expected cases \(1\)"):
        r = standardized_ratio([1, 0], [1.0, 0.0])
    assert np.isnan(r.ratio[1]) and np.isnan(r.low[1]) and np.isnan(r.high[1])


def test_ratio_summary_and_html(nc_expected_1974):
    df = nc_expected_1974
    r = standardized_ratio(df["observed"], df["expected"])
    text = r.summary()
    assert "100 areas" in text and "ratio 1.000" in text  # internal reference: overall ratio is 1
    above = int((r.to_frame()["low"] > 1).sum())
    assert f"entirely above 1: {above} area(s)" in text
    assert "<table" in r._repr_html_()


# ------------------------------------------------------------------------- rates


def test_crude_rate_exact_interval(tables):
    cases, pop = tables
    r = crude_rate(cases, pop, per=1000)
    c, n = cases.sum(axis=1).to_numpy(), pop.sum(axis=1).to_numpy()
    lo, hi = poisson_interval(c)
    np.testing.assert_allclose(r.rate, 1000 * c / n, rtol=1e-14)  # same arithmetic
    np.testing.assert_allclose(r.low, 1000 * lo / n, rtol=1e-14)
    np.testing.assert_allclose(r.high, 1000 * hi / n, rtol=1e-14)
    assert list(r.to_frame().columns) == ["cases", "population", "rate", "low", "high"]
    assert r.to_frame().index.equals(cases.index)
    assert "per 1,000" in r.summary()


def test_crude_rate_zero_population():
    with pytest.raises(InputError, match="cases but no population"):
        crude_rate([1], [0])
    with pytest.warns(DataWarning, match="no population and no cases"):
        r = crude_rate([0, 1], [0, 10])
    assert np.isnan(r.rate[0])


# Worked example (invented numbers): one area, three age groups.
WORKED_CASES = [4.0, 11.0, 27.0]
WORKED_POP = [12_000.0, 9_500.0, 3_100.0]
WORKED_STANDARD = [55_000.0, 30_000.0, 15_000.0]  # shares 0.55, 0.30, 0.15


def test_fay_feuer_interval_on_worked_example():
    """Fay & Feuer (1997) gamma limits recomputed here through scipy's chi-square quantiles
    (gamma(shape s, scale t) quantile = t * chi2.ppf(q, 2 s) / 2)."""
    c, n = np.array(WORKED_CASES), np.array(WORKED_POP)
    w = np.array(WORKED_STANDARD) / sum(WORKED_STANDARD)
    y = np.sum(w * c / n)
    v = np.sum(w**2 * c / n**2)
    wm = np.max(w / n)
    ref_low = (v / y) * stats.chi2.ppf(0.025, 2 * y**2 / v) / 2
    ref_high = (v + wm**2) / (y + wm) * stats.chi2.ppf(0.975, 2 * (y + wm) ** 2 / (v + wm**2)) / 2
    r = direct_standardized_rate(np.array([WORKED_CASES]), np.array([WORKED_POP]), WORKED_STANDARD, per=100_000)
    # gamma and chi-square quantiles are the same scipy routine underneath: rounding only
    np.testing.assert_allclose(r.rate, 100_000 * y, rtol=1e-12)
    np.testing.assert_allclose(r.low, 100_000 * ref_low, rtol=1e-9)
    np.testing.assert_allclose(r.high, 100_000 * ref_high, rtol=1e-9)
    assert r.low[0] < r.rate[0] < r.high[0]


@pytest.mark.parametrize("c", [0, 1, 7, 150])
def test_fay_feuer_single_age_group_reduces_to_garwood(c):
    """With one age group the Fay-Feuer limits equal the exact Poisson limits / n (Fay & Feuer 1997, sec. 3)."""
    n = 25_000.0
    r = direct_standardized_rate(np.array([[c]]), np.array([[n]]), [1.0], per=1.0)
    lo, hi = poisson_interval(c)
    np.testing.assert_allclose([r.low[0], r.high[0]], [lo / n, hi / n], rtol=1e-9, atol=1e-15)  # closed forms


def test_dsr_with_own_age_structure_equals_crude_rate(tables):
    """Analytic identity: standardizing to an area's own population gives its crude rate."""
    cases, pop = tables
    own = pop.iloc[3]
    r = direct_standardized_rate(cases, pop, own)
    np.testing.assert_allclose(r.rate[3], r.crude_rate[3], rtol=1e-12)  # sum of 4 terms


def test_dsr_vectorised_matches_area_by_area(tables):
    cases, pop = tables
    standard = pd.Series([18_000, 42_000, 25_000, 15_000], index=AGES[::-1])  # matched by label
    all_at_once = direct_standardized_rate(cases, pop, standard)
    one = direct_standardized_rate(cases.iloc[[5]], pop.iloc[[5]], standard)
    np.testing.assert_allclose(
        [one.rate[0], one.low[0], one.high[0]],
        [all_at_once.rate[5], all_at_once.low[5], all_at_once.high[5]],
        rtol=1e-14,  # identical arithmetic
    )
    frame = all_at_once.to_frame()
    assert frame.index.equals(cases.index)
    assert list(frame.columns) == ["cases", "population", "crude_rate", "rate", "low", "high"]
    np.testing.assert_allclose(all_at_once.weights.sum(), 1.0, rtol=1e-15)


def test_dsr_zero_cases_limits():
    # y = 0: low = 0, high = w_M * gamma.ppf(1 - a/2, 1) = -w_M * log(a/2) (Fay & Feuer 1997 with v = 0)
    r = direct_standardized_rate(np.array([[0, 0]]), np.array([[1000, 4000]]), [0.5, 0.5], per=1.0)
    assert r.rate[0] == 0.0 and r.low[0] == 0.0
    np.testing.assert_allclose(r.high[0], -(0.5 / 1000) * np.log(0.025), rtol=1e-12)  # exponential quantile


def test_dsr_undefined_and_bad_inputs():
    with pytest.warns(DataWarning, match=r"no population in an age group of the standard \(1\)"):
        r = direct_standardized_rate(np.array([[1, 2], [0, 3]]), np.array([[100, 100], [0, 100]]), [1, 1])
    assert np.isnan(r.rate[1]) and np.isfinite(r.rate[0])
    with pytest.raises(InputError, match="cases in an age group with no population"):
        direct_standardized_rate(np.array([[1, 2]]), np.array([[0, 100]]), [1, 1])
    cases = pd.DataFrame([[1, 2]], columns=["young", "old"])
    with pytest.raises(InputError, match=r"not in the data \(oldest\)"):
        direct_standardized_rate(cases, cases * 100, pd.Series([1, 1, 1], index=["young", "old", "oldest"]))
    with pytest.raises(InputError, match="sums to 0"):
        direct_standardized_rate(cases, cases * 100, [0, 0])


# ----------------------------------------------------------------------- readers


# ---------------------------------------------------------------- week windows


@pytest.mark.parametrize("window", [1, 2, 4, 30])
def test_rolling_window_sum_matches_pandas(rng, window):
    """pandas DataFrame.rolling(window, min_periods=1).sum() as the reference."""
    weeks = pd.DataFrame(rng.poisson(3, (12, 5)), index=[f"2026-W{w:02d}" for w in range(1, 13)])
    got = rolling_window_sum(weeks, window)
    ref = weeks.rolling(window, min_periods=1).sum()
    np.testing.assert_allclose(got, ref, rtol=0)  # integer sums: exact
    cube = rng.poisson(2, (3, 12, 4))  # areas x weeks x ages, time on axis 1
    np.testing.assert_array_equal(
        rolling_window_sum(cube, window, axis=1)[1, :, 2],
        pd.Series(cube[1, :, 2]).rolling(window, min_periods=1).sum(),
    )


def test_no_warnings_on_clean_data(tables):
    cases, pop = tables
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        e = expected_counts(cases, pop)
        standardized_ratio(cases.sum(axis=1), e).summary()
        direct_standardized_rate(cases, pop, [1, 2, 3, 4]).summary()
