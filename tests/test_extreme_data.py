"""Extreme data: each case gives a correct posterior (checked) or a clear refusal.

Checks and their references:
- the `known` structure against the exact posterior by one-dimensional quadrature over tau:
  p(tau | y) ∝ p(tau) V^(1/2) prod_j (v_j + tau^2)^(-1/2) exp(-sum_j (y_j - m)^2 / (2 (v_j + tau^2))),
  1/V = sum_j 1/(v_j + tau^2), m = V sum_j y_j / (v_j + tau^2); given tau, mu ~ N(m, V) and theta_j ~
  N(w_j y_j + (1 - w_j) m, w_j v_j + (1 - w_j)^2 V) with w_j = tau^2 / (v_j + tau^2).
  Source: Gelman, Carlin, Stern, Dunson, Vehtari and Rubin, Bayesian Data Analysis, 3rd ed., section 5.4
  (the hierarchical normal model with known variances; from memory). The integral is computed here
  with numpy/scipy, independently of the sampler.
  Posterior probabilities P(x < t) are compared, not means, because with J = 3 and a flat prior the
  posterior of tau has no mean. Tolerance: 4.5 Monte Carlo standard errors, sqrt(p (1 - p) / ESS), with
  the effective sample size of the indicator draws from arviz (an outside implementation).
- rescaling: the same seed on y * 2^-997 must give exactly 2^-997 times the draws on y (the engine
  holds such data in a power-of-two unit, and power-of-two scaling is exact in floating point);
  on y * 1e-300, y * 1e300 and y + 1e12 the draws agree to the rounding of the inputs and outputs.
- sufficient statistics of huge tables against numpy's two-pass sums and pandas' groupby.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import special

import pooling
from pooling import InputError, Model, ModelError, Settings
from pooling._compat import az  # noqa: E402


def _estimates(y, se, labels=None):
    labels = labels or [f"g{j:05d}" for j in range(len(y))]
    return pooling.from_estimates(pd.DataFrame({"g": labels, "y": y, "se": se}), "g", "y", "se")


def _exact_known(y, se, tau_prior=None, grid=4001):
    """Exact posterior of the known structure on a log-tau grid: CDFs of tau, mu, theta_j and tau's quantiles."""
    y, v = np.asarray(y, float), np.asarray(se, float) ** 2

    def log_post(eta):
        out, ms, Vs = np.empty(eta.size), np.empty(eta.size), np.empty(eta.size)
        for a0 in range(0, eta.size, 256):  # blocks of the grid keep memory at 256 x J
            tau2 = np.exp(2 * eta[a0 : a0 + 256])[:, None]
            a = 1.0 / (v[None, :] + tau2)
            V = 1.0 / a.sum(axis=1)
            m = V * (a @ y)
            r = y[None, :] - m[:, None]
            out[a0 : a0 + 256] = 0.5 * np.log(V) + 0.5 * np.log(a).sum(axis=1) - 0.5 * (a * r * r).sum(axis=1)
            ms[a0 : a0 + 256], Vs[a0 : a0 + 256] = m, V
        if tau_prior is not None:
            out = out + tau_prior(np.exp(eta))
        return out + eta, ms, Vs  # + eta: the Jacobian of tau = exp(eta)

    # a coarse pass over a wide range finds where the mass is; the fine pass integrates there
    eta = np.linspace(math.log(1e-6 * se.min()), math.log(1e4 * (np.ptp(y) + se.max())), 801)
    lp, _, _ = log_post(eta)
    c = np.cumsum(np.exp(lp - lp.max()))
    c /= c[-1]
    i0, i1 = max(np.searchsorted(c, 1e-9) - 2, 0), min(np.searchsorted(c, 1 - 1e-9) + 2, eta.size - 1)
    eta = np.linspace(eta[i0], eta[i1], grid)
    lp, m, V = log_post(eta)
    w = np.exp(lp - lp.max())
    w /= np.trapezoid(w, eta)
    cw = np.concatenate([[0.0], np.cumsum(0.5 * (w[1:] + w[:-1]) * np.diff(eta))])
    tau = np.exp(eta)

    def integrate(f):
        return float(np.trapezoid(w * f, eta))

    def cdf_mu(t):
        return integrate(special.ndtr((t - m) / np.sqrt(V)))

    def cdf_theta(j, t):
        wj = tau**2 / (v[j] + tau**2)
        mean = wj * y[j] + (1 - wj) * m
        var = wj * v[j] + (1 - wj) ** 2 * V
        return integrate(special.ndtr((t - mean) / np.sqrt(var)))

    return {
        "tau": lambda t: float(np.interp(math.log(t), eta, cw)),
        "mu": cdf_mu,
        "theta": cdf_theta,
        "tau_q": lambda q: float(np.exp(np.interp(q, cw, eta))),
    }


