"""The bulletin's string catalogue: every text a reader sees, in one place.

:data:`STRINGS` holds the texts for specialist readers; :data:`PUBLIC`
replaces the ones that use statistical notation (P(RR>1), CrI, FDR q) with
plain words for a public audience (``[output] audience = "public"``); the exact
figures stay in the tables. A unit can translate or reword any text with a
TOML file of ``key = "text"`` lines (``[output] strings_file``); placeholders
in braces (``{n}``) are filled in (a text may leave one out, not add one). Dates are written with ``[output]
date_format`` (ISO 8601, ``%Y-%m-%d``, by default).
"""

from __future__ import annotations

import datetime as _dt
import string
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import ConfigError, ParameterError

__all__ = ["AUDIENCES", "PUBLIC", "STRINGS", "Wording", "load_wording"]

AUDIENCES = ("specialist", "public")

#: Texts for specialist readers (the default), keyed by a stable name.
STRINGS: dict[str, str] = {
    # page frame
    "period_line": "period {key} ({start} to {end}{window})",
    "window_rolling": ", rolling window of the last {n} weeks",
    "window_one": ", one week",
    "data_line": "Data: {source}",
    "produced_line": "Produced {time} with areamap {version}. An analytic aid, not a public-health directive.",
    "footer": "{title} · {region} · {key} · areamap {version}.",
    # headline
    "headline_title": "Headline",
    "headline_flagged": "{n} of {total} districts flagged this period.",
    "headline_flagged_one": "{n} of {total} district flagged this period.",
    "changes_available": "Since the previous period ({previous}):",
    "changes_missing": "Since the previous period — {previous} is not in the archive, so every flag counts as new:",
    "changes_counts": "{new} new, {continuing} continuing, {resolved} resolved.",
    "totals_current": "Cases this period: {current} ({rate} per 100,000 people).",
    "totals_previous": "Previous period ({weeks}): {previous} cases ({change}).",
    "totals_previous_missing": "The weeks before this period are not in the input, so there is no comparison.",
    "totals_baseline": "Average of the {n} weeks before, for a period of the same length: {mean} cases ({change}).",
    "moran_line": ("Global Moran's I of the empirical-Bayes standardized ratios: {i} (expected {e} under no "
                   "spatial pattern; permutation p {p}, {perm} permutations). {sentence}"),
    "moran_positive": ("Neighbouring districts tend to have similar ratios (positive spatial autocorrelation): "
                       "cases are not spread independently over the map."),
    "moran_negative": "Neighbouring districts tend to differ from each other (negative spatial autocorrelation).",
    "moran_none": ("No clear evidence that neighbouring districts resemble each other more than chance alone "
                   "would give (p >= 0.05); this does not rule out local clusters."),
    "moran_untested": "No permutation test was run.",
    "flag_rule": "Flag rule: {rule}",
    # flagged table
    "flagged_title": "Flagged districts",
    "flagged_none": "No district met the flag rule this period.",
    "col_key": "Key",
    "col_district": "District",
    "col_reason": "Reason",
    "col_status": "Status",
    "col_weeks": "Weeks in a row",
    "col_observed": "Observed",
    "col_expected": "Expected",
    "col_rate": "Rate per 100,000",
    "col_std_rate": "Age-standardized rate per 100,000",
    "col_rr": "Smoothed RR (95% CrI)",
    "col_sir": "SIR (95% CI)",
    "col_prob": "P(RR>1)",
    "col_cluster": "Local pattern",
    "col_change": "Change since previous period",
    "col_flag": "Flag",
    "status_new": "new",
    "status_continuing": "continuing",
    "status_resolved": "resolved",
    "status_not_flagged": "not flagged",
    "change_text": "{sign}{diff} (from {previous})",
    "change_unknown": "n/a",
    "resolved_title": "Resolved since {previous}",
    "resolved_text": "Flagged in the previous period, not flagged now:",
    "suppression_note": ('Counts from 1 to {last} are shown as "<{limit}"; the rates and the SIR of those districts '
                         "are withheld (with the population or expected count they would reveal the count). Zero is "
                         "shown as 0. Totals, figures and other tables are not adjusted (no complementary "
                         "suppression), so a determined reader may still back-calculate a small count."),
    "suppression_off": "No counts are suppressed in this bulletin ([output] suppress_below = {limit}).",
    "locator_title": "Where the flagged districts are",
    "locator_alt": "Map of the region with the {n} flagged districts shaded and labelled: {names}.",
    "locator_caption": "Flagged districts shaded and labelled{keys}.",
    "locator_keys": " by their key in the table",
    "reason_probability": "P(RR>{t}) = {p} ≥ {cut}",
    "reason_cluster": "High-High cluster ({adjust} {q})",
    "reason_persistent": "persistent: P(RR/region>{t}) = {p} ≥ {cut} in the newest week",
    "reason_emerging": "emerging: newest week above its forecast (FDR q {q})",
    "withheld": "withheld",
    "cluster_high_high": "high, in a high group",
    "cluster_low_low": "low, in a low group",
    "cluster_high_low": "high, neighbours low",
    "cluster_low_high": "low, neighbours high",
    "cluster_not_significant": "no local pattern",
    "cluster_no_neighbours": "not assessed (no neighbours)",
    # trend
    "trend_title": "Cases per week in the region",
    "trend_caption": ("Cases reported per ISO week in the whole region, {first} to {last}; the analysed period is "
                      "shaded. The right-hand axis gives the weekly rate per 100,000 people (population taken as "
                      "constant). Recent weeks may still rise with late reports."),
    "trend_alt": ("Bar chart of weekly cases in the region over {n} weeks, {first} to {last}; this period ({period}) "
                  "had {current} cases, highest week {max_week} with {max_cases}."),
    "trend_cases_axis": "cases per week",
    "trend_rate_axis": "per 100,000 per week",
    "trend_current": "this period",
    # explorable map
    "explore_title": "Explore the districts",
    "explore_hint": ("Point at, tap or move with the Tab key to a district to see its numbers. "
                     "The table below lists every district and sorts by any column."),
    "explore_table": "All districts (table, sortable)",
    "explore_fill_legend": "Fill: smoothed relative risk class; thick outline: flagged.",
    # figures
    "figures_title": "Maps and plots",
    "fig_raw_title": "Raw and smoothed ratios",
    "fig_raw_caption": ("Left: standardized incidence ratio (observed / expected). Right: relative risk smoothed by "
                        "the {model} model, same classes and colours. Raw ratios of districts with few expected "
                        "cases swing widely; the smoothed map borrows strength from neighbours and the region."),
    "fig_raw_alt": ("Two maps side by side: raw standardized incidence ratios and smoothed relative risks. "
                    "{n_high} of {n} districts have a smoothed relative risk above 1.1 ({where}); raw ratios "
                    "range from {sir_min} to {sir_max}, smoothed risks from {rr_min} to {rr_max}."),
    "fig_kriging_title": "Two smoothers side by side",
    "fig_kriging_caption": ("Left: relative risk smoothed by the {model} model (neighbours from the graph). Right: "
                            "relative risk from area-to-area Poisson kriging (weights from distance, district shape "
                            "and population through the risk semivariogram), same classes and colours. Where the two "
                            "maps disagree, the smoothed picture depends on the choice of method and neighbours; read "
                            "such districts with extra care. Flags use the {model} estimates only."),
    "fig_kriging_alt": ("Two maps side by side: {model} relative risks and Poisson-kriged relative risks. "
                        "{n_differ} of {n} districts fall in different risk classes on the two maps ({where})."),
    "fig_kriging_left": "{model} relative risk",
    "fig_kriging_right": "Poisson-kriged relative risk",
    "fig_variogram_title": "Risk semivariogram",
    "fig_variogram_caption": ("How different the risks of two districts are, by the distance between them, after "
                              "removing the variation that Poisson chance alone would give (dots sized by number of "
                              "pairs), with the fitted {curve} model used for kriging. A curve that rises and levels "
                              "off means nearby districts share risk; a flat curve means kriging has little to "
                              "borrow."),
    "fig_variogram_alt": ("Scatter of semivariance against distance between districts with the fitted {curve} "
                          "curve."),
    "method_kriging": ("Kriged relative risks (kriged_rr) come from area-to-area Poisson kriging (Kyriakidis 2004; "
                       "Goovaerts 2006): a population-weighted semivariogram of the ratios, corrected for Poisson "
                       "noise (Monestiez et al. 2006), is fitted by least squares; each district's estimate is a "
                       "weighted mean of its own ratio and those of its {k} nearest districts, with covariances "
                       "averaged over points inside the districts and the Poisson variance of each ratio added to "
                       "its own term. Intervals are approximate (normal, from the kriging variance). They are shown "
                       "beside, not instead of, the model-based estimates."),
    "fig_prob_title": "Uncertainty: probability of raised risk",
    "fig_prob_caption": ("Posterior probability that a district's relative risk exceeds 1. Above 0.8: good "
                         "evidence of raised risk; below 0.2: good evidence of lowered risk; in between: the data "
                         "cannot tell (decision bands of Richardson et al. 2004)."),
    "fig_prob_alt": ("Map of the probability of raised risk: {n_high} of {n} districts above 0.8 ({where}), "
                     "{n_low} below 0.2, {n_mid} in between."),
    "fig_biv_title": "Risk and certainty together",
    "fig_biv_caption": ("Each district's smoothed relative risk class (below 0.9, 0.9 to 1.1, above 1.1) crossed "
                        "with how sure the model is that its risk exceeds 1 (below 0.2, 0.2 to 0.8, above 0.8). "
                        "Every uncertain district (0.2 to 0.8) is pale, whatever its risk; saturated colours mark "
                        "clear signals: orange raised, blue lowered, darker for larger estimates."),
    "fig_biv_alt": ("Map crossing risk with certainty: {n_uncertain} of {n} districts are uncertain (pale); "
                    "{n_raised} show a clear raised risk ({where}) and {n_lowered} a clear lowered risk."),
    "fig_clusters_title": "Local clusters",
    "fig_clusters_caption": ("Significant local clusters ({stat}, {perm} conditional permutations, {adjust} "
                             "adjustment at {alpha}). Solid orange: a high district among high neighbours; solid "
                             "blue: low among low; hatched outlines: a district unlike its neighbours (outlier)."),
    "fig_clusters_alt": ("Map of local patterns: {n_hh} districts in high groups ({where}), {n_ll} in low groups, "
                         "{n_out} outliers, {n_ns} without a local pattern."),
    "fig_funnel_title": "Funnel plot",
    "fig_funnel_caption": ("Standardized incidence ratio against expected count with 95% and 99.8% exact Poisson "
                           "control limits around 1. Points outside the funnel vary more than chance alone would "
                           "usually give."),
    "fig_funnel_alt": ("Funnel plot of {n} districts: {n_out95} outside the 95% limits and {n_out998} outside the "
                       "99.8% limits ({where})."),
    "where_none": "none",
    "where_more": "{names} and {k} more",
    "islands_note": ("{n} district(s) have no neighbours in the graph; they take no part in the cluster analysis "
                     "('no neighbours')."),
    # files
    "files_title": "Files of this run",
    "files_intro": "The numbers of this page as files, in the same folder as this page:",
    "file_csv": "areas.csv — one row per district (open with a spreadsheet)",
    "file_gpkg": "areas.gpkg — the same table with the district boundaries (GIS)",
    "file_json": "run.json — settings, inputs with checksums, and run details",
    "latest_link": "All periods and the latest bulletin",
    # methods / cautions / provenance
    "methods_title": "Methods",
    "references_title": "References",
    "cautions_title": "Cautions",
    "provenance_title": "Provenance",
    "prov_version": "areamap version",
    "prov_run_time": "Run time (UTC)",
    "prov_duration": "Run duration",
    "prov_seed": "Random seed",
    "prov_config": "Configuration",
    "prov_series": "Series",
    "prov_notes": "Notes from this run",
    "totals_method": ("Totals: the page compares the region's cases this period with the period of the same "
                      "length just before and with the average of up to 52 weeks before. The sum of expected "
                      "counts is not shown as a comparison: with internal standardization it equals the observed "
                      "total by construction."),
    "rates_method": ("Rates per 100,000 are cases in the period divided by the population, times 100,000, with "
                     "exact Poisson 95% limits (Garwood 1936){std}. Crude rates mix age structure with risk; "
                     "compare districts with the ratios or the age-standardized rates."),
    "rates_method_std": ("; age-standardized rates weight the age-specific rates by the standard population, with "
                         "Fay-Feuer gamma 95% limits (Fay & Feuer 1997)"),
    "method_rates_sir": ("Cases are summed over the analysed window ({n_window} week{plural}). Expected counts "
                         "come from indirect standardization: each district's population by age group times "
                         "{reference}. The standardized incidence ratio (SIR) is observed / expected, with exact "
                         "Poisson 95% confidence limits (Breslow & Day 1987)."),
    "method_reference_internal": "the age-specific rates of the whole region over the same weeks (internal reference)",
    "method_reference_external": ("the external reference rates of the configuration, multiplied by the number of "
                                  "weeks in the window"),
    "method_eb": ("Empirical-Bayes ratios (eb_rr) shrink each SIR towards the regional mean with a Poisson–gamma "
                  "model whose prior is estimated from all districts (Clayton & Kaldor 1987): the fewer expected "
                  "cases, the stronger the shrinkage."),
    "method_car": ("Smoothed relative risks (rr) are posterior means from the {model}, fitted to the observed counts "
                   "with the expected counts as offsets and penalised-complexity priors on the variance and mixing "
                   "parameters. The map of uncertainty shows the posterior probability that a district's relative "
                   "risk exceeds 1."),
    "method_model_bym2": ("BYM2 (Riebler et al. 2016), a reparameterised Besag–York–Mollié model whose mixing "
                          "parameter is the fraction of the variation that is spatially structured"),
    "method_model_leroux": "Leroux et al. (2000) conditional autoregressive model",
    "method_model_icar": "intrinsic conditional autoregressive (Besag et al. 1991) model",
    "method_moran": ("Global spatial autocorrelation is measured by Moran's I (Moran 1950) of the empirical-Bayes "
                     "standardized ratios of Assunção & Reis (1999), with expected counts as denominators so that "
                     "age structure is taken into account; its p-value comes from {perm} random permutations "
                     "(seed {seed})."),
    "method_local": ("Local clusters are found with {stat} on the same standardized ratios, with "
                     "conditional-permutation p-values ({perm} permutations) adjusted by {adjust} at level {alpha}. "
                     "The published quadrant terms are High-High (a high value among high neighbours), Low-Low, "
                     "High-Low and Low-High (outliers: a value unlike its neighbours); the map and the tables name "
                     "them 'high, in a high group', 'low, in a low group', 'high, neighbours low' and 'low, "
                     "neighbours high'. Districts without neighbours are labelled 'no neighbours'."),
    "method_stat_local_moran": "local Moran's I (Anselin 1995)",
    "method_stat_gi_star": "the Getis–Ord Gi* statistic (Ord & Getis 1995)",
    "method_adjust_fdr": "the Benjamini–Hochberg false-discovery-rate procedure (Benjamini & Hochberg 1995)",
    "method_adjust_bonferroni": "a Bonferroni correction",
    "method_adjust_none": "no multiple-testing adjustment",
    "method_flags": ("Flag rule: {rule} The probability cut-off follows Richardson et al. (2004). Each flagged "
                     "district's reason lists the rules it met; 'new', 'continuing' and 'resolved' compare with the "
                     "previous week in the history archive, and 'weeks in a row' counts consecutive flagged "
                     "periods. The archive records the window, model and flag rule of every period; a run with "
                     "other settings starts a new named series instead of comparing unlike periods."),
    "method_funnel": ("The funnel plot (Spiegelhalter 2005) shows each district's SIR against its expected count "
                      "with 95% and 99.8% control limits around 1; points outside the funnel are more extreme than "
                      "chance variation would usually give."),
    "method_fit": "This period's {model} fit: {parts}",
    "caution_directive": ("This bulletin is an analytic aid, not a public-health directive. Decisions about any "
                          "response rest with the responsible health authority and follow local rules and "
                          "procedures."),
    "caution_small_numbers": ("Small numbers: a district with few expected cases can show a very high or very low "
                              "ratio or rate by chance alone. Read the smoothed relative risks and their intervals "
                              "rather than the raw ratios, and treat a single week's flag with care."),
    "caution_ecological": ("Ecological fallacy: results describe districts as a whole. They do not say anything "
                           "about the risk of any individual living there, and associations between districts need "
                           "not hold for people."),
    "caution_intervals": ("Interval meaning: a 95% interval (or credible interval) and a posterior probability such "
                          "as P(RR>1) express uncertainty under the model's assumptions; they are not certainties. "
                          "With many districts, some will exceed any threshold by chance."),
    "caution_flags": ("Flags follow an explicit, configurable rule and are a prompt to look more closely (data "
                      "quality, reporting delays, known outbreaks, population changes), not a finding in "
                      "themselves."),
    "caution_disclosure": ("Disclosure: {hidden}, but totals, maps, the weekly curve and the funnel plot are not "
                           "adjusted (no complementary suppression), so small counts may still be approximately "
                           "recoverable. Check local rules before publishing."),
    "caution_hidden": "counts from 1 to {last} are hidden in this page",
    "caution_hidden_off": "no counts are hidden (suppression is switched off)",
}

