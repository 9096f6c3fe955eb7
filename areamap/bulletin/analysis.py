"""Computing one bulletin period: everything up to, and not including, writing files.

:func:`analyse_period` chains the analysis of one period and returns a
:class:`PeriodAnalysis`; it reads the inputs and the history archive and writes
nothing. :mod:`areamap.bulletin.render` turns the analysis into the page and
tables, and :mod:`areamap.bulletin.publish` moves them into place together
with the archive transaction.

Steps:

1. intake and validation (:func:`~areamap.intake.load_study`), neighbour graph;
2. expected counts by indirect standardization and standardized ratios with
   exact Poisson intervals;
3. Poisson-gamma empirical-Bayes and CAR (BYM2 / Leroux / ICAR) smoothing;
4. global Moran's I of the empirical-Bayes standardized ratios, local clusters
   with multiple-testing control;
5. the Poisson scan statistic (most likely zone and secondary zones with
   Monte Carlo p-values), spatial over the window or prospective;
6. hotspot flags from explicit rules, compared with the previous period in the
   history archive (new, continuing, resolved; periods flagged in a row).

Cautions
--------
The bulletin is an analytic aid, not a public-health directive: decisions
rest with the responsible health authority and local rules. Ratios of
districts with few expected cases are unstable (small numbers); district
results do not describe individuals (ecological fallacy); a 95% interval or a
posterior probability expresses uncertainty under the model, not certainty.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import hashlib
import html
import json
import math
import os
import time
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from .._params import check_interval, check_positive_int
from ..archive import FlagChanges, HistoryArchive
from ..errors import AreamapWarning, InputError, ParameterError, format_examples
from ._spacetime_step import SPACETIME_COLUMNS

__all__ = [
    "AREA_COLUMNS",
    "KRIGING_COLUMNS",
    "FlagRules",
    "PeriodAnalysis",
    "analyse_period",
    "file_sha256",
    "flag_areas",
    "suppress_counts",
]

AREA_COLUMNS = (
    "area_id", "area_name", "period_start", "period_end", "observed", "expected", "population",
    "rate_per_100k", "rate_low", "rate_high",
    "sir", "sir_low", "sir_high", "eb_rr", "rr", "rr_low", "rr_high", "p_above_1",
    "cluster", "cluster_p", "scan_zone", "scan_p", "flag", "flag_reason", "flag_change", "weeks_flagged",
    "observed_previous",
    *SPACETIME_COLUMNS,
)

#: Columns added after ``rate_high`` when a standard population is configured.
STANDARDIZED_RATE_COLUMNS = ("std_rate_per_100k", "std_rate_low", "std_rate_high")
#: Columns added to the area table when ``[smoothing] kriging`` is on (after p_above_1 / p_above_threshold).
KRIGING_COLUMNS = ("kriged_rr", "kriged_rr_low", "kriged_rr_high")


_ADJUST_LABEL = {"fdr": "FDR q", "bonferroni": "Bonferroni-adjusted p", "none": "unadjusted p"}

Progress = Callable[[str], None]



# ============================================================================ flags
@dataclass(frozen=True)
class FlagRules:
    """Explicit hotspot-flag rules (the ``[flags]`` section).

    An area is flagged when it has at least ``min_observed`` observed cases
    and **either** its posterior probability P(RR > threshold) is at least
    ``min_probability`` **or** (when ``use_clusters``) it belongs to a
    significant High-High local cluster after multiple-testing control **or**
    (when ``use_scan``) it lies inside a scan zone whose p-value is below the
    scan's alpha.

    Parameters
    ----------
    min_probability : float, default=0.8
        Probability cut-off. 0.8 follows Richardson et al. (2004), who found
        P(RR > 1) > 0.8 a reasonable trade-off between false positives and
        power for BYM-type models.
    use_clusters : bool, default=True
        Also flag members of High-High clusters.
    min_observed : int, default=0
        Areas with fewer observed cases are never flagged (their reason says so).
    threshold : float, default=1.0
        The relative risk in P(RR > threshold).
    use_scan : bool, default=True
        Also flag districts inside a significant scan zone (raised risk).
    forecast_fdr : float, optional
        When given (the space-time model was fitted), a district is also flagged
        "emerging" when its newest week's count (or the sum of its last few
        weeks, when the table has ``forecast_window`` > 1 and
        ``forecast_window_midp``) lies above its forecast with
        Benjamini-Hochberg adjusted p-value ``forecast_q <= forecast_fdr``,
        and the probability rule reads as "persistent" (it then uses the
        space-time model's newest-week risk against the region's level in the
        same week, with ``persistent_threshold``).
    persistent_threshold : float, default=1.0
        The ratio in P(RR / region > persistent_threshold) of the persistent rule.

    References
    ----------
    Richardson S, Thomson A, Best N, Elliott P (2004). Interpreting posterior
    relative risk estimates in disease-mapping studies. Environmental Health
    Perspectives 112(9):1016-1025.
    """

    min_probability: float = 0.8
    use_clusters: bool = True
    min_observed: int = 0
    threshold: float = 1.0
    use_scan: bool = True
    forecast_fdr: float | None = None
    persistent_threshold: float = 1.0

    def __post_init__(self) -> None:
        check_interval(self.min_probability, "min_probability", "FlagRules", low=0, high=1, closed="right")
        check_positive_int(self.min_observed, "min_observed", "FlagRules", minimum=0)
        check_interval(self.threshold, "threshold", "FlagRules", low=0)
        check_interval(self.persistent_threshold, "persistent_threshold", "FlagRules", low=0)
        if self.forecast_fdr is not None:
            check_interval(self.forecast_fdr, "forecast_fdr", "FlagRules", low=0, high=1)
        if not isinstance(self.use_clusters, bool):
            raise ParameterError(
                f"The 'use_clusters' parameter of FlagRules must be True or False. Got {self.use_clusters!r} instead."
            )
        if not isinstance(self.use_scan, bool):
            raise ParameterError(
                f"The 'use_scan' parameter of FlagRules must be True or False. Got {self.use_scan!r} instead."
            )

    def describe(self, *, adjust: str = "fdr", alpha: float = 0.05, scan_alpha: float | None = None) -> str:
        """The rule in one plain sentence (printed on the bulletin); ``scan_alpha`` None: no scan was run."""
        if self.forecast_fdr is not None:
            parts = [f"its newest week's count (or the sum of its last weeks) is above its forecast from its own "
                     f"past weeks, its neighbours "
                     f"and the regional trend (emerging; FDR q <= {self.forecast_fdr:g})",
                     f"the space-time model gives its newest week's risk against the region's level in the "
                     f"same week P(RR / region > {self.persistent_threshold:g}) >= {self.min_probability:g} "
                     "(persistent)"]
        else:
            parts = [f"posterior P(RR > {self.threshold:g}) >= {self.min_probability:g}"]
        if self.use_clusters:
            how = {"fdr": "false-discovery-rate control", "bonferroni": "Bonferroni correction",
                   "none": "no multiple-testing adjustment"}[adjust]
            parts.append(f"membership of a High-High local cluster ({how}, alpha = {alpha:g})")
        if self.use_scan and scan_alpha is not None:
            parts.append(f"lying inside a scan zone of raised risk with Monte Carlo p < {scan_alpha:g}")
        text = "a district is flagged when " + " OR ".join(parts)
        if self.min_observed > 0:
            text += f", and only if it has at least {self.min_observed} observed case(s)"
        return text[0].upper() + text[1:] + "."


def flag_areas(
    table: pd.DataFrame,
    *,
    rules: FlagRules | None = None,
    adjust: str = "fdr",
    scan_alpha: float = 0.05,
) -> pd.DataFrame:
    """Apply the flag rules to a per-area table and say why each area is flagged.

    Parameters
    ----------
    table : pandas.DataFrame
        One row per area with columns ``observed``, ``p_exceed`` (posterior
        P(RR > threshold)), ``cluster`` (label from the local cluster
        analysis) and ``cluster_p`` (its adjusted p-value).
    rules : FlagRules, optional
        Default ``FlagRules()``.
    adjust : {"fdr", "bonferroni", "none"}, default="fdr"
        The adjustment behind ``cluster_p`` (named in the reason).
    scan_alpha : float, default=0.05
        When the table has columns ``scan_zone`` (rank of the scan zone
        holding the area, 0 for none), ``scan_p`` (that zone's Monte Carlo
        p-value) and ``scan_high`` (whether the zone has raised risk), areas in
        a raised-risk zone with ``scan_p < scan_alpha`` meet the scan rule.

    Returns
    -------
    pandas.DataFrame
        Same index; columns ``flag`` (bool) and ``flag_reason`` (plain text:
        every rule met, e.g. ``"P(RR>1)=0.93 >= 0.8; High-High cluster (FDR
        q=0.012)"``; for areas held back by ``min_observed`` the reason says
        so; empty otherwise).

    Examples
    --------
    >>> t = pd.DataFrame({"observed": [12, 3, 0], "p_exceed": [0.93, 0.85, 0.1],
    ...                   "cluster": ["High-High", "not significant", "Low-Low"],
    ...                   "cluster_p": [0.012, 0.4, 0.03]}, index=["A", "B", "C"])
    >>> out = flag_areas(t, rules=FlagRules(min_observed=5))
    >>> out["flag"].tolist()
    [True, False, False]
    >>> out.loc["A", "flag_reason"]
    'P(RR>1)=0.93 >= 0.8; High-High cluster (FDR q=0.012)'
    """
    rules = rules if rules is not None else FlagRules()
    missing = [c for c in ("observed", "p_exceed", "cluster", "cluster_p") if c not in table.columns]
    if missing:
        raise ParameterError(
            f"The 'table' parameter of flag_areas needs columns observed, p_exceed, cluster, cluster_p; "
            f"missing {format_examples(missing)}."
        )
    if adjust not in _ADJUST_LABEL:
        raise ParameterError(
            f"The 'adjust' parameter of flag_areas must be one of 'fdr', 'bonferroni', 'none'. Got {adjust!r} instead."
        )
    p = table["p_exceed"].to_numpy(float)
    by_prob = np.nan_to_num(p, nan=-1.0) >= rules.min_probability
    by_cluster = (table["cluster"].astype(str).to_numpy() == "High-High") & rules.use_clusters
    enough = table["observed"].to_numpy(float) >= rules.min_observed
    has_scan = rules.use_scan and {"scan_zone", "scan_p"} <= set(table.columns)
    scan_p = table["scan_p"].to_numpy(float) if has_scan else np.full(len(table), np.nan)
    scan_zone = table["scan_zone"].to_numpy(np.int64) if has_scan else np.zeros(len(table), dtype=np.int64)
    high = table["scan_high"].to_numpy(bool) if has_scan and "scan_high" in table.columns else True
    by_scan = (scan_zone > 0) & (np.nan_to_num(scan_p, nan=1.0) < scan_alpha) & high
    forecast = rules.forecast_fdr is not None and "forecast_q" in table.columns
    # optional: which forecast window drives the district's p-value, and that window's mid-p
    fwin = (table["forecast_window"].to_numpy(np.int64) if "forecast_window" in table.columns
            else np.ones(len(table), dtype=np.int64))
    if forecast:
        fq = table["forecast_q"].to_numpy(float)
        fp = table["forecast_midp"].to_numpy(float) if "forecast_midp" in table.columns else fq
        if "forecast_window_midp" in table.columns:
            fp = np.where(fwin > 1, table["forecast_window_midp"].to_numpy(float), fp)
        by_forecast = np.nan_to_num(fq, nan=2.0) <= rules.forecast_fdr
    else:
        fq = fp = np.full(len(table), np.nan)
        by_forecast = np.zeros(len(table), bool)
    flag = (by_prob | by_cluster | by_scan | by_forecast) & enough
    label = _ADJUST_LABEL[adjust]
    t = _fmt_num(rules.threshold)
    reasons = []
    rows = zip(p, by_prob, by_cluster, by_scan, enough, table["cluster_p"].to_numpy(float), scan_zone, scan_p,
               by_forecast, fp, fq, fwin)
    for pi, bp, bc, bs, ok, q, zone, zp, bf, fpi, fqi, fw in rows:
        met = []
        if bf:
            what = "newest week" if fw <= 1 else f"sum of the last {fw} weeks"
            met.append(f"emerging: {what} above its forecast (mid-p {_fmt_p(fpi)}, FDR q={_fmt_p(fqi)} "
                       f"<= {rules.forecast_fdr:g})")
        if bp:
            met.append(f"persistent: P(RR/region>{_fmt_num(rules.persistent_threshold)}){_fmt_prob(pi)} "
                       f">= {rules.min_probability:g}" if forecast
                       else f"P(RR>{t}){_fmt_prob(pi)} >= {rules.min_probability:g}")
        if bc:
            met.append(f"High-High cluster ({label}={_fmt_p(q)})")
        if bs:
            met.append(f"inside significant scan zone {zone} (p={_fmt_p(zp)})")
        text = "; ".join(met)
        if met and not ok:
            text = (f"not flagged: fewer than {rules.min_observed} observed cases (min_observed); "
                    f"otherwise {text}")
        reasons.append(text)
    return pd.DataFrame({"flag": flag, "flag_reason": reasons}, index=table.index)


def _fmt_prob(p: float) -> str:
    """'=0.93'; near 1 more digits ('=0.997') and never '=1.00' for a probability below 1."""
    if p >= 0.9995:
        return ">0.999" if p < 1 else "=1"
    return f"={p:.3f}" if p >= 0.995 else f"={p:.2f}"


def _fmt_p(q: float) -> str:
    if not np.isfinite(q):
        return "n/a"
    return f"{q:.3f}" if q >= 0.001 else "<0.001"


def _fmt_num(x: float) -> str:
    return f"{x:g}"


# ============================================================================ suppression
def suppress_counts(counts, *, threshold: int = 5) -> pd.Series:
    """Counts as text with small counts hidden: 1 to threshold-1 become ``"<threshold"``.

    Zero stays ``"0"`` (common practice: a zero is not usually disclosive of a
    person, and hiding it would hide true absence). ``threshold`` 0 or 1 hides
    nothing. Complementary suppression is **not** done: a total or a
    neighbouring table may still allow a hidden count to be back-calculated.

    Parameters
    ----------
    counts : array-like or pandas.Series of int
    threshold : int, default=5

    Returns
    -------
    pandas.Series of str (index kept when a Series is given)

    Examples
    --------
    >>> suppress_counts([0, 1, 4, 5, 17]).tolist()
    ['0', '<5', '<5', '5', '17']
    """
    threshold = check_positive_int(threshold, "threshold", "suppress_counts", minimum=0)
    index = counts.index if isinstance(counts, pd.Series) else None
    values = np.asarray(counts, dtype=float)
    text = np.array([str(int(v)) if np.isfinite(v) else "" for v in values], dtype=object)
    hide = (values >= 1) & (values < threshold)
    text[hide] = f"<{threshold}"
    return pd.Series(text, index=index, dtype=object)


def _suppressed_mask(counts, threshold: int) -> np.ndarray:
    values = np.asarray(counts, dtype=float)
    return (values >= 1) & (values < threshold)


# ============================================================================ provenance
def file_sha256(path: str | Path) -> str:
    """SHA-256 hex digest of a file, read in 1 MiB blocks.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "x.txt"
    >>> _ = p.write_bytes(b"abc")
    >>> file_sha256(p)[:16]   # SHA-256("abc"), FIPS 180-2 appendix B.1
    'ba7816bf8f01cfea'
    """
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _input_files(config) -> list[tuple[str, Path]]:
    """(role, path) of every input file the configuration names (shapefile sidecars included)."""
    items: list[tuple[str, Path]] = []
    if config.path is not None:
        items.append(("configuration", Path(config.path)))
    b = Path(config.boundaries.file)
    items.append(("boundaries", b))
    if b.suffix.lower() == ".shp":
        for side in sorted(b.parent.glob(b.stem + ".*")):
            if side != b and side.is_file():
                items.append(("boundaries (sidecar)", side))
    items.append(("cases", Path(config.cases.file)))
    items.append(("population", Path(config.population.file)))
    st = config.standardization
    if st.reference == "external" and st.rates_file is not None:
        items.append(("reference rates", Path(st.rates_file)))
    if st.standard_population_file is not None:
        items.append(("standard population", Path(st.standard_population_file)))
    if config.graph.extra_links_file is not None:
        items.append(("extra neighbour links", Path(config.graph.extra_links_file)))
    return items


def _jsonable(obj):
    """Configuration dataclasses, paths, numpy scalars -> JSON-ready values."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: _jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, Path):
        return str(obj)
    if isinstance(obj, np.bool_ | bool):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating | float):
        x = float(obj)
        return x if math.isfinite(x) else None
    if isinstance(obj, _dt.date):
        return obj.isoformat()
    return obj


