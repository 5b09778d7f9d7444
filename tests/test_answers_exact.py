"""The per-draw answers of pooling/answers.py through the results core, against references outside it.

Two kinds of reference, each stated beside its check:
* closed forms (scipy.stats) where the draws are made here from a known distribution; the tolerance is
  4.5 Monte Carlo standard errors of the S independent draws (a fraction p has error sqrt(p (1 - p) / S));
* the column's definition (results.COLUMNS) applied with numpy to the run's own draws in the user's units,
  where the draws come from the sampler; these must agree to rounding (the engine computes in internal
  units), so a wrong formula, a wrong sign or a wrong count fails at once.

These tests were written to kill mutants that survived the mutation run (DEVELOPERS.md, "Mutation
testing"); each names the one it was written for.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import pooling
from pooling.model import Category, HeavyBetween, Model
from pooling.results import compute
from tests.kernel_helpers import SCHOOLS_SE, SCHOOLS_Y
from tests.test_report_stats import make_idata

Z = 4.5  # Monte Carlo standard errors allowed against a closed form


def _normal_draws(seed, m, s, C=2, D=50_000):
    rng = np.random.default_rng(seed)
    return m + s * rng.standard_normal((C, D, len(m)))


def test_threshold_and_one_sided_limit_probabilities_match_the_normal_cdf():
    # Source: scipy.stats.norm. theta_j ~ N(m_j, s_j^2) independently, so P(theta_j > t) = norm.sf(t),
    # P(theta_j < L) = norm.cdf(L) with only a lower limit, P(theta_j > U) = norm.sf(U) with only an upper one.
    # Besides, each probability is by definition the fraction of draws (numpy on the same draws): exact.
    # Written for answers.py:122 `has_hi = a[A_HAS_UPPER] >= 0.0` (a missing upper limit read as one at the
    # data's centre) and for a count of 2, or -1, per draw in place of 1.
    m, s = np.array([10.0, 10.6, 9.1, 11.5]), np.array([0.5, 0.3, 0.8, 0.4])
    th = _normal_draws(1, m, s)
    C, D, J = th.shape
    S = C * D
    one = np.ones((C, D))
    fit = make_idata(th, 10.0 * one, one)
    flat = th.reshape(S, J)

    def mc(p):
        return Z * np.sqrt(p * (1 - p) / S) + 1e-12

    t = compute(fit, pooling.ReportOptions(threshold=10.4)).table
    np.testing.assert_array_equal(t["p_above"], np.mean(flat > 10.4, axis=0))
    np.testing.assert_array_equal(t["p_below"], np.mean(flat < 10.4, axis=0))
    ref = stats.norm.sf(10.4, m, s)
    assert np.all(np.abs(t["p_above"] - ref) < mc(ref)), (t["p_above"].to_numpy(), ref)
    for lower, upper in ((9.7, None), (None, 10.9), (9.7, 10.9)):
        t = compute(fit, pooling.ReportOptions(lower=lower, upper=upper)).table
        ref = (stats.norm.cdf(lower, m, s) if lower is not None else 0.0) + (
            stats.norm.sf(upper, m, s) if upper is not None else 0.0
        )
        own = np.zeros(J)
        if lower is not None:
            own += np.mean(flat < lower, axis=0)
        if upper is not None:
            own += np.mean(flat > upper, axis=0)
        np.testing.assert_array_equal(t["p_mean_outside"], own, err_msg=str((lower, upper)))
        assert np.all(np.abs(t["p_mean_outside"] - ref) < mc(ref)), (
            (lower, upper),
            t["p_mean_outside"].to_numpy(),
            ref,
        )


@pytest.mark.parametrize("lower,upper", [(8.0, None), (None, 12.0), (8.0, 12.0)])
def test_outside_fraction_with_one_limit_or_two_in_the_table(lower, upper):
    # Source: scipy.stats.norm. With every draw at the same (theta_j, sigma_j) the posterior mean of the fraction
    # of measurements outside, P(y < L) + P(y > U) for y ~ N(theta_j, sigma_j^2) with a missing limit adding
    # nothing, and both ends of its interval equal the closed form. Written for answers.py:58
    # `has_u = a[A_HAS_UPPER] >= 0.0` (a missing upper limit read as one at the data's centre).
    C, D = 2, 50
    th = np.broadcast_to(np.array([10.0, 11.0, 9.0]), (C, D, 3)).copy()
    sg = np.broadcast_to(np.array([1.0, 0.5, 2.0]), (C, D, 3)).copy()
    one = np.ones((C, D))
    fit = make_idata(th, 10 * one, one, sigma=sg, s=one, nu=5 * one)
    t = compute(fit, pooling.ReportOptions(lower=lower, upper=upper)).table
    ref = (stats.norm.cdf(lower, th[0, 0], sg[0, 0]) if lower is not None else 0.0) + (
        stats.norm.sf(upper, th[0, 0], sg[0, 0]) if upper is not None else 0.0
    )
    for col in ("outside_mean", "outside_low_95", "outside_high_95"):
        np.testing.assert_allclose(t[col], ref, rtol=1e-12, err_msg=col)


@pytest.mark.parametrize("within", ["separate", "shared"])
def test_shrinkage_weight_of_measured_groups_uses_the_variance_of_their_mean(within):
    # Source: the shrinkage weight of a group mean, v_j / (v_j + tau^2) with v_j = sigma_j^2 / n_j the sampling
    # variance of the mean of n_j measurements (BDA3 section 5.4; from memory), averaged over the draws; the
    # interval ends are numpy's quantiles (linear interpolation, its default) of the same per-draw weights.
    # Written for answers.py:81 `sg * sg * n[j]`, which a group-size-free test (known structure) cannot see.
    rng = np.random.default_rng(9)
    C, D, J = 2, 400, 3
    n = np.array([2, 5, 20])
    tau = rng.uniform(0.3, 1.5, (C, D))
    sig = rng.uniform(0.5, 2.0, (C, D, J) if within == "separate" else (C, D))
    th = rng.standard_normal((C, D, J))
    fit = make_idata(th, np.zeros((C, D)), tau, sigma=sig, n=n)
    t = compute(fit).table
    s2 = sig.reshape(C * D, -1) ** 2
    v = s2 / n
    w = v / (v + tau.reshape(-1, 1) ** 2)
    np.testing.assert_allclose(t["shrink_weight"], w.mean(axis=0), rtol=1e-9)
    lo, hi = np.quantile(w, [0.025, 0.975], axis=0)
    np.testing.assert_allclose(t["shrink_low_95"], lo, rtol=1e-9)
    np.testing.assert_allclose(t["shrink_high_95"], hi, rtol=1e-9)
    # and the posterior mean of sigma_j, the plain mean of its draws (written for answers.py:141, a running mean
    # that kept only the last step)
    np.testing.assert_allclose(t["sigma_mean"], np.broadcast_to(np.sqrt(s2), (C * D, J)).mean(axis=0), rtol=1e-9)


def test_bias_probability_matches_the_normal_difference():
    # Source: scipy.stats.norm. theta_j ~ N(m_j, s_j^2) and mu ~ N(10, 0.2^2) independent, so
    # theta_j - mu ~ N(m_j - 10, s_j^2 + 0.04) and P(|theta_j - mu| > a) = norm.cdf(-a) + norm.sf(a) of it.
    m, s = np.array([10.0, 10.6, 9.1]), np.array([0.5, 0.3, 0.8])
    th = _normal_draws(2, m, s)
    C, D, J = th.shape
    mu = 10.0 + 0.2 * np.random.default_rng(3).standard_normal((C, D))
    fit = make_idata(th, mu, np.ones((C, D)))
    t = compute(fit, pooling.ReportOptions(allowed_bias=0.7)).table
    sd = np.sqrt(s**2 + 0.04)
    ref = stats.norm.cdf(-0.7, m - 10.0, sd) + stats.norm.sf(0.7, m - 10.0, sd)
    S = C * D
    assert np.all(np.abs(t["p_bias_over"] - ref) < Z * np.sqrt(ref * (1 - ref) / S)), (t["p_bias_over"].to_numpy(), ref)


@pytest.fixture(scope="module")
def schools_heavy():
    # Source: the eight-schools estimates and standard errors (Rubin 1981, J. Educational Statistics 6(4),
    # Table 2; from memory, cross-checked in tests/test_eight_schools.py), fitted with the heavy-tailed model.
    data = pd.DataFrame({"school": list("ABCDEFGH"), "y": SCHOOLS_Y, "se": SCHOOLS_SE})
    st = pooling.from_estimates(data, "school", "y", "se")
    settings = pooling.Settings(chains=2, warmup=300, draws=1000, max_draws=1000, seed=11)
    return pooling.fit(st, Model(within="known", between=HeavyBetween()), settings, progress=False)


def _heavy_definitions(fit, se):
    """The heavy model's per-group answers against their definitions (sources in the next tests)."""
    t = compute(fit).table
    tau, lam, df = fit.draws("tau"), fit.draws("lambda"), fit.draws("df")
    se2 = np.asarray(se, dtype=float) ** 2
    w = se2 / (se2 + (tau * tau)[:, None] / lam)
    np.testing.assert_allclose(t["shrink_weight"], w.mean(axis=0), rtol=1e-9)
    lo, hi = np.quantile(w, [0.025, 0.975], axis=0)  # numpy's quantile, linear interpolation (its default)
    np.testing.assert_allclose(t["shrink_low_95"], lo, rtol=1e-9)
    np.testing.assert_allclose(t["shrink_high_95"], hi, rtol=1e-9)
    finite = np.isfinite(df)
    cut = np.zeros_like(df)
    cut[finite] = stats.gamma.ppf(0.05, df[finite] / 2, scale=2 / df[finite])
    out = lam < cut[:, None]
    np.testing.assert_allclose(t["p_outlying"], out.mean(axis=0), atol=2.5 / len(df))  # a draw at the cut, to rounding
    np.testing.assert_allclose(t["tail_weight"], lam.mean(axis=0), rtol=1e-12)
    return out


