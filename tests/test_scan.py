"""Tests of the Poisson scan statistic (areamap.scan).

Reference formula (Kulldorff 1997, Communications in Statistics - Theory and Methods 26:1481-1496, eq. for the
Poisson model conditional on the total): with C cases in all and expected counts scaled to sum to C, a zone with c
observed and e expected has LLR = c log(c/e) + (C-c) log((C-c)/(C-e)) when c > e (high), 0 otherwise.
"""

from __future__ import annotations

import math

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from shapely.geometry import box

from areamap import AreaGraph, InputError, ParameterError
from areamap.scan import (
    ScanResult,
    _candidate_llrs,
    _gumbel_p,
    prospective_scan,
    scan_map,
    spatial_scan,
)


def hand_llr(c: float, e: float, total: float, direction: str = "high") -> float:
    """Kulldorff (1997) Poisson LLR, written out by hand."""
    if direction == "high" and c <= e:
        return 0.0
    if direction == "low" and c >= e:
        return 0.0
    inside = c * math.log(c / e) if c > 0 else 0.0
    outside = (total - c) * math.log((total - c) / (total - e)) if total > c else 0.0
    return inside + outside


# ---------------------------------------------------------------- a line of six districts
LINE_IDS = ["A", "B", "C", "D", "E", "F"]
LINE_X = [0.0, 1.0, 2.5, 3.1, 5.0, 6.6]
LINE_CASES = [4, 6, 15, 12, 5, 8]  # 50 cases, equal populations: 50/6 expected each

# Candidate zones worked out by hand from the distances (max share 0.5 = 3 of 6 equal districts):
# A: B at 1, C at 2.5 | B: A at 1, C at 1.5 | C: D at .6, B at 1.5 | D: C at .6, E at 1.9
# E: F at 1.6, D at 1.9 | F: E at 1.6, D at 3.5
LINE_ZONES = [
    ("A", ("A",)), ("A", ("A", "B")), ("A", ("A", "B", "C")),
    ("B", ("B",)), ("B", ("B", "A")), ("B", ("B", "A", "C")),
    ("C", ("C",)), ("C", ("C", "D")), ("C", ("C", "D", "B")),
    ("D", ("D",)), ("D", ("D", "C")), ("D", ("D", "C", "E")),
    ("E", ("E",)), ("E", ("E", "F")), ("E", ("E", "F", "D")),
    ("F", ("F",)), ("F", ("F", "E")), ("F", ("F", "E", "D")),
]


def _line():
    cases = pd.Series(LINE_CASES, index=LINE_IDS)
    pop = pd.Series(100.0, index=LINE_IDS)
    xy = pd.DataFrame({"x": LINE_X, "y": 0.0}, index=LINE_IDS)
    return cases, pop, xy


@pytest.mark.parametrize("direction", ["high", "low", "both"])
def test_line_every_candidate_llr_matches_hand_formula(direction):
    cases, pop, xy = _line()
    table = _candidate_llrs(cases, pop, xy, max_share=0.5, direction=direction)
    assert list(zip(table.centre, table.members)) == LINE_ZONES
    total = 50.0
    for members, llr in zip(table.members, table.llr):
        c = float(cases[list(members)].sum())
        e = total * len(members) / 6.0
        want = hand_llr(c, e, total, direction if direction != "both" else "any")
        # same formula, different summation order: agreement to rounding
        assert llr == pytest.approx(want, abs=1e-9)


def test_line_most_likely_zone_is_the_known_pair():
    cases, pop, xy = _line()
    res = spatial_scan(cases, pop, xy, max_share=0.5, replicates=99, seed=3)
    top = res.to_frame().loc[1]
    assert set(top.members) == {"C", "D"}
    # by hand: c = 27, e = 50 * 2/6; 27 log(1.62) + 23 log(0.69) = 13.0255 - 8.5345 = 4.4910
    assert top.llr == pytest.approx(27 * math.log(27 / (50 / 3)) + 23 * math.log(23 / (100 / 3)), rel=1e-12)
    assert top.llr == pytest.approx(4.4910, abs=1e-4)  # the hand evaluation, rounded to 4 decimals
    assert top.observed == 27 and top.expected == pytest.approx(50 / 3)
    assert top.ratio_inside == pytest.approx(27 / (50 / 3))
    assert top.ratio_outside == pytest.approx(23 / (100 / 3))
    assert top.radius == pytest.approx(0.6)
    # secondary zones never overlap earlier ones
    seen: set = set()
    for m in res.to_frame().members:
        assert not seen & set(m)
        seen |= set(m)
    assert np.all(np.diff(res.llr) <= 0)


