"""Latent Gaussian model of the Poisson space-time model (private engine of spacetime.py).

Model (district i = 1..n, week t = 1..W)::

    y_it ~ Poisson(E_it exp(eta_it))
    eta_it = beta_0 + X_i beta + b_i + g_t + d_it
    b_i = sigma_s (sqrt(1 - phi) v_i + sqrt(phi) u_i)     (BYM2, as in _car_engine)
    g ~ random walk of order 1 or 2, scaled, precision tau_t R_t, sum_t g_t = 0
    d_it ~ N(0, sigma_d^2) independently                     (type I interaction)

The latent vector is x = (eta [n W], v [n], u [structured areas], g [W], beta [p + 1]):
the linear predictors themselves are latent, so the likelihood Hessian is diagonal on
the eta block, and the type I interaction is the conditional prior
eta | v, u, g, beta ~ N(M w, sigma_d^2 I). Hyperparameters
theta = (log sigma_s, logit phi, log sigma_t, log sigma_d).

The model reuses the graph constants (:class:`_car_engine._GraphStructure`: scaling,
PC prior of phi, ordering), the sparse Cholesky factorization of ``_sparse`` and the
hyperparameter integration of ``_car_engine``; it only supplies its own latent field
(prior precision, constraints, Newton iterations, marginals) through the same
``laplace`` interface as ``_car_engine._LatentModel``.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from scipy.special import gammaln

from . import _car_engine as eng
from ._sparse import SparseCholesky
from .errors import ModelError

#: ridge added to the scaled random-walk precision (keeps the factorization definite; negligible)
G_RIDGE = 1e-7
#: prior standard deviation of the weekly slope of an RW2 trend (its linear part is not penalised by RW2)
SLOPE_SD = 1.0


def rw_structure(n_weeks: int, order: int) -> tuple[np.ndarray, float]:
    """Scaled random-walk structure matrix R_t (dense W x W) and its scaling constant.

    R = DᵀD with D the first (order 1) or second (order 2) difference matrix, scaled so the
    geometric mean of the diagonal of its generalised inverse is 1 (Sørbye & Rue 2014).
    """
    d = np.diff(np.eye(n_weeks), n=order, axis=0)
    r = d.T @ d
    ginv = np.linalg.pinv(r)
    c = float(np.exp(np.mean(np.log(np.diag(ginv)))))
    return r * c, c


class _SpaceTimeLatent:
    """Latent field of the space-time model; ``laplace`` as in ``_car_engine._LatentModel``."""

    def __init__(self, y, e, xcov, graph: eng._GraphStructure, *, rw_order=1, intercept_sd=5.0,
                 coefficient_sd=5.0, fixed_phi=None):
        n, w = y.shape
        self.n, self.w = n, w
        self.nw = n * w
        self.obs = np.isfinite(y).ravel()
        self.y = np.where(self.obs, y.ravel(), 0.0)
        self.e = np.where(self.obs, e.ravel(), 0.0)
        self.log_e = np.log(e.ravel())
        self.g = gs = graph
        self.fixed_phi = fixed_phi
        ns = gs.n_structured
        p1 = xcov.shape[1] + 1
        self.p1 = p1
        self.x1 = np.column_stack([np.ones(n), xcov])
        self.beta_prec = np.concatenate([[1.0 / intercept_sd**2], np.full(p1 - 1, 1.0 / coefficient_sd**2)])
        nw = self.nw
        self.i_v = nw + np.arange(n)
        self.i_u = nw + n + np.arange(ns)
        self.i_g = nw + n + ns + np.arange(w)
        self.i_beta = nw + n + ns + w + np.arange(p1)
        self.m = nw + n + ns + w + p1
        self.rw_order = rw_order
        rt, self.rw_scale = rw_structure(w, rw_order)
        self.rank_t = w - rw_order
        # RW2 leaves the linear direction unpenalised: a proper N(0, SLOPE_SD^2) prior on the slope
        tc = np.arange(w) - (w - 1) / 2.0
        q_lin = np.outer(tc, tc) / float(tc @ tc) ** 2 / SLOPE_SD**2 if rw_order == 2 else np.zeros((w, w))
        # per-row slots of r = eta - M w: eta_it, v_i, u_i (or padding on v_i), g_t, beta
        row_i = np.repeat(np.arange(n), w)
        row_t = np.tile(np.arange(w), n)
        ucol = self.i_v.copy()
        ucol[gs.structured] = self.i_u
        self.slot_cols = np.column_stack([np.arange(nw), self.i_v[row_i], ucol[row_i], self.i_g[row_t],
                                          np.broadcast_to(self.i_beta, (nw, p1))])
        self.row_i, self.row_t = row_i, row_t
        s = self.slot_cols.shape[1]
        self._pairs = [(a, b) for a in range(s) for b in range(a, s)]
        # constant prior blocks (v: I, u: scaled ICAR + ridge, g: slope prior + ridge, beta: diag)
        zero = sp.csr_matrix((nw, nw))
        self.q_const = sp.block_diag([zero, sp.eye(n), gs.r_scaled + eng.U_RIDGE * sp.eye(ns),
                                      sp.csr_matrix(q_lin + G_RIDGE * np.eye(w)), sp.diags(self.beta_prec)],
                                     format="csr")
        self.q_rt = sp.block_diag([sp.csr_matrix((nw + n + ns, nw + n + ns)), sp.csr_matrix(rt),
                                   sp.csr_matrix((p1, p1))], format="csr")
        self._rt = rt
        # constraints: sum of u per component, sum of g
        rows = np.concatenate([gs.comp, np.full(w, gs.n_comp)])
        cols = np.concatenate([self.i_u, self.i_g])
        self.a_con = sp.csr_matrix((np.ones(ns + w), (rows, cols)), shape=(gs.n_comp + 1, self.m))
        self.k_con = gs.n_comp + 1
        self._acon_t = self.a_con.T.toarray()
        self.log_det_aat = float(np.sum(np.log(gs.comp_sizes))) + np.log(w)
        lp_rt = np.linalg.eigvalsh(rt)[rw_order:]
        self.ld_prior_const = (gs.log_pdet_scaled + float(np.sum(np.log(lp_rt)))
                               + float(np.sum(np.log(self.beta_prec))))
        # elimination order: eta, then (v_i, u_i) in the graph's fill-reducing order, then g, beta
        upos = np.full(n, -1)
        upos[gs.structured] = self.i_u
        vu = np.column_stack([self.i_v[gs.order], upos[gs.order]]).ravel()
        vu = vu[vu >= 0]
        order = np.concatenate([np.arange(nw), vu, self.i_g, self.i_beta]).astype(np.int64)
        rr = np.repeat(self.slot_cols, s, axis=1).ravel()
        cc = np.tile(self.slot_cols, (1, s)).ravel()
        pattern = sp.csr_matrix((np.ones(rr.size), (rr, cc)), shape=(self.m, self.m))
        pattern = pattern + self.q_const + self.q_rt + sp.eye(self.m)
        self.chol = SparseCholesky(pattern, order)
        self._pos = np.concatenate([self.chol.positions(self.slot_cols[:, a], self.slot_cols[:, b])
                                    for a, b in self._pairs])
        self._d_const = self._scatter(self.q_const)
        self._d_rt = self._scatter(self.q_rt)
        self._pos_eta = self.chol.positions(np.arange(nw), np.arange(nw))
        self.stats = {}

    # ------------------------------------------------------------ assembly
    def _scatter(self, mat):
        up = sp.coo_matrix(sp.triu(sp.csr_matrix(mat)))
        return np.bincount(self.chol.positions(up.row, up.col), weights=up.data, minlength=self.chol.n_upper)

    def full_theta(self, theta):
        theta = np.asarray(theta, float)
        if self.fixed_phi is None:
            return theta
        return np.array([theta[0], self.fixed_phi, theta[1], theta[2]])

    def coefficients(self, theta):
        """(a_v per area, a_u, tau_t, tau_d) for a full theta."""
        gs = self.g
        sigma = np.exp(theta[0])
        phi = eng._expit(np.clip(theta[1], -eng._LOGIT_BOUND, eng._LOGIT_BOUND))
        av = np.full(self.n, sigma)
        av[gs.structured] = sigma * np.sqrt(1.0 - phi)
        au = sigma * np.sqrt(phi)
        return av, au, np.exp(-2.0 * theta[2]), np.exp(-2.0 * theta[3])

    def slot_values(self, av, au):
        nw = self.nw
        uval = np.zeros(self.n)
        uval[self.g.structured] = au
        return np.column_stack([np.ones(nw), -av[self.row_i], -uval[self.row_i], -np.ones(nw),
                                -self.x1[self.row_i]])

    def _mw(self, x, av, au):
        """M w: prior mean of eta given (v, u, g, beta)."""
        n, w = self.n, self.w
        b = av * x[self.i_v]
        b[self.g.structured] += au * x[self.i_u]
        b = b + self.x1 @ x[self.i_beta]
        return (b[:, None] + x[self.i_g][None, :]).ravel()

    def _qx(self, x, coefs):
        """Q(θ) x without forming Q."""
        av, au, tau_t, tau_d = coefs
        gs = self.g
        r = tau_d * (x[: self.nw] - self._mw(x, av, au))
        rm = r.reshape(self.n, self.w)
        rsum = rm.sum(axis=1)
        out = self.q_const @ x
        out[: self.nw] += r
        out[self.i_v] -= av * rsum
        out[self.i_u] -= au * rsum[gs.structured]
        out[self.i_g] += tau_t * (self._rt @ x[self.i_g]) - rm.sum(axis=0)
        out[self.i_beta] -= self.x1.T @ rsum
        return out

    def _prior_data(self, coefs):
        av, au, tau_t, tau_d = coefs
        v = self.slot_values(av, au)
        prod = np.concatenate([v[:, a] * v[:, b] for a, b in self._pairs])
        return tau_d * np.bincount(self._pos, weights=prod, minlength=self.chol.n_upper) + self._d_const \
            + tau_t * self._d_rt

    def _objective(self, x, coefs, e):
        eta = np.clip(x[: self.nw], -60.0, 60.0)
        return float(np.sum(self.y * eta - e * np.exp(eta)) - 0.5 * eng._dot(x, self._qx(x, coefs)))

    def _newton(self, x, coefs, e, theta, max_iter=60, tol=1e-7):
        qdata = self._prior_data(coefs)
        nw = self.nw
        f = self._objective(x, coefs, e)
        converged = False
        wcon = gmat = None
        it = 0
        for it in range(1, max_iter + 1):
            eta = np.clip(x[:nw], -60.0, 60.0)
            mu = e * np.exp(eta)
            hdata = qdata.copy()
            hdata[self._pos_eta] += mu
            if self.chol.factorize_data(hdata) >= 0:
                raise ModelError(
                    "The posterior precision matrix of the space-time model lost positive definiteness "
                    f"(hyperparameters {np.round(theta, 3).tolist()}). Check for extreme counts or "
                    "expected counts."
                )
            grad = -self._qx(x, coefs)
            grad[:nw] += self.y - mu
            sol = self.chol.solve(np.column_stack([grad, self._acon_t]))
            d = sol[:, 0]
            wcon = sol[:, 1:]
            gmat = np.asarray(self.a_con @ wcon)
            d = d - wcon @ np.linalg.solve(gmat, self.a_con @ d)
            step = 1.0
            while True:
                f_new = self._objective(x + step * d, coefs, e)
                if f_new >= f - 1e-10 * (1.0 + abs(f)) or step < 1e-6:
                    break
                step *= 0.5
            x = x + step * d
            f = f_new
            if np.max(np.abs(step * d)) < tol * (1.0 + np.max(np.abs(x))):
                converged = True
                break
        if not converged:
            raise ModelError(
                f"The Newton iterations of the space-time model did not converge in {max_iter} iterations "
                f"(hyperparameters {np.round(theta, 3).tolist()}). Extreme relative risks are the usual "
                "cause: check the counts and expected counts."
            )
        return x, it, wcon, gmat

    # ------------------------------------------------------------ Laplace
    def laplace(self, theta, x0=None, *, marginals=False, max_iter=60, tol=1e-7, tangent=False):
        theta_in = np.asarray(theta, float)
        th = self.full_theta(theta_in)
        coefs = self.coefficients(th)
        av, au, tau_t, tau_d = coefs
        if x0 is None:
            x = np.zeros(self.m)
            rate = np.log(self.y.sum() / self.e.sum())
            x[: self.nw] = rate
            x[self.i_beta[0]] = rate
        else:
            xold, theta_old = x0[0], self.full_theta(x0[1])
            x = xold.copy()
            # keep the area effects b (not the standardized v, u) from the warm start
            x[self.i_v] *= np.exp(theta_old[0] - th[0])
            x[self.i_u] *= np.exp(theta_old[0] - th[0])
        x, it, wcon, gmat = self._newton(x, coefs, self.e, th, max_iter, tol)
        eta = np.clip(x[: self.nw], -60.0, 60.0)
        obs = self.obs
        loglik = float(np.sum(self.y[obs] * (self.log_e[obs] + eta[obs]) - self.e[obs] * np.exp(eta[obs])
                              - gammaln(self.y[obs] + 1.0)))
        quad = eng._dot(x, self._qx(x, coefs))
        ld_prior = self.ld_prior_const + self.nw * np.log(tau_d) + self.rank_t * np.log(tau_t)
        ld_post = self.chol.logdet() + float(np.linalg.slogdet(gmat)[1]) - self.log_det_aat
        logml = loglik - 0.5 * quad + 0.5 * ld_prior - 0.5 * ld_post
        res = eng._LaplaceResult(theta=theta_in, x=x, log_marginal=logml, iterations=it)
        res.extra["tangent"] = None
        if marginals:
            self._marginals(res, coefs, wcon, gmat)
            # variational mean correction (as in _car_engine): E_i -> E_i exp(var_i / 2)
            xv = self._newton(x, coefs, self.e * np.exp(0.5 * res.var_eta), th, max_iter, tol)[0]
            res.x_mean = xv
            res.mean_eta = xv[: self.nw].copy()
            res.extra["mean_level"] = self._level(xv, av, au)
            res.extra["mean_trend"] = xv[self.i_g] + xv[self.i_beta[0]]
            res.beta_mean = xv[self.i_beta].copy()
        return res

    def _level(self, x, av, au):
        b = av * x[self.i_v]
        b[self.g.structured] += au * x[self.i_u]
        return b

    def _marginals(self, res, coefs, wcon, gmat):
        """Posterior variances of eta, of the district levels b_i and of beta_0 + g_t."""
        av, au, _, _ = coefs
        chol = self.chol
        chol.selected_inverse()
        dg = chol.inverse_diagonal()
        ginv = np.linalg.inv(gmat)

        def corr(cmat):  # variance correction of linear combinations (rows of cmat @ wcon)
            return np.einsum("ij,jk,ik->i", cmat, ginv, cmat)

        nw = self.nw
        var_eta = dg[:nw] - corr(wcon[:nw])
        gs = self.g
        s = gs.structured
        var_b = av**2 * dg[self.i_v]
        cw = av[:, None] * wcon[self.i_v]
        var_b[s] += au**2 * dg[self.i_u] + 2.0 * av[s] * au * chol.inverse_at(self.i_v[s], self.i_u)
        cw[s] += au * wcon[self.i_u]
        var_b = var_b - corr(cw)
        b0 = self.i_beta[0]
        var_tr = dg[self.i_g] + dg[b0] + 2.0 * chol.inverse_at(self.i_g, np.full(self.w, b0))
        var_tr = var_tr - corr(wcon[self.i_g] + wcon[b0][None, :])
        ib = self.i_beta
        var_beta = dg[ib] - corr(wcon[ib])
        res.var_eta = np.maximum(var_eta, 1e-300)
        res.beta_var = np.maximum(var_beta, 1e-300)
        res.extra["var_level"] = np.maximum(var_b, 1e-300)
        res.extra["var_trend"] = np.maximum(var_tr, 1e-300)


# ============================================================== hyperparameters (large problems)
def _quadratic_points(d, h):
    """Centre, ±h e_i and h(e_i + e_j): the 1 + 2d + d(d-1)/2 points that fix a quadratic in d dims."""
    pts = [np.zeros(d)]
    for i in range(d):
        for s in (1.0, -1.0):
            z = np.zeros(d)
            z[i] = s * h
            pts.append(z)
    for i in range(d):
        for j in range(i + 1, d):
            z = np.zeros(d)
            z[i] = z[j] = h
            pts.append(z)
    return np.array(pts)


def _fit_quadratic(z, f):
    """Gradient and Hessian of the quadratic through the values f at the points z (rows)."""
    d = z.shape[1]
    cols = [np.ones(len(z))] + [z[:, i] for i in range(d)]
    pairs = [(i, j) for i in range(d) for j in range(i, d)]
    cols += [z[:, i] * z[:, j] * (0.5 if i == j else 1.0) for i, j in pairs]
    coef = np.linalg.lstsq(np.column_stack(cols), f, rcond=None)[0]
    grad = coef[1: 1 + d]
    hess = np.zeros((d, d))
    for c, (i, j) in zip(coef[1 + d:], pairs):
        hess[i, j] = hess[j, i] = c
    return grad, hess


def fast_design(log_prior, latent, theta0, bounds, *, h=0.15, max_steps=12, tol=0.02, min_gain=0.1):
    """Mode of log p(θ | y) by Newton steps on local quadratic fits, then 2d + 1 axial points.

    For large problems, where the hyperparameter posterior is concentrated and every
    Laplace evaluation costs a sparse factorization of size n(W + 1): the first step fits
    a full quadratic (1 + 2d + d(d−1)/2 evaluations), later steps update its Hessian (BFGS) from
    curvature-corrected forward-difference gradients (d + 1 evaluations). The search stops when a
    step moves θ by less than ``tol`` or raises log p(θ | y) by less than ``min_gain`` (a weakly
    identified direction, e.g. φ drifting towards 1, then stops where it no longer matters for the
    latent marginals; the axial design still spreads along it). The integration design is the mode
    and ±1 standard deviation along each principal axis of the Gaussian fit at the mode,
    weighted by the Laplace posterior density (equal volumes): a coarse grid restricted to
    the axes, adequate when θ is well determined (documented in docs/methods.md).
    """
    d = len(theta0)
    lo = np.array([b[0] for b in bounds])
    hi = np.array([b[1] for b in bounds])
    warm = [None]
    count = [0]

    def evaluate(theta, marginals=False):
        res = latent.laplace(theta, warm[0], marginals=marginals)
        count[0] += 1
        warm[0] = (res.x, res.theta)
        return res.log_marginal + float(log_prior(theta)), res

    theta = np.clip(np.asarray(theta0, float), lo, hi)
    f0, r0 = evaluate(theta)
    hess = grad = None

    def gradient(centre, f_centre, hess):
        # forward differences corrected by the current curvature estimate: (f(θ + h e_i) − f(θ))/h − h H_ii/2
        g = np.empty(d)
        for i in range(d):
            e = np.zeros(d)
            e[i] = h
            warm[0] = centre
            g[i] = (evaluate(theta + e)[0] - f_centre) / h - 0.5 * h * hess[i, i]
        return g

    for _ in range(max_steps):
        centre = (r0.x, r0.theta)
        fresh = hess is None
        if fresh:
            z = _quadratic_points(d, h)
            vals = [f0]
            for zz in z[1:]:
                warm[0] = centre
                vals.append(evaluate(theta + zz)[0])
            grad, hess = _fit_quadratic(z, np.array(vals))
        ev, evec = np.linalg.eigh(-hess)
        ev = np.maximum(ev, 1e-2)
        # Newton step, limited to 1 unit along each principal axis (a flat direction such as a weakly
        # identified phi then cannot shrink the step along the well-determined ones)
        step = evec @ np.clip((evec.T @ grad) / ev, -2.0, 2.0)
        accepted = False
        for _ in range(6):
            cand = np.clip(theta + step, lo, hi)
            warm[0] = centre
            fc, rc = evaluate(cand)
            if fc >= f0 - 1e-9:
                accepted = True
                break
            step = step / 2.0
        if not accepted:
            if fresh:
                break
            hess = None  # the updated Hessian led nowhere: refit the local quadratic and try again
            continue
        moved = cand - theta
        gain = fc - f0
        theta, f0, r0 = cand, fc, rc
        if np.max(np.abs(moved)) < tol or gain < min_gain:
            break
        # quasi-Newton (BFGS) update of the Hessian from the change of the gradient
        new_grad = gradient((r0.x, r0.theta), f0, hess)
        yv = new_grad - grad
        sy = float(moved @ yv)
        if sy < -1e-10:  # curvature condition for a maximum
            hs = hess @ moved
            hess = hess - np.outer(hs, hs) / float(moved @ hs) + np.outer(yv, yv) / sy
        grad = new_grad
    if hess is None:  # pragma: no cover - max_steps = 0
        hess = -np.eye(d)
    edge = bool(np.any(np.abs(theta - lo) < 1e-3) or np.any(np.abs(theta - hi) < 1e-3))
    ev, evec = np.linalg.eigh(-hess)
    if np.any(ev <= 1e-8):
        edge = True
    ev = np.maximum(ev, 1e-2)
    smat = evec / np.sqrt(ev)[None, :]
    pts = [theta] + [theta + s * smat[:, j] for j in range(d) for s in (1.0, -1.0)]
    lps, results = [], []
    for p in pts:
        warm[0] = (r0.x, r0.theta)
        lp, res = evaluate(p, marginals=True)
        lps.append(lp)
        results.append(res)
    lps = np.array(lps)
    w = np.exp(lps - lps.max())
    w /= w.sum()
    log_ev = float(lps.max() + np.log(np.sum(np.exp(lps - lps.max()))) + np.log(abs(np.linalg.det(smat))))
    return eng._Design(thetas=np.array(pts), log_post=lps, weights=w, results=results, mode=theta,
                       scales=smat, stretch=np.ones((d, 2)), log_evidence=log_ev, n_evaluations=count[0],
                       edge=edge)


def reweight_design(design, log_prior, latent):
    """Laplace fits of another data set (e.g. newest week missing) at the points of ``design``.

    The points are kept and the weights multiplied by the ratio of the new to the old
    posterior density at each point (importance reweighting of the integration design).
    """
    results, lps = [], []
    warm = None
    for th, res0 in zip(design.thetas, design.results):
        res = latent.laplace(th, (res0.x, res0.theta) if warm is None else warm, marginals=True)
        warm = (res.x, res.theta)
        results.append(res)
        lps.append(res.log_marginal + float(log_prior(th)))
    lps = np.array(lps)
    logw = np.log(np.maximum(design.weights, 1e-300)) + lps - design.log_post
    w = np.exp(logw - logw.max())
    w /= w.sum()
    return eng._Design(thetas=design.thetas, log_post=lps, weights=w, results=results, mode=design.mode,
                       scales=design.scales, stretch=design.stretch, log_evidence=np.nan,
                       n_evaluations=len(results), edge=design.edge)
