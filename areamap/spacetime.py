"""Space-time smoothing of weekly district counts, and each district's newest week against its forecast.

:func:`fit_spacetime` fits a Poisson model to a district x week table of counts and
expected counts::

    y_it ~ Poisson(E_it RR_it),  log RR_it = b0 + x_i b + b_i + g_t + d_it

with a BYM2 district effect b_i (the district's persistent level), a random walk g_t
over weeks (the regional trend) and an independent district-week term d_it (the
Knorr-Held type I interaction), by the same deterministic approximate Bayesian
inference as :func:`areamap.fit_car` (Laplace approximation of the latent Gaussian
field, numerical integration over the four hyperparameters). It then refits the
model with the newest week's counts treated as missing and gives each district the
predictive distribution of its newest count ("forecast"), with an upper-tail
predictive mid-p value and Benjamini-Hochberg control of the false-discovery rate
across districts: the "emerging" flag. The "persistent" flag marks districts whose
current relative risk exceeds 1 with posterior probability >= 0.8.

Read the results with care: relative risks describe districts, not people
(ecological fallacy); with 1-2 expected cases per district-week the newest week's
evidence is thin, and a forecast alarm is a prompt to look, not a finding; the
forecast intervals and flags are statements under the model and its priors.
"""

from __future__ import annotations

import html
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy.special import gammaln, ndtr, pdtr, pdtrc

from . import _car_engine as eng
from ._params import check_choice, check_interval, check_positive_int
from ._spacetime_engine import _SpaceTimeLatent, fast_design, reweight_design
from .autocorrelation import adjust_pvalues
from .errors import InputError, ModelWarning, format_examples
from .graphs import AreaGraph

__all__ = ["SpaceTimePriors", "SpaceTimeFit", "fit_spacetime"]

_TRENDS = ("rw1", "rw2")
#: fewest weeks the space-time model accepts (the forecast needs one more week than that)
MIN_WEEKS = 3
#: above this many district-weeks the hyperparameters use the fast mode search and 2d + 1 axial points
FAST_LIMIT = 20_000
_GH_NODES, _GH_WEIGHTS = np.polynomial.hermite_e.hermegauss(16)
_GH_WEIGHTS = _GH_WEIGHTS / _GH_WEIGHTS.sum()


@dataclass(frozen=True)
class SpaceTimePriors:
    """Prior settings of :func:`fit_spacetime`.

    Parameters
    ----------
    sigma_upper, sigma_tail : float, default=1.0, 0.01
        PC prior on the SD σ_s of the district effects: P(σ_s > sigma_upper) = sigma_tail.
    phi_upper, phi_tail : float, default=0.5, 2/3
        PC prior on the BYM2 mixing parameter: P(φ < phi_upper) = phi_tail.
    trend_sd_upper, trend_sd_tail : float, default=1.0, 0.01
        PC prior on the SD σ_t of the (scaled) random walk over weeks.
    interaction_sd_upper, interaction_sd_tail : float, default=1.0, 0.01
        PC prior on the SD σ_d of the district-week interaction.
    intercept_sd, coefficient_sd : float, default=5.0, 5.0
        Normal prior SDs of the intercept and of standardized covariate coefficients.

    Notes
    -----
    A PC prior on a standard deviation is σ ~ Exponential(λ) with λ = −ln(tail)/upper
    (Simpson, Rue, Riebler, Martins & Sørbye 2017).

    Examples
    --------
    >>> SpaceTimePriors(trend_sd_upper=0.5).trend_sd_upper
    0.5
    """

    sigma_upper: float = 1.0
    sigma_tail: float = 0.01
    phi_upper: float = 0.5
    phi_tail: float = 2.0 / 3.0
    trend_sd_upper: float = 1.0
    trend_sd_tail: float = 0.01
    interaction_sd_upper: float = 1.0
    interaction_sd_tail: float = 0.01
    intercept_sd: float = 5.0
    coefficient_sd: float = 5.0

    def __post_init__(self):
        f = "SpaceTimePriors"
        for name in ("sigma_upper", "trend_sd_upper", "interaction_sd_upper", "intercept_sd", "coefficient_sd"):
            check_interval(getattr(self, name), name, f, low=0.0)
        for name in ("sigma_tail", "phi_upper", "phi_tail", "trend_sd_tail", "interaction_sd_tail"):
            check_interval(getattr(self, name), name, f, low=0.0, high=1.0)

    def rates(self) -> tuple[float, float, float]:
        """Rates λ of the exponential priors on σ_s, σ_t and σ_d."""
        return (-np.log(self.sigma_tail) / self.sigma_upper,
                -np.log(self.trend_sd_tail) / self.trend_sd_upper,
                -np.log(self.interaction_sd_tail) / self.interaction_sd_upper)