# ============================================================================ result
class _AreaTable:
    """The per-area table shared by :class:`PeriodAnalysis` and the bulletin's result (``areas`` attribute)."""

    @property
    def flagged(self) -> pd.DataFrame:
        """Rows of the flagged areas (without geometry)."""
        t = self.to_frame()
        return t[t["flag"]]

    def to_frame(self) -> pd.DataFrame:
        """The per-area table without geometry (unsuppressed)."""
        return pd.DataFrame(self.areas.drop(columns="geometry"))


@dataclass(frozen=True, eq=False)
class PeriodAnalysis(_AreaTable):
    """The analysis of one bulletin period (nothing written yet).

    Attributes
    ----------
    config : RunConfig
        The configuration the period was analysed with.
    period : str
        ISO week ending the analysed window, e.g. ``"2026-W47"``.
    weeks : tuple of str
        The weeks of the window, oldest first.
    period_start, period_end : datetime.date
        First and last day of the window.
    areas : geopandas.GeoDataFrame
        The per-area table (unsuppressed counts), index = area ids, columns
        :data:`AREA_COLUMNS` (except area_id, the index) plus geometry.
    graph : AreaGraph
        The neighbour graph.
    morans_i : GlobalAutocorrelation
        Global Moran's I of the EB-standardized ratios.
    local_clusters : LocalClusterResult
    empirical_bayes : PoissonGammaResult
    car_fit : CarFit
    changes : FlagChanges
        Comparison with the previous period in the archive.
    rules : FlagRules
    inputs : tuple of dict
        Role, name, path and SHA-256 of each input file.
    scan : ScanResult or None
        The scan statistic (None when ``[scan] enabled = false`` or the
        prospective scan lacked earlier weeks; run_info["scan"] says why).
    run_info : dict
        The provenance record (run.json without the output step's timings).
        ``run_info["totals"]`` compares the region's cases this period with
        the previous period and with the average of the weeks before.
    weekly : pandas.DataFrame
        The region per ISO week up to the end of the window (at most 104
        weeks): columns ``cases``, ``population`` and ``rate_per_100k``.
    settings : dict
        The settings that make periods comparable (window, model, flag rule),
        as recorded in the history archive.
    kriging : PoissonKrigingResult or None
        Area-to-area Poisson kriging of the window's counts when ``[smoothing] kriging``
        is on (None when off, or when the risk semivariogram showed nothing to model).
    """

    config: object
    period: str
    weeks: tuple
    period_start: _dt.date
    period_end: _dt.date
    areas: object = field(repr=False)
    graph: object = field(repr=False)
    morans_i: object = field(repr=False)
    local_clusters: object = field(repr=False)
    empirical_bayes: object = field(repr=False)
    car_fit: object = field(repr=False)
    changes: FlagChanges = field(repr=False)
    rules: FlagRules = field(repr=False)
    inputs: tuple = field(repr=False)
    run_info: dict = field(repr=False)
    weekly: object = field(default=None, repr=False)
    settings: dict = field(default_factory=dict, repr=False)
    kriging: object = field(default=None, repr=False)
    scan: object = field(default=None, repr=False)
    spacetime_fit: object = field(default=None, repr=False)

    @property
    def window_weeks(self) -> int:
        return len(self.weeks)

    @property
    def threshold_differs(self) -> bool:
        """Whether [smoothing] threshold is not 1 (areas then carry ``p_above_threshold``)."""
        return "p_above_threshold" in self.areas.columns

    def summary(self) -> str:
        """A few lines: period, flags and changes, Moran's I."""
        return "\n".join(_summary_lines(self, "Analysis of"))

    def _repr_html_(self) -> str:
        lines = "".join(f"<li>{html.escape(s)}</li>" for s in self.summary().splitlines())
        return f"<ul>{lines}</ul>"

