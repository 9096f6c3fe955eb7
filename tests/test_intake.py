"""Tests of areamap.intake: ISO weeks, readers, cross-checks and the check report.

Each validation rule has a crafted small input under tmp_path; every error test
checks the exception type and the message.
"""

from __future__ import annotations

import warnings
from datetime import date, timedelta
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import shapely
from hypothesis import given, settings
from hypothesis import strategies as st

from areamap.config import load_config
from areamap.errors import (
    DataWarning,
    GeometryRepairedWarning,
    InputError,
    ParameterError,
)
from areamap.intake import (
    check_study,
    load_study,
    parse_week,
    read_boundaries,
    read_cases,
    read_population,
    read_reference_rates,
    week_bounds,
    week_of,
    week_range,
    weeks_ending,
)

# --------------------------------------------------------------------------- a tiny study
# Four unit squares in a 2 x 2 block (A B / C D) and an island E offshore.
SQUARES = {
    "A": shapely.box(0, 1, 1, 2),
    "B": shapely.box(1, 1, 2, 2),
    "C": shapely.box(0, 0, 1, 1),
    "D": shapely.box(1, 0, 2, 1),
    "E": shapely.box(5, 5, 6, 6),
}
NAMES = {"A": "Ashby", "B": "Brook", "C": "Cairn", "D": "Dunmere", "E": "Eyot"}

CASES = """\
area,week,age,n
A,2026-W45,young,3
A,2026-W47,old,2
B,2026-W46,young,1
C,2026-W47,old,4
D,2026-W45,old,0
E,2026-W47,young,1
"""

POPULATION = "area,age,pop\n" + "".join(
    f"{a},{g},{p}\n" for a in "ABCDE" for g, p in (("young", 1000), ("old", 500))
)

CONFIG = """\
title = "Test"
[boundaries]
file = "areas.gpkg"
id_column = "code"
name_column = "label"
[cases]
file = "cases.csv"
id_column = "area"
week_column = "week"
age_column = "age"
count_column = "n"
[population]
file = "population.csv"
id_column = "area"
age_column = "age"
population_column = "pop"
"""


def write_boundaries(path: Path, geoms: dict | None = None, *, crs="EPSG:3035", ids=None, names=None) -> Path:
    geoms = SQUARES if geoms is None else geoms
    ids = list(geoms) if ids is None else ids
    names = [NAMES.get(i, i) for i in geoms] if names is None else names
    gdf = gpd.GeoDataFrame({"code": ids, "label": names}, geometry=list(geoms.values()), crs=crs)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="'crs' was not provided", category=UserWarning)
        gdf.to_file(path, driver="GPKG" if path.suffix == ".gpkg" else None)
    return path


def make_study(
    folder: Path,
    *,
    cases: str | bytes = CASES,
    population: str = POPULATION,
    geoms: dict | None = None,
    crs="EPSG:3035",
    extra: str = "",
    config: str = CONFIG,
) -> Path:
    """Write a small valid study (optionally altered) and return its run.toml."""
    write_boundaries(folder / "areas.gpkg", geoms, crs=crs)
    if isinstance(cases, bytes):
        (folder / "cases.csv").write_bytes(cases)
    else:
        (folder / "cases.csv").write_text(cases, encoding="utf-8")
    (folder / "population.csv").write_text(population, encoding="utf-8")
    p = folder / "run.toml"
    p.write_text(config + extra, encoding="utf-8")
    return p


def study(folder: Path, **kw):
    return load_study(load_config(make_study(folder, **kw)))


# =========================================================================== ISO weeks
# Reference: Python's datetime.date.isocalendar() (ISO 8601 week date).
BOUNDARY_DATES = [
    date(y, m, d)
    for y in range(2019, 2029)
    for m, d in ((12, 28), (12, 29), (12, 30), (12, 31), (1, 1), (1, 2), (1, 3), (1, 4))
]


@pytest.mark.parametrize("day", BOUNDARY_DATES, ids=str)
def test_week_of_matches_isocalendar_near_new_year(day):
    # source: datetime.date.isocalendar (reference library implementing ISO 8601)
    iso = day.isocalendar()
    expected = f"{iso.year}-W{iso.week:02d}"
    assert week_of(day) == expected
    assert parse_week(day.isoformat()) == expected  # the text path used for CSV cells


