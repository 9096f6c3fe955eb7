"""Tests for areamap.geostatistics: risk semivariogram, Poisson kriging, surface, cross-validation."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from shapely.geometry import Polygon, box

from areamap.errors import InputError, ModelError, ModelWarning, ParameterError
from areamap.geostatistics import (
    RiskVariogram,
    VariogramModel,
    cross_validate_smoothers,
    discretize_areas,
    ordinary_kriging,
    poisson_kriging,
    risk_surface_map,
    risk_variogram,
    variogram_plot,
)
from areamap.geostatistics._variogram import _lag_sums, _standardised
from tests.conftest import grid_graph


# ------------------------------------------------------------------------------------------------ fixtures
def lattice(side: int) -> gpd.GeoDataFrame:
    """side x side unit squares, ids 'r{row}c{col}' in row-major order (rows counted from the top)."""
    cells, ids = [], []
    for r in range(side):
        for c in range(side):
            cells.append(box(c, side - r - 1, c + 1, side - r))
            ids.append(f"r{r}c{c}")
    return gpd.GeoDataFrame(geometry=cells, index=pd.Index(ids, name="area"))


@pytest.fixture(scope="module")
def smooth_data():
    """12 x 12 lattice, populations 1,000-9,000, Poisson counts from a smooth risk surface (invented)."""
    areas = lattice(12)
    xy = np.column_stack([areas.centroid.x, areas.centroid.y])
    risk = np.exp(0.35 * np.sin(xy[:, 0] / 2.5) + 0.25 * np.cos(xy[:, 1] / 3.0))
    rng = np.random.default_rng(20261202)
    pop = rng.integers(1_000, 9_000, len(areas)).astype(float)
    cases = rng.poisson(pop * 2e-3 * risk).astype(float)
    return areas, pd.Series(cases, areas.index), pd.Series(pop, areas.index), risk


MODEL = VariogramModel("exponential", nugget=0.01, partial_sill=0.08, range=6.0)


# ------------------------------------------------------------------------------------------ variogram models
def test_model_formulas():
    # Journel and Huijbregts (1978), ch. II: spherical reaches the sill exactly at the range; the exponential
    # and Gaussian models (practical-range form) reach 1 - exp(-3) = 95% of the partial sill there.
    h = np.array([0.0, 3.0, 6.0, 12.0])
    sph = VariogramModel("spherical", nugget=0.5, partial_sill=2.0, range=6.0)
    # by hand at h = 3: 0.5 + 2 * (1.5 * 0.5 - 0.5 * 0.125) = 0.5 + 2 * 0.6875 = 1.875
    assert_allclose(sph.semivariance(h), [0.0, 1.875, 2.5, 2.5], rtol=1e-12)  # exact arithmetic
    exp_ = VariogramModel("exponential", nugget=0.5, partial_sill=2.0, range=6.0)
    assert_allclose(exp_.semivariance(6.0), 0.5 + 2.0 * (1 - np.exp(-3.0)), rtol=1e-12)
    gau = VariogramModel("gaussian", nugget=0.0, partial_sill=1.0, range=2.0)
    assert_allclose(gau.semivariance(1.0), 1 - np.exp(-0.75), rtol=1e-12)
    assert_allclose(sph.covariance(0.0), 2.5, rtol=0)  # C(0) includes the nugget
    assert_allclose(sph.covariance(h[1:]) + sph.semivariance(h[1:]), sph.sill, rtol=1e-12)


@pytest.mark.parametrize("bad, match", [
    (dict(model="cubic"), "'model' parameter of VariogramModel"),
    (dict(range=0.0), "'range' parameter of VariogramModel must be in \\(0, inf\\)"),
    (dict(nugget=-1.0), "'nugget' parameter"),
])
def test_model_parameter_errors(bad, match):
    kw = dict(model="exponential", nugget=0.0, partial_sill=1.0, range=1.0) | bad
    with pytest.raises(ParameterError, match=match):
        VariogramModel(**kw)


# ------------------------------------------------------------------------------------ ordinary point kriging
def test_ordinary_kriging_textbook_example():
    """Isaaks and Srivastava (1989), An Introduction to Applied Geostatistics, ch. 12 (from memory).

    Seven V values around (65E, 137N), covariance C(h) = 10 exp(-0.3 h); the book gives the estimate
    592.7, kriging variance 8.96 and weights 0.173, 0.318, 0.129, 0.086, 0.151, 0.057, 0.086. Because
    the values are recalled, the test also solves the system independently by hand (closed-form Lagrange
    solution with an explicit inverse) and checks the library against that.
    """
    X = np.array([[61, 139], [63, 140], [64, 129], [68, 128], [71, 140], [73, 141], [75, 128]], float)
    v = np.array([477, 696, 227, 646, 606, 791, 783], float)
    x0 = np.array([65.0, 137.0])
    vm = VariogramModel("exponential", nugget=0.0, partial_sill=10.0, range=10.0)  # exp(-3h/10) = exp(-0.3h)
    est, var, w = ordinary_kriging(X, v, [x0], variogram=vm)
    # independent hand computation: lambda = K^-1 (k - mu 1), mu = (1'K^-1 k - 1) / (1'K^-1 1)
    d = np.sqrt(((X[:, None] - X[None]) ** 2).sum(-1))
    K = 10 * np.exp(-0.3 * d)
    k = 10 * np.exp(-0.3 * np.sqrt(((X - x0) ** 2).sum(-1)))
    Ki = np.linalg.inv(K)
    one = np.ones(7)
    mu = (one @ Ki @ k - 1) / (one @ Ki @ one)
    lam = Ki @ (k - mu * one)
    assert_allclose(w[0], lam, rtol=1e-10)  # same system, two routes: round-off only
    assert_allclose(est[0], lam @ v, rtol=1e-10)
    assert_allclose(var[0], 10 - lam @ k - mu, rtol=1e-10)  # sigma^2 = C(0) - lam'k - mu (I&S ch. 12)
    # the printed values (rounded to the book's digits)
    assert_allclose(est[0], 592.7, atol=0.05)
    assert_allclose(var[0], 8.96, atol=0.005)
    assert_allclose(w[0], [0.173, 0.318, 0.129, 0.086, 0.151, 0.057, 0.086], atol=5e-4)


def test_ordinary_kriging_two_points_by_hand():
    # two data points, equal variances: lambda_1 = 1/2 + (c1 - c2) / (2 (C(0) - C12))  (derived by hand from
    # the 3 x 3 ordinary kriging system; common practice as a sanity check)
    vm = VariogramModel("spherical", nugget=0.2, partial_sill=1.0, range=5.0)
    X = np.array([[0.0, 0.0], [3.0, 0.0]])
    t = np.array([[1.0, 1.0]])
    c = vm.covariance(np.hypot(*(X - t).T))
    lam1 = 0.5 + (c[0] - c[1]) / (2 * (vm.sill - vm.covariance(3.0)))
    est, _, w = ordinary_kriging(X, [2.0, 5.0], t, variogram=vm)
    assert_allclose(w[0], [lam1, 1 - lam1], rtol=1e-12)
    assert_allclose(est[0], 2 * lam1 + 5 * (1 - lam1), rtol=1e-12)


# ---------------------------------------------------------------------------- semivariogram of risk (counts)
def test_experimental_semivariogram_matches_rate_scale_formula(smooth_data):
    """Goovaerts (2005) eq. on the rate scale: [sum n_i n_j/(n_i+n_j) (r_i - r_j)^2 - N(h) m*] / (2 sum w)."""
    areas, y, n, _ = smooth_data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        v = risk_variogram(y, n, areas, n_lags=6, max_distance=6.0, model="exponential")
    r = (y / n).to_numpy()
    nn = n.to_numpy()
    m = y.sum() / n.sum()
    xy = np.column_stack([areas.centroid.x, areas.centroid.y])
    i, j = np.triu_indices(len(r), 1)
    d = np.hypot(*(xy[i] - xy[j]).T)
    cls = np.minimum((d / 1.0).astype(int), 5)
    keep = d <= 6.0
    w = nn[i] * nn[j] / (nn[i] + nn[j])
    expect = []
    for k in range(1, 6):  # class [0, 1) is empty on a unit lattice (NaN in the library's table)
        s = keep & (cls == k)
        expect.append((np.sum(w[s] * (r[i][s] - r[j][s]) ** 2) - s.sum() * m) / (2 * w[s].sum()))
    # the library works on the relative-risk scale: divide the rate-scale values by m*^2
    assert np.isnan(v.lags["semivariance"].iloc[0]) and v.lags["pairs"].iloc[0] == 0
    assert_allclose(v.lags["semivariance"].iloc[1:], np.array(expect) / m**2, rtol=1e-9)  # rounding only
    assert_allclose(v.lags["pairs"], [np.sum(keep & (cls == k)) for k in range(6)], rtol=0)


def test_poisson_correction_is_unbiased_under_constant_risk():
    # analytic identity (Monestiez et al. 2006): with constant risk E[w (z_i - z_j)^2] = 1 for every pair,
    # so the corrected semivariance has expectation 0. Averaged over 400 simulated maps the mean is near 0
    # while the uncorrected value sum w (z_i - z_j)^2 / (2 sum w) stays near N / (2 sum w) > 0.
    rng = np.random.default_rng(5)
    xy = rng.uniform(0, 10, (60, 2))
    pop = rng.integers(200, 5_000, 60).astype(float)
    edges = np.array([0.0, 3.0, 6.0, 14.2])
    est, raw = [], []
    for _ in range(400):
        y = rng.poisson(pop * 5e-3).astype(float)
        _, e, z = _standardised(y, pop)
        npairs, wsum, wsq, _, _ = _lag_sums(xy, z, e, edges)
        est.append((wsq - npairs) / (2 * wsum))
        raw.append(wsq / (2 * wsum))
    est, raw = np.mean(est, axis=0), np.mean(raw, axis=0)
    assert np.all(np.abs(est) < 0.25 * raw)  # Monte Carlo: bias removed to within sampling error
    assert np.all(raw > 0.05)


def test_variogram_detects_structure_and_fits(smooth_data):
    areas, y, n, _ = smooth_data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        v = risk_variogram(y, n, areas)
    assert isinstance(v, RiskVariogram)
    assert v.spatial_structure
    assert np.isfinite([v.nugget, v.sill, v.range]).all() and v.sill > 0 and v.range > 0
    assert set(v.candidates.index) == {"exponential", "spherical", "gaussian"}
    sse = v.candidates["weighted_sse"]
    if v.model != "gaussian":  # auto: best fit, the Gaussian needing a 10% margin (documented rule)
        others = sse.drop(index="gaussian")
        assert v.model == others.idxmin() and (sse["gaussian"] > 0.9 * others.min() or v.model == sse.idxmin())
    else:
        assert sse["gaussian"] <= 0.9 * sse.drop(index="gaussian").min()
    assert "Risk semivariogram" in v.summary() and "<pre>" in v._repr_html_()
    assert_allclose(v.to_frame()["model"], v.fitted.semivariance(v.lags["distance"]), rtol=1e-12)


def test_no_spatial_structure_message():
    # counts exactly proportional to population: every relative risk is 1, so all corrected semivariances
    # are negative (-N / 2 sum w) and there is nothing to model.
    areas = lattice(6)
    pop = pd.Series(np.repeat([1000.0, 2000.0, 3000.0], 12), areas.index)
    with pytest.raises(ModelError, match="no spatial structure"):
        risk_variogram(pop * 0.01, pop, areas)


def test_flat_variogram_warns():
    # pure Poisson noise with one isolated extreme area: the fit is flat (structured share small) or the
    # range is shorter than the first lag; either way the user is told.
    rng = np.random.default_rng(11)
    areas = lattice(10)
    pop = pd.Series(rng.integers(2_000, 4_000, 100).astype(float), areas.index)
    y = pd.Series(rng.poisson(pop * 2e-2 * rng.gamma(20.0, 1 / 20.0, 100)).astype(float), areas.index)
    with pytest.warns(ModelWarning, match="no spatial structure|shorter than half the first lag"):
        v = risk_variogram(y, pop, areas, model="exponential")
    assert not v.spatial_structure


def test_variogram_input_errors(smooth_data):
    areas, y, n, _ = smooth_data
    with pytest.raises(InputError, match="'population' must be > 0"):
        risk_variogram(y, n.where(n.index != "r0c0", 0.0), areas)
    with pytest.raises(InputError, match="negative values"):
        risk_variogram(y.where(y.index != "r0c1", -1.0), n, areas)
    with pytest.raises(ParameterError, match="'n_lags' parameter of risk_variogram"):
        risk_variogram(y, n, areas, n_lags=1)
    with pytest.raises(InputError, match="no value for area ids r0c0"):
        risk_variogram(y.drop("r0c0"), n, areas)


# --------------------------------------------------------------------------------------------- discretising
def test_discretize_grid_targets_and_weights():
    areas = gpd.GeoSeries([box(0, 0, 10, 10), box(10, 0, 11, 1), Polygon([(0, 10), (5, 10), (0, 15)])],
                          index=["big", "small", "tri"])
    d = discretize_areas(areas, points_per_area=16)
    assert_allclose(d.weights.sum(axis=1), 1.0, rtol=1e-12)  # weights normalised
    assert np.all((d.counts >= 8) & (d.counts <= 32))  # about the target whatever the size (2x cap)
    f = d.to_frame()
    inside = shapely.contains_xy(np.asarray(areas.loc[f["area"]].values), f["x"], f["y"])
    assert inside.all()
    assert_allclose(d.centres[0], [5.0, 5.0], atol=1e-12)  # symmetric grid on a square


def test_discretize_population_points_and_errors():
    areas = gpd.GeoSeries([box(0, 0, 1, 1), box(1, 0, 2, 1)], index=["A", "B"])
    pts = pd.DataFrame({"x": [0.2, 0.8, 1.5], "y": [0.5, 0.5, 0.5], "area": ["A", "A", "B"],
                        "population": [100.0, 300.0, 50.0]})
    d = discretize_areas(areas, points=pts)
    assert_allclose(d.weights[0, :2], [0.25, 0.75], rtol=1e-12)  # population shares
    assert_allclose(d.centres[0], [0.65, 0.5], rtol=1e-12)  # population-weighted centre by hand
    with pytest.raises(InputError, match="not in the boundaries: C"):
        discretize_areas(areas, points=pts.assign(area=["A", "C", "B"]))
    with pytest.raises(InputError, match="no point with positive weight"):
        discretize_areas(areas, points=pts.assign(population=[1.0, 1.0, 0.0]))


# --------------------------------------------------------------------------------------- area-to-area kriging
def _single_point_areas(xy):
    """Tiny squares around each point, discretised to exactly that point."""
    areas = gpd.GeoSeries([box(x - 0.01, y - 0.01, x + 0.01, y + 0.01) for x, y in xy],
                          index=[f"p{i}" for i in range(len(xy))])
    pts = pd.DataFrame({"x": xy[:, 0], "y": xy[:, 1], "area": areas.index, "population": 1.0})
    return areas, discretize_areas(areas, points=pts)


def test_single_point_areas_equal_ordinary_kriging():
    # acceptance: equal populations, no Poisson term -> area-to-area kriging of single-point areas is ordinary
    # point kriging. Held-out predictions (own count dropped) must equal ordinary kriging from the others,
    # solved here with an explicit inverse (independent route).
    rng = np.random.default_rng(3)
    xy = rng.uniform(0, 10, (25, 2))
    y = rng.poisson(50, 25).astype(float)
    pop = np.full(25, 1000.0)
    areas, pts = _single_point_areas(xy)
    res = poisson_kriging(y, pop, areas, variogram=MODEL, points=pts, neighbours=24, poisson_error=False,
                          negative_weights="keep")
    z = y / (pop * y.sum() / pop.sum())
    for i in (0, 7, 19):
        others = np.delete(np.arange(25), i)
        X = xy[others]
        d = np.hypot(*(X[:, None] - X[None]).transpose(2, 0, 1))
        K = MODEL.covariance(d)
        k = MODEL.covariance(np.hypot(*(X - xy[i]).T))
        Ki = np.linalg.inv(K)
        one = np.ones(24)
        mu = (one @ Ki @ k - 1) / (one @ Ki @ one)
        lam = Ki @ (k - mu * one)
        assert_allclose(res.cv_relative_risk[i], lam @ z[others], rtol=1e-9)  # round-off in two solvers
    # with the own value in the system and no error term, kriging is an exact interpolator
    assert_allclose(res.relative_risk, z, rtol=1e-8)
    assert_allclose(res.relative_risk_sd, 0.0, atol=1e-6)


def test_poisson_term_matches_point_kriging_with_error_variance():
    # the Poisson term adds m*/n_i (1/e_i on the relative-risk scale) to the diagonal only (Goovaerts 2006)
    rng = np.random.default_rng(4)
    xy = rng.uniform(0, 10, (20, 2))
    pop = rng.integers(500, 5_000, 20).astype(float)
    y = rng.poisson(pop * 1e-2).astype(float)
    areas, pts = _single_point_areas(xy)
    res = poisson_kriging(y, pop, areas, variogram=MODEL, points=pts, neighbours=19, negative_weights="keep")
    _m, e, z = _standardised(y, pop)
    est, var, _ = ordinary_kriging(xy, z, xy, variogram=MODEL, error_variance=1 / e)
    assert_allclose(res.relative_risk, est, rtol=1e-9)  # same system, round-off only
    assert_allclose(res.relative_risk_sd**2, var, rtol=1e-7, atol=1e-12)
    assert np.all(res.relative_risk_sd > 0)  # noisy data: no longer an exact interpolator


def test_coherence_area_to_point(smooth_data):
    # acceptance: averaging the area-to-point estimates over an area's cells reproduces its area-to-area
    # estimate (Kyriakidis 2004), checked to 1e-8 on a shared grid discretisation
    areas, y, n, _ = smooth_data
    pts = discretize_areas(areas, grid_shape=(48, 48))
    res = poisson_kriging(y, n, areas, variogram=MODEL, points=pts, surface_shape=(48, 48),
                          negative_weights="keep", neighbours=16)
    agg = res.surface.aggregate()
    assert agg.notna().all()
    assert_allclose(agg.to_numpy(), res.relative_risk, rtol=0, atol=1e-8)
    # surface geometry: transform maps cells to centres inside the right areas
    f = res.surface.to_frame()
    assert len(f) == 48 * 48
    owner = areas.geometry.values[areas.index.get_indexer(f["area"])]
    assert shapely.intersects_xy(np.asarray(owner), f["x"], f["y"]).all()
    assert res.surface.transform == (0.25, 0.0, 0.0, 0.0, -0.25, 12.0)
    assert np.all(res.surface.variance >= 0)
    assert "48 x 48 cells" in res.surface.summary() and "<pre>" in res.surface._repr_html_()


def test_kriging_result_shape_and_invariances(smooth_data):
    areas, y, n, risk = smooth_data
    res = poisson_kriging(y, n, areas, variogram=MODEL)
    f = res.to_frame()
    assert f.index.equals(areas.index)
    assert np.all((f["kriged_rate_low"] <= f["kriged_rate"]) & (f["kriged_rate"] <= f["kriged_rate_high"]))
    assert_allclose(f["kriged_rate"], res.relative_risk * res.regional_rate * 1e5, rtol=1e-12)
    # smoothing helps: closer to the true risk than the raw ratios (invented smooth surface)
    raw = (y / (n * y.sum() / n.sum())).to_numpy()
    assert np.mean((np.log(res.relative_risk) - np.log(risk * raw.mean() / risk.mean())) ** 2) < \
        np.mean((np.log(np.maximum(raw, 0.05)) - np.log(risk * raw.mean() / risk.mean())) ** 2)
    # shuffling area order permutes results; rescaling population leaves relative risks unchanged
    # (one neighbourhood holding every area, so that ties in lattice distances cannot change the sets)
    full = poisson_kriging(y, n, areas, variogram=MODEL, neighbours=len(areas))
    perm = np.random.default_rng(0).permutation(len(areas))
    res_p = poisson_kriging(y.iloc[perm], n.iloc[perm], areas.iloc[perm], variogram=MODEL, neighbours=len(areas))
    assert_allclose(res_p.relative_risk, full.relative_risk[perm], rtol=1e-8)  # solver round-off only
    res_s = poisson_kriging(y, n * 7.0, areas, variogram=MODEL)
    assert_allclose(res_s.relative_risk, res.relative_risk, rtol=1e-10)
    s = res.summary()
    assert "exponential model" in s and "leave-one-out" in s and "ecological fallacy" in s


def test_negative_weights_reported_and_corrected(smooth_data):
    areas, y, n, _ = smooth_data
    # a Gaussian model with no nugget produces screening and negative weights (common practice knowledge)
    gm = VariogramModel("gaussian", nugget=0.0, partial_sill=0.1, range=8.0)
    keep = poisson_kriging(y, n, areas, variogram=gm, negative_weights="keep", neighbours=12)
    zero = poisson_kriging(y, n, areas, variogram=gm, negative_weights="zero", neighbours=12)
    assert (keep.negative_weight_count > 0).any()
    assert_allclose(keep.negative_weight_count, zero.negative_weight_count, rtol=0)
    assert np.all(zero.negative_weight_sum <= 0)
    # zero policy: a convex combination of the neighbourhood's relative risks
    from areamap.geostatistics._kriging import _neighbourhoods
    nb = _neighbourhoods(zero.points.centres, zero.neighbours)
    z = (y / (n * y.sum() / n.sum())).to_numpy()[nb]
    assert np.all((zero.relative_risk >= z.min(axis=1) - 1e-12) & (zero.relative_risk <= z.max(axis=1) + 1e-12))
    assert any("negative kriging weights" in note for note in zero.notes)
    # the corrected variance is the error variance of the corrected weights, so never below the optimum
    assert np.all(zero.relative_risk_sd >= keep.relative_risk_sd - 1e-9)


def test_kriging_input_errors(smooth_data):
    areas, y, n, _ = smooth_data
    with pytest.raises(ParameterError, match="'negative_weights' parameter of poisson_kriging"):
        poisson_kriging(y, n, areas, variogram=MODEL, negative_weights="clip")
    with pytest.raises(ParameterError, match="'neighbours' parameter of poisson_kriging"):
        poisson_kriging(y, n, areas, variogram=MODEL, neighbours=0)
    with pytest.raises(InputError, match="different areas"):
        poisson_kriging(y, n, areas, variogram=MODEL, points=discretize_areas(areas.iloc[::-1]))
    with pytest.raises(InputError, match="RiskVariogram or VariogramModel"):
        poisson_kriging(y, n, areas, variogram="exponential")


# ---------------------------------------------------------------------------------------------------- plots
def test_plots(smooth_data):
    areas, y, n, _ = smooth_data
    import matplotlib.pyplot as plt
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ModelWarning)
        v = risk_variogram(y, n, areas, model="spherical")
    _fig, (a1, a2) = plt.subplots(1, 2)
    assert variogram_plot(v, ax=a1) is a1
    gids = {c.get_gid() for c in a1.collections} | {ln.get_gid() for ln in a1.lines}
    assert {"experimental", "model", "variance"} <= gids
    res = poisson_kriging(y, n, areas, variogram=v, surface_shape=30)
    assert risk_surface_map(res, areas, ax=a2) is a2
    assert a2.images[0].get_gid() == "surface" and a2.images[0].get_array().shape == (30, 30)
    assert risk_surface_map(res.surface, areas, quantity="sd").images
    with pytest.raises(ParameterError, match="'quantity' parameter of risk_surface_map"):
        risk_surface_map(res, areas, quantity="variance")
    with pytest.raises(InputError, match="no surface"):
        risk_surface_map(poisson_kriging(y, n, areas, variogram=v), areas)


# --------------------------------------------------------------------------------------- cross-validation
def test_cross_validation_eb_and_kriging(smooth_data):
    areas, y, n, _ = smooth_data
    g = grid_graph(12, 12, queen=True)
    cv = cross_validate_smoothers(y, n, areas, graph=g, kriging=poisson_kriging(y, n, areas, variogram=MODEL),
                                  car_model=None)
    p = cv.predictions
    yy, ee = y.to_numpy(), p["expected"].to_numpy()
    # global EB held-out prediction: regional ratio without the area (Marshall 1991), by hand for one area
    assert_allclose(p["global_eb"].iloc[5], (yy.sum() - yy[5]) / (ee.sum() - ee[5]), rtol=1e-12)
    # local EB: pooled ratio of the queen neighbours of r0c0 (r0c1, r1c0, r1c1), by hand
    nb = [1, 12, 13]
    assert_allclose(p["local_eb"].iloc[0], yy[nb].sum() / ee[nb].sum(), rtol=1e-12)
    # scores by hand for global EB
    mu = ee * p["global_eb"].to_numpy()
    dev = np.mean(2 * (np.where(yy > 0, yy * np.log(np.where(yy > 0, yy, 1) / mu), 0) - (yy - mu)))
    assert_allclose(cv.scores.loc["global_eb", "deviance"], dev, rtol=1e-10)
    # on a smooth surface, spatial smoothers predict held-out districts better than the global mean
    assert cv.scores.loc["poisson_kriging", "deviance"] < cv.scores.loc["global_eb", "deviance"]
    assert cv.best in {"poisson_kriging", "local_eb"}
    assert "best by deviance" in cv.summary()


@pytest.mark.slow
def test_cross_validation_with_bym2(smooth_data):
    areas, y, n, _ = smooth_data
    g = grid_graph(12, 12, queen=True)
    cv = cross_validate_smoothers(y, n, areas, graph=g, kriging=poisson_kriging(y, n, areas, variogram=MODEL),
                                  car_folds=3, seed=1)
    assert cv.predictions["bym2"].notna().all()
    assert cv.scores.loc["bym2", "scheme"] == "3-fold"
    # held-out BYM2 predictions borrow from neighbours: better than the global mean on a smooth surface
    assert cv.scores.loc["bym2", "deviance"] < cv.scores.loc["global_eb", "deviance"]


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), model=st.sampled_from(["exponential", "spherical", "gaussian"]),
       nugget=st.floats(0.0, 0.5))
def test_ordinary_kriging_invariants(seed, model, nugget):
    # textbook properties (Isaaks and Srivastava 1989, ch. 12): weights sum to one; with no nugget kriging is an
    # exact interpolator with zero variance at the data; the variance is never negative
    rng = np.random.default_rng(seed)
    X = rng.uniform(0, 10, (8, 2))
    v = rng.normal(size=8)
    vm = VariogramModel(model, nugget=nugget, partial_sill=1.0, range=float(rng.uniform(2, 8)))
    T = rng.uniform(0, 10, (5, 2))
    est, var, w = ordinary_kriging(X, v, T, variogram=vm)
    assert_allclose(w.sum(axis=1), 1.0, atol=1e-8)  # constraint, up to conditioning of the system
    assert np.all(var > -1e-8)
    if nugget == 0.0 and model != "gaussian":  # the Gaussian model without nugget is too ill-conditioned
        est0, var0, _ = ordinary_kriging(X, v, X, variogram=vm)
        assert_allclose(est0, v, atol=1e-8)
        assert_allclose(var0, 0.0, atol=1e-8)


def test_noise_corrected_mse_is_unbiased():
    # analytic identity: E[e (z - p)^2] = e (rho - p)^2 + rho with z = y / e, y ~ Poisson(e rho); subtracting
    # sum z / sum e leaves an unbiased estimate of the weighted MSE against the true risk (Monte Carlo check)
    from areamap.geostatistics._kriging import cv_scores

    rng = np.random.default_rng(8)
    e = rng.uniform(0.5, 20.0, 200)
    rho = np.exp(rng.normal(0, 0.4, 200))
    p = np.full(200, 1.1)
    target = np.sum(e * (rho - p) ** 2) / e.sum()
    est = [cv_scores(rng.poisson(e * rho).astype(float), e, p)["risk_mse"] for _ in range(2000)]
    assert_allclose(np.mean(est), target, rtol=0.03)  # Monte Carlo error about 1% of the target here
