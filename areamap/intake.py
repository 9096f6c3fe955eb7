"""Reading and checking the study inputs: boundaries, cases, population.

The readers turn user files into three tidy tables with one vocabulary:

* boundaries: GeoDataFrame indexed by ``area_id`` (text), columns ``area_name``
  and ``geometry`` (CRS kept);
* cases: long table ``area_id, week, age_group, cases`` with ISO weeks
  ("2026-W47") and whole-number counts;
* population: long table ``area_id, age_group, population``.

:func:`load_study` reads all three as named by a :class:`~areamap.config.RunConfig`,
checks them against each other and returns a :class:`StudyData`;
:func:`check_study` adds the neighbour graph and returns the report printed by
``areamap check``.

Every problem is an :class:`~areamap.errors.InputError` whose message names the
file, the column, the offending ids or lines (CSV line numbers, 1-based, with
the header as line 1) and the fix.

Weeks are ISO 8601 weeks: Monday to Sunday, numbered within the ISO year, which
can differ from the calendar year near New Year (2027-01-01 is in 2026-W53).
"""

from __future__ import annotations

import html
import itertools
import re
import warnings
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import date, timedelta
from io import StringIO
from pathlib import Path

import numpy as np
import pandas as pd

from typing import TYPE_CHECKING

from .errors import (
    DataWarning,
    GeometryRepairedWarning,
    InputError,
    ParameterError,
    format_examples,
)

if TYPE_CHECKING:  # pragma: no cover
    import geopandas as gpd

__all__ = [
    "parse_week",
    "week_of",
    "week_bounds",
    "weeks_ending",
    "week_range",
    "read_boundaries",
    "read_cases",
    "read_population",
    "read_reference_rates",
    "read_standard_population",
    "StudyData",
    "load_study",
    "CheckReport",
    "check_study",
]

ALL_AGES = "all"
"""Age-group label used when the cases carry no age column."""

SMALL_POPULATION = 1000
"""Areas with fewer people than this are listed in the notes (ratios there are unstable)."""

MAX_EXACT_COUNT = 2**53 - 1
"""Largest count accepted: whole numbers above it are not exact in floating point, and sums overflow."""

# Relative change of area above which make_valid is not considered a safe repair.
_REPAIR_AREA_TOLERANCE = 0.01


# =========================================================================== ISO weeks
_WEEK_RE = re.compile(r"^\s*(\d{4})-?[Ww](\d{1,2})(?:-?([1-7]))?\s*$")
_DATE_RE = re.compile(r"^\s*(\d{4})-(\d{1,2})-(\d{1,2})(?:[T ]\S.*)?\s*$")


def _week_text(year: int, week: int) -> str:
    return f"{year:04d}-W{week:02d}"


def _try_week(text: str) -> str | None:
    """ISO week text for an ISO-week or ISO-date string, None if neither."""
    m = _WEEK_RE.match(text)
    if m:
        y, w = int(m.group(1)), int(m.group(2))
        try:
            date.fromisocalendar(y, w, 1)
        except ValueError:
            return None
        return _week_text(y, w)
    m = _DATE_RE.match(text)
    if m:
        try:
            d = date(int(m.group(1)), int(m.group(2)), int(m.group(3)))
        except ValueError:
            return None
        return week_of(d)
    return None


def parse_week(value: str) -> str:
    """Canonical ISO week text ``"YYYY-Www"`` for an ISO week or an ISO date.

    Parameters
    ----------
    value : str
        ``"2026-W47"``, ``"2026W47"``, ``"2026-W47-3"`` (weekday ignored) or a
        date ``"2026-11-18"`` (binned to its ISO week).

    Returns
    -------
    str

    Raises
    ------
    ParameterError
        When ``value`` is neither, or names week 53 of a year that has only 52.

    Examples
    --------
    >>> parse_week("2026w7")
    '2026-W07'
    >>> parse_week("2027-01-01")   # a Friday in ISO week 53 of 2026
    '2026-W53'
    """
    out = _try_week(str(value)) if isinstance(value, str | date) else None
    if isinstance(value, date):
        out = week_of(value)
    if out is None:
        raise ParameterError(
            "The 'week' parameter of parse_week must be an ISO week like '2026-W47' (week 53 only in "
            f"long ISO years) or a date like '2026-11-18'. Got {value!r} instead."
        )
    return out


def week_of(day: date) -> str:
    """ISO week (``"YYYY-Www"``) containing a date (ISO 8601: weeks start on Monday).

    Examples
    --------
    >>> week_of(date(2026, 12, 31)), week_of(date(2027, 1, 4))
    ('2026-W53', '2027-W01')
    """
    iso = day.isocalendar()
    return _week_text(iso[0], iso[1])


def week_bounds(week: str) -> tuple[date, date]:
    """Monday and Sunday of an ISO week.

    Examples
    --------
    >>> week_bounds("2026-W47")
    (datetime.date(2026, 11, 16), datetime.date(2026, 11, 22))
    """
    w = parse_week(week)
    monday = date.fromisocalendar(int(w[:4]), int(w[6:]), 1)
    return monday, monday + timedelta(days=6)


def _monday(week: str) -> date:
    return date.fromisocalendar(int(week[:4]), int(week[6:]), 1)


def weeks_ending(last_week: str, k: int) -> list[str]:
    """The ``k`` consecutive ISO weeks ending with ``last_week``, oldest first.

    Examples
    --------
    >>> weeks_ending("2027-W01", 3)
    ['2026-W52', '2026-W53', '2027-W01']
    """
    if isinstance(k, bool) or not isinstance(k, int | np.integer) or k < 1:
        raise ParameterError(f"The 'k' parameter of weeks_ending must be an integer >= 1. Got {k!r} instead.")
    end = _monday(parse_week(last_week))
    return [week_of(end - timedelta(weeks=i)) for i in range(int(k) - 1, -1, -1)]


def week_range(first: str, last: str) -> list[str]:
    """Every ISO week from ``first`` to ``last`` inclusive (empty when ``last`` is earlier).

    Examples
    --------
    >>> week_range("2026-W52", "2027-W02")
    ['2026-W52', '2026-W53', '2027-W01', '2027-W02']
    """
    a, b = _monday(parse_week(first)), _monday(parse_week(last))
    n = (b - a).days // 7
    return [week_of(a + timedelta(weeks=i)) for i in range(n + 1)]


# =========================================================================== file helpers
def _examples(values, *, limit: int = 5, fmt=str) -> str:
    """Like :func:`format_examples` but formats only the shown items (cheap for millions of rows)."""
    seq = values if hasattr(values, "__len__") else list(values)
    head = [fmt(v) for v in itertools.islice(iter(seq), limit)]
    text = format_examples(head, limit=limit)
    extra = len(seq) - limit
    return f"{text} and {extra} more" if extra > 0 else text


