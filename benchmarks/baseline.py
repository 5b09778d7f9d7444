"""The hand-written baseline: a plain vectorised numpy Gibbs sampler, one conditional at a time.

This is the sampler a practitioner would write for the `separate` model (flat mu, flat tau,
p(s^2) ∝ 1/s^2, nu on a grid), each step a closed-form conditional drawn for all groups at once:

    theta_j | mu, tau, sigma_j^2 ~ N((mu/tau^2 + n_j ybar_j/sigma_j^2) / P_j, 1/P_j),  P_j = 1/tau^2 + n_j/sigma_j^2
    mu | theta, tau              ~ N(mean_j theta_j, tau^2 / J)
    tau^2 | theta, mu            = sum_j (theta_j - mu)^2 / chi2(J - 1)           (flat prior on tau)
    sigma_j^2 | theta_j, s^2, nu = (nu s^2 + M2_j + n_j (ybar_j - theta_j)^2) / chi2(nu + n_j)
    s^2 | sigma^2, nu            ~ Gamma(shape J nu / 2, rate nu / 2 sum_j 1/sigma_j^2)
    nu | sigma^2, s^2            ~ its discrete conditional on the grid

and, for the heavy-tailed between-group distribution (the engine's default), with lambda_j in the
conditionals of theta, mu and tau (variance tau^2/lambda_j) and two more steps:

    lambda_j | theta_j, mu, tau, df ~ Gamma((df + 1)/2, rate (df + (theta_j - mu)^2/tau^2)/2)
    df | lambda                     ~ its discrete conditional on the finite points of the default grid
                                      (a plain Gibbs step given lambda cannot reach the normal limit)

The engine instead draws (tau, mu, theta) as one block with theta and mu integrated out of the
tau update. When tau is small against the groups' standard errors, theta and tau are strongly
dependent and this baseline crawls; the benchmark measures by how much, as effective sample size
per second of sampling for tau, mu and the worst theta, on the same data, in a strong-shrinkage
case (tau = 0.3, standard errors near 1) and a weak one (tau = 3).

Targets: tau ESS/s of the engine at least 20x the baseline's in the strong case, and no worse
(ratio >= 1) in the weak case. Both samplers run 4 chains one after the other on one thread, from
the same starting values, with the same number of warm-up sweeps; the clock (thread CPU time)
covers the kept draws only. ESS is the bulk ESS of pooling.diagnostics, applied alike to both.
"""

from __future__ import annotations

import numpy as np
from common import KernelChain, cpu_now, invented_groups, load, problem_of
from scipy.special import gammaln

from pooling import diagnostics as dg
from pooling import kernel


def gibbs(problem, rng: np.random.Generator, warmup: int, draws: int, start: dict):
    """The one-at-a-time conditional Gibbs sampler above, on a Problem's internal-unit statistics.

    Returns (draws dict with mu, tau (draws,), theta (draws, J) as float32, seconds of the kept draws).
    """
    n, ybar, m2 = problem.n, problem.ybar, problem.m2
    grid, logprior = problem.nu_grid, problem.data.nu_logprior
    J = len(ybar)
    heavy = problem.heavy
    if heavy:
        fin = np.isfinite(problem.df_grid)
        dfg = problem.df_grid[fin]
        dflp = problem.data.df_logprior[fin]
        dh = 0.5 * dfg
        kd = len(dfg) // 2
    lam = np.ones(J)
    theta = start["theta"].copy()
    mu, tau2 = start["mu"], start["tau"] ** 2
    sigma2 = start["sigma2"].copy()
    s2 = start["s2"]
    k = start["nu_idx"]
    h = 0.5 * grid
    out_mu = np.empty(draws)
    out_tau = np.empty(draws)
    out_theta = np.empty((draws, J), dtype=np.float32)
    t0 = None
    for it in range(warmup + draws):
        if it == warmup:
            t0 = cpu_now()
        prec = lam / tau2 + n / sigma2
        theta = (mu * lam / tau2 + n * ybar / sigma2) / prec + rng.standard_normal(J) / np.sqrt(prec)
        sl = lam.sum()
        mu = (lam @ theta) / sl + np.sqrt(tau2 / sl) * rng.standard_normal()
        d = theta - mu
        tau2 = (lam @ (d * d)) / rng.chisquare(J - 1)
        if heavy:
            df = dfg[kd]
            lam = rng.standard_gamma(0.5 * (df + 1.0), J) / (0.5 * (df + d * d / tau2))
            lp = dflp + J * (dh * np.log(dh) - gammaln(dh)) + (dh - 1.0) * np.sum(np.log(lam)) - dh * lam.sum()
            p = np.exp(lp - lp.max())
            kd = min(int(np.searchsorted(np.cumsum(p), rng.random() * p.sum(), side="right")), len(dfg) - 1)
        nu = grid[k]
        r = ybar - theta
        sigma2 = (nu * s2 + m2 + n * r * r) / rng.chisquare(nu + n)
        inv_sum = np.sum(1.0 / sigma2)
        s2 = rng.standard_gamma(0.5 * J * nu) / (0.5 * nu * inv_sum)
        if len(grid) > 1:
            log_sum = np.sum(np.log(sigma2))
            lp = logprior + J * (h * np.log(h * s2) - gammaln(h)) - (h + 1.0) * log_sum - h * s2 * inv_sum
            p = np.exp(lp - lp.max())
            k = int(np.searchsorted(np.cumsum(p), rng.random() * p.sum(), side="right"))
            k = min(k, len(grid) - 1)
        if it >= warmup:
            i = it - warmup
            out_mu[i] = mu
            out_tau[i] = np.sqrt(tau2)
            out_theta[i] = theta
    return {"mu": out_mu, "tau": out_tau, "theta": out_theta}, cpu_now() - t0


