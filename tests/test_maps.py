"""Tests of areamap.maps (and the private classification module behind it).

Plots are inspected through their artists (face colours, legend texts, line data), never pixels.
"""

from __future__ import annotations

import itertools
import warnings

import geopandas as gpd
import matplotlib
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
from hypothesis import given, settings
from hypothesis import strategies as hst
from matplotlib.colors import to_rgba
from shapely.geometry import Polygon, box

from areamap import maps
from areamap.errors import DataWarning, GraphError, InputError, ParameterError
from areamap.maps import (
    CLUSTER_COLOURS,
    CLUSTER_LABELS,
    CLUSTER_STYLE,
    bivariate_colours,
    bivariate_map,
    choropleth,
    class_colours,
    classify,
    cluster_map,
    exceedance_map,
    funnel_limits,
    funnel_plot,
    moran_scatterplot,
    natural_breaks,
    palette_colours,
    ranked_interval_plot,
    raw_beside_smoothed,
    relative_risk_breaks,
    shrinkage_plot,
    uncertain_areas,
)

NAMES = ["Ashby", "Brook", "Cairn", "Dunmere", "Eyot", "Fallow"]


@pytest.fixture
def strip() -> gpd.GeoDataFrame:
    """Six unit squares in a row, metric CRS (British National Grid, metres), invented district names."""
    geoms = [box(i * 1000, 0, (i + 1) * 1000, 1000) for i in range(6)]
    return gpd.GeoDataFrame(
        {"area_name": NAMES, "ratio": [0.4, 0.95, 1.0, 1.3, 2.5, np.nan]},
        geometry=geoms, crs=27700, index=pd.Index([f"D{i}" for i in range(6)], name="area_id"),
    )


def _collection(ax, gid):
    found = [c for c in ax.collections if c.get_gid() == gid]
    assert len(found) == 1, f"expected one collection with gid {gid!r}, got {len(found)}"
    return found[0]


def _legend_texts(ax) -> list[str]:
    return [t.get_text() for t in ax.get_legend().get_texts()]


def _srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """sRGB (IEC 61966-2-1) -> CIELAB under D65, written here independently of the package (from memory)."""
    rgb = np.asarray(rgb, dtype=float)[..., :3]
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], axis=-1)


# ------------------------------------------------------------------------ classification
def test_quantile_breaks_match_numpy(rng):
    x = rng.gamma(2.0, 3.0, 501)
    c = classify(x, scheme="quantiles", k=5)
    # reference library: numpy.quantile with its default (linear) interpolation
    np.testing.assert_allclose(c.breaks, np.quantile(x, [0.2, 0.4, 0.6, 0.8]), rtol=0, atol=0)  # same call, exact
    # distinct values: each quantile class holds n/k areas up to one (analytic)
    assert all(abs(n - 501 / 5) <= 1 for n in c.counts)
    assert sum(c.counts) == 501


def test_equal_intervals_by_arithmetic():
    x = np.array([2.0, 3.0, 5.0, 9.0, 12.0])
    c = classify(x, scheme="equal_intervals", k=5)
    # width (12 - 2) / 5 = 2: cut points 4, 6, 8, 10 (arithmetic)
    np.testing.assert_allclose(c.breaks, [4.0, 6.0, 8.0, 10.0], rtol=1e-12)  # float rounding only
    assert c.counts == (2, 1, 0, 1, 1)
    assert c.edges[0] == 2.0 and c.edges[-1] == 12.0


def _within_ss(x: np.ndarray, labels: np.ndarray) -> float:
    return sum(((x[labels == g] - x[labels == g].mean()) ** 2).sum() for g in np.unique(labels))


def test_natural_breaks_against_brute_force_over_all_partitions():
    """Fisher (1958) / Jenks (1977): minimise the within-class sum of squares.

    Brute force over every assignment of 8 values to 3 non-empty groups (3^8 labellings),
    with no assumption that optimal groups are contiguous.
    """
    x = np.array([1.0, 1.5, 2.0, 6.0, 6.5, 7.5, 15.0, 20.0])
    best = np.inf
    for lab in itertools.product(range(3), repeat=x.size):
        lab = np.array(lab)
        if len(np.unique(lab)) < 3:
            continue
        best = min(best, _within_ss(x, lab))
    c = classify(x, scheme="natural_breaks", k=3)
    got = _within_ss(x, c.class_index)
    np.testing.assert_allclose(got, best, rtol=1e-12)  # both exact sums of squares; float rounding only
    assert c.breaks == (2.0, 7.5)  # the optimum is unique here: {1, 1.5, 2}, {6, 6.5, 7.5}, {15, 20}


