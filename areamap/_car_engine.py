"""Deterministic approximate Bayesian inference for Poisson CAR models (private engine of models.py).

Pieces, in the order a fit uses them:

* :class:`_GraphStructure` -- per-graph constants computed once: structured areas
  (components of size >= 2), the Sørbye–Rue scaling constant of each component,
  the log pseudo-determinant of the scaled structure matrix, the PC prior of the
  BYM2 mixing parameter, fill-reducing ordering.
* :class:`_LatentModel` -- the latent Gaussian field x (fixed effects and area
  effects), its prior precision, the sparse map from x to the log relative risks,
  and the sum-to-zero constraints.
* :meth:`_LatentModel.laplace` -- for fixed hyperparameters, Newton iterations for
  the mode of x with the constraints imposed by conditioning ("kriging"), the
  Laplace approximation of log p(y | θ), and (on request) the marginal means and
  variances of the log relative risks from the selected inverse and the tangent
  dx*/dθ of the mode (warm start of the next evaluation).
* :func:`integrate_hyperparameters` -- mode of log p(θ | y), numerical Hessian,
  a grid of θ points with weights (integrated nested Laplace approximation).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.optimize import minimize
from scipy.special import gammaln

from ._sparse import SparseCholesky, fill_reducing_order
from .errors import ModelError, ModelWarning

_LOG2PI = float(np.log(2.0 * np.pi))
#: largest number of structured areas for which the PC prior of phi uses a dense eigen-decomposition
EIGEN_LIMIT = 1500
#: Chebyshev nodes used for the PC prior of phi on larger graphs
PC_NODES = 48
#: range of logit(phi) covered by the interpolated PC prior
PC_S_RANGE = (-9.0, 12.0)
_LOGIT_BOUND = 12.0
#: number of recent latent modes kept as warm starts during the hyperparameter search
ANCHORS = 6
#: ridge added to the scaled ICAR precision (see _LatentModel)
U_RIDGE = 1e-7


def _dot(a, b) -> float:
    """Inner product without BLAS (threaded BLAS calls are slow for one vector under CPU load)."""
    return float(np.einsum("i,i->", a, b))


def mix(mat, w):
    """Row-wise weighted sum mat @ w without BLAS."""
    return np.einsum("ik,k->i", mat, w)


def damped_step(objective, x, d, f, tol):
    """One damped Newton step shared by the latent-field iterations of both engines.

    ``objective(x)`` returns a tuple whose first entry is the concave objective. The step x + s d is
    halved from s = 1 until the objective does not fall (beyond a relative 1e-10) or s < 1e-6.
    Returns (new x, the objective's tuple there, converged), where converged means
    max|s d| < tol (1 + max|x|).
    """
    step = 1.0
    while True:
        value = objective(x + step * d)
        if value[0] >= f - 1e-10 * (1.0 + abs(f)) or step < 1e-6:
            break
        step *= 0.5
    x = x + step * d
    return x, value, bool(np.max(np.abs(step * d)) < tol * (1.0 + np.max(np.abs(x))))


def _logit(p):
    return np.log(p) - np.log1p(-p)


def _expit(s):
    return 1.0 / (1.0 + np.exp(-s))


# ============================================================== graph constants
class _GraphStructure:
    """Constants of a neighbour graph needed by the CAR priors (computed once per fit)."""

    def __init__(self, adjacency: sp.csr_array, *, pc_method: str = "auto"):
        a = sp.csr_matrix(adjacency, dtype=float)
        n = a.shape[0]
        self.n = n
        deg = np.asarray(a.sum(axis=1)).ravel()
        from scipy.sparse.csgraph import connected_components

        _, lab = connected_components(a, directed=False)
        sizes = np.bincount(lab)
        structured = sizes[lab] >= 2
        self.structured = np.flatnonzero(structured)
        self.islands = np.flatnonzero(~structured)
        ns = self.structured.size
        self.n_structured = ns
        # components among structured areas, relabelled 0..k-1
        comp_labels = lab[self.structured]
        uniq, comp = np.unique(comp_labels, return_inverse=True)
        self.comp = comp.astype(np.int64)
        self.n_comp = uniq.size
        self.comp_sizes = np.bincount(self.comp, minlength=self.n_comp).astype(float)
        self.laplacian = sp.csr_matrix(sp.diags(deg) - a)
        # ordering of all n areas (used by the latent models) from the pattern of R + I
        self.order = fill_reducing_order(self.laplacian + sp.eye(n))
        if ns == 0:
            self.scale = np.zeros(0)
            self.r_scaled = sp.csr_matrix((0, 0))
            self.log_pdet_scaled = 0.0
            self.trace_ginv = 0.0
            self.ginv_diag = np.zeros(0)
            self.pc = None
            return
        rs = sp.csr_matrix(self.laplacian[self.structured][:, self.structured])
        pos = np.full(n, -1)
        pos[self.structured] = np.arange(ns)
        self.s_order = pos[self.order[structured[self.order]]]
        self._chol = SparseCholesky(rs + sp.eye(ns), self.s_order)
        # Grounded matrix M = R + sum_c e_g e_g^T (g = first area of component c) is SPD;
        # R^+ = P M^-1 P per component (P = centring), det M_c = number of spanning trees.
        ground = np.zeros(ns)
        first = np.unique(self.comp, return_index=True)[1]
        ground[first] = 1.0
        m = rs + sp.diags(ground)
        if self._chol.factorize(m) >= 0:  # pragma: no cover - M is SPD by construction
            raise ModelError("Internal error: the grounded structure matrix is not positive definite.")
        self._chol.selected_inverse()
        dm = self._chol.inverse_diagonal()
        z = self._chol.solve(np.ones(ns))
        nc = self.comp_sizes[self.comp]
        zsum = np.bincount(self.comp, weights=z, minlength=self.n_comp)
        ginv = dm - 2.0 * z / nc + zsum[self.comp] / nc**2
        ginv = np.maximum(ginv, 1e-300)
        logc = np.bincount(self.comp, weights=np.log(ginv), minlength=self.n_comp) / self.comp_sizes
        cc = np.exp(logc)
        self.scale_per_component = cc
        self.scale = cc[self.comp]
        self.ginv_diag = ginv / self.scale  # diagonal of (cR)^+, geometric mean 1 per component
        self.trace_ginv = float(self.ginv_diag.sum())
        ld_m = self._chol.logdet()
        self.log_pdet_scaled = float(
            ld_m + np.sum(np.log(self.comp_sizes)) + np.sum((self.comp_sizes - 1.0) * logc)
        )
        sq = np.sqrt(self.scale)
        self.r_scaled = sp.csr_matrix(sp.diags(sq) @ rs @ sp.diags(sq))
        self.pc = None
        self._pc_method = pc_method

    # --------------------------------------------------------- PC prior on phi
    def _pc_setup(self):
        """KLD(phi) helpers, exact (eigenvalues) or interpolated (sparse log-determinants)."""
        ns, k = self.n_structured, self.n_comp
        method = self._pc_method
        if method == "auto":
            method = "eigen" if ns <= EIGEN_LIMIT else "interpolate"
        self.pc_method = method
        if method == "eigen":
            gam = []
            rsd = self.r_scaled.toarray()
            for c in range(k):
                idx = np.flatnonzero(self.comp == c)
                lam = np.linalg.eigvalsh(rsd[np.ix_(idx, idx)])
                gam.append(1.0 / lam[1:])  # drop the null eigenvalue (smallest)
            g = np.concatenate(gam) - 1.0
            self._gm1 = g

            def kld(phi):
                phi = np.atleast_1d(np.asarray(phi, float))
                z = phi[:, None] * g[None, :]
                val = 0.5 * np.sum(z - np.log1p(z), axis=1)
                der = 0.5 * np.sum(g[None, :] * z / (1.0 + z), axis=1)
                return val, der

            self._kld = kld
            return
        # Interpolation: F(phi) = sum log(1 - phi + phi*gamma) from sparse log-determinants
        # log det(phi I + (1 - phi) cR) (Cholesky of the graph-sized matrix at each node).
        # In s = logit(phi), g(s) = log(KLD/phi^2) is smooth and analytic in the strip
        # |Im s| < pi (phi < 0 and phi > 1 both map to Im s = pi), so Chebyshev interpolation
        # on [S_LO, S_HI] converges geometrically; below S_LO, g is held at its end value.
        t_sum = self.trace_ginv - (ns - k)
        # above 20,000 structured areas fewer nodes (the likelihood dominates such a prior; see docs)
        n_nodes = PC_NODES if ns <= 20_000 else PC_NODES // 2
        lo, hi = PC_S_RANGE
        sn = lo + (hi - lo) * 0.5 * (1.0 - np.cos(np.pi * (np.arange(n_nodes) + 0.5) / n_nodes))
        nodes = _expit(sn)
        g = np.empty(n_nodes)
        eye = sp.eye(ns)
        for j, phi in enumerate(nodes):
            mat = phi * eye + (1.0 - phi) * self.r_scaled
            if self._chol.factorize(mat) >= 0:  # pragma: no cover
                raise ModelError("Internal error while computing the PC prior of phi.")
            f = self._chol.logdet() - k * np.log(phi) - self.log_pdet_scaled
            g[j] = np.log(max(0.5 * (phi * t_sum - f), 1e-300)) - 2.0 * np.log(phi)
        cheb = np.polynomial.Chebyshev.fit(sn, g, n_nodes - 1, domain=[lo, hi])
        dcheb = cheb.deriv()

        def kld(phi):
            phi = np.atleast_1d(np.asarray(phi, float))
            s = np.clip(_logit(np.clip(phi, 1e-300, 1 - 1e-16)), lo, hi)
            gv = cheb(s)
            dg = np.where((s > lo) & (s < hi), dcheb(s), 0.0)
            val = phi**2 * np.exp(gv)
            # dKLD/dphi = phi e^g (2 + g'(s) / (1 - phi))
            der = phi * np.exp(gv) * (2.0 + dg / np.maximum(1.0 - phi, 1e-300))
            return val, der

        self._kld = kld

    def pc_phi_logdensity(self, phi, *, upper: float, tail: float) -> np.ndarray:
        """log π(φ) of the PC prior with P(φ < upper) = tail on the untruncated distance scale.

        Not renormalised: the exponential on d(φ) is truncated at d(1), so the
        density integrates to 1 − exp(−θ d(1)) over (0, 1); see :meth:`pc_phi_mass`.
        """
        if self.pc is None:
            self._pc_setup()
            self.pc = True
        kld_u, _ = self._kld(upper)
        theta = -np.log1p(-tail) / np.sqrt(2.0 * kld_u[0])
        val, der = self._kld(phi)
        val = np.maximum(val, 1e-300)
        d = np.sqrt(2.0 * val)
        dprime = np.abs(der) / d
        return np.log(theta) - theta * d + np.log(dprime)

    def pc_phi_mass(self, *, upper: float, tail: float) -> float:
        """Total mass 1 − exp(−θ d(1)) of the PC density over (0, 1)."""
        if self.pc is None:
            self._pc_setup()
            self.pc = True
        kld_u, _ = self._kld(upper)
        theta = -np.log1p(-tail) / np.sqrt(2.0 * kld_u[0])
        d1 = np.sqrt(2.0 * self._kld(1.0)[0][0])
        return float(-np.expm1(-theta * d1))


# ============================================================== latent model
@dataclass
class _LaplaceResult:
    theta: np.ndarray
    x: np.ndarray
    log_marginal: float  # log p(y | theta) by the Laplace approximation
    iterations: int
    x_mean: np.ndarray | None = None
    mean_eta: np.ndarray | None = None  # log relative risk (without offset)
    var_eta: np.ndarray | None = None
    beta_mean: np.ndarray | None = None
    beta_var: np.ndarray | None = None
    extra: dict = field(default_factory=dict)


class _LatentModel:
    """Latent Gaussian field of a Poisson CAR model with hyperparameters θ.

    BYM2 / ICAR layout: x = (v [n], u [structured areas], beta [p + 1]) with
    log RR_i = beta_0 + X_i beta + a_v,i v_i + a_u u_i, where for BYM2
    a_u = σ√φ, a_v = σ√(1 − φ) on structured areas and σ on islands; the ICAR
    model is BYM2 with φ = 1 (islands keep a_v = σ).

    Leroux layout: x = (b [n], beta [p + 1]) with log RR_i = beta_0 + X_i beta + b_i.
    """

    def __init__(self, kind, y, e, xcov, graph: _GraphStructure, *, intercept_sd, coefficient_sd):
        self.kind = kind
        self.y = y
        self.e = e
        self.log_e = np.log(e)
        self.g = graph
        n = y.size
        self.n = n
        p = xcov.shape[1]
        self.p1 = p + 1
        self.x1 = np.column_stack([np.ones(n), xcov])
        self.beta_prec = np.concatenate([[1.0 / intercept_sd**2], np.full(p, 1.0 / coefficient_sd**2)])
        gs = graph
        if kind in ("bym2", "icar"):
            ns = gs.n_structured
            self.m = n + ns + self.p1
            self.i_beta = n + ns + np.arange(self.p1)
            # U_RIDGE keeps the u-block positive definite when sigma*sqrt(phi) -> 0 (the likelihood
            # then no longer pins the constant direction); it changes the prior density of a
            # constrained u by exp(-U_RIDGE |u|^2 / 2), negligible (documented).
            qp = sp.block_diag([sp.eye(n), gs.r_scaled + U_RIDGE * sp.eye(ns), sp.diags(self.beta_prec)],
                               format="csr")
            self.q_prior = qp
            # constraint matrix: one row per component, over u
            if gs.n_comp:
                rows = gs.comp
                cols = n + np.arange(ns)
                self.a_con = sp.csr_matrix((np.ones(ns), (rows, cols)), shape=(gs.n_comp, self.m))
            else:
                self.a_con = sp.csr_matrix((0, self.m))
            self.log_det_aat = float(np.sum(np.log(gs.comp_sizes))) if gs.n_comp else 0.0
            # constant part of the restricted log-determinant of the prior precision
            self.ld_prior_const = gs.log_pdet_scaled + float(np.sum(np.log(self.beta_prec)))
            order = np.concatenate([
                np.arange(n),
                n + gs.s_order if ns else np.zeros(0, np.int64),
                self.i_beta,
            ]).astype(np.int64)
            # pattern template: theta with every coefficient nonzero
            pattern = self._posterior_precision((np.ones(n), 1.0), np.ones(n))
        else:  # leroux
            self.m = n + self.p1
            self.i_beta = n + np.arange(self.p1)
            self.a_con = sp.csr_matrix((0, self.m))
            self.log_det_aat = 0.0
            self._lap = gs.laplacian
            self._eye = sp.eye(n, format="csr")
            if n <= EIGEN_LIMIT:
                self._lap_eig = np.linalg.eigvalsh(gs.laplacian.toarray())
                self._prior_chol = None
            else:
                self._lap_eig = None
                self._prior_chol = SparseCholesky(gs.laplacian + sp.eye(n), gs.order)
            order = np.concatenate([gs.order, self.i_beta]).astype(np.int64)
            self._b_mat = sp.hstack([sp.eye(n), sp.csr_matrix(self.x1)], format="csr")
            qp = self._leroux_prior(np.array([0.0, 0.0]))[0]
            pattern = qp + self._b_mat.T @ self._b_mat
        self.chol = SparseCholesky(pattern, order)
        self.k_con = self.a_con.shape[0]
        self._acon_t = self.a_con.T.toarray()
        self._setup_assembly()

    # ------------------------------------------------------------ fast assembly
    def _slots(self):
        """Padded per-row columns of B (n x S), fixed for all theta."""
        n = self.n
        if self.kind == "leroux":
            return np.column_stack([np.arange(n)[:, None], np.tile(self.i_beta, (n, 1))])
        gs = self.g
        ucol = np.arange(n)  # islands: padding slot on v_i with value 0
        ucol[gs.structured] = n + np.arange(gs.n_structured)
        return np.column_stack([np.arange(n), ucol, np.tile(self.i_beta, (n, 1))])

    def slot_values(self, theta):
        """Values of B in the slots of :meth:`_slots` (n x S)."""
        if self.kind == "leroux":
            return np.column_stack([np.ones(self.n), self.x1])
        av, au = self._coefficients(theta)
        uval = np.zeros(self.n)
        uval[self.g.structured] = au
        return np.column_stack([av, uval, self.x1])

    def _scatter(self, mat):
        """Upper-pattern data of a symmetric sparse matrix (original indexing)."""
        up = sp.coo_matrix(sp.triu(sp.csr_matrix(mat)))
        return np.bincount(self.chol.positions(up.row, up.col), weights=up.data, minlength=self.chol.n_upper)

    def _setup_assembly(self):
        cols = self._slots()
        self.slot_cols = cols
        s = cols.shape[1]
        self._pairs = [(a, b) for a in range(s) for b in range(a, s)]
        self._pos = np.concatenate([self.chol.positions(cols[:, a], cols[:, b]) for a, b in self._pairs])
        if self.kind == "leroux":
            n = self.n
            self._d_eye = self._scatter(sp.block_diag([sp.eye(n), sp.csr_matrix((self.p1, self.p1))]))
            self._d_lap = self._scatter(sp.block_diag([self.g.laplacian, sp.csr_matrix((self.p1, self.p1))]))
            self._d_beta = self._scatter(sp.block_diag([sp.csr_matrix((n, n)), sp.diags(self.beta_prec)]))
        else:
            self._d_prior = self._scatter(self.q_prior)

    def _prior_data(self, theta):
        if self.kind != "leroux":
            return self._d_prior
        tau = np.exp(-2.0 * theta[0])
        rho = _expit(np.clip(theta[1], -_LOGIT_BOUND, _LOGIT_BOUND))
        return tau * (1.0 - rho) * self._d_eye + tau * rho * self._d_lap + self._d_beta

    def _products(self, theta):
        v = self.slot_values(theta)
        return np.concatenate([v[:, a] * v[:, b] for a, b in self._pairs])

    # ------------------------------------------------------------ structure
    def _coefficients(self, theta):
        """(a_v per area, a_u) for BYM2/ICAR."""
        gs = self.g
        sigma = np.exp(theta[0])
        if self.kind == "icar":
            phi = 1.0
        else:
            phi = _expit(np.clip(theta[1], -_LOGIT_BOUND, _LOGIT_BOUND))
        av = np.full(self.n, sigma)
        av[gs.structured] = sigma * np.sqrt(1.0 - phi)
        au = sigma * np.sqrt(phi)
        return av, au

    def design(self, theta) -> sp.csr_matrix:
        """Sparse map B from x to the log relative risks (n x m)."""
        if self.kind == "leroux":
            return self._b_mat
        av, au = self._coefficients(theta)
        n, gs = self.n, self.g
        ns = gs.n_structured
        rows = np.concatenate([np.arange(n), gs.structured, np.repeat(np.arange(n), self.p1)])
        cols = np.concatenate([np.arange(n), n + np.arange(ns), np.tile(self.i_beta, n)])
        vals = np.concatenate([av, np.full(ns, au), self.x1.ravel()])
        return sp.csr_matrix((vals, (rows, cols)), shape=(n, self.m))

    def _posterior_precision(self, coefs, w):
        av, au = coefs
        n, gs = self.n, self.g
        ns = gs.n_structured
        rows = np.concatenate([np.arange(n), gs.structured, np.repeat(np.arange(n), self.p1)])
        cols = np.concatenate([np.arange(n), n + np.arange(ns), np.tile(self.i_beta, n)])
        vals = np.concatenate([np.full(n, 1.0) * av, np.full(ns, au), self.x1.ravel()])
        b = sp.csr_matrix((vals, (rows, cols)), shape=(n, self.m))
        return self.q_prior + b.T @ sp.diags(w) @ b

    def _leroux_prior(self, theta):
        tau = np.exp(-2.0 * theta[0])
        rho = _expit(np.clip(theta[1], -_LOGIT_BOUND, _LOGIT_BOUND))
        qb = tau * ((1.0 - rho) * self._eye + rho * self._lap)
        qp = sp.block_diag([qb, sp.diags(self.beta_prec)], format="csr")
        if self._lap_eig is not None:
            ld = self.n * np.log(tau) + float(np.sum(np.log(1.0 - rho + rho * self._lap_eig)))
        else:
            if self._prior_chol.factorize((1.0 - rho) * self._eye + rho * self._lap) >= 0:  # pragma: no cover
                raise ModelError("Internal error: Leroux prior precision is not positive definite.")
            ld = self.n * np.log(tau) + self._prior_chol.logdet()
        ld += float(np.sum(np.log(self.beta_prec)))
        return qp, ld

    # ------------------------------------------------------------ Laplace
    def _newton(self, x, qp, bmat, bt, e, theta, max_iter, tol):
        """Constrained Newton iterations for argmax_x sum(y*eta - e*exp(eta)) - x'Qx/2, A x = 0."""
        y = self.y
        qdata = self._prior_data(theta)
        cprod = self._products(theta)
        npairs = len(self._pairs)
        acon = self.a_con
        k = self.k_con

        def objective(xx):
            eta = np.clip(bmat @ xx, -60.0, 60.0)
            return float(np.sum(y * eta - e * np.exp(eta)) - 0.5 * _dot(xx, qp @ xx)), eta

        f, eta = objective(x)
        wcon = gmat = None
        converged = False
        it = 0
        for it in range(1, max_iter + 1):
            mu = e * np.exp(eta)
            hdata = qdata + np.bincount(self._pos, weights=cprod * np.tile(mu, npairs),
                                        minlength=self.chol.n_upper)
            status = self.chol.factorize_data(hdata)
            if status >= 0:
                raise ModelError(
                    "The posterior precision matrix lost positive definiteness during the Newton "
                    f"iterations (hyperparameters {np.round(theta, 3).tolist()}). Check for extreme "
                    "counts or expected counts; rescaling the covariates or dropping constant ones helps."
                )
            grad = bt @ (y - mu) - qp @ x
            if k:
                # one pass over L for the gradient and the constraint columns
                sol = self.chol.solve(np.column_stack([grad, self._acon_t]))
                d = sol[:, 0]
                wcon = sol[:, 1:]  # m x k
                gmat = np.asarray(acon @ wcon)
                d = d - np.einsum("ik,k->i", wcon, np.linalg.solve(gmat, acon @ d))
            else:
                d = self.chol.solve(grad)
            x, (f, eta), converged = damped_step(objective, x, d, f, tol)
            if converged:
                break
        if not converged:
            raise ModelError(
                f"The Newton iterations for the latent field did not converge in {max_iter} iterations "
                f"(hyperparameters {np.round(theta, 3).tolist()}). Extreme relative risks or "
                "near-constant covariates are the usual cause: check the data, drop or rescale "
                "covariates, or choose tighter priors (CarPriors)."
            )
        return x, eta, it, wcon, gmat

    def _mean_correction(self, x, qp, bmat, bt, e, theta, wcon, gmat, max_iter, tol):
        """Solution of the Newton problem of :meth:`_newton` with expected counts ``e``, from ``x``.

        Chord iterations: the factorization of the posterior precision at the mode (still held
        by ``self.chol``) serves every step, so no new factorization is needed. The precision of
        the shifted problem has weights e exp(eta) larger by the factor exp(var/2), so the error
        contracts by about max(exp(var/2) - 1) per step; iterates stop at the same tolerance as
        :meth:`_newton`. If the steps stop shrinking, full Newton iterations take over.
        """
        y = self.y
        acon, k = self.a_con, self.k_con
        prev = np.inf
        for _ in range(max_iter):
            eta = np.clip(bmat @ x, -60.0, 60.0)
            grad = bt @ (y - e * np.exp(eta)) - qp @ x
            d = self.chol.solve(grad)
            if k:
                d = d - np.einsum("ik,k->i", wcon, np.linalg.solve(gmat, acon @ d))
            size = float(np.max(np.abs(d)))
            if size > 0.5 * prev:  # not contracting: leave it to Newton
                break
            x = x + d
            if size < tol * (1.0 + np.max(np.abs(x))):
                return x
            prev = size
        return self._newton(x, qp, bmat, bt, e, theta, max_iter, tol)[0]

    def _log_density(self, xx, qp, bmat, e):
        """Log density (up to a constant) of the latent field given y, as in :meth:`_newton`."""
        eta = np.clip(bmat @ xx, -60.0, 60.0)
        return float(np.sum(self.y * eta - e * np.exp(eta)) - 0.5 * _dot(xx, qp @ xx))

    def _tangent(self, theta, x, eta, qp, bt, wcon, gmat):
        """Derivative dx*/dθ (m x d) of the constrained mode, by the implicit function theorem.

        At the mode the gradient g(x, θ) = Bᵀ(y − μ) − Q_prior x vanishes on the constraint
        subspace, so Q dx*/dθ_j = ∂g/∂θ_j (constrained solve with the factorization of the last
        Newton iteration). Used only to predict the starting point of the next evaluation.
        """
        n = self.n
        mu = self.e * np.exp(eta)
        resid = self.y - mu
        cols = []
        if self.kind == "leroux":
            xb = x[:n]
            qbx = (qp @ x)[:n]
            tau = np.exp(-2.0 * theta[0])
            rho = _expit(np.clip(theta[1], -_LOGIT_BOUND, _LOGIT_BOUND))
            drho = rho * (1.0 - rho) if abs(theta[1]) < _LOGIT_BOUND else 0.0
            c0 = np.zeros(self.m)
            c0[:n] = 2.0 * qbx  # ∂Q_b/∂θ_0 = −2 Q_b
            c1 = np.zeros(self.m)
            c1[:n] = -tau * drho * (self._lap @ xb - xb)  # ∂Q_b/∂ρ = τ (R − I)
            cols = [c0, c1]
        else:
            gs = self.g
            ns = gs.n_structured
            sigma = np.exp(theta[0])
            av, au = self._coefficients(theta)
            derivs = [(av, au)]  # ∂a/∂ log σ = a
            if self.kind == "bym2":
                phi = _expit(np.clip(theta[1], -_LOGIT_BOUND, _LOGIT_BOUND))
                dphi = phi * (1.0 - phi) if abs(theta[1]) < _LOGIT_BOUND else 0.0
                dav = np.zeros(n)
                dav[gs.structured] = -0.5 * sigma * dphi / np.sqrt(max(1.0 - phi, 1e-300))
                dau = 0.5 * sigma * dphi / np.sqrt(max(phi, 1e-300))
                derivs.append((dav, dau))
            xv = x[:n]
            xu = x[n: n + ns]
            for dav, dau in derivs:
                deta = dav * xv
                deta[gs.structured] += dau * xu
                c = -(bt @ (mu * deta))
                c[:n] += dav * resid
                c[n: n + ns] += dau * resid[gs.structured]
                cols.append(c)
        t = self.chol.solve(np.column_stack(cols))
        if self.k_con:
            t = t - wcon @ np.linalg.solve(gmat, self.a_con @ t)
        return t

    def laplace(self, theta, x0=None, *, marginals=False, max_iter=60, tol=1e-7,
                tangent=False) -> _LaplaceResult:
        theta = np.asarray(theta, float)
        if self.kind == "leroux":
            qp, ld_prior = self._leroux_prior(theta)
            bmat = self._b_mat
        else:
            qp = self.q_prior
            ld_prior = self.ld_prior_const
            bmat = self.design(theta)
        bt = sp.csr_matrix(bmat.T)
        y, e = self.y, self.e
        if x0 is None:
            x = np.zeros(self.m)
            x[self.i_beta[0]] = np.log(y.sum() / e.sum())
        else:
            x0, theta_old, *rest = x0
            x = x0.copy()
            if self.kind != "leroux":
                # keep the area effects b (not the standardized v, u) from the warm start
                x[: self.i_beta[0]] *= np.exp(theta_old[0] - theta[0])
            if rest and rest[0] is not None:
                # first-order prediction of the new mode along the tangent dx*/dθ of the old one;
                # kept only if it is the better start (higher log density: for a concave
                # objective that is the start closer to the mode in the Q-norm)
                xt = x0 + mix(rest[0], theta - theta_old)
                if self._log_density(xt, qp, bmat, e) > self._log_density(x, qp, bmat, e):
                    x = xt
        x, eta, it, wcon, gmat = self._newton(x, qp, bmat, bt, e, theta, max_iter, tol)
        if tangent:
            res_tangent = self._tangent(theta, x, eta, qp, bt, wcon, gmat)
        k = self.k_con
        # log p(y | theta) by Laplace; constants of the restricted Gaussian densities cancel
        loglik = float(np.sum(y * (self.log_e + eta) - e * np.exp(eta) - gammaln(y + 1.0)))
        quad = _dot(x, qp @ x)
        ld_post = self.chol.logdet()
        if k:
            ld_post += float(np.linalg.slogdet(gmat)[1]) - self.log_det_aat
        logml = loglik - 0.5 * quad + 0.5 * ld_prior - 0.5 * ld_post
        res = _LaplaceResult(theta=theta, x=x, log_marginal=logml, iterations=it)
        if tangent:
            res.extra["tangent"] = res_tangent
        if marginals:
            self._marginals(res, bmat, wcon, gmat)
            # Variational mean correction: with the Laplace covariance fixed, the mean m of the
            # Gaussian maximising E_q[log p(y|x)] - KL(q || prior) solves the same Newton problem
            # with E_i replaced by E_i exp(var_i / 2) (van Niekerk & Rue 2021, full-rank form).
            xv = self._mean_correction(x, qp, bmat, bt, e * np.exp(0.5 * res.var_eta), theta, wcon, gmat,
                                       max_iter, tol)
            res.x_mean = xv
            res.mean_eta = bmat @ xv
            res.beta_mean = xv[self.i_beta].copy()
        return res

    def _marginals(self, res, bmat, wcon, gmat):
        """Means and variances of the log relative risks and of the fixed effects."""
        chol = self.chol
        chol.selected_inverse()
        b = sp.csr_matrix(bmat)
        b.sort_indices()
        nnz_row = np.diff(b.indptr)
        width = int(nnz_row.max())
        n = self.n
        # padded per-row column indices / coefficients
        cols = np.zeros((n, width), np.int64)
        vals = np.zeros((n, width))
        slot = np.arange(b.nnz) - np.repeat(b.indptr[:-1], nnz_row)
        rows = np.repeat(np.arange(n), nnz_row)
        cols[rows, slot] = b.indices
        vals[rows, slot] = b.data
        # unused slots point at the row's first column with coefficient 0
        mask = np.arange(width)[None, :] >= nnz_row[:, None]
        cols[mask] = np.broadcast_to(cols[:, :1], (n, width))[mask]
        var = np.zeros(n)
        for s in range(width):
            for t in range(s, width):
                sig = chol.inverse_at(cols[:, s], cols[:, t])
                fac = 1.0 if s == t else 2.0
                var += fac * vals[:, s] * vals[:, t] * sig
        ib = self.i_beta
        bsig = np.array([chol.inverse_at(np.full(ib.size, i), ib) for i in ib])
        if self.k_con:
            bw = b @ wcon  # n x k
            ginv = np.linalg.inv(gmat)
            var = var - np.einsum("ij,jk,ik->i", bw, ginv, bw)
            wb = wcon[ib]
            bsig = bsig - wb @ ginv @ wb.T
        res.mean_eta = b @ res.x
        res.var_eta = np.maximum(var, 1e-300)
        res.beta_mean = res.x[ib].copy()
        res.beta_var = np.maximum(np.diag(bsig), 1e-300)


# ============================================================== hyperparameters
@dataclass
class _Design:
    thetas: np.ndarray  # (K, d)
    log_post: np.ndarray  # (K,)
    weights: np.ndarray  # (K,), sum 1
    results: list
    mode: np.ndarray
    scales: np.ndarray  # S matrix: theta = mode + S z
    stretch: np.ndarray  # (d, 2) skewness scale factors (negative, positive)
    log_evidence: float
    n_evaluations: int
    edge: bool
    skipped: int = 0  # integration points left out because they lay beyond the bounds


def integrate_hyperparameters(log_prior, latent: _LatentModel, theta0, bounds, *, dz=1.0, radius=3.0,
                              fixed=None, strategy="grid") -> _Design:
    """Mode, Hessian and integration design over θ (Rue, Martino & Chopin 2009).

    strategy "grid": regular grid (spacing dz in standardized, skewness-stretched coordinates)
    over a disc of the given radius, flood-filled outward where the density is still high.
    strategy "gauss-hermite": tensor Gauss–Hermite nodes (5 in 1-D, 3 x 3 in 2-D) in the same
    coordinates, reweighted by the ratio of the Laplace posterior to its Gaussian fit (cheaper;
    used for large graphs where the hyperparameter posterior is close to Gaussian).
    """
    cache = {}
    state = {"x": None, "theta": None, "count": 0}
    latent.stats = state
    # recent latent modes with their tangents dx*/dθ; each evaluation starts from a first-order
    # prediction off the nearest one (finite-difference neighbours then need one Newton step less)
    anchors = []

    def evaluate(theta, marginals=False):
        key = tuple(np.round(np.asarray(theta, float), 12))
        hit = cache.get(key)
        if hit is not None and (not marginals or hit[1].mean_eta is not None):
            return hit
        th = np.asarray(theta, float)
        if anchors:
            dist = [float(np.sum((a[1] - th) ** 2)) for a in anchors]
            warm = anchors[int(np.argmin(dist))]
        else:
            warm = None if state["x"] is None else (state["x"], state["theta"])
        res = latent.laplace(th, warm, marginals=marginals, tangent=True)
        state["count"] += 1
        state.setdefault("iters", []).append(res.iterations)
        state["x"], state["theta"] = res.x, res.theta  # warm start for the next evaluation
        anchors.insert(0, (res.x, res.theta, res.extra.pop("tangent")))
        del anchors[ANCHORS:]
        lp = res.log_marginal + float(log_prior(np.asarray(theta, float)))
        cache[key] = (lp, res)
        return lp, res

    if fixed is not None:
        th = np.asarray(fixed, float)
        lp, res = evaluate(th, marginals=True)
        return _Design(thetas=th[None, :], log_post=np.array([lp]), weights=np.array([1.0]),
                       results=[res], mode=th, scales=np.zeros((th.size, th.size)),
                       stretch=np.ones((th.size, 2)), log_evidence=lp, n_evaluations=state["count"],
                       edge=False)

    d = len(theta0)
    fd = 1e-4

    def negf(t):
        return -evaluate(t)[0]

    def negjac(t):
        g = np.empty(d)
        for j in range(d):
            e = np.zeros(d)
            e[j] = fd
            g[j] = (negf(t + e) - negf(t - e)) / (2 * fd)
        return g

    # first pass establishes a warm start for the latent field
    theta0 = np.asarray(theta0, float)
    _, r0 = evaluate(theta0)
    state["x"], state["theta"] = r0.x, r0.theta
    found = _newton_search(lambda t: -negf(t), theta0, bounds)
    if found is not None:
        mode, lp_mode, hess, n_iter = found
        state["search"] = (state["count"], n_iter)
        r_mode = evaluate(mode)[1]
        state["x"], state["theta"] = r_mode.x, r_mode.theta
        edge = any(abs(mode[j] - b) < 1e-3 for j in range(d) for b in bounds[j])
    else:
        mode, lp_mode, hess, edge = _quasi_newton_search(negf, negjac, evaluate, state, theta0, bounds)
    evals, evecs = np.linalg.eigh(hess)
    if np.any(evals <= 1e-8):
        edge = True
        evals = np.maximum(np.abs(evals), 1e-2)
    smat = evecs / np.sqrt(evals)[None, :]
    # asymmetric scaling along each axis (skewness of log p(theta | y))
    stretch = np.ones((d, 2))
    for j in range(d):
        for si, sign in enumerate((-1.0, 1.0)):
            z = np.zeros(d)
            z[j] = 2.0 * sign
            drop = lp_mode - evaluate(mode + smat @ z)[0]
            stretch[j, si] = np.clip(np.sqrt(2.0 / drop), 0.3, 3.0) if drop > 1e-8 else 3.0
    # Grid in standardized coordinates: the disc of the given radius, then flood-filled outwards
    # (up to radius + 4) from every point whose density is still above 1 % of the peak, so heavy
    # tails (e.g. a weakly identified phi) are followed only where they are.
    lower = np.array([b[0] for b in bounds]) - 0.5
    upper = np.array([b[1] for b in bounds]) + 0.5
    max_rad = radius + 4.0
    done = {}
    skipped = set()

    def add(z):
        key = tuple(np.round(z, 9))
        if key in done or key in skipped:
            return False
        fac = np.where(z < 0, stretch[:, 0], np.where(z > 0, stretch[:, 1], 0.5 * stretch.sum(1)))
        theta = mode + smat @ (z * np.where(z < 0, stretch[:, 0], stretch[:, 1]))
        if np.any(theta < lower) or np.any(theta > upper):
            skipped.add(key)
            return False
        lp, res = evaluate(theta, marginals=True)
        done[key] = (theta, lp, res, float(np.prod(fac)))
        return True

    if strategy == "gauss-hermite":
        gz, gw = np.polynomial.hermite_e.hermegauss(5 if d == 1 else 3)
        gw = gw / gw.sum()
        mesh = np.array(np.meshgrid(*([gz] * d), indexing="ij")).reshape(d, -1).T
        wts = np.prod(np.array(np.meshgrid(*([gw] * d), indexing="ij")).reshape(d, -1).T, axis=1)
        for z, wq in zip(mesh, wts):
            if add(z):
                key = tuple(np.round(z, 9))
                th, lp_k, res_k, fac_k = done[key]
                done[key] = (th, lp_k, res_k, fac_k * wq * np.exp(0.5 * float(z @ z)))
        keys = sorted(done)
        lps = np.array([done[kk][1] for kk in keys])
        pts = [done[kk][0] for kk in keys]
        res_list = [done[kk][2] for kk in keys]
        vol = np.array([done[kk][3] for kk in keys])
        w = np.exp(lps - lps.max()) * vol
        w /= w.sum()
        log_vol = float(np.log(abs(np.linalg.det(smat)))) + 0.5 * d * np.log(2 * np.pi)
        log_ev = float(lps.max() + np.log(np.sum(np.exp(lps - lps.max()) * vol)) + log_vol)
        return _Design(thetas=np.array(pts), log_post=lps, weights=w, results=res_list, mode=mode,
                       scales=smat, stretch=stretch, log_evidence=log_ev, n_evaluations=state["count"],
                       edge=edge, skipped=len(skipped))

    steps = np.arange(-np.floor(radius / dz), np.floor(radius / dz) + 1) * dz
    mesh = np.array(np.meshgrid(*([steps] * d), indexing="ij")).reshape(d, -1).T
    mesh = mesh[np.sum(mesh**2, axis=1) <= radius**2 + 1e-9]
    mesh = mesh[np.lexsort(mesh.T[::-1])]
    for z in mesh:
        add(z)
    nbr = np.array(np.meshgrid(*([[-dz, 0.0, dz]] * d), indexing="ij")).reshape(d, -1).T
    nbr = nbr[np.any(nbr != 0, axis=1)]
    frontier = list(done)
    while frontier:
        peak = max(v[1] for v in done.values())
        new = []
        for key in sorted(frontier):
            if done[key][1] - peak < np.log(0.01):
                continue
            for step in nbr:
                z = np.asarray(key) + step
                if np.sum(z**2) <= max_rad**2 + 1e-9 and add(z):
                    new.append(tuple(np.round(z, 9)))
        frontier = new
    keys = sorted(done)
    lps = np.array([done[kk][1] for kk in keys])
    rel = np.exp(lps - lps.max())
    norms = np.sqrt(np.sum(np.array(keys) ** 2, axis=1))
    # still more than 5 % of the peak on the outermost points or next to a bound: edge
    if np.any(rel[norms > max_rad - dz] > 0.05):
        edge = True
    if skipped:
        sk = np.array(sorted(skipped))
        for key, r in zip(keys, rel):
            if r > 0.05 and np.min(np.max(np.abs(sk - np.asarray(key)), axis=1)) <= dz + 1e-9:
                edge = True
                break
    pts = [done[kk][0] for kk in keys]
    res_list = [done[kk][2] for kk in keys]
    vol = np.array([done[kk][3] for kk in keys])
    mesh = np.array(keys)
    logw = lps - lps.max() + np.log(vol)
    w = np.exp(logw)
    w /= w.sum()
    log_vol = float(np.log(abs(np.linalg.det(smat)))) + d * np.log(dz)
    log_ev = float(lps.max() + np.log(np.sum(np.exp(lps - lps.max()) * vol)) + log_vol)
    return _Design(thetas=np.array(pts), log_post=lps, weights=w, results=res_list, mode=mode,
                   scales=smat, stretch=stretch, log_evidence=log_ev, n_evaluations=state["count"],
                   edge=edge)



#: largest number of Newton iterations of the hyperparameter mode search before the fallback
MODE_ITERATIONS = 20
#: range of the finite-difference steps of the mode search (θ units): small enough that the latent
#: mode predicted along its tangent needs one Newton iteration, large enough for second differences
STENCIL_STEP = (1e-3, 2e-3)
#: the mode search stops when the predicted gain of a further Newton step is below this (log units)
MODE_GAIN_TOL = 1e-3


def _stencil(f, c, f0, h):
    """Gradient and Hessian of f at c from central differences with steps h (2d + d(d-1) points).

    Diagonal: (f(c + h_j e_j) - 2 f0 + f(c - h_j e_j)) / h_j^2; off-diagonal from the two diagonal
    points c ± (h_i e_i + h_j e_j), second-order accurate like the axis differences.
    """
    d = c.size
    fp = np.empty(d)
    fm = np.empty(d)
    for j in range(d):
        e = np.zeros(d)
        e[j] = h[j]
        fp[j] = f(c + e)
        fm[j] = f(c - e)
    g = (fp - fm) / (2.0 * h)
    hess = np.diag((fp - 2.0 * f0 + fm) / h**2)
    for i in range(d):
        for j in range(i + 1, d):
            e = np.zeros(d)
            e[i], e[j] = h[i], h[j]
            fpp, fmm = f(c + e), f(c - e)
            hess[i, j] = hess[j, i] = (fpp + fmm - fp[i] - fm[i] - fp[j] - fm[j] + 2.0 * f0) / (2.0 * h[i] * h[j])
    return g, hess


def _newton_search(f, theta0, bounds):
    """Mode of the log posterior f(θ) by Newton steps on finite-difference stencils.

    Each iteration evaluates f on a central-difference stencil around the current point (steps of
    a twentieth of a posterior standard deviation from the curvature of the previous stencil,
    within STENCIL_STEP, so that every stencil point needs about one Newton iteration of the
    latent field from its predicted mode), takes the Newton step (eigenvalues of the Hessian
    replaced by their absolute values, at most 3 units per coordinate, kept inside the bounds,
    halved until f does not decrease; a full step that gained at least what was predicted is
    doubled while f keeps rising, which follows the flat approach of logit(φ) to 1 in a few
    evaluations) and stops when the predicted gain g'(-H)^-1 g / 2 falls below MODE_GAIN_TOL
    log units (the mode then lies within about sqrt(2 x 1e-3) = 0.045 posterior standard
    deviations). The Hessian of the last stencil, centred within that distance of the mode, is returned for the integration design, so the search and the Hessian
    share their evaluations. Coordinates held at a bound (gradient pointing outwards) are dropped
    from the Newton system.

    Returns (mode, f(mode), Hessian of -f, iterations), or None when the search does not settle
    within MODE_ITERATIONS iterations (the caller then falls back to a quasi-Newton search).
    """
    d = theta0.size
    lo = np.array([b[0] for b in bounds], float)
    hi = np.array([b[1] for b in bounds], float)
    c = np.clip(np.asarray(theta0, float), lo, hi)
    f0 = f(c)
    h = np.full(d, STENCIL_STEP[1])
    for it in range(1, MODE_ITERATIONS + 1):
        g, hmat = _stencil(f, c, f0, h)
        neg = -hmat
        floor = max(1e-6, 1e-6 * float(np.max(np.abs(np.linalg.eigvalsh(neg)))))
        # coordinates at a bound whose gradient points out of the box stay fixed
        free = ~(((c <= lo + 1e-12) & (g < 0)) | ((c >= hi - 1e-12) & (g > 0)))
        if not free.any():
            return c, f0, neg, it
        nf = neg[np.ix_(free, free)]
        evf, evecf = np.linalg.eigh(nf)
        concave = bool(np.all(evf > 0))
        evf = np.maximum(np.abs(evf), floor)
        step = np.zeros(d)
        step[free] = evecf @ ((evecf.T @ g[free]) / evf)
        gain = 0.5 * float(g[free] @ step[free])
        # next stencil: a twentieth of a posterior standard deviation, within STENCIL_STEP
        h = np.clip(0.05 / np.sqrt(np.maximum(np.diag(neg), 1e-12)), *STENCIL_STEP)
        if gain < MODE_GAIN_TOL and concave:
            return c, f0, neg, it
        step = np.clip(step, -3.0, 3.0)
        new = np.clip(c + step, lo, hi)
        f_new = f(new)
        halvings = 0
        while f_new < f0 and halvings < 6:
            step *= 0.5
            new = np.clip(c + step, lo, hi)
            f_new = f(new)
            halvings += 1
        if f_new < f0:  # no ascent along the Newton direction: leave it to the fallback
            return None
        # a full step that gained at least as much as predicted is on a flattening slope (typical
        # of logit(phi) near 1): try doubling it while that keeps improving
        if halvings == 0 and f_new - f0 >= gain:
            for _ in range(3):
                far = np.clip(c + 2.0 * (new - c), lo, hi)
                if np.allclose(far, new):
                    break
                f_far = f(far)
                if f_far <= f_new:
                    break
                new, f_new = far, f_far
        c, f0 = new, f_new
    return None


def _quasi_newton_search(negf, negjac, evaluate, state, theta0, bounds):
    """Fallback mode search: L-BFGS-B with central-difference gradients, then a numerical Hessian.

    Used when :func:`_newton_search` does not settle (a posterior far from concave near the start).
    """
    d = theta0.size
    f_c = negf(theta0)
    scale = np.ones(d)
    for j in range(d):
        ej = np.zeros(d)
        ej[j] = 0.05
        curv = (negf(theta0 + ej) - 2 * f_c + negf(theta0 - ej)) / 0.05**2
        scale[j] = np.sqrt(np.clip(curv, 1e-2, 1e8))

    def negf_s(u):
        return negf(u / scale)

    def negjac_s(u):
        return negjac(u / scale) / scale

    sbounds = [(b[0] * s, b[1] * s) for b, s in zip(bounds, scale)]
    opt = minimize(negf_s, theta0 * scale, jac=negjac_s, method="L-BFGS-B", bounds=sbounds,
                   options={"maxiter": 200, "gtol": 1e-3, "ftol": 1e-12})
    state["search"] = (state["count"], opt.nit)
    mode = np.asarray(opt.x, float) / scale
    lp_mode, r_mode = evaluate(mode)
    state["x"], state["theta"] = r_mode.x, r_mode.theta
    edge = any(abs(mode[j] - b) < 1e-3 for j in range(d) for b in bounds[j])
    # numerical Hessian of log posterior at the mode
    h = 0.05
    hess = np.empty((d, d))
    for i in range(d):
        for j in range(i, d):
            ei = np.zeros(d)
            ej = np.zeros(d)
            ei[i] = h
            ej[j] = h
            if i == j:
                v = (negf(mode + ei) - 2 * (-lp_mode) + negf(mode - ei)) / h**2
            else:
                v = (negf(mode + ei + ej) - negf(mode + ei - ej) - negf(mode - ei + ej)
                     + negf(mode - ei - ej)) / (4 * h * h)
            hess[i, j] = hess[j, i] = v
    return mode, lp_mode, hess, edge


def hyper_marginals(design: _Design, *, grid_step=0.05):
    """Smooth marginal posteriors of θ from a cubic fit to log p(θ | y) on the design.

    Returns fine-grid θ points (F, d) and normalised weights (F,).
    """
    d = design.thetas.shape[1]
    if design.thetas.shape[0] == 1:
        return design.thetas, np.ones(1)
    sinv = np.linalg.inv(design.scales)
    u = (design.thetas - design.mode) @ sinv.T

    def features(uu):
        cols = [np.ones(uu.shape[0])]
        for i in range(d):
            cols.append(uu[:, i])
        for i in range(d):
            for j in range(i, d):
                cols.append(uu[:, i] * uu[:, j])
        for i in range(d):
            for j in range(i, d):
                for k in range(j, d):
                    cols.append(uu[:, i] * uu[:, j] * uu[:, k])
        return np.column_stack(cols)

    feats = features(u)
    if feats.shape[0] < 2 * feats.shape[1]:  # too few points for a cubic: quadratic only
        feats = feats[:, : 1 + d + d * (d + 1) // 2]
    coef, *_ = np.linalg.lstsq(feats, design.log_post, rcond=None)
    use_rbf = u.shape[0] >= 4 * feats.shape[1]
    if use_rbf:
        # enough points: thin-plate spline interpolation of the residual from the polynomial fit
        from scipy.interpolate import RBFInterpolator

        resid = design.log_post - feats @ coef
        rbf = RBFInterpolator(u, resid, kernel="thin_plate_spline", smoothing=1e-6)
    lo = u.min(axis=0) - 0.5
    hi = u.max(axis=0) + 0.5
    axes = [np.arange(lo[i], hi[i] + grid_step / 2, grid_step) for i in range(d)]
    fine = np.array(np.meshgrid(*axes, indexing="ij")).reshape(d, -1).T
    rmax = np.sqrt(np.max(np.sum(u**2, axis=1))) + 0.5
    fine = fine[np.sum(fine**2, axis=1) <= rmax**2]
    lp = features(fine)[:, : coef.size] @ coef
    if use_rbf:
        lp = lp + rbf(fine)
        lp = np.minimum(lp, design.log_post.max() + 0.5)
    w = np.exp(lp - lp.max())
    w /= w.sum()
    return design.mode + fine @ design.scales.T, w


# ============================================================== mixture summaries
def mixture_quantiles(mu, sd, w, probs, *, iterations=60):
    """Quantiles of Σ_k w_k N(mu[:, k], sd[:, k]²) for every row.

    Safeguarded Newton iterations on the mixture CDF, vectorised over rows: a Newton step from the
    current point is taken when it stays inside the bracket [a, b] known to hold the quantile,
    otherwise the bracket is bisected; the bracket shrinks every iteration. Starts from the
    quantile of the moment-matched normal. Converges in a handful of iterations; a row stops when its
    step is below 1e-12 (absolute, log scale), all rows after ``iterations``.
    """
    from scipy.special import ndtr, ndtri

    inv_sd = 1.0 / sd
    wn = w / np.sqrt(2.0 * np.pi)
    m1 = mix(mu, w)
    sd_all = np.sqrt(np.maximum(mix(sd**2 + mu**2, w) - m1**2, 1e-300))
    out = []
    for p in probs:
        a = np.min(mu - 8.5 * sd, axis=1)
        b = np.max(mu + 8.5 * sd, axis=1)
        x = np.clip(m1 + sd_all * ndtri(p), a, b)
        rows = np.arange(x.size)  # rows still iterating
        for _ in range(iterations):
            xr, ar, br = x[rows], a[rows], b[rows]
            z = (xr[:, None] - mu[rows]) * inv_sd[rows]
            cdf = mix(ndtr(z), w)
            pdf = mix(np.exp(-0.5 * z * z) * inv_sd[rows], wn)
            below = cdf < p
            ar = np.where(below, xr, ar)
            br = np.where(below, br, xr)
            with np.errstate(divide="ignore", invalid="ignore"):
                xn = xr - (cdf - p) / pdf
            bad = ~np.isfinite(xn) | (xn <= ar) | (xn >= br)
            xn = np.where(bad, 0.5 * (ar + br), xn)
            x[rows], a[rows], b[rows] = xn, ar, br
            rows = rows[np.abs(xn - xr) >= 1e-12]
            if rows.size == 0:
                break
        out.append(x)
    return out


def weighted_quantiles(values, weights, probs):
    """Quantiles of a discrete distribution (linear interpolation of the mid-point CDF)."""
    o = np.argsort(values, kind="stable")
    v = values[o]
    cw = np.cumsum(weights[o]) - 0.5 * weights[o]
    return np.interp(probs, cw, v)


def warn_edge(name):
    warnings.warn(
        f"The posterior of the {name} hyperparameters piles up at the edge of the integration "
        "design (or the mode is at a bound): the data say little about them, and results lean on "
        "the priors. Check the priors (CarPriors) or consider a simpler model.",
        ModelWarning,
        stacklevel=3,
    )
