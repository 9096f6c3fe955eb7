"""Generate the MCMC reference posteriors of the space-time model on an invented 100-district region.

NOT run by the test suite; CI does not need its dependencies. It needs a general-purpose
probabilistic-programming library (numpyro on JAX, CPU only) in a separate environment::

    python3 -m venv /tmp/refvenv
    /tmp/refvenv/bin/pip install numpyro jax jaxlib numpy scipy pandas
    /tmp/refvenv/bin/python tests/reference/generate_spacetime_reference.py          # ~10 min on 2 shared cores
    /tmp/refvenv/bin/python tests/reference/generate_spacetime_reference.py --quick  # smoke run, writes nothing

Data (invented, written by this script with a fixed seed): a 10 x 10 lattice of districts
"d00".."d99" with rook links (own edge list, ``spacetime_graph_edges.csv``), 8 weeks, expected
counts uniform on (1, 6) per district-week, true log relative risks = a smooth spatial surface +
a linear weekly rise + independent noise (SD 0.15), and a 2 x 2 patch at three times the risk in
the newest week. Counts are Poisson (``spacetime_data.csv``).

Model (the same as areamap.fit_spacetime with trend="rw1" and default priors)::

    y_it ~ Poisson(E_it exp(eta_it)),  eta_it = b0 + b_i + g_t + d_it
    b0 ~ N(0, 5^2)
    b = sigma_s (sqrt(1 - phi) v + sqrt(phi) u*),  v ~ N(0, I),  u* scaled ICAR, sum-to-zero
    g = sigma_t g*,  g* scaled RW1 (Sorbye-Rue scaling), sum-to-zero
    d_it = sigma_d e_it,  e_it ~ N(0, 1)
    sigma_s, sigma_t, sigma_d ~ Exponential(4.60517)   (PC prior, P(sigma > 1) = 0.01)
    phi: PC prior with P(phi < 0.5) = 2/3 (exact, from the eigenvalues of the scaled ICAR)

Intrinsic fields are sampled as proper Gaussians on an orthonormal basis of the sum-to-zero
subspace (non-centred). Two runs: all 8 weeks ("full") and the newest week's counts left out
("forecast"); the second gives posterior-predictive draws of the newest week's counts.
"""

from __future__ import annotations

import argparse
import platform
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import scipy

HERE = Path(__file__).resolve().parent
SEED = 20261210
NR = 10
N_WEEKS = 8
N_CHAINS = 4
N_WARMUP = 1_000
N_DRAWS = 2_500
RATE = -np.log(0.01) / 1.0
PHI_UPPER, PHI_TAIL = 0.5, 2.0 / 3.0


def make_data():
    rng = np.random.default_rng(SEED)
    ids = [f"d{r}{c}" for r in range(NR) for c in range(NR)]
    edges = []
    for r in range(NR):
        for c in range(NR):
            if c + 1 < NR:
                edges.append((f"d{r}{c}", f"d{r}{c + 1}"))
            if r + 1 < NR:
                edges.append((f"d{r}{c}", f"d{r + 1}{c}"))
    rr_, cc_ = np.divmod(np.arange(NR * NR), NR)
    surface = 0.35 * np.sin(rr_ / 3.0) + 0.25 * np.cos(cc_ / 2.5)
    week = 0.04 * (np.arange(N_WEEKS) - (N_WEEKS - 1) / 2)
    eta = surface[:, None] + week[None, :] + rng.normal(0.0, 0.15, (NR * NR, N_WEEKS))
    patch = np.isin(np.arange(NR * NR), [44, 45, 54, 55])
    eta[patch, -1] += np.log(3.0)
    e = rng.uniform(1.0, 6.0, (NR * NR, N_WEEKS))
    y = rng.poisson(e * np.exp(eta))
    return ids, edges, y, e


def basis(k):
    """k x (k-1) orthonormal basis of the sum-to-zero subspace."""
    q, _ = np.linalg.qr(np.column_stack([np.ones(k), np.eye(k)[:, : k - 1]]))
    return q[:, 1:]


def scaled(r):
    ginv = np.linalg.pinv(r)
    c = float(np.exp(np.mean(np.log(np.diag(ginv)))))
    return r * c, c


def pc_phi(rs):
    gam = 1.0 / np.linalg.eigvalsh(rs)[1:]  # eigenvalues of (cR)^+, null one dropped

    def kld(phi):
        return 0.5 * (phi * np.sum(gam - 1.0) - np.sum(np.log1p(phi * (gam - 1.0))))

    theta = -np.log(1.0 - PHI_TAIL) / np.sqrt(2.0 * kld(PHI_UPPER))
    return gam, theta