@dataclass(frozen=True, eq=False)
class SpaceTimeFit:
    """Result of :func:`fit_spacetime`.

    Attributes
    ----------
    ids : pandas.Index
        District ids (order of the input rows).
    weeks : pandas.Index
        Week labels (oldest to newest, as the input columns).
    observed, expected : ndarray, shape (n, W)
        Counts (NaN where missing) and expected counts.
    current_rr_mean, current_rr_low, current_rr_high : ndarray, shape (n,)
        Posterior mean and 95% interval of the newest week's relative risk RR_iW.
    p_above_1, p_above_threshold : ndarray, shape (n,)
        P(RR_iW > 1 | y) and P(RR_iW > threshold | y).
    level_mean, level_low, level_high : ndarray, shape (n,)
        The district's persistent level exp(b_i) (relative to the region, apart from
        the weekly trend and week-specific departures) with 95% interval.
    risk_mean, risk_band_low, risk_band_high : ndarray, shape (n, W)
        Posterior mean of every RR_it and an approximate 95% band (one log-normal
        matched to the mixture's log-scale mean and variance).
    trend_rr_mean, trend_rr_low, trend_rr_high : ndarray, shape (W,)
        Regional trend exp(b0 + g_t) with 95% interval.
    forecast_mean, forecast_low, forecast_high : ndarray, shape (n,)
        Predictive mean and 95% interval of the newest week's count from the fit
        without that week (NaN when no forecast was made).
    forecast_midp : ndarray, shape (n,)
        Upper-tail predictive mid-p P(Y > y) + ½ P(Y = y) of the observed newest count.
    forecast_q : ndarray, shape (n,)
        Benjamini-Hochberg adjusted forecast_p.
    emerging, persistent : ndarray of bool, shape (n,)
        forecast_q <= fdr; week_excess_p >= persistent_probability.
    forecast_window : int
        Weeks summed by the second forecast check (1: only the newest week is checked).
    window_midp : ndarray, shape (n,)
        Upper-tail predictive mid-p of the sum of the newest ``forecast_window`` counts,
        from the fit without those weeks (NaN when not made).
    forecast_p : ndarray, shape (n,)
        Per-district p-value of the forecast check: Bonferroni over the windows,
        min(1, m · min(forecast_midp, window_midp)) with m the number of windows checked.
    forecast_fired : ndarray of int, shape (n,)
        Weeks of the window with the smaller mid-p (the one that drives forecast_p).
    level_p_exceed : ndarray, shape (n,)
        Posterior P(level > persistent_threshold).
    week_excess_p : ndarray, shape (n,)
        Posterior P(RR_iT / exp(b0 + g_T) > persistent_threshold): the newest
        week's risk against the region's level in the same week.
    hyperparameters : pandas.DataFrame
        σ_s, φ, σ_t, σ_d: posterior mean, sd and quantiles (full-data fit).
    notes : tuple of str
    """

    ids: pd.Index
    weeks: pd.Index
    observed: np.ndarray
    expected: np.ndarray
    trend: str
    threshold: float
    fdr: float
    persistent_probability: float
    persistent_threshold: float
    current_rr_mean: np.ndarray
    current_rr_low: np.ndarray
    current_rr_high: np.ndarray
    p_above_1: np.ndarray
    p_above_threshold: np.ndarray
    level_mean: np.ndarray
    level_low: np.ndarray
    level_high: np.ndarray
    level_p_exceed: np.ndarray
    week_excess_p: np.ndarray
    risk_mean: np.ndarray
    risk_band_low: np.ndarray
    risk_band_high: np.ndarray
    trend_rr_mean: np.ndarray
    trend_rr_low: np.ndarray
    trend_rr_high: np.ndarray
    forecast_mean: np.ndarray
    forecast_low: np.ndarray
    forecast_high: np.ndarray
    forecast_midp: np.ndarray
    forecast_q: np.ndarray
    emerging: np.ndarray
    persistent: np.ndarray
    hyperparameters: pd.DataFrame
    n_design_points: int
    priors: SpaceTimePriors
    notes: tuple[str, ...] = ()
    forecast_window: int = 1
    window_midp: np.ndarray | None = None
    forecast_p: np.ndarray | None = None
    forecast_fired: np.ndarray | None = None
    _designs: object = field(default=None, repr=False)

    @property
    def newest_week(self):
        """Label of the newest week."""
        return self.weeks[-1]

    def to_frame(self) -> pd.DataFrame:
        """Per-district table for the newest week, indexed by district id.

        Columns: observed, expected, rr_mean, rr_low, rr_high, p_above_1,
        p_above_threshold, level, level_low, level_high, forecast_mean,
        forecast_low, forecast_high, forecast_midp, forecast_window_midp,
        forecast_p, forecast_window, forecast_q, emerging, persistent.
        """
        return pd.DataFrame(
            {
                "observed": self.observed[:, -1],
                "expected": self.expected[:, -1],
                "rr_mean": self.current_rr_mean,
                "rr_low": self.current_rr_low,
                "rr_high": self.current_rr_high,
                "p_above_1": self.p_above_1,
                "p_above_threshold": self.p_above_threshold,
                "level": self.level_mean,
                "level_low": self.level_low,
                "level_high": self.level_high,
                "level_p_exceed": self.level_p_exceed,
                "week_excess_p": self.week_excess_p,
                "forecast_mean": self.forecast_mean,
                "forecast_low": self.forecast_low,
                "forecast_high": self.forecast_high,
                "forecast_midp": self.forecast_midp,
                "forecast_window_midp": self._or_nan(self.window_midp),
                "forecast_p": self._or_nan(self.forecast_p),
                "forecast_window": (np.full(len(self.ids), 1) if self.forecast_fired is None
                                    else self.forecast_fired),
                "forecast_q": self.forecast_q,
                "emerging": self.emerging,
                "persistent": self.persistent,
            },
            index=self.ids,
        )

    def _or_nan(self, values):
        return np.full(len(self.ids), np.nan) if values is None else values

    def district_table(self) -> pd.DataFrame:
        """Same as :meth:`to_frame` (per-district table of the newest week)."""
        return self.to_frame()

    def week_table(self) -> pd.DataFrame:
        """Per-week regional table indexed by week.

        Columns: observed (sum over districts), expected, trend_rr, trend_rr_low,
        trend_rr_high, trend_cases, trend_cases_low, trend_cases_high (the trend times
        the week's expected total), fitted_cases (Σ_i E_it × posterior mean RR_it).
        """
        e_tot = self.expected.sum(axis=0)
        return pd.DataFrame(
            {
                "observed": np.nansum(self.observed, axis=0),
                "expected": e_tot,
                "trend_rr": self.trend_rr_mean,
                "trend_rr_low": self.trend_rr_low,
                "trend_rr_high": self.trend_rr_high,
                "trend_cases": e_tot * self.trend_rr_mean,
                "trend_cases_low": e_tot * self.trend_rr_low,
                "trend_cases_high": e_tot * self.trend_rr_high,
                "fitted_cases": np.sum(self.expected * self.risk_mean, axis=0),
            },
            index=self.weeks,
        )

    def district_week_table(self) -> pd.DataFrame:
        """Long table, one row per district and week: observed, expected, rr_mean,
        rr_band_low, rr_band_high, fitted, fitted_low, fitted_high (E × RR)."""
        n, w = self.observed.shape
        idx = pd.MultiIndex.from_product([self.ids, self.weeks], names=["district", "week"])
        return pd.DataFrame(
            {
                "observed": self.observed.ravel(),
                "expected": self.expected.ravel(),
                "rr_mean": self.risk_mean.ravel(),
                "rr_band_low": self.risk_band_low.ravel(),
                "rr_band_high": self.risk_band_high.ravel(),
                "fitted": (self.expected * self.risk_mean).ravel(),
                "fitted_low": (self.expected * self.risk_band_low).ravel(),
                "fitted_high": (self.expected * self.risk_band_high).ravel(),
            },
            index=idx,
        )

    def summary(self) -> str:
        """Readable text summary."""
        n, w = self.observed.shape
        lines = [
            f"Space-time model (BYM2 districts, {self.trend.upper()} trend, independent district-week term) "
            f"of {n} districts x {w} weeks ({int(np.nansum(self.observed))} observed, "
            f"{self.expected.sum():.1f} expected cases); newest week {self.newest_week}",
            "Hyperparameters (posterior mean, 95% interval):",
        ]
        for name, row in self.hyperparameters.iterrows():
            lines.append(f"  {name:<15} {row['mean']:.3f} ({row['q025']:.3f} to {row['q975']:.3f})")
        tr = self.trend_rr_mean
        lines.append(f"Regional trend: relative risk {tr[0]:.2f} in the first week, {tr[-1]:.2f} in the newest")
        if np.all(np.isnan(self.forecast_midp)):
            lines.append("No forecast check (too few weeks).")
        else:
            win = ("newest week" if self.forecast_window <= 1
                   else f"newest week or sum of the last {self.forecast_window} weeks")
            lines.append(f"Emerging ({win} above forecast, FDR q <= {self.fdr:g}): {int(self.emerging.sum())}")
        lines.append(f"Persistent (P(RR / region > {self.persistent_threshold:g}) >= "
                     f"{self.persistent_probability:g}): "
                     f"{int(self.persistent.sum())}")
        lines.extend(f"Note: {t}" for t in self.notes)
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        head = html.escape(self.summary()).replace("\n", "<br>")
        return f"<div><p>{head}</p>{self.to_frame().head(10).to_html()}</div>"


