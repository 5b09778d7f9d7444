"""Mixing of tau under strong shrinkage: bulk ESS per draw at a fixed seed, not a time.

The simulation (invented, as a simulation must be; the regime is the one DESIGN.md describes):
J = 2000 groups, theta_j ~ N(1, 0.3^2), group estimates with standard errors near 1, so tau is
small against the sampling error of every group mean and the data shrink hard. In this regime
the one-at-a-time Gibbs sampler (theta | mu, tau; mu | theta, tau; tau | theta, mu) crawls,
because tau and the theta_j are strongly dependent; the blocked sweep draws log tau with theta
and mu integrated out, which removes that dependence.

Requirement (issue 2, section 6): bulk ESS of tau / total draws >= 0.2. ESS by arviz's
az.ess(method="bulk") (Vehtari et al. 2021, Bayesian Analysis 16(2)), an estimator outside this
project. With 4 x 1000 draws the ESS estimate itself scatters by roughly 10%; the measured ratios
at these seeds (0.53 for `known`, 0.31 for `shared`, 0.32 for `separate`) sit clear of 0.2.

To show that the problem is hard, i.e. that the test could fail, the plain conditional Gibbs
sampler is run on the same data with the same number of draws and must stay below 0.05 (it
measured 0.0015: 6 effective draws of tau out of 4000).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import pooling
from pooling._compat import az

J = 2000
TAU, MU = 0.3, 1.0
CHAINS, DRAWS, WARMUP = 4, 1000, 500


@pytest.fixture(scope="module")
def simulated():
    rng = np.random.default_rng(20240611)
    theta = MU + TAU * rng.standard_normal(J)
    se = rng.uniform(0.8, 1.2, J)
    y = theta + se * rng.standard_normal(J)
    labels = [f"g{j:04d}" for j in range(J)]
    # raw measurements for `shared` and `separate`: 3 to 5 per group with sigma = 2, so se_j = 2 / sqrt(n_j) is 0.9 to 1.15
    n = rng.integers(3, 6, J)
    rows = np.repeat(np.arange(J), n)
    values = theta[rows] + 2.0 * rng.standard_normal(rows.size)
    return {
        "known": pooling.from_estimates(pd.DataFrame({"g": labels, "y": y, "se": se}), "g", "y", "se"),
        "shared": pooling.from_frame(pd.DataFrame({"g": np.array(labels)[rows], "y": values}), "g", "y"),
        "y": y,
        "se": se,
    }


def ess_per_draw(tau_draws: np.ndarray) -> float:
    """Bulk ESS of tau (az.ess) over the total number of draws; tau_draws shaped (chain, draw)."""
    return float(az.ess(tau_draws, method="bulk")) / tau_draws.size


@pytest.mark.parametrize("within", ["known", "shared", "separate"])
def test_tau_ess_per_draw_under_strong_shrinkage(simulated, within):
    # each structure with its package defaults (separate: nu on the default grid, p(s^2) ∝ 1/s^2);
    # separate and shared fit the same raw measurements
    data = simulated["known" if within == "known" else "shared"]
    fit = pooling.fit(
        data,
        pooling.Model(within=within),
        pooling.Settings(chains=CHAINS, draws=DRAWS, warmup=WARMUP, seed=17, max_draws=DRAWS),
    )
    tau = fit.idata.posterior["tau"].values
    assert tau.shape == (CHAINS, DRAWS)
    # shrinkage is really strong here: the posterior of tau sits far below the standard errors
    assert np.median(tau) < 0.6
    ratio = ess_per_draw(tau)
    # Source: issue 2 sec. 6 sets the bar (ESS per draw >= 0.2); the ESS is arviz's bulk ESS
    assert ratio >= 0.2, ratio


def plain_gibbs(y, se, seed, chains=CHAINS, draws=DRAWS, warmup=WARMUP):
    """The one-at-a-time Gibbs sampler with flat priors on mu and tau (BDA3 sec. 11.6, from memory), vectorised over groups.

    theta_j | mu, tau ~ N((mu/tau^2 + y_j/se_j^2) / p_j, 1/p_j), p_j = 1/tau^2 + 1/se_j^2;
    mu | theta, tau ~ N(mean(theta), tau^2 / J);
    tau^2 | theta, mu ~ Inv-Gamma((J - 1)/2, sum_j (theta_j - mu)^2 / 2) (p(tau) ∝ 1).
    """
    rng = np.random.default_rng(seed)
    out = np.empty((chains, draws))
    v = se * se
    for c in range(chains):
        mu, tau2 = float(np.mean(y)), float(np.var(y))
        for it in range(warmup + draws):
            p = 1.0 / tau2 + 1.0 / v
            theta = (mu / tau2 + y / v) / p + rng.standard_normal(len(y)) / np.sqrt(p)
            mu = theta.mean() + np.sqrt(tau2 / len(y)) * rng.standard_normal()
            tau2 = 0.5 * np.sum((theta - mu) ** 2) / rng.standard_gamma(0.5 * (len(y) - 1))
            if it >= warmup:
                out[c, it - warmup] = np.sqrt(tau2)
    return out


def test_plain_gibbs_crawls_on_the_same_data(simulated):
    tau = plain_gibbs(simulated["y"], simulated["se"], seed=17)
    assert np.median(tau) < 0.6
    # Source: DESIGN.md reports about 70 effective draws of 18,000 for this sampler in this regime
    assert ess_per_draw(tau) < 0.05