def test_heavy_answers_of_a_single_group():
    # The same definitions as below for one group alone (allowed with a proper prior on tau): written for
    # answers.py:117 `heavy = lam.shape[0] > 1`, which took one group's lambda for the normal model's.
    data = pd.DataFrame({"school": ["A"], "y": SCHOOLS_Y[:1], "se": SCHOOLS_SE[:1]})
    st = pooling.from_estimates(data, "school", "y", "se")
    settings = pooling.Settings(chains=2, warmup=300, draws=1000, max_draws=1000, seed=12)
    model = Model(within="known", between=HeavyBetween(), tau=pooling.HalfNormal(10.0))
    fit = pooling.fit(st, model, settings, progress=False)
    _heavy_definitions(fit, SCHOOLS_SE[:1])


def test_heavy_shrinkage_weight_and_outlying_probability_follow_their_definitions(schools_heavy):
    # Source (definitions, results.COLUMNS): with theta_j ~ N(mu, tau^2 / lambda_j) the shrinkage weight is
    # w_j = se_j^2 / (se_j^2 + tau^2 / lambda_j) (BDA3 section 5.4's weight with the conditional prior variance
    # tau^2 / lambda_j of the t as a scale mixture, section 17.2; from memory), and a group is outlying in a draw
    # when lambda_j is below the 5% point of its prior Gamma(df/2, rate df/2) at the draw's df (scipy.stats.gamma;
    # no group is outlying at df = inf, where lambda_j = 1). Both are computed here with numpy and scipy from the
    # run's draws in the user's units and must equal the table to rounding.
    # Written for answers.py:137 `t = tau2 * lam[j]` (lambda multiplying the between-group variance), :171
    # `heavy = None` (the interval of w taken from the normal model's formula) and a count of 2 per outlying draw.
    out = _heavy_definitions(schools_heavy, SCHOOLS_SE)
    assert 0 < out.mean() < 0.2  # the check has something to count