@settings(max_examples=40, deadline=None)
@given(
    hst.lists(hst.floats(-1e3, 1e3, allow_nan=False), min_size=6, max_size=40),
    hst.integers(2, 5),
)
def test_natural_breaks_never_worse_than_other_schemes(values, k):
    """Optimality invariant: no other grouping into k classes has a smaller within-class SS."""
    x = np.array(values)
    if np.unique(x).size < k:
        return
    nb = classify(x, scheme="natural_breaks", k=k)
    for other in ("quantiles", "equal_intervals"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DataWarning)  # ties may merge classes; irrelevant here
            oc = classify(x, scheme=other, k=k)
        # relative slack for float rounding in the prefix-sum costs
        assert _within_ss(x, nb.class_index) <= _within_ss(x, oc.class_index) * (1 + 1e-9) + 1e-9


def test_natural_breaks_with_ties_uses_counts():
    # weights from repeated values: the optimum for {0 x10, 1, 9, 10 x10} into 2 classes splits at 1
    x = np.array([0.0] * 10 + [1.0, 9.0] + [10.0] * 10)
    assert natural_breaks(x, 2)[0] == (1.0,)


def test_natural_breaks_sampling_note_is_deterministic(rng):
    x = rng.normal(size=5000)
    a, note_a = natural_breaks(x, 4, max_values=500)
    b, note_b = natural_breaks(x, 4, max_values=500)
    assert a == b and note_a is not None and "approximate" in note_a
    # the sampled breaks stay close to the exact ones (500 of 5000 order statistics; common practice)
    exact, _ = natural_breaks(x, 4, max_values=5000)
    np.testing.assert_allclose(a, exact, atol=0.1)  # sampling error of order statistics ~ 1/sqrt(500)


def test_relative_risk_breaks_are_log_symmetric():
    b = np.array(relative_risk_breaks())
    np.testing.assert_allclose(np.log(b), -np.log(b[::-1]), rtol=1e-12)  # reciprocals: exact up to rounding
    assert b.tolist()[4:] == [1.1, 1.25, 1.5, 2.0]
    c = classify([0.3, 0.909, 1.0, 1.1, 1.2, 3.0], scheme="relative_risk")
    assert c.k == 9
    assert c.labels[0] == "≤ 0.50" and c.labels[4] == "0.91 – 1.10" and c.labels[-1] == "> 2.00"
    # right-closed classes: 1.1 belongs to the middle class
    assert c.class_index.tolist() == [0, 3, 4, 4, 5, 8]


def test_user_breaks_round_trip_and_missing():
    s = pd.Series([0.1, np.nan, 5.0, 2.0], index=list("abcd"))
    c = classify(s, scheme="user", breaks=[1, 3])
    assert c.class_index.tolist() == [0, -1, 2, 1]
    assert c.n_missing == 1 and c.counts == (1, 1, 1)
    c2 = classify(s, scheme="user", breaks=c.breaks)
    assert c2.class_index.tolist() == c.class_index.tolist()
    areas = c.to_frame("areas")
    assert list(areas.index) == list("abcd") and pd.isna(areas.loc["b", "class_label"])
    assert c.to_frame()["count"].tolist() == [1, 1, 1]
    assert "missing" in c.summary() and "<table" in c._repr_html_()


def test_quantiles_with_ties_warn_and_merge():
    x = np.array([0.0] * 8 + [1.0, 2.0])
    with pytest.warns(DataWarning, match="instead of 5"):
        c = classify(x, scheme="quantiles", k=5)
    assert sum(c.counts) == 10 and c.k < 5


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"scheme": "jenks"}, r"The 'scheme' parameter of classify must be one of"),
        ({"scheme": "user"}, r"The 'breaks' parameter of classify must be a sequence"),
        ({"scheme": "user", "breaks": [2, 1]}, r"strictly increasing"),
        ({"scheme": "quantiles", "breaks": [1]}, r"must be None when scheme='quantiles'"),
        ({"scheme": "relative_risk", "breaks": [-1, 2]}, r"positive cut points"),
        ({"k": 0}, r"The 'k' parameter of classify must be an integer >= 1"),
    ],
)
def test_classify_parameter_errors(kwargs, match):
    with pytest.raises(ParameterError, match=match):
        classify([1.0, 2.0, 3.0], **kwargs)


def test_classify_rejects_infinite():
    with pytest.raises(InputError, match="infinite"):
        classify([1.0, np.inf])


# ---------------------------------------------------------------------------- palettes
def test_sequential_palette_lightness_is_monotone():
    lab = _srgb_to_lab(np.array(palette_colours("sequential", 9)))
    assert np.all(np.diff(lab[:, 0]) < -3)  # strictly darker class by class (readable in greyscale)


