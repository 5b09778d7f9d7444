"""The kernel's collapsed (mu, beta) block against scipy.stats closed forms.

With group-level predictors block A (pooling.kernel.block_a_reg) draws log tau from p(tau | v, lambda, y) with
(mu, beta) integrated out, then (mu, beta) | tau jointly, then theta | mu, beta, tau. Each is checked here
against an independent reference:

* the density of log tau: with normal priors on mu and beta the data have the Gaussian marginal
  y ~ N(Z m0, D + Z S0 Z'), D = diag(v_j + tau^2 / lambda_j), so log p(eta | y) = eta + log p(tau) +
  scipy.stats.multivariate_normal.logpdf(y) + const; differences between values of eta must agree;
* the draws of (mu, beta) given tau: by the probability integral transform (Rosenblatt 1952), over full
  sweeps of the `known` structure (v fixed), each stored (mu, beta) given its stored tau (and lambda from the
  sweep before) is a fresh draw from N(m(tau), C(tau)), m and C computed here with numpy from
  C = (Z'WZ + S0^-1)^-1, m = C (Z'Wy + S0^-1 m0). U = chi2_q.cdf(d^2), d^2 the squared Mahalanobis distance from
  scipy.stats.multivariate_normal.logpdf, and U_k = Phi((x_k - m_k)/sqrt(C_kk)) are Uniform(0, 1): KS test;
* theta_j given its centre c_j = mu + x_j' beta and tau: N((c_j v_j + y_j t_j)/(v_j + t_j), v_j t_j/(v_j + t_j)),
  scipy.stats.norm, KS;
* the tail move given (theta, mu, beta, tau): df from the product of Student-t densities of z_j = (theta_j - c_j)
  / tau (scipy.stats.t), chi-square over the grid.

Each test rejects at p < 1e-3 with a fixed seed, and runs the same statistic against a plausible wrong form
(the GLS mean without the prior, the density without |P|^(-1/2), deviations about mu instead of c_j), which must
be rejected. Inputs: the BCG trials (tests/bcg_data.py), latitude and allocation as predictors, in the kernel's
internal units.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from bcg_data import frame
from kernel_helpers import start_state
from scipy import stats

import pooling
from pooling import kernel
from pooling.model import Category, Normal, Numeric, build

ALPHA = 1e-3


def _problem(between="normal", mu=None, effects=None, tau=None, alloc=True):
    """The BCG trials with latitude and allocation as predictors (three coefficients), or latitude alone (one)."""
    t = frame()
    stats_ = pooling.from_estimates(t, "trial", "yi", "sei", group_columns=["ablat", "alloc"])
    kw = {}
    if mu is not None:
        kw["mu"] = mu
    if effects is not None:
        kw["effects"] = effects
    if tau is not None:
        kw["tau"] = tau
    predictors = (Numeric("ablat"), Category("alloc")) if alloc else (Numeric("ablat"),)
    model = pooling.Model(within="known", between=between, predictors=predictors, **kw)
    return build(stats_, model)


def _priors(p):
    """The normal priors in internal units, converted here from the model's user-unit statement (not read from
    the kernel's Data): mu ~ N((loc - center)/scale, (s/scale)^2); beta_k ~ N(0, (s/to_user_k)^2)."""
    m = p.model
    k, c = p.scale, p.center
    q = p.design.p + 1
    m0, prec = np.zeros(q), np.zeros(q)
    if isinstance(m.mu, Normal):
        m0[0], prec[0] = (m.mu.loc - c) / k, (k / m.mu.scale) ** 2
    if isinstance(m.effects, Normal):
        for a, u in enumerate(p.design.to_user):
            m0[a + 1], prec[a + 1] = m.effects.loc / u, (u / m.effects.scale) ** 2
    return m0, prec


def _Z(p):
    return np.column_stack([np.ones(p.J), p.data.X])


