"""Tests of areamap.autocorrelation against published formulas, reference libraries and simulation."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import scipy.sparse as sp
from hypothesis import given, settings
from hypothesis import strategies as st

from areamap.autocorrelation import (
    CLUSTER_LABELS,
    adjust_pvalues,
    eb_standardized_rates,
    gearys_c,
    local_clusters,
    moran_scatter,
    morans_i,
    rate_local_clusters,
    rate_morans_i,
)
from areamap.errors import GraphError, InputError, ParameterError
from areamap.graphs import AreaGraph

from conftest import grid_graph


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def nc_graph(nc) -> AreaGraph:
    """Rook contiguity of the NC counties, from our own edge list built from the open polygons
    (tests/reference/nc_graph_edges.csv, column in_rook; see tests/reference/README.md), in the shapefile's order."""
    edges = pd.read_csv(Path(__file__).parent / "reference" / "nc_graph_edges.csv", dtype={"FIPS_a": str, "FIPS_b": str})
    sel = edges[edges["in_rook"] == 1]
    return AreaGraph.from_edges(nc["FIPS"].astype(str).tolist(), sel[["FIPS_a", "FIPS_b"]].itertuples(index=False))


def _dense(graph: AreaGraph, style: str) -> np.ndarray:
    return graph.weights(style).toarray()


