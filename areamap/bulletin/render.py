"""Rendering a bulletin period: figures, the HTML page and the tables.

:func:`render_bulletin` consumes a :class:`~areamap.bulletin.analysis.PeriodAnalysis`
and writes ``index.html``, ``areas.csv``, ``areas.gpkg`` and ``run.json`` into a
folder it is given (the publishing step hands it a private temporary folder).
Counts from 1 to ``suppress_below - 1`` are shown as ``"<suppress_below"`` in
the HTML (and in the tables with ``public=True``).
"""

from __future__ import annotations

import base64
import io
import json
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from ..archive import FlagChanges
from .analysis import (
    _ADJUST_LABEL,
    AREA_COLUMNS,
    KRIGING_COLUMNS,
    FlagRules,
    PeriodAnalysis,
    _fmt_p,
    _fmt_prob,
    _jsonable,
)
from .disclosure import (
    WITHHELD,
    neutralise_formulas,
    public_run_info,
    public_table,
    short_name,
    suppressed_mask,
)

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
    """
    folder = Path(folder)
    cfg = analysis.config
    info = dict(run_info if run_info is not None else analysis.run_info)
    if public:
        info = public_run_info(info)
    info["public"] = public
    timings = info["timings_seconds"] = dict(info.get("timings_seconds", {}))
    t0 = time.perf_counter()
    figures, figure_notes = _figures(analysis.areas, analysis.graph, analysis.local_clusters.to_frame()
                                     .reindex(analysis.areas.index), cfg, analysis.period,
                                     kriging=analysis.kriging, suppress_below=cfg.output.suppress_below)
    timings["figures"] = round(time.perf_counter() - t0, 4)
    if started is not None:
        timings["total"] = round(time.perf_counter() - started, 3)
    _write_tables(analysis.areas, folder, public=public, suppress_below=cfg.output.suppress_below,
                  threshold_differs=analysis.threshold_differs)
    # the page always suppresses small counts, so it shows the public (rounded) region-wide statistics
    page = _render_html(cfg, analysis.areas, analysis.changes, analysis.morans_i, analysis.rules, figures,
                        figure_notes, info if public else public_run_info(info), list(analysis.inputs))
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



# ============================================================================ tables
def _write_tables(areas, folder: Path, *, public: bool, suppress_below: int, threshold_differs: bool) -> None:
    cols = [c for c in AREA_COLUMNS if c != "area_id"]
    if threshold_differs:
        cols.insert(cols.index("p_above_1") + 1, "p_above_threshold")
    if all(c in areas.columns for c in KRIGING_COLUMNS):
        at = cols.index("p_above_threshold" if threshold_differs else "p_above_1") + 1
        cols[at:at] = list(KRIGING_COLUMNS)
    frame = areas[cols + ["geometry"]].copy()
    if public:
        frame = public_table(frame, suppress_below=suppress_below)
    plain = pd.DataFrame(frame.drop(columns="geometry")).reset_index()
    plain["flag"] = plain["flag"].map({True: "true", False: "false"})
    # text that a spreadsheet would run as a formula is neutralised in the CSV (not in the GeoPackage)
    plain = neutralise_formulas(plain)
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
    if suppress_below > 1:
        text = (f"Disclosure: counts from 1 to {suppress_below - 1} are hidden in this page; for those districts "
                "the ratios, model estimates, expected counts and cluster results are withheld too, the raw-ratio "
                "map and the funnel plot leave them out, and the totals exclude them, so that a small count "
                "cannot be recovered by subtraction or by refitting the model. The smoothed-risk maps still show "
                "their risk class. Check local rules before publishing.")
    else:
        text = "Disclosure: no counts are hidden (suppression is switched off). Check local rules before publishing."
    return (*_CAUTIONS, text)


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
        *([] if not cfg.smoothing.kriging else [
            "Kriged relative risks (kriged_rr) come from area-to-area Poisson kriging (Kyriakidis 2004; Goovaerts "
            "2006): a population-weighted semivariogram of the ratios, corrected for Poisson noise (Monestiez et "
            "al. 2006), is fitted by least squares; each district's estimate is a weighted mean of its own ratio "
            f"and those of its {cfg.smoothing.kriging_neighbours} nearest districts, with covariances averaged "
            "over points inside the districts and the Poisson variance of each ratio added to its own term. "
            "Intervals are approximate (normal, from the kriging variance). They are shown beside, not instead "
            "of, the model-based estimates."]),
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
        "expected": WITHHELD if hide else _fmt(row.expected, 1),
        "sir": WITHHELD if hide else _fmt(row.sir),
        "sir_ci": "" if hide else f"({_fmt(row.sir_low)}–{_fmt(row.sir_high)})",
        "rr": WITHHELD if hide else _fmt(row.rr), "rr_ci": "" if hide else f"({_fmt(row.rr_low)}–{_fmt(row.rr_high)})",
        "p_above_1": (WITHHELD if hide else
                      _fmt_prob(row.p_above_1).lstrip("=") if np.isfinite(row.p_above_1) else "n/a"),
        "cluster": WITHHELD if hide else str(row.cluster), "change": str(row.flag_change),
        "weeks_flagged": str(int(row.weeks_flagged)), "flag_reason": WITHHELD if hide else str(row.flag_reason),
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
            **_totals(table, sb),
        },
        "flag_rule_text": rules.describe(adjust=cfg.clusters.adjust, alpha=cfg.clusters.alpha),
        "figures": figures, "figure_notes": figure_notes,
        "flagged_rows": [_row_display(r, sb) for r in flagged.itertuples()],
        "resolved_rows": [{"area_id": str(i), "area_name": str(n)} for i, n in resolved["area_name"].items()],
        "suppress_below": sb,
        "methods": [*_methods(cfg, rules, run_info["period"]["window_weeks"]), _model_sentence(run_info["model"])],
        "references": _REFERENCES + (_KRIGING_REFERENCES if cfg.smoothing.kriging else ()),
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


def _totals(table: pd.DataFrame, suppress_below: int) -> dict:
    """Headline totals without the suppressed districts (a full total minus the shown counts would give
    the sum of the hidden ones)."""
    hide = suppressed_mask(table["observed"], suppress_below)
    shown = table.loc[~hide]
    note = (f" (not counting the {int(hide.sum())} district(s) with fewer than {suppress_below} cases)"
            if hide.any() else "")
    return {"total_observed": f"{int(shown['observed'].sum()):,}",
            "total_expected": f"{shown['expected'].sum():,.1f}" + note}


# ============================================================================ figures
def _plain(text: str) -> str:
    """User text for matplotlib: '$' would start mathtext, so escape it (text is drawn literally)."""
    return str(text).replace("$", r"\$")


def _kriging_figures(add, gdf, kriging, cfg, period_text: str, source) -> None:
    """CAR and Poisson-kriged relative risks side by side, and the risk semivariogram."""
    import matplotlib.pyplot as plt

    from .. import maps
    from ..geostatistics import RiskVariogram, variogram_plot

    car = cfg.smoothing.model.upper()
    fig = maps.raw_beside_smoothed(gdf, "rr", "kriged_rr", titles=(f"{car} relative risk",
                                                                   "Poisson-kriged relative risk"),
                                   period=period_text, source=source)
    add("kriging", fig, "Two smoothers side by side",
        f"Left: relative risk smoothed by the {car} model (neighbours from the graph). Right: relative risk "
        "from area-to-area Poisson kriging (weights from distance, district shape and population through the "
        "risk semivariogram), same classes and colours. Where the two maps disagree, the smoothed picture "
        "depends on the choice of method and neighbours; read such districts with extra care. Flags use the "
        f"{car} estimates only.",
        f"Two maps side by side: {car} relative risks and Poisson-kriged relative risks per district.")
    if isinstance(kriging.variogram, RiskVariogram):
        fig, ax = plt.subplots(figsize=(7.0, 4.5), layout="constrained")
        variogram_plot(kriging.variogram, ax=ax)
        add("semivariogram", fig, "Risk semivariogram",
            "How different the risks of two districts are, by the distance between them, after removing the "
            "variation that Poisson chance alone would give (dots sized by number of pairs), with the fitted "
            f"{kriging.model.model} model used for kriging. A curve that rises and levels off means nearby "
            "districts share risk; a flat curve means kriging has little to borrow.",
            "Scatter of semivariance against distance with a fitted curve.")


def _figures(areas, graph, local, cfg, key: str, *, kriging=None,
             suppress_below: int = 0) -> tuple[list[dict], list[str]]:
    """The bulletin's figures as PNG data URIs, with titles, captions and alt texts.

    Raw ratios of suppressed districts are left out (their map class and funnel position would give the
    count back); names are cut to 40 characters (a very long name must not stretch a figure).
    """
    import matplotlib.pyplot as plt

    from .. import maps

    gdf = areas.copy()
    gdf["area_name"] = gdf["area_name"].map(lambda n: _plain(short_name(n)))
    hide = suppressed_mask(gdf["observed"], suppress_below)
    if hide.any():
        gdf.loc[hide, ["sir", "sir_low", "sir_high"]] = np.nan
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
        fig = maps.raw_beside_smoothed(gdf, "sir", "rr", period=period_text, source=source,
                                       missing_label="withheld (small count)" if hide.any() else "no data")
        add("raw-smoothed", fig, "Raw and smoothed ratios",
            "Left: standardized incidence ratio (observed / expected). Right: relative risk smoothed by the "
            f"{cfg.smoothing.model.upper()} model, same classes and colours. Raw ratios of districts with few "
            "expected cases swing widely; the smoothed map borrows strength from neighbours and the region.",
            "Two maps side by side: raw standardized incidence ratios and smoothed relative risks per district.")

        if kriging is not None:
            _kriging_figures(add, gdf, kriging, cfg, period_text, source)

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
        shown = gdf.loc[~hide]
        maps.funnel_plot(shown["observed"], shown["expected"], labels=shown["area_name"], ax=ax)
        add("funnel", fig, "Funnel plot",
            "Standardized incidence ratio against expected count with 95% and 99.8% exact Poisson control "
            "limits around 1. Points outside the funnel vary more than chance alone would usually give."
            + (f" Districts with 1 to {suppress_below - 1} cases are not shown (small-count suppression)."
               if hide.any() else ""),
            "Scatter plot of standardized ratio against expected count with funnel-shaped control limits.")
    n_islands = int(graph.island_mask().sum())
    if n_islands:
        notes.append(f"{n_islands} district(s) have no neighbours in the graph; they take no part in the "
                     "cluster analysis ('no neighbours').")
    return out, notes
