"""Per-group answers against outside references: ranks, head-to-head probabilities and the
predicted out-of-spec fraction, each computed from draws.

These tests feed the results core hand-made draws (a posterior.Fit made from them, the draws carried
into the problem's internal units as a run keeps them) whose posterior is known in closed form, so the
references are exact formulas evaluated by scipy.stats and the tolerances are Monte Carlo errors of the draws.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, stats

import pooling
from pooling.posterior import Fit
from pooling.report import group_table, pairwise, rank_probabilities
from pooling.report.groups import outside_fraction
from pooling.results import TABLE_BLOCK, compute, rank_draws
from pooling.sampler import RawDraws, Settings


def make_idata(theta, mu, tau, sigma=None, s=None, nu=None, n=None, raw_mean=None, labels=None):
    """A Fit holding draws shaped (chains, draws, ...) given in the user's units: known structure without
    sigma (every se_j = 1), separate with sigma per group, shared with one sigma; the normal between-group
    distribution. The draws are carried into the problem's internal units, as a run keeps them."""
    C, D, J = theta.shape
    labels = tuple(labels if labels is not None else [f"g{j}" for j in range(J)])
    n = np.full(J, 5) if n is None else np.asarray(n)
    raw_mean = theta.mean(axis=(0, 1)) if raw_mean is None else np.asarray(raw_mean, dtype=float)
    if sigma is None:
        st = pooling.GroupStats(labels, np.zeros(J, dtype=np.int64), raw_mean, np.zeros(J), se=np.ones(J), kind="known")
        within = "known"
    else:
        st = pooling.GroupStats(labels, n, raw_mean, (n - 1.0) * 1.0)  # raw sd 1 in every group
        within = "separate" if sigma.ndim == 3 else "shared"
    if within == "separate" and s is None:  # hyperparameters the answers do not read
        s, nu = np.ones((C, D)), np.full((C, D), 4.0)
    model = pooling.Model(
        within=within,
        between="normal",
        tau=pooling.HalfNormal(1.0),
        **({"nu": pooling.NuGrid(tuple(np.unique(nu)))} if nu is not None else {}),
    )
    p = pooling.build(st, model)
    c, k = p.center, p.scale
    raw = RawDraws(
        mu=(mu - c) / k,
        tau=tau / k,
        theta=(theta - c) / k,
        sigma=None if sigma is None else sigma / k,
        s=None if s is None else s / k,
        nu=nu,
        evals=np.ones((C, D)),
        seed=1,
        settings=Settings(chains=C, draws=D, warmup=0),
        rounds=[],
        seconds=0.0,
        final_states=[],
    )
    return Fit(p, raw, [])


def view_theta(fit):
    return fit.draws("theta")


def normal_groups(means, sds, draws, seed, chains=2):
    """Independent normal posteriors theta_j ~ N(means_j, sds_j^2), known structure."""
    rng = np.random.default_rng(seed)
    J = len(means)
    theta = means + sds * rng.standard_normal((chains, draws, J))
    mu = np.zeros((chains, draws))
    tau = np.ones((chains, draws))
    return make_idata(theta, mu, tau)


# ---------------------------------------------------------------------------------------------
# ranks


def test_rank_probabilities_are_doubly_stochastic():
    # Source: definition. In each draw the ranks are a permutation of 1..J, so the average of
    # permutation matrices has every row and every column summing to 1 (Birkhoff: a doubly
    # stochastic matrix). Exact up to floating-point summation.
    idata = normal_groups(np.linspace(0, 2, 9), np.full(9, 0.8), 3000, seed=11)
    for best in ("highest", "lowest"):
        P = rank_probabilities(idata, best=best).to_numpy()
        assert P.shape == (9, 9)
        np.testing.assert_allclose(P.sum(axis=1), 1.0, atol=1e-12)
        np.testing.assert_allclose(P.sum(axis=0), 1.0, atol=1e-12)


