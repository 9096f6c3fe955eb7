"""Disclosure control of public outputs: what a public file shows for a district with a small count.

The rule (documented in the user guide, "Disclosure rule for public outputs"):

1. A count from 1 to ``suppress_below - 1`` is shown as ``"<suppress_below"``;
   zero stays 0.
2. For such a *suppressed district*, every column listed in
   :data:`DISCLOSING_COLUMNS` -- anything computed from its own count, or
   from totals that include it -- is withheld: numbers are blank, text reads
   ``"withheld"``. Only the band of the estimate remains visible (the colour
   class on the maps and the flag).
3. Every other district's ratios and probabilities are published to one
   decimal (:data:`PUBLIC_DECIMALS`), so that the small influence of a
   neighbour's suppressed count on them is rounded away (at two decimals
   the refit attack on the demo still picked the right count above chance).
4. Totals are never published with the suppressed counts in them: the public
   HTML headline gives the total of the shown counts and says how many
   districts are left out; expected counts of suppressed districts are
   withheld, so ``sum(expected) - sum(observed)`` cannot be formed; run.json
   of a public run rounds the region-wide statistics (Moran's I, the
   empirical-Bayes prior, the CAR hyperparameters) and leaves out the fit
   criteria (DIC, WAIC, marginal likelihood), which move with every count.
5. Text cells of public and internal CSV tables that a spreadsheet would run
   as a formula are neutralised (:func:`neutralise_formulas`).

Other bulletin sections that add per-district columns computed from the
counts add their names to :data:`DISCLOSING_COLUMNS` (and a precision to
:data:`PUBLIC_DECIMALS`); the rule is then applied to them everywhere a
public table is written.
"""

from __future__ import annotations

import copy
import math

import numpy as np
import pandas as pd

__all__ = [
    "DISCLOSING_COLUMNS",
    "PUBLIC_DECIMALS",
    "WITHHELD",
    "suppressed_mask",
    "public_table",
    "public_run_info",
    "neutralise_formulas",
    "short_name",
    "public_analysis",
]

#: Per-district columns withheld for suppressed districts in every public output: each is computed from
#: the district's own count (or, for ``expected`` under internal standardization, from a total that contains
#: it) and would give the count back, exactly or by refitting the published model.
DISCLOSING_COLUMNS = (
    "expected", "rate_per_100k", "rate_low", "rate_high", "std_rate_per_100k", "std_rate_low", "std_rate_high",
    "sir", "sir_low", "sir_high", "eb_rr", "rr", "rr_low", "rr_high", "p_above_1",
    "p_above_threshold", "kriged_rr", "kriged_rr_low", "kriged_rr_high", "cluster", "cluster_p", "scan_zone", "scan_p", "flag_reason",
    # space-time model (newest week): withheld when the window's count or the newest week's count is suppressed
    "week_observed", "week_expected", "week_rr", "week_rr_low", "week_rr_high", "week_p_above_1", "level_rr",
    "level_rr_low", "level_rr_high", "level_p_exceed", "week_excess_p", "forecast_mean", "forecast_low", "forecast_high",
    "forecast_midp", "forecast_q",
)

#: The space-time columns, also withheld when the newest week's own count (``week_observed``) is suppressed.
_WEEK_COLUMNS = DISCLOSING_COLUMNS[DISCLOSING_COLUMNS.index("week_observed"):]

#: Decimals of public numeric columns (all districts): coarse enough that a neighbour's suppressed count
#: does not show in the last digit (see tests/test_disclosure.py for the refit attack on the demo).
PUBLIC_DECIMALS = {
    "expected": 1, "rate_per_100k": 1, "rate_low": 1, "rate_high": 1, "std_rate_per_100k": 1, "std_rate_low": 1,
    "std_rate_high": 1, "population": 0, "sir": 1, "sir_low": 1, "sir_high": 1, "eb_rr": 1, "rr": 1, "rr_low": 1,
    "rr_high": 1, "p_above_1": 1, "p_above_threshold": 1, "kriged_rr": 1, "kriged_rr_low": 1,
    "kriged_rr_high": 1, "cluster_p": 2, "scan_p": 2,
    "week_expected": 1, "week_rr": 1, "week_rr_low": 1, "week_rr_high": 1, "week_p_above_1": 1, "level_rr": 1,
    "level_rr_low": 1, "level_rr_high": 1, "level_p_exceed": 1, "week_excess_p": 1, "forecast_mean": 1, "forecast_midp": 2, "forecast_q": 2,
}

