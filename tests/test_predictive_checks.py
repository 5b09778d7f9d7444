"""The within-group sd check of results.model_checks against the sampling distribution of a sample sd.

For n normal values with sd sigma, (n - 1) s^2 / sigma^2 ~ chi-square(n - 1) (Cochran's theorem; any statistics
handbook). The check replicates a group's sd once per checked draw s with that draw's sigma_j, so the
replicated sds of group j have the mixture distribution F_j(x) = mean_s F_chi2((n_j - 1) x^2 / sigma_js^2; n_j - 1),
computed here with scipy.stats.chi2 over the same sigma draws (given the sigma draws the replicates are
independent, so F_j is exactly their distribution). The check's interval ends, median and p-value are empirical
figures of m = 400 replicates: at the true q-quantile the empirical CDF has standard deviation at most
sqrt(q (1 - q) / m), and numpy's linear quantile sits about 1/m inside the true one on average (the k-th of m
order statistics has mean CDF k / (m + 1)). So, per group, F_j at a reported q-quantile lies within 6 of those
standard deviations of q, plus 1/m (with 30 groups x 4 figures a false alarm has probability ~1e-7); and the
mean of F_j over the G groups within 4 standard deviations / sqrt(G), plus 1/m (~1e-4 for the 4 figures). The
seed is fixed, so the test is deterministic; these bounds say how unlikely a failure of correct code is.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import pooling
from pooling import results as R


@pytest.fixture(scope="module")
def fit():
    # invented: 30 machines, 3 to 8 measurements each, spreads that differ from machine to machine
    g = np.random.default_rng(41)
    rows = []
    for j in range(30):
        sd = 0.5 + 1.5 * g.random()
        for y in g.normal(20.0 + g.normal(0, 1.0), sd, g.integers(3, 9)):
            rows.append((f"m{j}", y))
    st = pooling.from_frame(pd.DataFrame(rows, columns=["machine", "y"]), "machine", "y")
    settings = pooling.Settings(chains=2, draws=300, warmup=300, seed=8, max_draws=300)
    return pooling.fit(st, pooling.Model(), settings, progress=False)


@pytest.mark.parametrize("level", [0.9, 0.5])
def test_within_sd_check_matches_the_chi_square_mixture(fit, level):
    p, raw = fit.problem, fit.raw
    out = R.model_checks(p, raw, seed=13, level=level)
    sd = out["sd"]
    m = out["draws"]
    assert m == 400 and sd["level"] == level
    S = raw.mu.size
    sig = raw.sigma.reshape(S, p.J)[R._thin(S)]  # the checked draws' sigma_j, internal units
    G = len(sd["groups"])
    sdev = lambda q: np.sqrt(q * (1 - q) / m)  # noqa: E731
    lo_q, hi_q = (1 - level) / 2, (1 + level) / 2
    k = p.scale  # the check reports in the user's units
    got = {"low": [], "high": [], "median": [], "p": []}
    for i, j in enumerate(sd["groups"]):
        df = p.n[j] - 1

        def F(x, j=j, df=df):
            return float(np.mean(stats.chi2.cdf(df * x**2 / sig[:, j] ** 2, df)))

        got["low"].append(F(sd["low"][i] / k) - lo_q)
        got["high"].append(F(sd["high"][i] / k) - hi_q)
        got["median"].append(F(sd["median"][i] / k) - 0.5)
        upper = 1 - F(sd["observed"][i] / k)
        got["p"].append(sd["p_value"][i] - upper)
        for name, q in (("low", lo_q), ("high", hi_q), ("median", 0.5), ("p", max(min(upper, 0.5), 1e-3))):
            assert abs(got[name][-1]) <= 6 * sdev(q) + 1 / m, (j, name, got[name][-1])
        # the observed sd is the group's own sample sd
        assert sd["observed"][i] == pytest.approx(np.sqrt(p.m2[j] / df) * k, rel=1e-12)
    for name, q in (("low", lo_q), ("high", hi_q), ("median", 0.5)):
        assert abs(np.mean(got[name])) <= 4 * sdev(q) / np.sqrt(G) + 1 / m, (name, np.mean(got[name]))
    inside = (sd["observed"] >= sd["low"]) & (sd["observed"] <= sd["high"])
    assert sd["outside"] == int(np.sum(~inside))


def test_the_default_level_is_ninety_percent(fit):
    # the run's checks are made at the default level (results.compute): 90 %
    a = R.model_checks(fit.problem, fit.raw, seed=13)
    b = R.model_checks(fit.problem, fit.raw, seed=13, level=0.9)
    assert a["sd"]["level"] == 0.9
    np.testing.assert_array_equal(a["sd"]["low"], b["sd"]["low"])
    np.testing.assert_array_equal(a["sd"]["high"], b["sd"]["high"])


def test_known_standard_errors_have_no_within_sd_check():
    # with known standard errors there are no measurements to replicate: the sd check is left out, the other two
    # are made, even when the estimates' sample sizes are given (invented: eight sites, five values each)
    frame = pd.DataFrame(
        {
            "site": [f"s{j}" for j in range(8)],
            "est": [1.2, 0.4, 2.0, 1.1, 0.9, 1.6, 0.2, 1.3],
            "se": [0.3] * 8,
            "n": [5] * 8,
        }
    )
    st = pooling.from_estimates(frame, "site", "est", "se", n="n")
    fit = pooling.fit(st, pooling.Model(within="known"), pooling.Settings(chains=2, draws=200, warmup=200, seed=3))
    out = R.model_checks(fit.problem, fit.raw, seed=5)
    assert "sd" not in out and {"spread", "extreme"} <= out.keys()
