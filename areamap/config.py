"""Run configuration: a TOML file naming the input files, their columns and the analysis choices.

:func:`load_config` reads the file with :mod:`tomllib`, checks every key
(type, range, allowed values), fills in defaults, resolves relative file paths
against the folder of the configuration file and returns a frozen
:class:`RunConfig`. Unknown keys are errors that suggest the nearest valid key,
so a typo never silently falls back to a default.

Every key, its type, default and meaning is listed by
:func:`config_reference_table` (the same table appears in the user guide).
"""

from __future__ import annotations

import codecs
import difflib
import math
import tomllib
from collections.abc import Mapping
from dataclasses import MISSING, dataclass, field, fields
from pathlib import Path
from typing import Any

from .errors import ConfigError

__all__ = [
    "RunConfig",
    "BoundariesConfig",
    "CasesConfig",
    "PopulationConfig",
    "StandardizationConfig",
    "GraphConfig",
    "PeriodConfig",
    "ClustersConfig",
    "PriorsConfig",
    "SmoothingConfig",
    "FlagsConfig",
    "ScanConfig",
    "OutputConfig",
    "ChecksConfig",
    "load_config",
    "config_from_dict",
    "config_reference_table",
]


# --------------------------------------------------------------------------- key declarations
def _key(
    default: Any,
    kind: str,
    doc: str,
    *,
    required: bool = False,
    choices: tuple = (),
    low: float = -math.inf,
    high: float = math.inf,
    closed: str = "both",
    must_exist: bool = True,
) -> Any:
    """Declare one configuration key (dataclass field with validation metadata).

    ``kind`` is one of: str, opt_str, path, opt_path, int, float, opt_float,
    bool, choice, week, str_list, encoding.
    """
    meta = {
        "kind": kind,
        "doc": doc,
        "required": required,
        "choices": choices,
        "low": low,
        "high": high,
        "closed": closed,
        "must_exist": must_exist,
    }
    if isinstance(default, list | tuple):
        return field(default_factory=lambda d=tuple(default): d, metadata=meta)
    return field(default=default, metadata=meta)


@dataclass(frozen=True)
class BoundariesConfig:
    """``[boundaries]``: the area polygons."""

    file: Path | None = _key(
        None, "path",
        "Vector file with one polygon per area (GeoPackage, GeoJSON, Shapefile, anything GDAL reads).",
        required=True,
    )
    id_column: str = _key("area_id", "str", "Column holding the area id (matched against cases and population).")
    name_column: str | None = _key(
        None, "opt_str", "Column holding a readable area name; when absent the id is used as the name."
    )
    layer: str | None = _key(None, "opt_str", "Layer to read from a multi-layer file (GeoPackage); default: the first layer.")


@dataclass(frozen=True)
class CasesConfig:
    """``[cases]``: case counts or a line list."""

    file: Path | None = _key(None, "path", "CSV file with the cases.", required=True)
    format: str = _key(
        "counts", "choice",
        "'counts': one row per area, week (and age group) with a count; 'line_list': one row per case.",
        choices=("counts", "line_list"),
    )
    id_column: str = _key("area_id", "str", "Column holding the area id.")
    week_column: str = _key(
        "week", "str",
        "counts format: column with the ISO week ('2026-W47') or a date (YYYY-MM-DD, binned to its ISO week).",
    )
    date_column: str = _key(
        "date", "str", "line_list format: column with the date of each case (YYYY-MM-DD) or its ISO week."
    )
    age_column: str | None = _key(None, "opt_str", "Column holding the age group; leave out when cases are not split by age.")
    count_column: str = _key("cases", "str", "counts format: column holding the number of cases (whole numbers >= 0).")
    encoding: str = _key("utf-8", "encoding", "Text encoding of the CSV file (e.g. 'utf-8', 'latin-1').")


@dataclass(frozen=True)
class PopulationConfig:
    """``[population]``: population at risk by area (and age group)."""

    file: Path | None = _key(None, "path", "CSV file with the population at risk.", required=True)
    id_column: str = _key("area_id", "str", "Column holding the area id.")
    age_column: str | None = _key(
        None, "opt_str", "Column holding the age group; needed when the cases are split by age."
    )
    population_column: str = _key("population", "str", "Column holding the population (numbers >= 0).")
    encoding: str = _key("utf-8", "encoding", "Text encoding of the CSV file.")