def test_known_iso_weeks_from_brief():
    # ISO 8601: 2026 starts on a Thursday, so it has 53 weeks (from memory; confirmed by isocalendar below)
    assert date(2026, 12, 31).isocalendar()[:2] == (2026, 53)
    assert parse_week("2026-12-31") == "2026-W53"
    assert parse_week("2027-01-01") == "2026-W53"
    assert parse_week("2027-01-04") == "2027-W01"


@given(st.dates(min_value=date(1990, 1, 1), max_value=date(2060, 12, 31)))
@settings(max_examples=300, deadline=None)
def test_week_bounds_contain_the_date(day):
    # Property from ISO 8601: a week runs Monday (isoweekday 1) to Sunday (7) and every day maps to it.
    monday, sunday = week_bounds(week_of(day))
    assert monday <= day <= sunday
    assert monday.isoweekday() == 1 and sunday.isoweekday() == 7
    assert week_of(monday) == week_of(sunday) == week_of(day)


@given(st.dates(min_value=date(2000, 1, 1), max_value=date(2050, 1, 1)), st.integers(1, 120))
@settings(max_examples=200, deadline=None)
def test_week_range_and_weeks_ending_agree(day, k):
    last = week_of(day)
    wk = weeks_ending(last, k)
    assert len(wk) == k and wk[-1] == last and len(set(wk)) == k
    assert week_range(wk[0], wk[-1]) == wk
    # consecutive weeks are 7 days apart (isocalendar-independent check)
    mondays = [week_bounds(w)[0] for w in wk]
    assert all(b - a == timedelta(days=7) for a, b in zip(mondays, mondays[1:]))


@pytest.mark.parametrize(("text", "expected"), [
    ("2026-W47", "2026-W47"), ("2026W47", "2026-W47"), ("2026-w7", "2026-W07"),
    ("2026-W47-3", "2026-W47"), (" 2026-11-18 ", "2026-W47"), ("2026-11-18T09:30:00", "2026-W47"),
])
def test_parse_week_accepts(text, expected):
    assert parse_week(text) == expected


@pytest.mark.parametrize("text", ["2025-W53", "2026-W00", "2026-W54", "18/11/2026", "2026-02-30", "W47", ""])
def test_parse_week_rejects(text):
    # 2025 starts on a Wednesday and is not a leap year: 52 ISO weeks (ISO 8601 rule)
    with pytest.raises(ParameterError, match="must be an ISO week like '2026-W47'"):
        parse_week(text)


def test_weeks_ending_rejects_bad_k():
    with pytest.raises(ParameterError, match="'k' parameter of weeks_ending must be an integer >= 1"):
        weeks_ending("2026-W47", 0)


# =========================================================================== a valid study
def test_valid_study_loads(tmp_path):
    s = study(tmp_path)
    assert list(s.boundaries.index) == list("ABCDE")
    assert s.boundaries.index.name == "area_id"
    assert list(s.boundaries["area_name"]) == [NAMES[k] for k in "ABCDE"]
    assert s.boundaries.crs.to_epsg() == 3035
    assert s.weeks == ("2026-W45", "2026-W46", "2026-W47")
    assert s.age_groups == ("old", "young")
    assert s.total_cases == 11
    assert s.total_population == 7500
    assert list(s.cases.columns) == ["area_id", "week", "age_group", "cases"]
    assert s.cases["cases"].dtype == np.int64


def test_case_and_population_matrices(tmp_path):
    s = study(tmp_path)
    m = s.case_matrix()
    assert list(m.index) == list("ABCDE") and list(m.columns) == ["old", "young"]
    assert m.loc["A"].tolist() == [2, 3]
    assert m.loc["D"].tolist() == [0, 0]
    last = s.case_matrix(["2026-W47"])
    assert last.to_numpy().sum() == 7
    assert s.case_matrix("2026-W46").loc["B", "young"] == 1
    pm = s.population_matrix()
    assert pm.shape == (5, 2) and pm.loc["C", "old"] == 500
    wk = s.weekly_cases()
    assert wk.loc["A"].tolist() == [3, 0, 2]
    assert s.period_weeks("latest", 2) == ["2026-W46", "2026-W47"]
    with pytest.raises(ParameterError, match="reaches outside the study weeks"):
        s.period_weeks("latest", 5)
    with pytest.raises(ParameterError, match="must name weeks of the study"):
        s.case_matrix(["2026-W40"])