# ====================================================================== inputs
def _as_table(values, name, ids=None, weeks=None) -> pd.DataFrame:
    if not isinstance(values, pd.DataFrame):
        raise InputError(f"'{name}' must be a pandas DataFrame with one row per district and one column per "
                         f"week; got {type(values).__name__}.")
    if ids is not None:
        if set(values.index) != set(ids) or len(values.index) != len(ids):
            raise InputError(f"'{name}' and 'counts' must have the same district ids (row index).")
        values = values.loc[ids]
    if weeks is not None:
        if list(values.columns) != list(weeks):
            raise InputError(f"'{name}' must have the same week columns as 'counts', in the same order.")
    try:
        return values.astype(float)
    except (TypeError, ValueError):
        raise InputError(f"'{name}' must hold numbers only.") from None


def _check_inputs(counts, expected, graph, covariates):
    if not isinstance(graph, AreaGraph):
        raise InputError(f"'graph' must be an AreaGraph; got {type(graph).__name__}.")
    counts = _as_table(counts, "counts")
    ids = counts.index
    if ids.has_duplicates:
        dup = format_examples(ids[ids.duplicated()])
        raise InputError(f"'counts' has duplicated district ids ({dup}); give one row per district.")
    expected = _as_table(expected, "expected", ids, counts.columns)
    graph = graph.reorder(ids)
    y = counts.to_numpy()
    e = expected.to_numpy()
    if y.shape[1] < MIN_WEEKS:
        raise InputError(f"The space-time model needs at least {MIN_WEEKS} weeks; 'counts' has {y.shape[1]}. "
                         "Use fit_car on the summed weeks instead.")
    fin = np.isfinite(y)
    bad = fin & ((y < 0) | (y != np.round(y)))
    if bad.any():
        rows = format_examples(ids[np.flatnonzero(bad.any(axis=1))])
        raise InputError(f"'counts' has {int(bad.sum())} negative or non-whole values (districts {rows}). "
                         "Counts must be whole numbers >= 0 (NaN for missing).")
    if not np.all(fin[:, :-1].any(axis=0)):
        raise InputError("'counts' has a week with no counts at all; drop it or fill it in.")
    bad_e = ~np.isfinite(e) | (e <= 0)
    if bad_e.any():
        rows = format_examples(ids[np.flatnonzero(bad_e.any(axis=1))])
        raise InputError(f"'expected' has {int(bad_e.sum())} values that are missing, zero or negative "
                         f"(districts {rows}). Expected counts must be > 0.")
    if covariates is None:
        xc = np.zeros((len(ids), 0))
    else:
        cov = covariates.to_frame() if isinstance(covariates, pd.Series) else covariates
        if not isinstance(cov, pd.DataFrame):
            raise InputError(f"'covariates' must be a DataFrame indexed by district id; got {type(cov).__name__}.")
        if set(cov.index) != set(ids):
            raise InputError("'covariates' must have the same district ids as 'counts'.")
        xc = cov.loc[ids].to_numpy(dtype=float)
        if not np.all(np.isfinite(xc)):
            raise InputError("'covariates' has missing or infinite values; fill them in or drop the column.")
        sd = xc.std(axis=0)
        if np.any(sd == 0):
            raise InputError("'covariates' has a constant column; drop it.")
    return ids, counts.columns, graph, y, e, xc