def test_rank_columns_match_scipy_rankdata_draw_by_draw():
    # Source: scipy.stats.rankdata (an independent ranking routine) applied to every draw; the
    # table's mean rank, P(best), P(top k) and rank interval must equal what those ranks give.
    idata = normal_groups(
        np.array([0.0, 0.3, 0.3, 1.0, -0.5, 0.1]), np.array([0.2, 1.0, 0.5, 0.4, 0.9, 0.05]), 2000, seed=3
    )
    theta = view_theta(idata)
    ref = stats.rankdata(-theta, axis=1, method="ordinal")  # 1 = highest
    t = group_table(idata, level=0.9, k=2, best="highest")
    np.testing.assert_allclose(t["rank_mean"], ref.mean(axis=0), rtol=0, atol=1e-12)
    np.testing.assert_allclose(t["p_best"], (ref == 1).mean(axis=0), atol=1e-15)
    np.testing.assert_allclose(t["p_top_k"], (ref <= 2).mean(axis=0), atol=1e-15)
    np.testing.assert_array_equal(t["rank_low_90"], np.quantile(ref, 0.05, axis=0, method="inverted_cdf"))
    np.testing.assert_array_equal(t["rank_high_90"], np.quantile(ref, 0.95, axis=0, method="inverted_cdf"))
    assert abs(t["p_best"].sum() - 1.0) < 1e-12  # exactly one best group per draw
    low = group_table(idata, best="lowest")
    ref_low = stats.rankdata(theta, axis=1, method="ordinal")
    np.testing.assert_allclose(low["rank_mean"], ref_low.mean(axis=0), atol=1e-12)
    # the rank matrix's first column is P(best) and its first k columns add to P(top k)
    P = rank_probabilities(idata).to_numpy()
    np.testing.assert_allclose(P[:, 0], t["p_best"], atol=1e-15)
    np.testing.assert_allclose(P[:, :2].sum(axis=1), t["p_top_k"], atol=1e-12)


def test_rank_matrix_with_a_tail_column_still_sums_to_one():
    # Source: definition (P(rank <= m) + P(rank > m) = 1), for the large-J form of the heat map.
    idata = normal_groups(np.linspace(0, 1, 30), np.full(30, 0.3), 1000, seed=5)
    P = rank_probabilities(idata, groups=["g29", "g0", "g7"], max_rank=10)
    assert list(P.columns)[-1] == ">10" and P.shape == (3, 11)
    np.testing.assert_allclose(P.to_numpy().sum(axis=1), 1.0, atol=1e-12)
    ranks = rank_draws(view_theta(idata))
    np.testing.assert_allclose(P.loc["g29", 1], (ranks[:, 29] == 1).mean(), atol=1e-15)


# ---------------------------------------------------------------------------------------------
# head to head