# ============================================================================ pipeline
class _Steps:
    """Step timer that also reports progress."""

    def __init__(self, progress: Progress | None, total: int) -> None:
        self.progress = progress
        self.total = total
        self.count = 0
        self.timings: dict[str, float] = {}
        self._name: str | None = None
        self._t0 = 0.0

    def start(self, name: str, message: str) -> None:
        self.stop()
        self.count += 1
        self._name = name
        self._t0 = time.perf_counter()
        if self.progress is not None:
            self.progress(f"[{self.count}/{self.total}] {message}")

    def stop(self) -> None:
        if self._name is not None:
            self.timings[self._name] = round(time.perf_counter() - self._t0, 4)
            self._name = None


def _reference_rates(config, study) -> pd.Series | None:
    """External reference rates per person per week by age group, or None (internal reference)."""
    if config.standardization.reference != "external":
        return None
    return study.reference_rates


def _priors(config):
    from ..models import CarPriors

    p = config.smoothing.priors
    return CarPriors(sigma_upper=p.sigma_upper, sigma_tail=p.sigma_tail, phi_upper=p.phi_upper,
                     phi_tail=p.phi_tail, intercept_sd=p.intercept_sd, coefficient_sd=p.coefficient_sd)

def _as_config(config, caller: str):
    from ..config import RunConfig, load_config

    if isinstance(config, RunConfig):
        return config
    if isinstance(config, str | os.PathLike):
        return load_config(config)
    raise ParameterError(
        f"The 'config' parameter of {caller} must be a path or a RunConfig. Got {type(config).__name__} instead."
    )


