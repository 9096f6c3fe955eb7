"""Every validation a run needs, in one place: ``areamap check`` and the bulletin both call it.

:func:`prepare_run` reads the study (:func:`~areamap.intake.load_study`),
builds the neighbour graph and then runs :func:`validate_run`, which checks
what the analysis will need before anything is computed or written:

* the reporting period: an ISO week within the weeks that have case rows,
  with the whole rolling window inside the study;
* weeks that cannot be right: case rows dated after the day of the run
  (unless ``[checks] allow_future_weeks``), or a week far beyond the rest of
  the data (``[checks] max_week_gap``), which would silently become "latest";
* enough districts (at least :data:`MIN_AREAS`) and at least one neighbour
  link (Moran's I and local clusters compare districts with their
  neighbours);
* a window with at least one case (an all-zero period cannot be mapped and
  must not be published as "nothing happening");
* districts with zero population, or with expected counts of zero because
  the external reference rates are zero (ratios are undefined there);
* implausible values: a week's cases above the population, weekly rates above
  ``[checks] max_weekly_rate``, populations above
  :data:`MAX_PLAUSIBLE_POPULATION` (a warning, or an error with
  ``[checks] implausible = "error"``).

Because ``areamap check`` runs exactly this function, it fails whenever the
bulletin would fail on the same inputs and period, with the same message.
"""

from __future__ import annotations

import datetime as _dt
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import AreamapError, DataWarning, InputError, ParameterError, format_examples

__all__ = ["RunPlan", "PreparedRun", "validate_run", "prepare_run", "MIN_AREAS", "MAX_PLAUSIBLE_POPULATION"]

#: Fewest districts a bulletin can analyse: the permutation tests of Moran's I need at least 4.
MIN_AREAS = 4

#: A population above this (more people than live on Earth) is certainly a unit or typing error.
MAX_PLAUSIBLE_POPULATION = 1e10


@dataclass(frozen=True)
class RunPlan:
    """The validated reporting period of a run.

    Attributes
    ----------
    period : str
        ISO week ending the window (``"2026-W47"``).
    window : tuple of str
        The ISO weeks summed into the reporting window, oldest first.
    start, end : datetime.date
        First (Monday) and last (Sunday) day of the window.
    window_cases : int
        Cases in the window, all districts.
    notes : tuple of str
        Things worth knowing that are not errors.
    """

    period: str
    window: tuple[str, ...]
    start: _dt.date
    end: _dt.date
    window_cases: int
    notes: tuple[str, ...] = ()

    def summary(self) -> str:
        span = self.window[0] + (f" to {self.window[-1]}" if len(self.window) > 1 else "")
        n = len(self.window)
        return (f"Reporting period: {self.period} (window {span}, {n} week{'s' if n != 1 else ''}, "
                f"{self.start} to {self.end}; {self.window_cases:,} cases)")


@dataclass(frozen=True, eq=False)
class PreparedRun:
    """Study, neighbour graph and validated period, as used by both ``check`` and the bulletin."""

    config: object
    study: object
    graph: object
    plan: RunPlan
    warnings: tuple[str, ...] = field(default=())


def _implausible(message: str, mode: str) -> None:
    if mode == "error":
        raise InputError(message + " Correct the input, or set implausible = \"warn\" under [checks] to go on.")
    warnings.warn(message, DataWarning, stacklevel=4)


def resolve_period(study, requested: str | None, config) -> tuple[str, list[str]]:
    """The period key (last week of the window) and the weeks of the window."""
    from .intake import parse_week, weeks_ending

    k = config.period.window_weeks
    wanted = requested if requested is not None else config.period.week
    if not study.weeks or len(study.cases) == 0:
        raise InputError("The cases file has no weeks with data; nothing to report.")
    last_data = str(study.cases["week"].max())
    if wanted in (None, "latest"):
        key = last_data
    else:
        try:
            key = parse_week(wanted)
        except (AreamapError, ValueError):
            raise InputError(
                f"The period {wanted!r} is not an ISO week. Give it as YYYY-Www, e.g. --period 2026-W47."
            ) from None
    if key > last_data:
        raise InputError(
            f"The period {key} is after the last week with case rows ({last_data}); its counts would all be "
            f"zero. Choose a week up to {last_data} (or 'latest'), or add the missing weeks to the cases file."
        )
    if key not in study.weeks:
        raise InputError(
            f"The period {key} is outside the weeks of the cases file ({study.weeks[0]} to {study.weeks[-1]}). "
            "Choose a week within that range (or 'latest')."
        )
    window = list(weeks_ending(key, k))
    if window[0] < study.weeks[0]:
        raise InputError(
            f"The rolling window of {k} weeks ending {key} starts at {window[0]}, before the first week of the "
            f"cases file ({study.weeks[0]}). Choose a later period or a shorter [period] window_weeks."
        )
    return key, window


