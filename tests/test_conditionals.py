"""Each conditional update of the kernel against its closed form in scipy.stats.

Direct draws, by the probability integral transform (PIT). theta, mu and the shared sigma^2 are
tested on full sweeps: within a sweep each is a fresh draw from a closed-form conditional whose
inputs are all in the kernel's output rows (theta at sweep t given mu_t, tau_t and v_{t-1}; mu_t
given tau_t and v_{t-1}; the shared sigma^2_t given theta_t). So U = F(draw | recorded inputs),
with F the scipy.stats CDF of the closed form, is Uniform(0, 1) given everything drawn before
it, and the U's of a run are independent (Rosenblatt 1952, Ann. Math. Statist. 23(3)): a
Kolmogorov-Smirnov test of all of them against Uniform(0, 1) tests the update exactly, with no
Markov-chain error. For `separate` a sweep also makes moves between the variance draws (a
collapsed move of nu before them and a common rescaling of s^2 and sigma^2 after), so the
variance block (pooling.kernel.block_b) is called directly, many times from one fixed state:
sigma_j^2 | theta, s^2, nu (i.i.d. draws, KS against one scipy.stats.invgamma per group),
s^2 | sigma^2, nu (PIT against scipy.stats.gamma), nu | sigma^2, s^2 (chi-square of the grid
counts against the summed exact probabilities, and a randomised PIT). The heavy-tailed between-group
distribution's move (pooling.kernel.tail_step) is called the same way: df | theta, mu, tau against the
product of scipy.stats.t densities, and lambda_j | theta_j, mu, tau, df against scipy.stats.gamma.

Every run goes through model.build, with priors stated in the user's units (the defaults where a
test says so, as the README states them); the references convert those priors to the kernel's units
themselves (tests/kernel_helpers.internal), so a wrong conversion or a wrong default in model.build
fails here too.

Markov moves, by their stationary distribution: the slice update of log tau (independent chains
of the `known` structure, where nothing feeds back into tau, started from exact draws of
p(tau | v, y) and moved 12 sweeps), the collapsed Metropolis move of nu (chains started from
exact draws of p(nu | s^2, theta, y), with the sigma_j^2 integrated out by scipy.integrate.quad)
and the common rescaling of (s^2, sigma^2) (chains started from exact draws of
p(s^2, sigma^2 | theta, nu, y)). After the moves the chains must still follow the target,
computed on a fine grid from independent formulas.

Significance: every test uses a fixed seed and rejects at p < 1e-3. Power: every test also runs
the same statistic against a deliberately wrong closed form (an error a developer could make)
and asserts that it IS rejected (p < 1e-3) -- so the test is shown to fail when the formula is
wrong. Besides that, we ran this file locally against mutated copies of pooling/kernel.py
(swapped in for pooling.kernel): theta's two weights swapped; nu + n_j - 1 degrees of freedom for
sigma_j^2; N - J for the shared sigma^2; the "+ a" dropped from the shape of s^2; lgamma(nu) for
lgamma(nu/2) in the nu weights; the normal prior on mu dropped (from mu's draw and from
p(tau | v, y)); the Jacobian "eta +" dropped from log p(log tau); a half-Cauchy term in tau
instead of tau^2; the lgamma(h + n_j/2) table dropped from the collapsed nu move; c^(-N/2) for
c^(-N/2 - 1) in the rescaling; the prior weight dropped from the rescaling's acceptance. Each
mutant failed the test aimed at it, and the unmodified kernel passes them all.

Book references: BDA3 is Gelman, Carlin, Stern, Dunson, Vehtari and Rubin, Bayesian Data
Analysis, 3rd ed. (2013); its section and equation numbers, and the other citations here, are
from memory.

Test inputs: the group statistics are only inputs to a conditional; the references are the
closed forms. We use the eight-schools estimates and standard errors (Rubin 1981, J. Educational
Statistics 6(4), Table 2; from memory, cross-checked in test_eight_schools.py) and an unbalanced
cut of the dyestuff batches (Davies 1947, as tabled in Box and Tiao 1973, Table 5.1.1; from
memory, cross-checked in test_exact_shared.py), in the kernel's internal units.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special, stats

from pooling import kernel
from pooling.model import ScaledInvChi2
from tests.kernel_helpers import (
    README_DEFAULT,
    SCHOOLS_SE,
    SCHOOLS_Y,
    Gamma,
    HalfCauchy,
    HalfNormal,
    Model,
    Normal,
    NuFixed,
    NuGrid,
    dyestuff_problem,
    internal,
    run,
    schools_problem,
    start_state,
)

ALPHA = 1e-3  # rejection level of every goodness-of-fit test in this file

# The old internal units of these tests were (yield - 1527.5) / 64 for the dyestuff and y / 16 for the
# schools; the priors below are the same priors stated in the user's units.
DYE_C, DYE_K = 1527.5, 64.0


def dye_model(**kw) -> Model:
    return Model(**kw)


def _ks_uniform(u):
    return stats.kstest(np.ravel(u), "uniform").pvalue


# ---------------------------------------------------------------------------------------------
# reference closed forms (scipy.stats parametrisations)


def _t2(out, lam_prev):
    """The prior variance of theta_j in each row: tau^2, or tau^2 / lambda_j (heavy tails, lambda of the row before)."""
    tau2 = out["tau"][1:, None] ** 2
    return tau2 if lam_prev is None else tau2 / lam_prev


def theta_pit(out, ybar, v_prev, swap=False, lam_prev=None):
    """theta_j | mu, tau, v ~ N(w_j, 1/p_j), p_j = 1/t_j + 1/v_j, w_j = (mu/t_j + ybar_j/v_j)/p_j, t_j = tau^2
    (or tau^2 / lambda_j for the heavy-tailed between-group distribution).

    Source: the posterior of a normal mean under a normal prior (precision-weighted average);
    Gelman et al., Bayesian Data Analysis 3rd ed. (BDA3), eq. (5.17). `swap` is the deliberate
    error of exchanging the two weights.
    """
    mu = out["mu"][1:, None]
    tau2 = _t2(out, lam_prev)
    p = 1.0 / tau2 + 1.0 / v_prev
    w = (mu / v_prev + ybar / tau2) / p if swap else (mu / tau2 + ybar / v_prev) / p
    return stats.norm.cdf(out["theta"][1:], loc=w, scale=np.sqrt(1.0 / p))


def mu_pit(out, ybar, v_prev, mu_prior, drop_tau=False, lam_prev=None):
    """mu | tau, v ~ N(m, V), 1/V = sum_j 1/(v_j + t_j) [+ 1/s0^2], m = V (sum_j ybar_j/(v_j + t_j) [+ m0/s0^2]),
    t_j = tau^2 (or tau^2 / lambda_j).

    Source: BDA3 eq. (5.20) (flat prior on mu), with a N(m0, s0^2) prior entering as one more
    observation. `drop_tau` is the deliberate error of leaving tau^2 out of the weights.
    """
    tau2 = _t2(out, lam_prev) * (0.0 if drop_tau else 1.0)
    prec = 1.0 / (v_prev + tau2)
    sp = prec.sum(axis=1)
    spy = (prec * ybar).sum(axis=1)
    if mu_prior[0] == 1:
        sp = sp + 1.0 / mu_prior[2] ** 2
        spy = spy + mu_prior[1] / mu_prior[2] ** 2
    return stats.norm.cdf(out["mu"][1:], loc=spy / sp, scale=np.sqrt(1.0 / sp))


def sigma2_law(n, ybar, m2, theta, s2, nu, df_shift=0.0):
    """sigma_j^2 | theta_j, s^2, nu ~ Inv-Gamma(a = (nu + n_j)/2, scale = (nu s^2 + M2_j + n_j (ybar_j - theta_j)^2)/2).

    This is Scaled-Inv-chi2(nu + n_j, ...) written as scipy.stats.invgamma. Source: BDA3 sec. 2.6
    (a normal variance with known mean under a scaled-inverse-chi-square prior); the
    scaled-inverse-chi-square to inverse-gamma identity is in BDA3 Appendix A. df_shift = -1 is
    the deliberate off-by-one error.
    """
    return stats.invgamma(a=(nu + n + df_shift) / 2.0, scale=(nu * s2 + m2 + n * (ybar - theta) ** 2) / 2.0)


def s2_pit(s2, sigma2, nu, s2_prior, drop_prior_shape=False):
    """s^2 | sigma^2, nu ~ Gamma(shape = J nu/2 + a, rate = nu/2 sum_j 1/sigma_j^2 + b).

    Source: the product of Scaled-Inv-chi2(nu, s^2) densities is, as a function of s^2,
    (s^2)^(J nu/2) exp(-s^2 nu/2 sum_j 1/sigma_j^2) (BDA3 Appendix A density), times the
    Gamma(a, b) prior (a = b = 0 for p(s^2) ∝ 1/s^2).
    """
    J = sigma2.shape[1]
    shape = J * nu / 2.0 + (0.0 if drop_prior_shape else s2_prior[0])
    rate = nu / 2.0 * np.sum(1.0 / sigma2, axis=1) + s2_prior[1]
    return stats.gamma.cdf(s2, a=shape, scale=1.0 / rate)


def nu_probs(sigma2, s2, nu_grid, nu_weights, wrong=False):
    """p(nu_k | sigma^2, s^2) ∝ w_k prod_j Scaled-Inv-chi2(sigma_j^2 | nu_k, s^2), row by row.

    Scaled-Inv-chi2(nu, s^2) is scipy.stats.invgamma(a = nu/2, scale = nu s^2/2) (BDA3 Appendix A).
    `wrong` uses a = nu (the deliberate error of taking nu for nu/2 in the shape).
    """
    logp = np.empty((len(s2), len(nu_grid)))
    for k, nu in enumerate(nu_grid):
        a = nu if wrong else nu / 2.0
        logp[:, k] = np.log(nu_weights[k]) + stats.invgamma.logpdf(sigma2, a=a, scale=nu * s2[:, None] / 2.0).sum(
            axis=1
        )
    logp -= logp.max(axis=1, keepdims=True)
    p = np.exp(logp)
    return p / p.sum(axis=1, keepdims=True)


def group_marginal(nu, s2, n_j, ss_j):
    """log of the integral over sigma^2 of (sigma^2)^(-n_j/2) exp(-SS_j / (2 sigma^2)) Scaled-Inv-chi2(sigma^2 | nu, s^2).

    By scipy.integrate.quad over log sigma^2 (an independent route, not the closed form), with
    Scaled-Inv-chi2(nu, s^2) = scipy.stats.invgamma(a = nu/2, scale = nu s^2/2).
    """

    def logf(u):
        x = np.exp(u)
        return stats.invgamma.logpdf(x, a=nu / 2.0, scale=nu * s2 / 2.0) - 0.5 * n_j * u - ss_j / (2.0 * x) + u

    grid = np.linspace(-30.0, 30.0, 6001)
    top = float(np.max(logf(grid)))
    u0 = float(grid[np.argmax(logf(grid))])
    val, _ = integrate.quad(
        lambda u: np.exp(logf(u) - top), u0 - 30.0, u0 + 30.0, points=[u0], limit=200, epsabs=0.0, epsrel=1e-10
    )
    return top + np.log(val)


def shared_pit(out, n, ybar, m2, df_shift=0.0, prior=(0.0, 0.0)):
    """sigma^2 | theta ~ Inv-Gamma(a = N/2 + nu0/2, scale = (sum_j M2_j + sum_j n_j (ybar_j - theta_j)^2)/2
    + nu0 s0^2 / 2), prior = (nu0, s0^2) in internal units ((0, 0): p(log sigma) flat).

    Source: BDA3 sec. 3.2 (normal variance with p(log sigma) flat: Scaled-Inv-chi2(N, SS/N)) and sec. 2.6 (with a
    Scaled-Inv-chi2(nu0, s0^2) prior: Scaled-Inv-chi2(nu0 + N, (nu0 s0^2 + SS) / (nu0 + N))).
    df_shift = -J is the deliberate error of using the residual degrees of freedom N - J.
    """
    theta = out["theta"]
    nu0, s02 = prior
    ss = m2.sum() + np.sum(n * (ybar - theta) ** 2, axis=1)
    return stats.invgamma.cdf(out["sigma"][:, 0] ** 2, a=(n.sum() + nu0 + df_shift) / 2.0, scale=(ss + nu0 * s02) / 2.0)


# ---------------------------------------------------------------------------------------------
# tests of the direct draws


N_SWEEPS = 20_000


SEP_GRID = np.array([1.0, 2.0, 4.0, 8.0, 16.0, 40.0])
SEP_WEIGHTS = np.array([1.0, 2.0, 3.0, 3.0, 2.0, 1.0]) / 12.0
THETA_SHIFT = np.array([0.1, -0.2, 0.05, 0.3, -0.1, 0.0])  # theta_j - ybar_j: so that the n_j d^2 term matters


def run_block_a(model, *, draws, seed, lam=None):
    """Call kernel.block_a and then kernel.pair_step `draws` times for `separate`, each time from the same variances
    sigma_j^2 (the pooled within-group variance times unequal factors; the cut has groups of one) and, for heavy
    tails, the same lambda_j, and record tau, mu and theta of every call with the sigma_j^2 that theta was drawn
    given. Block A draws (tau, mu) given the variances with theta integrated out; pair_step then moves each small
    group's sigma_j^2 (its own test is below) and draws theta_j given the sigma_j^2 it kept. In a sweep other
    moves follow, so the two are tested on their own, as block B is. Rows carry a leading copy of the first, so
    that theta_pit and mu_pit (which read rows 1:) see every call."""
    p = dyestuff_problem(model)
    d = p.data
    sigma2 = float(p.m2.sum() / (p.n - 1.0).sum()) * SIGMA_FACTORS
    rng = np.random.default_rng(seed)
    st = start_state(p)
    wk = kernel.make_work(d)
    out = {k: np.empty((draws + 1,) + shape) for k, shape in (("tau", ()), ("mu", ()), ("theta", (p.J,)))}
    v_theta = np.empty((draws, p.J))
    for i in range(draws):
        st.sigma2[:] = sigma2
        kernel.fill_v(d, st.scalars, st.sigma2, wk.v)
        if lam is not None:
            wk.inv_lam[:] = 1.0 / lam
        kernel.block_a(rng, False, d, st, wk)
        kernel.pair_step(rng, d, st, wk)
        out["tau"][i + 1] = np.exp(st.scalars[kernel.ETA])
        out["mu"][i + 1] = st.scalars[kernel.MU]
        out["theta"][i + 1] = st.theta
        v_theta[i] = st.sigma2 / p.n
    for k in out:
        out[k][0] = out[k][1]
    v = np.broadcast_to(sigma2 / p.n, (draws, p.J))
    assert not np.array_equal(v_theta, v)  # the small groups' sigma_j^2 did move before theta was drawn
    return dict(out=out, n=p.n, ybar=p.ybar, v=v, v_theta=v_theta, p=p)


SIGMA_FACTORS = np.array([0.5, 1.0, 2.0, 1.5, 0.8, 3.0])
LAM_FIXED = np.array([1.0, 0.3, 2.0, 0.1, 1.0, 0.7])  # some small weights: the heavy-tailed prior variance matters


@pytest.fixture(scope="module")
def separate_grid_run():
    """Block A with the model of a full run: separate, nu on a grid with unequal weights, gamma s^2 prior, normal
    mu, half-Cauchy tau, the normal between-group distribution."""
    model = Model(
        within="separate",
        between="normal",
        mu=Normal(DYE_C + 0.3 * DYE_K, 0.4 * DYE_K),
        tau=HalfCauchy(0.5 * DYE_K),
        s2=Gamma(2.0, 1.5 / DYE_K**2),
        nu=NuGrid(tuple(SEP_GRID), tuple(SEP_WEIGHTS)),
    )
    r = run_block_a(model, draws=N_SWEEPS, seed=20240611)
    return dict(r, mu_prior=internal(r["p"], model)["mu"], lam=None)


@pytest.fixture(scope="module")
def separate_fixed_run():
    """Block A through the defaults (README: heavy tails with df learned, flat mu, flat tau, p(s^2) ∝ 1/s^2), nu
    fixed at 3, with fixed lambda_j."""
    model = Model(nu=NuFixed(3.0))
    r = run_block_a(model, draws=N_SWEEPS, seed=20261203, lam=LAM_FIXED)  # a new stream with the pair move
    assert r["p"].heavy and internal(r["p"], model)["mu"] == (0, 0.0, 1.0)
    return dict(r, mu_prior=(0, 0.0, 1.0), lam=np.broadcast_to(LAM_FIXED, (N_SWEEPS, r["p"].J)))


@pytest.mark.parametrize("which", ["separate_grid_run", "separate_fixed_run"])
def test_theta_and_mu_given_separate_variances(which, request):
    # mu of each call is drawn given the variances and (heavy tails) the lambda_j held fixed and the tau the same
    # call drew; theta given that mu and tau and the sigma_j^2 pair_step kept
    r = request.getfixturevalue(which)
    out, v, v_theta, lam = r["out"], r["v"], r["v_theta"], r["lam"]
    u = theta_pit(out, r["ybar"], v_theta, lam_prev=lam)
    assert _ks_uniform(u) > ALPHA
    for j in range(u.shape[1]):  # per group too: an error in one group's index would hide in the pool
        assert _ks_uniform(u[:, j]) > ALPHA / u.shape[1], j
    assert _ks_uniform(theta_pit(out, r["ybar"], v_theta, swap=True, lam_prev=lam)) < ALPHA
    assert _ks_uniform(theta_pit(out, r["ybar"], v, lam_prev=lam)) < ALPHA  # theta given the sigma_j^2 kept, not before
    assert _ks_uniform(mu_pit(out, r["ybar"], v, r["mu_prior"], lam_prev=lam)) > ALPHA
    assert _ks_uniform(mu_pit(out, r["ybar"], v, r["mu_prior"], drop_tau=True, lam_prev=lam)) < ALPHA
    if lam is not None:  # heavy tails: leaving the lambda_j out of theta's prior variance is caught where they
        # matter, in the groups whose lambda_j is small
        small = lam < 0.5
        assert small.sum() > 500
        assert _ks_uniform(u[small]) > ALPHA
        assert _ks_uniform(theta_pit(out, r["ybar"], v_theta)[small]) < ALPHA


def pair_target(a, b, n, r, t):
    """p(sigma^2) ∝ (sigma^2)^(-(a/2 + 1)) exp(-b / (2 sigma^2)) N(r | 0, t + sigma^2 / n) on a grid of log sigma^2,
    as (grid of sigma^2, CDF): the distribution of sigma_j^2 with theta_j integrated out (a = nu + n_j - 1,
    b = nu s^2 + M2_j, r = ybar_j - c_j, t = the prior variance of theta_j). Written here from its definition:
    scipy.stats.invgamma(a/2, scale=b/2) for the first part (BDA3 Appendix A), scipy.stats.norm for the second,
    normalised by the trapezoid rule over log sigma^2 (the Jacobian sigma^2 included)."""
    u = np.linspace(-25.0, 25.0, 400_001)
    x = np.exp(u)
    logf = stats.invgamma.logpdf(x, a=a / 2.0, scale=b / 2.0) + stats.norm.logpdf(r, scale=np.sqrt(t + x / n)) + u
    f = np.exp(logf - logf.max())
    cdf = np.concatenate([[0.0], np.cumsum((f[1:] + f[:-1]) / 2.0 * np.diff(u))])
    return x, cdf / cdf[-1]


@pytest.mark.parametrize("nu", [3.0, 1.0])  # nu = 1: the group of one proposes from a gamma of shape 1/2 < 1
def test_the_joint_move_of_sigma_and_theta_keeps_its_target(nu):
    # Markov test: chains started from exact draws of p(sigma_j^2, theta_j | rest) (sigma_j^2 by inverting the
    # CDF of pair_target, theta_j from its normal conditional, BDA3 eq. (5.17)) must still follow it after three
    # moves (kernel.pair_step), the rest held fixed. The state puts mu three of the groups' spreads away from them
    # and tau small, so that the normal factor N(ybar_j | c_j, t_j + sigma_j^2 / n_j) shapes the target; a move
    # that ignored it (accepting every proposal) would leave the proposal's own law, which is rejected below.
    model = Model(nu=NuFixed(nu))
    p = dyestuff_problem(model)
    d = p.data
    J, chains = p.J, 3000
    rng = np.random.default_rng(20261203)
    s2, eta, mu = 0.4, np.log(0.15), float(np.mean(p.ybar)) + 3.0 * float(np.std(p.ybar))
    lam = LAM_FIXED
    a = nu + p.n - 1.0
    b = nu * s2 + p.m2
    r = p.ybar - mu
    t = np.exp(2 * eta) / lam
    laws = [pair_target(a[j], b[j], p.n[j], r[j], t[j]) for j in range(J)]
    wk = kernel.make_work(d)
    wk.inv_lam[:] = 1.0 / lam
    sig_end, th_end = np.empty((chains, J)), np.empty((chains, J))
    for c in range(chains):
        sig0 = np.array([np.interp(rng.random(), cdf, x) for x, cdf in laws])
        v0 = sig0 / p.n
        th0 = (mu * v0 + p.ybar * t) / (v0 + t) + np.sqrt(v0 * t / (v0 + t)) * rng.standard_normal(J)
        st = start_state(p, eta=eta, s2=s2, nu_idx=0, sigma2=sig0)
        st.scalars[kernel.MU] = mu
        st.theta[:] = th0
        st.lam[:] = lam
        kernel.fill_v(d, st.scalars, st.sigma2, wk.v)  # as a sweep starts: v_j = sigma_j^2 / n_j
        for _ in range(3):
            kernel.pair_step(rng, d, st, wk)
        sig_end[c], th_end[c] = st.sigma2, st.theta
        assert np.array_equal(wk.v, st.sigma2 / p.n)  # the move keeps v_j = sigma_j^2 / n_j for what follows
    for j, (x, cdf) in enumerate(laws):
        u = np.interp(sig_end[:, j], x, cdf)
        assert _ks_uniform(u) > ALPHA / J, j
        v = sig_end[:, j] / p.n[j]
        m = (mu * v + p.ybar[j] * t[j]) / (v + t[j])
        assert _ks_uniform(stats.norm.cdf(th_end[:, j], loc=m, scale=np.sqrt(v * t[j] / (v + t[j])))) > ALPHA / J, j
    # power: the proposal's own law (the move without its acceptance step) is rejected for every group
    for j in range(J):
        wrong = stats.invgamma.cdf(sig_end[:, j], a=a[j] / 2.0, scale=b[j] / 2.0)
        assert _ks_uniform(wrong) < ALPHA, j


def run_block_b(theta, s2, nu_idx, *, draws, seed, model):
    """Call kernel.block_b `draws` times for `separate`, each time from the same (theta, s^2, nu), with the
    kernel's data made by model.build from `model`.

    In a sweep the variance block draws sigma_j^2 | theta, s^2, nu, then s^2 | sigma^2, nu, then
    nu | sigma^2, s^2 (the extra moves of a sweep come before and after it). Returns, per call,
    sigma^2 (draws, J), the new s^2 and the new nu.
    """
    p = dyestuff_problem(model)
    d = p.data
    grid = p.nu_grid
    rng = np.random.default_rng(seed)
    st = start_state(p)
    lp = np.empty(len(grid))
    out_sigma2, out_s2, out_nu = np.empty((draws, p.J)), np.empty(draws), np.empty(draws)
    for i in range(draws):
        st.scalars[kernel.S2] = s2
        st.scalars[kernel.NU_IDX] = nu_idx
        kernel.block_b(rng, d, st.scalars, theta, st.sigma2, lp)
        out_sigma2[i] = st.sigma2
        out_s2[i] = st.scalars[kernel.S2]
        out_nu[i] = grid[int(st.scalars[kernel.NU_IDX])]
    return out_sigma2, out_s2, out_nu


BLOCK_B_CASES = [
    # (nu index on SEP_GRID or None for nu fixed at 3, s^2 prior (a, b) in internal units; None: the default
    # prior, which the README states as p(s^2) ∝ 1/s^2, i.e. (a, b) = (0, 0))
    (2, (2.0, 1.5)),
    (4, (2.0, 1.5)),
    (None, None),
]


def _dye_internal():
    p = dyestuff_problem(Model(nu=NuFixed(3.0)))
    return p.n, p.ybar, p.m2


@pytest.mark.parametrize("nu_idx,s2_prior", BLOCK_B_CASES)
def test_variance_block_draws(nu_idx, s2_prior):
    n, ybar, m2 = _dye_internal()
    theta = ybar + THETA_SHIFT
    s2 = 0.8
    grid, weights = (SEP_GRID, SEP_WEIGHTS) if nu_idx is not None else (np.array([3.0]), np.ones(1))
    nu = float(grid[nu_idx or 0])
    if s2_prior is None:
        model = Model(nu=NuFixed(3.0))  # the default prior on s^2
        s2_prior = {"reciprocal": (0.0, 0.0)}[type(README_DEFAULT["s2"]).__name__.lower()]
    else:
        p0 = dyestuff_problem(Model(nu=NuFixed(3.0)))
        model = Model(
            s2=Gamma(s2_prior[0], s2_prior[1] / p0.scale**2),
            nu=NuGrid(tuple(grid), tuple(weights)) if nu_idx is not None else NuFixed(3.0),
        )
    sig2, s2_new, nu_new = run_block_b(theta, s2, nu_idx or 0, draws=10_000, seed=41 + (nu_idx or 0), model=model)
    # sigma_j^2 | theta, s^2, nu: i.i.d. draws from one inverse gamma per group (KS, Bonferroni over groups)
    right, wrong = sigma2_law(n, ybar, m2, theta, s2, nu), sigma2_law(n, ybar, m2, theta, s2, nu, df_shift=-1.0)
    u = right.cdf(sig2)
    for j in range(len(n)):
        assert _ks_uniform(u[:, j]) > ALPHA / len(n), j
    assert _ks_uniform(wrong.cdf(sig2)) < ALPHA
    # s^2 | sigma^2, nu, given each call's own sigma^2
    assert _ks_uniform(s2_pit(s2_new, sig2, nu, s2_prior)) > ALPHA
    if s2_prior[0] > 0:
        assert _ks_uniform(s2_pit(s2_new, sig2, nu, s2_prior, drop_prior_shape=True)) < ALPHA
    else:  # 1/s^2 prior: the wrong version takes shape J nu / 2 + 1 (a flat prior on s^2)
        assert _ks_uniform(s2_pit(s2_new, sig2, nu, (1.0, 0.0))) < ALPHA
    if nu_idx is None:
        assert np.all(nu_new == 3.0)
        return
    # nu | sigma^2, s^2 on its grid, given each call's sigma^2 and s^2
    k = np.searchsorted(grid, nu_new)
    assert np.all(grid[k] == nu_new)

    def chi2_and_pit(p):
        # Chi-square of the counts against the summed exact probabilities. The draws are
        # independent categorical given their inputs, so each count's variance sum_t p_tk (1 - p_tk)
        # is at most the multinomial one and the chi-square(K - 1) reference is valid (slightly
        # conservative). Cells with expected count < 5 are pooled (common practice).
        expected = p.sum(axis=0)
        observed = np.bincount(k, minlength=len(grid)).astype(float)
        keep = expected >= 5
        e, o = expected[keep], observed[keep]
        if (~keep).any():
            e, o = np.append(e, expected[~keep].sum()), np.append(o, observed[~keep].sum())
        chi = stats.chisquare(o, e * o.sum() / e.sum()).pvalue
        # randomised PIT of a discrete draw: F(k - 1) + V p(k), V ~ U(0, 1) -- exactly uniform
        cdf = np.cumsum(p, axis=1)
        rows = np.arange(len(k))
        lower = np.where(k > 0, cdf[rows, np.maximum(k - 1, 0)], 0.0)
        u = lower + np.random.default_rng(5).random(len(k)) * p[rows, k]
        return chi, _ks_uniform(u)

    chi, ks = chi2_and_pit(nu_probs(sig2, s2_new, grid, weights))
    assert chi > ALPHA and ks > ALPHA
    chi_w, ks_w = chi2_and_pit(nu_probs(sig2, s2_new, grid, weights, wrong=True))
    assert chi_w < ALPHA and ks_w < ALPHA
    assert len(np.unique(k)) >= 3  # the grid is really explored, not stuck on one point


@pytest.mark.parametrize("by_size", [True, False], ids=["sums by size class", "sums group by group"])
def test_collapsed_nu_move_keeps_its_target(by_size):
    # The Metropolis move of nu with every sigma_j^2 integrated out must leave
    # p(nu | s^2, theta, y) ∝ w_k prod_j int N-likelihood x Scaled-Inv-chi2(sigma_j^2 | nu_k, s^2)
    # invariant (the first half of a partially collapsed update; van Dyk and Park 2008, JASA 103).
    # Independent chains start at exact draws of that target, make 10 moves, and the final nu's
    # must still follow it (chi-square).
    p = dyestuff_problem(Model(nu=NuGrid(tuple(SEP_GRID), tuple(SEP_WEIGHTS))))
    n, ybar, m2 = p.n, p.ybar, p.m2
    theta, s2 = ybar + THETA_SHIFT, 0.8
    ss = m2 + n * (ybar - theta) ** 2
    logp = np.log(SEP_WEIGHTS) + np.array(
        [sum(group_marginal(nu, s2, n[j], ss[j]) for j in range(len(n))) for nu in SEP_GRID]
    )
    target = np.exp(logp - logp.max())
    target /= target.sum()
    assert target.max() < 0.9  # the target is spread over the grid, so the test has something to see
    J = len(n)
    pos, firsts, sizes = np.empty(J, dtype=np.int64), np.empty(J + 1, dtype=np.int64), np.empty(J)
    n_classes = kernel.size_classes(n, pos, firsts, sizes)
    assert n_classes == len(np.unique(n))  # unbalanced dyestuff: several sizes
    layout = np.concatenate([[n_classes], firsts[: n_classes + 1], sizes[:n_classes].astype(np.int64), pos])
    d = p.data._replace(layout=layout.astype(np.int64) if by_size else np.array([-1], dtype=np.int64))
    work = np.empty(J)
    rng = np.random.default_rng(2008)
    chains, moves = 6000, 10
    starts = rng.choice(len(SEP_GRID), size=chains, p=target)
    finals = np.empty(chains, dtype=int)
    state = np.zeros(kernel.N_SCALARS)
    for c in range(chains):
        state[kernel.S2] = s2
        state[kernel.NU_IDX] = starts[c]
        for _ in range(moves):
            kernel.collapsed_nu_step(rng, d, state, theta, work)
        finals[c] = int(state[kernel.NU_IDX])
    counts = np.bincount(finals, minlength=len(SEP_GRID))
    assert np.any(finals != starts)  # the move does move
    assert stats.chisquare(counts, chains * target).pvalue > ALPHA
    prior_only = SEP_WEIGHTS  # the deliberate error of ignoring the data in the move
    assert stats.chisquare(counts, chains * prior_only).pvalue < ALPHA


def s2_marginal_logpdf(log_s2, theta, nu, s2_prior):
    """log p(log s^2 | theta, nu, y) + const with every sigma_j^2 integrated out, on a grid of log s^2.

    Each group contributes (h s^2)^h / (h s^2 + SS_j/2)^(h + n_j/2) (h = nu/2; the normalising
    constant of an inverse gamma, BDA3 Appendix A; checked against quadrature in the test); the
    prior is 1/s^2 or Gamma(a, b), and "+ log s^2" is the Jacobian of the log.
    """
    n, ybar, m2 = _dye_internal()
    ss = m2 + n * (ybar - theta) ** 2
    h = nu / 2.0
    s2 = np.exp(log_s2)[:, None]
    lp = np.sum(h * np.log(h * s2) - (h + n / 2.0) * np.log(h * s2 + ss / 2.0), axis=1)
    if s2_prior[0] > 0:
        lp += stats.gamma.logpdf(s2[:, 0], a=s2_prior[0], scale=1.0 / s2_prior[1]) + log_s2
    return lp  # for 1/s^2 the prior and the Jacobian cancel


@pytest.mark.parametrize("s2_prior,moves", [((0.0, 0.0), 1), ((2.0, 1.5), 10)])
def test_common_scale_move_keeps_its_target(s2_prior, moves):
    # The move that rescales s^2 and every sigma_j^2 by one factor must leave
    # p(s^2, sigma^2 | theta, nu, y) invariant. Independent chains start at exact draws (s^2 by the
    # inverse CDF of its marginal on a grid, then sigma_j^2 | s^2 from scipy.stats.invgamma), make
    # `moves` moves (one suffices when the factor is an exact draw, as under 1/s^2; the gamma prior
    # uses an accept/reject step), and s^2 and sigma_1^2 must still follow their exact marginals (KS).
    n, ybar, m2 = _dye_internal()
    theta, nu = ybar + THETA_SHIFT, 4.0
    ss = m2 + n * (ybar - theta) ** 2
    h = nu / 2.0
    p0 = dyestuff_problem(Model(nu=NuFixed(4.0)))
    model = Model(
        nu=NuFixed(4.0), **({} if s2_prior[0] == 0 else {"s2": Gamma(s2_prior[0], s2_prior[1] / p0.scale**2)})
    )
    d = dyestuff_problem(model).data
    assert (d.s2_shape, d.s2_rate) == pytest.approx(s2_prior)
    # the closed form of the per-group integral against quadrature, at a few values of s^2
    for s2 in (0.1, 0.8, 5.0):
        closed = h * np.log(h * s2) - (h + n[3] / 2) * np.log(h * s2 + ss[3] / 2)
        closed += special.gammaln(h + n[3] / 2) - special.gammaln(h)
        assert closed == pytest.approx(group_marginal(nu, s2, n[3], ss[3]), abs=1e-7)
    grid = np.linspace(-12.0, 8.0, 8001)
    lp = s2_marginal_logpdf(grid, theta, nu, s2_prior)
    dens = np.exp(lp - lp.max())
    cdf = integrate.cumulative_trapezoid(dens, grid, initial=0.0)
    cdf /= cdf[-1]
    assert cdf[80] < 1e-6 and cdf[-81] > 1 - 1e-6
    rng = np.random.default_rng(2000)
    chains = 4000
    log_s2 = np.interp(rng.random(chains), cdf, grid)
    sigma2 = stats.invgamma.rvs(
        a=h + n / 2.0, scale=h * np.exp(log_s2)[:, None] + ss / 2.0, size=(chains, len(n)), random_state=rng
    )
    state = np.zeros(kernel.N_SCALARS)
    s2_after, sig1_after = np.empty(chains), np.empty(chains)
    for c in range(chains):
        state[kernel.S2] = np.exp(log_s2[c])
        row = sigma2[c].copy()
        for _ in range(moves):
            kernel.scale_step(rng, d, state, theta, row)
        s2_after[c], sig1_after[c] = state[kernel.S2], row[0]
    assert np.mean(s2_after != np.exp(log_s2)) > 0.5  # the move does move
    assert stats.kstest(np.log(s2_after), lambda x: np.interp(x, grid, cdf)).pvalue > ALPHA
    # sigma_1^2's marginal: the inverse gamma mixed over the s^2 grid
    w = np.diff(cdf)
    mid = np.exp(0.5 * (grid[1:] + grid[:-1]))
    keep = w > 1e-12
    w, mid = w[keep] / w[keep].sum(), mid[keep]

    def sig1_cdf(x):
        return stats.invgamma.cdf(np.asarray(x)[:, None], a=h + n[0] / 2.0, scale=h * mid + ss[0] / 2.0) @ w

    assert stats.kstest(sig1_after, sig1_cdf).pvalue > ALPHA
    # the deliberate error: a flat prior on s^2 in place of the one in force
    wrong = np.exp(lp + grid - lp.max())
    wrong_cdf = integrate.cumulative_trapezoid(wrong, grid, initial=0.0)
    wrong_cdf /= wrong_cdf[-1]
    assert stats.kstest(np.log(s2_after), lambda x: np.interp(x, grid, wrong_cdf)).pvalue < ALPHA


def test_shared_sigma2_given_theta():
    # the defaults (README: heavy tails, flat mu and tau) with the shared structure
    p = dyestuff_problem(Model(within="shared"))
    n, ybar, m2 = p.n, p.ybar, p.m2
    out = run(p, n_sweeps=N_SWEEPS, seed=11)
    assert _ks_uniform(shared_pit(out, n, ybar, m2)) > ALPHA
    assert _ks_uniform(shared_pit(out, n, ybar, m2, df_shift=-len(n))) < ALPHA
    v_prev = out["sigma"][:-1, :1] ** 2 / n
    lam = out["lam"][:-1]
    assert _ks_uniform(theta_pit(out, ybar, v_prev, lam_prev=lam)) > ALPHA
    assert _ks_uniform(mu_pit(out, ybar, v_prev, (0, 0.0, 1.0), lam_prev=lam)) > ALPHA


def test_shared_sigma2_given_theta_under_a_proper_prior():
    # sigma^2 ~ Scaled-Inv-chi2(8, 40^2) in yield units (a prior near the batches' own spread, weighing as much
    # as 8 earlier degrees of freedom), carried into internal units by hand: s0^2 / scale^2
    model = Model(within="shared", sigma2=ScaledInvChi2(dof=8.0, scale2=1600.0))
    p = dyestuff_problem(model)
    n, ybar, m2 = p.n, p.ybar, p.m2
    prior = (8.0, 1600.0 / p.scale**2)
    out = run(p, n_sweeps=N_SWEEPS, seed=12)
    assert _ks_uniform(shared_pit(out, n, ybar, m2, prior=prior)) > ALPHA
    # the prior left out (the flat-prior law) is rejected: the test sees the prior's inputs
    assert _ks_uniform(shared_pit(out, n, ybar, m2)) < ALPHA


@pytest.mark.parametrize("between", ["normal", "heavy"])
@pytest.mark.parametrize("mu_prior", [None, (-3.2, 4.8)])
def test_theta_and_mu_given_known_variances(mu_prior, between):
    # user units: mu ~ N(-3.2, 4.8^2) (or flat), tau ~ half-normal(12.8)
    model = Model(
        within="known", between=between, tau=HalfNormal(12.8), **({} if mu_prior is None else {"mu": Normal(*mu_prior)})
    )
    p = schools_problem(model)
    pri = internal(p, model)
    ybar, v = p.ybar, p.v_known
    assert v == pytest.approx((SCHOOLS_SE / p.scale) ** 2) and ybar == pytest.approx((SCHOOLS_Y - p.center) / p.scale)
    out = run(p, n_sweeps=N_SWEEPS, seed=3)
    lam = out["lam"][:-1] if p.heavy else None
    assert _ks_uniform(theta_pit(out, ybar, v, lam_prev=lam)) > ALPHA
    assert _ks_uniform(theta_pit(out, ybar, v, swap=True, lam_prev=lam)) < ALPHA
    assert _ks_uniform(mu_pit(out, ybar, v, pri["mu"], lam_prev=lam)) > ALPHA
    assert _ks_uniform(mu_pit(out, ybar, v, pri["mu"], drop_tau=True, lam_prev=lam)) < ALPHA
    if pri["mu"][0] == 1:  # the normal prior's term matters: leaving it out is caught
        assert _ks_uniform(mu_pit(out, ybar, v, (0, 0.0, 1.0), lam_prev=lam)) < ALPHA


# ---------------------------------------------------------------------------------------------
# the slice update of log tau: its stationary distribution


def log_p_eta(eta, ybar, v, mu_prior, tau_prior):
    """log p(eta = log tau | v, y) + const, theta and mu integrated out, evaluated on a grid of eta.

    Flat mu: BDA3 eq. (5.21), p(tau | y) ∝ p(tau) V^(1/2) prod_j (v_j + tau^2)^(-1/2)
    exp(-sum_j (ybar_j - m)^2 / (2 (v_j + tau^2))). Normal mu prior N(m0, s0^2): the marginal of
    ybar given tau is multivariate normal, mean m0, covariance diag(v + tau^2) + s0^2 11'
    (scipy.stats.multivariate_normal), a route independent of the kernel's algebra.
    Half-normal and half-Cauchy priors are scipy.stats.halfnorm and halfcauchy. The Jacobian
    d tau / d eta = tau adds eta.
    """
    tau = np.exp(eta)
    out = np.empty(len(eta))
    for i, t in enumerate(tau):
        d = v + t * t
        if mu_prior[0] == 0:
            prec = 1.0 / d
            V = 1.0 / prec.sum()
            m = V * np.sum(prec * ybar)
            out[i] = 0.5 * np.log(V) - 0.5 * np.sum(np.log(d)) - 0.5 * np.sum((ybar - m) ** 2 / d)
        else:
            cov = np.diag(d) + mu_prior[2] ** 2
            out[i] = stats.multivariate_normal.logpdf(ybar, mean=np.full(len(ybar), mu_prior[1]), cov=cov)
    if tau_prior[0] == 1:
        out += stats.halfnorm.logpdf(tau, scale=tau_prior[1])
    elif tau_prior[0] == 2:
        out += stats.halfcauchy.logpdf(tau, scale=tau_prior[1])
    return out + eta


ETA_GRID = np.linspace(-16.0, 6.0, 8001)  # tau from 1e-7 to 400 internal units


def grid_cdf(lp):
    """The CDF on ETA_GRID of the density exp(lp) (trapezoid rule, scipy.integrate), normalised."""
    dens = np.exp(lp - lp.max())
    cdf = integrate.cumulative_trapezoid(dens, ETA_GRID, initial=0.0)
    return cdf / cdf[-1]


TAU_CASES = [
    # (mu prior, tau prior) in the user's units; None: the default (README: flat)
    (None, None),
    (Normal(0.0, 5.0), HalfCauchy(5.0)),  # the eight-schools priors N(0, 5^2), half-Cauchy(5)
    # normal mu, half-normal tau; the mu prior sits away from the data, so that its term in
    # p(tau | v, y) matters (dropping it fails this case)
    (Normal(16.0, 2.4), HalfNormal(8.0)),
]


def slice_finals(cdf, problem, chains=3000, steps=12, seed=99):
    """Last log tau of `chains` independent chains of the known structure, each started at an exact draw."""
    rng = np.random.default_rng(seed)
    starts = np.interp(rng.random(chains), cdf, ETA_GRID)  # exact draws of eta by the inverse CDF
    finals = np.empty(chains)
    # one compiled call per chain; each chain runs `steps` sweeps with the slice width fixed (no
    # adaptation), then its last log tau is kept
    d = problem.data
    out = kernel.empty_draws(d, steps)
    wk = kernel.make_work(d)
    for c in range(chains):
        st = start_state(problem, eta=starts[c])
        kernel.sweeps(rng, steps, False, d, st, wk, out, 0)
        finals[c] = np.log(out.tau[-1])
    return finals


@pytest.mark.parametrize("mu_prior,tau_prior", TAU_CASES)
def test_slice_update_of_log_tau_keeps_its_target(mu_prior, tau_prior):
    model = Model(
        within="known",
        between="normal",
        **({} if mu_prior is None else {"mu": mu_prior}),
        **({} if tau_prior is None else {"tau": tau_prior}),
    )
    p = schools_problem(model)
    pri = internal(p, model)
    ybar, v = p.ybar, p.v_known
    lp = log_p_eta(ETA_GRID, ybar, v, pri["mu"], pri["tau"])
    cdf = grid_cdf(lp)
    # the grid reaches far enough: almost no mass in its first and last 1% of length
    assert cdf[80] < 1e-6 and cdf[-81] > 1 - 1e-6
    finals = slice_finals(cdf, p)
    assert stats.kstest(finals, lambda x: np.interp(x, ETA_GRID, cdf)).pvalue > ALPHA
    wrong = grid_cdf(lp - ETA_GRID)  # the same density without the Jacobian of tau = exp(eta)
    assert stats.kstest(finals, lambda x: np.interp(x, ETA_GRID, wrong)).pvalue < ALPHA


# ---------------------------------------------------------------------------------------------
# heavy tails: df and lambda given theta, mu, tau


def df_probs(z, grid, weights, normal_for_t=False):
    """p(df_k | theta, mu, tau) ∝ w_k prod_j t_df_k(z_j) / tau, z_j = (theta_j - mu) / tau: the lambda_j
    integrated out, scipy.stats.t (df = inf: scipy.stats.norm). `normal_for_t` is the deliberate error of
    using the normal density for every df."""
    logp = np.empty(len(grid))
    for k, df in enumerate(grid):
        dens = stats.norm if (np.isinf(df) or normal_for_t) else stats.t(df)
        logp[k] = np.log(weights[k]) + dens.logpdf(z).sum()
    p = np.exp(logp - logp.max())
    return p / p.sum()


@pytest.mark.parametrize("theta_shift", [0.0, 6.0])
def test_tail_step_draws(theta_shift):
    # From one fixed (theta, mu, tau), the tail move draws df from its discrete conditional with every
    # lambda_j integrated out (a product of Student-t densities), then each lambda_j | df from
    # Gamma((df + 1)/2, rate (df + z_j^2)/2) (the normal-gamma conjugate update; BDA3 sec. 17.2, from
    # memory). theta_shift moves one group far out, which moves df toward heavy tails.
    model = Model(within="known")  # the default between-group distribution: df learned on its grid, stated prior
    p = schools_problem(model)
    between = model.between
    grid, weights = (np.asarray(x, dtype=float) for x in between.grid_and_weights())
    d = p.data
    assert np.array_equal(d.df_grid, grid) and np.allclose(np.exp(d.df_logprior), weights / weights.sum())
    theta = p.ybar.copy()
    theta[0] += theta_shift
    mu, eta = float(np.mean(p.ybar)), np.log(0.6)
    z = (theta - mu) / np.exp(eta)
    probs = df_probs(z, grid, weights)
    st = start_state(p)
    wk = kernel.make_work(d)
    rng = np.random.default_rng(17)
    draws = 12_000
    ks, lams = np.empty(draws, dtype=int), np.empty((draws, p.J))
    for i in range(draws):
        st.theta[:] = theta
        st.scalars[kernel.MU], st.scalars[kernel.ETA] = mu, eta
        sz = kernel.fill_z2(d, st, wk, wk.z2)
        kernel.df_draw(rng, d, st.scalars, wk.z2, sz, wk.lpd)
        kernel.lambda_draw(rng, d, st, wk)
        ks[i] = int(st.scalars[kernel.DF_IDX])
        lams[i] = st.lam
        assert np.allclose(wk.inv_lam, 1.0 / st.lam)
    counts = np.bincount(ks, minlength=len(grid)).astype(float)
    keep = probs * draws >= 5  # cells with expected count < 5 are pooled (common practice)
    e, o = probs[keep] * draws, counts[keep]
    if (~keep).any():
        e, o = np.append(e, probs[~keep].sum() * draws), np.append(o, counts[~keep].sum())
    assert stats.chisquare(o, e).pvalue > ALPHA
    wrong = df_probs(z, grid, weights, normal_for_t=True)
    ew = wrong[keep] * draws
    if (~keep).any():
        ew = np.append(ew, wrong[~keep].sum() * draws)
    assert stats.chisquare(o, ew * o.sum() / ew.sum()).pvalue < ALPHA
    # lambda_j | df: the PIT of each draw given its own df (at df = inf every lambda_j is 1)
    df = grid[ks]
    fin = np.isfinite(df)
    assert np.all(lams[~fin] == 1.0)
    a = (df[fin, None] + 1.0) / 2.0
    rate = (df[fin, None] + z[None, :] ** 2) / 2.0
    u = stats.gamma.cdf(lams[fin], a=a, scale=1.0 / rate)
    assert _ks_uniform(u) > ALPHA
    assert _ks_uniform(stats.gamma.cdf(lams[fin], a=df[fin, None] / 2.0, scale=1.0 / rate)) < ALPHA  # shape df/2


def test_df_window_move_keeps_its_target():
    # A grid longer than kernel.DF_WINDOW is moved by an exact draw within a random window around the
    # current point. From independent chains started at exact draws of p(df | theta, mu, tau), a few
    # moves must leave that distribution in place (chi-square over the grid), and the chains must move.
    from pooling.model import HeavyBetween

    grid = tuple(float(x) for x in np.geomspace(1.0, 60.0, kernel.DF_WINDOW + 6)) + (np.inf,)
    weights = np.full(len(grid), 1.0 / len(grid))
    model = Model(within="known", between=HeavyBetween(grid=grid, weights=tuple(weights)))
    p = schools_problem(model)
    d = p.data
    assert len(d.df_grid) > kernel.DF_WINDOW
    theta = p.ybar.copy()
    theta[0] += 3.0
    mu, eta = float(np.mean(p.ybar)), np.log(0.6)
    probs = df_probs((theta - mu) / np.exp(eta), np.asarray(grid), weights)
    rng = np.random.default_rng(33)
    chains, moves = 8000, 3
    starts = rng.choice(len(grid), size=chains, p=probs)
    finals = np.empty(chains, dtype=int)
    st = start_state(p)
    wk = kernel.make_work(d)
    for c in range(chains):
        st.scalars[kernel.DF_IDX] = starts[c]
        for _ in range(moves):
            st.theta[:] = theta
            st.scalars[kernel.MU], st.scalars[kernel.ETA] = mu, eta
            sz = kernel.fill_z2(d, st, wk, wk.z2)
            kernel.df_draw(rng, d, st.scalars, wk.z2, sz, wk.lpd)
        finals[c] = int(st.scalars[kernel.DF_IDX])
    assert np.mean(finals != starts) > 0.3
    counts = np.bincount(finals, minlength=len(grid)).astype(float)
    keep = probs * chains >= 5
    e, o = probs[keep] * chains, counts[keep]
    if (~keep).any():
        e, o = np.append(e, probs[~keep].sum() * chains), np.append(o, counts[~keep].sum())
    assert stats.chisquare(o, e).pvalue > ALPHA
    prior_only = np.full(len(grid), 1.0 / len(grid))  # the deliberate error of ignoring the data
    ew = prior_only[keep] * chains
    if (~keep).any():
        ew = np.append(ew, prior_only[~keep].sum() * chains)
    assert stats.chisquare(o, ew).pvalue < ALPHA


def df_tau_logp(eta_grid, grid, weights, theta, mu, tau_prior, drop_jacobian=False):
    """log p(df_k, eta = log tau | theta, mu) on grid x eta_grid: log w_k + log p_tau(tau) + eta + sum_j
    log t_df_k(theta_j | mu, tau), scipy.stats.t with scale tau (scipy.stats.norm at df = inf), every lambda_j
    integrated out (the t is their mixture). tau_prior: None (flat), a half-normal scale, or ("cauchy", scale)
    for scipy.stats.halfcauchy. `drop_jacobian` leaves out the eta of tau = exp(eta): the deliberate error."""
    tau = np.exp(eta_grid)
    out = np.empty((len(grid), len(eta_grid)))
    for k, df in enumerate(grid):
        dist = stats.norm if np.isinf(df) else stats.t(df)
        ll = dist.logpdf((theta[None, :] - mu) / tau[:, None]).sum(axis=1) - len(theta) * np.log(tau)
        out[k] = np.log(weights[k]) + ll + (0.0 if drop_jacobian else eta_grid)
        if isinstance(tau_prior, tuple):  # ("cauchy", scale)
            out[k] += stats.halfcauchy.logpdf(tau, scale=tau_prior[1])
        elif tau_prior is not None:
            out[k] += stats.halfnorm.logpdf(tau, scale=tau_prior)
    return out


@pytest.mark.parametrize("tau_prior", [None, 0.8, ("cauchy", 0.1)], ids=["flat", "halfnormal", "halfcauchy"])
def test_joint_df_tau_move_keeps_its_target(tau_prior):
    # The Metropolis move of (df, tau) with the quartiles of the t kept in place must leave
    # p(df, tau | theta, mu) (every lambda_j integrated out) invariant. Independent chains start at exact
    # draws of it (df by its mass, then log tau by the inverse CDF on a fine grid) and make 6 moves; the
    # final df (chi-square) and log tau (KS against the mixture CDF) must still follow it.
    from scipy.integrate import cumulative_trapezoid

    # ("cauchy", s): a half-Cauchy prior on tau, scale s in the old internal units (the move's half-Cauchy branch;
    # a wrong scale there barely moves 6 steps, so test_tau_terms_of_the_joint_df_tau_move_... checks it exactly)
    cauchy = isinstance(tau_prior, tuple)
    tau_given = (
        None if tau_prior is None else (HalfCauchy(tau_prior[1] * 16.0) if cauchy else HalfNormal(tau_prior * 16.0))
    )
    model = Model(within="known", **({} if tau_given is None else {"tau": tau_given}))
    p = schools_problem(model)
    d = p.data
    pri = internal(p, model)
    tau_ref = None if tau_prior is None else (("cauchy", pri["tau"][1]) if cauchy else pri["tau"][1])
    theta = p.ybar + np.array([0.3, -0.2, 0.1, 0.0, -0.1, 0.2, -0.3, 0.05])
    mu = float(np.mean(p.ybar))
    grid = d.df_grid
    weights = np.exp(d.df_logprior)
    eta = np.linspace(-7.0, 5.0, 8001)
    lp = df_tau_logp(eta, grid, weights, theta, mu, tau_ref)
    dens = np.exp(lp - lp.max())
    mass = np.trapezoid(dens, eta, axis=1)
    probs = mass / mass.sum()
    cdfs = cumulative_trapezoid(dens, eta, axis=1, initial=0.0) / mass[:, None]
    assert dens[:, [0, -1]].max() < 1e-8  # the eta grid holds the mass
    assert probs.max() < 0.6  # spread over the grid: the test has something to see
    rng = np.random.default_rng(2468)
    chains, moves = 6000, 6
    ks = rng.choice(len(grid), size=chains, p=probs)
    etas = np.array([np.interp(rng.random(), cdfs[k], eta) for k in ks])
    st = start_state(p)
    wk = kernel.make_work(d)
    moved = 0
    for c in range(chains):
        st.theta[:] = theta
        st.scalars[kernel.MU], st.scalars[kernel.ETA], st.scalars[kernel.DF_IDX] = mu, etas[c], ks[c]
        for _ in range(moves):
            sz = kernel.fill_z2(d, st, wk, wk.z2)
            moved += kernel.df_tau_step(rng, d, st.scalars, wk.z2, sz)
        ks[c], etas[c] = int(st.scalars[kernel.DF_IDX]), st.scalars[kernel.ETA]
    assert moved > chains  # the move is accepted often enough to matter
    counts = np.bincount(ks, minlength=len(grid)).astype(float)
    keep = probs * chains >= 5
    e, o = probs[keep] * chains, counts[keep]
    if (~keep).any():
        e, o = np.append(e, probs[~keep].sum() * chains), np.append(o, counts[~keep].sum())
    assert stats.chisquare(o, e).pvalue > ALPHA
    marginal = (cdfs * probs[:, None]).sum(axis=0)
    assert stats.kstest(etas, lambda x: np.interp(x, eta, marginal)).pvalue > ALPHA
    wrong = np.exp(df_tau_logp(eta, grid, weights, theta, mu, tau_ref, drop_jacobian=True) - lp.max())
    wm = cumulative_trapezoid(wrong, eta, axis=1, initial=0.0)
    wmarg = wm.sum(axis=0) / wm[:, -1].sum()
    assert stats.kstest(etas, lambda x: np.interp(x, eta, wmarg)).pvalue < ALPHA


@pytest.mark.parametrize("tau", [None, HalfNormal(8.0), HalfCauchy(1.6)], ids=["flat", "halfnormal", "halfcauchy"])
def test_tau_terms_of_the_joint_df_tau_move_are_the_prior_and_its_jacobian(tau):
    # Source: scipy.stats.halfnorm / halfcauchy. kernel.tau_part(eta) holds the terms of log p(df, eta | theta, mu)
    # that depend on tau alone: log p_tau(tau) + eta (tau = exp(eta)) - J eta (each group's t density carries
    # 1/tau). Its differences between two values of eta must equal those of the reference, to rounding; the prior
    # is stated in the user's units and converted by model.build (tests/kernel_helpers.internal converts it by
    # hand here). A deterministic check, so that a prior scale applied wrongly cannot hide in a move that shifts
    # tau only a little at a time (written for kernel.py:681 `tau2 / (d.tau_scale / d.tau_scale)`, which the
    # Markov test above does not see in 6 moves).
    model = Model(within="known", **({} if tau is None else {"tau": tau}))
    p = schools_problem(model)
    pri = internal(p, model)
    J = p.J
    etas = np.linspace(-4.0, 2.0, 13)
    got = np.array([kernel.tau_part(e, p.data, J) for e in etas])
    t = np.exp(etas)
    ref = etas - J * etas
    if isinstance(tau, HalfNormal):
        ref = ref + stats.halfnorm.logpdf(t, scale=pri["tau"][1])
    elif isinstance(tau, HalfCauchy):
        ref = ref + stats.halfcauchy.logpdf(t, scale=pri["tau"][1])
    assert pri["tau"][1] != 1.0 or tau is None  # a scale of 1 could not show a scale used the wrong way
    np.testing.assert_allclose(got - got[0], ref - ref[0], rtol=1e-12, atol=1e-11)


def test_nu_on_a_grid_of_two_points():
    # Source: as test_variance_block_draws, nu | sigma^2, s^2 against nu_probs (scipy.stats.invgamma), here on a
    # grid of exactly two points (the smallest grid on which nu is drawn at all; written for kernel.py:866
    # `if K > 2`, which left nu at its start there). The draws are independent given their inputs, so the count
    # of the upper point has variance sum_t p_t (1 - p_t); we allow 4.5 of its standard deviations.
    n, ybar, m2 = _dye_internal()
    theta = ybar + THETA_SHIFT
    grid = (2.0, 8.0)
    p0 = dyestuff_problem(Model(nu=NuFixed(3.0)))
    model = Model(s2=Gamma(2.0, 1.5 / p0.scale**2), nu=NuGrid(grid, (0.5, 0.5)))
    sig2, s2_new, nu_new = run_block_b(theta, 0.8, 0, draws=4000, seed=77, model=model)
    p_hi = nu_probs(sig2, s2_new, np.array(grid), np.array([0.5, 0.5]))[:, 1]
    assert 0.05 < p_hi.mean() < 0.95  # both points are plausible: the check can see a draw that never moves
    hits = float(np.sum(nu_new == 8.0))
    assert abs(hits - p_hi.sum()) < 4.5 * np.sqrt(np.sum(p_hi * (1 - p_hi))), (hits, p_hi.sum())


def test_quartiles_that_the_joint_df_tau_move_keeps_in_place():
    # Source: scipy.stats.t.ppf(0.75, df) and scipy.stats.norm.ppf(0.75) (df = inf, the normal limit). The joint
    # move shifts log tau by the difference of these logs so that the t's quartiles stay put; a wrong value leaves
    # the posterior as it is (a deterministic shift has Jacobian 1) but moves the quartile the proposal was built to
    # keep, which the Markov test above cannot see. Written for kernel.py:196, the normal's quartile 1.674... .
    grid = np.array([1.0, 1.5, 4.0, 30.0, np.inf])
    ref = np.log([stats.t.ppf(0.75, df) if np.isfinite(df) else stats.norm.ppf(0.75) for df in grid])
    np.testing.assert_allclose(kernel.t_quartile_logs(grid), ref, rtol=0, atol=1e-12)


def test_common_scale_move_draws_the_factor_afresh_whatever_the_state():
    # Source: along the orbit (s^2, sigma^2) -> (c s^2, c sigma^2) the target under p(s^2) ∝ 1/s^2, with the
    # invariant measure dc / c, is c^(-N/2 - 1) exp(-A / c) (the group move of Liu and Sabatti 2000, JASA 95; from
    # memory; the powers of c from the Scaled-Inv-chi2(nu, s^2) and normal likelihood terms cancel but for the
    # data's), A = sum_j SS_j / (2 sigma_j^2). So c = A / G, G ~ Gamma(N/2, 1), and after one move
    # A' = A / c = G follows scipy.stats.gamma(N/2) whatever A was before. States with A <= 1 (rare under the
    # target for these 30 measurements) must move like any other. Written for kernel.py:1085 `A <= 1.0`, which
    # left such states where they were. KS at ALPHA with a fixed seed.
    n, ybar, m2 = _dye_internal()
    theta = ybar + THETA_SHIFT
    ss = m2 + n * (ybar - theta) ** 2
    d = dyestuff_problem(Model(nu=NuFixed(4.0))).data
    assert d.s2_shape == 0.0 and d.s2_rate == 0.0
    rng = np.random.default_rng(4321)
    chains = 3000
    before, after = np.empty(chains), np.empty(chains)
    state = np.zeros(kernel.N_SCALARS)
    for c in range(chains):
        u = rng.uniform(1.0, 20.0) if c % 2 else rng.uniform(0.02, 1.0)  # A is about 1/u: half start at A <= 1
        sigma2 = ss / 2.0 * len(n) * u * rng.uniform(0.5, 1.5, len(n))
        state[kernel.S2] = float(np.mean(sigma2))
        before[c] = np.sum(ss / (2.0 * sigma2))
        kernel.scale_step(rng, d, state, theta, sigma2)
        after[c] = np.sum(ss / (2.0 * sigma2))
    assert np.mean(before <= 1.0) > 0.4
    assert stats.kstest(after, stats.gamma(0.5 * n.sum()).cdf).pvalue > ALPHA
    # the deliberate error: the factor drawn with the shape of the groups' count, not the measurements'
    assert stats.kstest(after, stats.gamma(0.5 * len(n)).cdf).pvalue < ALPHA


def test_slice_update_counts_every_density_evaluation(monkeypatch):
    # Definition (the run's tau_evaluations and tau_evaluations_per_sweep): the number of evaluations of the
    # density of log tau in one slice update, the one that ends a stepping-out loop included. The update's Python
    # form (numba's py_func, the same source) runs here with the compiled density wrapped in a counter. Written
    # for kernel.py:558 `evals -= 1`, which subtracted the shrinkage steps' evaluations instead of adding them.
    p = schools_problem(Model(within="known", between="normal"))
    d = p.data
    wk = kernel.make_work(d)
    v = p.v_known.copy()
    calls = []
    compiled = kernel._density

    def counted(*args):
        calls.append(args[0])
        return compiled(*args)

    monkeypatch.setattr(kernel, "_density", counted)
    rng = np.random.default_rng(8)
    counts = []
    for width in (0.05, 0.5, 3.0, 20.0):  # narrow: long stepping out; wide: several shrinkage steps
        for _ in range(50):
            calls.clear()
            eta0 = rng.normal(0.0, 1.0)
            _, evals = kernel.slice_eta.py_func(rng, eta0, width, d, v, np.empty(0), 0.1, wk.mv, np.empty(0), wk)
            assert evals == len(calls)
            counts.append(evals)
    assert min(counts) >= 2 and max(counts) >= 6  # short and long updates were both counted
