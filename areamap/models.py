"""Bayesian CAR smoothing of area relative risks (BYM2, Leroux, intrinsic CAR).

:func:`fit_car` fits a Poisson model with expected counts as offset and a
spatially structured random effect, by deterministic approximate Bayesian
inference written for this package (Laplace approximations of the latent
Gaussian field on sparse matrices, numerical integration over the
hyperparameters). It returns a :class:`CarFit` with per-area posterior summaries
of the relative risk, exceedance probabilities, a posterior predictive check, the
hyperparameter posteriors and model-comparison criteria (DIC, WAIC, log marginal
likelihood).

Read the results with care: a smoothed relative risk describes the area, not the
people in it (ecological fallacy); smoothing pulls areas with small expected
counts strongly toward their neighbours and the overall level, so a small area
with a genuinely unusual rate may look ordinary; exceedance probabilities are
statements under the model and its priors, not frequencies.
"""

from __future__ import annotations

import html
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import gammaln, ndtr, pdtr

from . import _car_engine as eng
from ._params import check_choice, check_interval
from .errors import GraphError, InputError, ModelError, ModelWarning, format_examples
from .graphs import AreaGraph

__all__ = ["CarPriors", "CarFit", "fit_car"]

_MODELS = ("bym2", "leroux", "icar")
#: above this many areas the hyperparameters are integrated with Gauss–Hermite nodes instead of a grid
GRID_LIMIT = 3000
_GH_NODES, _GH_WEIGHTS = np.polynomial.hermite_e.hermegauss(24)
_GH_WEIGHTS = _GH_WEIGHTS / _GH_WEIGHTS.sum()


@dataclass(frozen=True)
class CarPriors:
    """Prior settings of :func:`fit_car`.

    Parameters
    ----------
    sigma_upper, sigma_tail : float, default=1.0, 0.01
        Penalised-complexity prior on the standard deviation σ of the area
        effects: P(σ > sigma_upper) = sigma_tail, i.e. σ ~ Exponential(λ) with
        λ = −ln(sigma_tail) / sigma_upper.
    phi_upper, phi_tail : float, default=0.5, 2/3
        PC prior on the BYM2 mixing parameter φ: P(φ < phi_upper) = phi_tail
        (on the untruncated distance scale, see Notes).
    intercept_sd, coefficient_sd : float, default=5.0, 5.0
        Normal prior standard deviations of the intercept and of the covariate
        coefficients (on the standardized covariate scale).

    Notes
    -----
    The Leroux ρ has a Uniform(0, 1) prior; the intrinsic CAR has only σ.
    The PC prior on φ is θ exp(−θ d(φ)) |d′(φ)| with θ = −ln(1 − phi_tail)/d(phi_upper);
    because d(φ) is bounded on (0, 1), this density integrates to 1 − exp(−θ d(1))
    (about 0.86 on typical graphs). The fit renormalises it (which does not change
    the posterior, only the log marginal likelihood).

    Examples
    --------
    >>> CarPriors(sigma_upper=0.5).sigma_upper
    0.5
    """

    sigma_upper: float = 1.0
    sigma_tail: float = 0.01
    phi_upper: float = 0.5
    phi_tail: float = 2.0 / 3.0
    intercept_sd: float = 5.0
    coefficient_sd: float = 5.0

    def __post_init__(self):
        f = "CarPriors"
        check_interval(self.sigma_upper, "sigma_upper", f, low=0.0)
        check_interval(self.sigma_tail, "sigma_tail", f, low=0.0, high=1.0)
        check_interval(self.phi_upper, "phi_upper", f, low=0.0, high=1.0)
        check_interval(self.phi_tail, "phi_tail", f, low=0.0, high=1.0)
        check_interval(self.intercept_sd, "intercept_sd", f, low=0.0)
        check_interval(self.coefficient_sd, "coefficient_sd", f, low=0.0)

    @property
    def sigma_rate(self) -> float:
        """Rate λ of the exponential prior on σ."""
        return -np.log(self.sigma_tail) / self.sigma_upper


