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
``laplace`` interface as ``_car_engine._LatentModel``. The linear predictors and the
unstructured district effects are eliminated in closed form (their Hessian blocks are
diagonal), so the sparse factorization only sees (u, g, beta).
"""

from __future__ import annotations

import copy

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
    """Latent field of the space-time model; ``laplace`` as in ``_car_engine._LatentModel``.

    The Hessian of the negative log posterior is H = [[D, −τ_d M], [−τ_d Mᵀ, Q_w + τ_d MᵀM]]
    with D = diag(τ_d + μ_it) on the linear predictors (μ_it = E_it exp(eta_it), 0 where the count
    is missing), w = (v, u, g, beta) and M the map w ↦ prior mean of eta. D is eliminated in
    closed form, leaving S = Q_w + Mᵀ diag(c) M with c_it = τ_d μ_it / (τ_d + μ_it); the v block
    of S is diagonal too (a_i = 1 + a_v,i² Σ_t c_it) and is eliminated as well. Only
    T = S_rr − S_rv diag(a)⁻¹ S_vr on r = (u, g, beta), of size n_structured + W + p + 1, is
    factorized (once per Newton step); its entries are summed directly from per-district and
    per-week sums of c. log det H = Σ log D + Σ log a + log det T. Variances come from the
    selected inverse of T (Rue & Held 2005, section 2.3) and the block-inverse identities of the
    two eliminations (see :meth:`_marginals`).
    """

    def __init__(self, y, e, xcov, graph: eng._GraphStructure, *, rw_order=1, intercept_sd=5.0,
                 coefficient_sd=5.0, fixed_phi=None):
        n, w = y.shape
        self.n, self.w = n, w
        self.nw = nw = n * w
        self.log_e = np.log(e.ravel())
        self._set_data(y, e)
        self.g = gs = graph
        self.fixed_phi = fixed_phi
        ns = gs.n_structured
        p1 = xcov.shape[1] + 1
        self.p1 = p1
        self.x1 = np.column_stack([np.ones(n), xcov])
        self.beta_prec = np.concatenate([[1.0 / intercept_sd**2], np.full(p1 - 1, 1.0 / coefficient_sd**2)])
        # w-block indices (x = (eta, w)); the i_* are the same positions in x
        jv = np.arange(n)
        ju = n + np.arange(ns)
        jg = n + ns + np.arange(w)
        jb = n + ns + w + np.arange(p1)
        self.jv, self.ju, self.jg, self.jb = jv, ju, jg, jb
        self.i_v, self.i_u, self.i_g, self.i_beta = nw + jv, nw + ju, nw + jg, nw + jb
        self.m_w = n + ns + w + p1
        self.m = nw + self.m_w
        self.rw_order = rw_order
        rt, self.rw_scale = rw_structure(w, rw_order)
        self.rank_t = w - rw_order
        # RW2 leaves the linear direction unpenalised: a proper N(0, SLOPE_SD^2) prior on the slope
        tc = np.arange(w) - (w - 1) / 2.0
        q_lin = np.outer(tc, tc) / float(tc @ tc) ** 2 / SLOPE_SD**2 if rw_order == 2 else np.zeros((w, w))
        self.row_i = np.repeat(np.arange(n), w)
        self.row_t = np.tile(np.arange(w), n)
        # constant prior of w (v: I, u: scaled ICAR + ridge, g: slope prior + ridge, beta: diag)
        self.qw_const = sp.block_diag([sp.eye(n), gs.r_scaled + eng.U_RIDGE * sp.eye(ns),
                                       sp.csr_matrix(q_lin + G_RIDGE * np.eye(w)), sp.diags(self.beta_prec)],
                                      format="csr")
        self.qw_rt = sp.block_diag([sp.csr_matrix((n + ns, n + ns)), sp.csr_matrix(rt),
                                    sp.csr_matrix((p1, p1))], format="csr")
        self._rt = rt
        # constraints (on w only): sum of u per component, sum of g
        rows = np.concatenate([gs.comp, np.full(w, gs.n_comp)])
        self.a_w = sp.csr_matrix((np.ones(ns + w), (rows, np.concatenate([ju, jg]))),
                                 shape=(gs.n_comp + 1, self.m_w))
        self.k_con = gs.n_comp + 1
        self._aw_t = self.a_w.T.toarray()
        self.log_det_aat = float(np.sum(np.log(gs.comp_sizes))) + np.log(w)
        lp_rt = np.linalg.eigvalsh(rt)[rw_order:]
        self.ld_prior_const = (gs.log_pdet_scaled + float(np.sum(np.log(lp_rt)))
                               + float(np.sum(np.log(self.beta_prec))))
        # T = Schur complement of the v block in S, on r = (u, g, beta); one block of entries per kind of pair
        s = gs.structured
        self._s = s
        m_r = ns + w + p1
        self.m_r = m_r
        ru, rg, rb = np.arange(ns), ns + np.arange(w), ns + w + np.arange(p1)
        self.ru, self.rg, self.rb = ru, rg, rb
        tri_g, tri_b = np.triu_indices(w), np.triu_indices(p1)
        self._tri_g, self._tri_b = tri_g, tri_b
        blocks = {
            "uu": (ru, ru), "ug": (np.repeat(ru, w), np.tile(rg, ns)), "ub": (np.repeat(ru, p1), np.tile(rb, ns)),
            "gg": (rg[tri_g[0]], rg[tri_g[1]]), "gb": (np.repeat(rg, p1), np.tile(rb, w)),
            "bb": (rb[tri_b[0]], rb[tri_b[1]]),
        }
        rr = np.concatenate([b[0] for b in blocks.values()])
        cc = np.concatenate([b[1] for b in blocks.values()])
        q_r = self.qw_const[n:, n:]
        pattern = sp.csr_matrix((np.ones(rr.size), (rr, cc)), shape=(m_r, m_r))
        pattern = pattern + pattern.T + q_r + self.qw_rt[n:, n:] + sp.eye(m_r)
        # elimination order: u in the graph's fill-reducing order, then g, beta
        uo = np.full(n, -1)
        uo[s] = ru
        uo = uo[gs.order]
        order = np.concatenate([uo[uo >= 0], rg, rb]).astype(np.int64)
        self.chol = SparseCholesky(pattern, order)
        self._blocks = blocks
        self._pos = np.concatenate([self.chol.positions(r, c) for r, c in blocks.values()])
        self._d_const = self._scatter(q_r)
        self._d_rt = self._scatter(self.qw_rt[n:, n:])
        self._fac = None
        self.stats = {}

    def _set_data(self, y, e):
        self.obs = np.isfinite(y).ravel()
        self.y = np.where(self.obs, y.ravel(), 0.0)
        self.e = np.where(self.obs, e.ravel(), 0.0)

    def with_data(self, y):
        """The same model for other counts ``y`` (same shape; NaN = missing), sharing the graph and
        time constants and the symbolic factorization (used one at a time)."""
        other = copy.copy(self)
        other._set_data(np.asarray(y, float), np.exp(self.log_e).reshape(self.n, self.w))
        other.stats = {}
        return other

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

    # Products in the Newton loop use einsum, not BLAS: threaded BLAS calls on small operands spin
    # their threads and slow the sparse factorization that follows when the machine is loaded.
    def _m_apply(self, wv, av, au):
        """M w for a w-block vector (m_w,) or matrix (m_w, k): shape (n W,) or (n W, k)."""
        if wv.ndim == 2:
            return np.column_stack([self._m_apply(col, av, au) for col in wv.T])
        b = av * wv[self.jv]
        b[self._s] += au * wv[self.ju]
        b += np.einsum("ij,j->i", self.x1, wv[self.jb])
        return np.add.outer(b, wv[self.jg]).ravel()

    def _mt_apply(self, z, av, au):
        """Mᵀ z for z of shape (n W,): a w-block vector."""
        zm = z.reshape(self.n, self.w)
        zn = zm.sum(axis=1)
        out = np.empty(self.m_w)
        out[self.jv] = av * zn
        out[self.ju] = au * zn[self._s]
        out[self.jg] = zm.sum(axis=0)
        out[self.jb] = np.einsum("ij,i->j", self.x1, zn)
        return out

    def _mw(self, x, av, au):
        """M w: prior mean of eta given (v, u, g, beta)."""
        return self._m_apply(x[self.nw:], av, au)

    def _qx(self, x, coefs):
        """Q(θ) x without forming Q."""
        av, au, tau_t, tau_d = coefs
        nw = self.nw
        r = tau_d * (x[:nw] - self._mw(x, av, au))
        out = np.empty(self.m)
        out[:nw] = r
        xw = x[nw:]
        ow = self.qw_const @ xw - self._mt_apply(r, av, au)
        ow[self.jg] += tau_t * np.einsum("ts,s->t", self._rt, xw[self.jg])
        out[nw:] = ow
        return out

    def _t_data(self, qdata, c, av, au):
        """Values of T = S_rr − S_rv S_vv⁻¹ S_vr on the analysed pattern, S = Q_w + Mᵀ diag(c) M.

        S_vv = diag(a), a_i = 1 + a_v,i² C_i with C_i = Σ_t c_it; eliminating v leaves the entries of
        Mᵀ diag(c) M on r = (u, g, beta) with c_it replaced by c_it / a_i, minus
        Σ_i (a_v,i² / a_i) c_it c_is on the (g_t, g_s) block.
        """
        s = self._s
        cm = c.reshape(self.n, self.w)
        cn = cm.sum(axis=1)
        a = 1.0 + av**2 * cn
        cr = cm / a[:, None]
        cna = cn / a
        xa = self.x1 * cna[:, None]
        gg = np.diag(cm.sum(axis=0)) - np.einsum("it,is->ts", cm * (av**2 / a)[:, None], cm)
        gg += self._kappa(au)
        vals = np.concatenate([au**2 * cna[s], (au * cr[s]).ravel(), (au * xa[s]).ravel(), gg[self._tri_g],
                               np.einsum("it,ij->tj", cr, self.x1).ravel(),
                               np.einsum("ij,ik->jk", self.x1, xa)[self._tri_b]])
        data = qdata.copy()
        data[self._pos] += vals
        self._fac = (a, cm, cn)
        return data

    def _kappa(self, au):
        """Weight κ of the term κ (Σ_t g_t)² added to the factorized matrix.

        The constraint Σ_t g_t = 0 is exact, so the term changes neither the constrained Newton
        steps nor log det of the Hessian on the constraint space (the correction by A H⁻¹ Aᵀ
        accounts for it) nor the constrained covariances. It holds the direction (u + c, g − a_u c),
        which leaves every eta unchanged when no district is an island and is otherwise held only
        by the 1e-7 ridges, so that the constraint correction of the variances does not cancel
        terms of order 1e5 (measured on small graphs against dense linear algebra).
        """
        return 1.0 / (self.w * max(au * au, 1e-6))

    def _b_apply(self, zr, av, au):
        """S_vr z for z on r (shape (m_r, k)): shape (n, k)."""
        a, cm, cn = self._fac
        zu = np.zeros((self.n, zr.shape[1]))
        zu[self._s] = au * zr[self.ru]
        return av[:, None] * (cn[:, None] * (zu + np.einsum("ij,jk->ik", self.x1, zr[self.rb]))
                              + np.einsum("it,tk->ik", cm, zr[self.rg]))

    def _bt_apply(self, yv, av, au):
        """S_rv y for y on v (shape (n, k)): shape (m_r, k)."""
        a, cm, cn = self._fac
        ay = av[:, None] * yv
        acy = cn[:, None] * ay
        return np.concatenate([au * acy[self._s], np.einsum("it,ik->tk", cm, ay),
                               np.einsum("ij,ik->jk", self.x1, acy)])

    def _solve_w(self, f, av, au):
        """S⁻¹ f for f on w = (v, r), shape (m_w, k), by block elimination of v."""
        a = self._fac[0]
        n = self.n
        fv = f[:n] / a[:, None]
        zr = self.chol.solve(f[n:] - self._bt_apply(fv, av, au))
        return np.concatenate([fv - self._b_apply(zr, av, au) / a[:, None], zr])

    def _objective(self, x, coefs, e):
        eta = np.clip(x[: self.nw], -60.0, 60.0)
        return float(np.sum(self.y * eta - e * np.exp(eta)) - 0.5 * eng._dot(x, self._qx(x, coefs)))

    def _newton(self, x, coefs, e, theta, max_iter=60, tol=1e-7):
        av, au, tau_t, tau_d = coefs
        qdata = self._d_const + tau_t * self._d_rt
        nw = self.nw
        f = self._objective(x, coefs, e)
        converged = False
        wcon = gmat = dvec = None
        it = 0
        for it in range(1, max_iter + 1):
            eta = np.clip(x[:nw], -60.0, 60.0)
            mu = e * np.exp(eta)
            dvec = tau_d + mu
            if self.chol.factorize_data(self._t_data(qdata, tau_d * mu / dvec, av, au)) >= 0:
                raise ModelError(
                    "The posterior precision matrix of the space-time model lost positive definiteness "
                    f"(hyperparameters {np.round(theta, 3).tolist()}). Check for extreme counts or "
                    "expected counts."
                )
            grad = -self._qx(x, coefs)
            grad[:nw] += self.y - mu
            # block elimination of the diagonal eta block
            r_eta = grad[:nw] / dvec
            rhs = grad[nw:] + tau_d * self._mt_apply(r_eta, av, au)
            sol = self._solve_w(np.column_stack([rhs, self._aw_t]), av, au)
            d = np.empty(self.m)
            d[nw:] = sol[:, 0]
            d[:nw] = r_eta + (tau_d / dvec) * self._m_apply(sol[:, 0], av, au)
            wcon = np.empty((self.m, self.k_con))
            wcon[nw:] = sol[:, 1:]
            wcon[:nw] = (tau_d / dvec)[:, None] * self._m_apply(sol[:, 1:], av, au)
            gmat = np.asarray(self.a_w @ wcon[nw:])
            d = d - np.einsum("ik,k->i", wcon, np.linalg.solve(gmat, self.a_w @ d[nw:]))
            x, (f,), converged = eng.damped_step(lambda xx: (self._objective(xx, coefs, e),), x, d, f, tol)
            if converged:
                break
        if not converged:
            raise ModelError(
                f"The Newton iterations of the space-time model did not converge in {max_iter} iterations "
                f"(hyperparameters {np.round(theta, 3).tolist()}). Extreme relative risks are the usual "
                "cause: check the counts and expected counts."
            )
        return x, it, wcon, gmat, dvec

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
            # a missing count's eta sits at its prior mean at the mode (e.g. weeks held out for a forecast)
            miss = ~self.obs
            if miss.any():
                x[: self.nw][miss] = self._mw(x, av, au)[miss]
        x, it, wcon, gmat, dvec = self._newton(x, coefs, self.e, th, max_iter, tol)
        eta = np.clip(x[: self.nw], -60.0, 60.0)
        obs = self.obs
        loglik = float(np.sum(self.y[obs] * (self.log_e[obs] + eta[obs]) - self.e[obs] * np.exp(eta[obs])
                              - gammaln(self.y[obs] + 1.0)))
        quad = eng._dot(x, self._qx(x, coefs))
        ld_prior = self.ld_prior_const + self.nw * np.log(tau_d) + self.rank_t * np.log(tau_t)
        ld_post = (float(np.sum(np.log(dvec))) + float(np.sum(np.log(self._fac[0]))) + self.chol.logdet()
                   + float(np.linalg.slogdet(gmat)[1])
                   - self.log_det_aat)
        logml = loglik - 0.5 * quad + 0.5 * ld_prior - 0.5 * ld_post
        res = eng._LaplaceResult(theta=theta_in, x=x, log_marginal=logml, iterations=it)
        res.extra["tangent"] = None
        if marginals:
            self._marginals(res, coefs, wcon, gmat, dvec)
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

    def _marginals(self, res, coefs, wcon, gmat, dvec):
        """Posterior variances of eta, of the district levels b_i and of beta_0 + g_t.

        From the selected inverse Σ_r = T⁻¹ on r = (u, g, beta): with S_vr's row i equal to
        a_v,i k_iᵀ, Cov(v_i, ·) = −a_v,i (Σ_r k_i)ᵀ / a_i and Var(v_i) = 1/a_i + a_v,i² k_iᵀ Σ_r k_i / a_i²,
        where k_i has a_u C_i on u_i, c_it on g_t and C_i x_ij on beta_j.
        """
        av, au, _, tau_d = coefs
        chol = self.chol
        chol.selected_inverse()
        a, cm, cn = self._fac
        n, w, p1, s = self.n, self.w, self.p1, self._s

        def inv(key):  # elements of T⁻¹ on one block of pairs
            return chol.inverse_at(*self._blocks[key])

        s_uu = inv("uu")
        s_ug = inv("ug").reshape(-1, w)
        s_ub = inv("ub").reshape(-1, p1)
        s_gg = np.zeros((w, w))
        s_gg[self._tri_g] = inv("gg")
        s_gg = s_gg + np.triu(s_gg, 1).T
        s_gb = inv("gb").reshape(w, p1)
        s_bb = np.zeros((p1, p1))
        s_bb[self._tri_b] = inv("bb")
        s_bb = s_bb + np.triu(s_bb, 1).T
        # P_i = Σ_r k_i on the entries u_i, g_t, beta_j (without the factor a_v,i)
        xc = self.x1 * cn[:, None]
        p_g = np.einsum("is,st->it", cm, s_gg) + np.einsum("ij,tj->it", xc, s_gb)
        p_b = np.einsum("it,tj->ij", cm, s_gb) + np.einsum("ik,kj->ij", xc, s_bb)
        p_u = np.zeros(n)
        p_u[s] = au * cn[s] * s_uu + np.sum(cm[s] * s_ug, axis=1) + np.sum(xc[s] * s_ub, axis=1)
        p_g[s] += (au * cn[s])[:, None] * s_ug
        p_b[s] += (au * cn[s])[:, None] * s_ub
        kpk = au * cn * p_u + np.sum(cm * p_g, axis=1) + np.sum(xc * p_b, axis=1)
        s_vv = 1.0 / a + av**2 * kpk / a**2
        f = -av / a
        s_vu = (f * p_u)[s]
        s_vg = f[:, None] * p_g
        s_vb = f[:, None] * p_b
        ginv = np.linalg.inv(gmat)

        def corr(cmat):  # variance correction of linear combinations (rows of cmat @ wcon)
            return np.einsum("ij,jk,ik->i", cmat, ginv, cmat)

        nw = self.nw
        ww = wcon[nw:]
        # m_itᵀ S⁻¹ m_it with m_it = a_v,i e_v + a_u e_u + e_g + x1_i e_beta
        var_b = av**2 * s_vv
        var_b[s] += au**2 * s_uu + 2.0 * av[s] * au * s_vu
        vb = av[:, None] * s_vb
        vb[s] += au * s_ub
        per_i = var_b + 2.0 * np.sum(self.x1 * vb, axis=1) + np.einsum("ij,jk,ik->i", self.x1, s_bb, self.x1)
        cross = av[:, None] * s_vg
        cross[s] += au * s_ug
        q = per_i[:, None] + np.diag(s_gg)[None, :] + 2.0 * cross + 2.0 * np.einsum("ij,tj->it", self.x1, s_gb)
        var_eta = 1.0 / dvec + (tau_d / dvec) ** 2 * q.ravel() - corr(wcon[:nw])
        cw = av[:, None] * ww[self.jv]
        cw[s] += au * ww[self.ju]
        var_b = var_b - corr(cw)
        # b0 + g_t and beta by solves with the factor: their selected-inverse entries are large terms (the
        # directions held only by the ridges and removed by the constraints) that nearly cancel
        cmat = np.zeros((self.m_w, w + p1))
        cmat[self.jg, np.arange(w)] = 1.0
        cmat[self.jb[0], :w] = 1.0
        cmat[self.jb, w + np.arange(p1)] = 1.0
        direct = np.einsum("ij,ij->j", cmat, self._solve_w(cmat, av, au)) - corr(
            np.einsum("ij,ik->jk", cmat, ww))
        var_tr, var_beta = direct[:w], direct[w:]
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


def fast_design(log_prior, latent, theta0, bounds, *, h=0.15, max_steps=20, tol=0.02, min_gain=0.1):
    """Mode of log p(θ | y) by Newton steps on local quadratic fits, then 2d + 1 axial points.

    For large problems, where the hyperparameter posterior is concentrated and every
    Laplace evaluation costs a sparse factorization of size n(W + 1): the first step fits
    a full quadratic (1 + 2d + d(d−1)/2 evaluations), later steps update its Hessian (BFGS) from
    curvature-corrected forward-difference gradients (d + 1 evaluations). The search stops when a
    step from a freshly fitted quadratic moves θ by less than ``tol`` or raises log p(θ | y) by
    less than ``min_gain``; such a small step after BFGS updates only triggers a refit of the
    quadratic (the updated Hessian stalled ~8 log-units short of the mode on the ridge where φ runs
    towards 1 and the spatial SD shrinks with it, 10,000 districts × 12 weeks). The integration design is the mode
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
            if fresh:
                break
            # little progress with a BFGS-updated Hessian: refit the local quadratic before stopping
            # (the updated Hessian can stall on the ridge where phi runs towards 1 and sigma shrinks)
            hess = None
            continue
        # quasi-Newton (BFGS) update of the Hessian from the change of the gradient
        new_grad = gradient((r0.x, r0.theta), f0, hess)
        yv = new_grad - grad
        sy = float(moved @ yv)
        if sy < -1e-10:  # curvature condition for a maximum
            hs = hess @ moved
            hess = hess - np.outer(hs, hs) / float(moved @ hs) + np.outer(yv, yv) / sy
        grad = new_grad
    if hess is None:  # search ended on a refit request (or max_steps = 0): local quadratic here
        z = _quadratic_points(d, h)
        vals = [f0]
        for zz in z[1:]:
            warm[0] = (r0.x, r0.theta)
            vals.append(evaluate(theta + zz)[0])
        grad, hess = _fit_quadratic(z, np.array(vals))
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


def reweight_design(design, log_prior, latent, starts=None):
    """Laplace fits of another data set (e.g. newest week missing) at the points of ``design``.

    The points are kept and the weights multiplied by the ratio of the new to the old
    posterior density at each point (importance reweighting of the integration design).
    Each fit starts from the latent mode of ``starts`` (default: ``design``) at the same
    point; the linear predictors of counts now missing start at their prior mean.
    """
    results, lps = [], []
    for th, res0 in zip(design.thetas, (starts or design).results):
        res = latent.laplace(th, (res0.x, res0.theta), marginals=True)
        results.append(res)
        lps.append(res.log_marginal + float(log_prior(th)))
    lps = np.array(lps)
    logw = np.log(np.maximum(design.weights, 1e-300)) + lps - design.log_post
    w = np.exp(logw - logw.max())
    w /= w.sum()
    return eng._Design(thetas=design.thetas, log_post=lps, weights=w, results=results, mode=design.mode,
                       scales=design.scales, stretch=design.stretch, log_evidence=np.nan,
                       n_evaluations=len(results), edge=design.edge)