def test_matrix_rows_follow_boundary_order(tmp_path):
    # invariance: shuffling the rows of the cases file does not change the matrices
    lines = CASES.splitlines()
    shuffled = "\n".join([lines[0]] + lines[1:][::-1]) + "\n"
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    a = study(tmp_path / "a").case_matrix()
    b = study(tmp_path / "b", cases=shuffled).case_matrix()
    pd.testing.assert_frame_equal(a, b)


def test_areas_without_case_rows_are_zero_and_noted(tmp_path):
    cases = "\n".join(line for line in CASES.splitlines() if not line.startswith("E,")) + "\n"
    s = study(tmp_path, cases=cases)
    assert s.case_matrix().loc["E"].sum() == 0
    assert any("no rows in cases.csv and count as zero cases: Eyot (E)" in n for n in s.notes)


def test_small_population_noted(tmp_path):
    s = study(tmp_path)  # every area has 1,500 people
    assert not any("fewer than" in n for n in s.notes)
    pop = POPULATION.replace("E,young,1000", "E,young,300")
    s = study(tmp_path, population=pop)
    assert any("fewer than 1,000 people" in n and "Eyot (E)" in n for n in s.notes)


def test_line_list_binned_into_iso_weeks(tmp_path):
    line_list = "area,date,age\nA,2026-12-31,young\nA,2027-01-01,young\nB,2027-01-04,old\nB,2027-01-10,old\n"
    cfg = CONFIG.replace('week_column = "week"', 'format = "line_list"\ndate_column = "date"').replace(
        'count_column = "n"\n', "")
    s = study(tmp_path, cases=line_list, config=cfg)
    # week numbers from datetime.isocalendar (ISO 8601): 2026-12-31 and 2027-01-01 are in 2026-W53
    assert date(2027, 1, 1).isocalendar()[:2] == (2026, 53)
    assert s.weeks == ("2026-W53", "2027-W01")
    m = s.case_matrix("2026-W53")
    assert m.loc["A", "young"] == 2
    assert s.case_matrix("2027-W01").loc["B", "old"] == 2


def test_counts_with_dates_are_binned(tmp_path):
    cases = "area,week,age,n\nA,2026-11-16,young,2\nA,2026-11-22,young,3\nB,2026-11-23,old,1\n"
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # daily rows of one week are binned without a duplicate warning
        s = study(tmp_path, cases=cases)
    assert s.weeks == ("2026-W47", "2026-W48")
    assert s.case_matrix("2026-W47").loc["A", "young"] == 5  # Monday and Sunday of the same ISO week


def test_duplicate_count_rows_summed_with_warning(tmp_path):
    cases = CASES + "A,2026-W45,young,2\n"
    with pytest.warns(DataWarning, match=r"more than one row \(A 2026-W45 young; lines 2, 8 of cases.csv"):
        s = study(tmp_path, cases=cases)
    assert s.case_matrix("2026-W45").loc["A", "young"] == 5


def test_cases_without_age_use_crude_population(tmp_path):
    cases = "area,week,n\nA,2026-W47,3\nB,2026-W47,1\n"
    cfg = CONFIG.replace('age_column = "age"\ncount_column', "count_column")
    s = study(tmp_path, cases=cases, config=cfg)
    assert s.age_groups == ("all",)
    assert s.population_matrix().loc["A", "all"] == 1500
    assert any("not age-standardized" in n for n in s.notes)


def test_external_reference_rates(tmp_path):
    (tmp_path / "rates.csv").write_text("age_group,rate\nyoung,20\nold,50\n")
    s = study(tmp_path, extra='[standardization]\nreference = "external"\nrates_file = "rates.csv"\n')
    assert s.reference_rates.index.tolist() == ["old", "young"]
    np.testing.assert_allclose(s.reference_rates.to_numpy(), [50e-5, 20e-5], rtol=1e-12)  # exact division


def test_external_rates_missing_age_group(tmp_path):
    (tmp_path / "rates.csv").write_text("age_group,rate\nyoung,20\n")
    with pytest.raises(InputError, match=r"rates.csv has no value for 1 age group\(s\) of the study \(old\)"):
        study(tmp_path, extra='[standardization]\nreference = "external"\nrates_file = "rates.csv"\n')