@dataclass(frozen=True)
class StandardizationConfig:
    """``[standardization]``: reference rates for expected counts and a standard population."""

    reference: str = _key(
        "internal", "choice",
        "'internal': expected counts from the study's own age-specific rates over the analysed weeks; "
        "'external': from the rates in rates_file.",
        choices=("internal", "external"),
    )
    rates_file: Path | None = _key(None, "opt_path", "CSV of reference rates by age group (needed when reference = 'external').")
    rates_age_column: str = _key("age_group", "str", "Age-group column in rates_file.")
    rates_column: str = _key("rate", "str", "Rate column in rates_file (cases per rates_per people per week).")
    rates_per: float = _key(
        100000.0, "float", "Population base of the rates in rates_file (rate = cases per this many people).",
        low=0.0, closed="neither",
    )
    standard_population_file: Path | None = _key(
        None, "opt_path", "CSV of a standard population by age group, for directly standardized rates (optional)."
    )
    standard_age_column: str = _key("age_group", "str", "Age-group column in standard_population_file.")
    standard_population_column: str = _key("population", "str", "Population column in standard_population_file.")
    encoding: str = _key("utf-8", "encoding", "Text encoding of rates_file and standard_population_file.")


@dataclass(frozen=True)
class GraphConfig:
    """``[graph]``: which areas count as neighbours."""

    method: str = _key(
        "queen", "choice",
        "'queen': areas sharing a boundary point; 'rook': sharing a boundary segment; "
        "'knn': the k nearest centroids; 'distance': centroids within `distance`. knn and distance need a CRS.",
        choices=("queen", "rook", "knn", "distance"),
    )
    snap: float = _key(
        0.0, "float", "Tolerance in map units within which boundaries count as touching (queen/rook; fixes slivers and gaps).",
        low=0.0,
    )
    k: int = _key(5, "int", "Number of neighbours for method = 'knn'.", low=1)
    distance: float | None = _key(
        None, "opt_float", "Distance band in map units for method = 'distance' (required for that method).",
        low=0.0, closed="neither",
    )
    islands: str = _key(
        "keep", "choice",
        "'keep': areas without neighbours stay unlinked (reported as islands); 'link': each is linked to its "
        "island_k nearest areas.",
        choices=("keep", "link"),
    )
    island_k: int = _key(1, "int", "Neighbours given to each island when islands = 'link'.", low=1)
    extra_links_file: Path | None = _key(
        None, "opt_path", "CSV of extra neighbour pairs (two id columns), e.g. ferry or bridge links."
    )


@dataclass(frozen=True)
class PeriodConfig:
    """``[period]``: the week the bulletin reports on."""

    week: str = _key(
        "latest", "week", "'latest' (the last week with data) or an ISO week such as '2026-W47'."
    )
    window_weeks: int = _key(
        1, "int", "Number of weeks, ending at `week`, summed into the reporting window (rolling window; at most "
        "520 weeks, ten years).", low=1, high=520
    )


@dataclass(frozen=True)
class ClustersConfig:
    """``[clusters]``: local cluster detection."""

    statistic: str = _key(
        "local_moran", "choice", "Local statistic: 'local_moran' (local Moran's I) or 'gi_star' (Getis-Ord Gi*).",
        choices=("local_moran", "gi_star"),
    )
    permutations: int = _key(
        9999, "int", "Conditional permutations per area for the pseudo p-values (>= 19). The smallest possible "
        "p-value is 1/(permutations + 1); with false-discovery-rate control over m areas a single area can only "
        "reach significance when permutations >= m/alpha - 1, hence the default 9999. At most 999999: "
        "run time grows linearly with it.", low=19, high=999999
    )
    adjust: str = _key(
        "fdr", "choice",
        "Multiple-testing adjustment: 'fdr' (Benjamini-Hochberg), 'bonferroni' or 'none'.",
        choices=("fdr", "bonferroni", "none"),
    )
    alpha: float = _key(0.05, "float", "Significance level applied to the adjusted p-values.", low=0.0, high=1.0, closed="neither")