def _check_weeks(study, config, today: _dt.date) -> None:
    from .intake import week_of

    weeks = np.sort(pd.unique(study.cases["week"].astype(str)))
    if not len(weeks):
        return
    this_week = week_of(today)
    future = [w for w in weeks if w > this_week]
    if future and not config.checks.allow_future_weeks:
        rows = study.cases[study.cases["week"].isin(future)]
        raise InputError(
            f"The cases file has rows for {len(future)} week(s) after the current week {this_week} "
            f"({format_examples(future)}; areas {format_examples(pd.unique(rows['area_id']))}). Such a week "
            "would become the 'latest' period. Correct the dates (often a typo in the year), or set "
            "allow_future_weeks = true under [checks] if they are intended."
        )
    gap_limit = config.checks.max_week_gap
    if gap_limit and len(weeks) > 1:
        mondays = np.array([_dt.date.fromisocalendar(int(w[:4]), int(w[6:]), 1).toordinal() for w in weeks])
        gaps = np.diff(mondays) // 7
        big = np.nonzero(gaps > gap_limit)[0]
        if len(big):
            i = int(big[-1])
            later = list(weeks[i + 1:])
            rows = study.cases[study.cases["week"].isin(later)]
            raise InputError(
                f"The cases file has a gap of {int(gaps[i])} weeks between {weeks[i]} and {weeks[i + 1]}: "
                f"{len(later)} week(s) from {weeks[i + 1]} on lie far beyond the rest of the data "
                f"(areas {format_examples(pd.unique(rows['area_id']))}), probably a typo in the year. Correct "
                f"them, or raise max_week_gap under [checks] (now {gap_limit}; 0 switches the check off)."
            )


def _check_values(study, config) -> None:
    mode = config.checks.implausible
    pop = study.population_matrix()
    huge = pop.index[(pop > MAX_PLAUSIBLE_POPULATION).any(axis=1).to_numpy()]
    if len(huge):
        _implausible(
            f"{len(huge)} district(s) have a population above {MAX_PLAUSIBLE_POPULATION:.0e}, more people than "
            f"live on Earth ({format_examples(huge)}).", mode)
    cases = study.cases
    merged = cases.merge(study.population, on=["area_id", "age_group"], how="left")
    over = merged[merged["cases"] > merged["population"]]
    if len(over):
        keys = pd.unique(over["area_id"] + " " + over["week"]
                         + np.where(over["age_group"] != "all", " " + over["age_group"], ""))
        _implausible(
            f"{len(keys)} (district, week) count(s) exceed the population at risk ({format_examples(keys)}): "
            "check the counts and the population file (units, thousands, swapped columns).", mode)
    rate = merged["cases"] / merged["population"].where(merged["population"] > 0)
    fast = merged[(rate > config.checks.max_weekly_rate) & ~(merged["cases"] > merged["population"])]
    if len(fast):
        keys = pd.unique(fast["area_id"] + " " + fast["week"])
        _implausible(
            f"{len(keys)} (district, week) count(s) mean more than {config.checks.max_weekly_rate:g} cases per "
            f"person in one week ({format_examples(keys)}), far above any usual weekly incidence. Check them, or "
            "raise max_weekly_rate under [checks].", mode)