def test_read_reference_rates_per():
    with pytest.raises(ParameterError, match="'per' parameter of read_reference_rates"):
        read_reference_rates("x.csv", per=0)


# =========================================================================== validation rules
def test_case_ids_missing_from_boundaries(tmp_path):
    with pytest.raises(InputError, match=r"1 area id\(s\) in cases.csv are not in the boundaries file areas.gpkg \(Z\)"):
        study(tmp_path, cases=CASES + "Z,2026-W47,old,1\n")


def test_population_ids_missing_from_boundaries(tmp_path):
    with pytest.raises(InputError, match=r"in population.csv are not in the boundaries file areas.gpkg \(Q\)"):
        study(tmp_path, population=POPULATION + "Q,young,10\nQ,old,10\n")


def test_boundaries_without_population(tmp_path):
    pop = "".join(line + "\n" for line in POPULATION.splitlines() if not line.startswith("D,"))
    with pytest.raises(InputError, match=r"1 area\(s\) of the boundaries file areas.gpkg have no population in "
                                         r"population.csv \(D\)"):
        study(tmp_path, population=pop)


def test_leading_zero_hint(tmp_path):
    geoms = {"01": SQUARES["A"], "02": SQUARES["B"]}
    pop = "area,age,pop\n1,young,10\n1,old,10\n2,young,10\n2,old,10\n"
    with pytest.raises(InputError, match=r"differ only by leading zeros.*'1' vs '01'"):
        study(tmp_path, geoms=geoms, cases="area,week,age,n\n1,2026-W47,old,1\n", population=pop)


def test_duplicate_boundary_ids(tmp_path):
    write_boundaries(tmp_path / "b.gpkg", {"A": SQUARES["A"], "B": SQUARES["B"], "C": SQUARES["C"]}, ids=["A", "B", "A"])
    with pytest.raises(InputError, match=r"Area ids must be unique, but 1 id\(s\) in column 'code' of b.gpkg appear "
                                         r"more than once \(A\)"):
        read_boundaries(tmp_path / "b.gpkg", id_column="code")


def test_duplicate_population_rows(tmp_path):
    with pytest.raises(InputError, match=r"population.csv has 1 duplicate \(area, age group\) pairs \(B old; "
                                         r"lines 5, 12 of population.csv; line 1 is the header\)"):
        study(tmp_path, population=POPULATION + "B,old,20\n")


@pytest.mark.parametrize(
    ("bad_row", "pattern"),
    [
        ("B,2026-W47,old,-2", r"Column 'n' in cases.csv has 1 negative counts \(line 8 of cases.csv; line 1 is the "
                              r"header: -2\)\. Counts must be whole numbers >= 0"),
        ("B,2026-W47,old,1.5", r"Column 'n' in cases.csv has 1 fractional counts \(line 8 .*1.5\)"),
        ("B,2026-W47,old,", r"Column 'n' in cases.csv has 1 missing counts \(line 8 of cases.csv"),
        ("B,2026-W47,old,three", r"Column 'n' in cases.csv has 1 counts that are not numbers \(line 8 .*'three'"),
        ("B,2026-W47,old,inf", r"1 counts that are not numbers \(line 8 .*'inf'"),
        ("B,47/2026,old,1", r"Column 'week' in cases.csv has 1 values that are neither ISO weeks nor dates "
                            r"\(line 8 of cases.csv; line 1 is the header: '47/2026'\)"),
        ("B,2025-W53,old,1", r"neither ISO weeks nor dates .*'2025-W53'.*week 53 exists only in long ISO years"),
        ("B,2026-02-30,old,1", r"neither ISO weeks nor dates .*'2026-02-30'"),
        (",2026-W47,old,1", r"Column 'area' in cases.csv has 1 rows without an area id \(line 8"),
        ("B,2026-W47,,1", r"Column 'age' in cases.csv has 1 empty age groups \(line 8"),
        ("B,,old,1", r"Column 'week' in cases.csv has 1 empty weeks/dates \(line 8"),
    ],
)
def test_bad_case_rows(tmp_path, bad_row, pattern):
    with pytest.raises(InputError, match=pattern):
        study(tmp_path, cases=CASES + bad_row + "\n")