@dataclass(frozen=True)
class PriorsConfig:
    """``[smoothing.priors]``: penalised-complexity priors of the CAR models."""

    sigma_upper: float = _key(1.0, "float", "U in P(sigma > U) = sigma_tail for the total random-effect SD.", low=0.0, closed="neither")
    sigma_tail: float = _key(0.01, "float", "Tail probability for sigma_upper.", low=0.0, high=1.0, closed="neither")
    phi_upper: float = _key(0.5, "float", "U in P(phi < U) = phi_tail for the spatial fraction (BYM2) / mixing (Leroux).", low=0.0, high=1.0, closed="neither")
    phi_tail: float = _key(2 / 3, "float", "Probability for phi_upper, P(phi < phi_upper).", low=0.0, high=1.0, closed="neither")
    intercept_sd: float = _key(5.0, "float", "Prior SD of the intercept (log relative-risk scale).", low=0.0, closed="neither")
    coefficient_sd: float = _key(5.0, "float", "Prior SD of each covariate coefficient.", low=0.0, closed="neither")


@dataclass(frozen=True)
class SmoothingConfig:
    """``[smoothing]``: model-based smoothing of relative risks."""

    model: str = _key(
        "bym2", "choice", "CAR model: 'bym2', 'leroux' or 'icar'.", choices=("bym2", "leroux", "icar")
    )
    covariates: tuple[str, ...] = _key(
        (), "str_list", "Numeric columns of the boundaries file used as area-level covariates (may be empty)."
    )
    threshold: float = _key(
        1.0, "float", "Relative risk whose exceedance probability P(RR > threshold) is reported.", low=0.0, closed="neither"
    )
    kriging: bool = _key(
        False, "bool", "Also estimate relative risks by area-to-area Poisson kriging (risk semivariogram fitted to the "
        "window's counts) and show them beside the CAR estimates: columns kriged_rr, kriged_rr_low, kriged_rr_high "
        "and a map. Flags still come from the CAR model."
    )
    kriging_neighbours: int = _key(
        32, "int", "Nearest districts in each local kriging system, besides the district itself.", low=1
    )
    priors: PriorsConfig = field(default_factory=PriorsConfig, metadata={"kind": "section"})


@dataclass(frozen=True)
class SpaceTimeConfig:
    """``[spacetime]``: the space-time model over the trailing weeks and the newest-week forecast check."""

    enabled: bool = _key(
        True, "bool", "Fit the space-time model (districts x trailing weeks) and flag 'emerging' and 'persistent' "
        "districts; false keeps only the model of the summed window."
    )
    weeks: int = _key(
        12, "int", "Trailing weeks, ending at the period's week, used by the space-time model (fewer when the "
        "cases file has fewer).", low=4
    )
    min_weeks: int = _key(
        6, "int", "Fewest weeks of data for the space-time model; with fewer the bulletin uses the model of the "
        "summed window and says so.", low=4
    )
    trend: str = _key(
        "rw1", "choice", "Regional weekly trend: 'rw1' (random walk of order 1) or 'rw2' (order 2, smoother).",
        choices=("rw1", "rw2"),
    )
    forecast_fdr: float = _key(
        0.05, "float", "False-discovery rate for 'emerging': newest week's count above its forecast (Benjamini-"
        "Hochberg over districts).", low=0.0, high=1.0, closed="neither"
    )
    forecast_window: int = _key(
        3, "int", "Weeks summed by the second forecast check: the sum of the newest this-many counts against its "
        "forecast from the earlier weeks, beside the newest week alone (Bonferroni over the two); 1 checks the "
        "newest week only.", low=1
    )


@dataclass(frozen=True)
class FlagsConfig:
    """``[flags]``: when an area is flagged as a hotspot."""

    min_probability: float = _key(
        0.8, "float", "Flag an area when P(RR > threshold) is at least this.", low=0.0, high=1.0, closed="neither"
    )
    use_clusters: bool = _key(True, "bool", "Also require (or report) membership of a significant High-High cluster.")
    min_observed: int = _key(0, "int", "Do not flag areas with fewer observed cases than this in the window.", low=0)
    use_scan: bool = _key(True, "bool", "Also flag areas inside a scan zone with p-value below scan.alpha.")
    persistent_threshold: float = _key(
        1.0, "float", "With the space-time model: flag an area 'persistent' when P(RR / region > this) is at "
        "least min_probability (its newest week's risk against the region's level that week).", low=0.0,
        closed="neither"
    )


