"""Poisson kriging of risk: area-to-area estimates and the area-to-point surface.

All systems are solved in batches over areas (one ``numpy.linalg.solve`` call
for all neighbourhoods); covariances between areas are computed once per
distinct pair of areas and gathered into the neighbourhood matrices.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import shapely
from scipy.spatial import cKDTree

from .._params import check_choice, check_interval, check_positive_int
from ..errors import InputError
from ._discretize import AreaPoints, _geoms, discretize_areas, grid_cells, locate_points
from ._kernels import MODEL_CODES, area_pair_covariance, point_area_covariance
from ._variogram import (
    RiskVariogram,
    VariogramModel,
    _counts,
    _standardised,
    risk_variogram,
)

__all__ = ["PoissonKrigingResult", "RiskSurface", "poisson_kriging", "ordinary_kriging"]

_CHUNK_ELEMENTS = 4_000_000  # matrix entries gathered per block of surface cells (bounds memory to ~35 MB)


# ----------------------------------------------------------------------------------------------------------
# covariance building blocks
def _neighbourhoods(centres: np.ndarray, k1: int) -> np.ndarray:
    """Indices of the k1 nearest areas (by centre) of each area, the area itself first."""
    n = centres.shape[0]
    if k1 >= n:
        d = np.hypot(centres[:, None, 0] - centres[None, :, 0], centres[:, None, 1] - centres[None, :, 1])
        d[np.arange(n), np.arange(n)] = -1.0
        return np.argsort(d, axis=1, kind="stable")
    _, nb = cKDTree(centres).query(centres, k=k1)
    nb = np.asarray(nb, dtype=np.int64).reshape(n, k1)
    own = np.arange(n)[:, None]
    has = (nb == own).any(axis=1)
    nb[~has, -1] = np.arange(n)[~has]  # coincident centres: make sure the area is in its own set
    pos = np.argmax(nb == own, axis=1)
    first = nb[:, 0].copy()
    nb[np.arange(n), pos] = first
    nb[:, 0] = np.arange(n)
    return nb


def _model_args(model: VariogramModel) -> tuple:
    return (MODEL_CODES[model.model], float(model.nugget), float(model.partial_sill), float(model.range))


def _pair_covariance(points: AreaPoints, model: VariogramModel, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Average point covariance between areas a[k] and b[k]: sum_p sum_q w_p w_q C(|u_p - u_q|)."""
    return area_pair_covariance(points.coords, points.weights, points.counts.astype(np.int64),
                                a.astype(np.int64), b.astype(np.int64), *_model_args(model))