def test_all_count_problems_in_one_message(tmp_path):
    cases = CASES + "B,2026-W47,old,-2\nC,2026-W46,old,0.5\nD,2026-W46,old,\n"
    with pytest.raises(InputError, match=r"has 1 missing counts \(line 10 .*\) and 1 fractional counts \(line 9 .*0.5\) "
                                         r"and 1 negative counts \(line 8 .*-2\)\. Counts must be whole numbers >= 0; "
                                         r"write 0 for none"):
        study(tmp_path, cases=cases)


def test_line_numbers_count_blank_lines(tmp_path):
    # A blank line keeps its number: the bad row is the 9th line of the file.
    with pytest.raises(InputError, match=r"negative counts \(line 9 of cases.csv"):
        study(tmp_path, cases=CASES + "\nB,2026-W47,old,-1\n")


@pytest.mark.parametrize(
    ("bad_row", "pattern"),
    [
        ("F,young,", r"Column 'pop' in population.csv has 1 missing populations \(line 12"),
        ("F,young,-5", r"Column 'pop' in population.csv has 1 negative populations"),
        ("F,young,many", r"Column 'pop' in population.csv has 1 populations that are not numbers"),
    ],
)
def test_bad_population_rows(tmp_path, bad_row, pattern):
    with pytest.raises(InputError, match=pattern):
        study(tmp_path, population=POPULATION + bad_row + "\n")


def test_fractional_population_allowed(tmp_path):
    s = study(tmp_path, population=POPULATION.replace("A,young,1000", "A,young,1000.5"))
    assert s.population_matrix().loc["A", "young"] == 1000.5


def test_cases_where_population_is_zero(tmp_path):
    pop = POPULATION.replace("C,old,500", "C,old,0")
    with pytest.raises(InputError, match=r"1 area\(s\) have cases in cases.csv but zero population in population.csv "
                                         r"\(C age old\)"):
        study(tmp_path, population=pop)


def test_zero_population_without_cases_is_a_note(tmp_path):
    pop = POPULATION.replace("D,old,500", "D,old,0").replace("D,young,1000", "D,young,0")
    s = study(tmp_path, population=pop)
    assert any("zero population" in n and "Dunmere (D)" in n for n in s.notes)


def test_population_missing_an_age_group(tmp_path):
    pop = "".join(line + "\n" for line in POPULATION.splitlines() if line != "B,young,1000")
    with pytest.raises(InputError, match=r"population.csv has no population for 1 \(area, age group\) pair\(s\) \(B/young\)"):
        study(tmp_path, population=pop)


def test_case_age_groups_not_in_population(tmp_path):
    with pytest.raises(InputError, match=r"1 age group\(s\) in cases.csv are not in population.csv \(elderly\)\. Use "
                                         r"the same age-group labels"):
        study(tmp_path, cases=CASES + "A,2026-W47,elderly,1\n")


def test_case_age_groups_but_population_without_age(tmp_path):
    pop = "area,pop\n" + "".join(f"{a},1500\n" for a in "ABCDE")
    cfg = CONFIG.replace('population_column = "pop"', 'population_column = "pop"').replace(
        'id_column = "area"\nage_column = "age"\npopulation_column', 'id_column = "area"\npopulation_column')
    with pytest.raises(InputError, match=r"age group\(s\) in cases.csv are not in population.csv.*Add an age column "
                                         r"to the population"):
        study(tmp_path, population=pop, config=cfg)


def test_empty_geometry_is_an_error(tmp_path):
    geoms = dict(SQUARES, E=shapely.Polygon())
    with pytest.raises(InputError, match=r"1 area\(s\) in areas.gpkg have a missing or empty geometry \(E\)"):
        study(tmp_path, geoms=geoms)


def test_missing_geometry_is_an_error(tmp_path):
    geoms = dict(SQUARES, D=None)
    with pytest.raises(InputError, match=r"missing or empty geometry \(D\)"):
        study(tmp_path, geoms=geoms)


def test_point_geometry_is_an_error(tmp_path):
    geoms = dict(SQUARES, E=shapely.Point(5, 5))
    path = write_boundaries(tmp_path / "b.geojson", geoms)
    with pytest.raises(InputError, match=r"1 area\(s\) in b.geojson are not polygons \(E; types: Point\)"):
        read_boundaries(path, id_column="code")


