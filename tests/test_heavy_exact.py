"""The heavy-tailed between-group distribution against its exact posterior, by numerical integration.

Data: the eight schools (Rubin 1981, J. Educational Statistics 6(4), Table 2; estimates and standard
errors, from memory, as in test_eight_schools.py), the known structure, priors mu ~ N(0, 5^2) and
tau ~ half-Cauchy(5) (the priors of the eight-schools example that arviz ships), and a Student-t
between-group distribution with df fixed at 4 and at 1 (Cauchy): theta_j ~ t_df(mu, tau).

Exact posterior (an independent route: quadrature, not the sampler's algebra). With lambda_j ~
Gamma(df/2, rate df/2) the t is a scale mixture of normals, so

    p(y_j | mu, tau) = int N(y_j | mu, se_j^2 + tau^2 / lambda) Gamma(lambda | df/2, df/2) d lambda,

a smooth one-dimensional integral, taken by the trapezoid rule in s = log lambda (the integrand decays
like exp(s/2) and exp(-e^s) at the ends: the rule converges faster than any power of the step). Then
p(mu, tau | y) ∝ N(mu | 0, 25) halfCauchy(tau | 5) prod_j p(y_j | mu, tau) on a grid of (mu, tau),
trapezoid rule again. Given (mu, tau, lambda) theta_j is normal (the conjugate normal update), so its
posterior mean and CDF are mixtures over the same grids. scipy.stats gives the densities.

Tolerance: 4 Monte Carlo standard errors of our estimate (arviz's mcse for means and quantiles, from
4 chains x 10,000 draws at a fixed seed); the grids are checked to be fine enough (a coarser grid
moves no answer by more than 5% of that tolerance).
"""

from __future__ import annotations

import functools

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, special, stats

import pooling
from pooling._compat import az
from tests.kernel_helpers import SCHOOLS_SE, SCHOOLS_Y

MU0, S0, TAU_SCALE = 0.0, 5.0, 5.0
PROBS = (0.1, 0.5, 0.9)


TAU_MAX = 70.0


def grids(n_mu=161, n_tau=201, n_s=161):
    """mu uniform; tau = TAU_MAX u^2 with u uniform on [0, 1] (denser where tau's mass is); s = log lambda."""
    mu = np.linspace(-20.0, 30.0, n_mu)
    u = np.linspace(0.0, 1.0, n_tau)
    s = np.linspace(-36.0, 4.5, n_s)
    return mu, u, s


def _trapezoid(x):
    w = np.full(len(x), x[1] - x[0])
    w[[0, -1]] /= 2
    return w


def _lambda_weights(s, df):
    """Trapezoid weights in s = log lambda times the Gamma(df/2, rate df/2) density times the Jacobian lambda."""
    lam = np.exp(s)
    return lam, np.exp(stats.gamma.logpdf(lam, a=df / 2.0, scale=2.0 / df) + s) * _trapezoid(s)


def _quantiles(grid, dens, probs):
    """Quantiles of a density tabulated on a grid: its CDF by the cumulative trapezoid rule, inverted
    by linear interpolation (both O(h^2))."""
    from scipy.integrate import cumulative_trapezoid

    cdf = cumulative_trapezoid(dens, grid, initial=0.0)
    cdf /= cdf[-1]
    return [float(np.interp(q, cdf, grid)) for q in probs]