@dataclass(frozen=True)
class ScanConfig:
    """``[scan]``: the Poisson scan statistic (most likely zone and secondary zones)."""

    enabled: bool = _key(True, "bool", "Run the scan statistic and add its section to the bulletin.")
    kind: str = _key(
        "spatial", "choice", "'spatial': zones over the window's counts; 'prospective': cylinders of the last "
        "1..max_weeks weeks ending at the bulletin week (clusters still going on).",
        choices=("spatial", "prospective"),
    )
    zones: str = _key(
        "circle", "choice", "Candidate zones: 'circle' (districts whose centroids lie in a circle around each "
        "district) or 'graph' (connected groups grown through the neighbour graph).", choices=("circle", "graph"),
    )
    max_share: float = _key(0.1, "float", "Largest share of the population a zone may hold.", low=0.0, high=0.5,
                            closed="right")
    direction: str = _key("high", "choice", "Scan for raised ('high'), lowered ('low') or either ('both') risk.",
                          choices=("high", "low", "both"))
    replicates: int = _key(999, "int", "Monte Carlo replicates; the smallest Monte Carlo p-value is "
                           "1/(replicates + 1).", low=9)
    alpha: float = _key(0.05, "float", "Zones with a Monte Carlo p-value below this are reported as significant.",
                        low=0.0, high=1.0, closed="neither")
    max_zones: int = _key(10, "int", "Most zones computed (the most likely zone and non-overlapping secondary "
                          "zones).", low=1)
    max_weeks: int = _key(4, "int", "Prospective scan: cylinders cover the last 1..max_weeks weeks.", low=1)
    baseline: str = _key(
        "history", "choice", "Prospective scan: expected shares from each district's earlier weeks ('history') "
        "or from the expected counts ('expected').", choices=("history", "expected"),
    )
    baseline_weeks: int = _key(26, "int", "Prospective scan: earlier weeks read before the scanned weeks.", low=1)


@dataclass(frozen=True)
class OutputConfig:
    """``[output]``: disclosure control and the history archive."""

    suppress_below: int = _key(
        5, "int", "In public outputs, counts from 1 to suppress_below - 1 are shown as '<suppress_below' (0 = no suppression).",
        low=0,
    )
    archive: Path = _key(
        "history.sqlite", "path", "History archive of weekly results (SQLite), relative to the configuration file.",
        must_exist=False,
    )
    series: str = _key(
        "", "name",
        "Name of a series of periods analysed with the same settings; a named series keeps its own history "
        "file beside the archive (history.NAME.sqlite). Start one when the window, model or flag rule changes.",
    )
    per_period: bool = _key(
        True, "bool",
        "Write each period into its own folder (bulletin/2026-W47/) and keep bulletin/latest.html pointing to "
        "the newest; false writes straight into the output folder.",
    )
    audience: str = _key(
        "specialist", "choice",
        "'specialist': statistical notation (P(RR>1), CrI, FDR q); 'public': plain words, exact figures kept "
        "in the tables.",
        choices=("specialist", "public"),
    )
    date_format: str = _key(
        "%Y-%m-%d", "date_format", "strftime format of the dates shown in the bulletin (ISO 8601 by default).",
    )
    strings_file: Path | None = _key(
        None, "opt_path", "TOML file replacing texts of the bulletin's string catalogue (e.g. a translation).",
    )

    @property
    def archive_path(self) -> Path:
        """The history file of the configured series (``archive`` itself when no series is named)."""
        a = Path(self.archive)
        return a if not self.series else a.with_name(f"{a.stem}.{self.series}{a.suffix}")


@dataclass(frozen=True)
class ChecksConfig:
    """``[checks]``: plausibility checks of the inputs (run by both ``areamap check`` and the bulletin)."""

    allow_future_weeks: bool = _key(
        False, "bool",
        "Accept case rows dated after the day of the run (normally a typo, e.g. 2099-W10 for 2026-W10).",
    )
    max_week_gap: int = _key(
        52, "int",
        "A week with cases more than this many weeks after the previous week with cases is treated as a typo "
        "and refused (0 = no check).", low=0,
    )
    implausible: str = _key(
        "warn", "choice",
        "What to do with implausible values (a week's cases above the population, weekly rates above "
        "max_weekly_rate, populations above 10 billion): 'warn' or 'error'.",
        choices=("warn", "error"),
    )
    max_weekly_rate: float = _key(
        0.1, "float", "Cases per person in one week above which an area's count counts as implausible.",
        low=0.0, high=1.0, closed="right",
    )