def validate_run(config, study, graph, *, period: str | None = None, today: _dt.date | None = None) -> RunPlan:
    """Run every check the bulletin needs on a loaded study and its graph.

    Parameters
    ----------
    config : RunConfig
    study : StudyData
        From :func:`~areamap.intake.load_study`.
    graph : AreaGraph
        The neighbour graph of the study's districts.
    period : str, optional
        ISO week or ``"latest"``; default ``[period] week``.
    today : datetime.date, optional
        The day of the run (default: today's date, UTC); weeks after it are
        refused unless ``[checks] allow_future_weeks``.

    Returns
    -------
    RunPlan

    Raises
    ------
    InputError
        With the real cause: no or unknown period, weeks in the future or far
        beyond the data, too few districts, no neighbour links, a window
        without cases, districts without population or expected cases,
        implausible values (with ``[checks] implausible = "error"``).

    Warns
    -----
    DataWarning
        Implausible values (default ``[checks] implausible = "warn"``).
    """
    from .intake import week_bounds

    if today is None:
        today = _dt.datetime.now(_dt.timezone.utc).date()
    elif not isinstance(today, _dt.date):
        raise ParameterError(f"The 'today' parameter of validate_run must be a date. Got {today!r} instead.")
    _check_weeks(study, config, today)
    key, window = resolve_period(study, period, config)
    ids = study.area_ids
    n = len(ids)
    if n < MIN_AREAS:
        raise InputError(
            f"The boundaries have {n} district(s); a bulletin needs at least {MIN_AREAS}, because Moran's I, "
            "local clusters and spatial smoothing compare each district with the others. Use a finer "
            "subdivision or a larger region."
        )
    if int(graph.summary().n_links) == 0:
        raise InputError(
            f"No district has a neighbour in the [graph] method = '{config.graph.method}' graph, so nothing "
            "spatial can be estimated. Use method = 'knn', set islands = 'link', or set snap under [graph] "
            "if the polygons should touch."
        )
    cases = study.case_matrix(weeks=window)
    total = int(cases.to_numpy().sum())
    if total == 0:
        raise InputError(
            f"The reporting window {window[0]}" + (f" to {window[-1]}" if len(window) > 1 else "")
            + f" has no cases in any district (all {n} counts are zero). An all-zero period cannot be mapped; "
            "check that the week's data arrived, or choose another period (--period)."
        )
    pop = study.population_matrix()
    area_pop = pop.sum(axis=1)
    empty = ids[(area_pop <= 0).to_numpy()]
    if len(empty):
        raise InputError(
            f"{len(empty)} district(s) have zero population ({format_examples(empty)}): their expected counts "
            "and ratios are undefined. Give them their population, or remove them from the boundaries file."
        )
    if config.standardization.reference == "external" and study.reference_rates is not None:
        rates = study.reference_rates.reindex(pop.columns).fillna(0).to_numpy(float)
        expected = pop.to_numpy(float) @ rates
        zero = ids[~(expected > 0)]
        if len(zero):
            raise InputError(
                f"{len(zero)} district(s) have an expected count of zero ({format_examples(zero)}) because the "
                "external reference rates are zero for every age group they have people in. Check rates_file."
            )
    _check_values(study, config)
    start = week_bounds(window[0])[0]
    end = week_bounds(window[-1])[1]
    return RunPlan(period=key, window=tuple(window), start=start, end=end, window_cases=total)


def prepare_run(config, *, period: str | None = None, today: _dt.date | None = None) -> PreparedRun:
    """Read the inputs, build the neighbour graph and validate the run (what ``areamap check`` reports).

    Parameters
    ----------
    config : RunConfig or path-like
    period : str, optional
        ISO week or ``"latest"``; default ``[period] week``.
    today : datetime.date, optional
        The day of the run (default today, UTC).

    Returns
    -------
    PreparedRun
    """
    from .graphs import build_graph, read_extra_links
    from .intake import _as_config, load_study

    cfg = _as_config(config)
    study = load_study(cfg)
    g = cfg.graph
    extra = read_extra_links(g.extra_links_file, study.area_ids) if g.extra_links_file is not None else None
    graph = build_graph(study.boundaries, method=g.method, snap=g.snap, k=g.k, distance=g.distance,
                        islands=g.islands, island_k=g.island_k, extra_links=extra, name_column="area_name")
    plan = validate_run(cfg, study, graph, period=period, today=today)
    return PreparedRun(config=cfg, study=study, graph=graph, plan=plan)