@dataclass(frozen=True, eq=False)
class CarFit:
    """Result of :func:`fit_car`.

    Attributes
    ----------
    ids : pandas.Index
        Area ids (order of the input data).
    model : str
        ``"bym2"``, ``"leroux"`` or ``"icar"``.
    rr_mean, rr_sd, rr_median, rr_low, rr_high : ndarray, shape (n,)
        Posterior mean, sd, median and 95% credible interval of each area's
        relative risk RR_i = exp(β0 + x_iβ + b_i).
    p_above_1, p_above_threshold : ndarray, shape (n,)
        Posterior probabilities P(RR_i > 1 | y) and P(RR_i > threshold | y).
    predictive_midp : ndarray, shape (n,)
        Posterior predictive mid-p value P(Y_rep < y) + ½ P(Y_rep = y); near 0
        (observed unusually low) or near 1 (unusually high) flags an area the
        model fits poorly. ``poorly_fitted`` marks values outside (0.025, 0.975).
    threshold : float
    observed, expected : ndarray
    coefficients : pandas.DataFrame
        Fixed effects (intercept at the covariate means, and each covariate)
        with rate ratios per unit and per standard deviation and 95% intervals.
    hyperparameters : pandas.DataFrame
        Posterior mean, sd and quantiles of σ and φ (BYM2), σ, ρ and τ = 1/σ²
        (Leroux) or σ (intrinsic CAR).
    fraction_spatial : float
        Posterior mean of the share of the area-effect variance that is
        spatially structured: φ for BYM2, ρ for Leroux (an approximate reading),
        1 for the intrinsic CAR.
    dic, waic, effective_parameters, waic_effective_parameters : float
        Deviance information criterion, widely applicable information
        criterion (both on the deviance scale, smaller is better), pD and p_WAIC.
    log_marginal_likelihood : float
        log p(y) under the model and priors (Laplace + numerical integration).
    n_design_points : int
        Hyperparameter points of the integration design.
    notes : tuple of str
        Things to know about this fit (islands, edge warnings).
    """

    ids: pd.Index
    model: str
    rr_mean: np.ndarray
    rr_sd: np.ndarray
    rr_median: np.ndarray
    rr_low: np.ndarray
    rr_high: np.ndarray
    p_above_1: np.ndarray
    p_above_threshold: np.ndarray
    predictive_midp: np.ndarray
    threshold: float
    observed: np.ndarray
    expected: np.ndarray
    coefficients: pd.DataFrame
    hyperparameters: pd.DataFrame
    fraction_spatial: float
    dic: float
    waic: float
    effective_parameters: float
    waic_effective_parameters: float
    log_marginal_likelihood: float
    n_design_points: int
    priors: CarPriors
    notes: tuple[str, ...] = ()
    _design: object = field(default=None, repr=False)

    @property
    def poorly_fitted(self) -> np.ndarray:
        """Areas whose predictive mid-p value lies outside (0.025, 0.975)."""
        return (self.predictive_midp < 0.025) | (self.predictive_midp > 0.975)

    def to_frame(self) -> pd.DataFrame:
        """Per-area table indexed by area id.

        Columns: observed, expected, rr_mean, rr_sd, rr_median, rr_low, rr_high,
        p_above_1, p_above_threshold, predictive_midp, poorly_fitted.
        """
        return pd.DataFrame(
            {
                "observed": self.observed,
                "expected": self.expected,
                "rr_mean": self.rr_mean,
                "rr_sd": self.rr_sd,
                "rr_median": self.rr_median,
                "rr_low": self.rr_low,
                "rr_high": self.rr_high,
                "p_above_1": self.p_above_1,
                "p_above_threshold": self.p_above_threshold,
                "predictive_midp": self.predictive_midp,
                "poorly_fitted": self.poorly_fitted,
            },
            index=self.ids,
        )

    def summary(self) -> str:
        """Readable text summary of the fit."""
        names = {"bym2": "BYM2", "leroux": "Leroux CAR", "icar": "intrinsic CAR"}
        lines = [
            f"{names[self.model]} model of {len(self.ids)} areas "
            f"({int(self.observed.sum())} observed, {self.expected.sum():.1f} expected cases)",
            "Hyperparameters (posterior mean, 95% interval):",
        ]
        for name, row in self.hyperparameters.iterrows():
            lines.append(f"  {name:<10} {row['mean']:.3f} ({row['q025']:.3f} to {row['q975']:.3f})")
        row = self.coefficients.iloc[0]
        lines.append(
            f"Overall relative risk at the covariate means: {row['rr_per_sd']:.3f} "
            f"({row['rr_per_sd_low']:.3f} to {row['rr_per_sd_high']:.3f})"
        )
        if len(self.coefficients) > 1:
            lines.append("Covariates (rate ratio per SD and per unit, 95% intervals):")
        for name, row in self.coefficients.iloc[1:].iterrows():
            lines.append(
                f"  {name:<14} per SD {row['rr_per_sd']:.3f} ({row['rr_per_sd_low']:.3f} to "
                f"{row['rr_per_sd_high']:.3f}); per unit {row['rr_per_unit']:.4g} "
                f"({row['rr_per_unit_low']:.4g} to {row['rr_per_unit_high']:.4g})"
            )
        lines.append(f"Share of area-effect variance that is spatial: {self.fraction_spatial:.2f}")
        lines.append(
            f"DIC {self.dic:.1f} (pD {self.effective_parameters:.1f}); WAIC {self.waic:.1f} "
            f"(p_WAIC {self.waic_effective_parameters:.1f}); log marginal likelihood "
            f"{self.log_marginal_likelihood:.2f}"
        )
        n_hi = int(np.sum(self.p_above_threshold > 0.8))
        lines.append(
            f"Areas with P(RR > {self.threshold:g}) > 0.8: {n_hi}; poorly fitted areas "
            f"(predictive mid-p outside 0.025-0.975): {int(self.poorly_fitted.sum())}"
        )
        lines.extend(f"Note: {t}" for t in self.notes)
        lines.append(
            "Relative risks describe areas, not individuals; areas with few expected cases are pulled "
            "strongly toward their neighbours."
        )
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        head = html.escape(self.summary()).replace("\n", "<br>")
        return f"<div><p>{head}</p>{self.to_frame().head(10).to_html()}</div>"


