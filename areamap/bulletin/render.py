"""Rendering a bulletin period: figures, the HTML page and the tables.

:func:`render_bulletin` consumes a :class:`~areamap.bulletin.analysis.PeriodAnalysis`
and writes ``index.html``, ``areas.csv``, ``areas.gpkg`` and ``run.json`` into a
folder it is given (the publishing step hands it a private temporary folder).
Counts from 1 to ``suppress_below - 1`` are shown as ``"<suppress_below"`` in
the HTML (and in the tables with ``public=True``).
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import markupsafe
import numpy as np
import pandas as pd

from .analysis import (
    _ADJUST_LABEL,
    AREA_COLUMNS,
    KRIGING_COLUMNS,
    STANDARDIZED_RATE_COLUMNS,
    FlagRules,
    PeriodAnalysis,
    _fmt_p,
    _fmt_prob,
    _jsonable,
    suppress_counts,
)
from .disclosure import neutralise_formulas, public_run_info, public_table

__all__ = ["render_bulletin"]


def render_bulletin(analysis: PeriodAnalysis, folder: str | Path, *, public: bool = False,
                    run_info: dict | None = None, started: float | None = None) -> dict:
    """Write the bulletin files of an analysed period into ``folder``.

    Parameters
    ----------
    analysis : PeriodAnalysis
    folder : str or Path
        An existing, empty folder (the publishing step gives a temporary one).
    public : bool, default=False
        Suppress small counts in areas.csv / areas.gpkg too, and withhold the
        columns that would give them back.
    run_info : dict, optional
        The provenance record to write as run.json (default the analysis's).
    started : float, optional
        ``time.perf_counter()`` at the start of the whole run; run.json then
        records the total duration up to writing the page.

    Returns
    -------
    dict
        The run.json content written.

    Notes
    -----
    The page answers first: headline and totals, the flagged districts with
    a locator map, the weekly curve, the explorable map, then the maps and
    plots, the files of the run, methods, cautions and provenance. The
    sections are rendered in the order of :data:`SECTIONS`; each is a
    template under ``templates/sections/``. Texts come from the string
    catalogue (:mod:`~areamap.bulletin.wording`) for ``[output] audience``.
    """
    from .wording import load_wording

    folder = Path(folder)
    cfg = analysis.config
    out = cfg.output
    words = load_wording(getattr(out, "audience", "specialist"), date_format=getattr(out, "date_format", "%Y-%m-%d"),
                         strings_file=getattr(out, "strings_file", None))
    info = dict(run_info if run_info is not None else analysis.run_info)
    if public:
        info = public_run_info(info)
    info["public"] = public
    info["audience"] = words.audience
    timings = info["timings_seconds"] = dict(info.get("timings_seconds", {}))
    t0 = time.perf_counter()
    context = _page_context(analysis, words, info)
    timings["figures"] = round(time.perf_counter() - t0, 4)
    if started is not None:
        timings["total"] = round(time.perf_counter() - started, 3)
    context["provenance"]["duration"] = f"{timings.get('total', float('nan')):.1f} s"
    _write_tables(analysis.areas, folder, public=public, suppress_below=cfg.output.suppress_below,
                  threshold_differs=analysis.threshold_differs)
    page = _environment().get_template("bulletin.html").render(**context)
    (folder / "index.html").write_text(page, encoding="utf-8")
    _write_json(folder / "run.json", info)
    return info


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


def _fmt(x: float, digits: int = 2) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{x:.{digits}f}"



# ============================================================================ tables
def _write_tables(areas, folder: Path, *, public: bool, suppress_below: int, threshold_differs: bool) -> None:
    cols = [c for c in AREA_COLUMNS if c != "area_id"]
    if threshold_differs:
        cols.insert(cols.index("p_above_1") + 1, "p_above_threshold")
    if all(c in areas.columns for c in KRIGING_COLUMNS):
        at = cols.index("p_above_threshold" if threshold_differs else "p_above_1") + 1
        cols[at:at] = list(KRIGING_COLUMNS)
    if STANDARDIZED_RATE_COLUMNS[0] in areas.columns:
        at = cols.index("rate_high") + 1
        cols[at:at] = list(STANDARDIZED_RATE_COLUMNS)
    frame = areas[cols + ["geometry"]].copy()
    if public:
        prev = frame["observed_previous"] if "observed_previous" in frame.columns else None
        frame = public_table(frame, suppress_below=suppress_below)
        if prev is not None and suppress_below > 1:
            shown = suppress_counts(prev.fillna(0).astype(np.int64), threshold=suppress_below).to_numpy(object)
            frame["observed_previous"] = np.where(prev.isna(), None, shown)
    plain = pd.DataFrame(frame.drop(columns="geometry")).reset_index()
    for c in ("flag", "emerging", "persistent"):
        plain[c] = plain[c].map({True: "true", False: "false"})
    # text that a spreadsheet would run as a formula is neutralised in the CSV (not in the GeoPackage)
    plain = neutralise_formulas(plain)
    plain.to_csv(folder / "areas.csv", index=False, float_format="%.10g", encoding="utf-8", lineterminator="\n")
    gdf = frame.reset_index()
    gdf.to_file(folder / "areas.gpkg", layer="areas", driver="GPKG")



# ============================================================================ html page
#: The sections of the page, in reading order: (id, template under templates/sections/). To add a
#: section, write its template (it sees the whole page context) and insert its entry here.
SECTIONS: tuple[tuple[str, str], ...] = (
    ("headline", "sections/headline.html"),
    ("flagged", "sections/flagged.html"),
    ("trend", "sections/trend.html"),
    ("explore", "sections/explore.html"),
    ("maps", "sections/maps.html"),
    ("scan", "sections/scan.html"),
    ("files", "sections/files.html"),
    ("methods", "sections/methods.html"),
    ("cautions", "sections/cautions.html"),
    ("provenance", "sections/provenance.html"),
)

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
    "Fay MP, Feuer EJ (1997). Confidence intervals for directly standardized rates: a method based on the gamma "
    "distribution. Statistics in Medicine 16(7):791–801.",
    "Garwood F (1936). Fiducial limits for the Poisson distribution. Biometrika 28(3/4):437–442.",
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

_SCAN_REFERENCES = (
    "Abrams AM, Kleinman K, Kulldorff M (2010). Gumbel based p-value approximations for spatial scan "
    "statistics. International Journal of Health Geographics 9:61.",
    "Kulldorff M (1997). A spatial scan statistic. Communications in Statistics – Theory and Methods "
    "26(6):1481–1496.",
    "Kulldorff M (2001). Prospective time periodic geographical disease surveillance using a scan statistic. "
    "Journal of the Royal Statistical Society A 164(1):61–72.",
)

_KRIGING_REFERENCES = (
    "Goovaerts P (2006). Geostatistical analysis of disease data: accounting for spatial support and population "
    "density in the isopleth mapping of cancer mortality risk using area-to-point Poisson kriging. "
    "International Journal of Health Geographics 5:52.",
    "Kyriakidis PC (2004). A geostatistical framework for area-to-point spatial interpolation. Geographical "
    "Analysis 36(3):259–289.",
    "Monestiez P, Dubroca L, Bonnin E, Durbec JP, Guinet C (2006). Geostatistical modelling of spatial "
    "distribution of Balaenoptera physalus in the Northwestern Mediterranean Sea from sparse count data and "
    "heterogeneous observation efforts. Ecological Modelling 193:615–628.",
)


def _cautions(words, suppress_below: int) -> list[str]:
    hidden = (words("caution_hidden", last=suppress_below - 1) if suppress_below > 1
              else words("caution_hidden_off"))
    return [words(k) for k in ("caution_directive", "caution_small_numbers", "caution_ecological",
                               "caution_intervals", "caution_flags")] + [words("caution_disclosure", hidden=hidden)]


def _moran_sentence(words, statistic: float, expected: float, p: float) -> str:
    if not np.isfinite(p):
        return words("moran_untested")
    if p < 0.05 and statistic > expected:
        return words("moran_positive")
    if p < 0.05:
        return words("moran_negative")
    return words("moran_none")


def _methods(words, cfg, rules: FlagRules, n_window: int, model: dict, has_std: bool, *,
             scan_alpha: float | None = None) -> list[str]:
    st = cfg.standardization
    cl = cfg.clusters
    paras = [
        words("method_rates_sir", n_window=n_window, plural="s" if n_window != 1 else "",
              reference=words(f"method_reference_{st.reference}")),
        words("rates_method", std=words("rates_method_std") if has_std else ""),
        words("totals_method"),
        words("method_eb"),
        words("method_car", model=words(f"method_model_{cfg.smoothing.model}")),
        words("method_moran", perm=cl.permutations, seed=cfg.seed),
        words("method_local", stat=words(f"method_stat_{cl.statistic}"), perm=cl.permutations,
              adjust=words(f"method_adjust_{cl.adjust}"), alpha=f"{cl.alpha:g}"),
        *([_scan_method(cfg)] if scan_alpha is not None else []),
        words("method_flags", rule=rules.describe(adjust=cl.adjust, alpha=cl.alpha, scan_alpha=scan_alpha)),
        *([words("method_kriging", k=cfg.smoothing.kriging_neighbours)] if getattr(cfg.smoothing, "kriging", False)
          else []),
        words("method_funnel"),
    ]
    parts = []
    for name, row in (model.get("hyperparameters") or {}).items():
        if {"mean", "q025", "q975"} <= set(row):
            parts.append(f"{name} {_fmt(row['mean'])} (95% CrI {_fmt(row['q025'])}–{_fmt(row['q975'])})")
    text = words("method_fit", model=str(model.get("model", "")).upper(), parts="; ".join(parts) if parts else "—")
    crit = [f"{k.upper()} {model[k]:.1f}" for k in ("dic", "waic") if isinstance(model.get(k), float)]
    if crit:
        text += "; " + ", ".join(crit) + " (smaller is better when comparing models on the same data)"
    paras.append(text + ".")
    return paras


def _p_relation(p: float) -> str:
    """'= 0.012' or '< 0.001' (a p-value with its relation sign)."""
    text = _fmt_p(p)
    return f"{text[0]} {text[1:]}" if text[:1] in "<>" else f"= {text}"


def _pct(p: float) -> str:
    """A probability as a whole percentage, never 100% below 1 nor 0% above 0."""
    if not np.isfinite(p):
        return "n/a"
    v = 100 * p
    if 99 < v < 100:
        return ">99%"
    if 0 < v < 1:
        return "<1%"
    return f"{v:.0f}%"


def _reason(row, words, rules: FlagRules, adjust: str, p_exceed: float) -> str:
    """The flag reason from the numbers, in the audience's words."""
    met = []
    if rules.forecast_fdr is not None:  # space-time rules: emerging and persistent (newest week)
        if bool(getattr(row, "emerging", False)):
            met.append(words("reason_emerging", q=_p_relation(row.forecast_q)))
        p_week = float(getattr(row, "week_excess_p", np.nan))
        if bool(getattr(row, "persistent", False)):
            shown = p_week if np.isfinite(p_week) else rules.min_probability
            met.append(words("reason_persistent", t=f"{rules.persistent_threshold:g}",
                             p=_fmt_prob(shown).lstrip("="),
                             cut=f"{rules.min_probability:g}", cut_pct=_pct(rules.min_probability),
                             p_pct=_pct(shown)))
    elif np.isfinite(p_exceed) and p_exceed >= rules.min_probability:
        met.append(words("reason_probability", t=f"{rules.threshold:g}", p=_fmt_prob(p_exceed).lstrip("="),
                         cut=f"{rules.min_probability:g}", cut_pct=_pct(rules.min_probability), p_pct=_pct(p_exceed)))
    if rules.use_clusters and str(row.cluster) == "High-High":
        met.append(words("reason_cluster", adjust=_ADJUST_LABEL[adjust], q=_p_relation(row.cluster_p)))
    # the scan rule's reason is kept as the analysis wrote it (zone rank and its p-value)
    met.extend(part for part in str(row.flag_reason).split("; ") if part.startswith("inside significant scan zone"))
    return "; ".join(met) if met else str(row.flag_reason)


def _count_text(x, suppress_below: int) -> str:
    if x is None or not np.isfinite(x):
        return "n/a"
    x = int(x)
    return f"<{suppress_below}" if suppress_below > 1 and 1 <= x < suppress_below else str(x)


def _rate_text(rate, low, high, hidden: bool, words, digits: int = 1) -> tuple[str, str]:
    if hidden:
        return words("withheld"), ""
    return _fmt(rate, digits), f"({_fmt(low, digits)}–{_fmt(high, digits)})"


def _area_rows(table: pd.DataFrame, words, rules: FlagRules, adjust: str, suppress_below: int,
               threshold_differs: bool) -> pd.DataFrame:
    """Display texts per district (suppressed where the page suppresses), one column per field."""
    cluster_names = words.cluster_names()
    status = {"new": words("status_new"), "continuing": words("status_continuing"),
              "resolved": words("status_resolved"), "not flagged": words("status_not_flagged")}
    rows = []
    for r in table.itertuples():
        hide = suppress_below > 1 and 1 <= r.observed < suppress_below
        rate, rate_ci = _rate_text(r.rate_per_100k, r.rate_low, r.rate_high, hide, words)
        p_exceed = r.p_above_threshold if threshold_differs else r.p_above_1
        prev = r.observed_previous
        if prev is None or not np.isfinite(prev):
            change = words("change_unknown")
        else:
            diff = int(r.observed) - int(prev)
            change = words("change_text", sign="+" if diff > 0 else ("−" if diff < 0 else "±"), diff=abs(diff),
                           previous=_count_text(prev, suppress_below))
            if hide or (suppress_below > 1 and 1 <= prev < suppress_below):
                change = words("withheld")
        entry = {
            "area_id": str(r.Index), "area_name": str(r.area_name),
            "observed": _count_text(r.observed, suppress_below),
            "expected": words("withheld") if hide else _fmt(r.expected, 1),
            "rate": rate, "rate_ci": rate_ci,
            "sir": words("withheld") if hide else _fmt(r.sir),
            "sir_ci": "" if hide else f"({_fmt(r.sir_low)}–{_fmt(r.sir_high)})",
            "rr": words("withheld") if hide else _fmt(r.rr),
            "rr_ci": "" if hide else f"({_fmt(r.rr_low)}–{_fmt(r.rr_high)})",
            "prob": words("withheld") if hide else ((_pct(r.p_above_1) if words.public
                                                     else _fmt_prob(r.p_above_1).lstrip("="))
                                                    if np.isfinite(r.p_above_1) else "n/a"),
            "cluster": words("withheld") if hide else cluster_names.get(str(r.cluster), str(r.cluster)),
            "status": status.get(str(r.flag_change), str(r.flag_change)),
            "status_key": str(r.flag_change),
            "weeks_flagged": str(int(r.weeks_flagged)), "change": change,
            "reason": (words("withheld") if hide else _reason(r, words, rules, adjust, p_exceed)) if r.flag else "",
            "flag": words("status_" + ("new" if r.flag_change == "new" else "continuing")) if r.flag else "",
        }
        if "std_rate_per_100k" in table.columns:
            entry["std_rate"], entry["std_rate_ci"] = _rate_text(r.std_rate_per_100k, r.std_rate_low,
                                                                 r.std_rate_high, hide, words)
        rows.append(entry)
    return pd.DataFrame(rows, index=table.index)


def _explorable(analysis, display: pd.DataFrame, words) -> str:
    """The explorable map fragment (inline SVG + plain script); fill = smoothed relative-risk class."""
    from matplotlib.colors import to_hex

    from .._classify import class_colours, classify
    from ..explore import explorable_map

    table = analysis.to_frame()
    cls = classify(table["rr"].to_numpy(float), scheme="relative_risk")
    cols = [to_hex(c) for c in class_colours(cls, "diverging", centre=1.0)]
    fill = [cols[i] if i >= 0 else "#ffffff" for i in cls.class_index]
    legend = [(c, lab) for c, lab in zip(cols, cls.labels)]
    text = pd.DataFrame({
        "observed": display["observed"], "expected": display["expected"],
        "rate": (display["rate"] + " " + display["rate_ci"]).str.strip(),
        "sir": (display["sir"] + " " + display["sir_ci"]).str.strip(),
        "rr": (display["rr"] + " " + display["rr_ci"]).str.strip(), "prob": display["prob"],
        "cluster": display["cluster"], "flag": display["flag"].where(display["flag"] != "", "—"),
    }, index=table.index)
    sort_values = pd.DataFrame({
        "observed": table["observed"].astype(float), "expected": table["expected"],
        "rate": table["rate_per_100k"], "sir": table["sir"], "rr": table["rr"], "prob": table["p_above_1"],
        "cluster": display["cluster"], "flag": display["flag"],
    }, index=table.index)
    hidden = display["observed"].str.startswith("<")
    sort_values.loc[hidden, ["observed", "rate", "sir"]] = np.nan
    columns = [("observed", words("col_observed")), ("expected", words("col_expected")),
               ("rate", words("col_rate")), ("sir", words("col_sir")), ("rr", words("col_rr")),
               ("prob", words("col_prob")), ("cluster", words("col_cluster")), ("flag", words("col_flag"))]
    flagged = table["flag"].to_numpy(bool)
    top = table[flagged].sort_values(["p_above_1", "rr"], ascending=False, kind="stable")
    first = top.index[0] if len(top) else None  # the district of key 1 in the flagged table
    return explorable_map(
        analysis.areas, columns, text=text, sort_values=sort_values, fill=fill, element_id="explore",
        title=words("explore_title"), hint=words("explore_hint"), table_summary=words("explore_table"),
        name_label=words("col_district"), legend=legend, marked=flagged, initial=first)


def _totals(words, totals: dict) -> dict:
    def change(now: float, before: float) -> str:
        if before is None:
            return ""
        if before == 0:
            return "+∞" if now > 0 else "±0%"
        pct = 100 * (now - before) / before
        return f"{'+' if pct > 0 else ('−' if pct < 0 else '±')}{abs(pct):.0f}%"

    cur = totals["current"]
    lines = [words("totals_current", current=f"{cur:,}",
                   rate=_fmt(totals.get("rate_per_100k") if totals.get("rate_per_100k") is not None else np.nan, 1))]
    if totals.get("previous") is not None:
        prev_weeks = totals["previous_weeks"]
        span = prev_weeks[0] if len(prev_weeks) == 1 else f"{prev_weeks[0]} – {prev_weeks[-1]}"
        lines.append(words("totals_previous", weeks=span, previous=f"{totals['previous']:,}",
                           change=change(cur, totals["previous"])))
    else:
        lines.append(words("totals_previous_missing"))
    if totals.get("baseline_mean") is not None:
        lines.append(words("totals_baseline", n=totals["baseline_weeks"], mean=f"{totals['baseline_mean']:,.1f}",
                           change=change(cur, totals["baseline_mean"])))
    return {"lines": lines, **totals}


def _page_context(analysis: PeriodAnalysis, words, run_info: dict) -> dict:
    """Everything the page template needs (figures drawn here)."""
    from .page_figures import bulletin_figures, locator_figure, trend_figure

    cfg = analysis.config
    changes, moran, rules = analysis.changes, analysis.morans_i, analysis.rules
    counts = changes.counts
    table = analysis.to_frame()
    sb = cfg.output.suppress_below
    display = _area_rows(table, words, rules, cfg.clusters.adjust, sb, analysis.threshold_differs)
    flagged = table[table["flag"]].sort_values(["p_above_1", "rr"], ascending=False, kind="stable")
    flagged_rows = [{**display.loc[i].to_dict(), "key": str(k + 1)} for k, i in enumerate(flagged.index)]
    resolved = table[table["flag_change"] == "resolved"]
    figures, figure_notes = bulletin_figures(analysis, words)
    if analysis.spacetime_fit is not None:
        figures.extend(_spacetime_figures(analysis))
    scan = _scan_section(analysis)
    if scan is not None and scan["figure"] is not None:
        figures.append(scan["figure"])
    scan_alpha = cfg.scan.alpha if scan is not None and scan["ran"] else None
    locator, _ = locator_figure(analysis, flagged, words)
    trend = trend_figure(analysis, words)
    period = run_info["period"]
    n_window = period["window_weeks"]
    window = words("window_rolling", n=n_window) if n_window > 1 else words("window_one")
    n_flagged = counts["total"]
    cluster_rule = words.cluster_rule() if rules.use_clusters else ""
    per_period = getattr(cfg.output, "per_period", False)
    return {
        "t": words, "lang": "en",
        "sections": [{"id": sid, "template": tpl} for sid, tpl in SECTIONS],
        "title": cfg.title, "region": cfg.region, "data_source": cfg.data_source,
        "period": {"key": period["key"], "start": words.date(period["start"]), "end": words.date(period["end"]),
                   "window_weeks": n_window,
                   "line": words("period_line", key=period["key"], start=words.date(period["start"]),
                                 end=words.date(period["end"]), window=window)},
        "headline": {
            "flagged_text": words("headline_flagged" if len(table) != 1 else "headline_flagged_one",
                                  n=n_flagged, total=len(table)),
            "n_flagged": n_flagged, "n_areas": len(table),
            "n_new": counts["new"], "n_continuing": counts["continuing"], "n_resolved": counts["resolved"],
            "previous_period": changes.previous_period, "previous_available": changes.previous_available,
            "kinds": run_info["flags"].get("kinds"),
            "spacetime": _spacetime_headline(run_info.get("spacetime")),
            "moran_text": words("moran_line", i=f"{moran.statistic:.3f}", e=f"{moran.expected:.3f}",
                                p=_p_relation(moran.p_permutation), perm=moran.permutations,
                                sentence=_moran_sentence(words, moran.statistic, moran.expected,
                                                         moran.p_permutation)),
        },
        "totals": _totals(words, run_info.get("totals") or analysis.run_info.get("totals", {})),
        "scan": scan,
        "flag_rule_text": words("flag_rule", rule=rules.describe(adjust=cfg.clusters.adjust, alpha=cfg.clusters.alpha,
                                                                 scan_alpha=scan_alpha),
                                cut_pct=_pct(rules.min_probability), cluster=cluster_rule),
        "flagged_rows": flagged_rows,
        "has_std_rate": "std_rate_per_100k" in table.columns,
        "locator": locator,
        "trend": trend,
        "explore_html": markupsafe.Markup(_explorable(analysis, display, words)),
        "figures": figures, "figure_notes": figure_notes,
        "resolved_rows": [{"area_id": str(i), "area_name": str(n)} for i, n in resolved["area_name"].items()],
        "suppress_below": sb,
        "files": [{"href": "areas.csv", "text": words("file_csv")}, {"href": "areas.gpkg", "text": words("file_gpkg")},
                  {"href": "run.json", "text": words("file_json")}],
        "latest_href": "../latest.html" if per_period else None,
        "methods": _methods(words, cfg, rules, n_window, run_info["model"], "std_rate_per_100k" in table.columns,
                            scan_alpha=scan_alpha) + _spacetime_method(cfg),
        "references": _REFERENCES + (_KRIGING_REFERENCES if getattr(cfg.smoothing, "kriging", False) else ())
        + (_SCAN_REFERENCES if scan_alpha is not None else ())
        + (_SPACETIME_REFERENCES if analysis.spacetime_fit is not None else ()),
        "cautions": _cautions(words, sb),
        "provenance": {
            "version": run_info["version"], "run_time": run_info["run_time"].replace("+00:00", " UTC"),
            "duration": "", "seed": cfg.seed,
            "config": str(cfg.path.name) if cfg.path is not None else "(built in code)",
            "series": getattr(cfg.output, "series", "") or "",
            "inputs": list(analysis.inputs),
        },
        "run_notes": [*run_info.get("notes", []), *run_info.get("warnings", [])],
    }


# ============================================================================ scan statistic
def _scan_method(cfg) -> str:
    sc = cfg.scan
    shape = ("circles around each district's centroid" if sc.zones == "circle"
             else "connected groups of districts grown through the neighbour graph, nearest district first")
    what = {"high": "raised", "low": "lowered", "both": "raised or lowered"}[sc.direction]
    text = (f"The Poisson scan statistic (Kulldorff 1997) compares every candidate zone ({shape}, holding at most "
            f"{sc.max_share:.0%} of the population) with the rest of the region and keeps the zone of {what} risk "
            "with the largest likelihood ratio (the most likely cluster), then secondary zones that do not overlap "
            f"it. Its p-value comes from {sc.replicates} Monte Carlo replicates of the cases redistributed over the "
            f"districts under no cluster (seed {cfg.seed}), so it already accounts for having looked at every zone; "
            "a Gumbel approximation (Abrams et al. 2010) gives p-values below 1/(replicates + 1).")
    if sc.kind == "prospective":
        base = ("each district's share of the earlier weeks' cases" if sc.baseline == "history"
                else "the expected counts")
        text += (f" Prospective form (Kulldorff 2001): zones are cylinders covering the last 1 to {sc.max_weeks} "
                 f"weeks up to this week, judged against {base}; only clusters still going on are found. Run "
                 "weekly, about one in 20 weeks gives p < 0.05 by chance.")
    return text


def _scan_section(analysis) -> dict | None:
    """Context of the scan section (zone table rows, figure), or None when the scan is switched off."""
    from .page_figures import _map_figure, _plain, figure_entry

    cfg = analysis.config
    if not cfg.scan.enabled:
        return None
    note = analysis.run_info.get("scan", {}).get("note")
    res = analysis.scan
    if res is None:
        return {"ran": False, "note": note, "rows": [], "figure": None, "kind": cfg.scan.kind}
    sb = cfg.output.suppress_below
    frame = res.to_frame()
    names = analysis.areas["area_name"].astype(str)
    rows = []
    for rank, z in frame[frame["significant"]].iterrows():
        obs = int(z.observed)
        hide = sb > 1 and 1 <= obs < sb
        member_names = [names.get(m, str(m)) for m in z.members]
        rows.append({
            "rank": str(rank), "centre": names.get(z.centre, str(z.centre)), "n_districts": str(int(z.n_districts)),
            "members": ", ".join(member_names[:12]) + (f" and {len(member_names) - 12} more"
                                                       if len(member_names) > 12 else ""),
            "weeks": f"{z.first_week} to {z.last_week}" if res.kind == "space-time" else "",
            "observed": f"<{sb}" if hide else str(obs), "expected": _fmt(z.expected, 1),
            "ratio_inside": "withheld" if hide else _fmt(z.ratio_inside),
            "llr": _fmt(z.llr), "p_value": _fmt_p(z.p_value),
            "p_gumbel": "n/a" if not np.isfinite(z.p_gumbel) else (f"{z.p_gumbel:.2g}" if z.p_gumbel >= 1e-12
                                                                    else "<1e-12"),
        })
    figure = None
    if len(res.llr):
        from ..scan import scan_map

        gdf = analysis.areas.copy()
        gdf["area_name"] = gdf["area_name"].astype(str).map(_plain)
        fig, ax = _map_figure(gdf)
        scan_map(gdf, res, ax=ax, period=analysis.period,
                 source=_plain(cfg.data_source) if cfg.data_source else None)
        span = f"the last 1 to {cfg.scan.max_weeks} weeks" if res.kind == "space-time" else "the window"
        top = frame.loc[1]
        finding = (f"Zone 1, the most likely cluster: {int(top.n_districts)} district(s) around "
                   f"{names.get(top.centre, str(top.centre))}, Monte Carlo p {_fmt_p(top.p_value)}; "
                   f"{int(res.significant.sum())} zone(s) with p < {cfg.scan.alpha:g}.")
        figure = figure_entry(
            fig, "scan", "Scan statistic zones",
            f"Observed / expected ratio over {span}, with the zones found by the scan statistic outlined and "
            f"numbered by rank: solid black when p < {cfg.scan.alpha:g}, dashed grey otherwise. A zone's edge comes "
            "from the candidate shapes, not from the cluster itself.",
            "Map of observed to expected ratios with the scan statistic zones outlined. " + finding)
    return {"ran": True, "note": note, "rows": rows, "figure": figure, "kind": res.kind,
            "n_zones": len(res.llr), "n_significant": int(res.significant.sum()), "alpha": cfg.scan.alpha,
            "replicates": cfg.scan.replicates, "min_p": _fmt_p(1 / (cfg.scan.replicates + 1))}


# ============================================================================ space-time model
_SPACETIME_REFERENCES = (
    "Knorr-Held L (2000). Bayesian modelling of inseparable space-time variation in disease risk. Statistics in "
    "Medicine 19:2555-2567.",
)


def _spacetime_method(cfg) -> list[str]:
    """The methods paragraph of the space-time model (empty when it is switched off)."""
    st = cfg.spacetime
    if not st.enabled:
        return []
    return [
        f"Space-time model (when at least {st.min_weeks} weeks of data exist): weekly counts of the last {st.weeks} "
        "weeks, with expected counts from indirect standardization over that whole window, are fitted by a "
        "Poisson model whose log relative risk is the sum of a BYM2 district effect (each district's persistent "
        f"level), a {st.trend.upper()} random walk over weeks (the regional trend) and an independent "
        "district-week term (Knorr-Held 2000, type I). The model is fitted a second time without the newest "
        "week's counts; each district's newest count is compared with that forecast by its upper-tail predictive "
        f"mid-p value, with Benjamini–Hochberg control of the false-discovery rate at {st.forecast_fdr:g} "
        "('emerging'). 'Persistent' uses the newest week's relative risk from the fit with all weeks."]


def _spacetime_headline(info: dict | None) -> str:
    """One sentence on the space-time model for the headline (fitted or why not)."""
    if not info:
        return ""
    if not info.get("fitted"):
        return str(info.get("note") or "")
    tr = info["regional_trend"]
    first, last = tr[0], tr[-1]
    return (f"Space-time model over {len(info['weeks'])} weeks ({info['weeks'][0]} to {info['weeks'][-1]}): the "
            f"regional trend's relative risk went from {first['trend_rr']:.2f} to {last['trend_rr']:.2f} "
            f"(newest week 95% interval {last['trend_rr_low']:.2f} to {last['trend_rr_high']:.2f}).")


def _spacetime_figures(analysis) -> list[dict]:
    """The regional weekly curve and small multiples of the flagged districts (space-time model)."""
    import matplotlib.pyplot as plt

    from .. import trendplots
    from .page_figures import _plain, figure_entry

    fit, areas = analysis.spacetime_fit, analysis.areas
    out = []
    fig, ax = plt.subplots(figsize=(8.0, 4.0), layout="constrained")
    trendplots.plot_regional_trend(fit, ax=ax)
    out.append(figure_entry(
        fig, "regional-trend", "Cases per week and the regional trend",
        f"Observed cases per week over the last {len(fit.weeks)} weeks in the whole region (dots) with the "
        f"space-time model's regional trend ({fit.trend.upper()} random walk) and its 95% interval, on the scale "
        "of cases (expected cases times the regional relative risk).",
        "Line chart of weekly case totals with a smooth trend line and a shaded band."))
    flagged = areas[areas["flag"]]
    order = flagged.assign(_e=flagged["emerging"].astype(int)).sort_values(
        ["_e", "week_p_above_1"], ascending=False, kind="stable")
    ids = list(order.index[:12])
    if not ids:
        return out
    names = {k: _plain(v) for k, v in areas["area_name"].items()}
    fig = trendplots.plot_district_trends(fit, ids, names=names)
    more = f" (the first 12 of {len(order)})" if len(order) > 12 else ""
    out.append(figure_entry(
        fig, "district-trends", "Flagged districts week by week",
        f"Weekly counts of the flagged districts{more}, emerging ones first, against the model's 95% band "
        "(expected count times relative risk); for the newest week also the forecast from the district's "
        "own past, its neighbours and the regional trend (orange, 95% interval). A count above the orange "
        "interval is what the 'emerging' rule detects. Counts are drawn unsuppressed: check disclosure rules "
        "before publishing districts with few cases.",
        "Grid of small line charts, one per flagged district, of weekly counts with a shaded model band."))
    return out