def analyse_period(
    config,
    *,
    period: str | None = None,
    progress: Progress | None = None,
    today: _dt.date | None = None,
) -> PeriodAnalysis:
    """Analyse one bulletin period and return its results; write nothing.

    This is everything :func:`~areamap.bulletin.run_bulletin` computes, with the
    same configuration, window, permutations and seed, so its tables reproduce
    the published bulletin's numbers. The history archive is only read (to
    compare the flags with the previous period).

    Parameters
    ----------
    config : str, Path or RunConfig
        The run configuration (a TOML file path or a loaded :class:`~areamap.config.RunConfig`).
    period : str, optional
        ISO week ending the analysed window (``"2026-W47"``) or ``"latest"``;
        default ``[period] week`` of the configuration.
    progress : callable, optional
        Called with a short message at the start of each step.
    today : datetime.date, optional
        The day of the run (default today, UTC); case rows dated after it are
        refused unless ``[checks] allow_future_weeks``.

    Returns
    -------
    PeriodAnalysis

    Raises
    ------
    AreamapError
        Unusable input or configuration (InputError, ConfigError, GraphError),
        a model that cannot be fitted (ModelError) or a damaged archive
        (ArchiveError).

    Notes
    -----
    Steps: expected counts :math:`E_i = \\sum_a n_{ia} r_a` (indirect
    standardization, reference rates :math:`r_a` from the window's own counts or
    external rates times the window length); SIR :math:`O_i/E_i` with exact
    Poisson limits; Poisson-gamma EB; CAR model; Moran's I and local clusters
    on Assunção-Reis EB-standardized ratios (expected counts as denominators,
    so the age structure is accounted for); flags; comparison with the
    previous period.

    Examples
    --------
    >>> from areamap.demo import write_demo                          # doctest: +SKIP
    >>> analysis = analyse_period(write_demo("demo"))                 # doctest: +SKIP
    >>> analysis.flagged[["area_name", "rr", "flag_reason"]]          # doctest: +SKIP
    """
    from .. import __version__

    t_start = time.perf_counter()
    run_time = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0)
    steps = _Steps(progress, 9)
    steps.start("configuration", "reading the configuration")
    cfg = _as_config(config, "analyse_period")
    inputs = _input_files(cfg)
    hashes = [{"role": role, "name": p.name, "path": str(p), "sha256": file_sha256(p)}
              for role, p in inputs if p.is_file()]
    archive = HistoryArchive(cfg.output.archive_path)
    rules = FlagRules(min_probability=cfg.flags.min_probability, use_clusters=cfg.flags.use_clusters,
                      min_observed=cfg.flags.min_observed, threshold=cfg.smoothing.threshold,
                      use_scan=cfg.flags.use_scan)

    run_warnings: list[str] = []
    with _recording_warnings(run_warnings):
        steps.start("intake", "reading the inputs, building the neighbour graph and checking the run")
        from ..validation import prepare_run

        # the same function as 'areamap check': every input check happens here, before any computing
        prepared = prepare_run(cfg, period=period, today=today)
        study, graph, plan = prepared.study, prepared.graph, prepared.plan
        key, window = plan.period, list(plan.window)
        start_day, end_day = plan.start, plan.end
        boundaries = study.boundaries
        ids = boundaries.index
        names = boundaries["area_name"].astype(str)

        steps.start("rates", "expected counts and standardized ratios")
        from ..rates import expected_counts, standardized_ratio

        cases = study.case_matrix(weeks=window).reindex(index=ids, fill_value=0)
        pop = study.population_matrix().reindex(index=ids)
        rates = _reference_rates(cfg, study)
        if rates is None:
            expected = pd.Series(np.asarray(expected_counts(cases, pop), dtype=float), index=ids)
        else:
            # external rates are per person per week: the window holds len(window) weeks of exposure
            expected = pd.Series(np.asarray(expected_counts(cases, pop, reference_rates=rates), dtype=float)
                                 * len(window), index=ids)
        observed = pd.Series(cases.sum(axis=1).to_numpy().astype(np.int64), index=ids)
        population = pd.Series(pop.sum(axis=1).to_numpy(float), index=ids)
        if not (expected > 0).all():
            bad = ids[~(expected > 0).to_numpy()]
            raise InputError(
                f"{len(bad)} district(s) have an expected count of zero ({format_examples(bad)}): the reference "
                "rates are zero for every age group they have people in. Check the population and reference rates."
            )
        sr = standardized_ratio(observed, expected).to_frame()
        rate_cols = _rates(cases, pop, study.standard_population)
        weekly, observed_previous, totals = _weekly_and_totals(study, window, ids, pop)

        steps.start("smoothing", f"empirical-Bayes and {cfg.smoothing.model.upper()} smoothing")
        from ..models import fit_car
        from ..smoothing import poisson_gamma_eb

        eb = poisson_gamma_eb(observed, expected, threshold=cfg.smoothing.threshold)
        covariates = None
        if cfg.smoothing.covariates:
            covariates = _covariates(boundaries, cfg.smoothing.covariates)
        car = fit_car(observed, expected, graph, model=cfg.smoothing.model, covariates=covariates,
                      priors=_priors(cfg), threshold=cfg.smoothing.threshold)
        car_frame = car.to_frame().reindex(ids)
        kriging, kriging_info = _kriging(cfg, observed, expected, boundaries)

        steps.start("spacetime", f"space-time model over up to {cfg.spacetime.weeks} weeks and forecast check")
        from . import _spacetime_step

        st_fit, st_weeks, st_note = _spacetime_step.fit_for_period(cfg, study, key, ids, graph, rates)
        st_cols = _spacetime_step.columns(st_fit, ids)

        steps.start("clusters", f"Moran's I and local clusters ({cfg.clusters.permutations} permutations)")
        from ..autocorrelation import rate_local_clusters, rate_morans_i

        cl = cfg.clusters
        moran = rate_morans_i(observed, expected, graph, permutations=cl.permutations, seed=cfg.seed)
        local_result = rate_local_clusters(observed, expected, graph, statistic=cl.statistic,
                                           permutations=cl.permutations, seed=cfg.seed, adjust=cl.adjust,
                                           alpha=cl.alpha)
        local = local_result.to_frame().reindex(ids)

        scan_result, scan_note = None, None
        if cfg.scan.enabled:
            steps.start("scan", f"scan statistic ({cfg.scan.kind}, {cfg.scan.replicates} replicates)")
            scan_result, scan_note = _run_scan(cfg, study, key, observed, expected, population, boundaries, graph)

        steps.start("flags", "flags and comparison with the previous period")
        table = pd.DataFrame(index=ids)
        table["area_name"] = names
        table["period_start"] = start_day.isoformat()
        table["period_end"] = end_day.isoformat()
        table["observed"] = observed
        table["expected"] = expected
        table["population"] = population
        for c_, v_ in rate_cols.items():
            table[c_] = v_
        threshold_differs = not math.isclose(cfg.smoothing.threshold, 1.0)
        _set_estimates(table, sr, eb, car_frame, local, threshold_differs=threshold_differs)
        if cfg.smoothing.kriging:
            for col, values in _kriged_columns(kriging, len(ids)).items():
                table[col] = values
        zone_high = np.zeros(len(ids), dtype=bool)
        if scan_result is not None:
            member = scan_result.district_membership().reindex(ids)
            table["scan_zone"] = member["zone"].to_numpy(np.int64)
            table["scan_p"] = member["zone_p_value"].to_numpy(float)
            raised = scan_result.observed > scan_result.expected
            for m, r in zip(scan_result.members, raised):
                zone_high[m] = r
        else:
            table["scan_zone"] = np.zeros(len(ids), dtype=np.int64)
            table["scan_p"] = np.nan
        for c in SPACETIME_COLUMNS:
            table[c] = st_cols[c].to_numpy()
        p_exceed = table["p_above_threshold"] if threshold_differs else table["p_above_1"]
        if st_fit is not None:
            # persistent: newest-week risk against the region's level that week; plus the emerging rule
            rules = dataclasses.replace(rules, forecast_fdr=cfg.spacetime.forecast_fdr,
                                        persistent_threshold=cfg.flags.persistent_threshold)
            p_exceed = pd.Series(st_cols.attrs["p_exceed"], index=ids)
        extra = {k: st_cols.attrs[k] for k in ("forecast_window", "forecast_window_midp") if k in st_cols.attrs}
        flags = flag_areas(table.assign(p_exceed=p_exceed, scan_high=zone_high, **extra),
                           rules=rules, adjust=cl.adjust, scan_alpha=cfg.scan.alpha)
        table["flag"] = flags["flag"].to_numpy(bool)
        table["flag_reason"] = flags["flag_reason"].to_numpy(object)
        if st_fit is not None:
            # the kinds count only where the district is flagged (min_observed can hold a flag back)
            table["emerging"] = table["flag"] & flags["flag_reason"].str.contains("emerging:").to_numpy(bool)
            table["persistent"] = table["flag"] & flags["flag_reason"].str.contains("persistent:").to_numpy(bool)
        settings = period_settings(cfg)
        archive.check_settings(key, settings, series=cfg.output.series)
        changes = archive.compare(key, table["flag"])
        table["flag_change"] = changes.status.to_numpy(object)
        table["weeks_flagged"] = changes.weeks_flagged.to_numpy(np.int64)
        table["observed_previous"] = observed_previous
        table.index.name = "area_id"

        import geopandas as gpd

        areas = gpd.GeoDataFrame(table, geometry=boundaries.geometry.reindex(ids), crs=boundaries.crs)
    steps.stop()

    counts = changes.counts
    moran_info = {
        "statistic": moran.statistic, "expected": moran.expected, "p_value": moran.p_permutation,
        "p_value_kind": "two-sided permutation pseudo p-value", "permutations": moran.permutations,
        "z_randomization": moran.z_randomization, "p_randomization": moran.p_randomization,
        "variable": "Assunção-Reis empirical-Bayes standardized ratios (observed / expected)",
        "weights": moran.weights,
    }
    run_info = {
        "tool": "areamap", "version": __version__,
        "run_time": run_time.isoformat(),
        "period": {"key": key, "weeks": window, "window_weeks": len(window),
                   "start": start_day.isoformat(), "end": end_day.isoformat()},
        "seed": cfg.seed,
        "configuration": _jsonable(cfg),
        "inputs": hashes,
        "n_areas": int(len(ids)),
        "graph": _jsonable(dataclasses.asdict(graph.summary())),
        "morans_i": moran_info,
        "local_clusters": {"statistic": cl.statistic, "permutations": cl.permutations, "adjust": cl.adjust,
                           "alpha": cl.alpha,
                           "counts": {k_: int(v) for k_, v in table["cluster"].value_counts().items()}},
        "empirical_bayes": {"prior_mean": eb.prior_mean, "prior_shape": eb.prior_shape},
        "model": _model_summary(car, cfg),
        **({"kriging": kriging_info} if cfg.smoothing.kriging else {}),
        "scan": _scan_summary(cfg, scan_result, scan_note),
        "spacetime": _spacetime_step.run_info(st_fit, st_weeks, st_note),
        "flags": {"rule": rules.describe(adjust=cl.adjust, alpha=cl.alpha,
                                         scan_alpha=cfg.scan.alpha if scan_result is not None else None),
                  **counts,
                  "kinds": {"emerging": int(table["emerging"].sum()), "persistent": int(table["persistent"].sum()),
                            "cluster": int((table["flag"] & (table["cluster"] == "High-High")
                                            & rules.use_clusters).sum())},
                  "previous_period": changes.previous_period,
                  "previous_available": changes.previous_available},
        "suppress_below": cfg.output.suppress_below,
        "totals": totals,
        "settings": settings,
        "series": cfg.output.series,
        "notes": [*getattr(study, "notes", ()), *(f"Local clusters: {n}" for n in local_result.notes),
                  *([st_note] if st_note and cfg.spacetime.enabled else []),
                  *(f"Space-time model: {n}" for n in (st_fit.notes if st_fit is not None else ()))],
        "warnings": run_warnings,
        "timings_seconds": {**steps.timings, "analysis": round(time.perf_counter() - t_start, 3)},
    }
    return PeriodAnalysis(
        config=cfg, period=key, weeks=tuple(window), period_start=start_day, period_end=end_day, areas=areas,
        graph=graph, morans_i=moran, local_clusters=local_result, empirical_bayes=eb, car_fit=car,
        changes=changes, rules=rules, inputs=tuple(hashes), run_info=run_info, weekly=weekly,
        settings=settings, kriging=kriging, scan=scan_result, spacetime_fit=st_fit,
    )