# ====================================================================== inputs
def _as_vector(values, name, n_expected=None):
    if isinstance(values, pd.DataFrame):
        raise InputError(f"'{name}' must be one column of numbers, not a table with {values.shape[1]} columns.")
    arr = np.asarray(values, dtype=float) if not isinstance(values, pd.Series) else values.to_numpy(dtype=float)
    if arr.ndim != 1:
        raise InputError(f"'{name}' must be one-dimensional; got shape {arr.shape}.")
    return arr


def _check_inputs(observed, expected, graph, covariates):
    if not isinstance(graph, AreaGraph):
        raise InputError(f"'graph' must be an AreaGraph; got {type(graph).__name__}.")
    if isinstance(observed, pd.Series):
        ids = pd.Index(observed.index)
        graph = graph.reorder(ids)  # GraphError when the id sets differ
        if isinstance(expected, pd.Series):
            if not expected.index.equals(ids):
                if set(expected.index) != set(ids):
                    missing = ids.difference(expected.index)
                    raise InputError(
                        f"'expected' is missing {len(missing)} area id(s) of 'observed' "
                        f"({format_examples(missing)}). Give both for the same areas."
                    )
                expected = expected.reindex(ids)
    else:
        ids = graph.ids
    y = _as_vector(observed, "observed")
    e = _as_vector(expected, "expected")
    n = graph.n
    for name, arr in (("observed", y), ("expected", e)):
        if arr.size != n:
            raise GraphError(
                f"'{name}' has {arr.size} values but the graph has {n} areas. Build the graph from the "
                "same boundaries as the data (or pass pandas Series indexed by area id)."
            )
    bad = ~np.isfinite(y) | (y < 0) | (np.abs(y - np.round(y)) > 1e-9)
    if bad.any():
        raise InputError(
            f"'observed' has {int(bad.sum())} value(s) that are not whole numbers >= 0 "
            f"(areas {format_examples(ids[bad])}). Counts must be whole numbers >= 0."
        )
    bad = ~np.isfinite(e) | (e <= 0)
    if bad.any():
        raise InputError(
            f"'expected' has {int(bad.sum())} zero, negative or missing value(s) "
            f"(areas {format_examples(ids[bad])}). Expected counts must be > 0: drop areas without "
            "population or merge them with a neighbour."
        )
    if y.sum() == 0:
        raise ModelError(
            "All observed counts are zero: the relative risks cannot be estimated. Use a longer "
            "period or a larger area unit."
        )
    y = np.round(y)
    names = []
    if covariates is None:
        xc = np.zeros((n, 0))
    else:
        if isinstance(covariates, pd.DataFrame):
            if isinstance(observed, pd.Series) and set(covariates.index) == set(ids):
                covariates = covariates.reindex(ids)
            names = [str(c) for c in covariates.columns]
            xc = covariates.to_numpy(dtype=float)
        elif isinstance(covariates, pd.Series):
            if isinstance(observed, pd.Series) and set(covariates.index) == set(ids):
                covariates = covariates.reindex(ids)
            names = [str(covariates.name) if covariates.name is not None else "x1"]
            xc = covariates.to_numpy(dtype=float)[:, None]
        else:
            xc = np.asarray(covariates, dtype=float)
            if xc.ndim == 1:
                xc = xc[:, None]
            names = [f"x{j + 1}" for j in range(xc.shape[1])]
        if xc.ndim != 2 or xc.shape[0] != n:
            raise InputError(f"'covariates' must have one row per area ({n}); got shape {xc.shape}.")
        bad = ~np.isfinite(xc).all(axis=1)
        if bad.any():
            raise InputError(
                f"'covariates' has missing or infinite values in {int(bad.sum())} area(s) "
                f"({format_examples(ids[bad])}). Fill or drop them before fitting."
            )
        sd = xc.std(axis=0)
        const = [names[j] for j in np.flatnonzero(sd <= 1e-12 * (1 + np.abs(xc).max(axis=0)))]
        if const:
            raise InputError(
                f"Covariate(s) {format_examples(const)} are constant across areas; the intercept "
                "already covers a constant. Drop them."
            )
    return ids, graph, y, e, xc, names


