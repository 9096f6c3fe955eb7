"""Timing of a general-purpose MCMC fit of BYM2, for comparison with areamap's deterministic engine.

The MCMC side uses numpyro (JAX, CPU), which is NOT a dependency of areamap; it is imported only
inside :func:`time_mcmc_bym2`, which raises ImportError explaining how to install it. The data
simulator :func:`simulate_grid_data` needs only numpy, so a benchmark can fit exactly the same data
with ``areamap.models.fit_car``.

Model (same priors as areamap's CarPriors defaults)::

    y_i ~ Poisson(E_i exp(beta0 + x_i' beta + b_i)),  b = sigma (sqrt(phi) u* + sqrt(1 - phi) v)
    v ~ N(0, I),  u* = sum-to-zero intrinsic CAR with precision c R (Sørbye–Rue scaled), sampled
    non-centred as u* = B L^{-T} e with B an orthonormal basis of the sum-to-zero subspace and
    L L^T = c B'RB;  beta0, beta_j ~ N(0, 5^2);  sigma ~ Exp(-ln(0.01)/1);
    phi ~ PC prior with P(phi < 0.5) = 2/3 (Riebler et al. 2016, exact, from the eigenvalues).

Run directly (in an environment that has numpyro)::

    python benchmarks/_mcmc_reference.py            # 30 x 30 grid
    python benchmarks/_mcmc_reference.py --n-side 20
"""

from __future__ import annotations

import os
import platform
import time

import numpy as np

__all__ = ["simulate_grid_data", "time_mcmc_bym2"]

_INSTALL_HINT = (
    "time_mcmc_bym2 needs the probabilistic-programming library numpyro (with jax), which areamap "
    "does not depend on. Install it in a separate environment, e.g. "
    "`python -m venv /tmp/mcmcenv && /tmp/mcmcenv/bin/pip install numpyro jax jaxlib numpy scipy` "
    "and run `/tmp/mcmcenv/bin/python benchmarks/_mcmc_reference.py`."
)

SIGMA_RATE = -np.log(0.01) / 1.0
PHI_UPPER, PHI_TAIL = 0.5, 2.0 / 3.0
COEF_SD = 5.0


def grid_adjacency(n_side: int) -> np.ndarray:
    """Dense 0/1 rook adjacency of an n_side x n_side lattice, cells in row-major order."""
    n = n_side * n_side
    a = np.zeros((n, n))
    idx = np.arange(n).reshape(n_side, n_side)
    for p, q in ((idx[:, :-1], idx[:, 1:]), (idx[:-1, :], idx[1:, :])):
        a[p.ravel(), q.ravel()] = 1.0
        a[q.ravel(), p.ravel()] = 1.0
    return a


def _bym2_structure(adjacency: np.ndarray):
    """Scaling constant c, eigenvalues gamma of (cR)^+ on the non-null space, and M = B L^{-T}."""
    import scipy.linalg as sla

    n = adjacency.shape[0]
    R = np.diag(adjacency.sum(1)) - adjacency
    lam, V = np.linalg.eigh(R)
    if lam[1] < 1e-9:
        raise ValueError("The grid graph must be connected.")
    rplus_diag = np.einsum("ik,k,ik->i", V[:, 1:], 1.0 / lam[1:], V[:, 1:])
    c = float(np.exp(np.mean(np.log(rplus_diag))))
    gamma = 1.0 / (c * lam[1:])
    q, _ = np.linalg.qr(np.column_stack([np.ones(n), np.eye(n)[:, : n - 1]]))
    B = q[:, 1:n]
    L = np.linalg.cholesky(c * (B.T @ R @ B))
    M = B @ sla.solve_triangular(L.T, np.eye(n - 1), lower=False)
    return c, gamma, M


def simulate_grid_data(n_side: int = 30, seed: int = 0) -> dict:
    """Simulated BYM2 data with two covariates on an n_side x n_side rook grid.

    Returns a dict with ``adjacency`` (dense 0/1), ``observed``, ``expected`` (uniform on 5..30),
    ``covariates`` (n x 2, standard normal), ``true_rr`` and the true parameters
    (beta = (0, 0.3, -0.2), sigma = 0.5, phi = 0.7). Same seed -> same data.
    """
    rng = np.random.default_rng(seed)
    adj = grid_adjacency(n_side)
    n = adj.shape[0]
    _, _, M = _bym2_structure(adj)
    sigma, phi, beta = 0.5, 0.7, np.array([0.0, 0.3, -0.2])
    u = M @ rng.standard_normal(n - 1)
    v = rng.standard_normal(n)
    b = sigma * (np.sqrt(phi) * u + np.sqrt(1.0 - phi) * v)
    X = rng.standard_normal((n, 2))
    E = rng.uniform(5.0, 30.0, n)
    rr = np.exp(beta[0] + X @ beta[1:] + b)
    y = rng.poisson(E * rr).astype(float)
    return {"adjacency": adj, "observed": y, "expected": E, "covariates": X, "true_rr": rr,
            "beta": beta, "sigma": sigma, "phi": phi}


def _import_numpyro():
    try:
        import jax  # noqa: F401
        import numpyro  # noqa: F401
    except ImportError as exc:  # pragma: no cover - depends on the environment
        raise ImportError(_INSTALL_HINT) from exc