def test_diverging_palette_has_light_neutral_centre():
    lab = _srgb_to_lab(np.array(palette_colours("diverging", 9)))
    assert np.argmax(lab[:, 0]) == 4 and lab[4, 0] > 90
    assert np.hypot(lab[4, 1], lab[4, 2]) < 5  # near-neutral centre (chroma < 5 is near grey; common practice)
    # the two ends lie on opposite sides of the blue-yellow axis (b* < 0 and b* > 0),
    # which red-green colour-vision deficiencies preserve
    assert lab[0, 2] < -30 and lab[-1, 2] > 30


def test_diverging_colours_centre_on_one_for_asymmetric_breaks():
    c = classify([1.0], scheme="relative_risk", breaks=[0.5, 0.9, 1.1, 1.5, 2.0, 3.0])
    cols = class_colours(c, "diverging", centre=1.0)
    lab = _srgb_to_lab(np.array(cols))
    assert np.argmax(lab[:, 0]) == 2  # the class 0.9–1.1 holding 1 is the lightest


# ------------------------------------------------------------------------- choropleth
def test_polygon_gets_face_colour_of_its_class(strip):
    ax = choropleth(strip, "ratio", scheme="user", breaks=[0.9, 1.1, 2.0], palette="sequential")
    face = _collection(ax, "areas").get_facecolors()
    seq = palette_colours("sequential", 4)
    # ratio 0.4 -> class 0, 0.95 and 1.0 -> class 1, 1.3 -> class 2, 2.5 -> class 3 (right-closed)
    for i, cls in enumerate([0, 1, 1, 2, 3]):
        np.testing.assert_allclose(face[i], seq[cls], atol=1e-6)  # RGBA stored as float; exact up to rounding
    np.testing.assert_allclose(face[5], to_rgba("#FFFFFF"), atol=1e-6)  # missing drawn white underneath hatch


def test_legend_shows_ranges_and_counts(strip):
    ax = choropleth(strip, "ratio", scheme="user", breaks=[0.9, 1.1, 2.0], missing_label="suppressed")
    assert _legend_texts(ax) == ["≤ 0.9 (1)", "0.9 – 1.1 (2)", "1.1 – 2.0 (1)", "> 2.0 (1)", "suppressed (1)"]
    assert ax.get_legend().get_title().get_text() == "ratio"


def test_missing_values_are_hatched(strip):
    values = strip["ratio"].copy()
    values.iloc[1] = np.nan
    ax = choropleth(strip, values, scheme="relative_risk")
    miss = _collection(ax, "missing")
    assert miss.get_hatch() == "////"
    assert len(miss.get_paths()) == 2
    handle = ax.get_legend().legend_handles[-1]
    assert handle.get_hatch() == "////" and _legend_texts(ax)[-1] == "no data (2)"


def test_suppressed_areas_are_hidden_from_classes(strip):
    ax = choropleth(strip, "ratio", scheme="user", breaks=[1.0], suppressed=["D4"])
    sup = _collection(ax, "suppressed")
    assert len(sup.get_paths()) == 1 and sup.get_hatch() == "xxxx"
    # D4 (2.5) no longer counted in "> 1.0"
    assert _legend_texts(ax)[:2] == ["≤ 1 (3)", "> 1 (1)"]


def test_relative_risk_map_centres_diverging_palette_on_one(strip):
    ax = choropleth(strip, "ratio", scheme="relative_risk")
    face = _collection(ax, "areas").get_facecolors()
    np.testing.assert_allclose(face[2], palette_colours("diverging", 9)[4], atol=1e-6)  # ratio 1.0 -> neutral


def test_uncertain_areas_fade_or_hatch(strip):
    low = [0.1, 0.8, 0.9, 1.0, 0.5, np.nan]
    high = [1.2, 1.1, 1.1, 1.7, 6.0, np.nan]
    unc = uncertain_areas(low, high, max_ratio=4.0)
    # 1.2/0.1 = 12 > 4 and 6/0.5 = 12 > 4 are wide; missing limits count as uncertain
    assert unc.tolist() == [True, False, False, False, True, True]
    ax = choropleth(strip, "ratio", scheme="relative_risk", uncertain=unc)
    alpha = _collection(ax, "areas").get_facecolors()[:, 3]
    assert alpha.tolist() == pytest.approx([0.3, 1, 1, 1, 0.3, 1])  # missing area keeps its white face
    ax2 = choropleth(strip, "ratio", scheme="relative_risk", uncertain=unc, uncertain_style="hatch")
    assert len(_collection(ax2, "uncertain").get_paths()) == 2