def _lines_text(index, name: str) -> str:
    """CSV line numbers (header = line 1) of 0-based data-row labels."""
    lines = np.asarray(index, dtype=np.int64) + 2
    word = "line" if len(lines) == 1 else "lines"
    return f"{word} {_examples(lines, fmt=int)} of {name}; line 1 is the header"


def _check_file(path: str | Path, role: str) -> Path:
    p = Path(path).expanduser()
    if not p.exists():
        raise InputError(f"The {role} file {p} does not exist. Check the path in the run configuration.")
    if p.is_dir():
        raise InputError(f"The {role} file {p} is a folder; give the path of a file.")
    if p.stat().st_size == 0:
        raise InputError(f"The {role} file {p.name} is empty (0 bytes). Export it again with a header row and data.")
    return p


def _read_csv(path: str | Path, *, role: str, encoding: str, section: str) -> tuple[pd.DataFrame, str]:
    """Read a CSV as text columns; index = 0-based data row (line = index + 2)."""
    p = _check_file(path, role)
    raw = p.read_bytes()
    enc = "utf-8-sig" if encoding.lower().replace("_", "-") in ("utf-8", "utf8") else encoding
    try:
        text = raw.decode(enc)
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(
            f"The {role} file {p.name} is not valid {encoding}: byte {exc.start} (line {line}) "
            f"cannot be decoded ({exc.reason}). Re-save the file as UTF-8, or set "
            f'encoding = "latin-1" (or the file\'s actual encoding) under [{section}] in the run configuration.'
        ) from None
    except LookupError:
        raise InputError(f"Unknown text encoding {encoding!r} for {p.name}; use e.g. 'utf-8' or 'latin-1'.") from None
    if not text.strip():
        raise InputError(f"The {role} file {p.name} is empty (only blank space). It needs a header row and data rows.")
    sep = _detect_separator(text)
    if sep != ",":
        label = {";": "semicolons", "\t": "tabs", "|": "vertical bars"}[sep]
        warnings.warn(
            f"The {role} file {p.name} separates its columns with {label}, not commas; it was read that way. "
            "Numbers must still use a decimal point (830.5, not 830,5).",
            DataWarning, stacklevel=3,
        )
    try:
        df = pd.read_csv(
            StringIO(text), sep=sep, dtype=str, keep_default_na=False, na_values=[""],
            skip_blank_lines=False, skipinitialspace=True,
        )
    except pd.errors.ParserError as exc:
        raise InputError(
            f"The {role} file {p.name} is not a well-formed CSV file: {exc}. Check the separator (comma) "
            "and quotes on that line."
        ) from None
    df.columns = [str(c).strip() for c in df.columns]
    df = df.loc[~df.isna().all(axis=1)] if df.shape[1] else df
    if len(df) == 0:
        raise InputError(
            f"The {role} file {p.name} has a header ({format_examples(df.columns)}) but no data rows."
        )
    return df, p.name


_SEPARATORS = (",", ";", "\t", "|")


def _detect_separator(text: str) -> str:
    """The column separator: comma unless the header has none and another separator splits it consistently.

    Spreadsheets set to a decimal-comma locale save "CSV" with semicolons; reading such a file with commas
    gives one column whose name is the whole header, which would be reported as a missing id column.
    """
    lines = [ln for ln in text.splitlines()[:50] if ln.strip()]
    header = lines[0]
    if "," in header:
        return ","
    best, width = ",", 1
    for sep in _SEPARATORS[1:]:
        n = header.count(sep) + 1
        # the separator must split the header and most data lines into the same number of fields
        if n > width and sum(ln.count(sep) + 1 == n for ln in lines[1:]) >= 0.8 * (len(lines) - 1):
            best, width = sep, n
    return best


def _require_columns(df: pd.DataFrame, wanted: dict[str, str], name: str, section: str) -> None:
    """``wanted`` maps config key -> column name."""
    for key, col in wanted.items():
        if col not in df.columns:
            avail = ", ".join(repr(c) for c in df.columns)
            raise InputError(
                f"Column '{col}' not found in {name}. Available columns: {avail}. "
                f"Set {key} under [{section}] in the run configuration to the right column."
            )


def _clean_ids(values: pd.Series) -> pd.Series:
    """Area ids as stripped text; integral floats lose their '.0'."""
    s = values
    if pd.api.types.is_string_dtype(s) and not pd.api.types.is_object_dtype(s):
        out = _stripped(s)
        return out.where(out.notna() & (out != ""), None)
    if pd.api.types.is_float_dtype(s):
        finite = s.dropna()
        if len(finite) and np.all(np.mod(finite, 1) == 0):
            s = s.astype("Int64")
    out = s.astype(object).where(s.notna(), None)
    out = out.map(lambda v: None if v is None else str(v).strip())
    return out.where(out != "", None)


def _require_ids(ids: pd.Series, column: str, name: str, what: str = "rows") -> None:
    missing = ids.isna().to_numpy()
    if missing.any():
        raise InputError(
            f"Column '{column}' in {name} has {missing.sum()} {what} without an area id "
            f"({_lines_text(ids.index[missing], name)}). Fill in the id or remove these rows."
        )


def _stripped(values: pd.Series) -> pd.Series:
    """Object series of text cells without surrounding blanks (missing cells stay missing)."""
    # Strip the distinct values only: ids, weeks, age groups and counts repeat a lot.
    codes, uniq = pd.factorize(values.astype(object), use_na_sentinel=True)
    clean = np.array([v.strip() if isinstance(v, str) else v for v in uniq] + [None], dtype=object)
    return pd.Series(clean[codes], index=values.index, dtype=object)


def _parse_numbers(values: pd.Series, *, column: str, name: str, what: str, whole: bool) -> pd.Series:
    """Numbers >= 0 (whole when ``whole``); one error lists every kind of problem with its lines."""
    s = _stripped(values)
    missing = (s.isna() | (s == "")).to_numpy()
    num = pd.to_numeric(s.where(~missing, None), errors="coerce").astype(float)
    finite = np.isfinite(num.to_numpy())
    bad = ~missing & ~finite
    x = np.where(finite, num.to_numpy(), 0.0)
    frac = finite & (x % 1 != 0) if whole else np.zeros(len(s), bool)
    neg = finite & (x < 0)
    # whole numbers above 2**53 are not stored exactly and their sums overflow 64-bit integers
    huge = finite & (np.abs(x) > MAX_EXACT_COUNT) if whole else np.zeros(len(s), bool)
    parts = []
    for mask, label in ((missing, f"missing {what}"), (bad, f"{what} that are not numbers"),
                        (frac, f"fractional {what}"), (neg, f"negative {what}"),
                        (huge, f"{what} too large to be exact whole numbers (above {MAX_EXACT_COUNT:,})")):
        if mask.any():
            shown = "" if mask is missing else ": " + _examples(s[mask], fmt=repr if mask is bad else str)
            parts.append(f"{int(mask.sum())} {label} ({_lines_text(s.index[mask], name)}{shown})")
    if not parts and whole and float(np.sum(x)) > MAX_EXACT_COUNT:
        parts.append(f"a total of {float(np.sum(x)):.3g} {what}, too large to add up exactly")
    if parts:
        rule = "whole numbers >= 0" if whole else "numbers >= 0"
        if huge.any() or "too large" in parts[-1]:
            rule += f" and at most {MAX_EXACT_COUNT:,} (check for a unit error or a stray exponent such as 1e20)"
        fix = "; write 0 for none, or remove the rows" if missing.any() else ""
        if bad.any() and s[bad].astype(str).str.fullmatch(r"-?\d+,\d+").any():
            fix += "; decimal commas (830,5) must be written with a point (830.5)"
        raise InputError(
            f"Column '{column}' in {name} has " + " and ".join(parts) + f". {what.capitalize()} must be {rule}{fix}."
        )
    return num