def _moran_by_definition(zp: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Moran's I of each row of ``zp`` (values already centred), straight from Moran (1950)."""
    n = w.shape[0]
    zc = zp - zp.mean(axis=1, keepdims=True)
    return n / w.sum() * np.einsum("ri,ij,rj->r", zc, w, zc) / np.einsum("ri,ri->r", zc, zc)


def _geary_by_definition(xp: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Geary's C of each row of ``xp``, straight from Geary (1954)."""
    n = w.shape[0]
    diff2 = (xp[:, :, None] - xp[:, None, :]) ** 2
    num = np.einsum("ij,rij->r", w, diff2)
    zc = xp - xp.mean(axis=1, keepdims=True)
    return (n - 1) * num / (2 * w.sum() * np.einsum("ri,ri->r", zc, zc))


# ------------------------------------------------- global: moments vs permutations
@pytest.mark.slow
@pytest.mark.parametrize("variable", ["SIDR74", "BIR74"])
@pytest.mark.parametrize("style", ["row", "binary"])
def test_randomization_moments_match_permutation_distribution(nc, nc_graph, variable, style):
    """E[I] = -1/(n-1) and the Cliff & Ord (1981) randomization variance equal the mean and variance of the
    permutation distribution. The permutation distribution is generated here, independently of the library
    (20,000 random arrangements of the NC county values, libpysal's bundled sids2 file).
    Tolerance: 4 Monte Carlo standard errors (mean: sd/sqrt(R); variance: sqrt((m4 - var^2)/R))."""
    x = nc[variable].to_numpy(float)
    w = _dense(nc_graph, style)
    rng = np.random.default_rng(11)
    R = 20_000
    xp = np.stack([rng.permutation(x) for _ in range(R)])
    perm = _moran_by_definition(xp, w)
    res = morans_i(x, nc_graph, weights=style, permutations=0)
    # the library's observed I against the definition
    np.testing.assert_allclose(res.statistic, _moran_by_definition(x[None], w)[0], rtol=1e-12)  # same sums
    assert res.expected == pytest.approx(-1 / 99, rel=1e-15)  # Cliff & Ord (1981): E[I] = -1/(n-1)
    mean, var = perm.mean(), perm.var()
    m4 = np.mean((perm - mean) ** 4)
    assert abs(mean - res.expected) <= 4 * math.sqrt(var / R)
    assert abs(var - res.variance_randomization) <= 4 * math.sqrt((m4 - var**2) / R)


@pytest.mark.slow
@pytest.mark.parametrize("style", ["row", "binary"])
def test_geary_randomization_moments_match_permutation_distribution(nc, nc_graph, style):
    """Cliff & Ord (1981) E[C] = 1 and Var_R[C] against an independent permutation distribution
    (NC SIDR74, libpysal's sids2 file); tolerance 4 Monte Carlo standard errors as above."""
    x = nc["SIDR74"].to_numpy(float)
    w = _dense(nc_graph, style)
    rng = np.random.default_rng(12)
    R = 20_000
    perm = np.concatenate(
        [_geary_by_definition(np.stack([rng.permutation(x) for _ in range(2000)]), w) for _ in range(R // 2000)]
    )
    res = gearys_c(x, nc_graph, weights=style, permutations=0)
    np.testing.assert_allclose(res.statistic, _geary_by_definition(x[None], w)[0], rtol=1e-12)  # same sums
    mean, var = perm.mean(), perm.var()
    m4 = np.mean((perm - mean) ** 4)
    assert abs(mean - 1.0) <= 4 * math.sqrt(var / R)
    assert abs(var - res.variance_randomization) <= 4 * math.sqrt((m4 - var**2) / R)


def test_library_permutation_mean_sd_agree_with_randomization_moments(nc, nc_graph):
    """The library's own permutation mean and sd (10,000 permutations) against the Cliff & Ord (1981)
    randomization moments; tolerance 4 Monte Carlo standard errors (normal approximation for the sd,
    whose standard error is about sd/sqrt(2R))."""
    x = nc["SIDR74"].to_numpy(float)
    R = 10_000
    res = morans_i(x, nc_graph, permutations=R, seed=5)
    sd_r = math.sqrt(res.variance_randomization)
    assert abs(res.permutation_mean - res.expected) <= 4 * sd_r / math.sqrt(R)
    assert abs(res.permutation_sd - sd_r) <= 4 * sd_r / math.sqrt(2 * R)
    # The NC SIDS rates are positively autocorrelated (I about 0.25): the permutation p-value must sit at
    # the floor 1/(R+1) or close to it, and agree with the randomization z-test's verdict.
    assert res.p_permutation < 0.01 and res.p_randomization < 0.01


def test_normality_moments_match_simulation(grid5_queen):
    """Var_N of Cliff & Ord (1981) against the variance of I over 40,000 independent standard-normal
    samples on the 5x5 queen grid (simulation straight from the definition). Tolerance 4 Monte Carlo SE."""
    w = _dense(grid5_queen, "row")
    rng = np.random.default_rng(3)
    R = 40_000
    sims = _moran_by_definition(rng.standard_normal((R, grid5_queen.n)), w)
    res = morans_i(rng.standard_normal(grid5_queen.n), grid5_queen, permutations=0)
    mean, var = sims.mean(), sims.var()
    m4 = np.mean((sims - mean) ** 4)
    assert abs(mean - res.expected) <= 4 * math.sqrt(var / R)
    assert abs(var - res.variance_normal) <= 4 * math.sqrt((m4 - var**2) / R)


def test_geary_normality_variance_tiny_example():
    """Geary's C and Var_N[C] on a 5-area graph, written out from Cliff & Ord (1981):
    Var_N[C] = ((2 S1 + S2)(n - 1) - 4 S0^2) / (2 (n + 1) S0^2), binary weights."""
    ids = ["a", "b", "c", "d", "e"]
    links = [("a", "b"), ("a", "c"), ("b", "c"), ("c", "d"), ("d", "e")]
    g = AreaGraph.from_edges(ids, links)
    x = np.array([3.0, 5.0, 4.0, 9.0, 8.0])
    n = 5
    # binary weights, each link both ways: S0 = 2 * 5 links = 10; S1 = 1/2 * sum (w_ij + w_ji)^2 = 1/2 * 10 * 4 = 20
    # degrees a2 b2 c3 d2 e1 -> S2 = sum (2 k_i)^2 = 16 + 16 + 36 + 16 + 4 = 88
    s0, s1, s2 = 10.0, 20.0, 88.0
    var_n = ((2 * s1 + s2) * (n - 1) - 4 * s0**2) / (2 * (n + 1) * s0**2)
    # C by hand: sum over ordered pairs = 2 * [(3-5)^2 + (3-4)^2 + (5-4)^2 + (4-9)^2 + (9-8)^2] = 2 * 32
    xbar = x.mean()
    c = (n - 1) * 2 * 32 / (2 * s0 * np.sum((x - xbar) ** 2))
    res = gearys_c(x, g, weights="binary", permutations=0)
    np.testing.assert_allclose(res.variance_normal, var_n, rtol=1e-12)  # same closed form, rounding only
    np.testing.assert_allclose(res.statistic, c, rtol=1e-12)  # rounding only
    assert res.expected == 1.0
    assert res.z_normal == pytest.approx((c - 1) / math.sqrt(var_n), rel=1e-12)  # rounding only


def test_row_weights_sums_with_island(graph_with_island):
    """With row weights and an island, S0 = number of areas with neighbours (4); I by definition
    (Moran 1950) with the island kept in n and in the mean."""
    x = np.array([1.0, 2.0, 4.0, 7.0, 3.0])
    w = _dense(graph_with_island, "row")
    res = morans_i(x, graph_with_island, permutations=0)
    np.testing.assert_allclose(res.statistic, _moran_by_definition(x[None], w)[0], rtol=1e-12)  # rounding
    assert res.n_areas == 5 and res.n_islands == 1


# -------------------------------------------------------------- local Moran
@pytest.mark.parametrize("style", ["row", "binary"])
def test_local_moran_sums_to_s0_times_global(nc, nc_graph, style):
    """Anselin (1995) additivity: sum_i I_i = S0 * I with m2 = sum z^2 / n."""
    x = nc["SIDR74"].to_numpy(float)
    loc = local_clusters(x, nc_graph, permutations=9, weights=style)
    glob = morans_i(x, nc_graph, weights=style, permutations=0)
    s0 = nc_graph.weights(style).sum()
    np.testing.assert_allclose(loc.statistic.sum(), s0 * glob.statistic, rtol=1e-12)  # rounding only


def test_local_moran_additivity_with_island(graph_with_island):
    """Islands get NaN; the remaining I_i still add up to S0 * I (islands contribute zero)."""
    x = np.array([1.0, 2.0, 4.0, 7.0, 3.0])
    loc = local_clusters(x, graph_with_island, permutations=9)
    glob = morans_i(x, graph_with_island, permutations=0)
    assert np.isnan(loc.statistic[4]) and np.isnan(loc.p_value[4])
    assert loc.cluster[4] == "no neighbours"
    np.testing.assert_allclose(np.nansum(loc.statistic), 4 * glob.statistic, rtol=1e-12)  # rounding only


def test_local_moran_formula_by_hand(grid5_rook):
    """I_i = z_i * sum_j w_ij z_j / m2, m2 = sum z^2 / n (Anselin 1995), written out in the test."""
    rng = np.random.default_rng(8)
    x = rng.gamma(2.0, size=25)
    z = x - x.mean()
    m2 = np.sum(z**2) / 25
    w = _dense(grid5_rook, "row")
    expected = np.array([z[i] * sum(w[i, j] * z[j] for j in range(25)) / m2 for i in range(25)])
    res = local_clusters(x, grid5_rook, permutations=9)
    np.testing.assert_allclose(res.statistic, expected, rtol=1e-10)  # different summation order only


# ---------------------------------------------------------------------- Gi*
def test_gi_star_z_scores_by_hand():
    """Ord & Getis (1995), Gi* with binary weights and w_ii = 1:
    Z_i = (sum_j w_ij x_j - W_i x_bar) / (s sqrt((n S1_i - W_i^2) / (n - 1))), s^2 = sum x^2/n - x_bar^2.
    Written out below for a 6-area graph with loops over areas."""
    ids = list("ABCDEF")
    links = [("A", "B"), ("A", "C"), ("B", "C"), ("C", "D"), ("D", "E"), ("E", "F"), ("D", "F")]
    g = AreaGraph.from_edges(ids, links)
    x = np.array([10.0, 12.0, 9.0, 2.0, 1.0, 3.0])
    nbrs = {a: {a} for a in ids}
    for a, b in links:
        nbrs[a].add(b)
        nbrs[b].add(a)
    n = 6
    xbar = x.mean()
    s = math.sqrt(np.sum(x**2) / n - xbar**2)
    z_hand, g_hand = [], []
    for i, a in enumerate(ids):
        members = [ids.index(b) for b in sorted(nbrs[a])]
        wi = len(members)  # W_i* = S1_i* for 0/1 weights
        local = x[members].sum()
        g_hand.append(local / x.sum())
        z_hand.append((local - wi * xbar) / (s * math.sqrt((n * wi - wi**2) / (n - 1))))
    res = local_clusters(x, g, statistic="gi_star", permutations=9, adjust="none")
    np.testing.assert_allclose(res.z_score, z_hand, rtol=1e-12)  # same formula, rounding only
    np.testing.assert_allclose(res.statistic, g_hand, rtol=1e-12)  # rounding only


def test_gi_star_labels_hot_and_cold_spots():
    """A block of high values on a 12x12 grid is a hot spot (High-High), a block of low values a cold spot
    (Low-Low): the documented mapping of Gi* onto the shared label set."""
    g = grid_graph(12, 12, queen=True)
    rng = np.random.default_rng(4)
    x = rng.normal(50.0, 1.0, size=(12, 12))
    x[1:5, 1:5] += 8.0
    x[7:11, 7:11] -= 8.0
    res = local_clusters(x.ravel(), g, statistic="gi_star", permutations=999, seed=2)
    lab = np.asarray(res.cluster).reshape(12, 12)
    assert (lab[2:4, 2:4] == "High-High").all()
    assert (lab[8:10, 8:10] == "Low-Low").all()
    assert (res.z_score.reshape(12, 12)[2:4, 2:4] > 0).all()


# ---------------------------------------------------- conditional permutation
def test_hub_with_all_others_as_neighbours_is_never_extreme():
    """Exact sampling without replacement and self-exclusion: a hub linked to all n-1 other areas always
    draws all of them, so its neighbour sum never changes and its p-value is exactly 1. Sampling with
    replacement, or drawing the hub itself, would make it vary."""
    n = 12
    ids = [f"a{i}" for i in range(n)]
    links = [("a0", f"a{i}") for i in range(1, n)] + [(f"a{i}", f"a{i + 1}") for i in range(1, n - 1)]
    g = AreaGraph.from_edges(ids, links)
    x = np.arange(n, dtype=float) ** 1.5
    res = local_clusters(x, g, permutations=499, seed=3, adjust="none")
    assert res.p_value[0] == 1.0


@pytest.mark.parametrize(
    "n,k",
    [
        (10, 8),  # k close to n: Floyd's algorithm
        (9, 3),  # acceptance about 0.66: rejection of repeated indices
        (30, 5),  # rejection, fewer repeats
    ],
)
def test_focal_area_has_the_exact_conditional_permutation_distribution(n, k):
    """Area 0 has k neighbours; conditional permutation draws a uniform k-subset of the other n-1 areas.
    So M ~ Binomial(R, q) with q the share of k-subsets whose sum is at least as far from its mean as the
    observed one, computed here by enumerating all subsets (itertools.combinations). Sampling with
    replacement, or including area 0 itself, gives another q. Tolerance: 4 binomial standard errors + 1."""
    import itertools

    ids = [f"a{i}" for i in range(n)]
    links = [("a0", f"a{i}") for i in range(1, k + 1)] + [(f"a{i}", f"a{i + 1}") for i in range(1, n - 1)]
    g = AreaGraph.from_edges(ids, links)
    x = np.random.default_rng(n * 100 + k).gamma(1.5, size=n)
    x[1 : k + 1] += 0.4  # observed neighbours a little high
    x[0] += 6.0  # an extreme focal value: drawing area 0 itself would shift the sums visibly
    others = x[1:]
    centre = k * others.mean()
    observed = x[1 : k + 1].sum()
    sums = np.array([sum(c) for c in itertools.combinations(others, k)])
    q = np.mean(np.abs(sums - centre) >= abs(observed - centre) - 1e-9)
    R = 4000
    res = local_clusters(x, g, permutations=R, seed=9, adjust="none")
    m = res.p_value[0] * (R + 1) - 1
    assert abs(m - R * q) <= 4 * math.sqrt(R * q * (1 - q)) + 1


def test_local_moran_z_score_agrees_with_permutation_verdicts():
    """The local Moran z-score uses exact conditional moments (finite-population sampling, Cochran 1977).
    Check: |z| > 1.96 and p <= 0.05 agree on at least 90% of areas of a grid with a planted block (the
    threshold is common practice, sums of 3-8 draws being roughly normal), and High-High areas have z > 0."""
    g = grid_graph(15, 15, queen=True)
    rng = np.random.default_rng(6)
    x = rng.normal(size=(15, 15))
    x[3:8, 3:8] += 2.5
    res = local_clusters(x.ravel(), g, permutations=999, seed=1, adjust="none")
    sig = res.significant
    hh = np.asarray(res.cluster) == "High-High"
    assert (res.z_score[hh] > 0).all()
    # the permutation test and the conditional z agree on most areas (approximate normality of sums of 3-8 draws)
    agree = np.mean((np.abs(res.z_score) > 1.96) == sig)
    assert agree > 0.9


# --------------------------------------------------- detection and FDR control
def test_planted_cluster_is_detected():
    """A 4x4 block of high values on a 20x20 queen grid plus noise: the 2x2 core is High-High after FDR."""
    g = grid_graph(20, 20, queen=True)
    rng = np.random.default_rng(20261202)
    x = rng.normal(0.0, 1.0, size=(20, 20))
    x[8:12, 8:12] += 4.0
    res = local_clusters(x.ravel(), g, permutations=999, seed=1)
    lab = np.asarray(res.cluster).reshape(20, 20)
    assert (lab[9:11, 9:11] == "High-High").all()
    # far from the block, nothing is High-High
    assert not (lab[:4, :4] == "High-High").any()


@pytest.fixture(scope="module")
def null_runs():
    """Twenty spatially random fields on a 10x10 queen grid (m = 100 tests). 1,999 permutations: the
    smallest p-value 1/2000 = 0.0005 equals the first Benjamini-Hochberg threshold alpha/m = 0.05/100, so the
    resolution does not by itself prevent rejections (with 199 permutations BH could never reject here)."""
    g = grid_graph(10, 10, queen=True)
    out = []
    for s in range(20):
        x = np.random.default_rng(1000 + s).normal(size=100)
        res_fdr = local_clusters(x, g, permutations=1999, seed=s, adjust="fdr")
        out.append(res_fdr)
    return out


@pytest.mark.slow
def test_uncorrected_p_values_are_calibrated_under_the_null(null_runs):
    """Under spatial randomness each conditional-permutation p-value is (super-)uniform, so the share of areas
    with p <= 0.05 is about 0.05 (exact for (R+1)*alpha integer; Anselin 1995). Tolerance: 4 standard errors
    of the mean over the 20 fields, estimated from the fields themselves (tests within a field are correlated)."""
    rates = np.array([np.mean(r.p_value <= 0.05) for r in null_runs])
    se = rates.std(ddof=1) / math.sqrt(rates.size)
    assert abs(rates.mean() - 0.05) <= 4 * se + 0.005


@pytest.mark.slow
def test_fdr_controls_false_labels_under_the_null(null_runs):
    """Under the complete null every label is false, so FDR = P(any label) <= alpha (Benjamini & Hochberg 1995;
    BH is valid under independence and positive dependence, common practice for local statistics).
    Slack: 3 binomial standard errors for 20 runs, sqrt(0.05*0.95/20) = 0.049 -> at most 3 runs of 20."""
    any_label = np.array([np.any(r.significant) for r in null_runs])
    assert any_label.mean() <= 0.05 + 3 * math.sqrt(0.05 * 0.95 / 20)
    # without adjustment the same fields would be labelled in nearly every run, so the check has teeth
    assert np.mean([np.any(r.p_value <= 0.05) for r in null_runs]) > 0.9


# -------------------------------------------------------------- adjustments
@pytest.mark.parametrize("method,sm_method", [("fdr", "fdr_bh"), ("bonferroni", "bonferroni")])
def test_adjust_pvalues_match_statsmodels(method, sm_method):
    """Reference library: statsmodels.stats.multitest.multipletests; NaNs are excluded from m."""
    from statsmodels.stats.multitest import multipletests

    rng = np.random.default_rng(2)
    p = rng.uniform(size=60) ** 3
    p[[3, 17, 41]] = np.nan
    ok = ~np.isnan(p)
    ref = multipletests(p[ok], method=sm_method)[1]
    got = adjust_pvalues(p, method)
    np.testing.assert_allclose(got[ok], ref, rtol=1e-12)  # same arithmetic
    assert np.isnan(got[~ok]).all()


@given(st.lists(st.floats(0.0, 1.0), min_size=1, max_size=40))
@settings(max_examples=60, deadline=None)
def test_bh_adjusted_are_monotone_and_bounded(p):
    """BH adjusted p-values keep the order of the raw ones and lie in [p, 1] (Benjamini & Hochberg 1995)."""
    p = np.array(p)
    adj = adjust_pvalues(p, "fdr")
    order = np.argsort(p, kind="stable")
    assert np.all(np.diff(adj[order]) >= -1e-15)  # ulp-level ties only
    assert np.all(adj >= p - 1e-15) and np.all(adj <= 1.0)


def test_adjust_none_and_bad_values():
    np.testing.assert_array_equal(adjust_pvalues([0.2, 0.01], "none"), [0.2, 0.01])
    with pytest.raises(ParameterError, match=r"'p' parameter of adjust_pvalues must hold values in \[0, 1\]"):
        adjust_pvalues([0.2, 1.5], "fdr")
    with pytest.raises(ParameterError, match="'method' parameter of adjust_pvalues must be one of"):
        adjust_pvalues([0.2], "holm")


# --------------------------------------------------------- reproducibility
@pytest.mark.parametrize("block", [1, 7, 250])
def test_local_p_values_do_not_depend_on_block_size(grid5_queen, block):
    x = np.random.default_rng(1).normal(size=25)
    ref = local_clusters(x, grid5_queen, permutations=299, seed=42)
    got = local_clusters(x, grid5_queen, permutations=299, seed=42, block_size=block)
    np.testing.assert_array_equal(got.p_value, ref.p_value)


def test_local_p_values_for_a_seed_are_unchanged():
    """Regression: the compiled permutation kernel reproduces, count for count, the p-values of the
    earlier pure-numpy implementation (values produced by that implementation, commit d45ff84, with
    this call), so a seed gives the same results across versions."""
    g = grid_graph(6, 7, queen=True)
    x = np.sin(np.arange(g.n) / 4.0) + np.random.default_rng(11).normal(size=g.n)
    res = local_clusters(x, g, permutations=199, seed=2024, adjust="none")
    counts = [8, 37, 11, 49, 30, 63, 144, 82, 93, 20, 152, 159, 140, 188, 143, 39, 77, 20, 74, 27, 121,
              95, 51, 141, 70, 41, 77, 192, 120, 151, 170, 56, 44, 86, 147, 143, 43, 21, 58, 117, 138, 51]
    np.testing.assert_array_equal(np.round(res.p_value * 200).astype(int), counts)


@pytest.mark.parametrize("seed", range(12))
def test_compiled_draws_reproduce_numpy_streams(seed):
    """The compiled bounded integers against numpy itself (the reference library whose stream defines
    the p-values): Generator.integers(0, high, dtype=uint32/int32) on PCG64 streams, long runs
    over several consecutive calls of odd sizes (so the buffered 32-bit half carries over), bounds
    from 2 to near 2**32 (high bounds make Lemire's rejection step frequent), states that start with
    a buffered half, and the state handed back to numpy (which must continue identically)."""
    from areamap._permute import bounded_draws, pcg64_state, set_pcg64_state

    ss = np.random.SeedSequence(seed)
    ref = np.random.Generator(np.random.PCG64(np.random.SeedSequence(ss.entropy, spawn_key=(seed,))))
    ref.integers(0, 3, size=seed % 3, dtype=np.uint32)  # start with or without a buffered half
    mine = np.random.Generator(np.random.PCG64())
    mine.bit_generator.state = ref.bit_generator.state
    for high in (2, 3, 1000, 100_488, 2**31 - 2, 3 * 2**30 + 7, 2**32 - 1):
        for size in (1, 2, 9_999 + seed, 100_000):
            dtype = np.int32 if high < 2**31 else np.uint32
            want = ref.integers(0, high, size=size, dtype=dtype)
            state = pcg64_state(mine.bit_generator)
            got = bounded_draws(state, high, size)
            np.testing.assert_array_equal(got.astype(np.int64), want.astype(np.int64))
            set_pcg64_state(mine.bit_generator, state)
            assert mine.bit_generator.state == ref.bit_generator.state
    # numpy continues from the handed-back state exactly as from its own
    np.testing.assert_array_equal(mine.integers(0, 77, size=1001), ref.integers(0, 77, size=1001))


def _reference_neighbour_sum_pvalues(v, graph, permutations, seed):
    """Plain-numpy reference of the conditional-permutation p-values, one permutation at a time:
    permutation r draws Generator.integers(0, n - 1, size=n_slots, dtype=int32) from the stream
    spawned from (seed, r), areas grouped by ascending neighbour count with slots laid out
    (count, areas); rows with a repeated index are redrawn from the same stream (rejection), groups
    with many neighbours relative to n are sampled by Floyd's algorithm (Bentley & Floyd 1987).
    Written independently of the compiled kernel; the definition the compiled path must reproduce."""
    from areamap.autocorrelation import _TIE_RTOL

    n = v.size
    k = graph.neighbour_counts()
    observed = graph.adjacency @ v
    centre = k * (v.sum() - v) / (n - 1)
    threshold = np.abs(observed - centre) - _TIE_RTOL * np.maximum(k, 1) * np.max(np.abs(v))
    tested = np.flatnonzero(k > 0)
    order = tested[np.argsort(k[tested], kind="stable")]
    groups = [(int(c), order[k[order] == c]) for c in np.unique(k[order])]
    n_slots = sum(c * pos.size for c, pos in groups)
    count = np.zeros(n, dtype=np.int64)
    root = np.random.SeedSequence(seed)

    def add_counts(idx, pos):
        sums = v[idx[0]].copy()
        for a in range(1, idx.shape[0]):
            sums += v[idx[a]]
        np.add.at(count, pos, (np.abs(sums - centre[pos]) >= threshold[pos]).astype(np.int64))

    def repeated(idx):
        s = np.sort(idx, axis=0)
        return (s[1:] == s[:-1]).any(axis=0)

    for r in range(permutations):
        gen = np.random.Generator(np.random.PCG64(np.random.SeedSequence(root.entropy, spawn_key=(r,))))
        draws = gen.integers(0, n - 1, size=n_slots, dtype=np.int32)
        off = 0
        for c, pos in groups:
            m = pos.size
            view = draws[off : off + c * m].reshape(c, m).astype(np.int64)
            off += c * m
            if np.prod(1.0 - np.arange(c) / (n - 1)) < 0.5:  # Floyd's algorithm
                chosen = np.empty((c, m), dtype=np.int64)
                for step, j in enumerate(range(n - 1 - c, n - 1)):
                    t = gen.integers(0, j + 1, size=m, dtype=np.int32)
                    taken = (chosen[:step] == t).any(axis=0)
                    chosen[step] = np.where(taken, j, t)
                add_counts(chosen + (chosen >= pos), pos)
                continue
            idx = view + (view >= pos)
            bad = repeated(idx)
            add_counts(idx[:, ~bad], pos[~bad])
            todo = np.flatnonzero(bad)
            while todo.size:  # redraw rejected rows, in area order, until their indices are distinct
                new = gen.integers(0, n - 1, size=(c, todo.size), dtype=np.int32).astype(np.int64)
                new += new >= pos[todo]
                bad = repeated(new)
                add_counts(new[:, ~bad], pos[todo[~bad]])
                todo = todo[bad]
    p = (count + 1.0) / (permutations + 1.0)
    p[k == 0] = np.nan
    return p


def _hub_graph(n, hub_sizes, seed):
    """A ring with chords plus hub areas linked to many others. With n = 1200, hubs of 26 and 30
    neighbours take the sorting branch for repeated indices, hubs of 200 and 600 Floyd's algorithm."""
    rng = np.random.default_rng(seed)
    a = np.arange(n)
    hubs = len(hub_sizes)
    rows, cols = [a, a], [(a + 1) % n, (a + 7) % n]
    for h, size in enumerate(hub_sizes):
        others = rng.choice(np.arange(hubs, n), size=size, replace=False)
        rows.append(np.full(others.size, h))
        cols.append(others)
    r, c = np.concatenate(rows), np.concatenate(cols)
    adj = sp.csr_array((np.ones(2 * r.size), (np.r_[r, c], np.r_[c, r])), shape=(n, n))
    adj.data[:] = 1.0
    return AreaGraph.from_adjacency(np.arange(n), adj, kind="test")


@pytest.mark.parametrize("graph_name", ["grid", "hubs", "island", "tiny"])
@pytest.mark.parametrize("seed", [0, 7, 2024])
def test_local_p_values_match_plain_numpy_reference(graph_name, seed, graph_with_island):
    """Compiled draws and counts (any block size) give the p-values of the plain-numpy reference
    above exactly, on graphs with one or many neighbour counts, hubs, an island and 4 areas."""
    from areamap.autocorrelation import _neighbour_sum_pvalues

    graph = {"grid": grid_graph(9, 11, queen=True), "hubs": _hub_graph(1200, [26, 30, 200, 600], seed),
             "island": graph_with_island, "tiny": grid_graph(2, 2)}[graph_name]
    v = np.random.default_rng(seed).normal(size=graph.n)
    v -= v.mean()
    want = _reference_neighbour_sum_pvalues(v, graph, 60, seed)
    for block in (None, 7):
        got = _neighbour_sum_pvalues(v, graph, 60, seed, block)
        np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("block", [1, 13])
def test_global_p_values_do_not_depend_on_block_size(grid5_queen, block):
    x = np.random.default_rng(1).normal(size=25)
    ref = morans_i(x, grid5_queen, permutations=199, seed=42)
    got = morans_i(x, grid5_queen, permutations=199, seed=42, block_size=block)
    assert got.p_permutation == ref.p_permutation
    np.testing.assert_allclose(got.permutation_mean, ref.permutation_mean, rtol=1e-12)  # summation order


def test_same_seed_same_result_other_seed_differs(grid5_queen):
    x = np.random.default_rng(1).normal(size=25)
    a = local_clusters(x, grid5_queen, permutations=99, seed=1)
    b = local_clusters(x, grid5_queen, permutations=99, seed=1)
    c = local_clusters(x, grid5_queen, permutations=99, seed=2)
    np.testing.assert_array_equal(a.p_value, b.p_value)
    assert not np.array_equal(a.p_value, c.p_value)


@given(
    st.lists(st.floats(-1e3, 1e3, allow_nan=False), min_size=25, max_size=25).filter(
        lambda v: max(v) - min(v) > 1e-3
    ),
    st.sampled_from([1, 19, 99]),
)
@settings(max_examples=30, deadline=None)
def test_permutation_p_values_within_bounds(values, R):
    """Pseudo p-values (M + 1)/(R + 1) lie in [1/(R+1), 1] (definition)."""
    g = grid_graph(5, 5)
    res = local_clusters(values, g, permutations=R, seed=0, adjust="none")
    assert np.all(res.p_value >= 1 / (R + 1) - 1e-15) and np.all(res.p_value <= 1.0)
    glob = morans_i(values, g, permutations=R, seed=0)
    assert 1 / (R + 1) - 1e-15 <= glob.p_permutation <= 1.0


# ---------------------------------------------------------------- invariance
def test_reordering_areas_leaves_statistics_unchanged(nc, nc_graph):
    """Shuffling area order (with the graph) leaves analytic results unchanged. Permutation p-values are not
    compared: permutation r's random stream is tied to positions, so reordering assigns other draws to an
    area (its p-value changes by Monte Carlo noise only)."""
    x = pd.Series(nc["SIDR74"].to_numpy(float), index=nc_graph.ids)
    perm = np.random.default_rng(0).permutation(nc_graph.n)
    g2 = nc_graph.reorder(nc_graph.ids[perm])
    for func in (morans_i, gearys_c):
        a = func(x, nc_graph, permutations=0)
        b = func(x, g2, permutations=0)  # Series realigned by id
        for f in ("statistic", "variance_normal", "variance_randomization", "z_randomization"):
            np.testing.assert_allclose(getattr(b, f), getattr(a, f), rtol=1e-10)  # summation order only
    for stat in ("local_moran", "gi_star"):
        la = local_clusters(x, nc_graph, statistic=stat, permutations=9).to_frame()
        lb = local_clusters(x, g2, statistic=stat, permutations=9).to_frame().reindex(la.index)
        for col in ("statistic", "z_score", "spatial_lag"):
            np.testing.assert_allclose(lb[col], la[col], rtol=1e-10)  # summation order only


# --------------------------------------------------------------------- rates
def test_eb_standardized_rates_by_hand():
    """Assunção & Reis (1999), written out: b = sum y / sum n; s2 = sum n_i (r_i - b)^2 / sum n_i;
    a = s2 - b / (sum n / N); z_i = (r_i - b) / sqrt(a + b / n_i)."""
    y = np.array([3.0, 10.0, 0.0, 25.0, 7.0])
    pop = np.array([1500.0, 4000.0, 800.0, 6000.0, 2500.0])
    b = y.sum() / pop.sum()
    r = y / pop
    s2 = np.sum(pop * (r - b) ** 2) / pop.sum()
    a = s2 - b / (pop.sum() / 5)
    assert a > 0  # this example exercises the ordinary branch
    z = (r - b) / np.sqrt(a + b / pop)
    np.testing.assert_allclose(eb_standardized_rates(y, pop), z, rtol=1e-12)  # rounding only


def test_eb_falls_back_to_poisson_variance():
    """When a + b/n_i <= 0 the documented fallback v_i = b/n_i is used: with nearly equal rates a is about
    -b / mean(n), so an area with more than the mean population gets v_i <= 0."""
    y = np.array([10.0, 20.0, 10.0, 11.0])
    pop = np.array([1e5, 2e5, 1e5, 1e5])
    b = y.sum() / pop.sum()
    r = y / pop
    s2 = np.sum(pop * (r - b) ** 2) / pop.sum()
    a = s2 - b / (pop.sum() / 4)
    v = a + b / pop
    assert (v <= 0).any()
    expected = (r - b) / np.sqrt(np.where(v > 0, v, b / pop))
    np.testing.assert_allclose(eb_standardized_rates(y, pop), expected, rtol=1e-12)  # rounding only


def test_eb_series_keeps_index():
    y = pd.Series([3, 10, 0, 25], index=["d1", "d2", "d3", "d4"])
    pop = pd.Series([4000, 1500, 800, 6000], index=["d2", "d1", "d3", "d4"])
    z = eb_standardized_rates(y, pop)
    assert list(z.index) == ["d1", "d2", "d3", "d4"]
    np.testing.assert_allclose(z, eb_standardized_rates(y.to_numpy(), pop[y.index].to_numpy()), rtol=0)


def test_rate_functions_use_eb_rates(nc, nc_graph):
    y = nc["SID74"].to_numpy(float)
    pop = nc["BIR74"].to_numpy(float)
    z = eb_standardized_rates(y, pop)
    a = rate_morans_i(y, pop, nc_graph, permutations=99, seed=3)
    b = morans_i(z, nc_graph, permutations=99, seed=3)
    assert a.statistic == b.statistic and a.p_permutation == b.p_permutation
    la = rate_local_clusters(y, pop, nc_graph, permutations=99, seed=3)
    lb = local_clusters(z, nc_graph, permutations=99, seed=3)
    np.testing.assert_array_equal(la.p_value, lb.p_value)
    lg = rate_local_clusters(y, pop, nc_graph, statistic="gi_star", permutations=9)
    assert np.isnan(lg.statistic).all() and np.isfinite(lg.z_score).all()
    assert any("negative values" in note for note in lg.notes)


@pytest.mark.parametrize(
    "cases,pop,match",
    [
        ([1, -2, 3, 4], [10, 10, 10, 10], "negative value"),
        ([1, 2, 3, 4], [10, 0, 10, 10], r"value\(s\) <= 0"),
        ([0, 0, 0, 0], [10, 10, 10, 10], "zero in every area"),
    ],
)
def test_rate_input_errors(cases, pop, match):
    with pytest.raises(InputError, match=match):
        eb_standardized_rates(cases, pop)


# ---------------------------------------------------------------- scatter
def test_moran_scatter_slope_is_morans_i(nc, nc_graph):
    """Least-squares slope of the lag on the standardized value equals I with row weights (Anselin 1996);
    reference fit: numpy.polyfit."""
    x = nc["BIR74"].to_numpy(float)
    df = moran_scatter(x, nc_graph)
    slope = np.polyfit(df["standardized_value"], df["spatial_lag"], 1)[0]
    np.testing.assert_allclose(slope, morans_i(x, nc_graph, permutations=0).statistic, rtol=1e-10)  # rounding
    np.testing.assert_allclose(df["standardized_value"].std(ddof=0), 1.0, rtol=1e-12)  # population sd


def test_moran_scatter_islands_have_no_lag(graph_with_island):
    df = moran_scatter([1.0, 2.0, 3.0, 4.0, 10.0], graph_with_island)
    assert np.isnan(df.loc["E", "spatial_lag"]) and df.loc["E", "neighbours"] == 0


# ------------------------------------------------------------ results, inputs
def test_local_result_frame_and_summary(graph_with_island):
    x = pd.Series([1.0, 2.0, 4.0, 7.0, 3.0], index=list("ABCDE"))
    res = local_clusters(x, graph_with_island, permutations=99)
    df = res.to_frame()
    assert list(df.index) == list("ABCDE")
    for col in ("statistic", "z_score", "p_value", "p_adjusted", "significant", "cluster"):
        assert col in df.columns
    assert set(df["cluster"]) <= set(CLUSTER_LABELS)
    assert res.counts()["no neighbours"] == 1 and res.counts().sum() == 5
    assert "no neighbours    1" in res.summary()
    assert "<table" in res._repr_html_()
    # only the four areas with neighbours count as tests: Bonferroni multiplies by 4, not 5
    bon = local_clusters(x, graph_with_island, permutations=99, adjust="bonferroni")
    ok = ~np.isnan(bon.p_value)
    np.testing.assert_allclose(bon.p_adjusted[ok], np.minimum(bon.p_value[ok] * 4, 1), rtol=1e-15)  # exact


def test_global_result_frame_and_summary(grid5_rook):
    x = np.arange(25, dtype=float)
    res = morans_i(x, grid5_rook, permutations=99)
    df = res.to_frame()
    assert list(df.index) == ["normality", "randomization", "permutation"]
    assert "Moran's I" in res.summary() and "permutations" in res.summary()
    assert math.isnan(morans_i(x, grid5_rook, permutations=0).p_permutation)


def test_series_is_reordered_by_graph_ids(grid5_rook):
    x = pd.Series(np.random.default_rng(0).normal(size=25), index=grid5_rook.ids)
    shuffled = x.sample(frac=1.0, random_state=1)
    a = morans_i(x, grid5_rook, permutations=9)
    b = morans_i(shuffled, grid5_rook, permutations=9)
    assert a.statistic == b.statistic and a.p_permutation == b.p_permutation


def test_series_with_other_ids_raises(grid5_rook):
    x = pd.Series(np.arange(25.0), index=[f"z{i}" for i in range(25)])
    with pytest.raises(GraphError, match="cover different areas"):
        local_clusters(x, grid5_rook)


def test_wrong_length_raises(grid5_rook):
    with pytest.raises(GraphError, match="has 24 values but the graph has 25 areas"):
        morans_i(np.arange(24.0), grid5_rook)


@pytest.mark.parametrize("func", [morans_i, gearys_c, local_clusters, moran_scatter])
def test_constant_variable_raises(grid5_rook, func):
    with pytest.raises(InputError, match="is constant .*does not vary"):
        func(np.full(25, 3.0), grid5_rook)


def test_missing_values_raise(grid5_rook):
    x = np.arange(25.0)
    x[[2, 7]] = np.nan
    with pytest.raises(InputError, match=r"2 missing or infinite value\(s\) \(areas r0c2, r1c2\)"):
        local_clusters(x, grid5_rook)


def test_graph_without_links_raises():
    g = AreaGraph.from_adjacency(list("ABCDE"), sp.csr_array((5, 5)))
    with pytest.raises(GraphError, match="has no links"):
        morans_i(np.arange(5.0), g)


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"alpha": 1.5}, r"The 'alpha' parameter of local_clusters must be in \(0, 1\)\. Got 1.5 instead\."),
        ({"adjust": "holm"}, "The 'adjust' parameter of local_clusters must be one of"),
        ({"statistic": "geary"}, "The 'statistic' parameter of local_clusters must be one of"),
        ({"permutations": 0}, "The 'permutations' parameter of local_clusters must be an integer >= 1"),
        ({"seed": -1}, "The 'seed' parameter of local_clusters must be an integer >= 0 or None"),
        ({"block_size": 0}, "The 'block_size' parameter of local_clusters must be an integer >= 1"),
    ],
)
def test_parameter_errors(grid5_rook, kwargs, match):
    with pytest.raises(ParameterError, match=match):
        local_clusters(np.arange(25.0), grid5_rook, **kwargs)


def test_too_few_permutations_noted(grid5_rook):
    res = local_clusters(np.arange(25.0), grid5_rook, permutations=9, adjust="bonferroni")
    assert any("Increase 'permutations'" in note for note in res.notes)
    assert not res.significant.any()