def test_uncertain_areas_small_counts():
    s = uncertain_areas(counts=pd.Series([0, 3, 10], index=["a", "b", "c"]), min_count=5)
    assert s.to_dict() == {"a": True, "b": True, "c": False}


def test_map_furniture_metric_and_geographic(strip):
    ax = choropleth(strip, "ratio", title="Weekly ratio", period="2026-W47", source="invented data",
                    label_areas=["D4"])
    assert ax.get_title(loc="left") == "Weekly ratio\n2026-W47"
    assert any(t.get_text() == "1 km" for t in ax.texts)  # width 6 km -> nice bar of 1 km
    caption = next(t.get_text() for t in ax.texts if t.get_gid() == "caption")
    assert "Source: invented data." in caption and "not a public-health directive" in caption
    assert any(t.get_text() == "Eyot" for t in ax.texts)
    geo = gpd.GeoDataFrame({"v": [1.0, 2.0]}, geometry=[box(0, 50, 1, 51), box(1, 50, 2, 51)], crs=4326)
    ax2 = choropleth(geo, "v", scheme="user", breaks=[1.5])
    assert not [p for p in ax2.patches if p.get_gid() == "scale-bar"]
    assert "degrees" in next(t.get_text() for t in ax2.texts if t.get_gid() == "caption")


def test_polygon_with_hole_and_multipolygon_paths():
    ring = Polygon([(0, 0), (10, 0), (10, 10), (0, 10)], holes=[[(3, 3), (6, 3), (6, 6), (3, 6)]])
    from shapely.geometry import MultiPolygon

    g = gpd.GeoDataFrame({"v": [1.0, 2.0]}, geometry=[ring, MultiPolygon([box(20, 0, 21, 1), box(22, 0, 23, 1)])],
                         crs=27700)
    ax = choropleth(g, "v", scheme="user", breaks=[1.5])
    paths = _collection(ax, "areas").get_paths()
    rings = paths[0].to_polygons(closed_only=True)
    assert len(rings) == 2

    def signed_area(r):  # shoelace formula
        return 0.5 * np.sum(r[:-1, 0] * r[1:, 1] - r[1:, 0] * r[:-1, 1])

    # the hole runs opposite to the exterior, so the nonzero fill rule leaves it open
    assert signed_area(rings[0]) == pytest.approx(100.0) and signed_area(rings[1]) == pytest.approx(-9.0)
    assert len(paths[1].to_polygons(closed_only=True)) == 2  # both parts of the multipolygon


@pytest.mark.parametrize(
    "value, match",
    [("ratoi", "Did you mean 'ratio'"), ([1.0, 2.0], r"shape \(2,\) but there are 6 areas")],
)
def test_choropleth_input_errors(strip, value, match):
    with pytest.raises(InputError, match=match):
        choropleth(strip, value)


def test_series_values_are_aligned_by_index(strip):
    shuffled = strip["ratio"].iloc[::-1]
    ax1 = choropleth(strip, shuffled, scheme="relative_risk")
    ax2 = choropleth(strip, "ratio", scheme="relative_risk")
    np.testing.assert_array_equal(_collection(ax1, "areas").get_facecolors(),
                                  _collection(ax2, "areas").get_facecolors())


def test_raw_beside_smoothed_shares_breaks_and_colours(strip):
    raw = strip["ratio"]
    smoothed = pd.Series([0.8, 0.97, 1.0, 1.2, 1.6, np.nan], index=strip.index)
    fig = raw_beside_smoothed(strip, raw, smoothed)
    left, right = fig.axes[:2]
    lab_l = [t.rsplit(" (", 1)[0] for t in _legend_texts(left)]
    lab_r = [t.rsplit(" (", 1)[0] for t in _legend_texts(right)]
    assert lab_l == lab_r
    # the same value (1.0, area D2) has the same colour in both panels
    np.testing.assert_array_equal(_collection(left, "areas").get_facecolors()[2],
                                  _collection(right, "areas").get_facecolors()[2])