_SECTIONS: dict[str, type] = {
    "boundaries": BoundariesConfig,
    "cases": CasesConfig,
    "population": PopulationConfig,
    "standardization": StandardizationConfig,
    "graph": GraphConfig,
    "period": PeriodConfig,
    "clusters": ClustersConfig,
    "smoothing": SmoothingConfig,
    "spacetime": SpaceTimeConfig,
    "flags": FlagsConfig,
    "scan": ScanConfig,
    "output": OutputConfig,
    "checks": ChecksConfig,
}


@dataclass(frozen=True)
class RunConfig:
    """A validated run configuration.

    Build it with :func:`load_config` (from a TOML file) or
    :func:`config_from_dict`. Paths are absolute. Change a value with
    :func:`dataclasses.replace`.

    Attributes
    ----------
    path : pathlib.Path or None
        The configuration file (None when built from a dict).
    title, region, data_source : str
        Bulletin title, region name and a one-line description of the data source.
    seed : int
        Seed of every permutation test and simulation of the run.
    boundaries, cases, population, standardization, graph, period, clusters, smoothing, spacetime, flags, scan,
    output
        One frozen dataclass per section.

    Examples
    --------
    >>> cfg = config_from_dict({"boundaries": {"file": "a.gpkg"}, "cases": {"file": "c.csv"},
    ...                         "population": {"file": "p.csv"}}, base_dir="/data", check_files=False)
    >>> cfg.clusters.permutations, cfg.graph.method, cfg.cases.file.name
    (9999, 'queen', 'c.csv')
    """

    path: Path | None = None
    title: str = _key("Weekly bulletin", "str", "Bulletin title.")
    region: str = _key("", "str", "Name of the region covered.")
    data_source: str = _key("", "str", "One-line description of the data source, printed on outputs.")
    seed: int = _key(20261202, "int", "Seed of every permutation test and simulation (same seed, same results).", low=0)
    boundaries: BoundariesConfig = field(default_factory=BoundariesConfig, metadata={"kind": "section"})
    cases: CasesConfig = field(default_factory=CasesConfig, metadata={"kind": "section"})
    population: PopulationConfig = field(default_factory=PopulationConfig, metadata={"kind": "section"})
    standardization: StandardizationConfig = field(default_factory=StandardizationConfig, metadata={"kind": "section"})
    graph: GraphConfig = field(default_factory=GraphConfig, metadata={"kind": "section"})
    period: PeriodConfig = field(default_factory=PeriodConfig, metadata={"kind": "section"})
    clusters: ClustersConfig = field(default_factory=ClustersConfig, metadata={"kind": "section"})
    smoothing: SmoothingConfig = field(default_factory=SmoothingConfig, metadata={"kind": "section"})
    spacetime: SpaceTimeConfig = field(default_factory=SpaceTimeConfig, metadata={"kind": "section"})
    flags: FlagsConfig = field(default_factory=FlagsConfig, metadata={"kind": "section"})
    scan: ScanConfig = field(default_factory=ScanConfig, metadata={"kind": "section"})
    output: OutputConfig = field(default_factory=OutputConfig, metadata={"kind": "section"})
    checks: ChecksConfig = field(default_factory=ChecksConfig, metadata={"kind": "section"})

    @property
    def base_dir(self) -> Path:
        """Folder against which relative paths were resolved."""
        return self.path.parent if self.path is not None else Path.cwd()

    def summary(self) -> str:
        """A few lines naming the files and main choices."""
        lines = [
            f"Configuration: {self.path if self.path is not None else '(built in code)'}",
            f"  boundaries: {self.boundaries.file}",
            f"  cases: {self.cases.file} ({self.cases.format})",
            f"  population: {self.population.file}",
            f"  graph: {self.graph.method}; period: {self.period.week}, window {self.period.window_weeks} week(s)",
            f"  clusters: {self.clusters.statistic}, {self.clusters.permutations} permutations, "
            f"adjust {self.clusters.adjust}, alpha {self.clusters.alpha:g}",
            f"  smoothing: {self.smoothing.model}, threshold {self.smoothing.threshold:g}",
        ]
        return "\n".join(lines)