def time_mcmc_bym2(n_side: int = 30, seed: int = 0, *, num_chains: int = 4, num_warmup: int = 2000,
                   num_samples: int = 2000, target_accept: float = 0.95) -> dict:
    """Time NUTS on BYM2 with two covariates on a simulated grid.

    Four chains are run one after another (``chain_method="sequential"``) on the CPU, so the
    time is the total for all chains; JIT compilation is included (a user pays it too). If the
    smallest bulk ESS over all parameters (beta, sigma, phi and every b_i) is below 400 the
    run is repeated with twice as many warm-up and draws (up to three times), and the time of
    the final run is reported.

    Returns
    -------
    dict
        ``seconds`` (wall time of the final run), ``cpu_seconds`` (CPU time of this process in the
        final run, all threads; less sensitive to other load on a shared machine),
        ``seconds_total`` (wall time of all attempts),
        ``ess_min`` (smallest bulk ESS), ``ess_min_parameter``, ``seconds_per_effective_draw``,
        ``divergences``, ``settings`` (str), ``n_areas``, ``versions``.

    Raises
    ------
    ImportError
        If numpyro/jax are not installed (they are not areamap dependencies).
    """
    _import_numpyro()
    import jax
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist
    from numpyro.diagnostics import effective_sample_size
    from numpyro.infer import MCMC, NUTS

    jax.config.update("jax_enable_x64", True)
    numpyro.enable_x64()

    data = simulate_grid_data(n_side, seed)
    n = data["observed"].size
    c, gamma, M = _bym2_structure(data["adjacency"])
    g1 = jnp.asarray(gamma - 1.0)
    s1 = float(np.sum(gamma - 1.0))
    d_u = np.sqrt(2.0 * 0.5 * (PHI_UPPER * s1 - np.sum(np.log1p(PHI_UPPER * (gamma - 1.0)))))
    theta = -np.log(1.0 - PHI_TAIL) / d_u
    jM, jy = jnp.asarray(M), jnp.asarray(data["observed"])
    jlogE, jX = jnp.asarray(np.log(data["expected"])), jnp.asarray(data["covariates"])

    def log_pc_phi(phi):
        kl = 0.5 * (phi * s1 - jnp.sum(jnp.log1p(phi * g1)))
        d = jnp.sqrt(2.0 * kl)
        dkl = 0.5 * (s1 - jnp.sum(g1 / (1.0 + phi * g1)))
        return jnp.log(theta) - theta * d + jnp.log(jnp.abs(dkl / d))

    def model():
        beta0 = numpyro.sample("beta0", dist.Normal(0.0, 5.0))
        beta = numpyro.sample("beta", dist.Normal(0.0, COEF_SD).expand([2]))
        sigma = numpyro.sample("sigma", dist.Exponential(SIGMA_RATE))
        phi = numpyro.sample("phi", dist.Uniform(0.0, 1.0))
        numpyro.factor("phi_pc_prior", log_pc_phi(phi))
        e = numpyro.sample("e", dist.Normal(0.0, 1.0).expand([n - 1]))
        v = numpyro.sample("v", dist.Normal(0.0, 1.0).expand([n]))
        b = numpyro.deterministic("b", sigma * (jnp.sqrt(phi) * (jM @ e) + jnp.sqrt(1.0 - phi) * v))
        numpyro.sample("y", dist.Poisson(jnp.exp(jlogE + beta0 + jX @ beta + b)), obs=jy)

    total = 0.0
    for _attempt in range(3):
        kernel = NUTS(model, target_accept_prob=target_accept)
        mcmc = MCMC(kernel, num_warmup=num_warmup, num_samples=num_samples, num_chains=num_chains,
                    chain_method="sequential", progress_bar=False)
        t0, c0 = time.perf_counter(), time.process_time()
        mcmc.run(jax.random.PRNGKey(seed), extra_fields=("diverging",))
        s = mcmc.get_samples(group_by_chain=True)
        jax.block_until_ready(s)
        secs = time.perf_counter() - t0
        cpu = time.process_time() - c0
        total += secs
        ess = {"beta0": float(effective_sample_size(np.asarray(s["beta0"]))),
               "sigma": float(effective_sample_size(np.asarray(s["sigma"]))),
               "phi": float(effective_sample_size(np.asarray(s["phi"])))}
        eb = np.asarray(effective_sample_size(np.asarray(s["beta"])))
        ess.update({f"beta{j + 1}": float(x) for j, x in enumerate(eb)})
        ebi = np.asarray(effective_sample_size(np.asarray(s["b"])))
        ess[f"b[{int(np.argmin(ebi))}]"] = float(ebi.min())
        worst = min(ess, key=ess.get)
        if ess[worst] >= 400:
            break
        num_warmup, num_samples = 2 * num_warmup, 2 * num_samples
    div = int(np.asarray(mcmc.get_extra_fields(group_by_chain=True)["diverging"]).sum())
    settings = (f"numpyro NUTS, {num_chains} chains run one after another on the CPU, {num_warmup} warm-up + "
                f"{num_samples} draws per chain, target_accept={target_accept}, float64, "
                f"{n_side}x{n_side} rook grid ({n} areas), 2 covariates, seed={seed}; JIT compile included")
    return {"seconds": secs, "cpu_seconds": cpu, "seconds_total": total, "ess_min": ess[worst], "ess_min_parameter": worst,
            "seconds_per_effective_draw": secs / ess[worst], "divergences": div, "settings": settings,
            "n_areas": n, "versions": f"numpyro {numpyro.__version__}, jax {jax.__version__}, "
                                      f"python {platform.python_version()}"}


if __name__ == "__main__":
    import argparse

    ap = argparse.ArgumentParser(description="Time numpyro NUTS on BYM2 with two covariates.")
    ap.add_argument("--n-side", type=int, default=30)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    os.environ.setdefault("JAX_PLATFORMS", "cpu")
    res = time_mcmc_bym2(args.n_side, args.seed)
    for k, v in res.items():
        print(f"{k}: {v}")