# ====================================================================== fitting
def _log_prior_fn(gs, priors, fixed_phi):
    lam_s, lam_t, lam_d = priors.rates()
    log_mass = np.log(gs.pc_phi_mass(upper=priors.phi_upper, tail=priors.phi_tail)) if fixed_phi is None else 0.0

    def lp(theta):
        th = np.asarray(theta, float)
        out = 0.0
        for lam, s in ((lam_s, th[0]), (lam_t, th[-2]), (lam_d, th[-1])):
            out += np.log(lam) - lam * np.exp(s) + s
        if fixed_phi is None:
            phi = eng._expit(np.clip(th[1], -eng._LOGIT_BOUND, eng._LOGIT_BOUND))
            out += gs.pc_phi_logdensity(phi, upper=priors.phi_upper, tail=priors.phi_tail)[0] - log_mass
            out += np.log(phi) + np.log1p(-phi)
        return out

    return lp


def _latent(y, e, xs, gs, priors, trend):
    fixed_phi = None if gs.n_structured else 0.0
    return _SpaceTimeLatent(y, e, xs, gs, rw_order=1 if trend == "rw1" else 2,
                            intercept_sd=priors.intercept_sd, coefficient_sd=priors.coefficient_sd,
                            fixed_phi=fixed_phi)


def _fit_design(y, e, xs, gs, priors, trend):
    latent = _latent(y, e, xs, gs, priors, trend)
    fixed_phi = latent.fixed_phi
    lam_s, lam_t, lam_d = priors.rates()
    # starting values: moment estimates of the SDs beyond Poisson noise (approximate variance of a log
    # ratio with c cases: 1 / (c + 0.5))
    fin = np.isfinite(y)
    y0 = np.where(fin, y, 0.0)
    e0 = np.where(fin, e, 0.0)
    dist = np.log((y0.sum(axis=1) + 0.5) / (e0.sum(axis=1) + 0.5))
    s0 = np.log(np.sqrt(np.clip(np.var(dist) - np.mean(1.0 / (y0.sum(axis=1) + 0.5)), 0.0025, 1.0)))
    obs_w = fin.any(axis=0)
    week = np.log((y0.sum(axis=0)[obs_w] + 0.5) / (e0.sum(axis=0)[obs_w] + 0.5))
    t0 = np.log(np.clip(np.std(week), 0.05, 0.5))
    raw = np.log((y0 + 0.5) / np.where(fin, e, 1.0)) - dist[:, None]
    resid = np.where(fin, raw, np.nan)[:, obs_w]
    resid = resid - np.nanmean(resid, axis=0)[None, :]
    d_excess = np.nanvar(resid) - np.mean(1.0 / (y0[fin] + 0.5))
    d0 = np.log(np.sqrt(np.clip(d_excess, 0.0004, 1.0)))
    lo = [np.log(1e-3 / lam_s), np.log(1e-3 / lam_t), np.log(1e-3 / lam_d)]
    hi = np.log(20.0)
    if fixed_phi is None:
        theta0 = np.array([s0, 0.0, t0, d0])
        bounds = [(lo[0], hi), (-9.0, 9.0), (lo[1], hi), (lo[2], hi)]
    else:
        theta0 = np.array([s0, t0, d0])
        bounds = [(lo[0], hi), (lo[1], hi), (lo[2], hi)]
    log_prior = _log_prior_fn(gs, priors, fixed_phi)
    if y.size > FAST_LIMIT:
        design = fast_design(log_prior, latent, theta0, bounds)
    else:
        design = eng.integrate_hyperparameters(log_prior, latent, theta0, bounds, strategy="gauss-hermite")
    return design, latent, log_prior