# --------------------------------------------------------------------------- parsing
_KIND_TEXT = {
    "week": "'latest' or an ISO week like '2026-W47'",
    "encoding": "a text encoding name such as 'utf-8' or 'latin-1'",
    "name": "empty or a short name of letters, digits, '-' and '_' (at most 40, starting with a letter or digit)",
    "date_format": "a strftime format with at least one % directive, such as '%Y-%m-%d' or '%d %B %Y'",
}


def _type_name(value: object) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


def _where(section: str, source: str) -> str:
    return f"at the top level of {source}" if not section else f"in [{section}] of {source}"


def _range_text(meta: Mapping) -> str:
    low, high, closed = meta["low"], meta["high"], meta["closed"]
    if math.isinf(low) and math.isinf(high):
        return ""
    if math.isinf(high):
        return f" >= {low:g}" if closed in ("both", "left") else f" > {low:g}"
    lb = "[" if closed in ("both", "left") else "("
    rb = "]" if closed in ("both", "right") else ")"
    return f" in {lb}{low:g}, {high:g}{rb}"


def _in_range(x: float, meta: Mapping) -> bool:
    low, high, closed = meta["low"], meta["high"], meta["closed"]
    left = x >= low if closed in ("both", "left") else x > low
    right = x <= high if closed in ("both", "right") else x < high
    return left and right and not math.isnan(x)


def _convert(name: str, value: object, meta: Mapping, section: str, source: str, base_dir: Path) -> object:
    """Check one value against its declaration and convert it (paths resolved)."""
    kind = meta["kind"]
    label = f"Key '{name}' {_where(section, source)}"

    def bad(requirement: str) -> ConfigError:
        return ConfigError(f"{label} must be {requirement}. Got {value!r} ({_type_name(value)}) instead.")

    if kind in ("str", "opt_str"):
        if not isinstance(value, str):
            raise bad("a string")
        if kind == "opt_str" and value.strip() == "":
            return None
        return value
    if kind in ("path", "opt_path"):
        if not isinstance(value, str) or not value.strip():
            raise bad("a file path (non-empty string)")
        p = Path(value).expanduser()
        return _resolve_path(p if p.is_absolute() else base_dir / p, label)
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int):
            raise bad(f"an integer{_range_text(meta)}")
        if not _in_range(value, meta):
            raise bad(f"an integer{_range_text(meta)}")
        return int(value)
    if kind in ("float", "opt_float"):
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise bad(f"a number{_range_text(meta)}")
        if not _in_range(float(value), meta):
            raise bad(f"a number{_range_text(meta)}")
        return float(value)
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad("true or false (TOML booleans, without quotes)")
        return value
    if kind == "choice":
        if value not in meta["choices"]:
            opts = ", ".join(repr(c) for c in meta["choices"])
            hint = ""
            if isinstance(value, str):
                close = difflib.get_close_matches(value, [str(c) for c in meta["choices"]], n=1, cutoff=0.6)
                hint = f" Did you mean '{close[0]}'?" if close else ""
            raise ConfigError(
                f"{label} must be one of {opts}. Got {value!r} ({_type_name(value)}) instead.{hint}"
            )
        return value
    if kind == "name":
        import re

        if not isinstance(value, str) or not re.fullmatch(r"(?:[A-Za-z0-9][A-Za-z0-9_-]{0,39})?", value):
            raise bad(_KIND_TEXT["name"])
        return value
    if kind == "date_format":
        import datetime as _dt

        try:
            ok = isinstance(value, str) and "%" in value and bool(_dt.date(2026, 11, 16).strftime(value))
        except (ValueError, TypeError):
            ok = False
        if not ok:
            raise bad(_KIND_TEXT["date_format"])
        return value
    if kind == "week":
        if not isinstance(value, str):
            raise bad(_KIND_TEXT["week"])
        if value == "latest":
            return value
        from .intake import parse_week  # local import: intake imports this module

        try:
            return parse_week(value)
        except Exception:  # noqa: BLE001 - re-raised as a ConfigError with context
            raise bad(_KIND_TEXT["week"] + " (weeks 1-52, or 53 in long ISO years)") from None
    if kind == "str_list":
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            raise bad("a list of strings, e.g. [\"income\", \"density\"]")
        return tuple(value)
    if kind == "encoding":
        if not isinstance(value, str):
            raise bad(_KIND_TEXT["encoding"])
        try:
            codecs.lookup(value)
        except LookupError:
            raise ConfigError(
                f"{label} names an unknown text encoding {value!r}. Use e.g. 'utf-8', 'latin-1' or 'cp1252'."
            ) from None
        return value
    raise AssertionError(f"unknown key kind {kind!r}")  # pragma: no cover - programming error