def test_equidistant_districts_enter_a_circle_together():
    # B sits exactly between A and C: {B, A} is not a circle (common practice: a circle cannot split ties)
    xy = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [7.0, 0.0]])
    table = _candidate_llrs(np.array([1, 5, 1, 1]), np.ones(4), xy, max_share=0.5)
    assert (1, (1, 0)) not in list(zip(table.centre, table.members))
    table = _candidate_llrs(np.array([1, 5, 1, 1]), np.ones(4), xy, max_share=0.75)
    zones_b = [set(m) for c, m in zip(table.centre, table.members) if c == 1]
    assert zones_b == [{1}, {0, 1, 2}]


def test_graph_zones_grow_through_neighbours_only():
    # A(0,0) B(0,1) C(1,1) D(0.5,0); links A-B, B-C, C-D. D is nearest to A but not adjacent to it.
    ids = ["A", "B", "C", "D"]
    xy = pd.DataFrame({"x": [0, 0, 1, 0.5], "y": [0, 1, 1, 0]}, index=ids, dtype=float)
    g = AreaGraph.from_edges(ids, [("A", "B"), ("B", "C"), ("C", "D")])
    cases = pd.Series([1, 1, 1, 1], index=ids)
    graph_zones = _candidate_llrs(cases, pd.Series(1.0, index=ids), xy, graph=g, max_share=0.5)
    circle_zones = _candidate_llrs(cases, pd.Series(1.0, index=ids), xy, max_share=0.5)
    from_a = [m for c, m in zip(graph_zones.centre, graph_zones.members) if c == "A"]
    assert from_a == [("A",), ("A", "B")]
    assert [m for c, m in zip(circle_zones.centre, circle_zones.members) if c == "A"] == [("A",), ("A", "D")]
    # from C, B (distance 1) and D (distance 1.118) are both adjacent: nearest first
    assert [m for c, m in zip(graph_zones.centre, graph_zones.members) if c == "C"] == [("C",), ("C", "B")]


# ---------------------------------------------------------------- invented regions
def _region(n=150, seed=0, planted=None, rr=2.0, mean_cases=6.0):
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 10, (n, 2))
    pop = rng.uniform(500, 3000, n)
    e = pop / pop.sum() * mean_cases * n
    lam = e.copy()
    if planted is not None:
        lam[planted] *= rr
    return xy, pop, e, rng.poisson(lam)


def test_planted_cluster_found_and_significant():
    xy, pop, e, _ = _region(seed=1)
    planted = np.argsort(np.hypot(*(xy - xy[0]).T))[:8]
    _, _, _, cases = _region(seed=1, planted=planted, rr=2.5)
    res = spatial_scan(cases, e, xy, population=pop, replicates=199, seed=0)
    found = set(res.members[0])
    assert len(found & set(planted)) >= 6
    assert res.p_value[0] == pytest.approx(1 / 200)
    assert res.p_gumbel[0] < 0.005
    member = res.district_membership()
    assert member.in_significant_zone.sum() == sum(len(m) for m, s in zip(res.members, res.significant) if s)
    assert (member.zone.to_numpy()[res.members[0]] == 1).all()


def test_low_direction_finds_a_deficit():
    xy, pop, e, _ = _region(seed=4)
    planted = np.argsort(np.hypot(*(xy - xy[5]).T))[:10]
    _, _, _, cases = _region(seed=4, planted=planted, rr=0.2)
    low = spatial_scan(cases, e, xy, population=pop, direction="low", replicates=99, seed=0)
    assert low.observed[0] < low.expected[0]
    assert len(set(low.members[0]) & set(planted)) >= 6
    both = spatial_scan(cases, e, xy, population=pop, direction="both", replicates=99, seed=0)
    high = spatial_scan(cases, e, xy, population=pop, direction="high", replicates=99, seed=0)
    # the two-sided scan keeps the larger of the one-sided maxima (Kulldorff 1997)
    assert both.llr[0] == pytest.approx(max(low.llr[0], high.llr[0]), rel=1e-12)


