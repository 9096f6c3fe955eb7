"""The weekly bulletin: one run from input files to a published folder.

:func:`run_bulletin` chains the whole job for one period:

1. intake and validation (:func:`~areamap.intake.load_study`), neighbour graph;
2. expected counts by indirect standardization and standardized ratios with
   exact Poisson intervals;
3. Poisson-gamma empirical-Bayes and CAR (BYM2 / Leroux / ICAR) smoothing;
4. global Moran's I of the empirical-Bayes standardized ratios, local clusters
   with multiple-testing control;
5. hotspot flags from explicit rules, compared with the previous period in the
   history archive (new, continuing, resolved; periods flagged in a row);
6. figures, then the outputs ``index.html``, ``areas.csv``, ``areas.gpkg`` and
   ``run.json`` written to a temporary sibling folder, the period written to
   the archive in one transaction, and finally the folder moved into place.

A run that fails at any step leaves the previous bulletin folder, the archive
and the inputs untouched.

Cautions
--------
The bulletin is an analytic aid, not a public-health directive: decisions
rest with the responsible health authority and local rules. Ratios of
districts with few expected cases are unstable (small numbers); district
results do not describe individuals (ecological fallacy); a 95% interval or a
posterior probability expresses uncertainty under the model, not certainty.
Counts from 1 to ``suppress_below - 1`` are shown as ``"<suppress_below"`` in
the HTML (and in the tables with ``public=True``), but complementary
suppression is not done: totals or neighbouring tables may still allow a small
count to be back-calculated.
"""

from __future__ import annotations

import base64
import contextlib
import dataclasses
import datetime as _dt
import hashlib
import html
import io
import json
import math
import os
import shutil
import tempfile
import time
import uuid
import warnings
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from ._params import check_interval, check_positive_int
from .archive import FlagChanges, HistoryArchive
from .errors import AreamapError, AreamapWarning, InputError, ParameterError, format_examples

__all__ = [
    "BulletinResult",
    "FlagRules",
    "run_bulletin",
    "flag_areas",
    "suppress_counts",
    "file_sha256",
    "AREA_COLUMNS",
    "OUTPUT_FILES",
]

#: Columns of areas.csv / areas.gpkg, in order (``p_above_threshold`` is added after
#: ``p_above_1`` when [smoothing] threshold is not 1).
AREA_COLUMNS = (
    "area_id", "area_name", "period_start", "period_end", "observed", "expected", "population",
    "sir", "sir_low", "sir_high", "eb_rr", "rr", "rr_low", "rr_high", "p_above_1",
    "cluster", "cluster_p", "flag", "flag_reason", "flag_change", "weeks_flagged",
)

#: Files a bulletin folder holds; an existing output folder is only replaced when it
#: contains nothing else.
OUTPUT_FILES = ("index.html", "areas.csv", "areas.gpkg", "run.json")

#: Columns withheld (blank) in public tables for areas whose count is suppressed:
#: with the expected count published, each of them gives the count back exactly.
_DISCLOSING_COLUMNS = ("sir", "sir_low", "sir_high", "eb_rr")

_ADJUST_LABEL = {"fdr": "FDR q", "bonferroni": "Bonferroni-adjusted p", "none": "unadjusted p"}

Progress = Callable[[str], None]