def _start(problem, chain: int) -> dict:
    """Starting values shared by both samplers: chain-specific but deterministic."""
    g = np.random.default_rng(1000 + chain)
    pooled = float(np.sum(problem.m2) / max(np.sum(problem.n) - problem.J, 1.0))
    return {
        "theta": problem.ybar.copy(),
        "mu": float(np.mean(problem.ybar)) + 0.1 * g.normal(),
        "tau": float(np.std(problem.ybar)) * np.exp(0.3 * g.normal()),
        "sigma2": np.full(problem.J, pooled),
        "s2": pooled,
        "nu_idx": len(problem.nu_grid) // 2,
    }


def engine(problem, chain: int, warmup: int, draws: int):
    """The engine's kernel from the same starting values; returns (draws, seconds of the kept draws)."""
    st = _start(problem, chain)
    c = KernelChain.start(problem, seed=chain + 1)
    c.state[kernel.ETA] = np.log(st["tau"])
    c.state[kernel.MU] = st["mu"]
    c.state[kernel.S2] = st["s2"]
    c.state[kernel.NU_IDX] = st["nu_idx"]
    c.sigma2[:] = st["sigma2"]
    c.run(warmup // 2, adapt=True)
    c.state[kernel.JUMP_SUM] = c.state[kernel.JUMP_COUNT] = 0.0  # second window, as in bench_sweep
    c.run(warmup - warmup // 2, adapt=True)
    t0 = cpu_now()
    out = c.run(draws, store=True)
    return out, cpu_now() - t0


def _ess_per_second(samples: list[dict], seconds: float) -> dict:
    mu = np.stack([s["mu"] for s in samples])
    tau = np.stack([s["tau"] for s in samples])
    theta = np.stack([s["theta"] for s in samples]).astype(np.float64)
    ess_theta = dg.bulk_ess(theta)
    worst = int(np.argmin(ess_theta))
    res = {
        "ess_tau": float(dg.bulk_ess(tau)),
        "ess_mu": float(dg.bulk_ess(mu)),
        "ess_theta_worst": float(ess_theta[worst]),
        "worst_group": worst,
        "seconds": seconds,
        "draws": int(tau.size),
        "tau_mean": float(tau.mean()),
    }
    for key in ("tau", "mu", "theta_worst"):
        res[f"ess_per_s_{key}"] = res[f"ess_{key}"] / seconds
    return res


CASES = (("strong shrinkage", 0.3), ("weak shrinkage", 3.0))
MODELS = ("heavy", "normal")  # the default between-group distribution, and the normal one


def run(quick: bool = False) -> dict:
    J = 2000
    warmup = 400 if quick else 1000
    base_draws, eng_draws = (1500, 500) if quick else (5000, 1000)
    from pooling.model import Model

    rows = []
    for (name, tau), between in ((c, b) for c in CASES for b in MODELS):
        # sigma_j = 3 and n_j in 5..13: standard errors of the group means near 1
        problem = problem_of(invented_groups(J, tau=tau, sigma=3.0, n_lo=5, n_hi=13, seed=11), Model(between=between))
        eng, t_eng = zip(*(engine(problem, c, warmup, eng_draws) for c in range(4)))
        base, t_base = zip(
            *(gibbs(problem, np.random.default_rng(50 + c), warmup, base_draws, _start(problem, c)) for c in range(4))
        )
        e = _ess_per_second(list(eng), sum(t_eng))
        b = _ess_per_second(list(base), sum(t_base))
        ratio = {k: e[f"ess_per_s_{k}"] / b[f"ess_per_s_{k}"] for k in ("tau", "mu", "theta_worst")}
        need = 20.0 if tau < 1 else 1.0
        rows.append(
            {
                "case": f"{name}, {between}",
                "tau_true": tau,
                "J": J,
                "engine": e,
                "baseline": b,
                "ratio": ratio,
                "target_tau_ratio": need,
                "met": bool(ratio["tau"] >= need),
            }
        )
    return {"name": "baseline", "rows": rows, "load_1min": load()}


def table(res: dict) -> list[str]:
    out = [
        "engine vs hand-written numpy Gibbs baseline (ESS per second of sampling, J = 2,000, 4 chains, 1 thread)",
        f"  {'case':>24} {'sampler':>8} {'draws':>6} {'ESS tau':>8} {'ESS mu':>8} {'ESS th*':>8} {'sec':>6} "
        f"{'tau/s':>8} {'mu/s':>8} {'th*/s':>8}",
    ]
    for r in res["rows"]:
        for who in ("engine", "baseline"):
            x = r[who]
            out.append(
                f"  {r['case']:>24} {who:>8} {x['draws']:6d} {x['ess_tau']:8.0f} {x['ess_mu']:8.0f} "
                f"{x['ess_theta_worst']:8.0f} {x['seconds']:6.2f} {x['ess_per_s_tau']:8.0f} "
                f"{x['ess_per_s_mu']:8.0f} {x['ess_per_s_theta_worst']:8.0f}"
            )
        q = r["ratio"]
        out.append(
            f"  {'':>24} {'ratio':>8}  tau {q['tau']:.1f}x  mu {q['mu']:.1f}x  worst theta {q['theta_worst']:.1f}x"
            f"   target tau >= {r['target_tau_ratio']:g}x: {'met' if r['met'] else 'MISSED'}"
        )
    out.append("  (th* = the theta with the smallest bulk ESS)")
    return out


if __name__ == "__main__":
    import sys

    print("\n".join(table(run(quick="--quick" in sys.argv))))