# -------------------------------------------------------------------- bivariate, clusters
def test_bivariate_legend_has_nine_cells_with_right_colours(strip):
    rr = [0.5, 1.0, 1.5, 1.5, 0.5, np.nan]
    pr = [0.1, 0.5, 0.9, 0.1, 0.9, 0.5]
    ax = bivariate_map(strip, rr, pr)
    grid = bivariate_colours()
    legend_ax = next(a for a in ax.child_axes if a.get_gid() == "bivariate-legend")
    cells = [p for p in legend_ax.patches if (p.get_gid() or "").startswith("bivariate-cell")]
    assert len(cells) == 9
    for p in cells:
        r, c = map(int, p.get_gid().split("-")[-2:])
        np.testing.assert_allclose(p.get_facecolor(), grid[r, c], atol=1e-6)  # float RGBA
    face = _collection(ax, "areas").get_facecolors()
    for i, (r, c) in enumerate([(0, 0), (1, 1), (2, 2), (2, 0), (0, 2)]):
        np.testing.assert_allclose(face[i], grid[r, c], atol=1e-6)
    assert len(_collection(ax, "missing").get_paths()) == 1
    # nine distinct colours; the inconclusive column is lighter than every certain cell, and in the
    # certain columns darkness grows with the size of the estimate in the evidence's direction
    assert len({tuple(np.round(v, 4)) for v in grid.reshape(9, 4)}) == 9
    lightness = _srgb_to_lab(grid)[..., 0]
    assert lightness[:, 1].min() > lightness[:, [0, 2]].max() + 10
    assert np.all(np.diff(lightness[:, 2]) < -10) and np.all(np.diff(lightness[:, 0]) > 10)


def test_bivariate_rendered_uncertain_districts_are_pale(strip):
    """Render the map and read each district's pixel colour: uncertain ones (P between 0.2 and 0.8, the
    decision bands of Richardson et al. 2004)
    must come out lighter (CIELAB L*) than every certain one, whatever their risk class."""
    import matplotlib.pyplot as plt

    rr = [0.6, 1.0, 1.6, 1.0, 1.6, 0.6]
    pr = [0.05, 0.5, 0.95, 0.9, 0.5, 0.5]
    fig, ax = plt.subplots(figsize=(6, 2), dpi=80)
    bivariate_map(strip, rr, pr, ax=ax, legend=False, caption=False, scale_bar=False)
    fig.canvas.draw()
    pixels = np.asarray(fig.canvas.buffer_rgba())[..., :3] / 255.0
    pts = strip.geometry.representative_point()
    xy = ax.transData.transform(np.c_[pts.x, pts.y])
    h = pixels.shape[0]
    sampled = np.array([pixels[int(round(h - y)), int(round(x))] for x, y in xy])
    lightness = _srgb_to_lab(sampled)[:, 0]
    uncertain = (np.array(pr) > 0.2) & (np.array(pr) < 0.8)
    assert lightness[uncertain].min() > lightness[~uncertain].max() + 10
    # the sampled colours are the designed ones (8-bit rounding of the rendered image)
    grid = bivariate_colours()
    np.testing.assert_allclose(sampled[1], grid[1, 1, :3], atol=2 / 255)


def test_exceedance_map_marks_richardson_bands(strip):
    # decision bands 0.2 / 0.8: Richardson, Thomson, Best & Elliott (2004), Environ. Health Perspect. 112:1016
    p = [0.1, 0.5, 0.85, 0.96, 0.02, np.nan]
    ax = exceedance_map(strip, p)
    texts = _legend_texts(ax)
    assert "above 0.8: evidence of raised risk (2)" in texts
    assert "below 0.2: evidence of lowered risk (2)" in texts
    assert len(_collection(ax, "band-raised").get_paths()) == 2
    assert "Richardson" in ax.get_legend().get_title().get_text()


def test_cluster_map_groups_solid_outliers_hatched(strip):
    labels = pd.Series(["High-High", "Low-Low", "High-Low", "Low-High", "not significant", "no neighbours"],
                       index=strip.index)
    ax = cluster_map(strip, labels)
    face = _collection(ax, "areas").get_facecolors()
    for i, lab in enumerate(labels):
        expected = CLUSTER_COLOURS[lab] if CLUSTER_STYLE[lab]["fill"] else "#FFFFFF"
        np.testing.assert_allclose(face[i], to_rgba(expected), atol=1e-6)
    # outliers: a hatched, thick outline in the hue of their own value
    high_low = _collection(ax, "cluster-high-low")
    assert high_low.get_hatch() == "////"
    np.testing.assert_allclose(high_low.get_edgecolor()[0], to_rgba(CLUSTER_COLOURS["High-High"]), atol=1e-6)
    assert high_low.get_linewidth()[0] >= 1.0
    assert _collection(ax, "cluster-low-high").get_hatch() == "\\\\"
    # legend: own names in one column, counts in their own column (no "(n)" after the names)
    leg = next(a for a in ax.child_axes if a.get_gid() == "cluster-legend")
    texts = [t.get_text() for t in leg.texts]
    assert texts[:2] == ["Local pattern", "districts"]
    names, counts = texts[2::2], texts[3::2]
    assert names == [CLUSTER_STYLE[k]["name"] for k in CLUSTER_LABELS]
    assert counts == ["1"] * 6
    assert not any("(" in n and n.endswith(")") and n[-2].isdigit() for n in names)
    count_x = {t.get_position()[0] for t in leg.texts[3::2]}
    assert count_x == {10} and all(t.get_ha() == "right" for t in leg.texts[3::2])