def _neighbourhood_covariances(points: AreaPoints, model: VariogramModel, nb: np.ndarray) -> np.ndarray:
    """C[alpha, j, k] = Cov(v_nb[alpha, j], v_nb[alpha, k]), each distinct pair computed once."""
    n, k1 = nb.shape
    iu, ju = np.triu_indices(k1)
    a = nb[:, iu]
    b = nb[:, ju]
    lo = np.minimum(a, b).ravel()
    hi = np.maximum(a, b).ravel()
    key = lo * n + hi
    uniq, inv = np.unique(key, return_inverse=True)
    cov = _pair_covariance(points, model, uniq // n, uniq % n)
    C = np.empty((n, k1, k1))
    vals = cov[inv].reshape(n, iu.size)
    C[:, iu, ju] = vals
    C[:, ju, iu] = vals
    return C


def _systems(C: np.ndarray, err: np.ndarray, nb: np.ndarray) -> np.ndarray:
    """Ordinary (Poisson) kriging matrices [[C + diag(err), 1], [1', 0]] for every neighbourhood."""
    n, k1, _ = C.shape
    A = np.zeros((n, k1 + 1, k1 + 1))
    A[:, :k1, :k1] = C
    d = np.arange(k1)
    A[:, d, d] += err[nb]
    A[:, :k1, k1] = 1.0
    A[:, k1, :k1] = 1.0
    return A


def _solve(A: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    b = np.concatenate([rhs, np.ones((rhs.shape[0], 1))], axis=1)
    try:
        sol = np.linalg.solve(A, b[..., None])[..., 0]
    except np.linalg.LinAlgError:  # singular neighbourhood (duplicate areas): least squares per batch
        sol = np.einsum("nij,nj->ni", np.linalg.pinv(A), b)
    return sol[:, :-1], sol[:, -1]


def _correct(lam: np.ndarray, policy: str) -> np.ndarray:
    """Set negative weights to zero and rescale to sum to one (common practice)."""
    if policy == "keep":
        return lam
    pos = np.maximum(lam, 0.0)
    tot = pos.sum(axis=1, keepdims=True)
    return np.where(tot > 0, pos / np.where(tot > 0, tot, 1.0), lam)


def _error_variance(lam, c_target, c_self, Cerr):
    """Var(Z(v) - sum lam_i z_i) = C(v,v) - 2 lam'c + lam'(C + D)lam, for any weights summing to one."""
    quad = np.einsum("ni,nij,nj->n", lam, Cerr, lam)
    return c_self - 2.0 * np.einsum("ni,ni->n", lam, c_target) + quad


# ----------------------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class RiskSurface:
    """Area-to-point Poisson kriging on a regular grid.

    Attributes
    ----------
    relative_risk, variance : ndarray, shape (ny, nx)
        Kriged relative risk (risk / m*) and its kriging variance; NaN outside
        every area. Row 0 is the top (largest y).
    rate : ndarray, shape (ny, nx)
        relative_risk * m* * per.
    area : ndarray of int, shape (ny, nx)
        Position of the area containing each cell centre (-1 outside).
    transform : tuple of 6 floats
        Affine transform (a, b, c, d, e, f): x = c + a * (col + ½) and
        y = f + e * (row + ½) at cell centres; the usual GDAL/raster ordering.
    bounds : tuple (xmin, ymin, xmax, ymax)
    crs : object
        CRS of the areas (None when unknown).
    ids : pandas.Index
        Area ids matching ``area`` positions.
    """

    relative_risk: np.ndarray
    variance: np.ndarray
    rate: np.ndarray
    area: np.ndarray
    transform: tuple
    bounds: tuple
    crs: object
    ids: pd.Index
    per: float

    @property
    def shape(self) -> tuple[int, int]:
        return self.relative_risk.shape

    def aggregate(self) -> pd.Series:
        """Mean relative risk of the cells inside each area (NaN for areas with no cell centre)."""
        m = self.area >= 0
        n = len(self.ids)
        s = np.bincount(self.area[m], weights=self.relative_risk[m], minlength=n)
        c = np.bincount(self.area[m], minlength=n)
        with np.errstate(invalid="ignore"):
            return pd.Series(np.where(c > 0, s / np.maximum(c, 1), np.nan), index=self.ids,
                             name="surface_relative_risk")

    def summary(self) -> str:
        ny, nx = self.shape
        inside = self.area >= 0
        rr = self.relative_risk[inside]
        return "\n".join([
            f"Risk surface (area-to-point Poisson kriging): {ny} x {nx} cells, {int(inside.sum())} inside areas",
            f"  transform {tuple(round(t, 6) for t in self.transform)}; bounds {self.bounds}",
            f"  relative risk {np.nanmin(rr):.3g} - {np.nanmax(rr):.3g}; kriging sd up to "
            f"{np.sqrt(np.nanmax(self.variance)):.3g}",
            "  Each cell uses the kriging system of the area holding it; values over thinly populated areas are "
            "interpolated, not observed.",
        ])

    def _repr_html_(self) -> str:
        return f"<pre>{html.escape(self.summary())}</pre>"

    def to_frame(self) -> pd.DataFrame:
        """One row per cell inside an area: row, col, x, y, area id, relative_risk, sd, rate."""
        rr, cc = np.nonzero(self.area >= 0)
        a, _, c, _, e, f = self.transform
        return pd.DataFrame({"row": rr, "col": cc, "x": c + a * (cc + 0.5), "y": f + e * (rr + 0.5),
                             "area": self.ids[self.area[rr, cc]], "relative_risk": self.relative_risk[rr, cc],
                             "sd": np.sqrt(self.variance[rr, cc]), "rate": self.rate[rr, cc]})


def _surface(points, model, nb, A, z, err, m, per, geoms, bounds, shape, policy, crs, ids):
    ny, nx = shape
    xs, ys, tr = grid_cells(bounds, shape)
    gx, gy = np.meshgrid(xs, ys)
    owner = locate_points(geoms, gx.ravel(), gy.ravel())
    cells = np.flatnonzero(owner >= 0)
    rr = np.full(ny * nx, np.nan)
    var = np.full(ny * nx, np.nan)
    _n, k1 = nb.shape
    Ainv = np.linalg.inv(A)
    step = max(1, _CHUNK_ELEMENTS // (k1 * k1))
    c0 = model.sill
    args = _model_args(model)
    counts = points.counts.astype(np.int64)
    px_all, py_all = gx.ravel(), gy.ravel()
    Cerr = A[:, :k1, :k1]
    for s in range(0, cells.size, step):  # blocks of cells
        cb = cells[s:s + step]
        own = owner[cb]
        nbs = nb[own]                                        # (B, k1)
        cov = point_area_covariance(px_all[cb], py_all[cb], nbs, points.coords, points.weights, counts, *args)
        b = np.concatenate([cov, np.ones((cb.size, 1))], axis=1)
        sol = np.einsum("bij,bj->bi", Ainv[own], b)
        lam, mu = sol[:, :k1], sol[:, k1]
        if policy == "keep":
            v = c0 - np.einsum("bi,bi->b", lam, cov) - mu
        else:
            lam = _correct(lam, policy)
            v = c0 - 2 * np.einsum("bi,bi->b", lam, cov) + np.einsum("bi,bij,bj->b", lam, Cerr[own], lam)
        rr[cb] = np.einsum("bi,bi->b", lam, z[nbs])
        var[cb] = np.maximum(v, 0.0)
    rr = rr.reshape(ny, nx)
    return RiskSurface(relative_risk=rr, variance=var.reshape(ny, nx), rate=rr * m * per,
                       area=owner.reshape(ny, nx), transform=tr, bounds=tuple(float(b) for b in bounds),
                       crs=crs, ids=ids, per=per)


# ----------------------------------------------------------------------------------------------------------
def cv_scores(y: np.ndarray, e: np.ndarray, pred_rr: np.ndarray) -> dict:
    """Held-out prediction scores for relative-risk predictions of counts y with expected counts e.

    ``deviance``: mean Poisson deviance 2[y log(y / mu) - (y - mu)], mu = e * pred;
    ``rmse``: expected-count-weighted RMSE of observed vs predicted relative risk;
    ``risk_mse``: that weighted MSE minus the Poisson noise sum(z) / sum(e), an unbiased
    estimate of the weighted mean squared error against the true (unobserved) relative
    risk rho, because each prediction leaves its own count out and
    E[e (z - p)^2] = e (rho - p)^2 + rho with E[z] = rho.
    """
    ok = np.isfinite(pred_rr)
    y, e, p = y[ok], e[ok], np.maximum(pred_rr[ok], 1e-12)
    mu = e * p
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(y > 0, y * np.log(y / mu), 0.0)
    z = y / e
    mse = float(np.sum(e * (z - p) ** 2) / e.sum())
    return {"deviance": float(np.mean(2 * (t - (y - mu)))), "rmse": float(np.sqrt(mse)),
            "risk_mse": mse - float(z.sum() / e.sum()), "areas": int(y.size)}


@dataclass(frozen=True, eq=False)
class PoissonKrigingResult:
    """Area-to-area Poisson kriging of risk (:func:`poisson_kriging`).

    Attributes
    ----------
    ids : pandas.Index
    observed, population : ndarray, shape (n,)
    regional_rate : float
        m* = sum(observed) / sum(population).
    per : float
        Rates are reported per ``per`` people.
    relative_risk, relative_risk_sd : ndarray
        Kriged risk divided by m*, and its kriging standard deviation.
    rate, rate_low, rate_high : ndarray
        Kriged rate per ``per`` and an approximate interval at ``level``
        (normal, kriged rate ± z sd, lower end at 0).
    raw_rate : ndarray
        observed / population * per.
    cv_relative_risk : ndarray
        Leave-one-out prediction: the area's risk kriged from its neighbours
        without its own count.
    negative_weight_count : ndarray of int
        Negative kriging weights in each area's system (before correction).
    negative_weight_sum : ndarray
        Their sum (0 when none).
    variogram : RiskVariogram or VariogramModel
    neighbours : int
        Areas per neighbourhood (including the area itself).
    negative_weights : str
        ``"zero"`` (set to 0 and rescaled) or ``"keep"``.
    level : float
    points : AreaPoints
    surface : RiskSurface or None
    cv : dict
        Leave-one-out scores (see :func:`cross_validate_smoothers` for their meaning).
    notes : tuple of str
    """

    ids: pd.Index
    observed: np.ndarray
    population: np.ndarray
    regional_rate: float
    per: float
    relative_risk: np.ndarray
    relative_risk_sd: np.ndarray
    rate: np.ndarray
    rate_low: np.ndarray
    rate_high: np.ndarray
    raw_rate: np.ndarray
    cv_relative_risk: np.ndarray
    negative_weight_count: np.ndarray
    negative_weight_sum: np.ndarray
    variogram: object
    neighbours: int
    negative_weights: str
    level: float
    points: AreaPoints
    surface: RiskSurface | None
    cv: dict
    notes: tuple = field(default=())

    @property
    def model(self) -> VariogramModel:
        v = self.variogram
        return v.fitted if isinstance(v, RiskVariogram) else v

    def to_frame(self) -> pd.DataFrame:
        """One row per area, in input order."""
        return pd.DataFrame({
            "observed": self.observed, "population": self.population, "raw_rate": self.raw_rate,
            "kriged_rate": self.rate, "kriged_rate_low": self.rate_low, "kriged_rate_high": self.rate_high,
            "kriged_relative_risk": self.relative_risk, "kriged_relative_risk_sd": self.relative_risk_sd,
            "loo_relative_risk": self.cv_relative_risk,
            "negative_weight_count": self.negative_weight_count,
            "negative_weight_sum": self.negative_weight_sum,
        }, index=self.ids)

    def summary(self) -> str:
        m = self.model
        neg = int((self.negative_weight_count > 0).sum())
        lines = [
            "Poisson kriging of risk (area-to-area)",
            f"  areas: {len(self.ids)}; regional rate m* = {self.regional_rate * self.per:.4g} per {self.per:g}",
            f"  variogram: {m.describe()}",
            f"  neighbourhood: {self.neighbours} nearest areas (own count included); "
            f"points per area: median {int(np.median(self.points.counts))} ({self.points.method})",
            f"  negative weights: {neg} areas had some (policy '{self.negative_weights}'); "
            f"largest total {self.negative_weight_sum.min():.3g}",
            f"  leave-one-out: mean Poisson deviance {self.cv['deviance']:.4g}, weighted RMSE of relative risk "
            f"{self.cv['rmse']:.4g}, noise-corrected MSE {self.cv['risk_mse']:.4g}",
            f"  relative risk range: {np.nanmin(self.relative_risk):.3g} - {np.nanmax(self.relative_risk):.3g}",
        ]
        if self.surface is not None:
            ny, nx = self.surface.shape
            lines.append(f"  surface: {ny} x {nx} cells, transform {tuple(round(t, 6) for t in self.surface.transform)}")
        lines += [f"  note: {n}" for n in self.notes]
        lines.append("  Intervals are approximate (normal, from the kriging variance) and describe area risk "
                     "under the fitted model; they do not describe individuals (ecological fallacy).")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        return f"<pre>{html.escape(self.summary())}</pre>" + self.to_frame().to_html(max_rows=20)


def poisson_kriging(
    cases,
    population,
    areas,
    *,
    variogram: RiskVariogram | VariogramModel | None = None,
    neighbours: int = 32,
    points: AreaPoints | None = None,
    points_per_area: int = 16,
    negative_weights: str = "zero",
    poisson_error: bool = True,
    surface_shape: tuple[int, int] | int | None = None,
    level: float = 0.95,
    per: float = 100_000.0,
) -> PoissonKrigingResult:
    """Area-to-area Poisson kriging of risk, optionally with an area-to-point risk surface.

    Parameters
    ----------
    cases : array-like or pandas.Series, shape (n,)
        Counts per area (Series are matched to ``areas`` by index).
    population : array-like or pandas.Series, shape (n,)
        Population at risk (> 0); expected counts work too (risk then reads
        as a standardized ratio; use ``per=1``).
    areas : geopandas.GeoDataFrame or GeoSeries
        Area polygons, index = area ids.
    variogram : RiskVariogram or VariogramModel, optional
        Default: :func:`risk_variogram` with ``model="auto"``.
    neighbours : int, default=32
        Nearest other areas (by weighted centre) in each local system; the
        area's own count is always included too.
    points : AreaPoints, optional
        Discretisation from :func:`discretize_areas` (e.g. population-weighted
        points); default a per-area grid of ``points_per_area`` points.
    points_per_area : int, default=16
    negative_weights : {"zero", "keep"}, default="zero"
        ``"zero"`` sets negative kriging weights to 0 and rescales the rest to
        sum to 1 (the kriging variance is then recomputed for those weights);
        ``"keep"`` uses the weights as solved (estimates can fall below 0).
        Counts are reported either way.
    poisson_error : bool, default=True
        Add the Poisson error variance m*/n_i of each area's rate to its
        diagonal entry. ``False`` treats rates as exact (ordinary block kriging).
    surface_shape : (ny, nx) or int, optional
        Also krige a risk surface on a regular grid of that many cells over the
        areas' extent (an int gives the long side; cells are square).
    level : float, default=0.95
        Coverage of the approximate intervals.
    per : float, default=100000
        Rates per this many people.

    Returns
    -------
    PoissonKrigingResult

    Raises
    ------
    InputError, ModelError
        Bad inputs; all counts zero; variogram problems (see :func:`risk_variogram`).

    Notes
    -----
    Work on the relative-risk scale z_i = y_i / e_i with e_i = m* n_i. For area
    v_alpha with neighbourhood N (its K nearest areas and itself) the weights
    solve (Kyriakidis 2004; Goovaerts 2006)

    sum_j lambda_j [C(v_i, v_j) + delta_ij / e_i] + mu = C(v_i, v_alpha), i in N;
    sum_j lambda_j = 1,

    with C(v_i, v_j) = sum_p sum_q w_p w_q C(|u_p - u_q|), the average point
    covariance over the areas' discretisation points (the nugget enters only
    for coincident points). The estimate is z*(v_alpha) = sum lambda_i z_i and
    its kriging variance sigma^2 = C(v_alpha, v_alpha) - sum lambda_i
    C(v_i, v_alpha) - mu. The 1/e_i term (on the rate scale m*/n_i) is the
    Poisson variance of the area's observed rate; on the diagonal only, for
    the area's own count. Area-to-point kriging replaces the right-hand side
    by C(v_i, u); each grid cell uses the neighbourhood of the area holding
    it, so averaging the cell estimates over the area's points reproduces the
    area estimate exactly (with ``negative_weights="keep"`` and a shared grid
    discretisation, :func:`discretize_areas` with ``grid_shape``).
    Leave-one-out predictions drop the area from its own system.

    Results are area-level risks: they say nothing about individuals
    (ecological fallacy); areas with very few people keep wide intervals, and
    kriged values near them lean on the neighbours.

    References
    ----------
    Kyriakidis PC (2004). A geostatistical framework for area-to-point spatial
    interpolation. Geographical Analysis 36: 259-289.
    Goovaerts P (2006). Geostatistical analysis of disease data: accounting for
    spatial support and population density in the isopleth mapping of cancer
    mortality risk using area-to-point Poisson kriging. International Journal
    of Health Geographics 5: 52.
    Deutsch CV (1996). Correcting for negative weights in ordinary kriging.
    Computers & Geosciences 22: 765-773.

    Examples
    --------
    >>> import numpy as np, geopandas as gpd
    >>> from shapely.geometry import box
    >>> cells = [box(i, j, i + 1, j + 1) for i in range(8) for j in range(8)]
    >>> areas = gpd.GeoSeries(cells, index=[f"d{k}" for k in range(64)])
    >>> rng = np.random.default_rng(0)
    >>> pop = rng.integers(1_000, 9_000, 64)
    >>> y = rng.poisson(pop * 1e-3)
    >>> vm = VariogramModel("exponential", nugget=0.0, partial_sill=0.05, range=4.0)
    >>> res = poisson_kriging(y, pop, areas, variogram=vm, neighbours=8, points_per_area=4)
    >>> res.to_frame().shape
    (64, 11)
    """
    func = "poisson_kriging"
    geoms = _geoms(areas, func)
    ids = pd.Index(areas.index)
    n = geoms.size
    y, pop = _counts(cases, population, func, n=n, index=ids)
    k = check_positive_int(neighbours, "neighbours", func)
    check_choice(negative_weights, "negative_weights", func, ("zero", "keep"))
    level = check_interval(level, "level", func, low=0.0, high=1.0)
    per = check_interval(per, "per", func, low=0.0)
    if points is None:
        points = discretize_areas(areas, points_per_area=points_per_area)
    elif not points.ids.equals(ids):
        raise InputError(f"{func}: 'points' were made for different areas (or another order) than 'areas'. "
                         "Build them with discretize_areas(areas, ...).")
    if variogram is None:
        variogram = risk_variogram(y, pop, areas)
    if isinstance(variogram, RiskVariogram):
        model = variogram.fitted
    elif isinstance(variogram, VariogramModel):
        model = variogram
    else:
        raise InputError(f"{func}: 'variogram' must be a RiskVariogram or VariogramModel. "
                         f"Got {type(variogram).__name__}.")
    m, e, z = _standardised(y, pop)
    err = 1.0 / e if poisson_error else np.zeros(n)
    k1 = min(k + 1, n)
    nb = _neighbourhoods(points.centres, k1)
    C = _neighbourhood_covariances(points, model, nb)
    A = _systems(C, err, nb)
    c_target = C[:, :, 0]
    lam, mu = _solve(A, c_target)
    neg = lam < -1e-12
    neg_count = neg.sum(axis=1)
    neg_sum = np.where(neg, lam, 0.0).sum(axis=1)
    c_self = C[:, 0, 0]
    if negative_weights == "keep":
        var = c_self - np.einsum("ni,ni->n", lam, c_target) - mu
    else:
        lam = _correct(lam, negative_weights)
        var = _error_variance(lam, c_target, c_self, A[:, :k1, :k1])
    zk = np.einsum("ni,ni->n", lam, z[nb])
    sd = np.sqrt(np.maximum(var, 0.0))
    # leave-one-out: drop the area itself (row/column 0) from its own system
    notes = []
    if k1 >= 2:
        lam_cv, _ = _solve(A[:, 1:, 1:], c_target[:, 1:])
        lam_cv = _correct(lam_cv, negative_weights)
        z_cv = np.einsum("ni,ni->n", lam_cv, z[nb[:, 1:]])
    else:
        z_cv = np.full(n, np.nan)
    from scipy.stats import norm
    q = norm.ppf(0.5 + level / 2)
    scale = m * per
    if isinstance(variogram, RiskVariogram) and not variogram.spatial_structure:
        notes.append("the variogram shows no spatial structure; kriged risks are close to the regional rate.")
    if (neg_count > 0).any():
        notes.append(f"{int((neg_count > 0).sum())} areas had negative kriging weights "
                     f"({'set to zero and rescaled' if negative_weights == 'zero' else 'kept'}).")
    if negative_weights == "keep" and (zk < 0).any():
        notes.append(f"{int((zk < 0).sum())} kriged risks are below zero (negative weights kept).")
    surface = None
    if surface_shape is not None:
        bounds = shapely.total_bounds(geoms)
        if isinstance(surface_shape, int | np.integer):
            side = check_positive_int(surface_shape, "surface_shape", func)
            w, h = bounds[2] - bounds[0], bounds[3] - bounds[1]
            shape = (max(1, round(side * h / max(w, h))), max(1, round(side * w / max(w, h))))
        else:
            shape = tuple(check_positive_int(v, "surface_shape", func) for v in surface_shape)
        crs = getattr(areas, "crs", None)
        surface = _surface(points, model, nb, A, z, err, m, per, geoms, bounds, shape, negative_weights, crs, ids)
    return PoissonKrigingResult(
        ids=ids, observed=y, population=pop, regional_rate=float(m), per=per, relative_risk=zk,
        relative_risk_sd=sd, rate=zk * scale, rate_low=np.maximum(zk - q * sd, 0.0) * scale,
        rate_high=(zk + q * sd) * scale, raw_rate=y / pop * per, cv_relative_risk=z_cv,
        negative_weight_count=neg_count.astype(int), negative_weight_sum=neg_sum, variogram=variogram,
        neighbours=k1, negative_weights=negative_weights, level=level, points=points, surface=surface,
        cv=cv_scores(y, e, z_cv), notes=tuple(notes))


def ordinary_kriging(data_points, values, targets, *, variogram: VariogramModel, error_variance=None):
    """Ordinary point kriging from all data points (one global system, batched over targets).

    Parameters
    ----------
    data_points : array of shape (n, 2)
    values : array of shape (n,)
    targets : array of shape (m, 2)
    variogram : VariogramModel
    error_variance : array of shape (n,), optional
        Measurement-error variance added to the diagonal (e.g. the Poisson term).

    Returns
    -------
    estimate, variance : ndarray of shape (m,)
    weights : ndarray of shape (m, n)

    Notes
    -----
    sum_j lambda_j C(u_i - u_j) + mu = C(u_i - u_0), sum lambda_j = 1;
    variance C(0) - sum lambda_i C(u_i - u_0) - mu (Isaaks and Srivastava 1989, ch. 12).

    Examples
    --------
    >>> import numpy as np
    >>> vm = VariogramModel("exponential", nugget=0.0, partial_sill=1.0, range=3.0)
    >>> est, var, w = ordinary_kriging([[0, 0], [2, 0]], [1.0, 3.0], [[1, 0]], variogram=vm)
    >>> float(est[0]), bool(np.allclose(w, 0.5))
    (2.0, True)
    """
    X = np.asarray(data_points, float)
    v = np.asarray(values, float)
    T = np.asarray(targets, float)
    n = X.shape[0]
    d = np.hypot(X[:, None, 0] - X[None, :, 0], X[:, None, 1] - X[None, :, 1])
    A = np.zeros((n + 1, n + 1))
    A[:n, :n] = variogram.covariance(d)
    if error_variance is not None:
        A[np.arange(n), np.arange(n)] += np.asarray(error_variance, float)
    A[:n, n] = A[n, :n] = 1.0
    c = variogram.covariance(np.hypot(T[:, None, 0] - X[None, :, 0], T[:, None, 1] - X[None, :, 1]))
    sol = np.linalg.solve(A, np.concatenate([c, np.ones((T.shape[0], 1))], axis=1).T).T
    lam, mu = sol[:, :n], sol[:, n]
    return lam @ v, variogram.sill - np.einsum("mi,mi->m", lam, c) - mu, lam