def test_same_seed_same_result_and_p_value_formula():
    xy, _, e, cases = _region(seed=2)
    a = spatial_scan(cases, e, xy, replicates=70, seed=11)
    b = spatial_scan(cases, e, xy, replicates=70, seed=11)
    c = spatial_scan(cases, e, xy, replicates=70, seed=12)
    np.testing.assert_array_equal(a.replicate_maxima, b.replicate_maxima)
    assert not np.array_equal(a.replicate_maxima, c.replicate_maxima)
    # replicate r depends only on (seed, r): the first 40 of 70 equal a 40-replicate run
    d = spatial_scan(cases, e, xy, replicates=40, seed=11)
    np.testing.assert_array_equal(a.replicate_maxima[:40], d.replicate_maxima)
    want = (1 + (a.replicate_maxima >= a.llr[:, None] - 1e-9).sum(axis=1)) / 71
    np.testing.assert_allclose(a.p_value, want, rtol=0)  # exact rank p-value (common practice: Dwass 1957)
    assert (a.replicate_maxima >= 0).all()


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 10_000), st.sampled_from(["high", "low", "both"]))
def test_llr_nonnegative_and_order_invariant(seed, direction):
    xy, _, e, cases = _region(n=30, seed=seed)
    ids = [f"d{i:02d}" for i in range(30)]
    s_cases = pd.Series(cases, index=ids)
    s_e = pd.Series(e, index=ids)
    locs = pd.DataFrame(xy, index=ids)
    table = _candidate_llrs(s_cases, s_e, locs, max_share=0.3, direction=direction)
    assert (table.llr >= 0).all()
    res = spatial_scan(s_cases, s_e, locs, max_share=0.3, direction=direction, replicates=9, seed=1)
    perm = np.random.default_rng(seed).permutation(30)
    res2 = spatial_scan(s_cases.iloc[perm], s_e.iloc[perm] * 3.7, locs.iloc[perm], max_share=0.3,
                        direction=direction, replicates=9, seed=1)
    # reordering districts and rescaling expected counts leave the zones and their LLRs unchanged
    np.testing.assert_allclose(res.llr, res2.llr, rtol=1e-10)
    assert [set(m) for m in res.to_frame().members] == [set(m) for m in res2.to_frame().members]


@pytest.mark.slow
def test_gumbel_p_agrees_with_monte_carlo_p():
    """Abrams, Kleinman & Kulldorff (2010): the Gumbel fit to the replicate maxima tracks the Monte Carlo
    tail; the acceptance rule here is agreement within a factor of 2 for p in [0.001, 0.05]."""
    xy, pop, e, cases = _region(n=120, seed=7)
    res = spatial_scan(cases, e, xy, population=pop, replicates=9999, seed=5)
    maxima = np.sort(res.replicate_maxima)
    for p in (0.05, 0.02, 0.01, 0.005, 0.002, 0.001):
        x = maxima[round((1 - p) * len(maxima)) - 1]
        p_mc = (1 + (maxima >= x).sum()) / (len(maxima) + 1)
        p_g = float(_gumbel_p(np.array([x]), maxima)[0])
        assert 0.5 <= p_g / p_mc <= 2.0, (p, p_mc, p_g)


def test_gumbel_p_formula():
    # Gumbel moments (from memory): mean = mu + 0.5772 beta, sd = pi beta / sqrt(6); P(X > x) = 1 - exp(-exp(-z))
    maxima = np.array([1.0, 2.0, 3.0, 4.0, 5.0])
    beta = np.std(maxima, ddof=1) * math.sqrt(6) / math.pi
    mu = 3.0 - 0.5772156649 * beta
    want = 1 - math.exp(-math.exp(-(6.0 - mu) / beta))
    assert _gumbel_p(np.array([6.0]), maxima)[0] == pytest.approx(want, rel=1e-9)


# ---------------------------------------------------------------- prospective
def _weekly(n=8, weeks=10, level=3):
    x = [0.0, 1.0, 2.2, 3.0, 4.5, 5.1, 6.6, 7.2][:n]
    xy = np.column_stack([x, np.zeros(n)])
    y = np.full((n, weeks), level)
    return xy, y