def test_pairwise_matches_the_normal_difference_formula():
    # Source: for independent theta_a ~ N(m_a, s_a^2), theta_b ~ N(m_b, s_b^2), theta_a - theta_b is
    # N(m_a - m_b, s_a^2 + s_b^2), so P(theta_a > theta_b) = Phi((m_a - m_b) / sqrt(s_a^2 + s_b^2));
    # Phi from scipy.stats.norm. Tolerance: 4.5 binomial standard errors sqrt(p(1 - p) / S) of a
    # fraction of S independent draws (the chance of a false alarm over these 6 pairs is < 1e-4).
    means = np.array([0.0, 0.4, -1.0, 2.0])
    sds = np.array([1.0, 0.5, 2.0, 0.25])
    S = 2 * 100_000
    idata = normal_groups(means, sds, S // 2, seed=2024)
    M = pairwise(idata, ["g0", "g1", "g2", "g3"]).to_numpy()
    for a in range(4):
        for b in range(4):
            if a == b:
                assert np.isnan(M[a, b])
                continue
            p = stats.norm.cdf((means[a] - means[b]) / np.hypot(sds[a], sds[b]))
            assert abs(M[a, b] - p) < 4.5 * np.sqrt(p * (1 - p) / S) + 1e-12, (a, b, M[a, b], p)
            assert abs(M[a, b] + M[b, a] - 1) < 1e-12  # continuous draws: no ties


def test_pair_differences_match_the_normal_difference_formula():
    # Source: for independent theta_a ~ N(m_a, s_a^2), theta_b ~ N(m_b, s_b^2), theta_a - theta_b is
    # N(m_a - m_b, s_a^2 + s_b^2); its quantiles from scipy.stats.norm.ppf. Tolerances: 4.5 Monte Carlo
    # standard errors of S independent draws, s / sqrt(S) for the mean and sqrt(p (1 - p) / S) / pdf(z_p) * s
    # for a sample p-quantile (the asymptotic variance of a sample quantile).
    from pooling.results import pair_differences

    means = np.array([0.0, 0.4, -1.0, 2.0])
    sds = np.array([1.0, 0.5, 2.0, 0.25])
    S = 200_000
    rng = np.random.default_rng(11)
    theta = means + sds * rng.standard_normal((S, 4))
    idx = np.array([2, 0, 3, 1])
    mean, low, high = pair_differences(theta, idx, 0.9)
    for a, ia in enumerate(idx):
        for b, ib in enumerate(idx):
            if a == b:
                assert np.isnan(mean[a, b]) and np.isnan(low[a, b]) and np.isnan(high[a, b])
                continue
            m, s = means[ia] - means[ib], np.hypot(sds[ia], sds[ib])
            assert abs(mean[a, b] - m) < 4.5 * s / np.sqrt(S)
            for got, p in ((low[a, b], 0.05), (high[a, b], 0.95)):
                z = stats.norm.ppf(p)
                se = np.sqrt(p * (1 - p) / S) / stats.norm.pdf(z) * s
                assert abs(got - (m + s * z)) < 4.5 * se, (a, b, p, got)
            # the same draws summarised by numpy: the same bits
            d = theta[:, ia] - theta[:, ib]
            assert low[a, b] == np.quantile(d, (1 - 0.9) / 2) and high[a, b] == np.quantile(d, (1 + 0.9) / 2)


def test_pairwise_refuses_an_unknown_group():
    from pooling.errors import InputError

    idata = normal_groups(np.zeros(3), np.ones(3), 100, seed=1)
    with pytest.raises(InputError, match="no group 'nope'"):
        pairwise(idata, ["g0", "nope"])


# ---------------------------------------------------------------------------------------------
# specification limits


def test_outside_fraction_is_the_normal_tail_for_fixed_parameters():
    # Source: scipy.stats.norm: for y ~ N(theta, sigma^2), P(y < L) + P(y > U) = cdf(L) + sf(U).
    theta = np.array([10.0, 12.5, 7.0, 10.0])
    sigma = np.array([1.0, 0.7, 2.5, 1e-3])
    for lower, upper in ((8.0, 13.0), (None, 11.0), (9.0, None)):
        got = outside_fraction(theta, sigma, lower, upper)
        ref = np.zeros(4)
        if lower is not None:
            ref += stats.norm.cdf(lower, loc=theta, scale=sigma)
        if upper is not None:
            ref += stats.norm.sf(upper, loc=theta, scale=sigma)
        np.testing.assert_allclose(got, ref, rtol=1e-13, atol=1e-300)


def test_outside_fraction_in_the_table_with_all_draws_equal():
    # Source: scipy.stats.norm. With every draw at the same (theta_j, sigma_j), the posterior mean
    # of the fraction and both interval ends must equal the closed form.
    C, D, J = 2, 50, 3
    th = np.broadcast_to(np.array([10.0, 11.0, 9.0]), (C, D, J)).copy()
    sg = np.broadcast_to(np.array([1.0, 0.5, 2.0]), (C, D, J)).copy()
    one = np.ones((C, D))
    idata = make_idata(th, 10 * one, one, sigma=sg, s=one, nu=5 * one)
    t = group_table(idata, lower=8.0, upper=12.0)
    ref = stats.norm.cdf(8.0, th[0, 0], sg[0, 0]) + stats.norm.sf(12.0, th[0, 0], sg[0, 0])
    for col in ("outside_mean", "outside_low_95", "outside_high_95"):
        np.testing.assert_allclose(t[col], ref, rtol=1e-12)


def test_outside_fraction_with_uncertain_theta_matches_the_predictive():
    # Source: with theta ~ N(m, v) and sigma known, y_new = theta + sigma * z is N(m, v + sigma^2),
    # so the posterior mean of P(y_new outside | theta) is norm.cdf(L; m, sqrt(v + sigma^2)) +
    # norm.sf(U; ...) (scipy.stats.norm). Tolerance: 4.5 Monte Carlo standard errors
    # sd(fraction) / sqrt(S) of S independent draws.
    rng = np.random.default_rng(77)
    C, D = 2, 100_000
    m = np.array([10.0, 11.2])
    v = np.array([0.25, 0.64])
    sig = np.array([1.0, 0.6])
    th = m + np.sqrt(v) * rng.standard_normal((C, D, 2))
    one = np.ones((C, D))
    idata = make_idata(th, 10 * one, one, sigma=np.broadcast_to(sig, (C, D, 2)).copy(), s=one, nu=5 * one)
    t = group_table(idata, lower=8.5, upper=12.0)
    f = outside_fraction(view_theta(idata), sig, 8.5, 12.0)
    mcse = f.std(axis=0, ddof=1) / np.sqrt(C * D)
    sd_pred = np.sqrt(v + sig**2)
    ref = stats.norm.cdf(8.5, m, sd_pred) + stats.norm.sf(12.0, m, sd_pred)
    assert np.all(np.abs(t["outside_mean"].to_numpy() - ref) < 4.5 * mcse), (t["outside_mean"].to_numpy(), ref, mcse)


def test_outside_fraction_with_uncertain_sigma_is_a_student_t_tail():
    # Source: sigma^2 ~ Scaled-Inv-chi2(nu, s^2) with theta fixed makes y_new - theta = s * t_nu
    # (a normal scale mixture; scipy.stats.t). Tolerance: 4.5 Monte Carlo standard errors.
    rng = np.random.default_rng(8)
    C, D, nu, s = 2, 100_000, 4.0, 1.5
    sigma = np.sqrt(nu * s * s / rng.chisquare(nu, size=(C, D, 1)))
    th = np.full((C, D, 1), 20.0)
    one = np.ones((C, D))
    idata = make_idata(th, 20 * one, one, sigma=sigma, s=s * one, nu=nu * one)
    t = group_table(idata, lower=17.0, upper=24.0)
    f = outside_fraction(20.0, sigma.reshape(-1), 17.0, 24.0)
    ref = stats.t.cdf((17.0 - 20.0) / s, nu) + stats.t.sf((24.0 - 20.0) / s, nu)
    assert abs(t["outside_mean"].iat[0] - ref) < 4.5 * f.std(ddof=1) / np.sqrt(C * D)


def test_new_group_fraction_matches_numerical_integration():
    # Source: with mu, tau, nu, s fixed, a new group's measurement is y = theta_new + sigma_new z with
    # theta_new ~ N(mu, tau^2) and sigma_new^2 ~ Scaled-Inv-chi2(nu, s^2) = InvGamma(nu/2, nu s^2/2);
    # given sigma_new^2 = w, y ~ N(mu, tau^2 + w). The reference integrates the normal tails against
    # scipy.stats.invgamma with scipy.integrate.quad. Tolerance: 4.5 Monte Carlo standard errors
    # (the function reports its own, sd(fraction) / sqrt(S)).
    C, D = 2, 100_000
    mu, tau, nu, s, L, U = 50.0, 2.0, 6.0, 3.0, 44.0, 57.0
    one = np.ones((C, D))
    th = np.full((C, D, 3), mu)
    idata = make_idata(th, mu * one, tau * one, sigma=np.full((C, D, 3), s), s=s * one, nu=nu * one)
    got = compute(idata, pooling.ReportOptions(lower=L, upper=U)).new_group
    ig = stats.invgamma(a=nu / 2, scale=nu * s * s / 2)

    def tail(w):
        sd = np.sqrt(tau * tau + w)
        return (stats.norm.cdf(L, mu, sd) + stats.norm.sf(U, mu, sd)) * ig.pdf(w)

    ref, err = integrate.quad(tail, 0, np.inf, limit=200)
    assert err < 1e-8
    assert abs(got["mean"] - ref) < 4.5 * got["mc_error"], (got, ref)
    assert got["low"] <= got["mean"] <= got["high"]


def test_shrinkage_weight_is_the_posterior_mean_of_v_over_v_plus_tau2():
    # Source: definition in the issue (v_j = se_j^2 for the known structure). With tau drawn from a
    # known set of values the posterior mean is an average we can form directly.
    rng = np.random.default_rng(4)
    C, D = 2, 500
    tau = rng.uniform(0.5, 2.0, (C, D))
    th = rng.standard_normal((C, D, 2))
    idata = make_idata(th, np.zeros((C, D)), tau, raw_mean=np.array([3.0, -1.0]))
    se = np.ones(2)  # make_idata stores std_error = 1
    t = group_table(idata)
    ref = np.mean(se[None, :] ** 2 / (se[None, :] ** 2 + tau.reshape(-1, 1) ** 2), axis=0)
    np.testing.assert_allclose(t["shrink_weight"], ref, rtol=1e-12)
    mu_mean = 0.0
    np.testing.assert_allclose(t["shrink_realised"], (t["raw_mean"] - t["theta_mean"]) / (t["raw_mean"] - mu_mean))


def test_interval_blocks_cover_every_group():
    # Source: numpy's quantile (linear interpolation, its default) of each group's draws: the table's
    # interval columns, computed block by block of groups, must equal it for every group (to rounding: the
    # table computes in internal units and maps back, a few ulps apart).
    rng = np.random.default_rng(21)
    C, D, J = 2, 500, 3 * TABLE_BLOCK + 17  # several blocks and a ragged last one
    theta = rng.normal(0.0, 1.0, (C, D, J)) + np.linspace(-2, 2, J)
    sigma = np.exp(rng.normal(0.0, 0.2, (C, D, J)))
    idata = make_idata(theta, rng.normal(0, 0.1, (C, D)), np.exp(rng.normal(0, 0.1, (C, D))), sigma=sigma)
    one = group_table(idata, level=0.9, k=4, threshold=0.5, lower=-3.0, upper=3.0, allowed_bias=1.0)
    lo, hi = np.quantile(theta.reshape(C * D, J), [0.05, 0.95], axis=0)
    np.testing.assert_allclose(one["theta_low_90"].to_numpy(), lo, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(one["theta_high_90"].to_numpy(), hi, rtol=1e-12, atol=1e-15)
    slo, shi = np.quantile(sigma.reshape(C * D, J), [0.05, 0.95], axis=0)
    np.testing.assert_allclose(one["sigma_low_90"].to_numpy(), slo, rtol=1e-12)
    np.testing.assert_allclose(one["sigma_high_90"].to_numpy(), shi, rtol=1e-12)