def _parse_week_column(values: pd.Series, *, column: str, name: str, section: str, key: str) -> pd.Series:
    s = values.astype(object)
    missing = s.isna().to_numpy()
    if missing.any():
        raise InputError(
            f"Column '{column}' in {name} has {int(missing.sum())} empty weeks/dates "
            f"({_lines_text(s.index[missing], name)}). Fill them in or remove the rows."
        )
    uniq = pd.unique(s.to_numpy())
    mapping = {u: _try_week(str(u)) for u in uniq}
    out = s.map(mapping)
    bad = out.isna().to_numpy()
    if bad.any():
        raise InputError(
            f"Column '{column}' in {name} has {int(bad.sum())} values that are neither ISO weeks nor dates "
            f"({_lines_text(s.index[bad], name)}: {_examples(s[bad], fmt=repr)}). "
            "Write weeks as YYYY-Www (e.g. 2026-W47; week 53 exists only in long ISO years) or dates as "
            f"YYYY-MM-DD; or point {key} under [{section}] at the right column."
        )
    return out.astype(str)


def _age_values(df: pd.DataFrame, column: str | None, name: str) -> pd.Series:
    if column is None:
        return pd.Series(ALL_AGES, index=df.index, dtype=object)
    s = _stripped(df[column])
    missing = (s.isna() | (s == "")).to_numpy()
    if missing.any():
        raise InputError(
            f"Column '{column}' in {name} has {int(missing.sum())} empty age groups "
            f"({_lines_text(s.index[missing], name)}). Fill them in (e.g. 'unknown' is not usable for "
            "standardization: drop or redistribute those rows)."
        )
    return s


# =========================================================================== readers
def read_boundaries(
    path: str | Path,
    *,
    id_column: str = "area_id",
    name_column: str | None = None,
    layer: str | None = None,
    keep_columns: Sequence[str] = (),
):
    """Read area polygons from any vector file geopandas can read.

    Parameters
    ----------
    path : path-like
        GeoPackage, GeoJSON, Shapefile, ...
    id_column : str, default="area_id"
        Column with the area ids (stored as text, e.g. ``37001`` -> ``"37001"``).
    name_column : str, optional
        Column with readable names; the id is used when absent or empty.
    layer : str, optional
        Layer of a multi-layer file (default: the first).
    keep_columns : sequence of str, default=()
        Extra columns to keep (e.g. covariates).

    Returns
    -------
    geopandas.GeoDataFrame
        Index ``area_id`` (file order), columns ``area_name``, the kept columns
        and ``geometry``; the file's CRS (possibly None).

    Raises
    ------
    InputError
        Unreadable or empty file, missing column, missing or duplicate ids,
        missing/empty or non-polygon geometries, or invalid geometries that
        cannot be repaired without changing the area.

    Warns
    -----
    GeometryRepairedWarning
        Invalid polygons repaired with :func:`shapely.make_valid` (the result
        is polygonal and its area within 1 % of the original).

    Examples
    --------
    >>> import geopandas as gpd, shapely, tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "a.geojson"
    >>> gpd.GeoDataFrame({"code": ["A", "B"]}, geometry=[shapely.box(0, 0, 1, 1),
    ...                  shapely.box(1, 0, 2, 1)], crs="EPSG:3035").to_file(f)
    >>> b = read_boundaries(f, id_column="code")
    >>> list(b.index), list(b.columns)
    (['A', 'B'], ['area_name', 'geometry'])
    """
    import geopandas as gpd

    p = _check_file(path, "boundaries")
    if layer is None:
        layer = _default_layer(p)
    try:
        gdf = gpd.read_file(p, layer=layer) if layer is not None else gpd.read_file(p)
    except Exception as exc:  # noqa: BLE001 - GDAL/pyogrio raise many types; re-raised with context
        hint = ""
        if layer is not None:
            try:
                import pyogrio

                hint = f" Layers in the file: {format_examples(pyogrio.list_layers(p)[:, 0])}."
            except Exception:  # noqa: BLE001 - best effort only
                hint = ""
        raise InputError(
            f"Cannot read the boundaries file {p.name}: {str(exc).splitlines()[0] if str(exc) else type(exc).__name__}."
            f"{hint} It must be a vector file GDAL can read (GeoPackage, GeoJSON, Shapefile with its .shx/.dbf)."
        ) from None
    name = p.name
    if len(gdf) == 0:
        raise InputError(f"The boundaries file {name} has no features (areas). Export it again with the polygons.")
    wanted = {"id_column": id_column}
    if name_column is not None:
        wanted["name_column"] = name_column
    for i, c in enumerate(keep_columns):
        wanted[f"covariates[{i}] (in [smoothing])"] = c
    attrs = pd.DataFrame(gdf.drop(columns=gdf.geometry.name))
    _require_columns(attrs, wanted, name, "boundaries")

    ids = _clean_ids(gdf[id_column]).reset_index(drop=True)
    missing = ids.isna().to_numpy()
    if missing.any():
        raise InputError(
            f"Column '{id_column}' in {name} has {int(missing.sum())} features without an area id "
            f"(features {format_examples(np.flatnonzero(missing) + 1)}, counting from 1). Fill in the ids."
        )
    dup = ids.duplicated(keep=False).to_numpy()
    if dup.any():
        d = pd.unique(ids[dup])
        raise InputError(
            f"Area ids must be unique, but {len(d)} id(s) in column '{id_column}' of {name} appear more than "
            f"once ({format_examples(d)}). Dissolve the parts into one (multi)polygon per area, or fix the ids."
        )
    index = pd.Index(ids.to_numpy(dtype=object), name="area_id", dtype=object)

    if name_column is not None:
        names = gdf[name_column].reset_index(drop=True)
        names = names.astype(object).where(names.notna(), None).map(lambda v: None if v is None else str(v).strip())
        names = names.where(names.notna() & (names != ""), ids)
    else:
        names = ids
    data = {"area_name": names.to_numpy(dtype=object)}
    for c in keep_columns:
        data[c] = gdf[c].to_numpy()
    geoms = np.asarray(gdf.geometry.to_numpy(), dtype=object)
    geoms = _check_geometries(geoms, index, name)
    out = gpd.GeoDataFrame(data, geometry=geoms, index=index, crs=gdf.crs)
    out.index.name = "area_id"
    _check_degrees(out, name)
    return out