def test_cluster_map_legend_names_can_be_replaced(strip):
    ax = cluster_map(strip, ["High-High"] * 6, names={"High-High": "hoch, Nachbarn hoch"})
    leg = next(a for a in ax.child_axes if a.get_gid() == "cluster-legend")
    assert leg.texts[2].get_text() == "hoch, Nachbarn hoch" and leg.texts[3].get_text() == "6"
    with pytest.raises(ParameterError, match="The 'names' parameter of cluster_map"):
        cluster_map(strip, ["High-High"] * 6, names={"HH": "x"})


def test_cluster_map_rejects_unknown_labels(strip):
    with pytest.raises(InputError, match="unknown cluster label"):
        cluster_map(strip, ["HH"] * 6)


# ------------------------------------------------------------------------------- funnel
@pytest.mark.parametrize("level", [0.95, 0.998])
def test_funnel_limits_equal_exact_poisson_quantiles(level):
    """Spiegelhalter (2005): limits are Poisson(E) quantiles divided by E; reference values from scipy."""
    e = np.array([0.5, 2.0, 7.3, 25.0, 140.0])
    p = (1 - level) / 2
    lo, hi = funnel_limits(e, level=level, interpolate=False)
    np.testing.assert_allclose(lo, st.poisson.ppf(p, e) / e, rtol=1e-12)  # same quantities, rounding only
    np.testing.assert_allclose(hi, st.poisson.ppf(1 - p, e) / e, rtol=1e-12)


@pytest.mark.parametrize("level", [0.95, 0.998])
def test_funnel_limits_interpolate_the_poisson_cdf(level):
    """The interpolated limit inverts the CDF joined linearly between integers (Spiegelhalter 2005, appendix).

    Computed here by numpy.interp on a table of scipy Poisson CDF values, a different route from the module.
    """
    e = np.array([0.7, 3.0, 12.5, 60.0])
    p = (1 - level) / 2
    lo, hi = funnel_limits(e, level=level)
    for j, ej in enumerate(e):
        r = np.arange(-1, int(ej * 4 + 40))
        cdf = st.poisson.cdf(r, ej)
        for q, got in ((p, lo[j]), (1 - p, hi[j])):
            # first point with cdf >= q and its predecessor bracket q; invert the chord between them
            k = int(np.searchsorted(cdf, q))
            x = np.interp(q, cdf[k - 1:k + 1], r[k - 1:k + 1].astype(float))
            np.testing.assert_allclose(got, max(x, 0.0) / ej, rtol=1e-9)  # float rounding in the CDF only
    # the exact (step) limits bracket the interpolated ones from above within one count
    lo0, hi0 = funnel_limits(e, level=level, interpolate=False)
    assert np.all(hi <= hi0 + 1e-12) and np.all(hi >= hi0 - 1 / e - 1e-12)


def test_funnel_plot_labels_out_of_control_areas():
    observed = pd.Series([30, 10, 11, 0, 9], index=["Ashby", "Brook", "Cairn", "Dunmere", "Eyot"])
    expected = pd.Series([10.0, 10.0, 12.0, 15.0, 8.0], index=observed.index)
    ax = funnel_plot(observed, expected)
    labelled = {t.get_text() for t in ax.texts if t.get_gid() == "funnel-label"}
    # O=30 at E=10 and O=0 at E=15 lie far outside the 99.8% limits (P(Y>=30 | 10) ~ 1e-7; P(Y=0 | 15) ~ 3e-7, scipy)
    assert st.poisson.sf(29, 10.0) < 0.001 and st.poisson.cdf(0, 15.0) < 0.001
    assert labelled == {"Ashby", "Dunmere"}
    # the drawn 99.8% limit lines are the function's limits on their x grid
    line = next(ln for ln in ax.lines if ln.get_gid() == "funnel-limit-0.998")
    lo, _ = funnel_limits(line.get_xdata(), level=0.998)
    np.testing.assert_allclose(line.get_ydata(), lo, rtol=1e-12)  # same computation


def test_funnel_limits_reject_zero_expected():
    with pytest.raises(ParameterError, match="The 'expected' parameter of funnel_limits must be counts > 0"):
        funnel_limits([0.0, 1.0])


# ------------------------------------------------------------------------------ moran
def _moran_formula(x: np.ndarray, graph) -> float:
    """I = (n / S0) z'Wz / z'z with row-standardised W (Moran 1950; Cliff & Ord 1981), built here densely."""
    a = graph.adjacency.toarray()
    rows = a.sum(axis=1, keepdims=True)
    w = np.divide(a, rows, out=np.zeros_like(a), where=rows > 0)
    z = x - x.mean()
    return len(x) / w.sum() * (z @ w @ z) / (z @ z)