def _kriging(cfg, observed, expected, boundaries):
    """Poisson kriging of the window's counts with expected counts as the denominators (or None, info)."""
    if not cfg.smoothing.kriging:
        return None, {}
    from ..errors import ModelError, ModelWarning
    from ..geostatistics import poisson_kriging, risk_variogram

    try:
        variogram = risk_variogram(observed, expected, boundaries)
        result = poisson_kriging(observed, expected, boundaries, variogram=variogram,
                                 neighbours=cfg.smoothing.kriging_neighbours, per=1.0)
    except ModelError as exc:
        warnings.warn(f"Poisson kriging skipped: {exc}", ModelWarning, stacklevel=2)
        return None, {"skipped": str(exc)}
    m = result.model
    return result, {
        "variogram_model": m.model, "nugget": m.nugget, "partial_sill": m.partial_sill, "range": m.range,
        "spatial_structure": bool(variogram.spatial_structure), "neighbours": result.neighbours,
        "areas_with_negative_weights": int((result.negative_weight_count > 0).sum()),
        "leave_one_out": dict(result.cv), "notes": [*variogram.notes, *result.notes],
    }


def _kriged_columns(result, n: int) -> dict:
    """Kriged relative risks on the SIR scale (rate per expected case) and their approximate 95% interval."""
    if result is None:
        return {c: np.full(n, np.nan) for c in KRIGING_COLUMNS}
    return {"kriged_rr": result.rate, "kriged_rr_low": result.rate_low, "kriged_rr_high": result.rate_high}