def _resolve_path(p: Path, label: str) -> Path:
    """Absolute path with symbolic links resolved; a link loop is a ConfigError, not an internal error."""
    try:
        return p.resolve()
    except (RuntimeError, OSError) as exc:  # RuntimeError: symlink loop (Python < 3.13); OSError: ELOOP
        raise ConfigError(
            f"{label} names {p}, which cannot be resolved ({exc}): a symbolic link points back to itself. "
            "Fix the link or give the real path."
        ) from None


def _unknown_key(name: str, valid: list[str], section: str, source: str) -> ConfigError:
    close = difflib.get_close_matches(name, valid, n=1, cutoff=0.6)
    hint = f" Did you mean '{close[0]}'?" if close else f" Valid keys: {', '.join(valid)}."
    where = f"in [{section}] of {source}" if section else f"at the top level of {source}"
    return ConfigError(f"Unknown key '{name}' {where}.{hint}")


def _build_section(cls: type, data: object, section: str, source: str, base_dir: Path, check_files: bool):
    if not isinstance(data, dict):
        raise ConfigError(
            f"'{section}' in {source} must be a table (a [{section}] section). "
            f"Got {data!r} ({_type_name(data)}) instead."
        )
    declared = {f.name: f for f in fields(cls) if f.name != "path"}
    valid = list(declared)
    for name in data:
        if name not in declared:
            raise _unknown_key(name, valid, section, source)
    values: dict[str, object] = {}
    for name, f in declared.items():
        meta = f.metadata
        sub = f"{section}.{name}" if section else name
        if meta.get("kind") == "section":
            sub_cls = f.default_factory().__class__  # type: ignore[misc]
            values[name] = _build_section(sub_cls, data.get(name, {}), sub, source, base_dir, check_files)
            continue
        if name in data:
            values[name] = _convert(name, data[name], meta, section, source, base_dir)
        elif meta.get("required"):
            where = f"[{section}]" if section else "the top level"
            raise ConfigError(
                f"Key '{name}' is missing in {where} of {source}. {meta['doc']} "
                f"Add e.g. {name} = \"...\" under {where}."
            )
        elif meta.get("kind") in ("path",) and f.default is not None and f.default is not MISSING:
            values[name] = _convert(name, str(f.default), meta, section, source, base_dir)
        if (
            check_files
            and meta.get("kind") in ("path", "opt_path")
            and meta.get("must_exist", True)
            and values.get(name) is not None
            and not Path(values[name]).exists()
        ):
            given = data.get(name)
            raise ConfigError(
                f"File not found for key '{name}' in [{section}] of {source}: {values[name]} "
                f"(given as {given!r}; relative paths are resolved against the folder of the configuration file). "
                "Check the path or the file name."
            )
    return cls(**values)


def _cross_checks(cfg: RunConfig, source: str) -> None:
    if cfg.standardization.reference == "external" and cfg.standardization.rates_file is None:
        raise ConfigError(
            f"[standardization] reference = 'external' in {source} needs rates_file (a CSV of reference rates "
            "by age group). Set rates_file, or use reference = 'internal'."
        )
    if cfg.graph.method == "distance" and cfg.graph.distance is None:
        raise ConfigError(
            f"[graph] method = 'distance' in {source} needs the key 'distance' (the distance band in map units, "
            "e.g. distance = 15000 for 15 km in a metre-based CRS)."
        )


def config_from_dict(
    data: Mapping[str, Any],
    *,
    base_dir: str | Path = ".",
    source: str = "the configuration",
    path: str | Path | None = None,
    check_files: bool = True,
) -> RunConfig:
    """Validate a parsed configuration (nested dict, as from TOML) and build a :class:`RunConfig`.

    Parameters
    ----------
    data : mapping
        Top-level keys and one table per section.
    base_dir : path-like, default="."
        Folder against which relative file paths are resolved.
    source : str, default="the configuration"
        Name used in error messages (the file name).
    path : path-like, optional
        The configuration file, kept on the result.
    check_files : bool, default=True
        Check that every named input file exists.

    Returns
    -------
    RunConfig

    Raises
    ------
    ConfigError
        Unknown key (with the nearest valid key), wrong type or range, a
        missing required key or file.
    """
    base = Path(base_dir).expanduser().resolve()
    top = dict(data)
    cfg = _build_section(RunConfig, top, "", source, base, check_files)
    if path is not None:
        from dataclasses import replace

        cfg = replace(cfg, path=_resolve_path(Path(path).expanduser(), "The configuration path"))
    _cross_checks(cfg, source)
    return cfg