def run(y, e, graph_r, n_draws, n_warmup, seed, missing_last):
    import jax
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist
    from numpyro.infer import MCMC, NUTS

    jax.config.update("jax_enable_x64", True)
    n, w = y.shape
    rs, c_s = scaled(graph_r)
    bs = basis(n)
    ls = np.linalg.cholesky(bs.T @ rs @ bs)
    a_s = jnp.asarray(bs @ np.linalg.inv(ls).T)  # u* = a_s z, z ~ N(0, I)
    d1 = np.diff(np.eye(w), axis=0)
    rt, c_t = scaled(d1.T @ d1)
    bt = basis(w)
    lt = np.linalg.cholesky(bt.T @ rt @ bt)
    a_t = jnp.asarray(bt @ np.linalg.inv(lt).T)
    gam, theta_pc = pc_phi(rs)
    gm1 = jnp.asarray(gam - 1.0)
    obs = np.ones((n, w), bool)
    if missing_last:
        obs[:, -1] = False
    yj = jnp.asarray(np.where(obs, y, 0))
    ej = jnp.asarray(e)
    mj = jnp.asarray(obs)

    def model():
        b0 = numpyro.sample("b0", dist.Normal(0.0, 5.0))
        s_s = numpyro.sample("sigma_district", dist.Exponential(RATE))
        s_t = numpyro.sample("sigma_trend", dist.Exponential(RATE))
        s_d = numpyro.sample("sigma_interaction", dist.Exponential(RATE))
        phi = numpyro.sample("phi", dist.Uniform(0.0, 1.0))
        k = 0.5 * (phi * jnp.sum(gm1) - jnp.sum(jnp.log1p(phi * gm1)))
        dk = 0.5 * (jnp.sum(gm1) - jnp.sum(gm1 / (1.0 + phi * gm1)))
        dd = jnp.sqrt(2.0 * k)
        numpyro.factor("phi_pc", jnp.log(theta_pc) - theta_pc * dd + jnp.log(jnp.abs(dk) / dd))
        zu = numpyro.sample("zu", dist.Normal(0.0, 1.0).expand([n - 1]).to_event(1))
        v = numpyro.sample("v", dist.Normal(0.0, 1.0).expand([n]).to_event(1))
        zt = numpyro.sample("zt", dist.Normal(0.0, 1.0).expand([w - 1]).to_event(1))
        eps = numpyro.sample("eps", dist.Normal(0.0, 1.0).expand([n, w]).to_event(2))
        b = s_s * (jnp.sqrt(1.0 - phi) * v + jnp.sqrt(phi) * (a_s @ zu))
        g = s_t * (a_t @ zt)
        eta = b0 + b[:, None] + g[None, :] + s_d * eps
        numpyro.deterministic("eta", eta)
        numpyro.deterministic("level", b)
        numpyro.deterministic("trend", b0 + g)
        with numpyro.handlers.mask(mask=mj):
            numpyro.sample("y", dist.Poisson(ej * jnp.exp(eta)), obs=yj)

    kernel = NUTS(model, target_accept_prob=0.9, max_tree_depth=10)
    mcmc = MCMC(kernel, num_warmup=n_warmup, num_samples=n_draws, num_chains=N_CHAINS,
                chain_method="sequential", progress_bar=False)
    t0 = time.time()
    mcmc.run(jax.random.PRNGKey(seed), extra_fields=("diverging",))
    secs = time.time() - t0
    samples = mcmc.get_samples(group_by_chain=True)
    div = int(np.sum(np.asarray(mcmc.get_extra_fields(group_by_chain=True)["diverging"])))
    return {k: np.asarray(v) for k, v in samples.items()}, secs, div, c_s, c_t, theta_pc