@contextlib.contextmanager
def _recording_warnings(store: list[str]):
    """Keep the text of areamap warnings raised inside (for run.json), then pass every warning on."""
    caught: list = []
    try:
        with warnings.catch_warnings(record=True) as recorded:
            warnings.simplefilter("always", AreamapWarning)
            try:
                yield
            finally:
                caught = list(recorded)
    finally:
        for w in caught:
            if issubclass(w.category, AreamapWarning) and str(w.message) not in store:
                store.append(str(w.message))
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


def _set_estimates(table: pd.DataFrame, sr, eb, car_frame, local, *, threshold_differs: bool) -> None:
    """Fill the ratio, smoothing and cluster columns of a per-area table (in place), in AREA_COLUMNS order."""
    table["sir"] = sr["ratio"].to_numpy(float)
    table["sir_low"] = sr["low"].to_numpy(float)
    table["sir_high"] = sr["high"].to_numpy(float)
    table["eb_rr"] = np.asarray(eb.rr_mean, dtype=float)
    table["rr"] = car_frame["rr_mean"].to_numpy(float)
    table["rr_low"] = car_frame["rr_low"].to_numpy(float)
    table["rr_high"] = car_frame["rr_high"].to_numpy(float)
    table["p_above_1"] = car_frame["p_above_1"].to_numpy(float)
    if threshold_differs:
        table["p_above_threshold"] = car_frame["p_above_threshold"].to_numpy(float)
    table["cluster"] = local["cluster"].astype(str).to_numpy()
    table["cluster_p"] = local["p_adjusted"].to_numpy(float)