def _check_degrees(gdf, name: str) -> None:
    """Refuse coordinates far outside longitude/latitude ranges under a geographic (degree) CRS."""
    crs = gdf.crs
    if crs is None or not crs.is_geographic:
        return
    x0, y0, x1, y1 = gdf.total_bounds
    if not (np.isfinite([x0, y0, x1, y1]).all() and -360 <= x0 and x1 <= 360 and -90 <= y0 and y1 <= 90):
        raise InputError(
            f"The boundaries file {name} says its coordinates are degrees ({crs.name}), but they span "
            f"x {x0:.6g} to {x1:.6g} and y {y0:.6g} to {y1:.6g}, outside longitude/latitude ranges: they are "
            "probably projected coordinates (metres) with a wrong CRS label. Set the file's real CRS (for a "
            "shapefile, its .prj file) and export it again."
        )


def _default_layer(path: Path) -> str | None:
    """First layer of a multi-layer file (with a DataWarning naming the others); None otherwise."""
    try:
        import pyogrio

        layers = pyogrio.list_layers(path)
    except Exception:  # noqa: BLE001 - unreadable files are reported by the reader itself
        return None
    if len(layers) <= 1:
        return None
    first = str(layers[0, 0])
    warnings.warn(
        f"{path.name} has {len(layers)} layers ({_examples(layers[:, 0])}); reading the first, '{first}'. "
        "Set layer under [boundaries] to choose another.",
        DataWarning,
        stacklevel=4,
    )
    return first


def _check_geometries(geoms: np.ndarray, ids: pd.Index, name: str) -> np.ndarray:
    import shapely

    empty = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if empty.any():
        raise InputError(
            f"{int(empty.sum())} area(s) in {name} have a missing or empty geometry ({format_examples(ids[empty])}). "
            "Draw their boundaries, or remove these areas (and their rows in cases and population)."
        )
    kinds = shapely.get_type_id(geoms)
    polygonal = np.isin(kinds, [3, 6])  # Polygon, MultiPolygon
    if not polygonal.all():
        types = pd.unique(shapely.get_type_id(geoms[~polygonal]))
        names = {0: "Point", 1: "LineString", 2: "LinearRing", 4: "MultiPoint", 5: "MultiLineString", 7: "GeometryCollection"}
        raise InputError(
            f"{int((~polygonal).sum())} area(s) in {name} are not polygons ({format_examples(ids[~polygonal])}; "
            f"types: {format_examples(names.get(int(t), str(t)) for t in types)}). Areas must be Polygon or "
            "MultiPolygon features."
        )
    invalid = ~shapely.is_valid(geoms)
    if not invalid.any():
        return geoms
    before = shapely.area(geoms[invalid])
    repaired = shapely.make_valid(geoms[invalid])
    fixed = np.array([_polygonal_part(g) for g in repaired], dtype=object)
    after = np.array([g.area if g is not None else 0.0 for g in fixed])
    scale = np.maximum(np.abs(before), after)
    change = np.divide(np.abs(after - np.abs(before)), scale, out=np.ones_like(scale), where=scale > 0)
    unsafe = np.array([g is None for g in fixed]) | (change > _REPAIR_AREA_TOLERANCE)
    bad_ids = ids[invalid]
    if unsafe.any():
        reasons = shapely.is_valid_reason(geoms[invalid][unsafe])
        raise InputError(
            f"{int(unsafe.sum())} area(s) in {name} have invalid geometries that cannot be repaired safely "
            f"({format_examples(bad_ids[unsafe])}; {format_examples(reasons, limit=2)}): an automatic repair would "
            "change their area by more than 1 %. Fix them in a GIS (e.g. remove self-intersections) and export again."
        )
    warnings.warn(
        f"Repaired {int(invalid.sum())} invalid geometries in {name} ({format_examples(bad_ids)}) with "
        f"shapely.make_valid; areas changed by at most {100 * change.max():.2g} %. Check these boundaries.",
        GeometryRepairedWarning,
        stacklevel=3,
    )
    out = geoms.copy()
    out[invalid] = fixed
    return out


def _polygonal_part(geom):
    """Polygon/MultiPolygon part of a repaired geometry, None if there is none."""
    import shapely

    t = geom.geom_type
    if t in ("Polygon", "MultiPolygon"):
        return geom
    if t == "GeometryCollection":
        parts = [g for g in geom.geoms if g.geom_type in ("Polygon", "MultiPolygon")]
        if parts:
            return shapely.union_all(parts)
    return None