def _slope(ax) -> float:
    line = next(ln for ln in ax.lines if ln.get_gid() == "moran-slope")
    xs, ys = line.get_xdata(), line.get_ydata()
    return (ys[1] - ys[0]) / (xs[1] - xs[0])


def test_moran_scatter_slope_equals_morans_i(grid5_rook, rng):
    x = rng.normal(size=25) + np.repeat(np.arange(5), 5) * 0.8  # some spatial trend
    ax = moran_scatterplot(x, grid5_rook)
    np.testing.assert_allclose(_slope(ax), _moran_formula(x, grid5_rook), rtol=1e-10)  # rounding only
    # without islands I equals the least-squares slope of the lag on z (analytic identity)
    pts = next(c for c in ax.collections if c.get_gid() == "moran-points").get_offsets()
    np.testing.assert_allclose(np.polyfit(pts[:, 0], pts[:, 1], 1)[0], _slope(ax), rtol=1e-10)


def test_moran_scatter_with_island_uses_n_over_s0(graph_with_island):
    x = np.array([1.0, 2.0, 2.5, 4.0, 9.0])
    ax = moran_scatterplot(pd.Series(x, index=graph_with_island.ids)[::-1], graph_with_island)
    np.testing.assert_allclose(_slope(ax), _moran_formula(x, graph_with_island), rtol=1e-10)  # rounding only
    assert len(next(c for c in ax.collections if c.get_gid() == "moran-points").get_offsets()) == 4


def test_moran_scatter_rejects_mismatched_values(path3):
    with pytest.raises(GraphError, match="3 areas"):
        moran_scatterplot([1.0, 2.0], path3)


# ----------------------------------------------------------------- shrinkage, ranked
def test_shrinkage_point_area_proportional_to_population():
    pop = np.array([100.0, 5000.0, 200.0, 2500.0])
    ax = shrinkage_plot([0.5, 1.0, 3.0, 1.2], [0.8, 1.0, 1.6, 1.1], population=pop)
    sizes = next(c for c in ax.collections if c.get_gid() == "shrinkage-points").get_sizes()
    np.testing.assert_allclose(sizes / pop, sizes[0] / pop[0], rtol=1e-12)  # scatter sizes are areas (points^2)
    line = next(ln for ln in ax.lines if ln.get_gid() == "identity-line")
    np.testing.assert_array_equal(line.get_xdata(), line.get_ydata())


def test_ranked_interval_plot_orders_and_marks():
    est = pd.Series([1.2, 0.8, 2.0, 0.5], index=["Ashby", "Brook", "Cairn", "Dunmere"])
    ax = ranked_interval_plot(est, [0.9, 0.5, 1.4, 0.3], [1.6, 1.2, 2.9, 0.9])
    assert [t.get_text() for t in ax.get_xticklabels()] == ["Dunmere", "Brook", "Ashby", "Cairn"]
    assert ax.get_yscale() == "log"
    ref = next(ln for ln in ax.lines if ln.get_gid() == "reference-line")
    assert list(ref.get_ydata()) == [1.0, 1.0]
    assert "1 above, 1 below" in ax.get_title(loc="left")


# ------------------------------------------------------------------------- file output
FIGURES = {
    "choropleth": lambda g, gr: choropleth(g, g["ratio"], scheme="relative_risk", uncertain=[True] + [False] * 5,
                                           suppressed=["D1"]).figure,
    "raw_beside_smoothed": lambda g, gr: raw_beside_smoothed(g, g["ratio"], g["ratio"].fillna(1.0) ** 0.5),
    "bivariate": lambda g, gr: bivariate_map(g, g["ratio"], [0.1, 0.5, 0.9, 0.95, 0.99, 0.5]).figure,
    "exceedance": lambda g, gr: exceedance_map(g, [0.1, 0.5, 0.9, 0.95, 0.99, np.nan]).figure,
    "clusters": lambda g, gr: cluster_map(g, list(CLUSTER_LABELS)).figure,
    "funnel": lambda g, gr: funnel_plot([3, 10, 30], [5.0, 9.0, 11.0]).figure,
    "moran": lambda g, gr: moran_scatterplot(np.arange(25.0), gr).figure,
    "shrinkage": lambda g, gr: shrinkage_plot([0.5, 2.0], [0.9, 1.3], population=[10, 20]).figure,
    "ranked": lambda g, gr: ranked_interval_plot([0.5, 2.0], [0.0, 1.2], [1.5, 3.0]).figure,
}


