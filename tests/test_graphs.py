"""Graph builders: contiguity (exact and snapped), k nearest neighbours, distance band, islands, extra links."""

from __future__ import annotations

import warnings

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from shapely import box

from areamap.errors import DataWarning, GraphError, InputError, ParameterError
from areamap.graphs import AreaGraph, build_graph, read_extra_links, write_edge_list

PROJECTED = "EPSG:3857"  # any projected CRS in metres; the squares below are tiny


def _grid(nrow: int = 3, ncol: int = 3, *, gap: float = 0.0, crs=PROJECTED) -> gpd.GeoDataFrame:
    """Unit squares in row-major order, ids 'r{row}c{col}', optionally separated by a gap."""
    step = 1.0 + gap
    geoms, ids = [], []
    for r in range(nrow):
        for c in range(ncol):
            geoms.append(box(c * step, r * step, c * step + 1, r * step + 1))
            ids.append(f"r{r}c{c}")
    return gpd.GeoDataFrame(
        {"area_name": [f"Square {i}" for i in ids]},
        geometry=geoms,
        index=pd.Index(ids, name="area_id"),
        crs=crs,
    )


def _counts(g: AreaGraph) -> dict[str, int]:
    return dict(zip(g.ids, g.neighbour_counts().tolist()))


# Degrees on a 3x3 lattice, by definition of rook (shared edge) and queen (shared edge or corner) contiguity:
# corner, edge and centre cells have 2, 3, 4 rook and 3, 5, 8 queen neighbours.
QUEEN_3x3 = {"r0c0": 3, "r0c1": 5, "r1c1": 8, "r2c2": 3, "r1c0": 5}
ROOK_3x3 = {"r0c0": 2, "r0c1": 3, "r1c1": 4, "r2c2": 2, "r1c0": 3}


@pytest.mark.parametrize("snap", [0.0, 0.01])
@pytest.mark.parametrize(("method", "expected"), [("queen", QUEEN_3x3), ("rook", ROOK_3x3)])
def test_grid_contiguity_degrees(method, expected, snap):
    g = build_graph(_grid(), method=method, snap=snap)
    got = _counts(g)
    assert {k: got[k] for k in expected} == expected
    assert g.kind == method
    assert list(g.ids) == list(_grid().index)


@pytest.mark.parametrize(("method", "expected"), [("queen", QUEEN_3x3), ("rook", ROOK_3x3)])
def test_snap_joins_squares_separated_by_tiny_gap(method, expected):
    gappy = _grid(gap=0.001)
    exact = build_graph(gappy, method=method)
    assert exact.neighbour_counts().sum() == 0  # a 0.001 gap: nothing shares a vertex
    snapped = build_graph(gappy, method=method, snap=0.01)
    got = _counts(snapped)
    assert {k: got[k] for k in expected} == expected


def test_snap_smaller_than_gap_keeps_areas_apart():
    g = build_graph(_grid(gap=0.001), method="queen", snap=0.0005)
    assert g.summary().n_links == 0
    assert len(g.summary().islands) == 9


def test_rook_with_snap_excludes_diagonal_neighbours_across_gap():
    g = build_graph(_grid(gap=0.001), method="rook", snap=0.01)
    a = pd.DataFrame(g.adjacency.toarray(), index=g.ids, columns=g.ids)
    assert a.loc["r0c0", "r0c1"] == 1
    assert a.loc["r0c0", "r1c1"] == 0


def test_snap_bridges_sliver_overlap_and_t_junction():
    # Right square overlaps the left by 1e-4 and is split in two, so its vertices
    # fall on the middle of the left square's edge (T-junction): no shared vertices.
    left = box(0, 0, 1, 2)
    lower = box(0.9999, 0, 2, 1)
    upper = box(0.9999, 1, 2, 2)
    gdf = gpd.GeoDataFrame(geometry=[left, lower, upper], index=["L", "D", "U"], crs=PROJECTED)
    exact = build_graph(gdf, method="rook")
    assert exact.adjacency[0, 1] == 0  # no exactly shared segment
    snapped = build_graph(gdf, method="rook", snap=0.001)
    assert snapped.neighbour_counts().tolist() == [2, 2, 2]


def _neighbour_sets(g: AreaGraph) -> dict[int, set[int]]:
    out = {int(i): set() for i in g.ids}
    for a, b in zip(*g.adjacency.nonzero()):
        out[int(g.ids[a])].add(int(g.ids[b]))
    return out