def test_invalid_geometry_repaired_with_warning(tmp_path):
    # A square with a zero-width spike: invalid (self-intersection), area unchanged by the repair.
    spiky = shapely.Polygon([(5, 5), (6, 5), (6, 5.5), (6.5, 5.5), (6, 5.5), (6, 6), (5, 6)])
    assert not spiky.is_valid  # checked with shapely (GEOS validity rules)
    path = write_boundaries(tmp_path / "b.gpkg", dict(SQUARES, E=spiky))
    with pytest.warns(GeometryRepairedWarning, match=r"Repaired 1 invalid geometries in b.gpkg \(E\)"):
        b = read_boundaries(path, id_column="code")
    assert b.geometry.is_valid.all()
    np.testing.assert_allclose(b.geometry.loc["E"].area, 1.0, rtol=1e-9)  # float rounding only


def test_unrepairable_geometry_is_an_error(tmp_path):
    # A symmetric bow-tie: signed area 0, make_valid gives two triangles of total area 0.5 -> not "safe"
    bowtie = shapely.Polygon([(5, 5), (6, 6), (6, 5), (5, 6)])
    path = write_boundaries(tmp_path / "b.gpkg", dict(SQUARES, E=bowtie))
    with pytest.raises(InputError, match=r"1 area\(s\) in b.gpkg have invalid geometries that cannot be repaired "
                                         r"safely \(E; Self-intersection"):
        read_boundaries(path, id_column="code")


@pytest.mark.parametrize("method", ["knn", "distance"])
def test_missing_crs_for_distance_methods(tmp_path, method):
    extra = f'[graph]\nmethod = "{method}"\nk = 2\ndistance = 2.0\n'
    with pytest.raises(InputError, match=rf"areas.gpkg has no coordinate reference system \(CRS\), but \[graph\] "
                                         rf"method = '{method}' measures distances"):
        study(tmp_path, crs=None, extra=extra)


def test_missing_crs_fine_for_contiguity(tmp_path):
    report = check_study(load_config(make_study(tmp_path, crs=None, extra='[graph]\nmethod = "rook"\n')))
    assert report.study.boundaries.crs is None
    assert report.graph.summary().n_links == 4  # 2x2 rook block: A-B, C-D, A-C, B-D


def test_empty_cases_file(tmp_path):
    with pytest.raises(InputError, match=r"The cases file cases.csv is empty \(0 bytes\)"):
        study(tmp_path, cases="")


def test_header_only_cases_file(tmp_path):
    with pytest.raises(InputError, match=r"cases.csv has a header \(area, week, age, n\) but no data rows"):
        study(tmp_path, cases="area,week,age,n\n")


def test_header_only_population_file(tmp_path):
    with pytest.raises(InputError, match=r"population.csv has a header .* but no data rows"):
        study(tmp_path, population="area,age,pop\n\n")


def test_non_utf8_file(tmp_path):
    cases = CASES.replace("age,n", "âge,n").encode("latin-1")
    offset = cases.index("â".encode("latin-1"))
    with pytest.raises(InputError, match=rf"cases file cases.csv is not valid utf-8: byte {offset} \(line 1\) cannot "
                                         r"be decoded .* Re-save the file as UTF-8, or set encoding = \"latin-1\""):
        study(tmp_path, cases=cases)


def test_latin1_file_with_encoding_key(tmp_path):
    cases = (CASES.replace("age", "âge") + "B,2026-W47,old,1\n").encode("latin-1")
    cfg = CONFIG.replace('age_column = "age"\ncount_column', 'age_column = "âge"\ncount_column').replace(
        'count_column = "n"\n', 'count_column = "n"\nencoding = "latin-1"\n')
    s = study(tmp_path, cases=cases, config=cfg)
    assert s.total_cases == 12


def test_missing_column_names_alternatives(tmp_path):
    cfg = CONFIG.replace('count_column = "n"', 'count_column = "cases"')
    with pytest.raises(InputError, match=r"Column 'cases' not found in cases.csv. Available columns: 'area', 'week', "
                                         r"'age', 'n'. Set count_column under \[cases\]"):
        study(tmp_path, config=cfg)