def _check_probability(draws, p_exact, what):
    """|P_hat - P| within 4.5 Monte Carlo standard errors of the indicator's mean."""
    ind = draws.astype(float)
    p_hat = float(ind.mean())
    ess = float(az.ess(ind))
    ess = ess if math.isfinite(ess) and ess > 0 else ind.size
    se = math.sqrt(max(p_exact * (1 - p_exact), 1e-4) / ess)
    assert abs(p_hat - p_exact) < 4.5 * se, (
        f"{what}: sampled {p_hat:.4f}, exact {p_exact:.4f}, MC se {se:.4f}, ESS {ess:.0f}"
    )


def _compare_known(fit, y, se, ex, groups=(0, 1)):
    post = fit.idata.posterior
    tau, mu, theta = post["tau"].values, post["mu"].values, post["theta"].values
    for q in (0.1, 0.5, 0.9):
        t = ex["tau_q"](q)
        _check_probability(tau < t, ex["tau"](t), f"P(tau < {t:.4g})")
    for t in np.quantile(mu, [0.2, 0.5, 0.8]):
        _check_probability(mu < t, ex["mu"](t), f"P(mu < {t:.4g})")
    for j in groups:
        for t in np.quantile(theta[:, :, j], [0.25, 0.75]):
            _check_probability(theta[:, :, j] < t, ex["theta"](j, t), f"P(theta_{j} < {t:.4g})")


def _fit(stats, model, chains=4, draws=1500, warmup=500, seed=11, max_draws=None):
    return pooling.fit(
        stats,
        model,
        Settings(chains=chains, draws=draws, warmup=warmup, seed=seed, max_draws=max_draws or draws),
        progress=False,
    )


# ---------------------------------------------------------------------------------------------
# tau far below and far above the standard errors; 3 groups; many groups (known structure, exact)


@pytest.mark.parametrize("case", ["tau_far_below_se", "tau_far_above_se", "three_groups", "all_identical"])
def test_known_structure_matches_the_exact_posterior(case):
    rng = np.random.default_rng(
        {"tau_far_below_se": 1, "tau_far_above_se": 2, "three_groups": 3, "all_identical": 4}[case]
    )
    if case == "tau_far_below_se":  # tau 0.001 against standard errors near 1: strong pooling
        se = rng.uniform(0.8, 1.5, 10)
        y = rng.normal(0.0, 0.001, 10) + rng.normal(0.0, se)
    elif case == "tau_far_above_se":  # tau 1 against standard errors of 0.001: almost no pooling
        se = rng.uniform(0.5e-3, 2e-3, 10)
        y = rng.normal(5.0, 1.0, 10) + rng.normal(0.0, se)
    elif case == "three_groups":  # the fewest the flat tau prior allows; a heavy-tailed tau posterior
        se = np.array([0.5, 1.0, 2.0])
        y = np.array([-1.0, 0.7, 2.5])
    else:  # every estimate the same: tau's posterior piles up at zero
        se = np.full(6, 0.3)
        y = np.full(6, 12.5)
    fit = _fit(_estimates(y, se), Model(within="known", between="normal"))
    _compare_known(fit, y, se, _exact_known(y, se))


def test_known_structure_with_a_proper_tau_prior_on_two_groups():
    y, se = np.array([0.0, 3.0]), np.array([1.0, 1.0])
    with pytest.raises(ModelError, match="fewer than 3 groups"):
        pooling.build(_estimates(y, se), Model(within="known"))
    scale = 2.0
    fit = _fit(_estimates(y, se), Model(within="known", between="normal", tau=pooling.HalfCauchy(scale)))
    ex = _exact_known(y, se, tau_prior=lambda t: -np.log1p((t / scale) ** 2))
    _compare_known(fit, y, se, ex)


