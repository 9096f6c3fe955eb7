"""Tests of areamap.explore: SVG path geometry and the explorable-map fragment (structure and escaping).

The behaviour in a browser (hover, tap, focus, sorting) is tested in test_browser.py.
"""

from __future__ import annotations

import re

import geopandas as gpd
import pandas as pd
import pytest
from shapely.geometry import Polygon, box

from areamap.errors import InputError, ParameterError
from areamap.explore import explorable_map, svg_paths


@pytest.fixture
def two() -> gpd.GeoDataFrame:
    return gpd.GeoDataFrame({"area_name": ["Ashby", '<b>Brook & "Co"</b>']},
                            geometry=[box(0, 0, 1000, 1000), box(1000, 0, 2000, 500)], crs=27700,
                            index=pd.Index(["D1", "D2"], name="area_id"))


def test_svg_paths_scale_and_flip_y():
    # a 2 x 1 box into a 100-unit-wide box: scale 50, y measured down from the top (SVG convention)
    d, size = svg_paths([box(0, 0, 2, 1)], width=100)
    assert size == (100.0, 50.0)
    pts = sorted(tuple(map(float, p.split(","))) for p in re.findall(r"[-\d.]+,[-\d.]+", d[0]))
    assert pts == [(0.0, 0.0), (0.0, 50.0), (100.0, 0.0), (100.0, 50.0)]


def test_svg_paths_keep_holes_and_parts():
    ring = Polygon([(0, 0), (10, 0), (10, 10), (0, 10)], [[(4, 4), (6, 4), (6, 6), (4, 6)]])
    d, _ = svg_paths([ring], width=10, simplify=0)
    assert d[0].count("M") == 2 and d[0].count("Z") == 2  # exterior and hole: evenodd/nonzero fill leaves it open


def test_fragment_structure_and_escaping(two):
    text = pd.DataFrame({"observed": ["12", "<5"]}, index=two.index)
    frag = explorable_map(two, [("observed", "Observed")], text=text, fill=["#aaaaaa", "#bbbbbb"],
                          marked=[False, True], initial="D2")
    assert frag.count("<path ") == 2 and 'tabindex="0"' in frag
    assert "<details" in frag and "<details open" not in frag  # collapsed by default
    assert "<b>Brook" not in frag  # the hostile name is escaped everywhere
    assert "&lt;5" in frag  # suppressed count shown as text
    # each district's numbers are in the page once, in its table row (the script copies them as text)
    row = re.search(r'<tr data-id="D2">(.*?)</tr>', frag).group(1)
    assert row == '<th scope="row">&lt;b&gt;Brook &amp; &quot;Co&quot;&lt;/b&gt;</th><td>&lt;5</td>'
    assert 'data-initial="D2"' in frag
    assert frag.count("<script") == 1 and "<script src" not in frag
    # marked districts are drawn last (their outline on top)
    assert frag.index('data-id="D2"') < frag.index("</svg>") and frag.index('class="district is-marked"') > frag.index(
        'class="district"')


def test_fragment_argument_errors(two):
    text = pd.DataFrame({"observed": ["1", "2"]}, index=two.index)
    with pytest.raises(InputError, match="has no column"):
        explorable_map(two, [("rate", "Rate")], text=text, fill=["#fff"] * 2)
    with pytest.raises(InputError, match="index must equal"):
        explorable_map(two, [("observed", "O")], text=text.iloc[::-1], fill=["#fff"] * 2)
    with pytest.raises(ParameterError, match="The 'fill' parameter of explorable_map"):
        explorable_map(two, [("observed", "O")], text=text, fill=["#fff"])