@pytest.mark.parametrize("name", sorted(FIGURES))
def test_figure_saves_png_and_svg(name, strip, grid5_rook, tmp_path):
    assert matplotlib.get_backend().lower() == "agg"
    fig = FIGURES[name](strip, grid5_rook)
    fig.savefig(tmp_path / f"{name}.png", dpi=60)
    fig.savefig(tmp_path / f"{name}.svg")
    assert (tmp_path / f"{name}.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec)
    assert "<svg" in (tmp_path / f"{name}.svg").read_text()[:1000]


def test_functions_draw_on_given_axes(strip):
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots()
    assert choropleth(strip, "ratio", ax=ax) is ax
    assert cluster_map(strip, list(CLUSTER_LABELS), ax=ax) is ax
    assert funnel_plot([1, 2], [1.0, 2.0], ax=ax) is ax


def test_module_lists_public_names():
    for name in maps.__all__:
        assert hasattr(maps, name)


@pytest.mark.parametrize(
    "call, error, match",
    [
        (lambda g: exceedance_map(g, [0.1, 50, 0.2, 0.3, 0.4, 0.5]), InputError,
         "Give probabilities, not percentages"),
        (lambda g: exceedance_map(g, [0.1] * 6, bands=(0.8, 0.2)), ParameterError,
         r"The 'bands' parameter of exceedance_map must be two increasing numbers in \(0, 1\)"),
        (lambda g: bivariate_map(g, [1.0] * 6, [0.5] * 6, risk_breaks=(1.1,)), ParameterError,
         "The 'risk_breaks' parameter of bivariate_map must be two increasing positive numbers"),
        (lambda g: choropleth(g, "ratio", uncertain_style="blur"), ParameterError,
         "The 'uncertain_style' parameter of choropleth must be one of 'fade', 'hatch'"),
        (lambda g: choropleth(g, "ratio", label_areas=["D9"]), InputError, "not in the boundaries"),
        (lambda g: choropleth(g, pd.Series([1.0], index=["D0"])), InputError, "do not cover every area"),
    ],
)
def test_map_argument_errors(strip, call, error, match):
    with pytest.raises(error, match=match):
        call(strip)


def test_uncertain_areas_needs_inputs():
    with pytest.raises(ParameterError, match="The 'low' parameter of uncertain_areas must be given"):
        uncertain_areas()
    with pytest.raises(ParameterError, match="The 'min_count' parameter of uncertain_areas"):
        uncertain_areas(counts=[1, 2])


def test_dollar_signs_in_names_are_drawn_literally(strip, tmp_path):
    # '$' would start matplotlib mathtext; an unmatched one fails at draw time (matplotlib behaviour)
    g = strip.assign(area_name=["Ash$by", "Brook", "Cairn", "Dunmere", "Eyot", "Fallow"])
    ax = choropleth(g, "ratio", title="Cost in $", source="a $ source", label_areas=["D0"])
    ax.figure.savefig(tmp_path / "dollar.png", dpi=40)
    assert any(t.get_text() == r"Ash\$by" for t in ax.texts)


# Colour-vision-deficiency simulation matrices (severity 1.0) of Machado, Oliveira & Fernandes (2009),
# applied to linear RGB; values from memory.
_CVD = {
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
    "protanopia": np.array([[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
}


def _simulate(rgba, matrix):
    rgb = np.asarray(rgba, dtype=float)[..., :3]
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    lin = np.clip(lin @ matrix.T, 0, 1)
    return np.where(lin <= 0.0031308, 12.92 * lin, 1.055 * lin ** (1 / 2.4) - 0.055)


@pytest.mark.parametrize("deficiency", sorted(_CVD))
@pytest.mark.parametrize(
    "name, colours",
    [
        ("sequential", lambda: palette_colours("sequential", 9)),
        ("diverging", lambda: palette_colours("diverging", 9)),
        ("bivariate", lambda: bivariate_colours().reshape(9, 4)),
        # groups and the no-pattern fill; outliers share their group's hue and differ by hatching,
        # "no neighbours" (white) by its dots
        ("clusters", lambda: [to_rgba(CLUSTER_COLOURS[k]) for k in ("High-High", "Low-Low", "not significant")]),
    ],
)
def test_palettes_stay_distinguishable_under_red_green_deficiency(deficiency, name, colours):
    lab = _srgb_to_lab(_simulate(np.array(colours()), _CVD[deficiency]))
    dist = [np.linalg.norm(lab[i] - lab[j]) for i, j in itertools.combinations(range(len(lab)), 2)]
    # CIE76 colour difference of 8 or more is plainly visible side by side (common practice)
    assert min(dist) >= 8