@pytest.fixture(scope="module")
def nc_gal(sids2_dir) -> dict[int, set[int]]:
    """Neighbour lists of sids2.gal shipped beside the NC county shapefile (libpysal example files).

    The .gal ids are FIPSNO values (as text), not record numbers; the file holds
    231 links, i.e. counties sharing a stretch of border (rook contiguity).
    """
    import libpysal

    gal = libpysal.io.open(str(sids2_dir / "sids2.gal")).read()
    return {int(k): {int(x) for x in v} for k, v in gal.neighbors.items()}


@pytest.mark.parametrize("snap", [0.0, 1e-3])
def test_rook_matches_gal_file_shipped_with_nc_counties(nc, nc_gal, snap):
    # snap=1e-3 degrees (~100 m) must not change anything on this clean, shared-vertex file
    g = build_graph(nc.set_index("FIPSNO"), method="rook", snap=snap, name_column="NAME")
    assert _neighbour_sets(g) == nc_gal
    assert g.names[0] == nc["NAME"].iloc[0]


def test_queen_adds_only_point_contacts_to_gal_file(nc, nc_gal):
    """Queen = the .gal (shared borders) plus pairs of counties whose boundaries meet at single points."""
    boundaries = nc.set_index("FIPSNO")
    queen = _neighbour_sets(build_graph(boundaries, method="queen"))
    extra = sorted({tuple(sorted((a, b))) for a in queen for b in queen[a] - nc_gal[a]})
    assert all(nc_gal[a] <= queen[a] for a in queen)
    assert extra  # this file has corner contacts (e.g. four-county corners)
    geom = boundaries.geometry
    touch = [geom[a].intersection(geom[b]).geom_type for a, b in extra]
    assert set(touch) <= {"Point", "MultiPoint"}


def test_ids_and_order_follow_boundaries_index():
    grid = _grid()
    shuffled = grid.iloc[np.random.default_rng(3).permutation(9)]
    g1 = build_graph(grid, method="queen")
    g2 = build_graph(shuffled, method="queen")
    assert list(g2.ids) == list(shuffled.index)
    np.testing.assert_array_equal(g1.reorder(g2.ids).adjacency.toarray(), g2.adjacency.toarray())


def test_names_from_name_column_or_none():
    assert build_graph(_grid(), method="rook").names[0] == "Square r0c0"
    assert build_graph(_grid().drop(columns="area_name"), method="rook").names is None


@pytest.mark.parametrize("k", [1, 2, 4])
def test_knn_is_symmetric_and_every_area_has_at_least_k(k):
    pts = gpd.GeoDataFrame(
        geometry=gpd.points_from_xy(*np.random.default_rng(7).uniform(0, 1000, (2, 40))),
        crs=PROJECTED,
    )
    g = build_graph(pts, method="knn", k=k)
    dense = g.adjacency.toarray()
    np.testing.assert_array_equal(dense, dense.T)
    assert g.neighbour_counts().min() >= k
    # the nearest point of each area is always a neighbour (definition of k >= 1)
    xy = np.c_[pts.geometry.x, pts.geometry.y]
    d = np.hypot(*(xy[:, None, :] - xy[None, :, :]).transpose(2, 0, 1))
    np.fill_diagonal(d, np.inf)
    assert dense[np.arange(40), d.argmin(axis=1)].all()


def test_knn_symmetrised_union_on_a_line():
    # points at 0, 1, 3, 10: nearest of 10 is 3, nearest of 3 is 1 -> link 3-10 comes from one side only
    line = gpd.GeoDataFrame(geometry=gpd.points_from_xy([0, 1, 3, 10], [0, 0, 0, 0]), crs=PROJECTED)
    g = build_graph(line, method="knn", k=1)
    assert sorted(map(tuple, np.argwhere(np.triu(g.adjacency.toarray())))) == [(0, 1), (1, 2), (2, 3)]


def test_distance_band_on_grid_centroids():
    # centroids 1 apart along rows/cols, sqrt(2) diagonally
    rook_like = build_graph(_grid(), method="distance", distance=1.0)
    queen_like = build_graph(_grid(), method="distance", distance=1.5)
    assert _counts(rook_like) == _counts(build_graph(_grid(), method="rook"))
    assert _counts(queen_like) == _counts(build_graph(_grid(), method="queen"))
    assert rook_like.kind == "distance"


