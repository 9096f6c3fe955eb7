"""Tests for areamap.smoothing: empirical-Bayes, Poisson-gamma and window smoothing.

Outside references: the published formulas of Marshall (1991) and Clayton & Kaldor (1987) worked by hand,
statsmodels' negative-binomial maximum-likelihood fit, scipy.stats' gamma distribution and numerical
integration with scipy.integrate, and the North Carolina county file bundled with libpysal.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from areamap.errors import DataWarning, GraphError, InputError, ModelError, ModelWarning, ParameterError
from areamap.graphs import AreaGraph
from areamap.smoothing import (
    PoissonGammaResult,
    SmoothedRates,
    class_changes,
    global_eb_rates,
    local_eb_rates,
    poisson_gamma_eb,
    shrinkage_table,
    spatial_window_rates,
)

# Marshall (1991) worked example, numbers invented for this test; steps below done by hand with exact fractions.
MARSHALL_Y = np.array([20.0, 0.0, 50.0, 10.0, 120.0])
MARSHALL_N = np.array([1000.0, 500.0, 2000.0, 800.0, 3000.0])


@pytest.fixture
def path5() -> AreaGraph:
    """A - B - C - D - E."""
    return AreaGraph.from_edges(list("ABCDE"), [("A", "B"), ("B", "C"), ("C", "D"), ("D", "E")])


def _poisson_data(rng, n_areas=25):
    pop = rng.integers(200, 20000, n_areas).astype(float)
    risk = rng.gamma(4.0, 1 / 4.0, n_areas)
    cases = rng.poisson(pop * 0.002 * risk).astype(float)
    return cases, pop


# ------------------------------------------------------------------ global EB
def test_global_eb_matches_hand_computation():
    # Marshall (1991), Applied Statistics 40:283-294, global moment estimator; hand computation:
    #   r = [0.02, 0, 0.025, 0.0125, 0.04]
    #   m = sum y / sum n = 200 / 7300 = 2/73
    #   s^2 = sum n (r - m)^2 / sum n = 1.09554794520548 / 7300 = 3199/21316000
    #   nbar = 7300 / 5 = 1460;  A = s^2 - m / nbar = 3199/21316000 - 2/106580 = 2799/21316000
    #   C_i = A / (A + m / n_i);  theta_i = m + C_i (r_i - m)
    m = 2 / 73
    a = 2799 / 21316000
    c = [0.8273721548921076, 0.7055709604234939, 0.9055321902296991, 0.7931425332955512, 0.9349738336488141]
    theta = [0.021276973100798107, 0.00806654902949332, 0.025226463927531542,
             0.015581609521110797, 0.03918049215009464]
    res = global_eb_rates(MARSHALL_Y, MARSHALL_N)
    # rtol 1e-12: a handful of floating-point operations separate the two computations
    np.testing.assert_allclose(res.prior_mean, m, rtol=1e-12)
    np.testing.assert_allclose(res.prior_variance, a, rtol=1e-12)
    np.testing.assert_allclose(res.raw_weight, c, rtol=1e-12)
    np.testing.assert_allclose(res.smoothed_rate, theta, rtol=1e-12)
    np.testing.assert_allclose(res.raw_rate, [0.02, 0, 0.025, 0.0125, 0.04], rtol=1e-15)  # exact divisions


def test_global_eb_negative_variance_truncated_with_warning():
    # Marshall (1991): a negative moment estimate of A is set to 0. Hand computation with the
    # populations divided by 10: s^2 = 3199/21316000 (unchanged) but m / nbar = (2/73) / 146 = 1.876e-4
    # > s^2 = 1.50e-4, so A < 0 -> 0 and every area equals m = 2/73.
    with pytest.warns(ModelWarning, match=r"variance estimate .* <= 0.*shrunk to the overall rate"):
        res = global_eb_rates(MARSHALL_Y / 10, MARSHALL_N / 10)
    np.testing.assert_allclose(res.smoothed_rate, 2 / 73, rtol=1e-12)  # floating-point only
    assert np.all(res.raw_weight == 0)
    assert res.prior_variance[0] == 0
    assert "truncated at 0" in res.summary()


def test_global_eb_population_scaling_scales_rates():
    # Invariance from the formulas (Marshall 1991): n -> k n gives r -> r/k, m -> m/k, A -> A/k^2, so
    # C_i is unchanged and theta_i -> theta_i / k; relative risks theta_i / m are unchanged.
    y, n = MARSHALL_Y, MARSHALL_N
    k = 37.5
    base = global_eb_rates(y, n)
    scaled = global_eb_rates(y, n * k)
    # rtol 1e-12: floating-point rounding only
    np.testing.assert_allclose(scaled.smoothed_rate, base.smoothed_rate / k, rtol=1e-12)
    np.testing.assert_allclose(scaled.raw_weight, base.raw_weight, rtol=1e-12)
    np.testing.assert_allclose(
        scaled.smoothed_rate / scaled.overall_rate, base.smoothed_rate / base.overall_rate, rtol=1e-12
    )


def test_per_multiplies_rates_only():
    # common practice: "per 100 000" is a presentation scale and must not change the shrinkage
    a = global_eb_rates(MARSHALL_Y, MARSHALL_N)
    b = global_eb_rates(MARSHALL_Y, MARSHALL_N, per=100_000)
    np.testing.assert_allclose(b.smoothed_rate, a.smoothed_rate * 100_000, rtol=1e-12)  # rounding only
    np.testing.assert_allclose(b.raw_weight, a.raw_weight, rtol=1e-12)  # rounding only
    np.testing.assert_allclose(b.prior_variance, a.prior_variance * 1e10, rtol=1e-12)  # rounding only


@pytest.mark.parametrize(
    ("prior_variance", "expected"),
    [
        (0.0, "prior"),  # infinite prior precision: all areas at the prior mean (Marshall 1991, C_i = 0)
        (math.inf, "raw"),  # zero prior precision: raw rates returned (C_i = 1)
        (1e6, "raw"),  # A >> m / n_i: C_i = 1 - O(1e-11)
        (1e-14, "prior"),  # A << m / n_i: C_i = O(1e-9)
    ],
)
def test_global_eb_prior_limits(prior_variance, expected):
    res = global_eb_rates(MARSHALL_Y, MARSHALL_N, prior_variance=prior_variance)
    target = res.raw_rate if expected == "raw" else np.full(5, 2 / 73)
    # atol 1e-9 on rates of order 0.03: the finite limits differ from the exact ones by < 1e-9 relative
    np.testing.assert_allclose(res.smoothed_rate, target, rtol=1e-7, atol=1e-9)


def test_global_eb_prior_mean_override():
    # Marshall (1991) with m given: theta_i = m + C_i (r_i - m), C_i = A / (A + m / n_i); hand values
    # for area 2 (r = 0): C = 1e-4 / (1e-4 + 0.05 / 500) = 0.5, theta = 0.05 * 0.5 = 0.025
    res = global_eb_rates(MARSHALL_Y, MARSHALL_N, prior_mean=0.05, prior_variance=1e-4)
    np.testing.assert_allclose(res.raw_weight[1], 0.5, rtol=1e-12)  # rounding only
    np.testing.assert_allclose(res.smoothed_rate[1], 0.025, rtol=1e-12)  # rounding only


def test_global_eb_keeps_series_index_and_order():
    idx = pd.Index(["d5", "d1", "d3", "d2", "d4"], name="area_id")
    y = pd.Series(MARSHALL_Y, index=idx)
    n = pd.Series(MARSHALL_N, index=idx)[["d1", "d2", "d3", "d4", "d5"]]  # different order, same areas
    res = global_eb_rates(y, n)
    frame = res.to_frame()
    assert list(frame.index) == list(idx) and frame.index.name == "area_id"
    ref = global_eb_rates(MARSHALL_Y, MARSHALL_N)
    np.testing.assert_allclose(frame["smoothed_rate"].to_numpy(), ref.smoothed_rate, rtol=1e-12)  # rounding


def test_global_eb_reordering_areas_gives_same_per_area_results(rng):
    # invariance (common practice): results are per area, not per position
    y, n = _poisson_data(rng)
    ids = pd.Index([f"a{i:02d}" for i in range(y.size)])
    perm = rng.permutation(y.size)
    base = global_eb_rates(pd.Series(y, ids), pd.Series(n, ids)).to_frame()
    shuffled = global_eb_rates(pd.Series(y[perm], ids[perm]), pd.Series(n[perm], ids[perm])).to_frame()
    # rtol 1e-12: sums in a different order differ only by rounding
    np.testing.assert_allclose(shuffled.loc[ids, "smoothed_rate"], base["smoothed_rate"], rtol=1e-12)


# ------------------------------------------------------------------- local EB
def test_local_eb_hand_computation_middle_area(path5):
    # Marshall (1991) local estimator, area C of the path A-B-C-D-E, window {B, C, D}; hand computation:
    #   y = (40, 3, 60), n = (1000, 200, 1500), r = (0.04, 0.015, 0.04)
    #   m_C = 103 / 2700;  s^2_C = sum n (r - m_C)^2 / 2700 = 4.286694101508916e-05
    #   nbar_C = 2700 / 3 = 900;  A_C = s^2_C - m_C / 900 = 4.801097393689986e-07
    #   C_C = A_C / (A_C + m_C / 200) = 0.002510760401721664;  theta_C = m_C + C_C (0.015 - m_C)
    res = local_eb_rates([5, 40, 3, 60, 90], [1000, 1000, 200, 1500, 1500], path5)
    # rtol 1e-9: A_C is a difference of two close numbers (s^2 and m/nbar), losing ~2 digits to rounding
    np.testing.assert_allclose(res.prior_mean[2], 103 / 2700, rtol=1e-12)
    np.testing.assert_allclose(res.prior_variance[2], 4.801097393689986e-07, rtol=1e-9)
    np.testing.assert_allclose(res.raw_weight[2], 0.002510760401721664, rtol=1e-9)
    np.testing.assert_allclose(res.smoothed_rate[2], 0.038090028694404594, rtol=1e-12)


def _local_eb_by_loop(y, n, adjacency):
    """Marshall (1991) local estimator written area by area, straight from the published formulas."""
    out = np.empty(y.size)
    for i in range(y.size):
        s = np.r_[i, np.flatnonzero(adjacency[i])]
        m = y[s].sum() / n[s].sum()
        r = y[s] / n[s]
        s2 = np.sum(n[s] * (r - m) ** 2) / n[s].sum()
        a = max(s2 - m / n[s].mean(), 0.0)
        c = a / (a + m / n[i]) if a > 0 else 0.0
        out[i] = m + c * (y[i] / n[i] - m)
    return out


@pytest.mark.parametrize("graph_name", ["grid5_rook", "grid5_queen"])
def test_local_eb_matches_area_by_area_formula(graph_name, request, rng):
    g = request.getfixturevalue(graph_name)
    y, n = _poisson_data(rng, g.n)
    res = local_eb_rates(y, n, g)
    # rtol 1e-10: same formulas, different summation order
    np.testing.assert_allclose(res.smoothed_rate, _local_eb_by_loop(y, n, g.adjacency.toarray()), rtol=1e-10)
    assert not res.global_fallback.any()


def test_local_eb_relabel_and_reorder_with_graph(grid5_queen, rng):
    # invariance (common practice): renaming ids and reordering areas together with the graph changes nothing
    g = grid5_queen
    y, n = _poisson_data(rng, g.n)
    base = local_eb_rates(y, n, g).to_frame()
    perm = rng.permutation(g.n)
    new_ids = pd.Index([f"zone-{k}" for k in range(g.n)])
    relabel = dict(zip(g.ids, new_ids))
    g2 = AreaGraph.from_adjacency(new_ids, g.adjacency).reorder(new_ids[perm])
    res = local_eb_rates(y[perm], n[perm], g2).to_frame()
    assert list(res.index) == list(new_ids[perm])
    back = res.loc[[relabel[i] for i in g.ids]]
    # rtol 1e-12: only summation order differs
    np.testing.assert_allclose(back["smoothed_rate"], base["smoothed_rate"], rtol=1e-12)
    np.testing.assert_allclose(back["raw_weight"], base["raw_weight"], rtol=1e-12)


def test_local_eb_series_matched_to_graph_by_id(grid5_rook, rng):
    y, n = _poisson_data(rng, grid5_rook.n)
    base = local_eb_rates(y, n, grid5_rook)
    rev = grid5_rook.ids[::-1]
    res = local_eb_rates(pd.Series(y[::-1], rev), pd.Series(n[::-1], rev), grid5_rook)
    assert list(res.index) == list(rev)
    np.testing.assert_allclose(res.smoothed_rate[::-1], base.smoothed_rate, rtol=1e-12)  # rounding only


def test_local_eb_population_scaling(grid5_queen, rng):
    # same argument as for the global estimator, applied window by window (Marshall 1991)
    y, n = _poisson_data(rng, grid5_queen.n)
    base = local_eb_rates(y, n, grid5_queen)
    scaled = local_eb_rates(y, n * 250.0, grid5_queen)
    np.testing.assert_allclose(scaled.smoothed_rate, base.smoothed_rate / 250.0, rtol=1e-10)  # rounding only


def test_local_eb_island_falls_back_to_global(graph_with_island):
    y = np.array([3.0, 40.0, 1.0, 12.0, 4.0])
    n = np.array([1500.0, 2000.0, 400.0, 2500.0, 300.0])
    with pytest.warns(DataWarning, match=r"1 area\(s\) have no neighbours with data \(Eyot\)"):
        res = local_eb_rates(y, n, graph_with_island)
    glob = global_eb_rates(y, n)
    assert res.global_fallback.tolist() == [False, False, False, False, True]
    assert 0 < res.raw_weight[4] < 1  # genuinely shrunk, neither raw nor flat
    # rtol 1e-12: identical formula over identical areas
    np.testing.assert_allclose(res.smoothed_rate[4], glob.smoothed_rate[4], rtol=1e-12)
    assert "without neighbours got the global estimate" in res.summary()


def test_local_eb_area_whose_neighbours_have_no_data_falls_back(path3):
    # A's only neighbour B has zero population, so A's window holds only A
    with pytest.warns(DataWarning) as rec:
        res = local_eb_rates([2.0, 0.0, 9.0], [100.0, 0.0, 700.0], path3)
    messages = " | ".join(str(w.message) for w in rec)
    assert "zero denominator (population or expected count)" in messages
    assert "no neighbours with data (A, C)" in messages
    assert np.isnan(res.smoothed_rate[1])
    assert res.global_fallback.tolist() == [True, False, True]


# --------------------------------------------------------------- window rates
def test_spatial_window_hand_computation(path3):
    # pooled rate of the window, by hand: A: (2+10)/(100+400) = 0.024; B: 42/1400 = 0.03; C: 40/1300
    res = spatial_window_rates([2, 10, 30], [100, 400, 900], path3)
    np.testing.assert_allclose(res.smoothed_rate, [0.024, 0.03, 40 / 1300], rtol=1e-14)  # exact divisions
    np.testing.assert_allclose(res.raw_weight, [100 / 500, 400 / 1400, 900 / 1300], rtol=1e-14)
    assert res.areas_pooled.tolist() == [2, 3, 2]
    assert "whatever its size" in res.summary()


def test_spatial_window_island_keeps_raw_rate_and_excludes_zero_population(graph_with_island):
    y = np.array([3.0, 8.0, 1.0, 12.0, 4.0])
    n = np.array([1500.0, 0.0, 400.0, 2500.0, 300.0])
    with pytest.warns(DataWarning, match=r"1 area\(s\) have zero denominator .*: B\. 1 of them have counts > 0"):
        res = spatial_window_rates(y, n, graph_with_island)
    # by hand: A's window {A, B, C} minus B (no population) -> (3 + 1) / 1900
    np.testing.assert_allclose(res.smoothed_rate, [4 / 1900, np.nan, 16 / 4400, 13 / 2900, 4 / 300], rtol=1e-14)


def test_spatial_window_reorder_with_graph(grid5_rook, rng):
    y, n = _poisson_data(rng, grid5_rook.n)
    base = spatial_window_rates(y, n, grid5_rook)
    perm = rng.permutation(grid5_rook.n)
    res = spatial_window_rates(y[perm], n[perm], grid5_rook.reorder(grid5_rook.ids[perm]))
    np.testing.assert_allclose(res.smoothed_rate, base.smoothed_rate[perm], rtol=1e-12)  # rounding only


# --------------------------------------------------------------- Poisson-gamma
def test_poisson_gamma_matches_statsmodels_nb2(nc_expected_1974):
    # Reference: statsmodels NegativeBinomial (NB2), intercept only, offset log(E). The Poisson-gamma
    # marginal is NB2 with mean mu*E and var mu*E + (mu*E)^2 / alpha (Clayton & Kaldor 1987), so
    # prior mean = exp(const) and gamma shape = 1 / alpha_NB2.
    from statsmodels.discrete.discrete_model import NegativeBinomial

    y = nc_expected_1974["observed"].to_numpy()
    e = nc_expected_1974["expected"].to_numpy()
    ref = NegativeBinomial(y, np.ones_like(y), loglike_method="nb2", offset=np.log(e)).fit(
        method="newton", maxiter=500, tol=1e-12, disp=0
    )
    assert ref.mle_retvals["converged"]
    res = poisson_gamma_eb(nc_expected_1974["observed"], nc_expected_1974["expected"])
    # rtol 1e-4: both are iterative maximum-likelihood fits with their own stopping rules
    np.testing.assert_allclose(res.prior_mean, np.exp(ref.params[0]), rtol=1e-4)
    np.testing.assert_allclose(res.prior_shape, 1.0 / ref.params[1], rtol=1e-4)
    # rtol 1e-8: the log-likelihood is flat at the maximum, so tiny parameter differences barely move it
    np.testing.assert_allclose(res.log_likelihood, ref.llf, rtol=1e-8)
    assert res.converged and res.estimated == ("prior_shape", "prior_mean")
    assert list(res.to_frame().index) == list(nc_expected_1974.index)


def test_poisson_gamma_posterior_against_scipy_gamma(nc_expected_1974):
    # Clayton & Kaldor (1987): theta | y ~ Gamma(alpha + y, nu + E); quantiles and survival function
    # from scipy.stats.gamma computed here
    obs, exp_ = nc_expected_1974["observed"].to_numpy(), nc_expected_1974["expected"].to_numpy()
    res = poisson_gamma_eb(obs, exp_, threshold=1.5, level=0.9)
    a, nu = res.prior_shape, res.prior_shape / res.prior_mean
    post = stats.gamma(a + obs, scale=1 / (nu + exp_))
    # rtol 1e-10: same distribution evaluated by the same library; only the hyperparameter algebra differs
    np.testing.assert_allclose(res.rr_low, post.ppf(0.05), rtol=1e-10)
    np.testing.assert_allclose(res.rr_high, post.ppf(0.95), rtol=1e-10)
    np.testing.assert_allclose(res.p_above_threshold, post.sf(1.5), rtol=1e-10, atol=1e-15)
    np.testing.assert_allclose(res.rr_mean, post.mean(), rtol=1e-10)


@pytest.mark.parametrize(("y", "e"), [(0, 0.7), (3, 1.2), (14, 9.5)])
def test_poisson_gamma_posterior_by_numerical_integration(y, e):
    # Independent check of the conjugate algebra: posterior ∝ Poisson(y | e*theta) * Gamma(theta | 2.5, rate 2)
    # integrated with scipy.integrate.quad (Bayes' theorem, no conjugacy used)
    alpha, rate = 2.5, 2.0
    res = poisson_gamma_eb([y], [e], prior_mean=alpha / rate, prior_shape=alpha, threshold=1.0)

    def unnorm(t):
        return stats.poisson.pmf(y, e * t) * stats.gamma.pdf(t, alpha, scale=1 / rate)

    z = integrate.quad(unnorm, 0, np.inf)[0]
    mean = integrate.quad(lambda t: t * unnorm(t), 0, np.inf)[0] / z
    p_above = integrate.quad(unnorm, 1.0, np.inf)[0] / z
    # rtol 1e-7: quad's default accuracy is about 1.5e-8 relative
    np.testing.assert_allclose(res.rr_mean[0], mean, rtol=1e-7)
    np.testing.assert_allclose(res.p_above_threshold[0], p_above, rtol=1e-7)
    # the interval really holds 95% of the posterior mass (equal tails of 2.5%)
    lower_mass = integrate.quad(unnorm, 0, res.rr_low[0])[0] / z
    upper_mass = integrate.quad(unnorm, res.rr_high[0], np.inf)[0] / z
    np.testing.assert_allclose([lower_mass, upper_mass], 0.025, rtol=1e-6)  # quad accuracy, as above


def test_poisson_gamma_expected_scaling_is_equivariant(nc_expected_1974):
    # Scale-family argument (from the model, Clayton & Kaldor 1987): E -> k E and theta -> theta / k with
    # Gamma(alpha, k nu) give the same marginal likelihood, so the MLE has the same shape, prior mean / k,
    # and every posterior quantity of theta scales by 1 / k.
    y, e = nc_expected_1974["observed"], nc_expected_1974["expected"]
    k = 4.0
    base = poisson_gamma_eb(y, e, threshold=1.2)
    scaled = poisson_gamma_eb(y, e * k, threshold=1.2 / k)
    # rtol 1e-6: two separate optimizations converged to gtol 1e-10
    np.testing.assert_allclose(scaled.prior_shape, base.prior_shape, rtol=1e-6)
    np.testing.assert_allclose(scaled.prior_mean * k, base.prior_mean, rtol=1e-6)
    np.testing.assert_allclose(scaled.rr_mean * k, base.rr_mean, rtol=1e-6)
    np.testing.assert_allclose(scaled.p_above_threshold, base.p_above_threshold, rtol=1e-5, atol=1e-9)


def test_poisson_gamma_population_scale_does_not_change_relative_risk(nc_expected_1974):
    # Internal standardization (common practice): E = births * sum(y) / sum(births), so rescaling the
    # population before computing E leaves E, and hence the relative risks, unchanged.
    y = nc_expected_1974["observed"].to_numpy()
    births = nc_expected_1974["births"].to_numpy()
    results = [poisson_gamma_eb(y, b * y.sum() / b.sum()) for b in (births, births * 1000.0)]
    np.testing.assert_allclose(results[1].rr_mean, results[0].rr_mean, rtol=1e-8)  # rounding in E only


@pytest.mark.parametrize(
    ("shape", "expected"),
    [
        (math.inf, "prior"),  # infinite prior precision: all areas equal the prior mean
        (1e12, "prior"),  # weight E / (nu + E) = O(1e-11)
        (0.0, "raw"),  # zero prior precision: posterior mean y / E
        (1e-12, "raw"),  # weight 1 - O(1e-12)
    ],
)
def test_poisson_gamma_prior_limits(shape, expected, nc_expected_1974):
    y, e = nc_expected_1974["observed"].to_numpy(), nc_expected_1974["expected"].to_numpy()
    res = poisson_gamma_eb(y, e, prior_mean=1.3, prior_shape=shape)
    target = y / e if expected == "raw" else np.full(y.size, 1.3)
    # rtol 1e-9, atol 1e-9: the finite limits sit within 1e-10 of the exact ones (Clayton & Kaldor 1987)
    np.testing.assert_allclose(res.rr_mean, target, rtol=1e-9, atol=1e-9)
    assert res.estimated == ()


def test_poisson_gamma_no_overdispersion_caps_shape_and_warns():
    # Counts that equal their expected values vary less than Poisson chance; NB2 score for 1/alpha at 0,
    # sum((y - mu E)^2 - y) (Dean 1992), is negative, so the shape MLE is at infinity.
    e = np.array([3.0, 5.0, 8.0, 2.0, 6.0, 4.0])
    y = e.copy()
    with pytest.warns(ModelWarning, match="shape estimate diverges; it is set to infinity"):
        res = poisson_gamma_eb(y, e)
    assert math.isinf(res.prior_shape)
    np.testing.assert_allclose(res.rr_mean, y.sum() / e.sum(), rtol=1e-14)  # exact division
    assert np.all(res.raw_weight == 0)


def test_poisson_gamma_one_parameter_fixed_is_profile_maximum(nc_expected_1974):
    # With the shape fixed at the joint MLE, the profile MLE of the mean is the joint one (calculus)
    y, e = nc_expected_1974["observed"], nc_expected_1974["expected"]
    joint = poisson_gamma_eb(y, e)
    only_mean = poisson_gamma_eb(y, e, prior_shape=joint.prior_shape)
    only_shape = poisson_gamma_eb(y, e, prior_mean=joint.prior_mean)
    # rtol 1e-6: separate optimizations, each converged to gtol 1e-10
    np.testing.assert_allclose(only_mean.prior_mean, joint.prior_mean, rtol=1e-6)
    np.testing.assert_allclose(only_shape.prior_shape, joint.prior_shape, rtol=1e-6)
    assert only_mean.estimated == ("prior_mean",) and only_shape.estimated == ("prior_shape",)


def test_poisson_gamma_reordering_gives_same_per_area_results(nc_expected_1974, rng):
    df = nc_expected_1974
    perm = rng.permutation(len(df))
    base = poisson_gamma_eb(df["observed"], df["expected"]).to_frame()
    shuf = poisson_gamma_eb(df["observed"].iloc[perm], df["expected"].iloc[perm]).to_frame()
    # rtol 1e-6: the optimizer sees sums in another order, which can shift its final step slightly
    np.testing.assert_allclose(shuf.loc[df.index, "rr_mean"], base["rr_mean"], rtol=1e-6)


def test_poisson_gamma_zero_expected_excluded(nc_expected_1974):
    df = nc_expected_1974.iloc[:30].copy()
    df.iloc[[4, 11], df.columns.get_loc("expected")] = 0.0
    bad = list(df.index[[4, 11]])
    with pytest.warns(DataWarning, match=rf"2 area\(s\) have zero expected .*: {bad[0]}, {bad[1]}\."):
        res = poisson_gamma_eb(df["observed"], df["expected"])
    frame = res.to_frame()
    assert frame.loc[bad, ["rr_mean", "rr_low", "rr_high", "p_above_threshold"]].isna().all().all()
    kept = df.drop(index=bad)
    ref = poisson_gamma_eb(kept["observed"], kept["expected"])
    # the excluded areas play no part in the prior (rtol 1e-10: identical data, identical optimization)
    np.testing.assert_allclose(res.prior_shape, ref.prior_shape, rtol=1e-10)
    np.testing.assert_allclose(frame.loc[kept.index, "rr_mean"], ref.rr_mean, rtol=1e-10)
    assert res.excluded == tuple(bad)


def test_zero_population_excluded_from_global_eb():
    y = np.r_[MARSHALL_Y, 0.0]
    n = np.r_[MARSHALL_N, 0.0]
    ids = ["Northmoor", "Eastfold", "Lowbridge", "Quarrydale", "Wyndham", "Saltmarsh"]
    with pytest.warns(DataWarning, match=r"1 area\(s\) have zero population .*: Saltmarsh\.$"):
        res = global_eb_rates(pd.Series(y, ids), pd.Series(n, ids, name="population"))
    assert np.isnan(res.smoothed_rate[5]) and np.isnan(res.raw_rate[5])
    ref = global_eb_rates(MARSHALL_Y, MARSHALL_N)
    np.testing.assert_allclose(res.smoothed_rate[:5], ref.smoothed_rate, rtol=1e-12)  # same areas, same sums


# ------------------------------------------------------------------ properties
positive_tables = st.integers(2, 12).flatmap(
    lambda k: st.tuples(
        st.lists(st.integers(0, 60), min_size=k, max_size=k),
        st.lists(st.floats(0.5, 500.0, allow_nan=False), min_size=k, max_size=k),
    )
)


@settings(max_examples=60, deadline=None)
@given(positive_tables)
def test_global_eb_between_raw_and_prior_mean(table):
    # Marshall (1991): theta_i = m + C_i (r_i - m) with 0 <= C_i <= 1
    y, n = map(np.asarray, table)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        res = global_eb_rates(y.astype(float), n)
    assert np.all((res.raw_weight >= 0) & (res.raw_weight <= 1))
    lo = np.minimum(res.raw_rate, res.prior_mean)
    hi = np.maximum(res.raw_rate, res.prior_mean)
    tol = 1e-12 * np.maximum(hi, 1e-300)  # rounding in m + C (r - m)
    assert np.all((res.smoothed_rate >= lo - tol) & (res.smoothed_rate <= hi + tol))


@settings(max_examples=40, deadline=None)
@given(positive_tables)
def test_poisson_gamma_between_raw_and_prior_mean(table):
    # Clayton & Kaldor (1987): posterior mean = w y/E + (1 - w) alpha/nu, w = E / (nu + E) in [0, 1]
    y, e = map(np.asarray, table)
    if y.sum() == 0:
        y = y.copy()
        y[0] = 1
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        res = poisson_gamma_eb(y, e)
    assert np.all((res.raw_weight >= 0) & (res.raw_weight <= 1))
    lo = np.minimum(res.raw_ratio, res.prior_mean)
    hi = np.maximum(res.raw_ratio, res.prior_mean)
    tol = 1e-10 * np.maximum(hi, 1.0)  # rounding in (alpha + y) / (nu + E)
    assert np.all((res.rr_mean >= lo - tol) & (res.rr_mean <= hi + tol))
    assert np.all((res.rr_low <= res.rr_mean) & (res.rr_mean <= res.rr_high))
    assert np.all((res.p_above_threshold >= 0) & (res.p_above_threshold <= 1))


# ----------------------------------------------------------------- diagnostics
def test_shrinkage_table_hand_values():
    raw = pd.Series([0.5, 2.0, 0.0], index=["a", "b", "c"])
    t = shrinkage_table(raw, [0.8, 1.5, 0.3], weight=[0.4, 0.5, 0.1])
    # by hand: shift = (0.3, -0.5, 0.3); relative = (0.6, -0.25, undefined)
    np.testing.assert_allclose(t["shift"], [0.3, -0.5, 0.3], rtol=1e-12)  # rounding only
    np.testing.assert_allclose(t["relative_shift"], [0.6, -0.25, np.nan], rtol=1e-12)
    assert list(t.index) == ["a", "b", "c"] and list(t["raw_weight"]) == [0.4, 0.5, 0.1]


def test_class_changes_hand_example():
    # breaks 0.8 | 1.25 | 2.0 -> classes 0: <0.8, 1: [0.8, 1.25), 2: [1.25, 2.0), 3: >= 2.0 (by hand)
    raw = pd.Series([0.5, 1.3, 2.4, 1.0, np.nan], index=list("vwxyz"))
    smoothed = pd.Series([0.9, 1.25, 2.0, 1.1, 1.0], index=list("vwxyz"))
    t = class_changes(raw, smoothed, breaks=[0.8, 1.25, 2.0])
    assert t["raw_class"].tolist() == [0, 2, 3, 1, pd.NA]
    assert t["smoothed_class"].tolist() == [1, 2, 3, 1, 1]
    assert t["changed"].tolist() == [True, False, False, False, False]
    assert t["class_step"].tolist()[:4] == [1, 0, 0, 0]


def test_class_changes_on_eb_result_flags_small_areas(rng):
    # common practice: EB moves small areas most, so class changes concentrate where population is small
    y, n = _poisson_data(rng, 200)
    res = global_eb_rates(y, n)
    breaks = np.quantile(res.raw_rate, [0.2, 0.4, 0.6, 0.8])
    t = class_changes(res.raw_rate, res.smoothed_rate, breaks)
    assert t["changed"].any()
    assert np.median(n[t["changed"].to_numpy()]) < np.median(n[~t["changed"].to_numpy()])


@pytest.mark.parametrize("breaks", [[], [1.0, 1.0], [2.0, 1.0], [0.5, np.nan]])
def test_class_changes_rejects_bad_breaks(breaks):
    with pytest.raises(ParameterError, match="The 'breaks' parameter of class_changes must be a non-empty"):
        class_changes([1.0], [1.0], breaks)


# ----------------------------------------------------------- results & errors
def test_result_objects_render(path5):
    res = local_eb_rates([5, 40, 3, 60, 90], [1000, 1000, 200, 1500, 1500], path5)
    assert isinstance(res, SmoothedRates)
    frame = res.to_frame()
    assert list(frame.columns) == [
        "count", "denominator", "raw_rate", "smoothed_rate", "raw_weight", "prior_mean",
        "prior_variance", "global_fallback", "shift", "relative_shift",
    ]
    assert list(frame.index) == list("ABCDE")
    text = res.summary()
    assert text.startswith("Local empirical Bayes smoothing of 5 areas") and "not individuals" in text
    assert "<table" in res._repr_html_()
    pg = poisson_gamma_eb([0, 2, 5, 12], [2.0, 2.5, 4.0, 6.0], prior_mean=1.0, prior_shape=4.0)
    assert isinstance(pg, PoissonGammaResult)
    assert {"rr_mean", "rr_low", "rr_high", "p_above_threshold", "raw_ratio", "raw_weight"} <= set(pg.to_frame())
    assert "too narrow" in pg.summary() and "<table" in pg._repr_html_()


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"threshold": 0.0}, r"The 'threshold' parameter of poisson_gamma_eb must be in \(0, inf\). Got 0.0"),
        ({"level": 1.0}, r"The 'level' parameter of poisson_gamma_eb must be in \(0, 1\). Got 1.0"),
        ({"prior_shape": -1.0}, r"The 'prior_shape' parameter of poisson_gamma_eb must be in \[0, inf\]"),
    ],
)
def test_poisson_gamma_parameter_errors(kwargs, match):
    with pytest.raises(ParameterError, match=match):
        poisson_gamma_eb([1, 2], [1.0, 2.0], **kwargs)


def test_input_errors(path3):
    negative = r"'counts' passed to global_eb_rates has 1 negative value\(s\) \(areas 1\)"
    with pytest.raises(InputError, match=negative):
        global_eb_rates([1, -2, 3], [10, 10, 10])
    with pytest.raises(InputError, match=r"'counts' has 2 values but 'denominators' has 3"):
        global_eb_rates([1, 2], [10, 10, 10])
    with pytest.raises(InputError, match=r"1 missing or infinite value\(s\) \(areas b\)"):
        global_eb_rates(pd.Series([1.0, 2.0], ["a", "b"]), pd.Series([5.0, np.nan], ["a", "b"]))
    with pytest.raises(InputError, match=r"cover different areas: 1 id\(s\) only in 'counts' \(b\)"):
        global_eb_rates(pd.Series([1.0, 2.0], ["a", "b"]), pd.Series([5.0, 6.0], ["a", "c"]))
    with pytest.raises(InputError, match=r"not whole numbers \(areas 1\)"):
        poisson_gamma_eb([1, 2.5], [1.0, 2.0])
    with pytest.raises(InputError, match="got 2 values but the graph has 3 areas"):
        local_eb_rates([1, 2], [5, 5], path3)
    with pytest.raises(GraphError, match=r"not in the graph \(Z\)"):
        spatial_window_rates(pd.Series([1, 2, 3], list("ABZ")), pd.Series([5, 5, 5], list("ABZ")), path3)
    with pytest.raises(ParameterError, match="The 'graph' parameter of local_eb_rates must be an AreaGraph"):
        local_eb_rates([1, 2, 3], [5, 5, 5], None)


def test_shape_collapsing_to_zero_warns():
    # all-zero counts with a fixed prior mean: the NB2 likelihood increases as the shape goes to 0
    # (from the formula: alpha * log(nu / (nu + E)) -> 0 from below), so the fit runs to the boundary
    with pytest.warns(ModelWarning, match="shape estimate collapses towards 0"):
        res = poisson_gamma_eb([0, 0, 0, 0], [1.0, 2.0, 3.0, 4.0], prior_mean=1.0)
    assert res.prior_shape < 1e-8


def test_all_zero_counts_cannot_estimate_prior():
    with pytest.raises(ModelError, match="every observed count is zero"):
        poisson_gamma_eb([0, 0, 0], [1.0, 2.0, 3.0])