def _stack(design, key):
    return np.column_stack([r.extra[key] for r in design.results])


def _hyper_table(design, latent):
    if len(design.results) >= 30:
        pts, wts = eng.hyper_marginals(design, grid_step=0.25)
    else:  # axial design: Gaussian approximation of log p(theta | y) at the mode
        z, wz = np.polynomial.hermite_e.hermegauss(9)
        d = design.mode.size
        mesh = np.array(np.meshgrid(*([z] * d), indexing="ij")).reshape(d, -1).T
        wts = np.prod(np.array(np.meshgrid(*([wz] * d), indexing="ij")).reshape(d, -1).T, axis=1)
        wts = wts / wts.sum()
        pts = design.mode + mesh @ design.scales.T
    full = np.array([latent.full_theta(p) for p in pts])
    rows = {
        "sigma_district": np.exp(full[:, 0]),
        "phi": eng._expit(full[:, 1]),
        "sigma_trend": np.exp(full[:, 2]),
        "sigma_interaction": np.exp(full[:, 3]),
    }
    out = {}
    for name, vals in rows.items():
        mean = float(np.sum(vals * wts))
        sd = float(np.sqrt(max(np.sum((vals - mean) ** 2 * wts), 0.0)))
        q = eng.weighted_quantiles(vals, wts, [0.025, 0.5, 0.975])
        out[name] = {"mean": mean, "sd": sd, "q025": q[0], "q50": q[1], "q975": q[2]}
    table = pd.DataFrame.from_dict(out, orient="index")
    table.index.name = "parameter"
    return table


def _mixture_summary(mu, sd, w, *, threshold=None):
    """Mean, 95% interval (and exceedance probabilities) of exp(N mixture) for every row."""
    mean = eng.mix(np.exp(mu + 0.5 * sd**2), w)
    lo, hi = eng.mixture_quantiles(mu, sd, w, (0.025, 0.975))
    out = {"mean": mean, "low": np.exp(lo), "high": np.exp(hi)}
    if threshold is not None:
        out["p1"] = np.clip(eng.mix(ndtr(mu / sd), w), 0.0, 1.0)
        out["pt"] = np.clip(eng.mix(ndtr((mu - np.log(threshold)) / sd), w), 0.0, 1.0)
    return out


def _forecast(mu, sd, w, e_new, y_new, *, interval=True):
    """Predictive mean, 95% interval and upper-tail mid-p of Poisson(E exp(eta)), eta ~ mixture.

    mu, sd: (n, K) per-design-point means and SDs of eta; the mean and the mid-p use the
    full mixture (Gauss-Hermite over eta within each point); the interval uses one normal
    matched to the mixture's mean and variance of eta (exact when one point dominates);
    ``interval=False`` skips it (NaN bounds).
    """
    n = mu.shape[0]
    log_e = np.log(e_new)
    mean = e_new * eng.mix(np.exp(mu + 0.5 * sd**2), w)
    yv = np.where(np.isfinite(y_new), y_new, 0.0)
    midp = np.zeros(n)
    lgy = gammaln(yv + 1.0)
    for k in range(w.size):
        lam = np.exp(log_e[:, None] + mu[:, k:k + 1] + sd[:, k:k + 1] * _GH_NODES[None, :])
        above = pdtrc(yv[:, None], lam)
        pmf = np.exp(yv[:, None] * np.log(lam) - lam - lgy[:, None])
        midp += w[k] * eng.mix(above + 0.5 * pmf, _GH_WEIGHTS)
    midp = np.where(np.isfinite(y_new), np.clip(midp, 0.0, 1.0), np.nan)
    if not interval:
        return mean, np.full(n, np.nan), np.full(n, np.nan), midp
    m1 = eng.mix(mu, w)
    s1 = np.sqrt(np.maximum(eng.mix(mu**2 + sd**2, w) - m1**2, 1e-300))
    lam = np.exp(log_e[:, None] + m1[:, None] + s1[:, None] * _GH_NODES[None, :])

    def cdf(kk):
        return eng.mix(pdtr(kk[:, None], lam), _GH_WEIGHTS)

    bounds = []
    top = np.ceil(lam.max(axis=1) + 10.0 * np.sqrt(lam.max(axis=1)) + 10.0)
    for p in (0.025, 0.975):
        a = np.full(n, -1.0)  # cdf(a) < p (cdf(-1) = 0)
        b = top.copy()  # cdf(b) >= p
        while np.any(b - a > 1):
            mid = np.floor(0.5 * (a + b))
            below = cdf(np.maximum(mid, 0.0)) < p
            a = np.where(below & (b - a > 1), mid, a)
            b = np.where(~below & (b - a > 1), mid, b)
        bounds.append(b)
    return mean, bounds[0], bounds[1], midp