def test_no_crs_is_an_error_for_knn_and_distance():
    grid = _grid(crs=None)
    with pytest.raises(InputError, match=r"no coordinate reference system.*set_crs.*method='queen'"):
        build_graph(grid, method="knn", k=2)
    with pytest.raises(InputError, match="no coordinate reference system"):
        build_graph(grid, method="distance", distance=1.0)
    build_graph(grid, method="queen")  # contiguity needs no CRS


def test_geographic_crs_is_projected_with_warning():
    # 3x3 grid of 0.1 degree cells near latitude 45: about 7.9 km wide and 11.1 km tall
    geo = gpd.GeoDataFrame(
        geometry=[box(10 + 0.1 * c, 45 + 0.1 * r, 10.1 + 0.1 * c, 45.1 + 0.1 * r) for r in range(3) for c in range(3)],
        crs="EPSG:4326",
    )
    with pytest.warns(DataWarning, match="geographic CRS.*Lambert azimuthal equal-area.*metres"):
        g = build_graph(geo, method="distance", distance=9_000.0)
    # east-west centroid spacing ~7.9 km (< 9 km) links; north-south ~11.1 km does not
    assert g.neighbour_counts().tolist() == [1, 2, 1] * 3
    with pytest.warns(DataWarning, match="k-nearest neighbours"):
        build_graph(geo, method="knn", k=2)


def test_islands_keep_and_link():
    grid = _grid()
    far = gpd.GeoDataFrame(
        {"area_name": ["Outer Skerry"]}, geometry=[box(10, 10, 11, 11)], index=pd.Index(["far"]), crs=PROJECTED
    )
    gdf = pd.concat([grid, far])
    kept = build_graph(gdf, method="queen")
    assert kept.summary().islands == ("Outer Skerry",)
    assert "Outer Skerry" in kept.summary()._repr_html_()
    linked = build_graph(gdf, method="queen", islands="link")
    a = pd.DataFrame(linked.adjacency.toarray(), index=linked.ids, columns=linked.ids)
    assert a.loc["far"].sum() == 1 and a.loc["far", "r2c2"] == 1  # nearest square is the top-right one
    assert a.loc["r2c2", "far"] == 1  # symmetric
    assert linked.summary().islands == ()
    assert linked.provenance["linked_islands"] == ("Outer Skerry",)
    assert linked.reorder(linked.ids[::-1]).provenance["linked_islands"] == ("Outer Skerry",)
    two = build_graph(gdf, method="queen", islands="link", island_k=2)
    assert two.neighbour_counts()[-1] == 2


def test_two_islands_link_to_the_mainland_not_to_each_other():
    grid = _grid()
    extra = gpd.GeoDataFrame(geometry=[box(10, 10, 11, 11), box(12, 12, 13, 13)], index=["i1", "i2"], crs=PROJECTED)
    g = build_graph(pd.concat([grid, extra]), method="rook", islands="link")
    assert g.summary().n_components == 1


def test_extra_links_list_and_csv(tmp_path):
    gappy = _grid(gap=0.5)  # nothing touches
    g = build_graph(gappy, method="queen", extra_links=[("r0c0", "r2c2")])
    assert g.adjacency[0, 8] == 1 and g.adjacency[8, 0] == 1
    assert g.summary().n_links == 1
    f = tmp_path / "ferries.csv"
    f.write_text("from_id,to_id\nr0c0, r2c2\nr1c1,r0c1\n", encoding="utf-8")
    assert read_extra_links(f, gappy.index) == [("r0c0", "r2c2"), ("r1c1", "r0c1")]
    g2 = build_graph(gappy, method="queen", extra_links=f)
    assert g2.summary().n_links == 2


def test_extra_links_are_applied_before_island_policy():
    gdf = pd.concat([_grid(), gpd.GeoDataFrame(geometry=[box(10, 10, 11, 11)], index=["far"], crs=PROJECTED)])
    g = build_graph(gdf, method="queen", islands="link", extra_links=[("far", "r0c0")])
    a = pd.DataFrame(g.adjacency.toarray(), index=g.ids, columns=g.ids)
    assert a.loc["far"].sum() == 1 and a.loc["far", "r0c0"] == 1  # no longer an island -> not re-linked