def load_config(path: str | Path) -> RunConfig:
    """Read and validate a run configuration file (TOML).

    Parameters
    ----------
    path : path-like
        The configuration file, e.g. ``run.toml``. Relative file paths inside
        it are resolved against the folder that contains it.

    Returns
    -------
    RunConfig

    Raises
    ------
    ConfigError
        The file is missing, not valid TOML or UTF-8, has an unknown key
        (the message suggests the nearest valid one), a value of the wrong
        type or out of range, or names an input file that does not exist.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> for name in ("a.gpkg", "c.csv", "p.csv"):
    ...     _ = (d / name).write_text("x")
    >>> _ = (d / "run.toml").write_text('''
    ... [boundaries]
    ... file = "a.gpkg"
    ... [cases]
    ... file = "c.csv"
    ... [population]
    ... file = "p.csv"
    ... [clusters]
    ... permutations = 499
    ... ''')
    >>> cfg = load_config(d / "run.toml")
    >>> cfg.clusters.permutations, cfg.cases.file == d.resolve() / "c.csv"
    (499, True)
    """
    p = Path(path).expanduser()
    _resolve_path(p, "The configuration path")
    if not p.exists():
        raise ConfigError(f"Configuration file not found: {p}. Check the path (create one with 'areamap demo').")
    if p.is_dir():
        raise ConfigError(f"{p} is a folder; give the path of the configuration file (e.g. {p / 'run.toml'}).")
    raw = p.read_bytes()
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError(
            f"{p.name} is not valid UTF-8 (byte {exc.start}, line {line}). TOML files must be UTF-8: "
            "re-save it as UTF-8."
        ) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{p.name} is not valid TOML: {exc}. Check quotes around strings and [section] headers.") from None
    return config_from_dict(data, base_dir=p.parent, source=p.name, path=p)


# --------------------------------------------------------------------------- documentation
def _default_text(f) -> str:
    if f.default is not MISSING:
        d = f.default
    elif f.default_factory is not MISSING:  # type: ignore[misc]
        d = f.default_factory()  # type: ignore[misc]
    else:  # pragma: no cover
        d = None
    if f.metadata.get("required"):
        return "(required)"
    if d is None:
        return "(none)"
    if isinstance(d, bool):
        return "true" if d else "false"
    if isinstance(d, str):
        return f'"{d}"'
    if isinstance(d, tuple):
        return "[]" if not d else "[" + ", ".join(f'"{x}"' for x in d) + "]"
    if isinstance(d, float):
        return f"{d:.4g}"
    return str(d)


def _type_text(meta: Mapping) -> str:
    kind = meta["kind"]
    if kind == "choice":
        return " \\| ".join(f'"{c}"' for c in meta["choices"])
    base = {
        "str": "string",
        "opt_str": "string",
        "path": "path",
        "opt_path": "path",
        "int": "integer",
        "float": "number",
        "opt_float": "number",
        "bool": "boolean",
        "week": "string",
        "str_list": "list of strings",
        "encoding": "string",
        "name": "string",
        "date_format": "string",
    }[kind]
    return base + _range_text(meta)


def config_reference_table() -> str:
    """Markdown table of every configuration key: key, type, default, meaning.

    Examples
    --------
    >>> print(config_reference_table().splitlines()[0])
    | Key | Type | Default | Meaning |
    """
    rows = ["| Key | Type | Default | Meaning |", "|---|---|---|---|"]

    def walk(cls: type, prefix: str) -> None:
        for f in fields(cls):
            if f.name == "path":
                continue
            if f.metadata.get("kind") == "section":
                walk(f.default_factory().__class__, f"{prefix}{f.name}.")  # type: ignore[misc]
                continue
            key = f"`{prefix}{f.name}`" if prefix else f"`{f.name}` (top level)"
            rows.append(f"| {key} | {_type_text(f.metadata)} | {_default_text(f)} | {f.metadata['doc']} |")

    walk(RunConfig, "")
    return "\n".join(rows)