# ====================================================================== fitting
def fit_car(
    observed,
    expected,
    graph: AreaGraph,
    *,
    model: str = "bym2",
    covariates=None,
    priors: CarPriors | None = None,
    threshold: float = 1.0,
) -> CarFit:
    """Fit a Bayesian Poisson CAR model and summarise the relative risks.

    Parameters
    ----------
    observed : array-like or pandas.Series, shape (n,)
        Case counts per area (whole numbers >= 0). A Series is matched to the
        graph by its index; results keep its order.
    expected : array-like or pandas.Series, shape (n,)
        Expected counts (> 0), e.g. from indirect standardization.
    graph : AreaGraph
        Neighbour graph over the same areas.
    model : {"bym2", "leroux", "icar"}, default="bym2"
        Random-effect structure (see Notes).
    covariates : array-like or DataFrame, shape (n, p), optional
        Area-level covariates; standardized internally (mean 0, population SD 1),
        coefficients reported per unit and per SD.
    priors : CarPriors, optional
        Prior settings (defaults: penalised-complexity priors, see CarPriors).
    threshold : float, default=1.0
        Relative risk for ``p_above_threshold``.

    Returns
    -------
    CarFit

    Raises
    ------
    GraphError
        The graph and the data cover different areas.
    InputError
        Negative/non-integer counts, zero or missing expected counts, bad covariates.
    ModelError
        All counts are zero, or the Newton iterations fail.

    Warns
    -----
    ModelWarning
        Hyperparameters pile up at the edge of the integration design; islands
        in an intrinsic CAR model.

    Notes
    -----
    y_i ~ Poisson(E_i RR_i), log RR_i = β0 + x_iβ + b_i, with

    * BYM2: b = σ(√φ u* + √(1−φ) v), v ~ N(0, I), u* intrinsic CAR with
      precision cR (R = D − W) scaled per connected component so the geometric
      mean of its marginal variances is 1, summing to zero per component;
      an island has b_i = σ v_i.
    * Leroux: b ~ N(0, [τ((1−ρ)I + ρR)]⁻¹), σ = τ^{-1/2}, ρ ~ U(0, 1).
    * intrinsic CAR: b = σu* (scaled as above); islands, where the intrinsic
      CAR is undefined, get an unstructured effect b_i = σ v_i (with a warning).

    Inference: for each hyperparameter value θ the latent field is approximated
    by a Gaussian at its mode (Newton iterations, sum-to-zero constraints by
    conditioning); log p(θ | y) by the Laplace approximation; θ integrated on a
    grid around its mode. The posterior of each log RR_i is a mixture of
    Gaussians over the grid ("simplified Gaussian" marginals).

    Small expected counts give wide intervals; results describe areas, not
    individuals.

    References
    ----------
    Riebler, A., Sørbye, S. H., Simpson, D. & Rue, H. (2016). An intuitive Bayesian
    spatial model for disease mapping that accounts for scaling. *Stat. Methods
    Med. Res.* 25(4), 1145–1165.

    Leroux, B. G., Lei, X. & Breslow, N. (2000). Estimation of disease rates in small
    areas. In *Statistical Models in Epidemiology...*, Springer, 179–191.

    Rue, H., Martino, S. & Chopin, N. (2009). Approximate Bayesian inference for
    latent Gaussian models by using integrated nested Laplace approximations.
    *J. R. Stat. Soc. B* 71(2), 319–392.

    Examples
    --------
    >>> import numpy as np
    >>> from areamap.graphs import AreaGraph
    >>> ids = [f"a{i}" for i in range(6)]
    >>> g = AreaGraph.from_edges(ids, [(ids[i], ids[i + 1]) for i in range(5)])
    >>> fit = fit_car(np.array([2, 5, 3, 9, 12, 8]), np.full(6, 6.5), g)
    >>> fit.to_frame().shape
    (6, 11)
    >>> bool(np.all(fit.rr_low < fit.rr_high))
    True
    """
    check_choice(model, "model", "fit_car", _MODELS)
    threshold = check_interval(threshold, "threshold", "fit_car", low=0.0)
    if priors is None:
        priors = CarPriors()
    elif not isinstance(priors, CarPriors):
        raise InputError(f"'priors' must be a CarPriors object; got {type(priors).__name__}.")
    ids, graph, y, e, xc, names = _check_inputs(observed, expected, graph, covariates)
    return _fit(ids, graph, y, e, xc, names, model=model, priors=priors, threshold=threshold)


