"""The figures of a bulletin page, drawn at the size they are shown, with alt texts that state findings.

Every figure is drawn at most about 7.2 inches wide and saved as PNG at
1.5 times 96 dpi; the ``<img>`` gets width and height in CSS pixels (96 per inch),
so it is shown at its drawn size on a screen and fits an A4 print column
(about 700 CSS px) with little or no shrinking. With the smallest text at
7.5 pt (10 CSS px) that keeps every label at 9 px or more. Each entry records
its smallest text size so the browser test can check the displayed size.
"""

from __future__ import annotations

import base64
import io
import warnings

import numpy as np
import pandas as pd

from .wording import Wording

__all__: list[str] = []

#: Output resolution: 1.5 image pixels per CSS pixel (sharp on most high-density screens, half the bytes of 2x).
_DPI = 144
_CSS_PER_INCH = 96
_MAP_WIDTH_IN = 7.0


def _plain(text: str) -> str:
    """User text for matplotlib: '$' would start mathtext, so escape it (text is drawn literally)."""
    return str(text).replace("$", r"\$")


def _smallest_text_pt(fig) -> float:
    """Smallest font size (pt) of the visible, non-empty texts of a drawn figure."""
    from matplotlib.text import Text

    sizes = [t.get_fontsize() for t in fig.findobj(Text) if t.get_visible() and t.get_text().strip()]
    return float(min(sizes)) if sizes else float("nan")