def period_settings(cfg) -> dict:
    """The settings that make two periods comparable: window, model and flag rule.

    Flags of periods analysed with different settings are not compared
    ("new", "resolved", weeks in a row); the history archive records these
    per period and a run whose settings differ stops (or starts a named
    series, ``[output] series``).

    Examples
    --------
    >>> from areamap.config import RunConfig
    >>> sorted(period_settings(RunConfig())["flags"])
    ['min_observed', 'min_probability', 'use_clusters']
    """
    sm, fl, cl = cfg.smoothing, cfg.flags, cfg.clusters
    return {
        "window_weeks": int(cfg.period.window_weeks),
        "model": {"model": sm.model, "threshold": float(sm.threshold), "covariates": list(sm.covariates),
                  "reference": cfg.standardization.reference, "graph": cfg.graph.method},
        "flags": {"min_probability": float(fl.min_probability), "use_clusters": bool(fl.use_clusters),
                  "min_observed": int(fl.min_observed)},
        "clusters": {"statistic": cl.statistic, "adjust": cl.adjust, "alpha": float(cl.alpha)},
    }


def _rates(cases: pd.DataFrame, pop: pd.DataFrame, standard) -> dict[str, np.ndarray]:
    """Crude rate per 100,000 over the window (exact Poisson limits) and, with a standard
    population, the directly standardized rate (Fay-Feuer limits)."""
    from ..rates import crude_rate, direct_standardized_rate

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AreamapWarning)  # zero-population areas were rejected above
        crude = crude_rate(cases, pop, per=100_000)
        out = {"rate_per_100k": crude.rate, "rate_low": crude.low, "rate_high": crude.high}
        if standard is not None:
            d = direct_standardized_rate(cases, pop, standard, per=100_000)
            out.update({"std_rate_per_100k": d.rate, "std_rate_low": d.low, "std_rate_high": d.high})
    return {k: np.asarray(v, dtype=float) for k, v in out.items()}


def _weekly_and_totals(study, window: list[str], ids, pop: pd.DataFrame):
    """Regional weekly series, each district's count in the previous window, and the period totals."""
    from ..intake import weeks_ending

    by_week = study.weekly_cases().reindex(index=ids, fill_value=0)
    weeks = list(by_week.columns)
    end = weeks.index(window[-1])
    shown = weeks[max(0, end - 103): end + 1]
    regional_pop = float(np.nansum(pop.to_numpy(float)))
    cases = by_week[shown].sum(axis=0).astype(np.int64)
    weekly = pd.DataFrame({"cases": cases, "population": regional_pop,
                           "rate_per_100k": 1e5 * cases / regional_pop if regional_pop > 0 else np.nan})
    weekly.index.name = "week"
    n = len(window)
    previous = weeks_ending(window[0], n + 1)[:-1]
    have_previous = all(w in by_week.columns for w in previous)
    observed_previous = (by_week[previous].sum(axis=1).to_numpy(float) if have_previous
                         else np.full(len(ids), np.nan))
    first = weeks.index(window[0])
    before = [w for w in weeks[max(0, first - 52): first]]
    current = int(by_week[window].to_numpy().sum())
    totals = {
        "current": current, "weeks": n,
        "previous": int(np.nansum(observed_previous)) if have_previous else None,
        "previous_weeks": previous if have_previous else [],
        "baseline_mean": (float(by_week[before].to_numpy().sum()) / len(before) * n) if before else None,
        "baseline_weeks": len(before),
        "population": regional_pop,
        "rate_per_100k": 1e5 * current / regional_pop if regional_pop > 0 else None,
    }
    return weekly, observed_previous, totals