#: Text shown in place of a withheld text value.
WITHHELD = "withheld"

#: First characters that make a spreadsheet treat a cell as a formula (OWASP "CSV injection"; common practice).
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def suppressed_mask(observed, suppress_below: int) -> np.ndarray:
    """True where a count is suppressed (1 to ``suppress_below - 1``)."""
    values = np.asarray(observed, dtype=float)
    return (values >= 1) & (values < suppress_below) if suppress_below > 1 else np.zeros(len(values), bool)


def public_table(frame: pd.DataFrame, *, suppress_below: int) -> pd.DataFrame:
    """The public version of a per-district table (observed as text, disclosing columns withheld, rounded).

    Parameters
    ----------
    frame : pandas.DataFrame
        Unsuppressed per-district table with an ``observed`` column (other
        columns, e.g. geometry, pass through).
    suppress_below : int
        Counts from 1 to ``suppress_below - 1`` are suppressed (0 or 1: none).

    Returns
    -------
    pandas.DataFrame
        A copy, same index and columns.

    Examples
    --------
    >>> t = pd.DataFrame({"observed": [0, 3, 12], "rr": [0.81234, 1.3, 1.55555], "cluster": ["a", "b", "c"]})
    >>> p = public_table(t, suppress_below=5)
    >>> p["observed"].tolist(), p["rr"].tolist(), p["cluster"].tolist()
    (['0', '<5', '12'], [0.8, nan, 1.6], ['a', 'withheld', 'c'])
    """
    from .analysis import suppress_counts

    out = frame.copy()
    hide = suppressed_mask(out["observed"], suppress_below)
    if "week_observed" in out.columns:
        week = out["week_observed"].to_numpy(float)
        hide_week = suppressed_mask(np.nan_to_num(week, nan=0.0), suppress_below)
        for c in _WEEK_COLUMNS:
            if c in out.columns and hide_week.any():
                out[c] = out[c].astype(float)
                out.loc[hide_week, c] = np.nan
        if suppress_below > 1:
            shown = suppress_counts(np.nan_to_num(week, nan=0.0), threshold=suppress_below).to_numpy(object)
            out["week_observed"] = np.where(np.isnan(week), None, shown)
    for c, digits in PUBLIC_DECIMALS.items():
        if c in out.columns:
            out[c] = np.round(out[c].to_numpy(float), digits)
    for c in DISCLOSING_COLUMNS:
        if c not in out.columns or not hide.any():
            continue
        if pd.api.types.is_numeric_dtype(out[c]) and not pd.api.types.is_bool_dtype(out[c]):
            out[c] = out[c].astype(float)
            out.loc[hide, c] = np.nan
        else:
            out[c] = out[c].astype(object)
            out.loc[hide, c] = WITHHELD
    if suppress_below > 1:
        out["observed"] = suppress_counts(out["observed"], threshold=suppress_below).to_numpy(object)
    return out


def _round_floats(obj, digits: int):
    if isinstance(obj, dict):
        return {k: _round_floats(v, digits) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_round_floats(v, digits) for v in obj]
    if isinstance(obj, float) and math.isfinite(obj):
        return round(obj, digits)
    return obj


def public_run_info(info: dict) -> dict:
    """run.json of a public run: region-wide statistics rounded, fit criteria left out."""
    out = copy.deepcopy(info)
    if isinstance(out.get("morans_i"), dict):
        out["morans_i"] = _round_floats(out["morans_i"], 3)
    if isinstance(out.get("empirical_bayes"), dict):
        out["empirical_bayes"] = _round_floats(out["empirical_bayes"], 2)
    model = out.get("model")
    if isinstance(model, dict):
        for k in ("dic", "waic", "log_marginal_likelihood", "effective_parameters"):
            model.pop(k, None)
        for k in ("hyperparameters", "coefficients", "fraction_spatial"):
            if k in model:
                model[k] = _round_floats(model[k], 2)
    if isinstance(out.get("kriging"), dict):
        out["kriging"] = _round_floats(out["kriging"], 2)
    out["disclosure"] = ("public: counts below suppress_below shown as '<suppress_below'; their districts' "
                         "model outputs and expected counts withheld; other outputs rounded; fit criteria left out")
    return out