#: Plain-word replacements for a public audience.
PUBLIC: dict[str, str] = {
    "col_rr": "Estimated risk compared with the region (range)",
    "col_sir": "Observed / expected",
    "col_prob": "Chance that risk is raised",
    "col_weeks": "Weeks flagged in a row",
    "reason_probability": "likely raised: at least {cut_pct} probability ({p_pct})",
    "reason_cluster": "part of a group of districts with high rates",
    "reason_persistent": "likely raised: at least {cut_pct} probability ({p_pct}) above the region this week",
    "reason_emerging": "more cases this week than its recent weeks and its neighbours led us to expect",
    "moran_line": "{sentence}",
    "moran_positive": "Districts next to each other tend to have similar rates: cases are not spread evenly.",
    "moran_negative": "Districts next to each other tend to have different rates.",
    "moran_none": "Districts next to each other are not more alike than chance would give.",
    "flag_rule": "A district is flagged when its risk is likely raised (at least {cut_pct} probability){cluster}.",
    "fig_prob_caption": ("How likely it is that a district's risk is higher than the regional average. Above 80%: "
                         "likely raised; below 20%: likely lowered; in between: the data cannot tell."),
    "fig_biv_caption": ("Colour shows both the estimated risk and how sure the estimate is. Pale districts are "
                        "uncertain, whatever their risk; strong orange means clearly raised, strong blue clearly "
                        "lowered."),
    "fig_clusters_caption": ("Groups of neighbouring districts with high (orange) or low (blue) rates; hatched "
                             "outlines mark a district unlike its neighbours."),
    "caution_intervals": ("Ranges and chances express uncertainty: a range shows where the true risk probably "
                          "lies, and a chance of 80% still leaves 1 in 5 that the risk is not raised. With many "
                          "districts, some will look raised by chance."),
}