def test_missing_boundary_column(tmp_path):
    write_boundaries(tmp_path / "b.gpkg")
    with pytest.raises(InputError, match=r"Column 'district' not found in b.gpkg. Available columns: 'code', 'label'. "
                                         r"Set id_column under \[boundaries\]"):
        read_boundaries(tmp_path / "b.gpkg", id_column="district")


def test_unreadable_boundaries(tmp_path):
    (tmp_path / "b.gpkg").write_text("not a geopackage")
    with pytest.raises(InputError, match=r"Cannot read the boundaries file b.gpkg"):
        read_boundaries(tmp_path / "b.gpkg")


def test_boundaries_in_other_formats(tmp_path):
    # Shapefile and GeoJSON through the same reader; numeric ids become text.
    for name in ("b.shp", "b.geojson"):
        gdf = gpd.GeoDataFrame({"code": [37001, 37003]}, geometry=[SQUARES["A"], SQUARES["B"]], crs="EPSG:3035")
        gdf.to_file(tmp_path / name)
        b = read_boundaries(tmp_path / name, id_column="code")
        assert list(b.index) == ["37001", "37003"] and list(b["area_name"]) == ["37001", "37003"]


def test_nc_counties_read_with_fips_ids(sids2_dir):
    # Open reference file shipped with libpysal: 100 North Carolina counties.
    b = read_boundaries(sids2_dir / "sids2.shp", id_column="FIPS", name_column="NAME")
    assert len(b) == 100 and b.index.is_unique
    assert b.loc["37001", "area_name"] == "Alamance"  # FIPS 37001 = Alamance County (from memory)


def test_read_cases_rejects_unknown_format(tmp_path):
    with pytest.raises(ParameterError, match="'format' parameter of read_cases"):
        read_cases(tmp_path / "c.csv", format="wide")


def test_read_population_without_age(tmp_path):
    (tmp_path / "p.csv").write_text("area_id,population\nA,10\n")
    assert read_population(tmp_path / "p.csv")["age_group"].tolist() == ["all"]


# =========================================================================== check report
def test_check_report_summary(tmp_path):
    report = check_study(load_config(make_study(tmp_path)))
    text = report.summary()
    assert "Areas: 5" in text
    assert "Weeks: 2026-W45 to 2026-W47 (3 weeks)" in text
    assert "Total cases: 11" in text
    assert "Total population: 7,500" in text
    assert "Age groups: old, young" in text
    assert "islands: Eyot" in text
    assert "Inputs are usable." in text
    g = report.graph.summary()
    # hand count: 2x2 queen block has 6 links (4 sides + 2 diagonals); E alone
    assert g.n_links == 6 and g.islands == ("Eyot",)
    row = report.to_frame().iloc[0]
    assert row["areas"] == 5 and row["graph_links"] == 6


def test_check_uses_extra_links(tmp_path):
    (tmp_path / "links.csv").write_text("a,b\nD,E\n")
    report = check_study(load_config(make_study(tmp_path, extra='[graph]\nextra_links_file = "links.csv"\n')))
    assert report.graph.summary().islands == ()