def neutralise_formulas(frame: pd.DataFrame) -> pd.DataFrame:
    """Prefix text cells that a spreadsheet would evaluate (``=``, ``+``, ``-``, ``@``...) with a single quote.

    Common practice against formula injection in CSV files (OWASP): the quote makes a spreadsheet show the
    text instead of running it. Numbers are never changed; only object (text) columns are.

    Examples
    --------
    >>> neutralise_formulas(pd.DataFrame({"name": ["=HYPERLINK(1)", "Ashby", "-2+3"]}))["name"].tolist()
    ["'=HYPERLINK(1)", 'Ashby', "'-2+3"]
    """
    out = frame.copy()
    for c in out.columns:
        if out[c].dtype == object or pd.api.types.is_string_dtype(out[c]):
            out[c] = out[c].map(lambda v: "'" + v if isinstance(v, str) and v.startswith(_FORMULA_START) else v)
    return out


def short_name(name: object, limit: int = 40) -> str:
    """A name cut to ``limit`` characters for figures and terminal lines (tables keep the full name)."""
    text = "" if name is None else str(name)
    return text if len(text) <= limit else text[: limit - 1] + "…"


# --------------------------------------------------------------------------- the public analysis
def _strip_numbers(reason: object) -> str:
    """A flag reason without the exact probabilities and p-values (they come from the full data)."""
    import re

    text = "" if reason is None else str(reason)
    text = re.sub(r"(P\(RR>[^)]*\))(?:[=<>]+[0-9.]+)", r"\1", text)
    return re.sub(r"\(([^()=]+)=[<>]?[0-9.]+\)", r"(\1)", text)


def _public_totals(table: pd.DataFrame, totals: dict, population: np.ndarray, suppress_below: int) -> dict:
    """Period totals over the districts whose current and previous counts are both shown (nothing hidden is
    summed, so no hidden count can be had by subtraction); no baseline (it sums every district's weeks)."""
    now = table["observed"].to_numpy(float)
    prev = (table["observed_previous"].to_numpy(float) if "observed_previous" in table.columns
            else np.full(len(table), np.nan))
    keep = ~suppressed_mask(now, suppress_below) & ~suppressed_mask(np.nan_to_num(prev), suppress_below)
    pop = float(np.nansum(population[keep]))
    current = int(now[keep].sum())
    have_previous = totals.get("previous") is not None
    return {
        **totals, "current": current,
        "previous": int(np.nansum(prev[keep])) if have_previous else None,
        "baseline_mean": None, "baseline_weeks": 0, "population": pop,
        "rate_per_100k": 1e5 * current / pop if pop > 0 else None,
        "districts_left_out": int((~keep).sum()),
    }


