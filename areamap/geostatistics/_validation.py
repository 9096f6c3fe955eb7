"""Cross-validation of smoothers: Poisson kriging, empirical Bayes and BYM2 on held-out areas."""

from __future__ import annotations

import html
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .._params import check_positive_int
from ..errors import InputError
from ._kriging import PoissonKrigingResult, cv_scores, poisson_kriging
from ._variogram import _counts, _standardised

__all__ = ["SmootherValidation", "cross_validate_smoothers"]


@dataclass(frozen=True, eq=False)
class SmootherValidation:
    """Held-out predictions and scores per smoother (:func:`cross_validate_smoothers`).

    Attributes
    ----------
    predictions : pandas.DataFrame
        Index = area ids; ``observed``, ``expected`` and one column of held-out
        relative-risk predictions per smoother.
    scores : pandas.DataFrame
        One row per smoother: ``deviance`` (mean Poisson deviance of the held-out
        counts, smaller is better), ``rmse`` (expected-count-weighted RMSE of the
        observed relative risk), ``risk_mse`` (that MSE minus the Poisson noise:
        an estimate of the error against the true risk), ``areas`` and ``scheme``.
    """

    predictions: pd.DataFrame
    scores: pd.DataFrame

    @property
    def best(self) -> str:
        """Smoother with the smallest mean held-out deviance."""
        return str(self.scores["deviance"].idxmin())

    def to_frame(self) -> pd.DataFrame:
        return self.predictions.copy()

    def summary(self) -> str:
        lines = ["Held-out prediction of district risk (smaller is better)"]
        for name, r in self.scores.iterrows():
            lines.append(f"  {name:<16} deviance {r['deviance']:.4g}  RMSE {r['rmse']:.4g}  "
                         f"noise-corrected MSE {r['risk_mse']:.4g}  ({r['scheme']}, {int(r['areas'])} areas)")
        lines.append(f"  best by deviance: {self.best}")
        lines.append("  Scores compare predictions of each district from the others; they rank the smoothers on "
                     "these data, not the truth of any one district's estimate.")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return f"<pre>{html.escape(self.summary())}</pre>" + self.scores.to_html()


def _bym2_held_out(y, e, ids, graph, folds, seed, model):
    """Refit the CAR model with held-out areas given a negligible expected count (their counts drop out)."""
    from ..models import fit_car
    n = y.size
    if folds is None:
        assign = np.arange(n)
        scheme = "leave-one-out"
    else:
        folds = check_positive_int(folds, "car_folds", "cross_validate_smoothers", minimum=2)
        assign = np.random.default_rng(seed).permutation(n) % folds
        scheme = f"{folds}-fold"
    pred = np.full(n, np.nan)
    tiny = 1e-9 * float(np.min(e))
    for f in np.unique(assign):  # one model fit per fold (the fits themselves are the cost)
        out = assign == f
        yy = np.where(out, 0.0, y)
        ee = np.where(out, tiny, e)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit = fit_car(pd.Series(yy, ids), pd.Series(ee, ids), graph, model=model)
        pred[out] = fit.rr_mean[out]
    return pred, scheme


def cross_validate_smoothers(
    cases,
    population,
    areas,
    *,
    graph=None,
    kriging: PoissonKrigingResult | None = None,
    neighbours: int = 32,
    car_model: str = "bym2",
    car_folds: int | None = 10,
    seed: int = 0,
) -> SmootherValidation:
    """Predict each district from the others with Poisson kriging, empirical Bayes and BYM2.

    Parameters
    ----------
    cases, population : array-like or pandas.Series, shape (n,)
    areas : GeoDataFrame or GeoSeries
        Area polygons (index = ids).
    graph : AreaGraph, optional
        Neighbour graph; enables the local EB and CAR columns.
    kriging : PoissonKrigingResult, optional
        A result for the same data (its leave-one-out predictions are used);
        default: :func:`poisson_kriging` with ``neighbours``.
    neighbours : int, default=32
    car_model : str, default="bym2"
        Passed to :func:`areamap.fit_car`; ``None`` skips the CAR model.
    car_folds : int or None, default=10
        The CAR model is refitted once per fold with the held-out areas' counts
        removed (their expected counts set to a negligible value, so their
        risks are predicted from the rest). ``None`` refits once per area
        (exact leave-one-out; slow: one full fit per district).
    seed : int, default=0
        Fold assignment for the CAR model.

    Returns
    -------
    SmootherValidation

    Notes
    -----
    Predictions are relative risks (z = y / e, e = m* n). Kriging: the area's
    own count is dropped from its kriging system. Global EB: a held-out area's
    posterior is its prior, so the prediction is the regional relative risk of
    the other areas, (sum y - y_i) / (sum e - e_i) (Marshall 1991; the same for
    the Poisson-gamma model up to the estimated prior mean). Local EB (with a
    graph): the pooled relative risk of the neighbours, sum_j y_j / sum_j e_j.
    CAR: the posterior mean relative risk of the held-out areas. K-fold CAR
    predictions hold out more areas at once than leave-one-out and are
    therefore slightly pessimistic for the CAR model.

    Scores: mean Poisson deviance 2[y log(y/mu) - (y - mu)] with mu = e * prediction;
    RMSE = sqrt(sum e (z - pred)^2 / sum e); noise-corrected MSE = RMSE^2 - sum z / sum e,
    unbiased for sum e (rho - pred)^2 / sum e because E[e (z - pred)^2] = e (rho - pred)^2 + rho
    and E[z] = rho when the prediction leaves y out.

    References
    ----------
    Marshall RJ (1991). Mapping disease and mortality rates using empirical
    Bayes estimators. Applied Statistics 40: 283-294.
    Goovaerts P (2006), see :func:`poisson_kriging`.
    """
    func = "cross_validate_smoothers"
    if not hasattr(areas, "geometry"):
        raise InputError(f"{func} needs area polygons (GeoDataFrame/GeoSeries) with the area ids as index.")
    ids = pd.Index(areas.index)
    y, pop = _counts(cases, population, func, n=len(ids), index=ids)
    _m, e, _z = _standardised(y, pop)
    if kriging is None:
        kriging = poisson_kriging(y, pop, areas, neighbours=neighbours)
    elif not kriging.ids.equals(ids):
        raise InputError(f"{func}: 'kriging' was computed for different areas than 'areas'.")
    cols = {"observed": y, "expected": e, "poisson_kriging": kriging.cv_relative_risk,
            "global_eb": (y.sum() - y) / (e.sum() - e)}
    schemes = {"poisson_kriging": "leave-one-out", "global_eb": "leave-one-out"}
    if graph is not None:
        if not pd.Index(graph.ids).equals(ids):
            raise InputError(f"{func}: the graph's ids differ from the areas' ids (or their order).")
        W = (graph.adjacency != 0).astype(float)
        ny_, ne_ = W @ y, W @ e
        with np.errstate(invalid="ignore", divide="ignore"):
            cols["local_eb"] = np.where(ne_ > 0, ny_ / ne_, np.nan)
        schemes["local_eb"] = "leave-one-out"
        if car_model is not None:
            pred, scheme = _bym2_held_out(y, e, ids, graph, car_folds, seed, car_model)
            cols[car_model] = pred
            schemes[car_model] = scheme
    pred = pd.DataFrame(cols, index=ids)
    rows = {k: {**cv_scores(y, e, pred[k].to_numpy()), "scheme": s} for k, s in schemes.items()}
    return SmootherValidation(predictions=pred, scores=pd.DataFrame.from_dict(rows, orient="index"))