def test_many_groups_known_structure_matches_the_exact_posterior():
    """5,000 groups through the sampler (1e6 groups are checked for the statistics step below)."""
    rng = np.random.default_rng(5)
    J = 5_000
    se = rng.uniform(0.5, 2.0, J)
    y = rng.normal(3.0, 0.4, J) + rng.normal(0.0, se)
    fit = _fit(_estimates(y, se), Model(within="known", between="normal"), chains=2, draws=400, warmup=200)
    _compare_known(fit, y, se, _exact_known(y, se), groups=(0, J - 1))


# ---------------------------------------------------------------------------------------------
# rescaling: the same seed gives the rescaled posterior


def _raw_table(seed=21, J=7):
    rng = np.random.default_rng(seed)
    g, y = [], []
    for j in range(J):
        th = rng.normal(0.0, 1.0)
        for _ in range(2 + j):
            g.append(f"g{j}")
            y.append(th + rng.normal(0.0, 0.7))
    return g, np.array(y)


def _fit_frame(g, y, within="separate", seed=5):
    stats = pooling.from_frame(pd.DataFrame({"g": g, "y": y}), "g", "y")
    return stats, _fit(stats, Model(within=within), chains=2, draws=300, warmup=200, seed=seed)


@pytest.mark.parametrize("within", ["separate", "shared"])
@pytest.mark.parametrize("power", [-997, 997])
def test_power_of_two_rescaling_is_exact(within, power):
    g, y = _raw_table()
    f = 2.0**power  # 2^-997 ~ 7.5e-301 and 2^997 ~ 1.3e300
    _, base = _fit_frame(g, y, within)
    stats, scaled = _fit_frame(g, y * f, within)
    assert stats.unit != 1.0  # the data really are held in another unit
    for name in ("mu", "theta", "tau", "sigma"):
        np.testing.assert_array_equal(scaled.draws(name), base.draws(name) * f, err_msg=name)
    if within == "separate":
        np.testing.assert_array_equal(scaled.draws("nu"), base.draws("nu"))
    # the statistics the run folder reports are in the user's units
    np.testing.assert_array_equal(
        scaled.idata.constant_data["raw_mean"].values, base.idata.constant_data["raw_mean"].values * f
    )


@pytest.mark.parametrize("factor", [1e-300, 1e300])
def test_decimal_rescaling_agrees_to_input_rounding(factor):
    """y * 1e-300 rounds each value by up to half an ulp (1.1e-16 relative); the draws are a smooth
    function of the data for a fixed seed, so they agree to a small multiple of that (measured: 3e-14
    of the posterior spread). 1e-9 leaves a wide margin for accumulation over 500 sweeps, while any
    unit error would be off by a factor of order one."""
    g, y = _raw_table()
    _, base = _fit_frame(g, y)
    _, scaled = _fit_frame(g, y * factor)
    for name in ("mu", "theta", "tau", "sigma"):
        a, b = scaled.draws(name) / factor, base.draws(name)
        spread = float(np.std(b))
        assert np.max(np.abs(a - b)) < 1e-9 * spread, name


def test_offset_of_1e12_keeps_the_digits():
    """Values y + 1e12 with y on a grid of 2^-10 are exact in float64, so both fits see the same data.
    Draws near 1e12 are stored with an ulp of 2^-13 = 1.2e-4, so theta and mu agree to 2 ulps there
    (measured: half an ulp, the rounding of the output); tau and sigma carry no offset and agree to
    1e-9 relative (measured: exactly)."""
    g, y = _raw_table()
    y = np.round(y * 1024) / 1024
    _, base = _fit_frame(g, y)
    stats, shifted = _fit_frame(g, y + 1e12)
    np.testing.assert_array_equal(stats.raw_mean - 1e12 + 1e12, stats.raw_mean)
    ulp = np.spacing(1e12)
    for name in ("mu", "theta"):
        assert np.max(np.abs((shifted.draws(name) - 1e12) - base.draws(name))) <= 2 * ulp, name
    for name in ("tau", "sigma"):
        a, b = shifted.draws(name), base.draws(name)
        assert np.max(np.abs(a - b)) < 1e-9 * float(np.std(b)), name
    # the group statistics keep every digit: the spread of 1000000000000.1, .2, .3 is 0.1
    s = pooling.from_frame(pd.DataFrame({"g": ["a"] * 3, "y": [1e12 + 0.125, 1e12 + 0.25, 1e12 + 0.375]}), "g", "y")
    assert s.raw_sd[0] == 0.125