def _window_moments(mu, var, var_d, e_win):
    """Log-normal (mean, SD of the log) matched to the rate Λ = Σ_t E_t exp(eta_t) of a k-week sum.

    mu, var: (n, k, K) posterior means and variances of eta over the k held-out weeks at each of
    the K design points; var_d: (K,) the interaction variance σ_d² (the part of each eta_t that is
    independent across weeks); e_win: (n, k). The rest of eta_t (b0 + x b + b_i + g_t) is taken as
    perfectly correlated over the k weeks, which can only widen the distribution of Λ (conservative).
    Mean of Λ exact; variance exact under that covariance; log-normal shape matched to both
    (Fenton 1960).
    """
    s_d = np.minimum(var_d[None, None, :], var)
    shared = np.sqrt(np.maximum(var - s_d, 0.0))  # (n, k, K)
    a = e_win[:, :, None] * np.exp(mu + 0.5 * var)  # E[E_t exp(eta_t)]
    m1 = a.sum(axis=1)
    # E[Λ²] = Σ_t Σ_s a_t a_s exp(cov_ts), cov_ts = shared_t shared_s (t != s), var_t (t = s)
    cov = shared[:, :, None, :] * shared[:, None, :, :]
    k = mu.shape[1]
    idx = np.arange(k)
    cov[:, idx, idx, :] = var
    cross = np.sum(a[:, :, None, :] * a[:, None, :, :] * np.exp(cov), axis=(1, 2))
    s2 = np.log(np.maximum(cross / m1**2, 1.0))
    return np.log(m1) - 0.5 * s2, np.sqrt(np.maximum(s2, 1e-300))


def _bonferroni_windows(p_list):
    """(combined p, index of the smallest) of the per-window mid-p values, NaN where all are NaN."""
    ps = np.column_stack(p_list)
    filled = np.where(np.isfinite(ps), ps, np.inf)
    best = np.argmin(filled, axis=1)
    low = filled[np.arange(ps.shape[0]), best]
    combined = np.where(np.isfinite(low), np.minimum(1.0, ps.shape[1] * low), np.nan)
    return combined, best