def _log_prior_fn(model, gs, priors):
    lam = priors.sigma_rate
    if model == "bym2":
        log_mass = np.log(gs.pc_phi_mass(upper=priors.phi_upper, tail=priors.phi_tail)) if gs.n_structured else 0.0

        def lp(theta):
            sigma = np.exp(theta[0])
            phi = eng._expit(np.clip(theta[1], -eng._LOGIT_BOUND, eng._LOGIT_BOUND))
            out = np.log(lam) - lam * sigma + theta[0]
            if gs.n_structured:
                out += gs.pc_phi_logdensity(phi, upper=priors.phi_upper, tail=priors.phi_tail)[0] - log_mass
            return out + np.log(phi) + np.log1p(-phi)

    elif model == "leroux":

        def lp(theta):
            sigma = np.exp(theta[0])
            rho = eng._expit(np.clip(theta[1], -eng._LOGIT_BOUND, eng._LOGIT_BOUND))
            return np.log(lam) - lam * sigma + theta[0] + np.log(rho) + np.log1p(-rho)

    else:

        def lp(theta):
            return np.log(lam) - lam * np.exp(theta[0]) + theta[0]

    return lp


def _fit(ids, graph, y, e, xc, names, *, model, priors, threshold, _fixed_theta=None, _pc_method="auto"):
    notes = []
    gs = eng._GraphStructure(graph.adjacency, pc_method=_pc_method)
    if model == "bym2" and gs.n_structured == 0:
        notes.append("The graph has no neighbour links: BYM2 reduces to independent area effects.")
    if model == "icar":
        if gs.n_structured == 0:
            raise ModelError(
                "The intrinsic CAR model needs neighbour links, and this graph has none. "
                "Use model='bym2' or build the graph with islands='link'."
            )
        if gs.islands.size:
            isl = format_examples(ids[gs.islands])
            warnings.warn(
                f"{gs.islands.size} island(s) without neighbours ({isl}): the intrinsic CAR effect is "
                "undefined there, so they get an unstructured effect N(0, sigma^2). Consider "
                "linking them (islands='link') or using BYM2.",
                ModelWarning,
                stacklevel=3,
            )
            notes.append(f"Islands ({isl}) carry an unstructured effect only.")
    if model != "leroux" and gs.islands.size and model == "bym2":
        notes.append(f"{gs.islands.size} island(s) carry only the unstructured effect.")
    xmean = xc.mean(axis=0)
    xsd = xc.std(axis=0)
    xs = (xc - xmean) / xsd if xc.shape[1] else xc
    latent = eng._LatentModel(model, y, e, xs, gs, intercept_sd=priors.intercept_sd,
                              coefficient_sd=priors.coefficient_sd)
    log_prior = _log_prior_fn(model, gs, priors)
    lam = priors.sigma_rate
    # starting value: moment estimate of the SD of the log relative risks beyond Poisson noise
    raw = np.log((y + 0.5) / e)
    excess = np.var(raw) - np.mean(1.0 / (y + 0.5))
    s0 = np.log(np.clip(np.sqrt(max(excess, 0.0)), 0.05, 2.0))
    s0 = min(s0, np.log(2.0 / lam))
    if model == "icar":
        theta0, bounds = np.array([s0]), [(np.log(1e-3 / lam), np.log(50.0))]
    else:
        theta0 = np.array([s0, 0.0])
        bounds = [(np.log(1e-3 / lam), np.log(50.0)), (-9.0, 9.0)]
    strategy = "grid" if len(ids) <= GRID_LIMIT else "gauss-hermite"
    design = eng.integrate_hyperparameters(log_prior, latent, theta0, bounds, fixed=_fixed_theta,
                                           strategy=strategy)
    if design.edge:
        eng.warn_edge(model)
        notes.append("Hyperparameter posterior reaches the edge of the integration design.")
    if strategy == "gauss-hermite" and design.skipped:
        notes.append(
            f"{design.skipped} of {design.skipped + len(design.results)} integration points of the "
            "hyperparameters lay beyond their bounds (typically phi within about 1e-4 of 1) and were "
            "left out; the remaining points were reweighted, which narrows the spread of the "
            "hyperparameters slightly."
        )
    w = design.weights
    mu = np.column_stack([r.mean_eta for r in design.results])
    sd = np.sqrt(np.column_stack([r.var_eta for r in design.results]))
    # relative risk summaries from the Gaussian mixture of log RR
    rr_mean = eng.mix(np.exp(mu + 0.5 * sd**2), w)
    rr_m2 = eng.mix(np.exp(2 * mu + 2 * sd**2), w)
    rr_sd = np.sqrt(np.maximum(rr_m2 - rr_mean**2, 0.0))
    q_lo, q_med, q_hi = eng.mixture_quantiles(mu, sd, w, (0.025, 0.5, 0.975))
    p1 = eng.mix(ndtr(mu / sd), w)
    pc = eng.mix(ndtr((mu - np.log(threshold)) / sd), w)
    crit = _criteria(y, e, mu, sd, w)
    hyper, frac = _hyper_table(model, design)
    coef = _coef_table(design, names, xmean, xsd)
    return CarFit(
        ids=pd.Index(ids),
        model=model,
        rr_mean=rr_mean,
        rr_sd=rr_sd,
        rr_median=np.exp(q_med),
        rr_low=np.exp(q_lo),
        rr_high=np.exp(q_hi),
        p_above_1=np.clip(p1, 0.0, 1.0),
        p_above_threshold=np.clip(pc, 0.0, 1.0),
        predictive_midp=crit["midp"],
        threshold=threshold,
        observed=y,
        expected=e,
        coefficients=coef,
        hyperparameters=hyper,
        fraction_spatial=frac,
        dic=crit["dic"],
        waic=crit["waic"],
        effective_parameters=crit["pd"],
        waic_effective_parameters=crit["p_waic"],
        log_marginal_likelihood=design.log_evidence,
        n_design_points=len(design.results),
        priors=priors,
        notes=tuple(notes),
        _design=design,
    )