def read_cases(
    path: str | Path,
    *,
    format: str = "counts",
    id_column: str = "area_id",
    week_column: str = "week",
    date_column: str = "date",
    age_column: str | None = None,
    count_column: str = "cases",
    encoding: str = "utf-8",
) -> pd.DataFrame:
    """Read cases as aggregated counts or as a line list, binned into ISO weeks.

    Parameters
    ----------
    path : path-like
        CSV file.
    format : {"counts", "line_list"}, default="counts"
        ``"counts"``: one row per area, week (and age group) with a count in
        ``count_column``; the week column holds ISO weeks or dates.
        ``"line_list"``: one row per case with its date (or ISO week) in
        ``date_column``.
    id_column, week_column, date_column, age_column, count_column : str
        Column names (``age_column=None``: no age split, group ``"all"``).
    encoding : str, default="utf-8"

    Returns
    -------
    pandas.DataFrame
        Columns ``area_id``, ``week``, ``age_group``, ``cases`` (int64), one
        row per (area, week, age group), sorted.

    Raises
    ------
    InputError
        Empty file, wrong encoding, missing columns, missing ids, bad weeks
        or dates, missing/negative/fractional/non-numeric counts.

    Warns
    -----
    DataWarning
        When rows of a counts file repeat an (area, week, age group): they are
        summed. Split reports of one week (e.g. late notifications sent as a
        second row) are common practice, so the rows are added up rather than
        rejected; check that no file was appended twice.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "c.csv"
    >>> _ = f.write_text("area_id,date\\nA,2026-12-31\\nA,2027-01-01\\nB,2027-01-04\\n")
    >>> read_cases(f, format="line_list")
      area_id      week age_group  cases
    0       A  2026-W53       all      2
    1       B  2027-W01       all      1
    """
    if format not in ("counts", "line_list"):
        raise ParameterError(f"The 'format' parameter of read_cases must be one of 'counts', 'line_list'. Got {format!r} instead.")
    df, name = _read_csv(path, role="cases", encoding=encoding, section="cases")
    wanted = {"id_column": id_column}
    if format == "counts":
        wanted.update(week_column=week_column, count_column=count_column)
    else:
        wanted.update(date_column=date_column)
    if age_column is not None:
        wanted["age_column"] = age_column
    _require_columns(df, wanted, name, "cases")

    ids = _clean_ids(df[id_column])
    _require_ids(ids, id_column, name)
    time_col = week_column if format == "counts" else date_column
    weeks = _parse_week_column(
        df[time_col], column=time_col, name=name, section="cases",
        key="week_column" if format == "counts" else "date_column",
    )
    ages = _age_values(df, age_column, name)
    if format == "counts":
        counts = _parse_numbers(df[count_column], column=count_column, name=name, what="counts", whole=True)
    else:
        counts = pd.Series(1.0, index=df.index)
    long = pd.DataFrame({"area_id": ids, "week": weeks, "age_group": ages, "cases": counts})
    if format == "counts":
        # Repeats of the same (area, week-or-date, age) text; several dates of one week are binned silently.
        raw = pd.DataFrame({"a": ids, "t": _stripped(df[time_col]), "g": ages})
        dup = raw.duplicated(keep=False).to_numpy()
        if dup.any():
            keys = pd.unique(
                long.loc[dup, "area_id"] + " " + long.loc[dup, "week"] + " " + long.loc[dup, "age_group"].astype(str)
            )
            warnings.warn(
                f"{name} has {len(keys)} (area, week, age group) combinations on more than one row "
                f"({_examples(keys)}; {_lines_text(long.index[dup], name)}); their counts were summed "
                "(split reports are common). Check that no rows were appended twice.",
                DataWarning,
                stacklevel=2,
            )
    out = long.groupby(["area_id", "week", "age_group"], sort=True, as_index=False)["cases"].sum()
    out["cases"] = out["cases"].astype(np.int64)
    for c in ("area_id", "week", "age_group"):
        out[c] = out[c].astype(object)
    return out


def read_population(
    path: str | Path,
    *,
    id_column: str = "area_id",
    age_column: str | None = None,
    population_column: str = "population",
    encoding: str = "utf-8",
) -> pd.DataFrame:
    """Read the population at risk by area (and age group).

    Parameters
    ----------
    path : path-like
        CSV file.
    id_column, age_column, population_column : str
        Column names (``age_column=None``: one group ``"all"``).
    encoding : str, default="utf-8"

    Returns
    -------
    pandas.DataFrame
        Columns ``area_id``, ``age_group``, ``population`` (float; estimates
        may be fractional), file order.

    Raises
    ------
    InputError
        Empty file, wrong encoding, missing columns or ids, missing,
        negative or non-numeric populations, repeated (area, age group) rows
        (populations are not summed: a repeat usually means two sources mixed).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "p.csv"
    >>> _ = f.write_text("area_id,population\\nA,1200\\nB,830.5\\n")
    >>> read_population(f)["population"].tolist()
    [1200.0, 830.5]
    """
    df, name = _read_csv(path, role="population", encoding=encoding, section="population")
    wanted = {"id_column": id_column, "population_column": population_column}
    if age_column is not None:
        wanted["age_column"] = age_column
    _require_columns(df, wanted, name, "population")
    ids = _clean_ids(df[id_column])
    _require_ids(ids, id_column, name)
    ages = _age_values(df, age_column, name)
    pop = _parse_numbers(df[population_column], column=population_column, name=name, what="populations", whole=False)
    out = pd.DataFrame({"area_id": ids, "age_group": ages, "population": pop})
    dup = out.duplicated(["area_id", "age_group"], keep=False).to_numpy()
    if dup.any():
        keys = pd.unique(out.loc[dup, "area_id"] + (" " + out.loc[dup, "age_group"] if age_column else ""))
        what = "(area, age group) pairs" if age_column else "area ids"
        raise InputError(
            f"{name} has {len(keys)} duplicate {what} ({_examples(keys)}; {_lines_text(out.index[dup], name)}). "
            "Each area (and age group) needs exactly one population row: remove or merge the repeats."
        )
    out = out.reset_index(drop=True)
    out["area_id"] = out["area_id"].astype(object)
    out["age_group"] = out["age_group"].astype(object)
    return out


def _read_age_table(path, *, age_column, value_column, encoding, role, what, section, keys) -> pd.Series:
    df, name = _read_csv(path, role=role, encoding=encoding, section=section)
    _require_columns(df, {keys[0]: age_column, keys[1]: value_column}, name, section)
    ages = _age_values(df, age_column, name)
    vals = _parse_numbers(df[value_column], column=value_column, name=name, what=what, whole=False)
    dup = ages.duplicated(keep=False).to_numpy()
    if dup.any():
        raise InputError(
            f"{name} lists {len(pd.unique(ages[dup]))} age group(s) more than once ({format_examples(pd.unique(ages[dup]))}). "
            "Give one row per age group."
        )
    return pd.Series(vals.to_numpy(float), index=pd.Index(ages.to_numpy(dtype=object), name="age_group"), name=what)


def read_reference_rates(
    path: str | Path,
    *,
    age_column: str = "age_group",
    rates_column: str = "rate",
    per: float = 100_000.0,
    encoding: str = "utf-8",
) -> pd.Series:
    """Read external reference rates by age group, returned as cases per person per week.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> f = pathlib.Path(tempfile.mkdtemp()) / "r.csv"
    >>> _ = f.write_text("age_group,rate\\n0-14,20\\n15+,5\\n")
    >>> read_reference_rates(f).tolist()
    [0.0002, 5e-05]
    """
    if not (isinstance(per, int | float) and not isinstance(per, bool) and per > 0):
        raise ParameterError(f"The 'per' parameter of read_reference_rates must be a number > 0. Got {per!r} instead.")
    s = _read_age_table(
        path, age_column=age_column, value_column=rates_column, encoding=encoding, role="reference rates",
        what="rates", section="standardization", keys=("rates_age_column", "rates_column"),
    )
    return (s / float(per)).rename("rate")


def read_standard_population(
    path: str | Path, *, age_column: str = "age_group", population_column: str = "population", encoding: str = "utf-8"
) -> pd.Series:
    """Read a standard population by age group (for directly standardized rates)."""
    s = _read_age_table(
        path, age_column=age_column, value_column=population_column, encoding=encoding,
        role="standard population", what="populations", section="standardization",
        keys=("standard_age_column", "standard_population_column"),
    )
    return s.rename("population")