def test_extra_links_match_integer_ids_read_as_text(tmp_path):
    gdf = _grid().reset_index(drop=True)  # integer ids 0..8
    f = tmp_path / "links.csv"
    f.write_text("a,b\n0,8\n", encoding="utf-8")
    assert read_extra_links(f, gdf.index) == [(0, 8)]


def test_extra_links_unknown_ids_listed(tmp_path):
    f = tmp_path / "links.csv"
    f.write_text("a,b\nr0c0,X9\nY1,r1c1\n", encoding="utf-8")
    with pytest.raises(GraphError, match=r"2 id\(s\).*not areas.*X9, Y1"):
        read_extra_links(f, _grid().index)
    with pytest.raises(GraphError, match="not areas of the boundaries"):
        build_graph(_grid(), extra_links=[("r0c0", "nowhere")])


def test_extra_links_self_link_rejected():
    with pytest.raises(GraphError, match=r"link an area to itself \(r0c0\)"):
        build_graph(_grid(), extra_links=[("r0c0", "r0c0")])


def test_extra_links_file_shape_checked(tmp_path):
    f = tmp_path / "links.csv"
    f.write_text("a,b,c\n1,2,3\n", encoding="utf-8")
    with pytest.raises(InputError, match="exactly two columns"):
        read_extra_links(f, [1, 2])
    f.write_text("a,b\n1,\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"missing id \(rows 2\)"):
        read_extra_links(f, [1, 2])


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"method": "triangles"}, "The 'method' parameter of build_graph must be one of"),
        ({"snap": -1.0}, r"The 'snap' parameter of build_graph must be in \[0, inf\)"),
        ({"method": "knn", "k": 0}, "The 'k' parameter of build_graph must be an integer >= 1"),
        ({"method": "knn", "k": 9}, r"smaller than the number of areas \(9\)"),
        ({"method": "distance"}, "The 'distance' parameter of build_graph must be a number > 0"),
        ({"method": "distance", "distance": -2}, "The 'distance' parameter"),
        ({"islands": "drop"}, "The 'islands' parameter"),
        ({"islands": "link", "island_k": 0}, "The 'island_k' parameter"),
    ],
)
def test_bad_options_rejected(kwargs, match):
    with pytest.raises(ParameterError, match=match):
        build_graph(_grid(), **kwargs)


def test_missing_geometry_and_points_for_contiguity_rejected():
    gdf = _grid()
    gdf.loc["r1c1", "geometry"] = None
    with pytest.raises(InputError, match=r"missing or empty geometry \(r1c1\)"):
        build_graph(gdf)
    pts = gpd.GeoDataFrame(geometry=gpd.points_from_xy([0, 1], [0, 0]), crs=PROJECTED)
    with pytest.raises(InputError, match="needs polygon boundaries"):
        build_graph(pts, method="queen")
    with pytest.raises(InputError, match="GeoDataFrame or GeoSeries"):
        build_graph(pd.DataFrame({"x": [1]}))


def test_duplicate_points_rejected_for_knn():
    pts = gpd.GeoDataFrame(geometry=gpd.points_from_xy([0, 0, 1], [0, 0, 5]), index=["a", "b", "c"], crs=PROJECTED)
    with pytest.raises(InputError, match=r"share a representative point.*a, b"):
        build_graph(pts, method="knn", k=1)


@pytest.mark.parametrize("style", ["binary", "row"])
def test_edge_list_export_round_trip(tmp_path, style):
    g = build_graph(_grid(), method="queen")
    f = tmp_path / "edges.csv"
    write_edge_list(g, f, style=style)
    table = pd.read_csv(f, dtype={"focal_id": str, "neighbour_id": str})
    assert list(table.columns) == ["focal_id", "neighbour_id", "weight"]
    back = AreaGraph.from_edges(g.ids, zip(table.focal_id, table.neighbour_id))
    np.testing.assert_array_equal(back.adjacency.toarray(), g.adjacency.toarray())
    sums = table.groupby("focal_id")["weight"].sum()
    if style == "row":
        np.testing.assert_allclose(sums, 1.0, rtol=1e-12)  # rows of row-standardised weights sum to one
    else:
        assert sums["r1c1"] == 8


def test_no_warning_for_projected_crs():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        build_graph(_grid(), method="knn", k=3)