_PUBLIC_CLUSTER_RULE = " or it belongs to a group of neighbouring districts with high rates"


@dataclass(frozen=True)
class Wording:
    """Texts for one audience, with the date format.

    Examples
    --------
    >>> w = load_wording("public")
    >>> w.text("col_prob")
    'Chance that risk is raised'
    >>> w.date("2026-11-16")
    '2026-11-16'
    """

    audience: str = "specialist"
    date_format: str = "%Y-%m-%d"
    texts: Mapping[str, str] = field(default_factory=dict, repr=False)

    @property
    def public(self) -> bool:
        return self.audience == "public"

    def text(self, key: str, /, **values) -> str:
        """The text of ``key`` with its placeholders filled in."""
        try:
            template = self.texts[key]
        except KeyError:
            raise ParameterError(f"The string catalogue has no text {key!r}.") from None
        return template.format(**values) if values else template

    __call__ = text

    def date(self, day) -> str:
        """A date (``date`` or ISO string) in the configured format."""
        d = _dt.date.fromisoformat(day) if isinstance(day, str) else day
        return d.strftime(self.date_format)

    def cluster_rule(self) -> str:
        return _PUBLIC_CLUSTER_RULE

    def cluster_names(self) -> dict[str, str]:
        """Names of the local-cluster categories (keys: the published quadrant terms of the data)."""
        from ..autocorrelation import CLUSTER_LABELS

        return {c: self.text("cluster_" + c.lower().replace("-", "_").replace(" ", "_")) for c in CLUSTER_LABELS}