@pytest.mark.parametrize("factor", [1e-300, 1e300])
def test_command_line_at_extreme_scale_is_right_or_refused(run_cli, tmp_path, factor):
    """The run folder is either correct in the user's units or refused with one line, never wrong."""
    g, y = _raw_table()
    for name, f in (("plain", 1.0), ("scaled", factor)):
        pd.DataFrame({"g": g, "y": y * f}).to_csv(tmp_path / f"{name}.csv", index=False, float_format="%.17g")
    args = [
        "--group",
        "g",
        "--value",
        "y",
        "--quiet",
        "--chains",
        "2",
        "--draws",
        "200",
        "--warmup",
        "100",
        "--seed",
        "2",
    ]
    code, _, err = run_cli("fit", tmp_path / "scaled.csv", "--out", tmp_path / "scaled-run", *args)
    if code == 2:
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert len(lines) == 1 and "magnitude" in lines[0] and "other units" in lines[0]
        assert not (tmp_path / "scaled-run").exists()
        assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []
        return
    assert code in (0, 3), err
    code0, _, err0 = run_cli("fit", tmp_path / "plain.csv", "--out", tmp_path / "plain-run", *args)
    assert code0 in (0, 3), err0
    a = pd.read_csv(tmp_path / "scaled-run" / "groups.csv")
    b = pd.read_csv(tmp_path / "plain-run" / "groups.csv")
    for col in ("raw_mean", "raw_sd", "theta_mean", "theta_sd", "theta_low_95", "theta_high_95"):
        np.testing.assert_allclose(a[col] / factor, b[col], rtol=1e-6, err_msg=col)
    for col in ("shrink_weight", "p_best", "rank_mean"):
        np.testing.assert_allclose(a[col], b[col], rtol=1e-6, atol=1e-9, err_msg=col)


def test_store_at_extreme_scale_is_refused(tmp_path):
    from pooling.store import jobs

    g, y = _raw_table()
    pd.DataFrame({"g": g, "y": y * 1e-300}).to_csv(tmp_path / "tiny.csv", index=False, float_format="%.17g")
    with pytest.raises(InputError) as e:
        jobs.ingest_file(tmp_path / "s.store", tmp_path / "tiny.csv", "g", "y")
    assert "magnitude" in str(e.value) and "\n" not in str(e.value)
    assert not (tmp_path / "s.store").exists()


# ---------------------------------------------------------------------------------------------
# group sizes at the edges


def test_one_observation_per_group():
    g = [f"g{j}" for j in range(6)]
    y = [1.0, 2.5, 0.5, 1.7, 3.0, 2.2]
    stats = pooling.from_frame(pd.DataFrame({"g": g, "y": y}), "g", "y")
    with pytest.raises(ModelError, match="at least one group with two or more measurements"):
        pooling.build(stats, Model())
    with pytest.raises(ModelError, match="replication"):
        pooling.build(stats, Model(within="shared"))
    with pytest.raises(ModelError, match="'known' structure needs"):
        pooling.build(stats, Model(within="known"))
    # with a proper prior on s^2 the posterior is proper; it runs and stays finite (not checked further)
    fit = _fit(stats, Model(s2=pooling.Gamma(2.0, 2.0), nu=pooling.NuFixed(4.0)), chains=2, draws=300, warmup=200)
    assert np.all(np.isfinite(fit.draws("theta"))) and np.all(fit.draws("sigma") > 0)
    # single measurements with known standard errors are the known structure: exact check
    se = np.full(6, 0.8)
    _compare_known(
        _fit(_estimates(y, se), Model(within="known", between="normal")), np.array(y), se, _exact_known(np.array(y), se)
    )