@functools.cache
def exact(df, n_mu=161, n_tau=201, n_s=161):
    """Posterior means and the PROBS quantiles of mu, tau and every theta_j, by quadrature."""
    mu, u, s = grids(n_mu, n_tau, n_s)
    tau = TAU_MAX * u * u
    jac = 2.0 * TAU_MAX * u  # d tau / d u
    lam, lw = _lambda_weights(s, df)
    J = len(SCHOOLS_Y)
    logpost = stats.norm.logpdf(mu, MU0, S0)[:, None] + stats.halfcauchy.logpdf(tau, scale=TAU_SCALE)[None, :]
    t = tau[:, None] ** 2 / lam[None, :]  # (tau, s): the prior variance of theta_j given lambda
    cond_mean = np.empty((J, len(mu), len(tau)))
    for j in range(J):
        V = SCHOOLS_SE[j] ** 2 + t  # marginal variance of y_j given (mu, tau, lambda)
        r = SCHOOLS_Y[j] - mu
        q = np.exp(-0.5 * r[:, None, None] ** 2 / V[None]) / np.sqrt(2 * np.pi * V[None]) * lw[None, None, :]
        L = q.sum(axis=2)
        logpost += np.log(L)
        # theta_j | y_j, mu, tau, lambda ~ N(mu + r t / V, se^2 t / V): the mean mixed over lambda
        cond_mean[j] = mu[:, None] + r[:, None] * (q * (t / V)[None]).sum(axis=2) / L
    post = np.exp(logpost - logpost.max()) * jac[None, :]  # a density in (mu, u)
    cell = post * _trapezoid(mu)[:, None] * _trapezoid(u)[None, :]
    cell /= cell.sum()
    out = {"edge_mass": float(cell[[0, -1], :].sum() + cell[:, -1].sum())}
    dens_mu = (post * _trapezoid(u)[None, :]).sum(axis=1)
    dens_u = (post * _trapezoid(mu)[:, None]).sum(axis=0)
    out["mu"] = {"mean": float((mu * dens_mu * _trapezoid(mu)).sum() / (dens_mu * _trapezoid(mu)).sum())}
    out["mu"].update(zip(PROBS, _quantiles(mu, dens_mu, PROBS)))
    out["tau"] = {"mean": float((tau * dens_u * _trapezoid(u)).sum() / (dens_u * _trapezoid(u)).sum())}
    out["tau"].update(zip(PROBS, [TAU_MAX * x * x for x in _quantiles(u, dens_u, PROBS)]))  # u is monotone in tau
    keep = cell > 1e-11 * cell.max()
    for j in range(J):
        out[f"theta{j}"] = {"mean": float((cell * cond_mean[j]).sum())}
        V = SCHOOLS_SE[j] ** 2 + t
        r = (SCHOOLS_Y[j] - mu)[:, None] * np.ones(len(tau))[None, :]
        iu, it = np.nonzero(keep)
        Vk = V[it]  # (cells, s)
        qk = np.exp(-0.5 * r[iu, it][:, None] ** 2 / Vk) / np.sqrt(2 * np.pi * Vk) * lw[None, :]
        wk = cell[iu, it][:, None] * qk / qk.sum(axis=1, keepdims=True)
        mk = mu[iu][:, None] + r[iu, it][:, None] * t[it] / Vk
        sk = np.sqrt(SCHOOLS_SE[j] ** 2 * t[it] / Vk)
        sk = np.maximum(sk, 1e-300)  # tau = 0: theta_j = mu exactly (a step in the CDF)

        def cdf(x, wk=wk, mk=mk, sk=sk):
            return float((wk * special.ndtr((x - mk) / sk)).sum()) / float(wk.sum())

        for pq in PROBS:
            out[f"theta{j}"][pq] = optimize.brentq(lambda x: cdf(x) - pq, -60.0, 80.0, xtol=1e-8)  # noqa: B023 (called here)
    return out


def _fit(df):
    est = pooling.from_estimates(
        pd.DataFrame({"school": list("ABCDEFGH"), "y": SCHOOLS_Y, "se": SCHOOLS_SE}), "school", "y", "se"
    )
    model = pooling.Model(
        within="known", between=f"heavy:{df:g}", mu=pooling.Normal(MU0, S0), tau=pooling.HalfCauchy(TAU_SCALE)
    )
    fit = pooling.fit(
        est, model, pooling.Settings(chains=4, draws=10_000, warmup=1_000, seed=1973, max_draws=10_000), progress=False
    )
    assert fit.targets_met, fit.misses[:3]
    return fit


@pytest.fixture(scope="module", params=[4.0, 1.0], ids=["df=4", "df=1"])
def case(request):
    df = request.param
    return df, exact(df), _fit(df)


def _draws(fit, name):
    if name.startswith("theta"):
        return fit.raw.theta[:, :, int(name[5:])] * fit.problem.scale + fit.problem.center
    x = getattr(fit.raw, name)
    return x * fit.problem.scale + (fit.problem.center if name == "mu" else 0.0)


def _mcse(x, key):
    if key == "mean":
        return float(np.ravel(az.mcse(x, method="mean"))[0])
    return float(np.ravel(az.mcse(x, method="quantile", prob=key))[0])


NAMES = ["mu", "tau"] + [f"theta{j}" for j in range(8)]


def test_exact_grid_is_fine_enough(case):
    df, ex, fit = case
    coarse = exact(df, n_mu=121, n_tau=151, n_s=121)
    assert ex["edge_mass"] < 1e-6
    for name in NAMES:
        x = _draws(fit, name)
        for key in ("mean",) + PROBS:
            # the rules converge like h^2, so the fine grid's own error is about 1.3 times this difference
            assert abs(coarse[name][key] - ex[name][key]) < 0.1 * 4 * _mcse(x, key), (df, name, key)


@pytest.mark.parametrize("name", NAMES)
def test_heavy_tailed_posterior_matches_quadrature(case, name):
    df, ex, fit = case
    x = _draws(fit, name)
    for key in ("mean",) + PROBS:
        est = float(x.mean()) if key == "mean" else float(np.quantile(x, key))
        tol = 4.0 * _mcse(x, key)
        assert abs(est - ex[name][key]) < tol, (df, name, key, est, ex[name][key], tol)


def test_the_two_tails_differ_where_they_should(case):
    # Not a reference check but a sanity one on the references themselves: a Cauchy between-group
    # distribution shrinks school A's large estimate (28) less than df = 4 does.
    df, ex, _ = case
    if df == 1.0:
        ex4 = exact(4.0, n_mu=121, n_tau=151, n_s=121)
        assert ex["theta0"]["mean"] > ex4["theta0"]["mean"]
