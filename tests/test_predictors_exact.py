"""Group-level predictors against outside references: a published meta-regression, statsmodels' REML and the
exact posterior by quadrature.

Data: the 13 BCG vaccine trials (tests/bcg_data.py; Colditz et al. 1994, as fitted by Viechtbauer 2010), the
log risk ratio y_j with its sampling variance v_j (the `known` structure), absolute latitude as a numeric
predictor and the allocation (random, alternate, systematic) as a categorical one.

1. The typed data reproduce the published REML figures: tau^2, coefficients and standard errors, QE, computed
   here with statsmodels (WLS for the generalised least squares at a given tau^2, its weighted residual sum of
   squares and (Z'WZ)^-1), maximising the restricted log-likelihood
       l_R(tau^2) = -1/2 [sum_j log(v_j + tau^2) + log |Z'WZ| + (y - Z b)' W (y - Z b)],  W = diag(1/(v_j + tau^2))
   with scipy.optimize.
2. The exact posterior with flat priors on mu, beta and tau and the normal between-group distribution:
   given tau, (mu, beta) is Gaussian with mean b(tau) (the GLS estimate) and covariance (Z'WZ)^-1, and
       p(tau | y) ∝ |Z'WZ|^(-1/2) prod_j (v_j + tau^2)^(-1/2) exp(-1/2 (y - Z b)' W (y - Z b)),
   which is exp(l_R) as a function of tau (a flat prior on tau): the posterior mode of tau is the REML
   estimate's square root, and E[beta | tau_REML, y] is the REML estimate (both checked). The marginal moments
   and quantiles are integrals over a fine grid of tau (trapezoid rule; grid error checked by halving).
3. Our sampler against the exact posterior: mean and quantiles of tau, mu, beta and theta_1, each within 4 Monte
   Carlo standard errors (arviz.mcse) of the exact value.
4. Our posterior means against statsmodels' REML: the Bayesian mean E[beta | y] = E[b(tau) | y] averages the
   GLS estimate over the posterior of tau, while REML plugs in one tau, so they differ by at most
   max |b(tau) - b(tau_REML)| over the central 99% of the posterior of tau (computed here). We assert our
   sampler's mean within that margin plus 4 MCSE of the REML estimate, and, for the published model (latitude
   alone), that the margin is below a quarter of the posterior sd (a property of these data: latitude's estimate
   barely moves with tau; with allocation added it moves more, 0.4 sd over that range). The posterior sd
   is larger than REML's standard error (it carries the uncertainty of tau), so the sds are not compared.
5. A heavy-tailed between-group distribution (Student-t with df = 4 fixed): the exact posterior of
   (mu, beta, tau) on a 3-D grid, each group's likelihood p(y_j | c_j, tau) = ∫ N(y_j; c_j, v_j + tau^2/lambda)
   Gamma(lambda; 2, rate 2) dlambda by the trapezoid rule in log lambda, and theta_1's mean through the same
   integral; our sampler within 4 MCSE.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from bcg_data import PUBLISHED, frame
from scipy import integrate, optimize, stats

import pooling
from pooling._compat import az
from pooling.model import Category, Numeric

PROBS = (0.1, 0.5, 0.9)


@pytest.fixture(scope="module")
def bcg():
    return frame()


def _stats(t):
    return pooling.from_estimates(t, "trial", "yi", "sei", group_columns=["ablat", "alloc"])


def reml(y, v, Z):
    """REML tau^2 and the GLS fit at it (statsmodels WLS), maximising l_R over tau^2 in [0, 10]."""

    def neg(t2):
        r = sm.WLS(y, Z, weights=1.0 / (v + t2)).fit()
        return 0.5 * (np.sum(np.log(v + t2)) - np.linalg.slogdet(r.normalized_cov_params)[1] + r.ssr)

    t2 = optimize.minimize_scalar(neg, bounds=(0.0, 10.0), method="bounded", options={"xatol": 1e-12}).x
    return t2, sm.WLS(y, Z, weights=1.0 / (v + t2)).fit()


def test_typed_data_reproduce_the_published_reml_fit(bcg):
    # Source: Viechtbauer (2010), JSS 36(3) (metafor's printout, from memory): REML meta-regression on latitude
    y, v = bcg.yi.to_numpy(), bcg.vi.to_numpy()
    t2, fit = reml(y, v, sm.add_constant(bcg.ablat.to_numpy(dtype=float)))
    # printed to 4 decimals; metafor's iterations stop when tau^2 moves by less than 1e-5 (its default threshold,
    # from memory), so the printed figure may be one unit of the last place from the exact maximum (0.07635)
    assert t2 == pytest.approx(PUBLISHED["tau2_latitude"], abs=1e-4)
    assert fit.params[0] == pytest.approx(PUBLISHED["intercept"], abs=5e-5)
    assert fit.params[1] == pytest.approx(PUBLISHED["slope"], abs=5e-5)
    se = np.sqrt(np.diag(fit.normalized_cov_params))  # metafor's se: (Z'WZ)^-1, no residual scale
    assert se[0] == pytest.approx(PUBLISHED["intercept_se"], abs=5e-5)
    assert se[1] == pytest.approx(PUBLISHED["slope_se"], abs=5e-5)
    qe = sm.WLS(y, sm.add_constant(bcg.ablat.to_numpy(dtype=float)), weights=1.0 / v).fit().ssr
    assert qe == pytest.approx(PUBLISHED["qe"], abs=5e-5)
    t2_none, fit_none = reml(y, v, np.ones((len(y), 1)))
    assert t2_none == pytest.approx(PUBLISHED["tau2_none"], abs=5e-5)
    assert fit_none.params[0] == pytest.approx(PUBLISHED["estimate_none"], abs=5e-5)
    # R^2 as metafor defines it: (tau^2 without - tau^2 with) / tau^2 without
    assert (t2_none - t2) / t2_none == pytest.approx(PUBLISHED["r2"], abs=5e-4)


# ---------------------------------------------------------------------------------------------
# the exact posterior, normal between-group distribution, flat priors


def design(t, with_alloc=False):
    """Z = [1, latitude - its mean (, allocation contrasts against 'random')], as the model centres it."""
    cols = [np.ones(len(t)), t.ablat.to_numpy(dtype=float) - t.ablat.mean()]
    if with_alloc:
        cols += [(t.alloc == "alternate").to_numpy(float), (t.alloc == "systematic").to_numpy(float)]
    return np.column_stack(cols)


def exact_posterior(y, v, Z, points=40_001, tau_max=8.0):
    """Moments and quantiles of tau, (mu, beta) and theta_1 from the closed form given tau, over a grid of tau."""
    tau = np.linspace(0.0, tau_max, points)
    w = 1.0 / (v[None, :] + tau[:, None] ** 2)
    P = np.einsum("tj,ja,jb->tab", w, Z, Z)
    g = np.einsum("tj,ja,j->ta", w, Z, y)
    b = np.linalg.solve(P, g[..., None])[..., 0]
    q = np.einsum("tj,j->t", w, y * y) - np.einsum("ta,ta->t", g, b)
    lp = -0.5 * np.linalg.slogdet(P)[1] - 0.5 * np.sum(np.log(v[None, :] + tau[:, None] ** 2), axis=1) - 0.5 * q
    dens = np.exp(lp - lp.max())
    dens /= integrate.trapezoid(dens, tau)
    cov = np.linalg.inv(P)
    cdf = integrate.cumulative_trapezoid(dens, tau, initial=0.0)
    out = {
        "tail_mass": float(dens[-1] * tau_max),
        "mode_tau": float(tau[np.argmax(dens)]),
        "tau_grid": tau,
        "b_of_tau": b,
        "cdf": cdf,
        "tau": {"mean": integrate.trapezoid(dens * tau, tau)},
    }
    for p in PROBS:
        out["tau"][p] = float(np.interp(p, cdf, tau))
    # theta_1 | tau, y: mean B c_1 + (1 - B) y_1, variance v_1 t / (v_1 + t) + B^2 z_1' cov z_1, B = v_1 / (v_1 + t)
    B = v[0] / (v[0] + tau**2)
    c1 = b @ Z[0]
    t_mean = B * c1 + (1 - B) * y[0]
    t_var = v[0] * tau**2 / (v[0] + tau**2) + B * B * np.einsum("a,tab,b->t", Z[0], cov, Z[0])
    names = ["mu"] + [f"beta{k}" for k in range(Z.shape[1] - 1)]
    comps = [(name, b[:, k], cov[:, k, k]) for k, name in enumerate(names)] + [("theta1", t_mean, t_var)]
    for name, loc, var in comps:
        out[name] = {
            "mean": integrate.trapezoid(dens * loc, tau),
            "sd": np.sqrt(integrate.trapezoid(dens * (var + loc**2), tau) - integrate.trapezoid(dens * loc, tau) ** 2),
        }
        sd = np.sqrt(var)
        lo, hi = float(np.min(loc - 12 * sd)), float(np.max(loc + 12 * sd))
        for p in PROBS:

            def cdf_minus(x, loc=loc, sd=sd, p=p):
                return integrate.trapezoid(dens * stats.norm.cdf(x, loc, sd), tau) - p

            out[name][p] = optimize.brentq(cdf_minus, lo, hi, xtol=1e-12)
    return out


@pytest.fixture(scope="module", params=[False, True], ids=["latitude", "latitude+allocation"])
def case(request, bcg):
    with_alloc = request.param
    y, v = bcg.yi.to_numpy(), bcg.vi.to_numpy()
    Z = design(bcg, with_alloc)
    preds = (Numeric("ablat"),) + ((Category("alloc", reference="random"),) if with_alloc else ())
    model = pooling.Model(within="known", between="normal", predictors=preds)
    # 4 x 10,000 draws: Monte Carlo errors of about 1% of a posterior sd
    fit = pooling.fit(
        _stats(bcg),
        model,
        pooling.Settings(chains=4, draws=10_000, warmup=1_000, seed=1994, max_draws=10_000),
        progress=False,
        without=False,
    )
    assert fit.targets_met, fit.misses[:3]
    return {"exact": exact_posterior(y, v, Z), "fit": fit, "y": y, "v": v, "Z": Z, "with_alloc": with_alloc}


def test_grid_is_fine_enough(case):
    ex = case["exact"]
    coarse = exact_posterior(case["y"], case["v"], case["Z"], points=20_001)
    assert ex["tail_mass"] < 1e-6
    for name in ("tau", "mu", "beta0", "theta1"):
        for key in ("mean",) + PROBS:
            # 1e-5 is below 1% of the smallest Monte Carlo tolerance used below (4 MCSE, about 4e-3 for beta0)
            assert abs(coarse[name][key] - ex[name][key]) < 1e-5, (name, key)


def test_posterior_mode_of_tau_is_the_reml_estimate(bcg, case):
    # exact relations (module notes, 2): the flat-prior posterior of tau is exp(l_R(tau^2)) as a function of tau
    ex = case["exact"]
    t2, fit = reml(case["y"], case["v"], case["Z"])
    step = ex["tau_grid"][1] - ex["tau_grid"][0]
    assert abs(ex["mode_tau"] - np.sqrt(t2)) <= step
    i = int(np.argmin(np.abs(ex["tau_grid"] - np.sqrt(t2))))
    np.testing.assert_allclose(ex["b_of_tau"][i], fit.params, atol=2e-4)  # b at the nearest grid point


def _draws(fit):
    post = fit.idata.posterior
    out = {"mu": post["mu"].values, "tau": post["tau"].values, "theta1": post["theta"].isel(group=0).values}
    for k in range(post["beta"].shape[-1]):
        out[f"beta{k}"] = post["beta"].values[..., k]
    return out


def _mcse(x, key):
    ds = az.convert_to_dataset(x[None] if x.ndim == 1 else x)
    name = next(iter(ds.data_vars))
    if key == "mean":
        return float(az.mcse(ds, method="mean")[name])
    return float(az.mcse(ds, method="quantile", prob=key)[name])


@pytest.mark.parametrize("key", ("mean",) + PROBS)
def test_sampler_agrees_with_the_exact_posterior(case, key):
    draws = _draws(case["fit"])
    ex = case["exact"]
    names = ["tau", "mu", "beta0", "theta1"] + (["beta1", "beta2"] if case["with_alloc"] else [])
    for name in names:
        x = draws[name]
        est = float(np.mean(x)) if key == "mean" else float(np.quantile(x, key))
        tol = 4.0 * _mcse(x, key)
        assert abs(est - ex[name][key]) < tol, (name, key, est, ex[name][key], tol)


def test_sampler_mean_agrees_with_reml_within_the_stated_margin(case):
    # module notes, 4: margin = spread of the GLS estimate b(tau) over the central 99% of the posterior of tau
    ex = case["exact"]
    _, fit = reml(case["y"], case["v"], case["Z"])
    tau = ex["tau_grid"]
    lo, hi = np.interp([0.005, 0.995], ex["cdf"], tau)
    inside = (tau >= lo) & (tau <= hi)
    draws = _draws(case["fit"])
    for k in range(case["Z"].shape[1] - 1):
        b_tau = ex["b_of_tau"][inside, k + 1]
        margin = float(np.max(np.abs(b_tau - fit.params[k + 1])))
        name = f"beta{k}"
        est = float(np.mean(draws[name]))
        assert abs(est - fit.params[k + 1]) < margin + 4 * _mcse(draws[name], "mean"), (name, est, fit.params[k + 1])
        if k == 0 and not case["with_alloc"]:  # the published model: the margin is small against the posterior sd
            assert margin < 0.25 * ex[name]["sd"], (margin, ex[name]["sd"])


def test_published_intercept_is_mu_shifted_to_latitude_zero(case):
    # mu is the centre at the mean latitude: the published intercept (latitude 0) is mu - slope * mean latitude,
    # for the REML plug-in; the posterior means satisfy the same linear relation exactly
    if case["with_alloc"]:
        pytest.skip("the published figures are for latitude alone")
    draws = _draws(case["fit"])
    mean_lat = float(frame().ablat.mean())
    at_zero = draws["mu"] - draws["beta0"] * mean_lat
    ex = case["exact"]
    exact_at_zero = ex["mu"]["mean"] - ex["beta0"]["mean"] * mean_lat
    assert abs(float(np.mean(at_zero)) - exact_at_zero) < 4 * _mcse(at_zero, "mean")


# ---------------------------------------------------------------------------------------------
# heavy tails: Student-t between-group distribution with df = 4, quadrature over lambda

DF = 4.0
LOG_LAM = np.linspace(np.log(1e-7), np.log(80.0), 120)  # trapezoid nodes in log lambda (240 changes nothing)


def _lambda_weights():
    """Trapezoid weights of ∫ f(lambda) Gamma(lambda; df/2, rate df/2) dlambda in log lambda (the Jacobian lambda
    included); the rule integrates the density itself to 1 within 1e-9."""
    lam = np.exp(LOG_LAM)
    step = LOG_LAM[1] - LOG_LAM[0]
    w = stats.gamma.pdf(lam, a=DF / 2, scale=2 / DF) * lam * step
    w[[0, -1]] *= 0.5
    return lam, w


def heavy_exact(y, v, Z, n_mu=61, n_b=61, n_tau=126):
    """Posterior means of mu, the slope, tau and theta_1 on a (mu, slope, tau) grid: flat priors on mu, the slope
    and tau; each group's likelihood integrated over its lambda. Grid ranges: +-9 sds of the normal model's
    posterior for mu and the slope (the t likelihood has longer tails), tau from 0 to 2.5 (checked to hold the
    mass)."""
    lam, lw = _lambda_weights()
    ex = exact_posterior(y, v, Z, points=4001)
    mus = np.linspace(ex["mu"]["mean"] - 9 * ex["mu"]["sd"], ex["mu"]["mean"] + 9 * ex["mu"]["sd"], n_mu)
    bs = np.linspace(ex["beta0"]["mean"] - 9 * ex["beta0"]["sd"], ex["beta0"]["mean"] + 9 * ex["beta0"]["sd"], n_b)
    taus = np.linspace(0.0, 2.5, n_tau)
    M, Bb = np.meshgrid(mus, bs, indexing="ij")
    logp = np.zeros((n_mu, n_b, n_tau))
    th1_num = np.zeros((n_mu, n_b, n_tau))
    for j in range(len(y)):
        c = M + Bb * Z[j, 1]
        for k, t in enumerate(taus):
            var = v[j] + (t * t) / lam  # (L,)
            dens = np.exp(-0.5 * (y[j] - c[..., None]) ** 2 / var) / np.sqrt(2 * np.pi * var)
            like = dens @ lw
            with np.errstate(divide="ignore"):  # at tau = 0 a far centre's likelihood underflows to 0
                logp[:, :, k] += np.log(like)
            if j == 0:  # E[theta_1 | c, tau, lambda, y_1] = (c v + y t/lambda) / (v + t/lambda), weighted by lambda
                tt = (t * t) / lam
                cm = (c[..., None] * v[j] + y[j] * tt) / (v[j] + tt)
                with np.errstate(invalid="ignore", divide="ignore"):
                    th1_num[:, :, k] = np.nan_to_num(((dens * cm) @ lw) / like)
    post = np.exp(logp - logp.max())
    total = post.sum()
    edge = (post[[0, -1]].sum() + post[:, [0, -1]].sum() + post[:, :, -1].sum()) / total
    return {
        "mu": float((post * M[..., None]).sum() / total),
        "beta0": float((post * Bb[..., None]).sum() / total),
        "tau": float((post * taus).sum() / total),
        "theta1": float((post * th1_num).sum() / total),
        "edge_mass": float(edge),
        "lambda_rule": float(lw.sum()),
    }


@pytest.fixture(scope="module")
def heavy(bcg):
    y, v = bcg.yi.to_numpy(), bcg.vi.to_numpy()
    Z = design(bcg)
    model = pooling.Model(within="known", between="heavy:4", predictors=(Numeric("ablat"),))
    fit = pooling.fit(
        _stats(bcg),
        model,
        pooling.Settings(chains=4, draws=10_000, warmup=1_000, seed=4, max_draws=10_000),
        progress=False,
        without=False,
    )
    assert fit.targets_met, fit.misses[:3]
    return {"exact": heavy_exact(y, v, Z), "fit": fit, "y": y, "v": v, "Z": Z}


def test_heavy_quadrature_is_fine_enough(heavy):
    ex = heavy["exact"]
    assert abs(ex["lambda_rule"] - 1.0) < 1e-9
    # the mass at the grid's edges is below 1e-5, so leaving out what lies beyond moves a mean by about 1e-5 of
    # the grid's span (18 posterior sds): under 1e-3 of an sd, against a tolerance of about 0.04 sd below
    assert ex["edge_mass"] < 1e-5
    coarse = heavy_exact(heavy["y"], heavy["v"], heavy["Z"], n_mu=45, n_b=45, n_tau=84)
    draws = _draws(heavy["fit"])
    for name in ("mu", "beta0", "tau", "theta1"):
        # the grid error (against a coarser grid) is below a tenth of the 4-MCSE tolerance of the next test
        tol = 4.0 * _mcse(draws[name], "mean")
        assert abs(coarse[name] - ex[name]) < 0.1 * tol, (name, coarse[name], ex[name], tol)


def test_heavy_sampler_agrees_with_the_quadrature(heavy):
    draws = _draws(heavy["fit"])
    for name in ("mu", "beta0", "tau", "theta1"):
        x = draws[name]
        tol = 4.0 * _mcse(x, "mean")
        est = float(np.mean(x))
        assert abs(est - heavy["exact"][name]) < tol, (name, est, heavy["exact"][name], tol)