@pytest.mark.parametrize(
    "tau_prior, alloc",
    [(None, True), ("half-normal", True), ("half-Cauchy", True), (None, False)],
    ids=["flat", "half-normal", "half-Cauchy", "latitude alone"],
)
def test_log_tau_density_with_predictors_is_the_gaussian_marginal(tau_prior, alloc):
    # Source: scipy.stats.multivariate_normal: y ~ N(Z m0, D + Z S0 Z') with both priors proper; times the prior
    # of tau (scipy.stats.halfnorm / halfcauchy, scale converted to internal units here) when one is given
    # (written for the mutant kernel.py:451 `1.5 * tau2 / ...` of the half-normal term, which a flat prior
    # cannot see). Latitude alone, the published model (one coefficient), was written for kernel.py:205
    # `q = p + 1 if p > 1 else 0`, which left no room for the Cholesky factor of P with one predictor.
    given = {None: None, "half-normal": pooling.HalfNormal(0.3), "half-Cauchy": pooling.HalfCauchy(0.3)}[tau_prior]
    p = _problem(mu=Normal(-0.7, 2.0), effects=Normal(0.0, 0.5), tau=given, alloc=alloc)
    tau_logpdf = (
        (lambda t: 0.0)
        if given is None
        else (
            lambda t: (stats.halfnorm if tau_prior == "half-normal" else stats.halfcauchy).logpdf(
                t, scale=0.3 / p.scale
            )
        )
    )
    d = p.data
    Z = _Z(p)
    m0, prec = _priors(p)
    S0 = np.diag(1.0 / prec)
    v = p.v_known
    g = np.random.default_rng(2)
    lam = g.gamma(2.0, 0.5, p.J)
    for heavy in (False, True):
        dd = d._replace(between=1 if heavy else 0)
        il = 1.0 / lam if heavy else np.empty(0)
        wk = kernel.make_work(dd)
        assert wk.chol.shape == (Z.shape[1] ** 2,)  # room for the factor of P, (p + 1)^2 (pooling.kernel.Work)
        # the point the sums are taken about: no effect
        mu_now, beta_now = 0.3, np.array([0.1, -0.2, 0.05])[: p.design.p]
        c = mu_now + p.data.X @ beta_now
        wk.resid[:] = p.ybar - c
        etas = np.array([-3.0, -1.2, 0.0, 0.8])
        ours, ref = [], []
        for eta in etas:
            ours.append(kernel.log_tau_density_reg(eta, dd, v, il, mu_now, beta_now, wk))
            t = math.exp(2 * eta) / (lam if heavy else 1.0)
            cov = np.diag(v + t) + Z @ S0 @ Z.T
            ref.append(eta + stats.multivariate_normal.logpdf(p.ybar, Z @ m0, cov) + tau_logpdf(math.exp(eta)))
        ours, ref = np.array(ours), np.array(ref)
        np.testing.assert_allclose(ours - ours[0], ref - ref[0], rtol=0, atol=1e-9)
        # a wrong form: the same without |P|^(-1/2) differs by far more than rounding
        wrong = []
        for eta in etas:
            tt = math.exp(2 * eta) / (lam if heavy else 1.0)
            P = Z.T @ (Z / (v + tt)[:, None]) + np.diag(prec)
            wrong.append(ref[len(wrong)] + 0.5 * np.linalg.slogdet(P)[1])
        wrong = np.array(wrong)
        assert np.max(np.abs((ours - ours[0]) - (wrong - wrong[0]))) > 1e-2


def _conditional(p, tau, lam, with_prior=True):
    """m(tau) and C(tau) of (mu, beta) | tau, lambda, y (internal units), by numpy."""
    Z = _Z(p)
    m0, prec = _priors(p) if with_prior else (np.zeros(Z.shape[1]), np.zeros(Z.shape[1]))
    w = 1.0 / (p.v_known + tau * tau / lam)
    P = Z.T @ (Z * w[:, None]) + np.diag(prec)
    C = np.linalg.inv(P)
    return C @ (Z.T @ (w * p.ybar) + prec * m0), C


def _ks(u):
    return stats.kstest(np.ravel(u), "uniform").pvalue


@pytest.mark.parametrize("between", ["normal", "heavy"])
def test_mu_beta_given_tau_is_the_gaussian_conditional(between):
    # Source: scipy.stats.multivariate_normal (Mahalanobis distance -> chi2) and scipy.stats.norm (each component)
    p = _problem(between=between, mu=Normal(-0.7, 0.3), effects=Normal(0.0, 0.02))
    d = p.data
    n = 6000
    out = kernel.empty_draws(d, n)
    st = start_state(p)
    st = st._replace(beta=np.zeros(p.design.p))
    wk = kernel.make_work(d)
    kernel.sweeps(np.random.default_rng(23), n, False, d, st, wk, out, 0)
    q = p.design.p + 1
    u_d2, u_comp, u_wrong = [], [], []
    for i in range(1, n):
        lam = out.lam[i - 1] if between == "heavy" else np.ones(p.J)  # lambda from the sweep before
        m, C = _conditional(p, out.tau[i], lam)
        x = np.concatenate([[out.mu[i]], out.beta[i]])
        mvn = stats.multivariate_normal(m, C)
        d2 = -2.0 * (mvn.logpdf(x) - mvn.logpdf(m))
        u_d2.append(stats.chi2.cdf(d2, q))
        u_comp.append(stats.norm.cdf((x - m) / np.sqrt(np.diag(C))))
        mw, Cw = _conditional(p, out.tau[i], lam, with_prior=False)  # the deliberate error: prior left out
        u_wrong.append(stats.norm.cdf((x - mw) / np.sqrt(np.diag(Cw))))
    assert _ks(u_d2) > ALPHA
    comp = np.array(u_comp)
    for k in range(q):
        assert _ks(comp[:, k]) > ALPHA, k
    assert min(_ks(np.array(u_wrong)[:, k]) for k in range(q)) < ALPHA


