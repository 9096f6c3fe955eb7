"""The space-time step of a bulletin period: weekly tables, the fit, and its per-district columns.

Used by :func:`areamap.bulletin.analysis.analyse_period`. The model itself lives in
:mod:`areamap.spacetime`; this module only prepares its inputs from the study (counts per
district and week over the trailing ``[spacetime] weeks``; expected counts by indirect
standardization over that whole window, so a region-wide rise shows in the trend) and
turns the fit into the columns of areas.csv.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

#: Columns the space-time model adds to the per-district table (NaN / False when it was not fitted).
SPACETIME_COLUMNS = (
    "week_observed", "week_expected", "week_rr", "week_rr_low", "week_rr_high", "week_p_above_1",
    "level_rr", "level_rr_low", "level_rr_high", "level_p_exceed", "week_excess_p", "forecast_mean", "forecast_low", "forecast_high",
    "forecast_midp", "forecast_q", "emerging", "persistent",
)

#: Of those, the columns that give back (or nearly give back) a small newest-week count.
WEEK_DISCLOSING_COLUMNS = ("forecast_midp", "forecast_q")


def spacetime_weeks(cfg, study, key: str) -> list[str]:
    """The trailing weeks of the space-time window that lie within the cases file."""
    from ..intake import weeks_ending

    return [w for w in weeks_ending(key, cfg.spacetime.weeks) if w >= study.weeks[0]]


def weekly_tables(cfg, study, weeks, ids, reference_rates) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Counts and expected counts per district (rows, ``ids`` order) and week (columns)."""
    from ..rates import expected_counts

    counts = study.weekly_cases().reindex(index=ids, columns=weeks, fill_value=0).fillna(0)
    pop = study.population_matrix().reindex(index=ids)
    if reference_rates is None:
        # indirect standardization over the whole window; the population is the same every week
        window = study.case_matrix(weeks=weeks).reindex(index=ids, fill_value=0)
        per_week = np.asarray(expected_counts(window, pop), dtype=float) / len(weeks)
    else:  # external rates are per person per week
        window = study.case_matrix(weeks=weeks).reindex(index=ids, fill_value=0)
        per_week = np.asarray(expected_counts(window, pop, reference_rates=reference_rates), dtype=float)
    expected = pd.DataFrame(np.repeat(per_week[:, None], len(weeks), axis=1), index=ids, columns=weeks)
    return counts.astype(float), expected


def fit_for_period(cfg, study, key, ids, graph, reference_rates):
    """(fit or None, weeks, note): the space-time fit of the period, or why it was not made."""
    from ..spacetime import SpaceTimePriors, fit_spacetime

    st = cfg.spacetime
    if not st.enabled:
        return None, [], "The space-time model is switched off ([spacetime] enabled = false)."
    weeks = spacetime_weeks(cfg, study, key)
    if len(weeks) < st.min_weeks:
        return None, weeks, (
            f"Only {len(weeks)} week(s) of data up to {key} (the space-time model needs [spacetime] min_weeks = "
            f"{st.min_weeks}): flags use the model of the summed window only, and no district is checked "
            "against its own forecast.")
    counts, expected = weekly_tables(cfg, study, weeks, ids, reference_rates)
    p = cfg.smoothing.priors
    priors = SpaceTimePriors(sigma_upper=p.sigma_upper, sigma_tail=p.sigma_tail, phi_upper=p.phi_upper,
                             phi_tail=p.phi_tail, intercept_sd=p.intercept_sd, coefficient_sd=p.coefficient_sd)
    fit = fit_spacetime(counts, expected, graph, trend=st.trend, threshold=cfg.smoothing.threshold,
                        forecast_window=st.forecast_window, fdr=st.forecast_fdr, persistent_probability=cfg.flags.min_probability,
                        persistent_threshold=cfg.flags.persistent_threshold, priors=priors)
    return fit, weeks, None


def columns(fit, ids) -> pd.DataFrame:
    """The :data:`SPACETIME_COLUMNS` of each district (``ids`` order); empty values without a fit."""
    n = len(ids)
    if fit is None:
        out = pd.DataFrame({c: np.full(n, np.nan) for c in SPACETIME_COLUMNS}, index=ids)
        out["emerging"] = False
        out["persistent"] = False
        return out
    f = fit.to_frame().reindex(ids)
    out = pd.DataFrame({
        "week_observed": f["observed"].to_numpy(float),
        "week_expected": f["expected"].to_numpy(float),
        "week_rr": f["rr_mean"].to_numpy(float),
        "week_rr_low": f["rr_low"].to_numpy(float),
        "week_rr_high": f["rr_high"].to_numpy(float),
        "week_p_above_1": f["p_above_1"].to_numpy(float),
        "level_rr": f["level"].to_numpy(float),
        "level_rr_low": f["level_low"].to_numpy(float),
        "level_rr_high": f["level_high"].to_numpy(float),
        "level_p_exceed": f["level_p_exceed"].to_numpy(float),
        "week_excess_p": f["week_excess_p"].to_numpy(float),
        "forecast_mean": f["forecast_mean"].to_numpy(float),
        "forecast_low": f["forecast_low"].to_numpy(float),
        "forecast_high": f["forecast_high"].to_numpy(float),
        "forecast_midp": f["forecast_midp"].to_numpy(float),
        "forecast_q": f["forecast_q"].to_numpy(float),
        "emerging": f["emerging"].to_numpy(bool),
        "persistent": f["persistent"].to_numpy(bool),
    }, index=ids)
    # the persistent rule reads the newest week's risk against the region's level in that week
    out.attrs["p_exceed"] = f["week_excess_p"].to_numpy(float)
    # the forecast window behind each district's p-value (1 = newest week, k = sum of the last k weeks)
    out.attrs["forecast_window"] = f["forecast_window"].to_numpy(np.int64)
    out.attrs["forecast_window_midp"] = f["forecast_window_midp"].to_numpy(float)
    return out


def run_info(fit, weeks, note) -> dict:
    """The run.json entry of the space-time step."""
    if fit is None:
        return {"fitted": False, "weeks": list(weeks), "note": note}
    import json

    wk = fit.week_table()
    return {
        "fitted": True,
        "weeks": [str(w) for w in fit.weeks],
        "trend": fit.trend,
        "forecast_fdr": fit.fdr,
        "forecast_window": fit.forecast_window,
        "persistent_probability": fit.persistent_probability,
        "persistent_threshold": fit.persistent_threshold,
        "hyperparameters": json.loads(fit.hyperparameters.to_json(orient="index")),
        "regional_trend": [
            {"week": str(w), "observed": float(r.observed), "expected": float(r.expected),
             "trend_rr": float(r.trend_rr), "trend_rr_low": float(r.trend_rr_low),
             "trend_rr_high": float(r.trend_rr_high)}
            for w, r in wk.iterrows()
        ],
        "n_emerging": int(fit.emerging.sum()),
        "n_persistent": int(fit.persistent.sum()),
        "n_design_points": fit.n_design_points,
        "notes": list(fit.notes),
    }