def figure_entry(fig, fig_id: str, title: str, caption: str, alt: str) -> dict:
    """Save ``fig`` as a PNG data URI (then close it) and describe it for the page template."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    try:
        fig.savefig(buf, format="png", dpi=_DPI, bbox_inches="tight", pad_inches=0.06, facecolor="white",
                    metadata={"Software": None})
        smallest = _smallest_text_pt(fig)  # after savefig: tick labels exist only once drawn
    finally:
        plt.close(fig)
    data = buf.getvalue()
    # PNG IHDR: width and height are big-endian uint32 at bytes 16-24 (PNG spec, section 11.2.2)
    width = int.from_bytes(data[16:20], "big")
    height = int.from_bytes(data[20:24], "big")
    scale = _CSS_PER_INCH / _DPI
    return {"id": fig_id, "src": "data:image/png;base64," + base64.b64encode(data).decode("ascii"),
            "width": int(round(width * scale)), "height": int(round(height * scale)),
            "natural_width": width, "min_text_pt": round(smallest, 2), "px_per_pt": _DPI / 72, "title": title, "caption": caption,
            "alt": alt}


def _where(names: pd.Series, values: pd.Series, mask: np.ndarray, words: Wording, *, largest: bool = True,
           k: int = 3) -> str:
    """'A, B, C and 4 more' for the masked districts, ordered by value."""
    sel = values[mask].sort_values(ascending=not largest, kind="stable")
    if sel.empty:
        return words("where_none")
    shown = ", ".join(str(names[i]) for i in sel.index[:k])
    return shown if len(sel) <= k else words("where_more", names=shown, k=len(sel) - k)


def _map_figure(gdf, *, legend_room: float = 2.2):
    import matplotlib.pyplot as plt

    from ..maps import _map_aspect

    h = float(np.clip((_MAP_WIDTH_IN - legend_room) * _map_aspect(gdf) + 1.3, 3.2, 8.5))
    return plt.subplots(figsize=(_MAP_WIDTH_IN, h), layout="constrained")


def bulletin_figures(analysis, words: Wording) -> tuple[list[dict], list[str]]:
    """The maps and plots of the page (after the flagged table), with captions and finding alt texts."""
    import matplotlib.pyplot as plt

    from .. import maps
    from ..maps import _map_aspect

    cfg = analysis.config
    from .disclosure import short_name, suppressed_mask

    gdf = analysis.areas.copy()
    names = gdf["area_name"].astype(str)
    # names cut to 40 characters: a very long name must not stretch a figure (tables keep the full name)
    gdf["area_name"] = names.map(lambda t: _plain(short_name(t)))
    # raw ratios of suppressed districts would give their counts back (map class, funnel position)
    hide = suppressed_mask(gdf["observed"], cfg.output.suppress_below)
    if hide.any():
        gdf.loc[hide, ["sir", "sir_low", "sir_high"]] = np.nan
    source = _plain(cfg.data_source) if cfg.data_source else None
    period_text = (f"{analysis.period} ({words.date(analysis.period_start)} – "
                   f"{words.date(analysis.period_end)})")
    n = len(gdf)
    out: list[dict] = []
    notes: list[str] = []
    rr, sir, p = gdf["rr"], gdf["sir"], gdf["p_above_1"]
    cluster_names = words.cluster_names()

    with warnings.catch_warnings():
        # figure-level notes (e.g. areas left out) are repeated in the captions drawn by the maps
        warnings.simplefilter("ignore", UserWarning)
        h = float(np.clip(3.0 * _map_aspect(gdf) + 1.9, 3.4, 7.5))
        fig = maps.raw_beside_smoothed(gdf, "sir", "rr", period=period_text, source=source,
                                       figsize=(_MAP_WIDTH_IN + 0.2, h))
        high = (rr > 1.1).to_numpy()
        out.append(figure_entry(
            fig, "raw-smoothed", words("fig_raw_title"),
            words("fig_raw_caption", model=cfg.smoothing.model.upper()),
            words("fig_raw_alt", n_high=int(high.sum()), n=n, where=_where(names, rr, high, words),
                  sir_min=f"{np.nanmin(sir):.2f}", sir_max=f"{np.nanmax(sir):.2f}",
                  rr_min=f"{np.nanmin(rr):.2f}", rr_max=f"{np.nanmax(rr):.2f}")))

        if getattr(analysis, "kriging", None) is not None:
            out.extend(_kriging_figures(analysis, gdf, names, words, period_text, source))

        fig, ax = _map_figure(gdf)
        maps.exceedance_map(gdf, "p_above_1", threshold=1.0, ax=ax, period=period_text, source=source)
        hi, lo = (p > 0.8).to_numpy(), (p < 0.2).to_numpy()
        out.append(figure_entry(
            fig, "uncertainty", words("fig_prob_title"), words("fig_prob_caption"),
            words("fig_prob_alt", n_high=int(hi.sum()), n=n, where=_where(names, p, hi, words),
                  n_low=int(lo.sum()), n_mid=int(n - hi.sum() - lo.sum()))))

        fig, ax = _map_figure(gdf)
        maps.bivariate_map(gdf, "rr", "p_above_1", ax=ax, period=period_text, source=source)
        raised = hi & (rr > 1.1).to_numpy()
        lowered = lo & (rr <= 0.9).to_numpy()
        uncertain = ~(hi | lo)
        out.append(figure_entry(
            fig, "risk-and-certainty", words("fig_biv_title"), words("fig_biv_caption"),
            words("fig_biv_alt", n_uncertain=int(uncertain.sum()), n=n, n_raised=int(raised.sum()),
                  where=_where(names, rr, raised, words), n_lowered=int(lowered.sum()))))

        fig, ax = _map_figure(gdf, legend_room=2.6)
        maps.cluster_map(gdf, "cluster", ax=ax, period=period_text, source=source, names=cluster_names)
        cl = gdf["cluster"].astype(str)
        hh = (cl == "High-High").to_numpy()
        stat = "local Moran's I" if cfg.clusters.statistic == "local_moran" else "Getis–Ord Gi*"
        adjust = {"fdr": "FDR", "bonferroni": "Bonferroni", "none": "no"}[cfg.clusters.adjust]
        out.append(figure_entry(
            fig, "clusters", words("fig_clusters_title"),
            words("fig_clusters_caption", stat=stat, perm=cfg.clusters.permutations, adjust=adjust,
                  alpha=f"{cfg.clusters.alpha:g}"),
            words("fig_clusters_alt", n_hh=int(hh.sum()), where=_where(names, rr, hh, words),
                  n_ll=int((cl == "Low-Low").sum()), n_out=int(cl.isin(["High-Low", "Low-High"]).sum()),
                  n_ns=int((cl == "not significant").sum()))))

        fig, ax = plt.subplots(figsize=(_MAP_WIDTH_IN, 4.4), layout="constrained")
        shown = gdf.loc[~hide]
        maps.funnel_plot(shown["observed"], shown["expected"], labels=shown["area_name"], ax=ax)
        lo95, hi95 = maps.funnel_limits(gdf["expected"].to_numpy(float), level=0.95)
        lo998, hi998 = maps.funnel_limits(gdf["expected"].to_numpy(float), level=0.998)
        out95 = ((sir < lo95) | (sir > hi95)).to_numpy()
        out998 = ((sir < lo998) | (sir > hi998)).to_numpy()
        dist = (np.log(sir.clip(lower=1e-9)).abs())
        out.append(figure_entry(
            fig, "funnel", words("fig_funnel_title"), words("fig_funnel_caption"),
            words("fig_funnel_alt", n=n, n_out95=int(out95.sum()), n_out998=int(out998.sum()),
                  where=_where(names, dist, out998, words))))
    n_islands = int(analysis.graph.island_mask().sum())
    if n_islands:
        notes.append(words("islands_note", n=n_islands))
    return out, notes


def _kriging_figures(analysis, gdf, names, words: Wording, period_text: str, source) -> list[dict]:
    """CAR and Poisson-kriged relative risks side by side, and the risk semivariogram."""
    import matplotlib.pyplot as plt

    from .. import maps
    from .._classify import classify
    from ..geostatistics import RiskVariogram, variogram_plot
    from ..maps import _map_aspect

    cfg = analysis.config
    kriging = analysis.kriging
    car = cfg.smoothing.model.upper()
    h = float(np.clip(3.0 * _map_aspect(gdf) + 1.9, 3.4, 7.5))
    fig = maps.raw_beside_smoothed(gdf, "rr", "kriged_rr", titles=(words("fig_kriging_left", model=car),
                                                                   words("fig_kriging_right")),
                                   period=period_text, source=source, figsize=(_MAP_WIDTH_IN + 0.2, h))
    a = classify(gdf["rr"].to_numpy(float), scheme="relative_risk").class_index
    b = classify(gdf["kriged_rr"].to_numpy(float), scheme="relative_risk").class_index
    differ = a != b
    gap = (np.log(gdf["rr"].clip(lower=1e-9)) - np.log(gdf["kriged_rr"].clip(lower=1e-9))).abs()
    out = [figure_entry(fig, "kriging", words("fig_kriging_title"), words("fig_kriging_caption", model=car),
                        words("fig_kriging_alt", model=car, n_differ=int(differ.sum()), n=len(gdf),
                              where=_where(names, gap, differ, words)))]
    if isinstance(kriging.variogram, RiskVariogram):
        fig, ax = plt.subplots(figsize=(_MAP_WIDTH_IN, 4.5), layout="constrained")
        variogram_plot(kriging.variogram, ax=ax)
        curve = kriging.model.model
        out.append(figure_entry(fig, "semivariogram", words("fig_variogram_title"),
                                words("fig_variogram_caption", curve=curve),
                                words("fig_variogram_alt", curve=curve)))
    return out


def locator_figure(analysis, flagged: pd.DataFrame, words: Wording) -> tuple[dict | None, bool]:
    """The locator map beside the flagged table; returns (figure entry, whether keys were used)."""
    import matplotlib.pyplot as plt

    from ..figures import locator_map
    from ..maps import _map_aspect

    if flagged.empty:
        return None, False
    gdf = analysis.areas.copy()
    gdf["area_name"] = gdf["area_name"].astype(str).map(_plain)
    w = 3.9
    fig, ax = plt.subplots(figsize=(w, float(np.clip(w * _map_aspect(gdf), 2.6, 6.0))), layout="constrained")
    locator_map(gdf, list(flagged.index), order=list(flagged.index), ax=ax)
    keys = ax.get_gid() == "locator-keys"
    names = ", ".join(str(x) for x in flagged["area_name"].head(8))
    if len(flagged) > 8:
        names += ", …"
    entry = figure_entry(fig, "locator", words("locator_title"),
                         words("locator_caption", keys=words("locator_keys") if keys else ""),
                         words("locator_alt", n=len(flagged), names=names))
    return entry, keys


def trend_figure(analysis, words: Wording) -> dict | None:
    """The regional weekly curve with the current period marked."""
    import matplotlib.pyplot as plt

    from ..figures import weekly_curve

    weekly = analysis.weekly
    if weekly is None or len(weekly) == 0:
        return None
    pop = float(weekly["population"].iloc[0])
    fig, ax = plt.subplots(figsize=(_MAP_WIDTH_IN, 2.9), layout="constrained")
    weekly_curve(weekly["cases"], population=pop if pop > 0 else None, current=list(analysis.weeks), ax=ax,
                 cases_label=words("trend_cases_axis"), rate_label=words("trend_rate_axis"),
                 current_label=words("trend_current"))
    cases = weekly["cases"]
    first, last = str(cases.index[0]), str(cases.index[-1])
    top = cases.idxmax()
    return figure_entry(
        fig, "trend", words("trend_title"), words("trend_caption", first=first, last=last),
        words("trend_alt", n=len(cases), first=first, last=last, period=analysis.period,
              current=int(cases[list(analysis.weeks)].sum()), max_week=str(top), max_cases=int(cases.max())))