def test_prospective_cylinder_llr_by_hand_expected_baseline():
    xy, y = _weekly()
    y[2:4, -2:] = 12
    cols = [f"2026-W{w:02d}" for w in range(1, 11)]
    cases = pd.DataFrame(y, columns=cols)
    res = prospective_scan(cases, np.ones(8), xy, max_weeks=4, baseline="expected", max_share=0.25,
                           replicates=99, seed=0)
    top = res.to_frame().loc[1]
    assert set(top.members) == {2, 3} and top.weeks == 2
    assert top.first_week == "2026-W09" and top.last_week == "2026-W10"
    # by hand: total C = 8*8*3 + 2*(8*3 + 2*9) = 276; each of the last two weeks has 42 cases spread evenly over
    # 8 districts, so the cylinder expects 2 * 2 * 42/8 = 21 and holds 48.
    total = 276
    assert res.total_cases == total
    assert top.observed == 48 and top.expected == pytest.approx(21.0)
    assert top.llr == pytest.approx(hand_llr(48, 21, total), rel=1e-12)


def test_prospective_history_baseline_by_hand():
    xy, y = _weekly()
    y[:, :6] = 2  # six earlier weeks; district 0 never has a case
    y[0, :] = 0
    y[2:4, -1] = 15
    res = prospective_scan(y, np.ones(8), xy, max_weeks=4, baseline="history", max_share=0.25,
                           replicates=99, seed=0)
    assert set(res.members[0]) == {2, 3} and res.weeks[0] == 1
    # by hand: past cases 0, 12, ..., 12 (84 in all), one average week = 84/6 = 14 cases spread evenly (1.75 each);
    # share of district 2 = (12 + 1.75) / (84 + 14); the newest week has 5*3 + 2*15 = 45 cases.
    share = (12 + 1.75) / 98
    e = 2 * 45 * share
    total = 3 * 7 * 3 + 45  # only the last four weeks are scanned
    assert res.total_cases == total
    assert res.expected[0] == pytest.approx(e, rel=1e-12)
    assert res.llr[0] == pytest.approx(hand_llr(30, e, total), rel=1e-12)
    # district 0, with no past cases, still has a positive expectation
    assert res.district_expected[0] > 0


def test_prospective_no_recent_excess_is_not_significant():
    xy, _, e, _ = _region(n=60, seed=9)
    rng = np.random.default_rng(3)
    y = rng.poisson(np.outer(e / 6, np.ones(12)))
    res = prospective_scan(y, e, xy, replicates=99, seed=4)
    assert res.kind == "space-time"
    assert not res.significant[0]
    assert "recurrence" in res.summary()


# ---------------------------------------------------------------- errors
@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"max_share": 0.6}, r"The 'max_share' parameter of spatial_scan must be in \(0, 0.5\]. Got 0.6 instead."),
        ({"direction": "up"}, r"The 'direction' parameter of spatial_scan must be one of 'high', 'low', 'both'"),
        ({"replicates": 0}, r"The 'replicates' parameter of spatial_scan must be an integer >= 1"),
        ({"seed": -1}, r"The 'seed' parameter of spatial_scan must be an integer >= 0 or None"),
    ],
)
def test_parameter_errors(kwargs, match):
    cases, pop, xy = _line()
    with pytest.raises(ParameterError, match=match):
        spatial_scan(cases, pop, xy, **kwargs)


def test_input_errors():
    cases, pop, xy = _line()
    with pytest.raises(InputError, match=r"non-whole count"):
        spatial_scan(cases + 0.5, pop, xy)
    with pytest.raises(InputError, match=r"negative"):
        spatial_scan(cases * -1, pop, xy)
    with pytest.raises(InputError, match=r"expected count is 0 in 1 district\(s\) \(A\)"):
        spatial_scan(cases, pop.where(pop.index != "A", 0.0), xy)
    with pytest.raises(InputError, match=r"locations given to spatial_scan miss 1 district\(s\) \(F\)"):
        spatial_scan(cases, pop, xy.drop("F"))
    with pytest.raises(InputError, match=r"needs at least 5 weeks"):
        prospective_scan(np.ones((6, 4), dtype=int), np.ones(6), xy.to_numpy())