def test_a_group_of_a_million_beside_groups_of_two():
    rng = np.random.default_rng(9)
    big = rng.normal(100.0, 3.0, 1_000_000)
    small = {f"s{j}": rng.normal(100.0 + rng.normal(0, 2.0), 3.0, 2) for j in range(6)}
    g = np.concatenate([np.repeat("big", big.size)] + [np.repeat(k, 2) for k in small])
    y = np.concatenate([big] + list(small.values()))
    stats = pooling.from_frame(pd.DataFrame({"g": g, "y": y}), "g", "y")
    i = stats.labels.index("big")
    # Source: numpy's two-pass mean and sum of squared deviations
    assert stats.n[i] == 1_000_000
    np.testing.assert_allclose(stats.raw_mean[i], np.mean(big), rtol=1e-14)
    np.testing.assert_allclose(stats.m2[i], np.sum((big - np.mean(big)) ** 2), rtol=1e-12)
    fit = _fit(stats, Model(), chains=4, draws=1000, warmup=300)
    th, sig = fit.draws("theta")[:, i], fit.draws("sigma")[:, i]
    # with n = 1e6 the group speaks for itself: theta | y ~ N(ybar, s^2/n) up to a shrinkage weight
    # v/(v + tau^2) of about 1e-6 (standard large-sample result for a normal mean, common practice)
    sd_exact = np.std(big, ddof=1) / math.sqrt(big.size)
    ess = float(az.ess(fit.idata.posterior["theta"].values[:, :, i]))
    assert abs(th.mean() - np.mean(big)) < 4.5 * sd_exact / math.sqrt(ess) + 1e-3 * sd_exact
    # the sd of a posterior sd estimate from ESS draws is about sd / sqrt(2 ESS)
    assert abs(th.std() / sd_exact - 1) < 4.5 / math.sqrt(2 * ess)
    # sigma's posterior: mean s within its own spread, s / sqrt(2n)
    s = np.std(big, ddof=1)
    assert abs(sig.mean() - s) < 5 * s / math.sqrt(2 * big.size)


def test_groups_with_zero_spread():
    g = ["a"] * 4 + ["b"] * 3 + ["c"] * 5 + ["d"] * 3
    y = [5.0] * 4 + [5.5, 6.0, 6.5] + [4.0] * 5 + [5.2, 5.1, 5.3]
    stats = pooling.from_frame(pd.DataFrame({"g": g, "y": y}), "g", "y")
    assert stats.m2[0] == 0.0 and stats.m2[2] == 0.0
    for within in ("separate", "shared"):
        fit = _fit(stats, Model(within=within), chains=2, draws=400, warmup=300)
        th = fit.draws("theta")
        assert np.all(np.isfinite(th)) and np.all(np.isfinite(fit.draws("sigma")))
        # a group of four identical values stays near its value: within the range of all the data
        assert 3.0 < np.median(th[:, 0]) < 7.0
    # every group without spread: no information about any within-group variance
    flat = pooling.from_frame(pd.DataFrame({"g": ["a", "a", "b", "b", "c", "c"], "y": [1.0, 1, 2, 2, 4, 4]}), "g", "y")
    for within in ("separate", "shared"):
        with pytest.raises(ModelError) as e:
            pooling.build(flat, Model(within=within))
        assert "differ" in str(e.value) or "no spread" in str(e.value)
    same = pooling.from_frame(pd.DataFrame({"g": list("aabbcc"), "y": [7.0] * 6}), "g", "y")
    with pytest.raises(ModelError):
        pooling.build(same, Model())


def test_all_groups_identical_raw_data_are_symmetric():
    """Each group holds 9, 10, 11: the data are symmetric under y -> 20 - y and under swapping groups,
    so E[theta_j | y] = E[mu | y] = 10 exactly; the sample means must agree within 4.5 MCSE."""
    g = [f"g{j}" for j in range(5) for _ in range(3)]
    y = [9.0, 10.0, 11.0] * 5
    fit = _fit(pooling.from_frame(pd.DataFrame({"g": g, "y": y}), "g", "y"), Model(), chains=4, draws=1500)
    post = fit.idata.posterior
    for name, x in (("mu", post["mu"].values), *((f"theta_{j}", post["theta"].values[:, :, j]) for j in range(5))):
        mcse = float(np.ravel(az.mcse(x))[0])
        assert abs(float(x.mean()) - 10.0) < 4.5 * mcse, (name, float(x.mean()), mcse)


# ---------------------------------------------------------------------------------------------
# a million groups: the statistics step (the sampler at this size is a benchmark, not a test)