def ess_rhat(x):
    from numpyro.diagnostics import effective_sample_size, split_gelman_rubin

    return float(np.min(effective_sample_size(x))), float(np.max(split_gelman_rubin(x)))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    ids, edges, y, e = make_data()
    n = len(ids)
    adj = np.zeros((n, n))
    pos = {k: i for i, k in enumerate(ids)}
    for a, b in edges:
        adj[pos[a], pos[b]] = adj[pos[b], pos[a]] = 1.0
    r = np.diag(adj.sum(1)) - adj
    nd, nw = (200, 200) if args.quick else (N_DRAWS, N_WARMUP)
    log = []
    full, secs, div, c_s, c_t, th_pc = run(y, e, r, nd, nw, SEED, missing_last=False)
    eta = full["eta"].reshape(-1, n, N_WEEKS)
    rr = np.exp(eta[:, :, -1])
    e_rr, rh_rr = ess_rhat(np.exp(full["eta"][:, :, :, -1]))
    log.append(f"full: {secs:.0f} s, divergences {div}, min bulk ESS of current RR {e_rr:.0f}, "
               f"max R-hat {rh_rr:.4f}")
    lev = np.exp(full["level"].reshape(-1, n))
    tr = np.exp(full["trend"].reshape(-1, N_WEEKS))
    cur = pd.DataFrame({
        "district": ids, "observed": y[:, -1], "expected": e[:, -1],
        "rr_mean": rr.mean(0), "rr_sd": rr.std(0), "rr_q025": np.quantile(rr, 0.025, 0),
        "rr_q975": np.quantile(rr, 0.975, 0), "p_above_1": (rr > 1).mean(0),
        "level_mean": lev.mean(0), "level_q025": np.quantile(lev, 0.025, 0),
        "level_q975": np.quantile(lev, 0.975, 0),
    })
    allrr = np.exp(eta)
    weeks = pd.DataFrame({"week": np.arange(1, N_WEEKS + 1), "trend_mean": tr.mean(0),
                          "trend_q025": np.quantile(tr, 0.025, 0), "trend_q975": np.quantile(tr, 0.975, 0),
                          "rr_mean_district_d00": allrr[:, 0, :].mean(0)})
    hyp = {}
    for name in ("b0", "sigma_district", "phi", "sigma_trend", "sigma_interaction"):
        s = full[name].ravel()
        hyp[name] = {"mean": s.mean(), "sd": s.std(), "q025": np.quantile(s, 0.025), "q975": np.quantile(s, 0.975)}
        es, rh = ess_rhat(full[name])
        log.append(f"full {name}: ESS {es:.0f}, R-hat {rh:.4f}")
    # forecast run: newest week missing; posterior predictive of its counts
    fc, secs_f, div_f, *_ = run(y, e, r, nd, nw, SEED + 1, missing_last=True)
    eta_f = fc["eta"].reshape(-1, n, N_WEEKS)[:, :, -1]
    rng = np.random.default_rng(SEED + 2)
    yrep = rng.poisson(e[:, -1][None, :] * np.exp(eta_f))
    yo = y[:, -1][None, :]
    e_f, rh_f = ess_rhat(np.exp(fc["eta"][:, :, :, -1]))
    log.append(f"forecast: {secs_f:.0f} s, divergences {div_f}, min bulk ESS of newest-week RR {e_f:.0f}, "
               f"max R-hat {rh_f:.4f}")
    fct = pd.DataFrame({
        "district": ids, "observed": y[:, -1], "expected": e[:, -1],
        "forecast_mean": yrep.mean(0), "forecast_sd": yrep.std(0),
        "forecast_q025": np.quantile(yrep, 0.025, 0, method="inverted_cdf"),
        "forecast_q975": np.quantile(yrep, 0.975, 0, method="inverted_cdf"),
        "midp_upper": (yrep > yo).mean(0) + 0.5 * (yrep == yo).mean(0),
        "eta_mean": eta_f.mean(0), "eta_sd": eta_f.std(0),
    })
    if args.quick:
        print("\n".join(log))
        print(cur.head(), fct.head(), pd.DataFrame(hyp).T, sep="\n")
        return
    pd.DataFrame({"district_a": [a for a, _ in edges], "district_b": [b for _, b in edges]}).to_csv(
        HERE / "spacetime_graph_edges.csv", index=False)
    long = pd.DataFrame({"district": np.repeat(ids, N_WEEKS), "week": np.tile(np.arange(1, N_WEEKS + 1), n),
                         "observed": y.ravel(), "expected": np.round(e.ravel(), 6)})
    long.to_csv(HERE / "spacetime_data.csv", index=False)
    cur.to_csv(HERE / "spacetime_reference.csv", index=False, float_format="%.6g")
    weeks.to_csv(HERE / "spacetime_trend_reference.csv", index=False, float_format="%.6g")
    fct.to_csv(HERE / "spacetime_forecast_reference.csv", index=False, float_format="%.6g")
    pd.DataFrame(hyp).T.rename_axis("parameter").to_csv(HERE / "spacetime_hyper.csv", float_format="%.6g")
    import jax
    import numpyro

    log.append(f"settings: {N_CHAINS} chains x ({nw} warm-up + {nd} draws), NUTS target 0.9, seeds {SEED}, "
               f"{SEED + 1}; scaling c_district {c_s:.9g}, c_rw1 {c_t:.9g}, PC theta {th_pc:.9g}")
    log.append(f"versions: python {sys.version.split()[0]}, numpyro {numpyro.__version__}, jax {jax.__version__}, "
               f"numpy {np.__version__}, scipy {scipy.__version__}, pandas {pd.__version__}, {platform.platform()}")
    (HERE / "spacetime_convergence.txt").write_text("\n".join(log) + "\n")


if __name__ == "__main__":
    main()
