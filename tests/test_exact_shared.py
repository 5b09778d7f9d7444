"""The `shared` structure against its exact posterior, computed by numerical integration.

Data. Source: the dyestuff experiment of Davies (1947), yield of dyestuff in grams of standard
colour from 5 preparations of each of 6 batches of an intermediate product, as tabled in Box and
Tiao (1973), "Bayesian Inference in Statistical Analysis", Table 5.1.1 (from memory). Our
copy of these numbers is checked below against the published analysis of variance (Box and Tiao sec. 5.1,
also from memory): a between-batch mean square of 11271.5 and a within mean square of 2451.25,
on 5 and 24 degrees of freedom; the analysis of variance itself is computed with statsmodels.

Exact posterior. With sigma shared, the data reach the model through ybar_j (n_j = 5) and the
within sum of squares W = sum_j M2_j:
    p(y | theta, sigma) ∝ sigma^-(N - J) exp(-W / (2 sigma^2)) prod_j N(ybar_j | theta_j, sigma^2 / n_j).
theta and mu are integrated out analytically (Gelman et al., Bayesian Data Analysis, 3rd ed.,
sec. 5.4, from memory): ybar_j | mu, tau, sigma ~
N(mu, d_j), d_j = sigma^2 / n_j + tau^2, and with a flat (or normal) prior on mu
    p(tau, sigma | y) ∝ p(tau) p(sigma) sigma^-(N - J) exp(-W / (2 sigma^2)) V^(1/2) prod_j d_j^(-1/2) exp(-Q / 2),
1/V = sum_j 1/d_j [+ 1/s0^2], m = V (sum_j ybar_j / d_j [+ m0 / s0^2]), Q = sum_j (ybar_j - m)^2 / d_j
[+ (m0 - m)^2 / s0^2]. This is tabulated on a 2-D grid over (log tau, log sigma). Given (tau, sigma),
mu ~ N(m, V) and theta_j ~ N(B_j m + (1 - B_j) ybar_j, v_j tau^2 / (v_j + tau^2) + B_j^2 V),
v_j = sigma^2 / n_j, B_j = v_j / (v_j + tau^2): so the marginals of mu and theta_j are mixtures of
normals over the grid.

Tolerance: |ours - exact| < 4 MCSE, with our MCSE by az.mcse (method "mean", or "quantile" at
the probability compared). The grid error is checked by repeating the integration on a grid with
half the points in each direction: the two differ by less than 5% of each tolerance, and as the
rule is of second order the error of the fine grid is about a third of that difference.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize, special, stats

import pooling
from pooling._compat import az

# Source: Davies (1947) via Box and Tiao (1973), Table 5.1.1 (from memory); grams of standard colour.
DYESTUFF = {
    "A": [1545, 1440, 1440, 1520, 1580],
    "B": [1540, 1555, 1490, 1560, 1495],
    "C": [1595, 1550, 1605, 1510, 1560],
    "D": [1445, 1440, 1595, 1465, 1545],
    "E": [1595, 1630, 1515, 1635, 1625],
    "F": [1520, 1455, 1450, 1480, 1445],
}
PROBS = (0.1, 0.5, 0.9)
CASES = {
    # the package defaults for `shared` (mu flat, tau flat, p(log sigma) flat), normal between-group distribution
    "defaults": pooling.Model(within="shared", between="normal"),
    # proper priors on mu and tau, so that their terms in the exact density are exercised too
    "proper": pooling.Model(
        within="shared", between="normal", mu=pooling.Normal(1500.0, 50.0), tau=pooling.HalfCauchy(25.0)
    ),
}


def frame() -> pd.DataFrame:
    rows = [(b, float(v)) for b, vals in DYESTUFF.items() for v in vals]
    return pd.DataFrame(rows, columns=["batch", "grams"])


def test_typed_data_match_published_anova():
    from statsmodels.formula.api import ols
    from statsmodels.stats.anova import anova_lm

    table = anova_lm(ols("grams ~ C(batch)", data=frame()).fit())
    ms_between, ms_within = table["mean_sq"].iloc[0], table["mean_sq"].iloc[1]
    # Source: Box and Tiao (1973) sec. 5.1, one-way analysis of the dyestuff data (from memory)
    assert list(table["df"]) == [5.0, 24.0]
    assert ms_between == pytest.approx(11271.5, abs=1e-6)
    assert ms_within == pytest.approx(2451.25, abs=1e-6)


# ---------------------------------------------------------------------------------------------
# the exact posterior on a grid


def _prior_terms(model, tau):
    if isinstance(model.tau, pooling.HalfCauchy):
        return stats.halfcauchy.logpdf(tau, scale=model.tau.scale)
    if isinstance(model.tau, pooling.HalfNormal):
        return stats.halfnorm.logpdf(tau, scale=model.tau.scale)
    return np.zeros_like(tau)


def exact_posterior(model, n_eta=2200, n_lam=700):
    """Means and quantiles of tau, sigma, mu, theta_A and theta_E under `model`, by a 2-D grid."""
    df = frame()
    g = df.groupby("batch", sort=True)["grams"]
    n = g.size().to_numpy(float)
    ybar = g.mean().to_numpy()
    W = float(((df["grams"] - g.transform("mean")) ** 2).sum())
    N, J = n.sum(), len(n)
    # log tau from 1e-6 to 1e5 grams (the posterior tail of tau under a flat prior falls as
    # tau^-5, so the mass beyond 1e5 is below 1e-12); sigma from 20 to 200 grams
    eta = np.linspace(np.log(1e-6), np.log(1e5), n_eta)
    lam = np.linspace(np.log(20.0), np.log(200.0), n_lam)
    tau = np.exp(eta)[:, None]
    sig = np.exp(lam)[None, :]
    sw = swy = swyy = 0.0
    logd = 0.0
    for j in range(J):
        d = sig**2 / n[j] + tau**2
        sw, swy, swyy, logd = sw + 1.0 / d, swy + ybar[j] / d, swyy + ybar[j] ** 2 / d, logd + np.log(d)
    if isinstance(model.mu, pooling.Normal):
        s0 = model.mu.scale
        sw, swy, swyy = sw + 1.0 / s0**2, swy + model.mu.loc / s0**2, swyy + model.mu.loc**2 / s0**2
    V = 1.0 / sw
    m = V * swy
    Q = swyy - sw * m * m
    # log density in (eta, lambda): the Jacobians tau and sigma turn p(tau) and p(sigma) ∝ 1/sigma
    # into densities in the logs, so p(log sigma) is flat and the "+ lam" cancels the 1/sigma
    lp = (
        _prior_terms(model, tau)
        + np.log(tau)
        - (N - J) * np.log(sig)
        - W / (2.0 * sig**2)
        + 0.5 * np.log(V)
        - 0.5 * logd
        - 0.5 * Q
    )
    w = np.exp(lp - lp.max())
    w /= w.sum()  # the grid is uniform in (eta, lambda): cell weights
    out = {}
    p_eta, p_lam = w.sum(axis=1), w.sum(axis=0)
    out["tail_mass"] = float(p_eta[-5:].sum() + p_lam[:5].sum() + p_lam[-5:].sum() + p_eta[:5].sum())

    def grid_quantiles(x, p_x):
        cdf = integrate.cumulative_trapezoid(p_x, x, initial=0.0)
        cdf /= cdf[-1]
        return {p: float(np.exp(np.interp(p, cdf, x))) for p in PROBS}

    out["tau"] = {"mean": float(np.sum(w * tau)), **grid_quantiles(eta, p_eta)}
    out["sigma"] = {"mean": float(np.sum(w * sig)), **grid_quantiles(lam, p_lam)}
    keep = w > 1e-13  # the 1.5 million cells below this carry less than 2e-7 of the mass in total
    comps = {"mu": (m, V)}
    for label, j in (("theta_A", 0), ("theta_E", 4)):
        v = sig**2 / n[j]
        B = v / (v + tau**2)
        comps[label] = (B * m + (1 - B) * ybar[j], v * tau**2 / (v + tau**2) + B * B * V)
    for name, (loc, var) in comps.items():
        wk, lk, sk = w[keep], np.broadcast_to(loc, w.shape)[keep], np.sqrt(np.broadcast_to(var, w.shape)[keep])
        out[name] = {"mean": float(np.sum(wk * lk) / wk.sum())}
        for p in PROBS:

            def f(x):
                return np.sum(wk * special.ndtr((x - lk) / sk)) / wk.sum() - p  # noqa: B023 (called in this iteration)

            out[name][p] = optimize.brentq(f, 1000.0, 2000.0, xtol=1e-9)
    return out


@pytest.fixture(scope="module", params=list(CASES))
def case(request):
    model = CASES[request.param]
    exact = exact_posterior(model)
    stats_ = pooling.from_frame(frame(), "batch", "grams")
    # 4 x 10,000 draws at a fixed seed, no extension, so that the MCSEs are small and fixed
    fit = pooling.fit(
        stats_, model, pooling.Settings(chains=4, draws=10_000, warmup=1_000, seed=1947, max_draws=10_000)
    )
    return request.param, model, exact, fit


NAMES = ("tau", "sigma", "mu", "theta_A", "theta_E")


def _draws(fit, name):
    post = fit.idata.posterior
    if name.startswith("theta_"):
        return post["theta"].sel(group=name[-1]).to_dataset(name=name)
    return post[[name]]


def _mcse(ds, name, key):
    if key == "mean":
        return float(az.mcse(ds, var_names=[name], method="mean")[name])
    return float(az.mcse(ds, var_names=[name], method="quantile", prob=key)[name])


def test_grid_is_fine_enough(case):
    label, model, exact, fit = case
    coarse = exact_posterior(model, n_eta=1100, n_lam=350)
    assert exact["tail_mass"] < 1e-8
    for name in NAMES:
        for key in ("mean",) + PROBS:
            tol = 4.0 * _mcse(_draws(fit, name), name, key)
            assert abs(coarse[name][key] - exact[name][key]) < 0.05 * tol, (label, name, key)


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("key", ("mean",) + PROBS)
def test_shared_posterior_matches_exact(case, name, key):
    label, model, exact, fit = case
    assert fit.targets_met, fit.misses[:3]
    ds = _draws(fit, name)
    x = ds[name].values
    est = float(np.mean(x)) if key == "mean" else float(np.quantile(x, key))
    tol = 4.0 * _mcse(ds, name, key)
    assert abs(est - exact[name][key]) < tol, (label, name, key, est, exact[name][key], tol)