def _labs() -> pooling.GroupStats:
    # invented data (common practice: the property checked is a definition applied to the run's own draws)
    rng = np.random.default_rng(0)
    rows = []
    for j in range(12):
        method = "A" if j % 3 else "B"
        theta = 50 + (0.8 if method == "B" else 0.0) + rng.normal(0, 0.2)
        rows += [(f"L{j:02d}", method, theta + rng.normal(0, 0.3)) for _ in range(3 + j % 3)]
    return pooling.from_frame(pd.DataFrame(rows, columns=["lab", "method", "y"]), "lab", "y", group_columns=["method"])


def test_bias_with_a_predictor_is_taken_about_the_groups_own_level():
    # Source (definition, results.COLUMNS "bias_mean"): with a categorical predictor the bias of group j in a draw
    # is theta_j - (mu + beta_level(j)), beta 0 for the reference level; its interval is numpy's quantile (linear
    # interpolation, its default) of those differences and P(|bias| > a) their fraction, from the run's draws.
    # Written for answers.py:102 `c -= X[j, k] * beta[k]` (the centre moved the wrong way from mu).
    st = _labs()
    settings = pooling.Settings(chains=2, warmup=200, draws=300, max_draws=300, seed=5)
    fit = pooling.fit(st, Model(predictors=(Category("method"),)), settings, progress=False, without=False)
    o = pooling.ReportOptions(level=0.9, allowed_bias=0.3)
    res = compute(fit, o)
    t = res.table
    theta, mu, beta = fit.draws("theta"), fit.draws("mu"), fit.draws("beta")
    assert beta.shape[1] == 1 and abs(beta[:, 0].mean()) > 0.3  # level B sits apart from the reference A
    in_b = (t["level"] == "B").to_numpy()
    d = theta - mu[:, None] - np.outer(beta[:, 0], in_b)
    lo, hi = np.quantile(d, [0.05, 0.95], axis=0)
    np.testing.assert_allclose(t[res.col("bias_low")], lo, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(t[res.col("bias_high")], hi, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(t["p_bias_over"], np.mean(np.abs(d) > 0.3, axis=0), atol=1.5 / len(mu))


@pytest.mark.parametrize("lower,upper", [(99.85, 100.15), (101.0, None)], ids=["two limits", "lower limit"])
def test_summary_mode_outside_interval_when_most_measurements_fall_outside(lower, upper):
    # Source: numpy.quantile (linear, its default) of f = Phi((L - theta)/sigma) + Phi((theta - U)/sigma)
    # (scipy.special.ndtr) on the full run's draws, which summary mode draws identically (same seed and sweeps,
    # see tests/test_summary_mode.py); summary mode finds each end within its stated error (one histogram bin,
    # `outside_limit_error`). Limits 0.3 wide about data with sigma near 2 put f near 0.9, where summary mode
    # histograms log(f / (1 - f)) with 1 - f formed as Phi((U - theta)/sigma) - Phi((L - theta)/sigma).
    # A lower limit alone above most groups' means does the same with one tail. Written for answers.py:66
    # `g = ... + pa` (the inside probability formed with the wrong sign) and `... else 2.0` (the upper tail's
    # complement without an upper limit).
    from scipy.special import ndtr

    from tests.test_summary_mode import KEEP, LEVEL, PROBS, SETTINGS, _stats

    stats_ = _stats(40, 1)
    model = Model(within="separate")
    o = pooling.ReportOptions(level=LEVEL, lower=lower, upper=upper)
    full = pooling.fit(stats_, model, SETTINGS, summary=False)
    part = pooling.fit(stats_, model, SETTINGS, summary=True, options=o, keep=KEEP)
    t = compute(part, o).table
    theta, sigma = full.draws("theta"), full.draws("sigma")
    f = ndtr((o.lower - theta) / sigma) + (ndtr((theta - o.upper) / sigma) if upper is not None else 0.0)
    assert np.median(f) > 0.55  # the branch f >= 1/2 is what is checked
    q = np.quantile(f, PROBS, axis=0)
    bound = t["outside_limit_error"].to_numpy()
    others = np.setdiff1d(np.arange(len(t)), part.kept_index)
    assert np.median(bound[others]) < 0.02  # the stated error is small enough to mean something
    for side, col in enumerate(("low", "high")):
        got = t[f"outside_{col}_90"].to_numpy()
        assert np.all(np.abs(got - q[side]) <= bound + 1e-12), col