# ============================================================================ flags
@dataclass(frozen=True)
class FlagRules:
    """Explicit hotspot-flag rules (the ``[flags]`` section).

    An area is flagged when it has at least ``min_observed`` observed cases
    and **either** its posterior probability P(RR > threshold) is at least
    ``min_probability`` **or** (when ``use_clusters``) it belongs to a
    significant High-High local cluster after multiple-testing control.

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

    def __post_init__(self) -> None:
        check_interval(self.min_probability, "min_probability", "FlagRules", low=0, high=1, closed="right")
        check_positive_int(self.min_observed, "min_observed", "FlagRules", minimum=0)
        check_interval(self.threshold, "threshold", "FlagRules", low=0)
        if not isinstance(self.use_clusters, bool):
            raise ParameterError(
                f"The 'use_clusters' parameter of FlagRules must be True or False. Got {self.use_clusters!r} instead."
            )

    def describe(self, *, adjust: str = "fdr", alpha: float = 0.05) -> str:
        """The rule in one plain sentence (printed on the bulletin)."""
        parts = [f"posterior P(RR > {self.threshold:g}) >= {self.min_probability:g}"]
        if self.use_clusters:
            how = {"fdr": "false-discovery-rate control", "bonferroni": "Bonferroni correction",
                   "none": "no multiple-testing adjustment"}[adjust]
            parts.append(f"membership of a High-High local cluster ({how}, alpha = {alpha:g})")
        text = "a district is flagged when " + " OR ".join(parts)
        if self.min_observed > 0:
            text += f", and only if it has at least {self.min_observed} observed case(s)"
        return text[0].upper() + text[1:] + "."


def flag_areas(
    table: pd.DataFrame,
    *,
    rules: FlagRules | None = None,
    adjust: str = "fdr",
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
    flag = (by_prob | by_cluster) & enough
    label = _ADJUST_LABEL[adjust]
    t = _fmt_num(rules.threshold)
    reasons = []
    for pi, bp, bc, ok, q in zip(p, by_prob, by_cluster, enough, table["cluster_p"].to_numpy(float)):
        met = []
        if bp:
            met.append(f"P(RR>{t}){_fmt_prob(pi)} >= {rules.min_probability:g}")
        if bc:
            met.append(f"High-High cluster ({label}={_fmt_p(q)})")
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
@dataclass(frozen=True, eq=False)
class BulletinResult:
    """What one bulletin run produced.

    Attributes
    ----------
    out : pathlib.Path
        The bulletin folder (index.html, areas.csv, areas.gpkg, run.json).
    period : str
        ISO week ending the analysed window, e.g. ``"2026-W47"``.
    period_start, period_end : datetime.date
        First and last day of the window.
    window_weeks : int
    areas : geopandas.GeoDataFrame
        The per-area table (unsuppressed counts), index = area ids, columns
        :data:`AREA_COLUMNS` (except area_id, the index) plus geometry.
    morans_i : object
        The global Moran's I result of the EB-standardized ratios.
    changes : FlagChanges
        Comparison with the previous period.
    car_fit : object
        The fitted CAR model.
    run_info : dict
        The content of run.json.
    public : bool
        Whether the tables were written with small counts suppressed.
    """

    out: Path
    period: str
    period_start: _dt.date
    period_end: _dt.date
    window_weeks: int
    areas: object
    morans_i: object
    changes: FlagChanges
    car_fit: object
    run_info: dict = field(repr=False)
    public: bool = False

    @property
    def files(self) -> dict[str, Path]:
        """Paths of the four output files."""
        return {name: self.out / name for name in OUTPUT_FILES}

    @property
    def flagged(self) -> pd.DataFrame:
        """Rows of the flagged areas (without geometry)."""
        t = self.to_frame()
        return t[t["flag"]]

    def to_frame(self) -> pd.DataFrame:
        """The per-area table without geometry (unsuppressed)."""
        return pd.DataFrame(self.areas.drop(columns="geometry"))

    def summary(self) -> str:
        """A few lines: period, flags and changes, Moran's I, where the outputs are."""
        c = self.changes.counts
        m = self.run_info["morans_i"]
        return "\n".join([
            f"Bulletin for {self.period} ({self.period_start} to {self.period_end}, "
            f"{self.window_weeks} week(s)): {len(self.areas)} districts.",
            f"Flagged: {c['total']} ({c['new']} new, {c['continuing']} continuing); "
            f"{c['resolved']} resolved since {self.changes.previous_period}"
            + ("" if self.changes.previous_available else " (not in the archive)") + ".",
            f"Global Moran's I (EB-standardized ratios): {m['statistic']:.3f} "
            f"(expected {m['expected']:.3f}, permutation p = {m['p_value']:.3g}).",
            f"Outputs: {self.out}" + (" (public: small counts suppressed)" if self.public else ""),
        ])

    def _repr_html_(self) -> str:
        lines = "".join(f"<li>{html.escape(s)}</li>" for s in self.summary().splitlines())
        return f"<ul>{lines}</ul>"


# ============================================================================ output folder
def _check_out_dir(out: Path, inputs: list[tuple[str, Path]]) -> None:
    """Refuse output folders that would overwrite anything but a previous bulletin."""
    if out.exists() and not out.is_dir():
        raise InputError(f"The output path {out} exists and is a file. Give a folder for the bulletin (--out DIR).")
    resolved = out.resolve()
    for role, p in inputs:
        try:
            Path(p).resolve().relative_to(resolved)
        except ValueError:
            continue
        raise InputError(
            f"The output folder {out} contains the {role} file {p}; a bulletin run replaces its output folder. "
            "Choose a separate output folder (--out DIR)."
        )
    if out.is_dir():
        extra = sorted(p.name for p in out.iterdir() if p.name not in OUTPUT_FILES)
        if extra:
            raise InputError(
                f"The output folder {out} holds files that are not bulletin outputs ({format_examples(extra)}). "
                "A bulletin run replaces the whole folder, so choose an empty or new folder (--out DIR), "
                "or the folder of a previous bulletin."
            )


def _publish(tmp: Path, out: Path) -> None:
    """Move the finished temporary folder into place, replacing a previous bulletin."""
    backup = None
    if out.exists():
        backup = out.parent / f".{out.name}.previous-{uuid.uuid4().hex[:8]}"
        os.replace(out, backup)
    try:
        os.replace(tmp, out)
    except OSError:
        if backup is not None:
            os.replace(backup, out)
        raise
    if backup is not None:
        shutil.rmtree(backup, ignore_errors=True)


def _write_json(path: Path, data: dict) -> None:
    path.write_text(json.dumps(_jsonable(data), indent=2, ensure_ascii=False) + "\n", encoding="utf-8")