# =========================================================================== study
@dataclass(frozen=True, eq=False)
class StudyData:
    """Checked study inputs, aligned on the boundaries' area ids.

    Attributes
    ----------
    boundaries : geopandas.GeoDataFrame
        Index ``area_id``; columns ``area_name``, covariates, ``geometry``.
    cases : pandas.DataFrame
        Long table ``area_id, week, age_group, cases``; areas or weeks without
        rows have zero cases.
    population : pandas.DataFrame
        Long table ``area_id, age_group, population`` (complete: every area x
        age group).
    weeks : tuple of str
        Every ISO week from the first to the last week with data, in order.
    age_groups : tuple of str
        Age groups (``("all",)`` without an age split).
    notes : tuple of str
        Things worth knowing that are not errors (areas without case rows,
        small populations...).
    reference_rates : pandas.Series or None
        External reference rates per person per week by age group.
    standard_population : pandas.Series or None
        Standard population by age group.
    """

    boundaries: gpd.GeoDataFrame
    cases: pd.DataFrame
    population: pd.DataFrame
    weeks: tuple[str, ...]
    age_groups: tuple[str, ...]
    notes: tuple[str, ...] = ()
    reference_rates: pd.Series | None = None
    standard_population: pd.Series | None = None
    sources: dict = field(default_factory=dict, repr=False)

    @property
    def area_ids(self) -> pd.Index:
        """Area ids in boundaries order."""
        return self.boundaries.index

    @property
    def n_areas(self) -> int:
        return len(self.boundaries)

    @property
    def total_cases(self) -> int:
        return int(self.cases["cases"].sum())

    @property
    def total_population(self) -> float:
        return float(self.population["population"].sum())

    def _check_weeks(self, weeks: Iterable[str] | str | None) -> list[str]:
        if weeks is None:
            return list(self.weeks)
        if isinstance(weeks, str):
            weeks = [weeks]
        out = [parse_week(w) for w in weeks]
        known = set(self.weeks)
        unknown = [w for w in out if w not in known]
        if unknown:
            raise ParameterError(
                f"The 'weeks' parameter of StudyData.case_matrix must name weeks of the study "
                f"({self.weeks[0]} to {self.weeks[-1]}). Got {format_examples(unknown)} instead."
            )
        return out

    def case_matrix(self, weeks: Iterable[str] | str | None = None) -> pd.DataFrame:
        """Cases per area (rows, boundaries order) and age group (columns), summed over ``weeks``.

        Parameters
        ----------
        weeks : str or iterable of str, optional
            ISO weeks to sum over; all weeks when omitted.
        """
        wk = self._check_weeks(weeks)
        sel = self.cases[self.cases["week"].isin(wk)]
        table = sel.pivot_table(index="area_id", columns="age_group", values="cases", aggfunc="sum", fill_value=0)
        table = table.reindex(index=self.area_ids, columns=pd.Index(self.age_groups, name="age_group"), fill_value=0)
        table.index.name = "area_id"
        return table.fillna(0).astype(np.int64)

    def population_matrix(self) -> pd.DataFrame:
        """Population per area (rows, boundaries order) and age group (columns)."""
        table = self.population.pivot(index="area_id", columns="age_group", values="population")
        table = table.reindex(index=self.area_ids, columns=pd.Index(self.age_groups, name="age_group"))
        table.index.name = "area_id"
        return table.astype(float)

    def weekly_cases(self) -> pd.DataFrame:
        """Cases per area (rows, boundaries order) and week (columns, all study weeks), all ages."""
        table = self.cases.pivot_table(index="area_id", columns="week", values="cases", aggfunc="sum", fill_value=0)
        table = table.reindex(index=self.area_ids, columns=pd.Index(self.weeks, name="week"), fill_value=0)
        table.index.name = "area_id"
        return table.fillna(0).astype(np.int64)

    def period_weeks(self, week: str = "latest", window_weeks: int = 1) -> list[str]:
        """The reporting window: ``window_weeks`` weeks ending at ``week`` ("latest" = last study week).

        Raises
        ------
        ParameterError
            When the window reaches outside the study weeks.
        """
        last = self.weeks[-1] if week == "latest" else parse_week(week)
        wk = weeks_ending(last, window_weeks)
        known = set(self.weeks)
        outside = [w for w in wk if w not in known]
        if outside:
            raise ParameterError(
                f"The reporting window {wk[0]} to {wk[-1]} reaches outside the study weeks "
                f"({self.weeks[0]} to {self.weeks[-1]}): {format_examples(outside)}. Choose another week or a "
                "shorter window."
            )
        return wk

    def summary(self) -> str:
        """Compact description: areas, weeks, totals, age groups, notes."""
        lines = [
            f"Areas: {self.n_areas}",
            f"Weeks: {self.weeks[0]} to {self.weeks[-1]} ({len(self.weeks)} weeks)",
            f"Total cases: {self.total_cases:,}",
            f"Total population: {self.total_population:,.0f}",
            f"Age groups: {', '.join(self.age_groups)}",
        ]
        if self.reference_rates is not None:
            lines.append("Reference rates: external")
        if self.notes:
            lines.append("Notes:")
            lines.extend(f"  - {n}" for n in self.notes)
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return "<pre>" + html.escape(self.summary()) + "</pre>"


def _note_list(ids: Sequence, names: pd.Series) -> str:
    return _examples(ids, fmt=lambda i: f"{_short(names.get(i, i))} ({_short(i)})")