def _criteria(y, e, mu, sd, w):
    """DIC, WAIC and predictive mid-p by Gauss–Hermite quadrature over the mixture."""
    n = y.size
    log_e = np.log(e)
    lgy = gammaln(y + 1.0)
    e_lik = np.zeros(n)  # E[p(y|eta)] scaled by exp(-shift)
    shift = y * (np.log(np.maximum(y, 1.0))) - y - lgy  # approx. max of log p over eta (for stability)
    e_logp = np.zeros(n)
    e_logp2 = np.zeros(n)
    midp = np.zeros(n)
    eta_mean = eng.mix(mu, w)
    for k in range(w.size):
        eta = log_e[:, None] + mu[:, k:k + 1] + sd[:, k:k + 1] * _GH_NODES[None, :]
        lam = np.exp(eta)
        logp = y[:, None] * eta - lam - lgy[:, None]
        e_lik += w[k] * eng.mix(np.exp(logp - shift[:, None]), _GH_WEIGHTS)
        e_logp += w[k] * eng.mix(logp, _GH_WEIGHTS)
        e_logp2 += w[k] * eng.mix(logp**2, _GH_WEIGHTS)
        below = np.where(y[:, None] > 0, pdtr(y[:, None] - 1.0, lam), 0.0)
        midp += w[k] * eng.mix(below + 0.5 * np.exp(logp), _GH_WEIGHTS)
    lppd = np.log(e_lik) + shift
    p_waic = np.maximum(e_logp2 - e_logp**2, 0.0)
    waic = -2.0 * (lppd.sum() - p_waic.sum())
    dbar = -2.0 * e_logp.sum()
    eta_hat = log_e + eta_mean
    dhat = -2.0 * np.sum(y * eta_hat - np.exp(eta_hat) - lgy)
    pd_ = dbar - dhat
    return {"dic": float(dbar + pd_), "pd": float(pd_), "waic": float(waic), "p_waic": float(p_waic.sum()),
            "midp": np.clip(midp, 0.0, 1.0)}