def test_no_warnings_on_clean_input(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_study(load_config(make_study(tmp_path)))


def test_utf8_byte_order_mark_is_accepted(tmp_path):
    # Spreadsheet programs often write a UTF-8 byte-order mark (EF BB BF, Unicode standard) before the header.
    s = study(tmp_path, cases=b"\xef\xbb\xbf" + CASES.encode("utf-8"))
    assert s.total_cases == 11


def test_standard_population_read(tmp_path):
    (tmp_path / "std.csv").write_text("age_group,population\nyoung,60000\nold,40000\n")
    s = study(tmp_path, extra='[standardization]\nstandard_population_file = "std.csv"\n')
    assert s.standard_population.to_dict() == {"old": 40000.0, "young": 60000.0}


def test_covariates_kept_and_checked(tmp_path):
    path = tmp_path / "areas.gpkg"
    make_study(tmp_path)  # writes the data files
    gdf = gpd.read_file(path)
    gdf["income"] = [1.0, 2.0, 3.0, 4.0, 5.0]
    gdf.to_file(path)
    s = load_study(load_config(make_study_keep(tmp_path, '[smoothing]\ncovariates = ["income"]\n')))
    assert s.boundaries["income"].tolist() == [1.0, 2.0, 3.0, 4.0, 5.0]
    gdf["income"] = ["1", "2", "n/a", "4", "5"]
    gdf.to_file(path)
    with pytest.raises(InputError, match=r"Covariate column 'income' in areas.gpkg has 1 missing or non-numeric "
                                         r"values \(areas C\)"):
        load_study(load_config(tmp_path / "run.toml"))
    cfg = tmp_path / "run.toml"
    cfg.write_text(CONFIG + '[smoothing]\ncovariates = ["wealth"]\n')
    with pytest.raises(InputError, match=r"Column 'wealth' not found in areas.gpkg.*covariates\[0\]"):
        load_study(load_config(cfg))


def make_study_keep(folder: Path, extra: str) -> Path:
    """Rewrite only run.toml (keeping the data files)."""
    p = folder / "run.toml"
    p.write_text(CONFIG + extra, encoding="utf-8")
    return p


def test_load_study_accepts_a_path(tmp_path):
    s = load_study(make_study(tmp_path))
    assert s.n_areas == 5
    with pytest.raises(ParameterError, match="'config' parameter of load_study must be a RunConfig"):
        load_study(42)


def test_reporting_window_in_summary_and_weeks_extended(tmp_path):
    # A window reaching before the first week with data: the earlier weeks are added (with zero cases).
    report = check_study(make_study(tmp_path, extra="[period]\nwindow_weeks = 4\n"))
    assert report.study.weeks[0] == "2026-W44"
    assert "Reporting window: 2026-W44 to 2026-W47 (4 weeks; [period] week = 'latest')" in report.summary()
    assert any("starts before the first week" in n for n in report.study.notes)


def test_boundaries_without_features(tmp_path):
    empty = gpd.GeoDataFrame({"code": pd.Series([], dtype=str)}, geometry=gpd.GeoSeries([], crs="EPSG:3035"))
    empty.to_file(tmp_path / "b.gpkg", layer="areas")
    with pytest.raises(InputError, match=r"The boundaries file b.gpkg has no features"):
        read_boundaries(tmp_path / "b.gpkg", id_column="code")


def test_zero_byte_boundaries(tmp_path):
    (tmp_path / "b.gpkg").write_bytes(b"")
    with pytest.raises(InputError, match=r"The boundaries file b.gpkg is empty \(0 bytes\)"):
        read_boundaries(tmp_path / "b.gpkg")


def test_boundaries_layer(tmp_path):
    path = tmp_path / "b.gpkg"
    write_boundaries(path)
    other = gpd.GeoDataFrame({"code": ["X"], "label": ["Xen"]}, geometry=[shapely.box(0, 0, 1, 1)], crs="EPSG:3035")
    other.to_file(path, layer="other")
    assert list(read_boundaries(path, id_column="code", layer="other").index) == ["X"]
    with pytest.warns(DataWarning, match=r"b.gpkg has 2 layers \(b, other\); reading the first, 'b'"):
        assert list(read_boundaries(path, id_column="code").index) == list("ABCDE")
    with pytest.raises(InputError, match=r"Cannot read the boundaries file b.gpkg.*Layers in the file: .*other"):
        read_boundaries(path, id_column="code", layer="missing")


@given(
    st.lists(
        st.tuples(st.sampled_from("ABC"), st.integers(40, 52), st.sampled_from(["young", "old"]), st.integers(0, 50)),
        min_size=1, max_size=25,
    )
)
@settings(max_examples=40, deadline=None)
def test_read_cases_totals_match_pandas(tmp_path_factory, rows):
    # Invariant: after binning and summing repeats, totals per (area, week, age) equal a plain pandas groupby.
    path = tmp_path_factory.mktemp("hyp") / "c.csv"
    frame = pd.DataFrame(rows, columns=["area_id", "w", "age", "cases"])
    frame["week"] = [f"2026-W{w:02d}" for w in frame["w"]]
    frame[["area_id", "week", "age", "cases"]].to_csv(path, index=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)
        got = read_cases(path, age_column="age").set_index(["area_id", "week", "age_group"])["cases"]
    ref = frame.groupby(["area_id", "week", "age"])["cases"].sum()
    assert got.to_dict() == {k: int(v) for k, v in ref.items()}