def fit_spacetime(
    counts: pd.DataFrame,
    expected: pd.DataFrame,
    graph: AreaGraph,
    *,
    covariates: pd.DataFrame | None = None,
    trend: str = "rw1",
    threshold: float = 1.0,
    forecast: bool = True,
    forecast_window: int = 3,
    fdr: float = 0.05,
    persistent_probability: float = 0.8,
    persistent_threshold: float = 1.0,
    priors: SpaceTimePriors | None = None,
) -> SpaceTimeFit:
    r"""Fit the Poisson space-time model and check each district's newest week against its forecast.

    Parameters
    ----------
    counts : pandas.DataFrame, shape (n districts, W weeks)
        Case counts, one row per district (index = district id), one column per week,
        oldest to newest. NaN marks a missing count (left out of the likelihood).
    expected : pandas.DataFrame, same shape
        Expected counts E_it (e.g. by indirect standardization over the whole window, so
        that region-wide rises show in the trend); all > 0.
    graph : AreaGraph
        Neighbour graph over the same districts.
    covariates : pandas.DataFrame, optional
        District-level covariates (standardized internally).
    trend : {"rw1", "rw2"}, default="rw1"
        Random walk of order 1 or 2 for the regional weekly trend.
    threshold : float, default=1.0
        Relative-risk threshold of ``p_above_threshold``.
    forecast : bool, default=True
        Refit without the newest week's counts and compare them with their predictive
        distribution (doubles the run time).
    forecast_window : int, default=3
        Also refit without the newest ``forecast_window`` weeks and compare the sum of
        those counts with its predictive distribution (catches an excess that builds over
        a few weeks; one more refit). 1 checks the newest week only. Windows longer than
        the data allow (fewer than 3 earlier weeks) are skipped with a note.
    fdr : float, default=0.05
        False-discovery rate for the "emerging" flag.
    persistent_probability : float, default=0.8
        P(RR_iT / exp(b0 + g_T) > persistent_threshold) at or above which a
        district is "persistent": its newest week's risk stands above the
        region's level in the same week (so a region-wide rise, carried by the
        trend g_T, does not flag every district at once).
    persistent_threshold : float, default=1.0
        The ratio to the region's level that a "persistent" district exceeds
        with probability at least ``persistent_probability``. With many weeks
        the district's risk is estimated precisely, so at 1.0 every district a
        little above the regional level qualifies; set e.g. 1.2 to flag only a
        meaningful excess.
    priors : SpaceTimePriors, optional

    Returns
    -------
    SpaceTimeFit

    Notes
    -----
    y_it ~ Poisson(E_it RR_it), log RR_it = β0 + x_iβ + b_i + g_t + d_it with
    b = σ_s(√(1−φ) v + √φ u*) (BYM2, Riebler et al. 2016; u* the scaled intrinsic CAR with
    sum-to-zero constraint per connected component), g a scaled random walk of order 1 or
    2 (Σ g_t = 0; for order 2 the slope has a N(0, 1) prior), d_it ~ N(0, σ_d²)
    independently (type I interaction, Knorr-Held 2000). PC priors on σ_s, σ_t, σ_d and φ.
    Inference: Laplace approximation of the latent field for fixed θ = (log σ_s, logit φ,
    log σ_t, log σ_d), numerical integration over θ on 3⁴ Gauss–Hermite points in
    standardized coordinates (Rue, Martino & Chopin 2009), posterior means corrected as in
    :func:`areamap.fit_car`.

    Forecast check: with y_iW treated as missing, the predictive distribution of Y_iW is
    Poisson(E_iW RR_iW) mixed over the posterior of RR_iW; its upper-tail mid-p value
    P(Y > y) + ½P(Y = y) is the alarm statistic, adjusted by Benjamini & Hochberg (1995)
    across districts. Mid-p values of a discrete distribution are not exactly uniform;
    the FDR control is approximate.

    Multi-week check (``forecast_window`` = k > 1): with y_i,W-k+1..W missing, the sum
    S_i = Σ_t Y_it is Poisson(Λ_i) given Λ_i = Σ_t E_it RR_it. Each held-out η_it is the
    shared part β0 + x_iβ + b_i + g_t plus an independent d_it ~ N(0, σ_d²); the shared parts
    are treated as perfectly correlated over the k weeks (an upper bound on Var Λ_i, so the
    mid-p is conservative), and Λ_i is matched to a log-normal by its exact mean and that
    variance (Fenton 1960). The district's p-value is the Bonferroni combination over the two
    windows, min(1, 2 min(p_1, p_k)), then Benjamini-Hochberg across districts;
    ``forecast_fired`` records the window with the smaller mid-p.

    References
    ----------
    Knorr-Held, L. (2000). Bayesian modelling of inseparable space-time variation in disease
    risk. Statistics in Medicine 19, 2555-2567.
    Riebler, A., Sørbye, S. H., Simpson, D. & Rue, H. (2016). An intuitive Bayesian spatial
    model for disease mapping that accounts for scaling. Stat. Methods Med. Res. 25(4).
    Rue, H., Martino, S. & Chopin, N. (2009). Approximate Bayesian inference for latent
    Gaussian models by using integrated nested Laplace approximations. JRSS B 71(2).
    Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate. JRSS B 57(1).
    Fenton, L. F. (1960). The sum of log-normal probability distributions in scatter
    transmission systems. IRE Trans. Communications Systems 8(1), 57-67.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> from areamap.graphs import AreaGraph
    >>> ids = [f"d{i}" for i in range(6)]
    >>> g = AreaGraph.from_edges(ids, [(ids[i], ids[i + 1]) for i in range(5)])
    >>> rng = np.random.default_rng(1)
    >>> e = pd.DataFrame(np.full((6, 5), 4.0), index=ids, columns=[1, 2, 3, 4, 5])
    >>> y = pd.DataFrame(rng.poisson(4.0, (6, 5)), index=ids, columns=e.columns)
    >>> fit = fit_spacetime(y, e, g)
    >>> fit.to_frame().shape
    (6, 22)
    >>> bool(np.all(fit.forecast_low <= fit.forecast_high))
    True
    """
    f = "fit_spacetime"
    check_choice(trend, "trend", f, _TRENDS)
    threshold = check_interval(threshold, "threshold", f, low=0.0)
    fdr = check_interval(fdr, "fdr", f, low=0.0, high=1.0)
    forecast_window = check_positive_int(forecast_window, "forecast_window", f)
    persistent_probability = check_interval(persistent_probability, "persistent_probability", f,
                                            low=0.0, high=1.0)
    persistent_threshold = check_interval(persistent_threshold, "persistent_threshold", f, low=0.0)
    if priors is None:
        priors = SpaceTimePriors()
    elif not isinstance(priors, SpaceTimePriors):
        raise InputError(f"'priors' must be a SpaceTimePriors object; got {type(priors).__name__}.")
    ids, weeks, graph, y, e, xc = _check_inputs(counts, expected, graph, covariates)
    xs = (xc - xc.mean(axis=0)) / xc.std(axis=0) if xc.shape[1] else xc
    n, w = y.shape
    notes = []
    gs = eng._GraphStructure(graph.adjacency)
    if gs.islands.size:
        notes.append(f"{gs.islands.size} island(s) carry only the unstructured district effect.")
    design, latent, log_prior = _fit_design(y, e, xs, gs, priors, trend)
    if design.edge:
        warnings.warn(
            "The posterior of the space-time hyperparameters reaches the edge of the integration design or a "
            "bound (often: no district-week variation beyond Poisson noise, so the interaction SD goes to 0): "
            "results lean on the priors there. Check SpaceTimePriors if this is unexpected.",
            ModelWarning, stacklevel=2,
        )
        notes.append("Hyperparameter posterior reaches the edge of the integration design.")
    wt = design.weights
    mu = np.column_stack([r.mean_eta for r in design.results])
    sd = np.sqrt(np.column_stack([r.var_eta for r in design.results]))
    last = np.arange(n) * w + (w - 1)
    cur = _mixture_summary(mu[last], sd[last], wt, threshold=threshold)
    # every district-week: mean exactly, band from a log-normal matched to the mixture
    m1 = eng.mix(mu, wt)
    v1 = np.maximum(eng.mix(mu**2 + sd**2, wt) - m1**2, 0.0)
    risk_mean = eng.mix(np.exp(mu + 0.5 * sd**2), wt).reshape(n, w)
    band_lo = np.exp(m1 - 1.959964 * np.sqrt(v1)).reshape(n, w)
    band_hi = np.exp(m1 + 1.959964 * np.sqrt(v1)).reshape(n, w)
    lev = _mixture_summary(_stack(design, "mean_level"), np.sqrt(_stack(design, "var_level")), wt,
                           threshold=persistent_threshold)
    # newest week's risk against the region's level in the same week, exp(eta_iT - b0 - g_T): a region-wide
    # rise (carried by g_T) moves every district's RR but not this ratio. The covariance of eta_iT and g_T is
    # left out, which only widens the spread (conservative; g_T is estimated from all districts, so small).
    rel_mu = mu[last] - _stack(design, "mean_trend")[-1][None, :]
    rel_sd = np.sqrt(sd[last] ** 2 + _stack(design, "var_trend")[-1][None, :])
    week_excess_p = np.clip(eng.mix(ndtr((rel_mu - np.log(persistent_threshold)) / rel_sd), wt), 0.0, 1.0)
    tr = _mixture_summary(_stack(design, "mean_trend"), np.sqrt(_stack(design, "var_trend")), wt)
    nan = np.full(n, np.nan)
    fc_mean, fc_lo, fc_hi, midp, q = nan, nan, nan, nan, nan
    window_midp, forecast_p, fired = nan, nan, np.ones(n, int)
    emerging = np.zeros(n, bool)
    designs = {"full": design}
    if forecast:
        if w - 1 < MIN_WEEKS:
            notes.append(f"No forecast check: it needs at least {MIN_WEEKS} earlier weeks.")
        else:
            y_f = y.copy()
            y_f[:, -1] = np.nan
            design_f = reweight_design(design, log_prior, latent.with_data(y_f))
            designs["forecast"] = design_f
            muf = np.column_stack([r.mean_eta[last] for r in design_f.results])
            sdf = np.sqrt(np.column_stack([r.var_eta[last] for r in design_f.results]))
            fc_mean, fc_lo, fc_hi, midp = _forecast(muf, sdf, design_f.weights, e[:, -1], y[:, -1])
            p_list, lengths = [midp], [1]
            k = forecast_window
            if k > 1 and w - k < MIN_WEEKS:
                notes.append(f"No {k}-week forecast check: it needs at least {MIN_WEEKS} earlier weeks.")
            elif k > 1:
                y_k = y.copy()
                y_k[:, -k:] = np.nan
                design_k = reweight_design(design, log_prior, latent.with_data(y_k), starts=design_f)
                designs[f"forecast_{k}"] = design_k
                cells = np.arange(n)[:, None] * w + np.arange(w - k, w)[None, :]
                mu_k = np.stack([r.mean_eta[cells] for r in design_k.results], axis=-1)
                var_k = np.stack([r.var_eta[cells] for r in design_k.results], axis=-1)
                var_d = np.array([np.exp(2.0 * latent.full_theta(r.theta)[3]) for r in design_k.results])
                m_log, s_log = _window_moments(mu_k, var_k, var_d, e[:, -k:])
                obs_k = np.where(np.isfinite(y[:, -k:]).all(axis=1), np.nansum(y[:, -k:], axis=1), np.nan)
                window_midp = _forecast(m_log, s_log, design_k.weights, np.ones(n), obs_k, interval=False)[3]
                p_list.append(window_midp)
                lengths.append(k)
            forecast_p, best = _bonferroni_windows(p_list)
            fired = np.asarray(lengths)[best]
            q = adjust_pvalues(forecast_p, "fdr")
            emerging = np.nan_to_num(q, nan=1.0) <= fdr
    persistent = week_excess_p >= persistent_probability
    return SpaceTimeFit(
        ids=pd.Index(ids), weeks=pd.Index(weeks), observed=y, expected=e, trend=trend, threshold=threshold,
        fdr=fdr, persistent_probability=persistent_probability, persistent_threshold=persistent_threshold,
        current_rr_mean=cur["mean"], current_rr_low=cur["low"], current_rr_high=cur["high"],
        p_above_1=cur["p1"], p_above_threshold=cur["pt"],
        level_mean=lev["mean"], level_low=lev["low"], level_high=lev["high"], level_p_exceed=lev["pt"],
        week_excess_p=week_excess_p,
        risk_mean=risk_mean, risk_band_low=band_lo, risk_band_high=band_hi,
        trend_rr_mean=tr["mean"], trend_rr_low=tr["low"], trend_rr_high=tr["high"],
        forecast_mean=fc_mean, forecast_low=fc_lo, forecast_high=fc_hi, forecast_midp=midp, forecast_q=q,
        emerging=emerging, persistent=persistent,
        hyperparameters=_hyper_table(design, latent), n_design_points=len(design.results), priors=priors,
        notes=tuple(notes), forecast_window=forecast_window, window_midp=window_midp, forecast_p=forecast_p,
        forecast_fired=fired, _designs=designs,
    )