def _summ(values, weights):
    mean = float(np.einsum('i,i->', values, weights))
    sd = float(np.sqrt(max(np.einsum('i,i->', (values - mean) ** 2, weights), 0.0)))
    q = eng.weighted_quantiles(values, weights, [0.025, 0.5, 0.975])
    return {"mean": mean, "sd": sd, "q025": q[0], "q50": q[1], "q975": q[2]}


def _hyper_table(model, design):
    pts, wts = eng.hyper_marginals(design)
    sigma = np.exp(pts[:, 0])
    rows = {"sigma": _summ(sigma, wts)}
    frac = 1.0
    if model == "bym2":
        phi = eng._expit(pts[:, 1])
        rows["phi"] = _summ(phi, wts)
        frac = rows["phi"]["mean"]
    elif model == "leroux":
        rho = eng._expit(pts[:, 1])
        rows["rho"] = _summ(rho, wts)
        rows["tau"] = _summ(sigma**-2.0, wts)
        frac = rows["rho"]["mean"]
    table = pd.DataFrame.from_dict(rows, orient="index")
    table.index.name = "parameter"
    return table, float(frac)


def _coef_table(design, names, xmean, xsd):
    w = design.weights
    bm = np.column_stack([r.beta_mean for r in design.results])
    bs = np.sqrt(np.column_stack([r.beta_var for r in design.results]))
    mean = eng.mix(bm, w)
    sd = np.sqrt(np.maximum(eng.mix(bm**2 + bs**2, w) - mean**2, 0.0))
    lo, med, hi = eng.mixture_quantiles(bm, bs, w, (0.025, 0.5, 0.975))
    scale = np.concatenate([[1.0], xsd])
    table = pd.DataFrame(
        {
            "mean": mean,
            "sd": sd,
            "q025": lo,
            "q50": med,
            "q975": hi,
            "rr_per_sd": np.exp(med),
            "rr_per_sd_low": np.exp(lo),
            "rr_per_sd_high": np.exp(hi),
            "rr_per_unit": np.exp(med / scale),
            "rr_per_unit_low": np.exp(lo / scale),
            "rr_per_unit_high": np.exp(hi / scale),
            "covariate_mean": np.concatenate([[np.nan], xmean]),
            "covariate_sd": np.concatenate([[np.nan], xsd]),
        },
        index=pd.Index(["intercept"] + list(names), name="term"),
    )
    return table