def _short(value: object, limit: int = 40) -> str:
    """A name cut for display (messages, notes); the tables keep full names."""
    text = str(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _as_config(config):
    from .config import RunConfig, load_config

    if isinstance(config, RunConfig):
        return config
    if isinstance(config, str | Path):
        return load_config(config)
    raise ParameterError(
        "The 'config' parameter of load_study must be a RunConfig or the path of a run configuration file. "
        f"Got {type(config).__name__} instead."
    )


def load_study(config) -> StudyData:
    """Read and cross-check the boundaries, cases and population named by a run configuration.

    Parameters
    ----------
    config : RunConfig or path-like
        From :func:`areamap.config.load_config`, or the path of the TOML file.

    Returns
    -------
    StudyData

    Raises
    ------
    InputError
        Any file problem (see the readers), plus: case or population ids not
        in the boundaries; boundaries without population; age groups in the
        cases but not in the population; areas with cases but zero
        population; no CRS when the graph method measures distances;
        non-numeric covariates.

    Notes
    -----
    Areas of the boundaries without any case row count as zero cases (listed
    in ``notes``). When the cases have no age column but the population has
    one, the population is summed over age groups (crude, not
    age-standardized, comparisons: noted). Areas with small populations are
    listed in ``notes``: their ratios swing widely from week to week.
    """
    cfg = _as_config(config)
    notes: list[str] = []
    b = read_boundaries(
        cfg.boundaries.file, id_column=cfg.boundaries.id_column, name_column=cfg.boundaries.name_column,
        layer=cfg.boundaries.layer, keep_columns=tuple(cfg.smoothing.covariates),
    )
    bname = Path(cfg.boundaries.file).name
    names = b["area_name"]
    for c in cfg.smoothing.covariates:
        vals = pd.to_numeric(pd.Series(b[c].to_numpy(), index=b.index), errors="coerce")
        bad = vals.isna().to_numpy()
        if bad.any():
            raise InputError(
                f"Covariate column '{c}' in {bname} has {int(bad.sum())} missing or non-numeric values "
                f"(areas {format_examples(b.index[bad])}). Covariates must be numbers for every area; "
                "fix them or remove the column from covariates under [smoothing]."
            )
        b[c] = vals.to_numpy(float)
    if cfg.graph.method in ("knn", "distance") and b.crs is None:
        raise InputError(
            f"The boundaries file {bname} has no coordinate reference system (CRS), but [graph] method = "
            f"'{cfg.graph.method}' measures distances. Set the CRS of the file (for a shapefile, add the .prj "
            "file), or use method = 'queen' or 'rook', which need no CRS."
        )

    cc = cfg.cases
    cases = read_cases(
        cc.file, format=cc.format, id_column=cc.id_column, week_column=cc.week_column,
        date_column=cc.date_column, age_column=cc.age_column, count_column=cc.count_column, encoding=cc.encoding,
    )
    cname = Path(cc.file).name
    pc = cfg.population
    pop = read_population(
        pc.file, id_column=pc.id_column, age_column=pc.age_column, population_column=pc.population_column,
        encoding=pc.encoding,
    )
    pname = Path(pc.file).name
    ids = b.index

    # ---- ids against the boundaries
    for table, tname, key in ((cases, cname, "cases"), (pop, pname, "population")):
        unknown = pd.unique(table.loc[~table["area_id"].isin(ids), "area_id"])
        if len(unknown):
            raise InputError(
                f"{len(unknown)} area id(s) in {tname} are not in the boundaries file {bname} "
                f"({format_examples(unknown)}).{_id_hint(unknown, ids)} Fix the ids, or check id_column under "
                f"[{key}] and [boundaries]."
            )
    no_pop = ids[~ids.isin(pop["area_id"])]
    if len(no_pop):
        raise InputError(
            f"{len(no_pop)} area(s) of the boundaries file {bname} have no population in {pname} "
            f"({format_examples(no_pop)}).{_id_hint(no_pop, pd.Index(pd.unique(pop['area_id'])))} Every area needs "
            "its population at risk; add the rows (0 for an unpopulated area)."
        )
    no_cases = ids[~ids.isin(cases["area_id"])]
    if len(no_cases):
        notes.append(
            f"{len(no_cases)} area(s) have no rows in {cname} and count as zero cases: {_note_list(no_cases, names)}."
        )

    # ---- age groups
    case_ages = list(pd.unique(cases["age_group"]))
    pop_ages = list(pd.unique(pop["age_group"]))
    if cc.age_column is None and pc.age_column is not None:
        pop = pop.groupby("area_id", sort=False, as_index=False)["population"].sum()
        pop["age_group"] = ALL_AGES
        pop = pop[["area_id", "age_group", "population"]]
        notes.append(
            f"The cases have no age column, so the population was summed over its {len(pop_ages)} age groups: "
            "comparisons are crude (not age-standardized)."
        )
        pop_ages = [ALL_AGES]
    missing_ages = [a for a in case_ages if a not in set(pop_ages)]
    if missing_ages:
        fix = (
            "Add an age column to the population (age_column under [population])"
            if pc.age_column is None
            else f"Use the same age-group labels in both files (population has: {format_examples(pop_ages, limit=10)})"
        )
        raise InputError(
            f"{len(missing_ages)} age group(s) in {cname} are not in {pname} ({format_examples(missing_ages)}). "
            f"{fix}."
        )
    age_groups = tuple(sorted(pop_ages, key=_age_sort_key))
    no_case_ages = [a for a in age_groups if a not in set(case_ages)]
    if no_case_ages and cc.age_column is not None:
        notes.append(f"Age group(s) with population but no cases: {format_examples(no_case_ages)}.")

    # complete population grid
    grid = pop.pivot(index="area_id", columns="age_group", values="population").reindex(index=ids, columns=list(age_groups))
    holes = grid.isna().stack()
    holes = holes[holes]
    if len(holes):
        pairs = [f"{a}/{g}" for a, g in holes.index]
        raise InputError(
            f"{pname} has no population for {len(pairs)} (area, age group) pair(s) ({format_examples(pairs)}). "
            "Give every area a row for every age group (0 where nobody lives)."
        )
    # cases where population is zero
    merged = cases.merge(pop, on=["area_id", "age_group"], how="left")
    zero = merged[(merged["cases"] > 0) & (merged["population"] <= 0)]
    if len(zero):
        pairs = pd.unique(zero["area_id"] + (" age " + zero["age_group"] if cc.age_column else ""))
        raise InputError(
            f"{len(pairs)} area(s) have cases in {cname} but zero population in {pname} ({_examples(pairs)}). "
            "A rate needs people at risk: correct the population or the area ids of these cases."
        )
    area_pop = grid.sum(axis=1)
    empty_areas = ids[(area_pop <= 0).to_numpy()]
    if len(empty_areas):
        notes.append(
            f"{len(empty_areas)} area(s) have zero population (rates undefined there): {_note_list(empty_areas, names)}."
        )
    small = ids[((area_pop > 0) & (area_pop < SMALL_POPULATION)).to_numpy()]
    if len(small):
        notes.append(
            f"{len(small)} area(s) have fewer than {SMALL_POPULATION:,} people, so their rates and ratios rest on "
            f"very few cases and swing widely: {_note_list(small, names)}."
        )

    # ---- weeks
    first, last = min(cases["week"]), max(cases["week"])
    if cfg.period.week != "latest":
        pw = cfg.period.week
        if pw > last:
            notes.append(f"The reporting week {pw} is after the last week with case rows ({last}); later weeks count as zero.")
            last = pw
        win_first = weeks_ending(pw, cfg.period.window_weeks)[0]
        first = min(first, win_first)
    else:
        win_first = weeks_ending(last, cfg.period.window_weeks)[0]
        if win_first < first:
            first = win_first
            notes.append(
                f"The reporting window ({cfg.period.window_weeks} weeks) starts before the first week with case rows; "
                "earlier weeks count as zero."
            )
    weeks = tuple(week_range(first, last))

    # ---- standardization tables
    sc = cfg.standardization
    rates = std = None
    if sc.reference == "external":
        rates = read_reference_rates(
            sc.rates_file, age_column=sc.rates_age_column, rates_column=sc.rates_column, per=sc.rates_per,
            encoding=sc.encoding,
        )
        _require_ages(rates, age_groups, Path(sc.rates_file).name, "rates_age_column")
        rates = rates.reindex(list(age_groups))
    if sc.standard_population_file is not None:
        std = read_standard_population(
            sc.standard_population_file, age_column=sc.standard_age_column,
            population_column=sc.standard_population_column, encoding=sc.encoding,
        )
        _require_ages(std, age_groups, Path(sc.standard_population_file).name, "standard_age_column")
        std = std.reindex(list(age_groups))

    cases = cases.sort_values(["area_id", "week", "age_group"]).reset_index(drop=True)
    pop_long = (
        grid.rename_axis(index="area_id", columns="age_group").stack().rename("population").reset_index()
    )
    pop_long["area_id"] = pop_long["area_id"].astype(object)
    pop_long["age_group"] = pop_long["age_group"].astype(object)
    return StudyData(
        boundaries=b,
        cases=cases,
        population=pop_long,
        weeks=weeks,
        age_groups=tuple(str(a) for a in age_groups),
        notes=tuple(notes),
        reference_rates=rates,
        standard_population=std,
        sources={"boundaries": bname, "cases": cname, "population": pname},
    )


def _require_ages(table: pd.Series, age_groups: Sequence[str], name: str, key: str) -> None:
    missing = [a for a in age_groups if a not in set(table.index)]
    if missing:
        raise InputError(
            f"{name} has no value for {len(missing)} age group(s) of the study ({format_examples(missing)}). "
            f"Use the same age-group labels as the population file (check {key} under [standardization])."
        )


def _age_sort_key(label: str) -> tuple:
    """Sort '0-14' < '15-64' < '65+' numerically; other labels alphabetically after."""
    m = re.match(r"^\s*(\d+)", str(label))
    return (0, int(m.group(1)), str(label)) if m else (1, 0, str(label))


def _id_hint(unknown: Sequence, known: pd.Index) -> str:
    """Point out ids that differ only by leading zeros or letter case."""
    norm = {str(k).lstrip("0").lower(): k for k in known}
    pairs = [(u, norm[str(u).lstrip("0").lower()]) for u in unknown if str(u).lstrip("0").lower() in norm]
    if not pairs:
        return ""
    ex = format_examples(f"'{u}' vs '{k}'" for u, k in pairs[:3])
    return f" Some differ only by leading zeros or letter case ({ex}): keep ids as text in both files."


# =========================================================================== check
@dataclass(frozen=True, eq=False)
class CheckReport:
    """Result of :func:`check_study`: the checked data, the neighbour graph and a readable summary.

    Attributes
    ----------
    config : RunConfig
    study : StudyData
    graph : AreaGraph
    """

    config: object
    study: StudyData
    graph: object
    plan: object = None

    def to_frame(self) -> pd.DataFrame:
        """One row of headline numbers."""
        g = self.graph.summary()
        s = self.study
        return pd.DataFrame([{
            "areas": s.n_areas,
            "first_week": s.weeks[0],
            "last_week": s.weeks[-1],
            "weeks": len(s.weeks),
            "total_cases": s.total_cases,
            "total_population": s.total_population,
            "age_groups": ", ".join(s.age_groups),
            "graph_links": g.n_links,
            "graph_components": g.n_components,
            "islands": ", ".join(g.islands),
        }])

    def summary(self) -> str:
        """The text printed by ``areamap check``."""
        cfg, s = self.config, self.study
        crs = s.boundaries.crs
        crs_text = "none" if crs is None else (f"EPSG:{crs.to_epsg()}" if crs.to_epsg() else crs.name)
        head = [f"Configuration: {cfg.path}" if cfg.path is not None else "Configuration: (built in code)"]
        if cfg.title:
            head.append(f"Title: {cfg.title}")
        head.append(
            f"Files: {s.sources.get('boundaries')} (CRS {crs_text}), {s.sources.get('cases')} "
            f"({cfg.cases.format}), {s.sources.get('population')}"
        )
        body = s.summary().split("\nNotes:")[0]
        window = (list(self.plan.window) if self.plan is not None
                  else s.period_weeks(cfg.period.week, cfg.period.window_weeks))
        body += (
            f"\nReporting window: {window[0]}" + (f" to {window[-1]}" if len(window) > 1 else "")
            + f" ({len(window)} week{'s' if len(window) > 1 else ''}; [period] week = {cfg.period.week!r})"
        )
        if self.plan is not None:
            body += f"; {self.plan.window_cases:,} cases in the window"
        g = self.graph.summary()
        graph_line = f"Neighbour graph ({cfg.graph.method}): {g.summary()}"
        lines = head + body.splitlines() + [graph_line]
        notes = list(s.notes)
        if g.islands:
            gap_hint = (
                " If any of them borders other areas on the map, the boundaries have gaps or slivers: set snap "
                "(in map units) under [graph]."
                if cfg.graph.method in ("queen", "rook") and cfg.graph.snap == 0 else ""
            )
            notes.append(
                f"{len(g.islands)} area(s) have no neighbours ({', '.join(g.islands)}); local statistics are not "
                "computed for them (set islands = 'link' under [graph] to link them to their nearest areas)."
                + gap_hint
            )
        if g.n_components > 1 + len(g.islands):
            notes.append(f"The graph has {g.n_components} separate parts; spatial smoothing works within each part.")
        if notes:
            lines.append("Notes:")
            lines.extend(f"  - {n}" for n in notes)
        lines.append("Inputs are usable.")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return "<pre>" + html.escape(self.summary()) + "</pre>"


def check_study(config, *, period: str | None = None, today: date | None = None) -> CheckReport:
    """Load the study named by ``config``, build its neighbour graph, run every bulletin check and report.

    The checks are exactly those :func:`areamap.run_bulletin` runs before it
    computes anything (:func:`areamap.validation.validate_run`), so inputs
    reported usable here do not fail in the bulletin for input reasons.

    Parameters
    ----------
    config : RunConfig or path-like
    period : str, optional
        ISO week or ``"latest"`` (default ``[period] week``), as given to the bulletin.
    today : datetime.date, optional
        The day of the run (default today, UTC); case weeks after it are refused.

    Returns
    -------
    CheckReport
        ``summary()`` is what ``areamap check`` prints.

    Raises
    ------
    InputError
        As :func:`load_study`, :func:`areamap.graphs.build_graph` and
        :func:`areamap.validation.validate_run`.
    """
    from .validation import prepare_run

    prepared = prepare_run(config, period=period, today=today)
    return CheckReport(config=prepared.config, study=prepared.study, graph=prepared.graph, plan=prepared.plan)
