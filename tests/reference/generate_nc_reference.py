"""Generate the MCMC reference posteriors for the North Carolina county file (1974 SIDS deaths).

This script is NOT run by the test suite and CI does not need its dependencies. It needs a
general-purpose probabilistic-programming library (numpyro on JAX, CPU only) in a separate
environment, e.g.::

    python3 -m venv /work/refenv
    /work/refenv/bin/pip install numpyro jax jaxlib numpy scipy pandas libpysal geopandas pyogrio
    /work/refenv/bin/python tests/reference/generate_nc_reference.py            # all three models
    /work/refenv/bin/python tests/reference/generate_nc_reference.py --quick    # smoke run, writes nothing

It writes small CSV files next to itself (see README.md in this folder for the exact model,
the priors and the meaning of every column). The data are read from the copy of the county
file bundled inside the installed libpysal package (never downloaded).

Everything is deterministic: fixed PRNG seeds, double precision, one fixed set of settings.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import scipy
import scipy.linalg as sla
from scipy import stats

HERE = Path(__file__).resolve().parent

# ----------------------------------------------------------------------------- settings
SEED = 20261202
N_CHAINS = 4
N_WARMUP = 5_000
N_DRAWS = 25_000
TARGET_ACCEPT = 0.95
MAX_TREE_DEPTH = 10

# Priors (identical to the defaults of the project's CarPriors)
INTERCEPT_SD = 5.0          # beta0 ~ N(0, 5^2)
COEF_SD = 5.0               # covariate coefficient ~ N(0, 5^2) on the standardized scale
SIGMA_UPPER, SIGMA_TAIL = 1.0, 0.01   # P(sigma > 1) = 0.01
PHI_UPPER, PHI_TAIL = 0.5, 2.0 / 3.0  # P(phi < 0.5) = 2/3
SIGMA_RATE = -np.log(SIGMA_TAIL) / SIGMA_UPPER


# ----------------------------------------------------------------------------- data + graph
def load_nc():
    """County table in .shp record order; rook and queen contiguity built from the polygons themselves."""
    import geopandas as gpd
    import libpysal

    folder = Path(libpysal.__file__).parent / "examples" / "sids2"
    nc = gpd.read_file(folder / "sids2.shp")
    n = len(nc)

    def dense(w) -> np.ndarray:
        m = np.zeros((n, n))
        for i, nbrs in w.neighbors.items():
            m[i, list(nbrs)] = 1.0
        if not np.array_equal(m, m.T):
            raise RuntimeError("contiguity graph is not symmetric")
        return m

    # rook: polygons sharing a boundary segment; queen: sharing at least a point (libpysal, graphs only)
    W = dense(libpysal.weights.Rook.from_dataframe(nc, use_index=False, silence_warnings=True))
    Wq = dense(libpysal.weights.Queen.from_dataframe(nc, use_index=False, silence_warnings=True))

    from scipy.sparse.csgraph import connected_components

    n_comp, _ = connected_components(W, directed=False)
    n_comp_q, _ = connected_components(Wq, directed=False)
    graph_check = {
        "links_rook": int(W.sum() // 2),
        "links_queen": int(Wq.sum() // 2),
        "queen_only_pairs": [(nc["FIPS"][i], nc["FIPS"][j]) for i, j in zip(*np.nonzero(np.triu(W != Wq)))],
        "n_components": int(n_comp), "islands": nc["FIPS"][W.sum(1) == 0].tolist(),
        "n_components_queen": int(n_comp_q), "islands_queen": nc["FIPS"][Wq.sum(1) == 0].tolist(),
        "min_neighbours": int(W.sum(1).min()), "max_neighbours": int(W.sum(1).max()),
    }

    births = nc["BIR74"].to_numpy(float)
    y = nc["SID74"].to_numpy(float)
    E = births * y.sum() / births.sum()
    x = nc["NWBIR74"].to_numpy(float) / births
    x_std = (x - x.mean()) / x.std(ddof=0)
    return nc, {"rook": W, "queen": Wq}, y, E, x_std, graph_check


def scaling_and_eigen(W):
    """Sørbye–Rue scaling constant c and eigen-decomposition of R = D - W (connected graph)."""
    R = np.diag(W.sum(1)) - W
    lam, V = np.linalg.eigh(R)
    # one zero eigenvalue for a connected graph; drop it
    order = np.argsort(lam)
    lam, V = lam[order], V[:, order]
    if lam[1] < 1e-9:  # pragma: no cover - NC is connected
        raise RuntimeError("graph is not connected")
    lam_pos, V_pos = lam[1:], V[:, 1:]
    Rplus = (V_pos / lam_pos) @ V_pos.T            # Moore–Penrose inverse of R
    c = float(np.exp(np.mean(np.log(np.diag(Rplus)))))  # geometric mean of diag(R^+)
    # (cR)^+ = R^+ / c has diagonal with geometric mean 1.
    gamma = 1.0 / (c * lam_pos)                    # non-zero eigenvalues of (cR)^+
    return R, c, lam, V, gamma


def pc_phi_functions(gamma, u=PHI_UPPER, alpha=PHI_TAIL):
    """Exact PC prior for the BYM2 mixing parameter (Riebler et al. 2016), numpy version."""
    g1 = gamma - 1.0
    s1 = g1.sum()

    def kld(phi):
        phi = np.atleast_1d(phi)[:, None]
        return 0.5 * (phi[:, 0] * s1 - np.log(1.0 - phi + phi * gamma).sum(1))

    def dkld(phi):
        phi = np.atleast_1d(phi)[:, None]
        return 0.5 * (s1 - (g1 / (1.0 - phi + phi * gamma)).sum(1))

    def dist(phi):
        return np.sqrt(2.0 * kld(phi))

    theta = -np.log(1.0 - alpha) / dist(u)[0]

    def log_density(phi):
        d = dist(phi)
        dd = dkld(phi) / d
        return np.log(theta) - theta * d + np.log(np.abs(dd))

    return theta, log_density


# ----------------------------------------------------------------------------- models
def build_models(W, y, E, x_std):
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist

    n = len(y)
    R, c, lam, V, gamma = scaling_and_eigen(W)
    theta, _ = pc_phi_functions(gamma)

    # Orthonormal basis B of the sum-to-zero subspace (n x (n-1)) from a QR of [1, I]
    Qfull, _ = np.linalg.qr(np.column_stack([np.ones(n), np.eye(n)[:, : n - 1]]))
    B = Qfull[:, 1:n]
    assert np.allclose(B.T @ np.ones(n), 0.0, atol=1e-12)
    P = c * (B.T @ R @ B)                          # (n-1)x(n-1) proper precision of z
    L = np.linalg.cholesky(P)                      # P = L L^T
    # u* = B L^{-T} e, e ~ N(0, I): Cov(u*) = B P^{-1} B^T = (cR)^+ (sum-to-zero ICAR)
    M = B @ sla.solve_triangular(L.T, np.eye(n - 1), lower=False)
    assert np.allclose(M @ M.T, (V[:, 1:] / (c * lam[1:])) @ V[:, 1:].T, atol=1e-10)

    g = jnp.asarray(gamma)
    g1 = g - 1.0
    s1 = float(np.sum(gamma - 1.0))
    jM = jnp.asarray(M)
    jV1 = jnp.asarray(V[:, 1:])                    # eigenvectors of R orthogonal to the constant
    jlam1 = jnp.asarray(lam[1:])
    jy = jnp.asarray(y)
    jlogE = jnp.asarray(np.log(E))
    jx = jnp.asarray(x_std)

    def log_pc_phi(phi):
        kl = 0.5 * (phi * s1 - jnp.sum(jnp.log1p(phi * g1)))
        d = jnp.sqrt(2.0 * kl)
        dkl = 0.5 * (s1 - jnp.sum(g1 / (1.0 + phi * g1)))
        return jnp.log(theta) - theta * d + jnp.log(jnp.abs(dkl / d))

    def bym2(covariate: bool, likelihood: bool = True):
        def model():
            beta0 = numpyro.sample("beta0", dist.Normal(0.0, INTERCEPT_SD))
            sigma = numpyro.sample("sigma", dist.Exponential(SIGMA_RATE))
            # Uniform(0,1) base (sampled on the logit scale with its Jacobian) + exact PC log-density
            phi = numpyro.sample("phi", dist.Uniform(0.0, 1.0))
            numpyro.factor("phi_pc_prior", log_pc_phi(phi))
            e = numpyro.sample("e", dist.Normal(0.0, 1.0).expand([n - 1]))
            v = numpyro.sample("v", dist.Normal(0.0, 1.0).expand([n]))
            u = numpyro.deterministic("u", jM @ e) if not likelihood else jM @ e
            b = numpyro.deterministic("b", sigma * (jnp.sqrt(phi) * u + jnp.sqrt(1.0 - phi) * v))
            eta = jlogE + beta0 + b
            if covariate:
                beta1 = numpyro.sample("beta1", dist.Normal(0.0, COEF_SD))
                eta = eta + beta1 * jx
            if likelihood:
                numpyro.sample("y", dist.Poisson(jnp.exp(eta)), obs=jy)

        return model

    def leroux():
        # Same joint model as  beta0 ~ N(0, 5^2),  b ~ N(0, [tau((1-rho)I + rho R)]^-1),  written with
        # the eigenvectors of R: b = sigma * sum_k V_k e_k / sqrt(1 - rho + rho lam_k),  e ~ N(0, I).
        # The constant eigenvector (lam_0 = 0) gives b a common level bbar ~ N(0, s2), s2 = sigma^2/(n(1-rho)),
        # which only enters the likelihood through a = beta0 + bbar. Sampling a from its prior
        # N(0, 5^2 + s2) and beta0 | a from its exact conditional is the same joint distribution, and
        # removes the beta0-bbar funnel near rho = 1 that otherwise causes divergent transitions.
        beta0_var = INTERCEPT_SD ** 2
        sigma = numpyro.sample("sigma", dist.Exponential(SIGMA_RATE))
        rho = numpyro.sample("rho", dist.Uniform(0.0, 1.0))
        s2 = sigma ** 2 / (n * (1.0 - rho))
        a = numpyro.sample("level", dist.Normal(0.0, jnp.sqrt(beta0_var + s2)))
        eps = numpyro.sample("eps", dist.Normal(0.0, 1.0))
        beta0 = numpyro.deterministic(
            "beta0", a * beta0_var / (beta0_var + s2) + jnp.sqrt(beta0_var * s2 / (beta0_var + s2)) * eps)
        e = numpyro.sample("e", dist.Normal(0.0, 1.0).expand([n - 1]))
        b_rest = sigma * (jV1 @ (e / jnp.sqrt(1.0 - rho + rho * jlam1)))   # sums to zero
        b = numpyro.deterministic("b", b_rest + (a - beta0))
        numpyro.sample("y", dist.Poisson(jnp.exp(jlogE + a + b_rest)), obs=jy)

    consts = {"scaling_c": c, "phi_pc_theta": float(theta), "sigma_pc_rate": float(SIGMA_RATE),
              "n_areas": n, "n_links": int(W.sum() // 2)}
    return ({"bym2": bym2(False), "bym2_covariate": bym2(True), "leroux": leroux,
             "bym2_prior_only": bym2(False, likelihood=False)}, consts, gamma)


# ----------------------------------------------------------------------------- diagnostics
def _split(draws):
    """(chains, draws) -> (2*chains, draws//2) split chains (Vehtari et al. 2021)."""
    c, s = draws.shape
    h = s // 2
    return np.concatenate([draws[:, :h], draws[:, s - h:]], axis=0)


def _ess(draws):
    from numpyro.diagnostics import effective_sample_size

    if np.ptp(draws) == 0:
        return float("nan")
    return float(effective_sample_size(draws))


def _rhat(draws):
    from numpyro.diagnostics import gelman_rubin

    if np.ptp(draws) == 0:
        return float("nan")
    return float(gelman_rubin(draws))


def _rank_normal(x):
    r = stats.rankdata(x, method="average").reshape(x.shape)
    return stats.norm.ppf((r - 0.375) / (x.size + 0.25))


def diagnostics(draws):
    """Rank-normalized split R-hat, bulk ESS, tail ESS, plain ESS of the mean (Vehtari et al. 2021)."""
    sd = _split(np.asarray(draws, float))
    z = _rank_normal(sd)
    med = np.median(sd)
    zf = _rank_normal(np.abs(sd - med))
    rhat = max(_rhat(z), _rhat(zf))
    bulk = _ess(z)
    q05, q95 = np.quantile(sd, [0.05, 0.95])
    tail = min(_ess((sd <= q05).astype(float)), _ess((sd <= q95).astype(float)))
    ess_mean = _ess(sd)
    return {"rhat": rhat, "ess_bulk": bulk, "ess_tail": tail, "ess_mean": ess_mean}


def summarise(x):
    """mean, sd, 2.5/50/97.5 % quantiles over all draws (x: chains x draws [x k])."""
    flat = x.reshape(-1, *x.shape[2:])
    q = np.quantile(flat, [0.025, 0.5, 0.975], axis=0)
    return flat.mean(0), flat.std(0, ddof=1), q[0], q[1], q[2]


# ----------------------------------------------------------------------------- run
def run_model(name, model, *, n_warmup, n_draws, seed):
    import jax
    from numpyro.infer import MCMC, NUTS

    kernel = NUTS(model, target_accept_prob=TARGET_ACCEPT, max_tree_depth=MAX_TREE_DEPTH)
    chain_method = "parallel" if jax.local_device_count() >= N_CHAINS else "sequential"
    mcmc = MCMC(kernel, num_warmup=n_warmup, num_samples=n_draws, num_chains=N_CHAINS,
                chain_method=chain_method, progress_bar=False)
    t0 = time.perf_counter()
    mcmc.run(jax.random.PRNGKey(seed), extra_fields=("diverging", "num_steps"))
    secs = time.perf_counter() - t0
    s = {k: np.asarray(v) for k, v in mcmc.get_samples(group_by_chain=True).items()}
    extra = mcmc.get_extra_fields(group_by_chain=True)
    info = {"seconds": secs, "divergences": int(np.asarray(extra["diverging"]).sum()),
            "mean_leapfrog_steps": float(np.asarray(extra["num_steps"]).mean()),
            "chain_method": chain_method}
    print(f"[{name}] {secs:.1f} s, divergences={info['divergences']}, "
          f"mean leapfrog steps={info['mean_leapfrog_steps']:.1f}", flush=True)
    return s, info


def _area_table(nc, y, E, rr):
    mean, sd, q025, q50, q975 = summarise(rr)
    p = (rr > 1.0).reshape(-1, rr.shape[-1]).mean(0)
    return pd.DataFrame({
        "FIPS": nc["FIPS"].astype(str).to_numpy(), "name": nc["NAME"].to_numpy(),
        "observed": y.astype(int), "expected": E,
        "rr_mean": mean, "rr_sd": sd, "rr_q025": q025, "rr_q50": q50, "rr_q975": q975,
        "p_above_1": p,
    })


def area_mcse(rr):
    """Per-area diagnostics of RR_i and of the indicator RR_i > 1, with Monte Carlo standard errors."""
    k = rr.shape[-1]
    out = []
    for i in range(k):
        d = diagnostics(rr[..., i])
        ind = (rr[..., i] > 1.0).astype(float)
        p = ind.mean()
        ess_ind = _ess(_split(ind))
        mcse_p = np.sqrt(p * (1 - p) / ess_ind) if np.isfinite(ess_ind) else 0.0
        mcse_mean = rr[..., i].std(ddof=1) / np.sqrt(d["ess_mean"])
        out.append({**d, "mcse_mean_rel": mcse_mean / rr[..., i].mean(), "mcse_p_above_1": mcse_p})
    return pd.DataFrame(out)


def hyper_table(s, names):
    rows, diag = [], []
    for nm in names:
        mean, sd, q025, q50, q975 = summarise(s[nm])
        rows.append({"parameter": nm, "mean": float(mean), "sd": float(sd), "q025": float(q025),
                     "q50": float(q50), "q975": float(q975)})
        d = diagnostics(s[nm])
        d["mcse_mean"] = float(sd / np.sqrt(d["ess_mean"]))
        diag.append({"parameter": nm, **d})
    return pd.DataFrame(rows), pd.DataFrame(diag)


def prior_check(models, gamma, *, n_warmup=2000, n_draws=10000):
    """Sample the BYM2 model without the likelihood and compare with the priors it should reproduce."""
    from scipy.integrate import quad

    s, info = run_model("prior-only", models["bym2_prior_only"], n_warmup=n_warmup, n_draws=n_draws,
                        seed=SEED + 100)
    theta, logpc = pc_phi_functions(gamma)
    dens = lambda p: np.exp(logpc(np.array([p]))[0])  # noqa: E731
    total = quad(dens, 0.0, 1.0, limit=200)[0]
    phi = s["phi"].ravel()
    sigma = s["sigma"].ravel()
    grid = [0.1, 0.25, 0.5, 0.75, 0.9]
    ess_phi = diagnostics(s["phi"])["ess_bulk"]
    lines = [f"# Prior-only check of the BYM2 model code (graph rook; {N_CHAINS} chains x ({n_warmup} + {n_draws}),"
             f" divergences {info['divergences']}); bulk ESS of phi {ess_phi:.0f}",
             "# quantity: sampled vs exact (exact = normalised PC prior on phi, Exponential on sigma)"]
    for g in grid:
        exact = quad(dens, 0.0, g, limit=200)[0] / total
        se = np.sqrt(exact * (1 - exact) / _ess(_split((s["phi"] < g).astype(float))))
        lines.append(f"P(phi < {g}): {np.mean(phi < g):.4f} vs {exact:.4f} (MC s.e. about {se:.4f})")
    se_s = np.sqrt(SIGMA_TAIL * (1 - SIGMA_TAIL) / _ess(_split((s["sigma"] > 1).astype(float))))
    lines.append(f"P(sigma > 1): {np.mean(sigma > 1):.4f} vs {SIGMA_TAIL:.4f} (MC s.e. about {se_s:.4f})")
    lines.append(f"mean sigma: {sigma.mean():.4f} vs {1 / SIGMA_RATE:.4f}")
    var_u = s["u"].reshape(-1, s["u"].shape[-1]).var(0)
    lines.append(f"geometric mean of Var(u*_i): {np.exp(np.mean(np.log(var_u))):.4f} vs 1 (Sorbye-Rue scaling)")
    lines.append(f"max |sum_i u*_i| over draws: {np.abs(s['u'].sum(-1)).max():.2e} (sum-to-zero constraint)")
    return lines


def versions():
    import jax
    import jaxlib
    import libpysal
    import numpyro

    return {
        "python": platform.python_version(), "numpyro": numpyro.__version__, "jax": jax.__version__,
        "jaxlib": jaxlib.__version__, "numpy": np.__version__, "scipy": scipy.__version__,
        "pandas": pd.__version__, "libpysal": libpysal.__version__,
        "platform": platform.platform(), "machine": platform.machine(),
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="short chains, write nothing (smoke test)")
    ap.add_argument("--models", default="bym2,leroux,bym2_covariate")
    ap.add_argument("--graphs", default="rook,queen")
    ap.add_argument("--prior-check", action="store_true",
                    help="only sample BYM2 without data (rook graph) and write prior_check.txt")
    args = ap.parse_args(argv)

    # Four chains run side by side on the CPU; must be set before JAX is imported.
    os.environ.setdefault("XLA_FLAGS", "--xla_force_host_platform_device_count=4")
    os.environ.setdefault("JAX_PLATFORMS", "cpu")
    import jax
    import numpyro

    jax.config.update("jax_enable_x64", True)
    numpyro.enable_x64()
    numpyro.set_host_device_count(N_CHAINS)

    ver = versions()
    for k, v in ver.items():
        print(f"{k}: {v}")

    nc, graphs, y, E, x_std, gcheck = load_nc()
    print("graph check:", gcheck)

    if args.prior_check:
        models, _, gamma = build_models(graphs["rook"], y, E, x_std)
        lines = prior_check(models, gamma)
        print("\n".join(lines))
        (HERE / "prior_check.txt").write_text("\n".join(lines) + "\n")
        return 0

    n_warmup, n_draws = (500, 1000) if args.quick else (N_WARMUP, N_DRAWS)
    settings = (f"{N_CHAINS} chains x ({n_warmup} warm-up + {n_draws} draws), NUTS target_accept="
                f"{TARGET_ACCEPT}, max_tree_depth={MAX_TREE_DEPTH}, seed={SEED}+k, float64")
    print("settings:", settings)

    conv_lines = [f"# MCMC convergence report ({settings})",
                  f"# numpyro {ver['numpyro']}, jax {ver['jax']}, numpy {ver['numpy']}, python {ver['python']}",
                  "# R-hat: rank-normalized split R-hat (max of bulk and folded); ESS bulk/tail as in",
                  "# Vehtari, Gelman, Simpson, Carpenter & Buerkner (2021), Bayesian Analysis 16(2).",
                  "# MCSE(mean) = sd / sqrt(ESS of the draws); MCSE(P(RR>1)) = sqrt(p(1-p)/ESS of the indicator).",
                  "# graph 'rook' = rook contiguity of the polygons in sids2.shp (231 links);",
                  "# graph 'queen' = queen contiguity computed from sids2.shp (245 links).",
                  f"# graph check: {gcheck}",
                  ""]
    if not args.quick:
        with open(HERE / "versions.txt", "w") as fh:
            for k, v in ver.items():
                fh.write(f"{k}: {v}\n")
        # edge list of both graphs, so tests can rebuild exactly the graph each reference used
        Wg, Wq = graphs["rook"], graphs["queen"]
        i, j = np.nonzero(np.triu((Wg + Wq) > 0))
        fips = nc["FIPS"].astype(str).to_numpy()
        pd.DataFrame({"FIPS_a": fips[i], "FIPS_b": fips[j], "in_rook": Wg[i, j].astype(int),
                      "in_queen": Wq[i, j].astype(int)}).to_csv(HERE / "nc_graph_edges.csv", index=False)

    const_rows, prior_cols = [], {}
    hyper_names = {"bym2": ["beta0", "sigma", "phi"], "leroux": ["beta0", "sigma", "rho", "tau"],
                   "bym2_covariate": ["beta0", "beta1", "sigma", "phi"]}
    k = 0
    for gname in args.graphs.split(","):
        W = graphs[gname]
        models, consts, gamma = build_models(W, y, E, x_std)
        print(gname, "constants:", consts)
        # ---- exact PC prior on phi, on a grid, and its normalisation as a check
        theta, logpc = pc_phi_functions(gamma)
        grid = np.round(np.linspace(0.01, 0.99, 99), 2)
        from scipy.integrate import quad

        total = quad(lambda p: np.exp(logpc(np.array([p]))[0]), 0.0, 1.0, limit=200)[0]
        below = quad(lambda p: np.exp(logpc(np.array([p]))[0]), 0.0, PHI_UPPER, limit=200)[0]
        print(f"PC prior on phi: integral over (0,1) = {total:.6f}, P(phi < 0.5) = {below:.6f}")
        consts.update(pc_prior_integral_0_1=total, pc_prior_mass_below_0_5=below)
        const_rows += [{"graph": gname, "name": kk, "value": vv} for kk, vv in consts.items()]
        prior_cols[gname] = logpc(grid)
        prefix = "nc" if gname == "rook" else f"nc_{gname}"
        for name in args.models.split(","):
            s, info = run_model(f"{gname}/{name}", models[name], n_warmup=n_warmup, n_draws=n_draws,
                                seed=SEED + k)
            k += 1
            eta = s["beta0"][..., None] + s["b"]
            if "beta1" in s:
                eta = eta + s["beta1"][..., None] * x_std
            rr = np.exp(eta)
            table = _area_table(nc, y, E, rr)
            if name == "leroux":
                s["tau"] = s["sigma"] ** -2.0
            hyper, hdiag = hyper_table(s, hyper_names[name])
            adiag = area_mcse(rr)
            bdiag = pd.DataFrame([diagnostics(s["b"][..., i]) for i in range(s["b"].shape[-1])])
            conv_lines += [f"## graph {gname}, model {name}: {info['seconds']:.0f} s ({info['chain_method']} chains), "
                           f"divergent transitions after warm-up: {info['divergences']}, "
                           f"mean leapfrog steps per draw: {info['mean_leapfrog_steps']:.1f}",
                           hdiag.to_string(index=False, float_format=lambda v: f"{v:.4g}"),
                           f"worst over the {len(adiag)} b_i:  max R-hat {bdiag.rhat.max():.4f}, "
                           f"min bulk ESS {bdiag.ess_bulk.min():.0f}, min tail ESS {bdiag.ess_tail.min():.0f}",
                           f"worst over the {len(adiag)} RR_i: max R-hat {adiag.rhat.max():.4f}, "
                           f"min bulk ESS {adiag.ess_bulk.min():.0f}, min tail ESS {adiag.ess_tail.min():.0f}, "
                           f"max relative MCSE of the posterior mean {adiag.mcse_mean_rel.max():.5f}, "
                           f"max MCSE of P(RR>1) {adiag.mcse_p_above_1.max():.5f}",
                           "relative MCSE of hyperparameter means (MCSE/|mean|): "
                           + ", ".join(f"{r.parameter} {r.mcse_mean / abs(m):.5f}"
                                       for r, m in zip(hdiag.itertuples(), hyper["mean"])),
                           ""]
            print("\n".join(conv_lines[-6:]), flush=True)
            print(hyper.to_string(index=False))
            if not args.quick:
                table.to_csv(HERE / f"{prefix}_{name}_reference.csv", index=False, float_format="%.6g")
                hyper.to_csv(HERE / f"{prefix}_{name}_hyper.csv", index=False, float_format="%.6g")
                (HERE / "convergence.txt").write_text("\n".join(conv_lines) + "\n")
    if not args.quick:
        grid = np.round(np.linspace(0.01, 0.99, 99), 2)
        out = pd.DataFrame({"phi": grid})
        for gname, col in prior_cols.items():
            out["log_density" if gname == "rook" else f"log_density_{gname}"] = col
        out.to_csv(HERE / "nc_pc_phi_prior.csv", index=False, float_format="%.10g")
        pd.DataFrame(const_rows).to_csv(HERE / "nc_model_constants.csv", index=False, float_format="%.12g")
    return 0


if __name__ == "__main__":
    sys.exit(main())