def test_a_million_groups_statistics_step():
    rng = np.random.default_rng(13)
    J = 1_000_000
    codes = np.concatenate([np.arange(J), rng.integers(0, J, J)])  # every group at least once
    rng.shuffle(codes)
    y = rng.normal(50.0, 5.0, codes.size)
    df = pd.DataFrame({"g": "lab-" + pd.Series(codes).astype(str), "y": y})
    stats = pooling.from_frame(df, "g", "y")
    assert stats.J == J and stats.N == codes.size
    # Source: pandas groupby (count, mean, and var with ddof=0 times n for M2)
    ref = df.groupby("g", sort=False)["y"].agg(["count", "mean", "var"])  # in order of first appearance
    assert tuple(ref.index) == stats.labels
    np.testing.assert_array_equal(stats.n, ref["count"].to_numpy())
    np.testing.assert_allclose(stats.raw_mean, ref["mean"].to_numpy(), rtol=1e-13)
    m2_ref = np.nan_to_num(ref["var"].to_numpy() * (ref["count"].to_numpy() - 1))
    np.testing.assert_allclose(stats.m2, m2_ref, rtol=1e-9, atol=1e-9)
    problem = pooling.build(stats, Model())
    assert problem.J == J and np.all(np.isfinite(problem.ybar))


def test_many_groups_spanning_csv_chunks(tmp_path):
    """A CSV read in chunks of 7,000 rows, its 20,000 groups spread over every chunk, gives the same
    statistics as the whole frame at once (Chan-Golub-LeVeque merge across chunks)."""
    rng = np.random.default_rng(17)
    codes = rng.integers(0, 20_000, 60_000)
    y = rng.normal(1e9, 0.1, codes.size)  # a large offset: the merge must keep the digits
    df = pd.DataFrame({"g": np.char.add("g", codes.astype(str)), "y": y})
    df.to_csv(tmp_path / "many.csv", index=False, float_format="%.17g")
    whole = pooling.from_frame(df, "g", "y")
    chunked = pooling.read_table(tmp_path / "many.csv", "g", "y", chunk_rows=7_000)
    assert chunked.labels == whole.labels
    np.testing.assert_array_equal(chunked.n, whole.n)
    np.testing.assert_allclose(chunked.raw_mean, whole.raw_mean, rtol=1e-15)
    np.testing.assert_allclose(chunked.m2, whole.m2, rtol=1e-7, atol=1e-12)


def test_interlab_anova_is_in_user_units_at_extreme_scale():
    """The classical ANOVA comparator reads the stored statistics; at 2^-997 its standard deviations
    must be 2^-997 times those of the unscaled data (variances underflow, as any float64 would)."""
    from pooling.report import interlab

    g, y = _raw_table()
    f = 2.0**-997
    base = interlab(_fit_frame(g, y)[1])["anova"]
    scaled = interlab(_fit_frame(g, y * f)[1])["anova"]
    for k in ("grand_mean", "between_sd", "repeatability_sd", "reproducibility_sd"):
        assert scaled[k] == pytest.approx(base[k] * f, rel=1e-12), k
    for k in ("f", "p_value", "icc", "n0"):
        assert scaled[k] == pytest.approx(base[k], rel=1e-12), k


def test_interlab_posterior_components_keep_their_digits_at_extreme_scale():
    """The posterior's reproducibility sd and intra-class correlation from draws of tau and s_r near
    2^-997, where tau^2 + s_r^2 underflows to 0: they must be 2^-997 times (the ICC: equal to) those
    of the same draws unscaled. The same internal-unit draws with the scale multiplied by 2^-997 are
    that fit. Source: exact rescaling of float64 by a power of two (IEEE 754)."""
    from dataclasses import replace

    from pooling.posterior import Fit
    from pooling.report import interlab

    g, y = _raw_table()
    st, fit = _fit_frame(g, y)
    base = interlab(fit)
    f = 2.0**-997
    p = fit.problem
    scaled = interlab(Fit(replace(p, center=p.center * f, scale=p.scale * f), fit.raw, fit.misses))
    for k in ("repeatability_sd", "reproducibility_sd", "between_sd"):
        for q in ("mean", "low", "high"):
            assert scaled[k][q] == pytest.approx(base[k][q] * f, rel=1e-12), (k, q)
    for q in ("mean", "low", "high"):
        assert scaled["icc"][q] == pytest.approx(base["icc"][q], rel=1e-12), q
