"""The eight-schools posterior: ours against the draws arviz ships, and against the exact posterior.

Source: arviz.load_arviz_data("non_centered_eight"), the example posterior shipped with arviz
(4 chains x 500 draws by NUTS, no divergences). Its model, as given in arviz's documentation of
the example data:
    y_j ~ N(theta_j, sigma_j^2),  theta_j ~ N(mu, tau^2),  mu ~ Normal(0, 5),  tau ~ HalfCauchy(5),
with the data of Rubin (1981), "Estimation in parallel randomized experiments", J. Educational
Statistics 6(4), Table 2. The estimates y_j are taken from the dataset's observed_data. The
standard errors sigma_j are NOT in that dataset: its constant_data variable `scores` repeats y.
So sigma_j is typed from Rubin's table (from memory: 15, 10, 16, 11, 9, 11, 10, 18); the check
`test_arviz_draws_agree_with_the_exact_posterior` confirms them, since the arviz draws match the
exact posterior computed with these values.

Tolerances come from Monte Carlo error only:
  - ours vs arviz: |difference| < 4 sqrt(mcse_arviz^2 + mcse_ours^2), both MCSEs by az.mcse
    (method "mean", or "quantile" at the probability compared); a 4-sigma band on the difference
    of two independent estimates.
  - ours vs exact: |difference| < 4 mcse_ours. The exact values come from a 1-D integral over tau
    with theta and mu integrated out analytically; its grid error is checked to be below 1% of
    that tolerance by halving the grid.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize, stats

import pooling
from pooling._compat import az

# Source: Rubin (1981), Table 2: standard errors of the eight effect estimates (from memory).
SIGMA = np.array([15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0])
MU0, S0, TAU_SCALE = 0.0, 5.0, 5.0  # the arviz example's priors: mu ~ Normal(0, 5), tau ~ HalfCauchy(5)
PROBS = (0.1, 0.5, 0.9)


@pytest.fixture(scope="module")
def reference():
    return az.load_arviz_data("non_centered_eight")


@pytest.fixture(scope="module")
def y(reference):
    return np.asarray(reference.observed_data["obs"].values, dtype=float)


@pytest.fixture(scope="module")
def ours(reference, y):
    schools = [str(s) for s in reference.posterior["school"].values]
    est = pooling.from_estimates(pd.DataFrame({"school": schools, "y": y, "se": SIGMA}), "school", "y", "se")
    model = pooling.Model(
        within="known", between="normal", mu=pooling.Normal(MU0, S0), tau=pooling.HalfCauchy(TAU_SCALE)
    )
    # 4 x 10,000 draws: our MCSEs are then a third of arviz's, so the comparison with arviz is
    # limited by the reference draws and the comparison with the exact posterior is tight
    fit = pooling.fit(est, model, pooling.Settings(chains=4, draws=10_000, warmup=1_000, seed=8, max_draws=10_000))
    assert fit.targets_met, fit.misses[:3]
    return fit


# ---------------------------------------------------------------------------------------------
# the exact posterior


def log_marginal(tau, y):
    """log p(y | tau) + const with theta and mu integrated out, vectorised over tau.

    ybar | tau ~ N(m0 1, D + s0^2 11'), D = diag(sigma_j^2 + tau^2); by the Sherman-Morrison
    identity this is -1/2 [sum log d_j + log(1 + s0^2 sum 1/d_j) + sum r_j^2/d_j
    - s0^2 (sum r_j/d_j)^2 / (1 + s0^2 sum 1/d_j)], r = y - m0. Checked against
    scipy.stats.multivariate_normal in test_exact_integrand_matches_scipy.
    """
    d = SIGMA[None, :] ** 2 + np.asarray(tau)[:, None] ** 2
    r = y[None, :] - MU0
    a = np.sum(1.0 / d, axis=1)
    b = np.sum(r / d, axis=1)
    c = np.sum(r * r / d, axis=1)
    k = 1.0 + S0**2 * a
    return -0.5 * (np.sum(np.log(d), axis=1) + np.log(k) + c - S0**2 * b * b / k)


def mu_given_tau(tau, y):
    """mu | tau, y ~ N(m, V): 1/V = sum_j 1/(sigma_j^2 + tau^2) + 1/s0^2, m = V (sum_j y_j/(sigma_j^2 + tau^2) + m0/s0^2)."""
    d = SIGMA[None, :] ** 2 + np.asarray(tau)[:, None] ** 2
    prec = np.sum(1.0 / d, axis=1) + 1.0 / S0**2
    return (np.sum(y / d, axis=1) + MU0 / S0**2) / prec, 1.0 / prec


def exact_summaries(y, points=40_001, tau_max=150.0):
    """Exact posterior means and quantiles of tau, mu and theta_1 by the trapezoid rule over tau.

    p(tau | y) ∝ halfcauchy(tau; 5) p(y | tau) (BDA3 sec. 5.4, with the normal prior on mu);
    given tau, mu and theta are normal (BDA3 eqs. 5.17, 5.20), so their marginals are mixtures
    of normals over the tau grid. (BDA3: Gelman et al., Bayesian Data Analysis, 3rd ed.; section
    and equation numbers from memory.) The mass beyond tau_max is below 1e-6.
    """
    tau = np.linspace(0.0, tau_max, points)
    lp = log_marginal(tau, y) + stats.halfcauchy.logpdf(tau, scale=TAU_SCALE)
    w = np.exp(lp - lp.max())
    w /= integrate.trapezoid(w, tau)
    m, V = mu_given_tau(tau, y)
    # theta_1 | tau, y: mean B m + (1 - B) y_1, variance v tau^2 / (v + tau^2) + B^2 V, B = v / (v + tau^2)
    v1 = SIGMA[0] ** 2
    B = v1 / (v1 + tau**2)
    t_mean, t_var = B * m + (1 - B) * y[0], v1 * tau**2 / (v1 + tau**2) + B * B * V
    out = {
        "tau": {"mean": integrate.trapezoid(w * tau, tau)},
        "mu": {"mean": integrate.trapezoid(w * m, tau)},
        "theta1": {"mean": integrate.trapezoid(w * t_mean, tau)},
    }
    cdf_tau = integrate.cumulative_trapezoid(w, tau, initial=0.0)
    out["tail_mass"] = 1.0 - cdf_tau[-1]
    for p in PROBS:
        out["tau"][p] = float(np.interp(p, cdf_tau, tau))
        for name, loc, var in (("mu", m, V), ("theta1", t_mean, t_var)):

            def f(x):
                return integrate.trapezoid(w * stats.norm.cdf(x, loc, np.sqrt(var)), tau) - p  # noqa: B023 (called in this iteration)

            out[name][p] = optimize.brentq(f, -100.0, 100.0, xtol=1e-10)
    return out


@pytest.fixture(scope="module")
def exact(y):
    return exact_summaries(y)


def test_exact_integrand_matches_scipy(y):
    # the vectorised closed form against scipy.stats.multivariate_normal, up to the constant
    taus = np.array([0.0, 0.5, 3.0, 10.0, 60.0])
    ours = log_marginal(taus, y)
    ref = np.array(
        [stats.multivariate_normal.logpdf(y, np.full(8, MU0), np.diag(SIGMA**2 + t * t) + S0**2) for t in taus]
    )
    np.testing.assert_allclose(ours - ours[0], ref - ref[0], rtol=0, atol=1e-10)


def test_exact_grid_is_fine_enough(y, exact):
    coarse = exact_summaries(y, points=20_001)
    assert exact["tail_mass"] < 1e-6
    for name in ("tau", "mu", "theta1"):
        for key in ("mean",) + PROBS:
            # 1e-3 is below 1% of the smallest Monte Carlo tolerance used below (about 0.1)
            assert abs(coarse[name][key] - exact[name][key]) < 1e-3, (name, key)


def test_arviz_priors_are_the_stated_ones(reference):
    # the dataset's own prior draws against the priors we fit with (KS, reject at p < 1e-3)
    mu = reference.prior["mu"].values.ravel()
    tau = reference.prior["tau"].values.ravel()
    assert stats.kstest(mu, stats.norm(MU0, S0).cdf).pvalue > 1e-3
    assert stats.kstest(tau, stats.halfcauchy(scale=TAU_SCALE).cdf).pvalue > 1e-3
    assert stats.kstest(tau, stats.halfcauchy(scale=2 * TAU_SCALE).cdf).pvalue < 1e-3  # it can tell


def _mcse(idata_or_ds, name, key):
    if key == "mean":
        return float(az.mcse(idata_or_ds, var_names=[name], method="mean")[name])
    return float(az.mcse(idata_or_ds, var_names=[name], method="quantile", prob=key)[name])


def _estimate(x, key):
    return float(np.mean(x)) if key == "mean" else float(np.quantile(x, key))


@pytest.mark.parametrize("name", ["mu", "tau"])
@pytest.mark.parametrize("key", ("mean",) + PROBS)
def test_ours_agrees_with_arviz_draws(ours, reference, name, key):
    a = reference.posterior[name].values
    b = ours.idata.posterior[name].values
    diff = _estimate(b, key) - _estimate(a, key)
    tol = 4.0 * np.hypot(_mcse(reference.posterior, name, key), _mcse(ours.idata.posterior, name, key))
    assert abs(diff) < tol, (name, key, diff, tol)


@pytest.mark.parametrize("name", ["mu", "tau", "theta1"])
@pytest.mark.parametrize("key", ("mean",) + PROBS)
def test_ours_agrees_with_exact_posterior(ours, exact, name, key):
    post = ours.idata.posterior
    ds = post[["mu", "tau"]] if name != "theta1" else post["theta"].isel(group=0).to_dataset(name="theta1")
    x = ds[name].values
    tol = 4.0 * _mcse(ds, name, key)
    assert abs(_estimate(x, key) - exact[name][key]) < tol, (name, key, _estimate(x, key), exact[name][key], tol)


@pytest.mark.parametrize("name", ["mu", "tau"])
@pytest.mark.parametrize("key", ("mean",) + PROBS)
def test_arviz_draws_agree_with_the_exact_posterior(reference, exact, name, key):
    # confirms the model and the sigma_j typed above: NUTS draws of an independent program
    # land on our exact integral within their own Monte Carlo error
    x = reference.posterior[name].values
    tol = 4.0 * _mcse(reference.posterior, name, key)
    assert abs(_estimate(x, key) - exact[name][key]) < tol, (name, key, _estimate(x, key), exact[name][key], tol)