# ---------------------------------------------------------------- result object and map
def test_result_table_summary_and_map():
    ids = [f"d{i}" for i in range(10)]
    gdf = gpd.GeoDataFrame(geometry=[box(i, 0, i + 1, 1 + (i % 3) / 3) for i in range(10)], index=ids, crs=27700)
    cases = pd.Series([2, 3, 2, 12, 14, 3, 2, 3, 2, 2], index=ids)
    res = spatial_scan(cases, pd.Series(1.0, index=ids), gdf, max_share=0.2, replicates=99, seed=1, max_zones=3)
    assert isinstance(res, ScanResult)
    frame = res.to_frame()
    assert list(frame.columns) == ["centre", "members", "n_districts", "radius", "population", "observed",
                                   "expected", "ratio_inside", "ratio_outside", "risk_ratio", "llr", "p_value",
                                   "p_gumbel", "significant"]
    assert frame.index.name == "rank" and frame.index[0] == 1
    assert set(frame.loc[1, "members"]) == {"d3", "d4"}
    assert "centre d" in res.summary() and "<table" in res._repr_html_()
    ax = scan_map(gdf, res)
    gids = [c.get_gid() for c in ax.collections]
    assert "scan-zone-1" in gids
    zone = next(c for c in ax.collections if c.get_gid() == "scan-zone-1")
    assert zone.get_linestyle()[0][1] is None  # solid: significant
    texts = [t.get_text() for t in ax.findobj(lambda a: hasattr(a, "get_gid") and a.get_gid() == "scan-legend")[0]
             .get_texts()]
    assert texts[0].startswith("scan zone, p < 0.05")
    only = scan_map(gdf, res, significant_only=True)
    assert sum(str(c.get_gid()).startswith("scan-zone") for c in only.collections) == int(res.significant.sum())


@pytest.mark.parametrize("direction", ["high", "low", "both"])
def test_replicate_kernel_equals_observed_search_on_each_replicate(direction):
    """The pruned block kernel must give, for every replicate, the maximum found by the plain search."""
    from areamap import _scan_kernels as k

    xy, pop, e, _ = _region(n=80, seed=21)
    rng = np.random.default_rng(5)
    p = e / e.sum()
    members, offsets, valid = k.circle_lists(xy, pop, 0.3 * pop.sum())
    # two weeks of 200 cases each, 32 replicates; heights: the newest week, then both weeks (as in a cylinder)
    newest = rng.multinomial(200, p, size=32).T
    older = rng.multinomial(200, p, size=32).T
    counts = np.ascontiguousarray(np.stack([newest, newest + older], axis=1), dtype=np.int32)
    exp = np.ascontiguousarray(np.stack([200 * p, 400 * p], axis=1))
    total = 400
    xl = k.xlogx_table(total)
    code = {"high": 1, "low": -1, "both": 0}[direction]
    fast = k.replicate_maxima(members, offsets, valid, counts, exp, total, xl, code)
    taken = np.zeros(80, dtype=np.bool_)
    for b in range(32):
        obs = np.ascontiguousarray(counts[:, :, b], dtype=np.int64)
        best = k.best_zones(members, offsets, valid, obs, exp, total, xl, code, taken, np.zeros((0, 2)))[0]
        assert fast[b] == pytest.approx(best.max(), rel=1e-12, abs=1e-12)  # same sums, same formula


def test_graph_zones_equal_circles_on_a_delaunay_graph():
    """On a Delaunay triangulation every point has a neighbour closer to any given target point (greedy routing
    succeeds; Bose & Morin 2004, from memory), so the nearest point outside a circle always touches it and
    graph-grown zones coincide with circles: an independent check of the growth kernel."""
    import scipy.sparse as sp
    from scipy.spatial import Delaunay

    from areamap import _scan_kernels as k

    rng = np.random.default_rng(8)
    xy = rng.uniform(0, 10, (300, 2))
    pop = rng.uniform(100, 900, 300)
    tri = Delaunay(xy).simplices
    a = np.concatenate([tri[:, 0], tri[:, 1], tri[:, 2]])
    b = np.concatenate([tri[:, 1], tri[:, 2], tri[:, 0]])
    adj = sp.csr_array((np.ones(2 * a.size), (np.r_[a, b], np.r_[b, a])), shape=(300, 300))
    adj.sum_duplicates()
    m1, o1, v1 = k.circle_lists(xy, pop, 0.2 * pop.sum())
    m2, o2, v2 = k.graph_lists(xy, pop, 0.2 * pop.sum(), adj.indptr, adj.indices)
    assert v1.all() and v2.all()  # no distance ties among random points
    np.testing.assert_array_equal(o1, o2)
    np.testing.assert_array_equal(m1, m2)