def public_analysis(analysis, *, today=None):
    """The analysis as published by a public run: every number computed without the suppressed counts.

    Rounding alone cannot protect a suppressed count from a reader who knows (or guesses well) every other
    count: a refit shows which value reproduces the rounded outputs. So a public run publishes estimates
    that do not depend on the suppressed counts at all:

    * expected counts from reference rates of the districts whose counts are shown (internal
      standardization; external rates do not depend on the counts);
    * each suppressed count replaced by its public expected count, rounded and kept within 1 to
      ``suppress_below - 1`` (a neutral value: it carries no information about the real count);
    * ratios, empirical-Bayes and CAR estimates, Moran's I and local clusters recomputed from these
      public counts (same model, priors, permutations and seed).

    Flags, new/continuing/resolved and periods flagged stay those of the full analysis (the official
    flags, also in the archive); a flag is a band, not a count. Flag reasons lose their exact numbers.

    Parameters
    ----------
    analysis : PeriodAnalysis
    today : datetime.date, optional
        Passed to the input checks when the study is read again.

    Returns
    -------
    PeriodAnalysis
        A copy whose per-district table, Moran's I, local clusters, empirical-Bayes and CAR fits and
        run_info are the public ones (``observed`` keeps the real counts; rendering suppresses them).
    """
    import dataclasses

    from ..autocorrelation import rate_local_clusters, rate_morans_i
    from ..models import fit_car
    from ..rates import standardized_ratio
    from ..smoothing import poisson_gamma_eb
    from ..validation import prepare_run
    from .analysis import _covariates, _jsonable, _kriged_columns, _kriging, _model_summary, _priors, _set_estimates

    cfg = analysis.config
    sb = cfg.output.suppress_below
    areas = analysis.areas
    ids = areas.index
    hide = suppressed_mask(areas["observed"], sb)
    if not hide.any():
        return analysis
    prepared = prepare_run(cfg, period=analysis.period, today=today)
    study = prepared.study
    pop = study.population_matrix().reindex(index=ids)
    if cfg.standardization.reference == "internal":
        cases = study.case_matrix(weeks=list(analysis.weeks)).reindex(index=ids, fill_value=0)
        shown_cases = cases.loc[~hide].sum(axis=0).to_numpy(float)
        shown_pop = pop.loc[~hide].sum(axis=0).to_numpy(float)
        rates = np.divide(shown_cases, shown_pop, out=np.zeros_like(shown_cases), where=shown_pop > 0)
        expected = pop.to_numpy(float) @ rates
    else:
        expected = areas["expected"].to_numpy(float)
    if not (expected > 0).all():  # a district whose age groups have no shown cases: fall back to the crude rate
        crude = areas.loc[~hide, "observed"].sum() / pop.loc[~hide].to_numpy(float).sum()
        expected = np.where(expected > 0, expected, pop.to_numpy(float).sum(axis=1) * crude)
    observed = areas["observed"].to_numpy(np.int64).copy()
    observed[hide] = np.clip(np.rint(expected[hide]), 1, sb - 1).astype(np.int64)
    obs = pd.Series(observed, index=ids)
    exp = pd.Series(expected, index=ids)
    threshold = cfg.smoothing.threshold
    sr = standardized_ratio(obs, exp).to_frame()
    eb = poisson_gamma_eb(obs, exp, threshold=threshold)
    covariates = _covariates(study.boundaries, cfg.smoothing.covariates) if cfg.smoothing.covariates else None
    car = fit_car(obs, exp, analysis.graph, model=cfg.smoothing.model, covariates=covariates, priors=_priors(cfg),
                  threshold=threshold)
    car_frame = car.to_frame().reindex(ids)
    cl = cfg.clusters
    moran = rate_morans_i(obs, exp, analysis.graph, permutations=cl.permutations, seed=cfg.seed)
    local = rate_local_clusters(obs, exp, analysis.graph, statistic=cl.statistic, permutations=cl.permutations,
                                seed=cfg.seed, adjust=cl.adjust, alpha=cl.alpha)
    local_frame = local.to_frame().reindex(ids)

    table = areas.copy()
    table["expected"] = expected
    _set_estimates(table, sr, eb, car_frame, local_frame, threshold_differs="p_above_threshold" in table.columns)
    table["flag_reason"] = table["flag_reason"].map(_strip_numbers)
    kriging = getattr(analysis, "kriging", None)
    if cfg.smoothing.kriging:
        kriging, kriging_info = _kriging(cfg, obs, exp, study.boundaries.reindex(ids))
        for col, values in _kriged_columns(kriging, len(ids)).items():
            table[col] = values

    info = copy.deepcopy(analysis.run_info)
    info["morans_i"] = {**info.get("morans_i", {}), "statistic": moran.statistic, "expected": moran.expected,
                        "p_value": moran.p_permutation, "z_randomization": moran.z_randomization,
                        "p_randomization": moran.p_randomization}
    info["local_clusters"] = {**info.get("local_clusters", {}),
                              "counts": {k: int(v) for k, v in table["cluster"].value_counts().items()}}
    info["empirical_bayes"] = {"prior_mean": eb.prior_mean, "prior_shape": eb.prior_shape}
    info["model"] = _model_summary(car, cfg)
    if cfg.smoothing.kriging:
        info["kriging"] = kriging_info
    # a file hash would let a reader test each possible value of a hidden count against the cases file
    info["inputs"] = [{"role": h.get("role"), "name": h.get("name"), "sha256": "withheld in public outputs"}
                      for h in info.get("inputs", [])]
    info["totals"] = _public_totals(table, info.get("totals") or {}, pop.to_numpy(float).sum(axis=1), sb)
    info = _jsonable(public_run_info(info))
    return dataclasses.replace(
        analysis, areas=table, morans_i=moran, local_clusters=local, empirical_bayes=eb, car_fit=car,
        inputs=tuple(info["inputs"]), run_info=info, **({"kriging": kriging} if hasattr(analysis, "kriging") else {}),
        # the regional weekly curve ends in a total that contains the suppressed counts: not published
        **({"weekly": None} if hasattr(analysis, "weekly") else {}))