# ============================================================================ html
def _environment():
    import jinja2

    return jinja2.Environment(
        loader=jinja2.PackageLoader("areamap", "templates"),
        autoescape=True,  # every variable escaped; nothing user-supplied is ever marked safe
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def _figure_uri(fig, *, dpi: int = 110) -> tuple[str, int, int]:
    """PNG data URI of a matplotlib figure (closed afterwards), with its pixel size."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    try:
        fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight", facecolor="white",
                    metadata={"Software": None})
    finally:
        plt.close(fig)
    data = buf.getvalue()
    # PNG IHDR: width and height are big-endian uint32 at bytes 16-24 (PNG spec, section 11.2.2)
    width = int.from_bytes(data[16:20], "big")
    height = int.from_bytes(data[20:24], "big")
    return "data:image/png;base64," + base64.b64encode(data).decode("ascii"), width, height


def _fmt(x: float, digits: int = 2) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{x:.{digits}f}"



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


def _resolve_period(study, requested: str | None, config) -> tuple[str, list[str]]:
    """The period key (last week of the window) and the weeks of the window."""
    from .intake import parse_week, weeks_ending

    k = config.period.window_weeks
    wanted = requested if requested is not None else config.period.week
    if not study.weeks:
        raise InputError("The cases file has no weeks with data; nothing to report.")
    if wanted in (None, "latest"):
        key = study.weeks[-1]
    else:
        try:
            key = parse_week(wanted)
        except (AreamapError, ValueError):
            raise InputError(
                f"The period {wanted!r} is not an ISO week. Give it as YYYY-Www, e.g. --period 2026-W47."
            ) from None
    if key not in study.weeks:
        raise InputError(
            f"The period {key} is outside the weeks of the cases file ({study.weeks[0]} to {study.weeks[-1]}). "
            "Choose a week within that range (or 'latest')."
        )
    window = list(weeks_ending(key, k))
    before = [w for w in window if w < study.weeks[0]]
    if before:
        raise InputError(
            f"The rolling window of {k} weeks ending {key} starts at {window[0]}, before the first week of the "
            f"cases file ({study.weeks[0]}). Choose a later period or a shorter [period] window_weeks."
        )
    return key, window


def _reference_rates(config, study) -> pd.Series | None:
    """External reference rates per person per week by age group, or None (internal reference)."""
    if config.standardization.reference != "external":
        return None
    return study.reference_rates


def _priors(config):
    from .models import CarPriors

    p = config.smoothing.priors
    return CarPriors(sigma_upper=p.sigma_upper, sigma_tail=p.sigma_tail, phi_upper=p.phi_upper,
                     phi_tail=p.phi_tail, intercept_sd=p.intercept_sd, coefficient_sd=p.coefficient_sd)


def run_bulletin(
    config,
    *,
    period: str | None = None,
    out: str | Path | None = None,
    public: bool = False,
    progress: Progress | None = None,
) -> BulletinResult:
    """Run the whole bulletin for one period and publish its folder.

    Parameters
    ----------
    config : str, Path or RunConfig
        The run configuration (a TOML file path or a loaded :class:`~areamap.config.RunConfig`).
    period : str, optional
        ISO week ending the analysed window (``"2026-W47"``) or ``"latest"``;
        default ``[period] week`` of the configuration.
    out : str or Path, optional
        Output folder; default ``bulletin`` beside the configuration file. An
        existing folder is replaced only when it holds nothing but bulletin
        outputs.
    public : bool, default=False
        Suppress small counts (1 to ``suppress_below - 1``) in areas.csv and
        areas.gpkg too (the HTML always suppresses them) and withhold the
        ratios that would reveal them (sir, sir_low, sir_high, eb_rr).
    progress : callable, optional
        Called with a short message at the start of each step (the CLI prints
        them on a terminal).

    Returns
    -------
    BulletinResult

    Raises
    ------
    AreamapError
        Unusable input or configuration (InputError, ConfigError, GraphError),
        a model that cannot be fitted (ModelError) or a locked or damaged
        archive (ArchiveError). Nothing is written or changed in that case.

    Notes
    -----
    Steps: expected counts :math:`E_i = \\sum_a n_{ia} r_a` (indirect
    standardization, reference rates :math:`r_a` from the window's own counts or
    external rates times the window length); SIR :math:`O_i/E_i` with exact
    Poisson limits; Poisson-gamma EB; CAR model; Moran's I and local clusters
    on Assunção-Reis EB-standardized ratios (expected counts as denominators,
    so the age structure is accounted for); flags; history.

    Examples
    --------
    >>> from areamap.demo import write_demo                      # doctest: +SKIP
    >>> result = run_bulletin(write_demo("demo"), out="demo/out")  # doctest: +SKIP
    >>> print(result.summary())                                   # doctest: +SKIP
    """
    from . import __version__
    from .config import RunConfig, load_config

    t_start = time.perf_counter()
    run_time = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0)
    steps = _Steps(progress, 10)
    steps.start("configuration", "reading the configuration")
    if isinstance(config, RunConfig):
        cfg = config
    elif isinstance(config, str | os.PathLike):
        cfg = load_config(config)
    else:
        raise ParameterError(
            f"The 'config' parameter of run_bulletin must be a path or a RunConfig. Got {type(config).__name__} instead."
        )
    if not isinstance(public, bool):
        raise ParameterError(f"The 'public' parameter of run_bulletin must be True or False. Got {public!r} instead.")
    out_dir = Path(out) if out is not None else cfg.base_dir / "bulletin"
    out_dir = out_dir.expanduser().absolute()
    inputs = _input_files(cfg)
    _check_out_dir(out_dir, [*inputs, ("history archive", Path(cfg.output.archive))])
    hashes = [{"role": role, "name": p.name, "path": str(p), "sha256": file_sha256(p)}
              for role, p in inputs if p.is_file()]
    archive = HistoryArchive(cfg.output.archive)
    rules = FlagRules(min_probability=cfg.flags.min_probability, use_clusters=cfg.flags.use_clusters,
                      min_observed=cfg.flags.min_observed, threshold=cfg.smoothing.threshold)

    run_warnings: list[str] = []
    with _recording_warnings(run_warnings):
        steps.start("intake", "reading boundaries, cases and population")
        from .intake import load_study, week_bounds

        study = load_study(cfg)
        key, window = _resolve_period(study, period, cfg)
        start_day = week_bounds(window[0])[0]
        end_day = week_bounds(window[-1])[1]
        boundaries = study.boundaries
        ids = boundaries.index
        names = boundaries["area_name"].astype(str)

        steps.start("graph", f"building the {cfg.graph.method} neighbour graph")
        from .graphs import build_graph, read_extra_links

        g = cfg.graph
        extra = read_extra_links(g.extra_links_file, ids) if g.extra_links_file is not None else None
        graph = build_graph(boundaries, method=g.method, snap=g.snap, k=g.k, distance=g.distance,
                            islands=g.islands, island_k=g.island_k, extra_links=extra, name_column="area_name")

        steps.start("rates", "expected counts and standardized ratios")
        from .rates import expected_counts, standardized_ratio

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
                f"{len(bad)} district(s) have an expected count of zero ({format_examples(bad)}), usually because "
                "their population is zero. Remove them from the boundaries or give them a population."
            )
        sr = standardized_ratio(observed, expected).to_frame()

        steps.start("smoothing", f"empirical-Bayes and {cfg.smoothing.model.upper()} smoothing")
        from .models import fit_car
        from .smoothing import poisson_gamma_eb

        eb = poisson_gamma_eb(observed, expected, threshold=cfg.smoothing.threshold)
        covariates = None
        if cfg.smoothing.covariates:
            covariates = _covariates(boundaries, cfg.smoothing.covariates)
        car = fit_car(observed, expected, graph, model=cfg.smoothing.model, covariates=covariates,
                      priors=_priors(cfg), threshold=cfg.smoothing.threshold)
        car_frame = car.to_frame().reindex(ids)

        steps.start("clusters", f"Moran's I and local clusters ({cfg.clusters.permutations} permutations)")
        from .autocorrelation import rate_local_clusters, rate_morans_i

        cl = cfg.clusters
        moran = rate_morans_i(observed, expected, graph, permutations=cl.permutations, seed=cfg.seed)
        local_result = rate_local_clusters(observed, expected, graph, statistic=cl.statistic,
                                           permutations=cl.permutations, seed=cfg.seed, adjust=cl.adjust,
                                           alpha=cl.alpha)
        local = local_result.to_frame().reindex(ids)

        steps.start("flags", "flags and comparison with the previous period")
        table = pd.DataFrame(index=ids)
        table["area_name"] = names
        table["period_start"] = start_day.isoformat()
        table["period_end"] = end_day.isoformat()
        table["observed"] = observed
        table["expected"] = expected
        table["population"] = population
        table["sir"] = sr["ratio"].to_numpy(float)
        table["sir_low"] = sr["low"].to_numpy(float)
        table["sir_high"] = sr["high"].to_numpy(float)
        table["eb_rr"] = np.asarray(eb.rr_mean, dtype=float)
        table["rr"] = car_frame["rr_mean"].to_numpy(float)
        table["rr_low"] = car_frame["rr_low"].to_numpy(float)
        table["rr_high"] = car_frame["rr_high"].to_numpy(float)
        table["p_above_1"] = car_frame["p_above_1"].to_numpy(float)
        threshold_differs = not math.isclose(cfg.smoothing.threshold, 1.0)
        if threshold_differs:
            table["p_above_threshold"] = car_frame["p_above_threshold"].to_numpy(float)
        table["cluster"] = local["cluster"].astype(str).to_numpy()
        table["cluster_p"] = local["p_adjusted"].to_numpy(float)
        flags = flag_areas(
            table.assign(p_exceed=table["p_above_threshold"] if threshold_differs else table["p_above_1"]),
            rules=rules, adjust=cl.adjust)
        table["flag"] = flags["flag"].to_numpy(bool)
        table["flag_reason"] = flags["flag_reason"].to_numpy(object)
        changes = archive.compare(key, table["flag"])
        table["flag_change"] = changes.status.to_numpy(object)
        table["weeks_flagged"] = changes.weeks_flagged.to_numpy(np.int64)
        table.index.name = "area_id"

        steps.start("figures", "drawing maps and plots")
        import geopandas as gpd

        areas = gpd.GeoDataFrame(table, geometry=boundaries.geometry.reindex(ids), crs=boundaries.crs)
        figures, figure_notes = _figures(areas, graph, local, cfg, key)

    steps.start("outputs", "writing index.html, areas.csv, areas.gpkg, run.json")
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
        "seed": cfg.seed, "public": public,
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
        "flags": {"rule": rules.describe(adjust=cl.adjust, alpha=cl.alpha), **counts,
                  "previous_period": changes.previous_period,
                  "previous_available": changes.previous_available},
        "suppress_below": cfg.output.suppress_below,
        "notes": [*getattr(study, "notes", ()), *(f"Local clusters: {n}" for n in local_result.notes)],
        "warnings": run_warnings,
        "timings_seconds": steps.timings,
    }
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.tmp-", dir=_parent_for(out_dir)))
    os.chmod(tmp, 0o777 & ~_umask())  # mkdtemp makes it private; the published folder follows the umask
    try:
        _write_tables(areas, tmp, public=public, suppress_below=cfg.output.suppress_below,
                      threshold_differs=threshold_differs)
        steps.stop()
        run_info["timings_seconds"] = dict(steps.timings)
        run_info["timings_seconds"]["total"] = round(time.perf_counter() - t_start, 3)
        page = _render_html(cfg, areas, changes, moran, rules, figures, figure_notes, run_info, hashes)
        (tmp / "index.html").write_text(page, encoding="utf-8")
        _write_json(tmp / "run.json", run_info)

        steps.start("archive", "archiving the period and publishing")
        # the folder is moved into place while the archive's write lock is held: two runs publish in turn,
        # and a failed move rolls the archive back
        archive.write_period(key, table, period_start=start_day, period_end=end_day,
                             window_weeks=len(window), tool_version=__version__,
                             before_commit=lambda: _publish(tmp, out_dir))
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    steps.stop()
    run_info["timings_seconds"]["archive"] = steps.timings.get("archive")
    return BulletinResult(out=out_dir, period=key, period_start=start_day, period_end=end_day,
                          window_weeks=len(window), areas=areas, morans_i=moran, changes=changes,
                          car_fit=car, run_info=run_info, public=public)


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


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _parent_for(out_dir: Path) -> Path:
    parent = out_dir.parent
    parent.mkdir(parents=True, exist_ok=True)
    return parent


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


# ============================================================================ tables
def _write_tables(areas, folder: Path, *, public: bool, suppress_below: int, threshold_differs: bool) -> None:
    cols = [c for c in AREA_COLUMNS if c != "area_id"]
    if threshold_differs:
        cols.insert(cols.index("p_above_1") + 1, "p_above_threshold")
    frame = areas[cols + ["geometry"]].copy()
    if public and suppress_below > 1:
        hide = _suppressed_mask(frame["observed"], suppress_below)
        frame["observed"] = suppress_counts(frame["observed"], threshold=suppress_below).to_numpy(object)
        for c in _DISCLOSING_COLUMNS:
            frame.loc[hide, c] = np.nan
    plain = pd.DataFrame(frame.drop(columns="geometry")).reset_index()
    plain["flag"] = plain["flag"].map({True: "true", False: "false"})
    plain.to_csv(folder / "areas.csv", index=False, float_format="%.10g", encoding="utf-8", lineterminator="\n")
    gdf = frame.reset_index()
    gdf.to_file(folder / "areas.gpkg", layer="areas", driver="GPKG")


# ============================================================================ html page
_REFERENCES = (
    "Anselin L (1995). Local indicators of spatial association—LISA. Geographical Analysis 27(2):93–115.",
    "Assunção RM, Reis EA (1999). A new proposal to adjust Moran's I for population density. "
    "Statistics in Medicine 18(16):2147–2162.",
    "Benjamini Y, Hochberg Y (1995). Controlling the false discovery rate: a practical and powerful approach "
    "to multiple testing. Journal of the Royal Statistical Society B 57(1):289–300.",
    "Besag J, York J, Mollié A (1991). Bayesian image restoration, with two applications in spatial statistics. "
    "Annals of the Institute of Statistical Mathematics 43(1):1–20.",
    "Breslow NE, Day NE (1987). Statistical Methods in Cancer Research, Volume II: The Design and Analysis of "
    "Cohort Studies. IARC Scientific Publications No. 82, Lyon (indirect standardization, exact Poisson limits).",
    "Clayton D, Kaldor J (1987). Empirical Bayes estimates of age-standardized relative risks for use in "
    "disease mapping. Biometrics 43(3):671–681.",
    "Leroux BG, Lei X, Breslow N (2000). Estimation of disease rates in small areas: a new mixed model for "
    "spatial dependence. In: Statistical Models in Epidemiology, the Environment, and Clinical Trials, 179–191.",
    "Moran PAP (1950). Notes on continuous stochastic phenomena. Biometrika 37(1/2):17–23.",
    "Ord JK, Getis A (1995). Local spatial autocorrelation statistics: distributional issues and an "
    "application. Geographical Analysis 27(4):286–306.",
    "Richardson S, Thomson A, Best N, Elliott P (2004). Interpreting posterior relative risk estimates in "
    "disease-mapping studies. Environmental Health Perspectives 112(9):1016–1025.",
    "Riebler A, Sørbye SH, Simpson D, Rue H (2016). An intuitive Bayesian spatial model for disease mapping "
    "that accounts for scaling. Statistical Methods in Medical Research 25(4):1145–1165.",
    "Spiegelhalter DJ (2005). Funnel plots for comparing institutional performance. Statistics in Medicine "
    "24(8):1185–1202.",
)

_CAUTIONS = (
    "This bulletin is an analytic aid, not a public-health directive. Decisions about any response rest with "
    "the responsible health authority and follow local rules and procedures.",
    "Small numbers: a district with few expected cases can show a very high or very low ratio by chance alone. "
    "Read the smoothed relative risks and their intervals rather than the raw ratios, and treat a single "
    "week's flag with care.",
    "Ecological fallacy: results describe districts as a whole. They do not say anything about the risk of any "
    "individual living there, and associations between districts need not hold for people.",
    "Interval meaning: a 95% interval (or credible interval) and a posterior probability such as P(RR>1) express "
    "uncertainty under the model's assumptions; they are not certainties. With many districts, some will "
    "exceed any threshold by chance.",
    "Flags follow an explicit, configurable rule and are a prompt to look more closely (data quality, reporting "
    "delays, known outbreaks, population changes), not a finding in themselves.",
)


def _cautions(suppress_below: int) -> tuple[str, ...]:
    hidden = (f"counts from 1 to {suppress_below - 1} are hidden in this page" if suppress_below > 1
              else "no counts are hidden (suppression is switched off)")
    return (*_CAUTIONS,
            f"Disclosure: {hidden}, but totals, maps and the funnel plot are not adjusted (no complementary "
            "suppression), so small counts may still be approximately recoverable. Check local rules before "
            "publishing.")


def _moran_sentence(statistic: float, expected: float, p: float) -> str:
    if not np.isfinite(p):
        return "No permutation test was run."
    if p < 0.05 and statistic > expected:
        return ("Neighbouring districts tend to have similar ratios (positive spatial autocorrelation): "
                "cases are not spread independently over the map.")
    if p < 0.05:
        return "Neighbouring districts tend to differ from each other (negative spatial autocorrelation)."
    return ("No clear evidence that neighbouring districts resemble each other more than chance alone would give "
            "(p >= 0.05); this does not rule out local clusters.")


def _methods(cfg, rules: FlagRules, n_window: int) -> list[str]:
    st = cfg.standardization
    model = {"bym2": "BYM2 (Riebler et al. 2016), a reparameterised Besag–York–Mollié model whose mixing "
                     "parameter is the fraction of the variation that is spatially structured",
             "leroux": "Leroux et al. (2000) conditional autoregressive model",
             "icar": "intrinsic conditional autoregressive (Besag et al. 1991) model"}[cfg.smoothing.model]
    ref = ("the age-specific rates of the whole region over the same weeks (internal reference)"
           if st.reference == "internal" else
           "the external reference rates of the configuration, multiplied by the number of weeks in the window")
    stat = ("local Moran's I (Anselin 1995)" if cfg.clusters.statistic == "local_moran"
            else "the Getis–Ord Gi* statistic (Ord & Getis 1995)")
    adj = {"fdr": "the Benjamini–Hochberg false-discovery-rate procedure (Benjamini & Hochberg 1995)",
           "bonferroni": "a Bonferroni correction", "none": "no multiple-testing adjustment"}[cfg.clusters.adjust]
    return [
        f"Cases are summed over the analysed window ({n_window} week{'s' if n_window != 1 else ''}). Expected "
        f"counts come from indirect standardization: each district's population by age group times {ref}. "
        "The standardized incidence ratio (SIR) is observed / expected, with exact Poisson 95% confidence "
        "limits (Breslow & Day 1987).",
        "Empirical-Bayes ratios (eb_rr) shrink each SIR towards the regional mean with a Poisson–gamma model "
        "whose prior is estimated from all districts (Clayton & Kaldor 1987): the fewer expected cases, the "
        "stronger the shrinkage.",
        f"Smoothed relative risks (rr) are posterior means from the {model}, fitted to the observed counts with "
        "the expected counts as offsets and penalised-complexity priors on the variance and mixing parameters. "
        "The map of uncertainty shows the posterior probability that a district's relative risk exceeds 1.",
        "Global spatial autocorrelation is measured by Moran's I (Moran 1950) of the empirical-Bayes "
        "standardized ratios of Assunção & Reis (1999), with expected counts as denominators so that age "
        f"structure is taken into account; its p-value comes from {cfg.clusters.permutations} random "
        f"permutations (seed {cfg.seed}).",
        f"Local clusters are found with {stat} on the same standardized ratios, with conditional-permutation "
        f"p-values ({cfg.clusters.permutations} permutations) adjusted by {adj} at level "
        f"{cfg.clusters.alpha:g}. Districts without neighbours are labelled 'no neighbours'.",
        f"Flag rule: {rules.describe(adjust=cfg.clusters.adjust, alpha=cfg.clusters.alpha)} The probability "
        "cut-off follows Richardson et al. (2004). Each flagged district's reason lists the rules it met; "
        "'new', 'continuing' and 'resolved' compare with the previous week in the history archive, and "
        "'periods flagged' counts consecutive flagged weeks.",
        "The funnel plot (Spiegelhalter 2005) shows each district's SIR against its expected count with "
        "95% and 99.8% control limits around 1; points outside the funnel are more extreme than chance "
        "variation would usually give.",
    ]


def _model_sentence(model: dict) -> str:
    """This period's fitted hyperparameters and fit criteria in one sentence."""
    parts = []
    for name, row in (model.get("hyperparameters") or {}).items():
        if {"mean", "q025", "q975"} <= set(row):
            parts.append(f"{name} {_fmt(row['mean'])} (95% CrI {_fmt(row['q025'])}–{_fmt(row['q975'])})")
    text = f"This period's {str(model.get('model', '')).upper()} fit: " + ("; ".join(parts) if parts else "—")
    crit = [f"{k.upper()} {model[k]:.1f}" for k in ("dic", "waic") if isinstance(model.get(k), float)]
    if crit:
        text += "; " + ", ".join(crit) + " (smaller is better when comparing models on the same data)"
    return text + "."


def _row_display(row, suppress_below: int) -> dict:
    hide = 1 <= row.observed < suppress_below if suppress_below > 1 else False
    return {
        "area_id": str(row.Index), "area_name": str(row.area_name),
        "observed": f"<{suppress_below}" if hide else str(int(row.observed)),
        "expected": _fmt(row.expected, 1),
        "sir": "withheld" if hide else _fmt(row.sir),
        "sir_ci": "" if hide else f"({_fmt(row.sir_low)}–{_fmt(row.sir_high)})",
        "rr": _fmt(row.rr), "rr_ci": f"({_fmt(row.rr_low)}–{_fmt(row.rr_high)})",
        "p_above_1": _fmt_prob(row.p_above_1).lstrip("=") if np.isfinite(row.p_above_1) else "n/a",
        "cluster": str(row.cluster), "change": str(row.flag_change),
        "weeks_flagged": str(int(row.weeks_flagged)), "flag_reason": str(row.flag_reason),
    }


def _render_html(cfg, areas, changes: FlagChanges, moran, rules: FlagRules, figures, figure_notes,
                 run_info: dict, hashes: list[dict]) -> str:
    counts = changes.counts
    table = pd.DataFrame(areas.drop(columns="geometry"))
    flagged = table[table["flag"]].sort_values(["p_above_1", "rr"], ascending=False, kind="stable")
    resolved = table[table["flag_change"] == "resolved"]
    sb = cfg.output.suppress_below
    total_sec = run_info["timings_seconds"].get("total", float("nan"))
    context = {
        "title": cfg.title, "region": cfg.region, "data_source": cfg.data_source,
        "period": {"key": run_info["period"]["key"], "start": run_info["period"]["start"],
                   "end": run_info["period"]["end"], "window_weeks": run_info["period"]["window_weeks"]},
        "headline": {
            "n_flagged": counts["total"], "n_areas": len(table),
            "n_new": counts["new"], "n_continuing": counts["continuing"], "n_resolved": counts["resolved"],
            "previous_period": changes.previous_period, "previous_available": changes.previous_available,
            "moran_i": f"{moran.statistic:.3f}", "moran_expected": f"{moran.expected:.3f}",
            "moran_p": _fmt_p(moran.p_permutation), "moran_permutations": moran.permutations,
            "moran_sentence": _moran_sentence(moran.statistic, moran.expected, moran.p_permutation),
            "total_observed": f"{int(table['observed'].sum()):,}",
            "total_expected": f"{table['expected'].sum():,.1f}",
        },
        "flag_rule_text": rules.describe(adjust=cfg.clusters.adjust, alpha=cfg.clusters.alpha),
        "figures": figures, "figure_notes": figure_notes,
        "flagged_rows": [_row_display(r, sb) for r in flagged.itertuples()],
        "resolved_rows": [{"area_id": str(i), "area_name": str(n)} for i, n in resolved["area_name"].items()],
        "suppress_below": sb,
        "methods": [*_methods(cfg, rules, run_info["period"]["window_weeks"]), _model_sentence(run_info["model"])],
        "references": _REFERENCES,
        "cautions": _cautions(sb),
        "provenance": {
            "version": run_info["version"], "run_time": run_info["run_time"].replace("+00:00", " UTC"),
            "duration": f"{total_sec:.1f} s", "seed": cfg.seed,
            "config": str(cfg.path.name) if cfg.path is not None else "(built in code)",
            "inputs": hashes,
        },
        "run_notes": [*run_info.get("notes", []), *run_info.get("warnings", [])],
    }
    return _environment().get_template("bulletin.html").render(**context)


# ============================================================================ figures
def _plain(text: str) -> str:
    """User text for matplotlib: '$' would start mathtext, so escape it (text is drawn literally)."""
    return str(text).replace("$", r"\$")


def _figures(areas, graph, local, cfg, key: str) -> tuple[list[dict], list[str]]:
    """The bulletin's figures as PNG data URIs, with titles, captions and alt texts."""
    import matplotlib.pyplot as plt

    from . import maps

    gdf = areas.copy()
    gdf["area_name"] = gdf["area_name"].map(_plain)
    source = _plain(cfg.data_source) if cfg.data_source else None
    period_text = f"{key} ({gdf['period_start'].iloc[0]} to {gdf['period_end'].iloc[0]})"
    out: list[dict] = []
    notes: list[str] = []

    def add(fig_id: str, fig, title: str, caption: str, alt: str) -> None:
        src, w, h = _figure_uri(fig)
        out.append({"id": fig_id, "src": src, "width": w, "height": h, "title": title,
                    "caption": caption, "alt": alt})

    with warnings.catch_warnings():
        # figure-level notes (e.g. areas left out) are repeated in the captions drawn by the maps
        warnings.simplefilter("ignore", UserWarning)
        fig = maps.raw_beside_smoothed(gdf, "sir", "rr", period=period_text, source=source)
        add("raw-smoothed", fig, "Raw and smoothed ratios",
            "Left: standardized incidence ratio (observed / expected). Right: relative risk smoothed by the "
            f"{cfg.smoothing.model.upper()} model, same classes and colours. Raw ratios of districts with few "
            "expected cases swing widely; the smoothed map borrows strength from neighbours and the region.",
            "Two maps side by side: raw standardized incidence ratios and smoothed relative risks per district.")

        fig, ax = plt.subplots(figsize=(7.5, 6.5), layout="constrained")
        maps.exceedance_map(gdf, "p_above_1", threshold=1.0, ax=ax, period=period_text, source=source)
        add("uncertainty", fig, "Uncertainty: probability of raised risk",
            "Posterior probability that a district's relative risk exceeds 1. Above 0.8: good evidence of raised "
            "risk; below 0.2: good evidence of lowered risk; in between: the data cannot tell.",
            "Map of the posterior probability that each district's relative risk exceeds 1.")

        fig, ax = plt.subplots(figsize=(7.5, 6.5), layout="constrained")
        maps.bivariate_map(gdf, "rr", "p_above_1", ax=ax, period=period_text, source=source)
        add("risk-and-certainty", fig, "Risk and certainty together",
            "Each district's smoothed relative risk class (below 0.9, 0.9 to 1.1, above 1.1) crossed with how "
            "sure the model is that its risk exceeds 1 (below 0.2, 0.2 to 0.8, above 0.8). Strong colours mean "
            "a clear signal; pale colours mean the estimate is uncertain, whatever its size.",
            "Map with a three-by-three colour legend crossing relative-risk class with exceedance-probability class.")

        fig, ax = plt.subplots(figsize=(7.5, 6.5), layout="constrained")
        maps.cluster_map(gdf, "cluster", ax=ax, period=period_text, source=source)
        stat = "local Moran's I" if cfg.clusters.statistic == "local_moran" else "Getis–Ord Gi*"
        add("clusters", fig, "Local clusters",
            f"Significant local clusters ({stat}, {cfg.clusters.permutations} conditional permutations, "
            f"{_ADJUST_LABEL[cfg.clusters.adjust].split(' ')[0]} adjustment at {cfg.clusters.alpha:g}). High-High: "
            "high ratios surrounded by high ratios; Low-Low the reverse; High-Low and Low-High are outliers.",
            "Map of local cluster categories per district.")

        fig, ax = plt.subplots(figsize=(8.0, 5.5), layout="constrained")
        maps.funnel_plot(gdf["observed"], gdf["expected"], labels=gdf["area_name"], ax=ax)
        add("funnel", fig, "Funnel plot",
            "Standardized incidence ratio against expected count with 95% and 99.8% exact Poisson control "
            "limits around 1. Points outside the funnel vary more than chance alone would usually give.",
            "Scatter plot of standardized ratio against expected count with funnel-shaped control limits.")
    n_islands = int(graph.island_mask().sum())
    if n_islands:
        notes.append(f"{n_islands} district(s) have no neighbours in the graph; they take no part in the "
                     "cluster analysis ('no neighbours').")
    return out, notes