def _covariates(boundaries, names) -> pd.DataFrame:
    missing = [c for c in names if c not in boundaries.columns]
    if missing:
        raise InputError(
            f"[smoothing] covariates names column(s) {format_examples(missing)} that the boundaries file does not "
            f"have. Available: {format_examples([c for c in boundaries.columns if c != 'geometry'], limit=10)}."
        )
    return pd.DataFrame(boundaries[list(names)])


def _model_summary(car, cfg) -> dict:
    hyper = getattr(car, "hyperparameters", None)
    info = {"model": cfg.smoothing.model}
    if isinstance(hyper, pd.DataFrame):
        info["hyperparameters"] = json.loads(hyper.to_json(orient="index"))
    coef = getattr(car, "coefficients", None)
    if isinstance(coef, pd.DataFrame) and len(coef):
        info["coefficients"] = json.loads(coef.to_json(orient="index"))
    for name in ("dic", "waic", "log_marginal_likelihood", "effective_parameters", "fraction_spatial"):
        value = getattr(car, name, None)
        if value is not None:
            info[name] = _jsonable(value)
    poorly = getattr(car, "poorly_fitted", None)
    if poorly is not None:
        info["poorly_fitted_areas"] = int(np.sum(poorly))
    info["notes"] = list(getattr(car, "notes", ()))
    return info


def _run_scan(cfg, study, key, observed, expected, population, boundaries, graph):
    """The configured scan; returns (result, note) with result None and a note when it cannot run."""
    from ..scan import prospective_scan, spatial_scan

    sc = cfg.scan
    common = dict(population=population, graph=graph if sc.zones == "graph" else None, max_share=sc.max_share,
                  direction=sc.direction, replicates=sc.replicates, seed=cfg.seed, alpha=sc.alpha,
                  max_zones=sc.max_zones)
    if sc.kind == "spatial":
        return spatial_scan(observed, expected, boundaries, **common), None
    weekly = study.weekly_cases()
    weeks = [w for w in weekly.columns if str(w) <= key][-(sc.baseline_weeks + sc.max_weeks):]
    need = sc.max_weeks + (1 if sc.baseline == "history" else 0)
    if len(weeks) < need:
        return None, (f"The prospective scan needs at least {need} weeks up to {key}; the data hold {len(weeks)}. "
                      "No scan this period.")
    # expected counts of the window spread evenly over its weeks: the same expected count each week
    per_week = expected / max(cfg.period.window_weeks, 1)
    return prospective_scan(weekly[weeks], per_week, boundaries, max_weeks=sc.max_weeks, baseline=sc.baseline,
                            **common), None


def _summary_lines(result, heading: str) -> list[str]:
    """The summary lines shared by PeriodAnalysis and BulletinResult: period, flags (by kind), Moran's I, scan."""
    c = result.changes.counts
    m = result.run_info["morans_i"]
    kinds = (result.run_info.get("flags") or {}).get("kinds") or {}
    lines = [
        f"{heading} {result.period} ({result.period_start} to {result.period_end}, "
        f"{result.window_weeks} week(s)): {len(result.areas)} districts.",
        f"Flagged: {c['total']} ({c['new']} new, {c['continuing']} continuing); "
        f"{c['resolved']} resolved since {result.changes.previous_period}"
        + ("" if result.changes.previous_available else " (not in the archive)") + ".",
    ]
    if kinds:
        lines.append("Flags by rule: " + ", ".join(f"{k} {v}" for k, v in kinds.items()) + ".")
    lines.append(f"Global Moran's I (EB-standardized ratios): {m['statistic']:.3f} "
                 f"(expected {m['expected']:.3f}, permutation p = {m['p_value']:.3g}).")
    return [*lines, *_scan_lines(result.run_info)]


def _scan_lines(run_info: dict) -> list[str]:
    """One summary line on the scan statistic (none when it is switched off)."""
    info = run_info.get("scan") or {}
    if not info.get("enabled"):
        return []
    if "zones_found" not in info:
        return [f"Scan statistic: not run ({info.get('note', 'no result')})"]
    zones = info["zones_found"]
    if not zones:
        return ["Scan statistic: no zone departs from the expected counts."]
    z = zones[0]
    return [f"Scan statistic ({info['kind']}): {info['significant_zones']} zone(s) with p < {info['alpha']:g}; "
            f"most likely zone {z['n_districts']} district(s) around {z['centre']}, observed {z['observed']:.0f} vs "
            f"expected {z['expected']:.1f}, p = {z['p_value']:.3g}."]


def _scan_summary(cfg, result, note) -> dict:
    """run.json record of the scan: settings and reported zones."""
    sc = cfg.scan
    info: dict = {"enabled": sc.enabled, "kind": sc.kind, "zones": sc.zones, "max_share": sc.max_share,
                  "direction": sc.direction, "replicates": sc.replicates, "alpha": sc.alpha,
                  "max_zones": sc.max_zones, "seed": cfg.seed}
    if sc.kind == "prospective":
        info.update(max_weeks=sc.max_weeks, baseline=sc.baseline, baseline_weeks=sc.baseline_weeks)
    if note:
        info["note"] = note
    if result is None:
        return info
    frame = result.to_frame().reset_index()
    frame["members"] = frame["members"].map(lambda t: [str(x) for x in t])
    frame["centre"] = frame["centre"].astype(str)
    info.update(candidate_zones=result.n_zones, total_cases=result.total_cases,
                p_value_kind="Monte Carlo rank p-value (1 + replicates at least as large) / (replicates + 1); "
                             "secondary zones against the same maxima (conservative)",
                zones_found=json.loads(frame.to_json(orient="records")),
                significant_zones=int(result.significant.sum()))
    return info