def test_mu_and_beta_given_tau_carry_their_correlation():
    # Source: scipy.stats.chi2: the squared Mahalanobis distance d^2 = (x - m)' C^-1 (x - m) of a draw x of
    # N(m, C) in q dimensions is chi-square with q degrees of freedom; m(tau) and C(tau) by numpy as above. With a
    # weak prior on the effects, mu (the reference level's centre) and the allocation contrasts are strongly
    # correlated given tau (checked below), which the tight prior of the test above hides. Written for kernel.py:660
    # `beta[a] += wk.shift[a + 1] - z[a + 1]`, which reversed the sign of that correlation (each margin right, the
    # joint wrong): the same statistic against C with its mu-beta covariances negated, that mutant's law, must be
    # rejected. KS at ALPHA with a fixed seed.
    p = _problem(mu=Normal(-0.7, 2.0), effects=Normal(0.0, 0.5))
    d = p.data
    n = 4000
    out = kernel.empty_draws(d, n)
    st = start_state(p)._replace(beta=np.zeros(p.design.p))
    kernel.sweeps(np.random.default_rng(31), n, False, d, st, kernel.make_work(d), out, 0)
    q = p.design.p + 1
    flip = np.ones((q, q))
    flip[0, 1:] = flip[1:, 0] = -1.0
    _, C_mid = _conditional(p, float(np.median(out.tau)), np.ones(p.J))
    corr = C_mid[0, 1:] / np.sqrt(C_mid[0, 0] * np.diag(C_mid)[1:])
    assert np.max(np.abs(corr)) > 0.5
    d2, d2_wrong = np.empty(n - 1), np.empty(n - 1)
    for i in range(1, n):
        m, C = _conditional(p, out.tau[i], np.ones(p.J))
        r = np.concatenate([[out.mu[i]], out.beta[i]]) - m
        d2[i - 1] = r @ np.linalg.solve(C, r)
        d2_wrong[i - 1] = r @ np.linalg.solve(C * flip, r)
    assert _ks(stats.chi2.cdf(d2, q)) > ALPHA
    assert _ks(stats.chi2.cdf(d2_wrong, q)) < ALPHA


def test_theta_given_its_centre_and_tau():
    # Source: scipy.stats.norm: theta_j | c_j, tau, y_j ~ N((c_j v_j + y_j t)/(v_j + t), v_j t/(v_j + t))
    p = _problem()
    d = p.data
    n = 3000
    out = kernel.empty_draws(d, n)
    st = start_state(p)._replace(beta=np.zeros(p.design.p))
    kernel.sweeps(np.random.default_rng(5), n, False, d, st, kernel.make_work(d), out, 0)
    v, y, X = p.v_known, p.ybar, p.data.X
    c = out.mu[:, None] + out.beta @ X.T
    t = out.tau[:, None] ** 2
    mean = (c * v + y * t) / (v + t)
    sd = np.sqrt(v * t / (v + t))
    assert _ks(stats.norm.cdf((out.theta - mean) / sd)) > ALPHA
    wrong = (out.mu[:, None] * v + y * t) / (v + t)  # the deliberate error: pulled toward mu, not c_j
    assert _ks(stats.norm.cdf((out.theta - wrong) / sd)) < ALPHA


def test_tail_move_takes_deviations_about_each_centre():
    # Source: scipy.stats.t: p(df_k | theta, mu, beta, tau) ∝ w_k prod_j t_df_k((theta_j - c_j) / tau) / tau
    p = _problem(between="heavy")
    d = p.data
    grid, weights = (np.asarray(x, dtype=float) for x in p.model.between.grid_and_weights())
    mu, beta, eta = -0.7, np.array([0.5, 0.8, -0.6]), math.log(0.3)  # internal units: centres far from mu
    c = mu + p.data.X @ beta
    theta = c + 0.3 * np.array([0.1, -0.4, 2.5, 0.3, -0.2, 0.0, 0.6, -0.9, 0.2, 1.1, -0.3, 0.4, -0.1])
    z = (theta - c) / math.exp(eta)

    def probs(zz):
        lp = np.array(
            [
                math.log(w) + (stats.norm.logpdf(zz).sum() if np.isinf(g) else stats.t(g).logpdf(zz).sum())
                for g, w in zip(grid, weights)
            ]
        )
        e = np.exp(lp - lp.max())
        return e / e.sum()

    st = start_state(p)._replace(beta=beta.copy())
    wk = kernel.make_work(d)
    rng = np.random.default_rng(31)
    draws = 20_000
    ks = np.empty(draws, dtype=int)
    for i in range(draws):
        st.theta[:] = theta
        st.scalars[kernel.MU], st.scalars[kernel.ETA] = mu, eta
        wk.centre[:] = c  # what block_a_reg leaves for the tail move
        kernel.tail_step(rng, d, st, wk)
        ks[i] = int(st.scalars[kernel.DF_IDX])
    counts = np.bincount(ks, minlength=len(grid)).astype(float)

    def chi2_p(pr):
        keep = pr * draws >= 5  # cells with expected count < 5 are pooled (common practice)
        e, o = pr[keep] * draws, counts[keep]
        if (~keep).any():
            e, o = np.append(e, pr[~keep].sum() * draws), np.append(o, counts[~keep].sum())
        return stats.chisquare(o, e * o.sum() / e.sum()).pvalue

    assert chi2_p(probs(z)) > ALPHA
    assert chi2_p(probs((theta - mu) / math.exp(eta))) < ALPHA  # the deliberate error: deviations about mu