def _fields(template: str) -> set[str]:
    return {f for _, f, _, _ in string.Formatter().parse(template) if f}


def load_wording(audience: str = "specialist", *, date_format: str = "%Y-%m-%d",
                 strings_file: str | Path | None = None) -> Wording:
    """The catalogue for ``audience`` with the overrides of ``strings_file`` applied.

    Parameters
    ----------
    audience : {"specialist", "public"}, default="specialist"
    date_format : str, default="%Y-%m-%d"
        strftime format of the dates on the page.
    strings_file : str or Path, optional
        TOML file of ``key = "text"`` overrides (top-level keys).

    Raises
    ------
    ConfigError
        Unknown keys in the strings file, values that are not strings, or a
        text that drops or adds a placeholder.
    """
    if audience not in AUDIENCES:
        raise ParameterError(
            f"The 'audience' parameter of load_wording must be one of 'specialist', 'public'. Got {audience!r} instead."
        )
    texts = dict(STRINGS)
    if audience == "public":
        texts.update(PUBLIC)
    if strings_file is not None:
        path = Path(strings_file)
        try:
            with open(path, "rb") as fh:
                extra = tomllib.load(fh)
        except OSError as exc:
            raise ConfigError(f"Cannot read the strings file {path}: {exc.strerror}.") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"The strings file {path} is not valid TOML: {exc}.") from None
        unknown = sorted(set(extra) - set(STRINGS))
        if unknown:
            raise ConfigError(
                f"The strings file {path} has unknown key(s) {', '.join(unknown[:5])}"
                f"{' ...' if len(unknown) > 5 else ''}. Use the keys of areamap.bulletin.wording.STRINGS."
            )
        for k, v in extra.items():
            if not isinstance(v, str):
                raise ConfigError(f"Key '{k}' in the strings file {path} must be a string. Got {v!r} instead.")
            allowed = _fields(STRINGS[k]) | _fields(PUBLIC.get(k, ""))
            if not _fields(v) <= allowed:
                raise ConfigError(
                    f"Key '{k}' in the strings file {path} may only use the placeholders "
                    f"{', '.join('{' + f + '}' for f in sorted(allowed)) or '(none)'}. Got {v!r} instead."
                )
        texts.update(extra)
    return Wording(audience=audience, date_format=date_format, texts=texts)
