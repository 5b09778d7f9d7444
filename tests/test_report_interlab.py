"""The interlaboratory comparators against outside references: one-way ANOVA against statsmodels,
the method-of-moments variance components against REML and against their expectation, z-score
signals at the ISO 13528 limits, and ISO 13528 Algorithm A against the normal distribution."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import pooling
from pooling.report import algorithm_a, oneway_anova, z_scores, z_signal

sm = pytest.importorskip("statsmodels")
from statsmodels.datasets import grunfeld  # noqa: E402
from statsmodels.formula.api import mixedlm, ols  # noqa: E402
from statsmodels.stats.anova import anova_lm  # noqa: E402


def _anova_of(df: pd.DataFrame, group: str, value: str) -> dict:
    st = pooling.from_frame(df, group, value)  # the statistics path the reporter really uses
    return oneway_anova(st.n, st.mean, st.m2, st.mean_lo)


@pytest.fixture(scope="module")
def grunfeld_frame() -> pd.DataFrame:
    # Grunfeld's investment data as shipped with statsmodels: 11 firms x 20 years (balanced).
    return grunfeld.load_pandas().data[["firm", "invest"]].copy()


@pytest.mark.parametrize("unbalanced", [False, True])
def test_oneway_anova_matches_statsmodels_anova_lm(grunfeld_frame, unbalanced):
    # Source: statsmodels.stats.anova.anova_lm on ols("invest ~ C(firm)") (sums of squares, df,
    # F and its p-value), and scipy.stats.f_oneway for F and p. Both are exact computations, so the
    # tolerance is floating-point round-off (1e-9 relative).
    df = grunfeld_frame
    if unbalanced:  # drop a different number of years from each firm
        keep = np.concatenate(
            [np.flatnonzero(df["firm"] == f)[: 20 - 2 * i] for i, f in enumerate(df["firm"].unique())]
        )
        df = df.iloc[np.sort(keep)].reset_index(drop=True)
    ours = _anova_of(df, "firm", "invest")
    ref = anova_lm(ols("invest ~ C(firm)", data=df).fit())
    assert ours["df_between"] == ref.loc["C(firm)", "df"]
    assert ours["df_within"] == ref.loc["Residual", "df"]
    np.testing.assert_allclose(ours["ss_between"], ref.loc["C(firm)", "sum_sq"], rtol=1e-9)
    np.testing.assert_allclose(ours["ss_within"], ref.loc["Residual", "sum_sq"], rtol=1e-9)
    np.testing.assert_allclose(ours["f"], ref.loc["C(firm)", "F"], rtol=1e-9)
    np.testing.assert_allclose(ours["p_value"], ref.loc["C(firm)", "PR(>F)"], rtol=1e-6)
    groups = [g["invest"].to_numpy() for _, g in df.groupby("firm", sort=False)]
    f, p = stats.f_oneway(*groups)
    np.testing.assert_allclose([ours["f"], ours["p_value"]], [f, p], rtol=1e-6)


def test_balanced_moment_estimates_equal_reml(grunfeld_frame):
    # Source: statsmodels MixedLM (REML) on invest ~ 1 with a random intercept per firm. For a
    # balanced one-way layout the REML estimates equal the ANOVA (method of moments) estimates
    # whenever the latter are positive (Searle, Casella and McCulloch 1992, Variance Components,
    # ch. 4; stated from memory). Tolerance 1e-3 relative: the optimiser's convergence, not exact
    # arithmetic (observed agreement is about 3e-5).
    ours = _anova_of(grunfeld_frame, "firm", "invest")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reml = mixedlm("invest ~ 1", grunfeld_frame, groups=grunfeld_frame["firm"]).fit(reml=True)
    np.testing.assert_allclose(ours["between_var"], float(reml.cov_re.iloc[0, 0]), rtol=1e-3)
    np.testing.assert_allclose(ours["within_var"], float(reml.scale), rtol=1e-3)
    assert ours["n0"] == 20.0
    np.testing.assert_allclose(ours["reproducibility_sd"] ** 2, ours["between_var"] + ours["within_var"], rtol=1e-14)


def test_unbalanced_moment_estimate_is_unbiased():
    # Source: for unequal n_j, E[MS_between] = sigma^2 + n0 tau^2 with
    # n0 = (N - sum n_j^2 / N) / (J - 1) (ISO 5725-2's n-bar; Searle et al. 1992, from memory), so
    # (MS_between - MS_within) / n0 is unbiased for tau^2. Simulated with tau^2 = 4, sigma^2 = 9;
    # tolerance: 4 Monte Carlo standard errors of the mean over R replicates.
    rng = np.random.default_rng(12)
    n = np.array([2, 3, 3, 5, 8, 12, 20, 2, 4, 6])
    tau2, sig2, R = 4.0, 9.0, 4000
    est = np.empty(R)
    msw = np.empty(R)
    for r in range(R):
        theta = 50 + np.sqrt(tau2) * rng.standard_normal(len(n))
        ybar = np.empty(len(n))
        m2 = np.empty(len(n))
        for j, nj in enumerate(n):
            y = theta[j] + np.sqrt(sig2) * rng.standard_normal(nj)
            ybar[j] = y.mean()
            m2[j] = np.sum((y - ybar[j]) ** 2)
        a = oneway_anova(n, ybar, m2)
        est[r] = (a["ms_between"] - a["ms_within"]) / a["n0"]
        msw[r] = a["ms_within"]
    assert abs(est.mean() - tau2) < 4 * est.std(ddof=1) / np.sqrt(R)
    assert abs(msw.mean() - sig2) < 4 * msw.std(ddof=1) / np.sqrt(R)


def test_anova_keeps_digits_near_1e9():
    # Source: common practice (the same values shifted by a constant give the same ANOVA). Data
    # near 1e9 with a spread of 0.1 must not lose the sums of squares.
    rng = np.random.default_rng(1)
    g = np.repeat(["a", "b", "c", "d"], 6)
    y = rng.normal(0.0, 0.1, g.size) + np.repeat([0.0, 0.05, -0.02, 0.1], 6)
    small = _anova_of(pd.DataFrame({"g": g, "y": y}), "g", "y")
    big = _anova_of(pd.DataFrame({"g": g, "y": y + 1e9}), "g", "y")
    np.testing.assert_allclose(big["ss_within"], small["ss_within"], rtol=1e-6)
    np.testing.assert_allclose(big["ss_between"], small["ss_between"], rtol=1e-6)


def test_anova_needs_replication():
    assert oneway_anova(np.array([1, 1, 1]), np.array([1.0, 2.0, 3.0]), np.zeros(3)) is None


# ---------------------------------------------------------------------------------------------
# z-scores


def test_z_signals_at_the_iso_13528_limits():
    # Source: ISO 13528:2015, 9.4.1 (from memory): |z| <= 2.0 acceptable, no signal;
    # 2.0 < |z| < 3.0 warning signal; |z| >= 3.0 action signal. Checked on both sides of each
    # limit and for negative z. (The issue text writes the warning limit as |z| >= 2; the standard
    # puts |z| = 2.0 exactly among the acceptable results, and that is what is implemented.)
    z = np.array([0.0, 1.999, 2.0, 2.001, 2.999, 3.0, 3.001, -1.999, -2.0, -2.001, -2.999, -3.0, -3.001, 12.0, np.nan])
    want = [
        "none",
        "none",
        "none",
        "warning",
        "warning",
        "action",
        "action",
        "none",
        "none",
        "warning",
        "warning",
        "action",
        "action",
        "action",
        "",
    ]
    assert list(z_signal(z)) == want


def test_z_scores_with_a_given_assigned_value_and_sigma_pt():
    # Source: ISO 13528:2015, 9.4: z = (x - x_pt) / sigma_pt. sigma_pt = 0.5 and x_pt = 100 make
    # every z below exact in binary floating point, so the signals at exactly 2 and 3 are tested.
    x = np.array([100.0, 101.0, 99.0, 101.5, 98.5, 101.25, 97.0])
    z, sig, basis = z_scores(x, assigned=100.0, sigma_pt=0.5)
    np.testing.assert_array_equal(z, [0, 2, -2, 3, -3, 2.5, -6])
    assert list(sig) == ["none", "none", "none", "action", "action", "warning", "action"]
    assert basis["assigned_from"] == "given" and basis["sigma_pt_from"] == "given"


def test_algorithm_a_constants_and_consistency_at_the_normal():
    # Source: scipy.stats.norm. Algorithm A (ISO 13528:2015 Annex C.3, from memory) winsorises at
    # x* +- 1.5 s* and multiplies the sd of the winsorised values by 1.134, which is
    # 1 / sd(clip(Z, -1.5, 1.5)) for standard normal Z, so s* estimates sigma at the normal.
    c = 1.5
    win_var = (2 * stats.norm.cdf(c) - 1) - 2 * c * stats.norm.pdf(c) + 2 * c * c * stats.norm.sf(c)
    # the standard prints the factor to three decimals; 1 / sqrt(win_var) = 1.13339...
    assert abs(1 / np.sqrt(win_var) - 1.134) < 1e-3
    # On a large normal sample the robust mean and sd approach (mu, sigma); tolerance: 5 standard
    # errors, with the sd of a normal sample's sd about sigma / sqrt(2n) inflated by 1.2 for the
    # robust estimator's lower efficiency (common practice).
    n = 200_000
    x = 7.0 + 2.0 * np.random.default_rng(3).standard_normal(n)
    xs, ss = algorithm_a(x)
    assert abs(xs - 7.0) < 5 * 1.1 * 2.0 / np.sqrt(n)
    assert abs(ss - 2.0) < 5 * 1.2 * 2.0 / np.sqrt(2 * n)
    # and at its fixed point the two update formulas reproduce themselves
    clip = np.clip(x, xs - 1.5 * ss, xs + 1.5 * ss)
    np.testing.assert_allclose([clip.mean(), 1.134 * clip.std(ddof=1)], [xs, ss], rtol=1e-9)


def test_algorithm_a_resists_an_outlier():
    # Source: ISO 13528:2015 Annex C.3 (from memory): Algorithm A is a robust estimator, so one
    # wild result moves x* far less than it moves the plain mean.
    x = np.array([10.1, 9.8, 10.0, 10.3, 9.9, 10.2, 10.0, 9.7, 10.1, 55.0])
    xs, ss = algorithm_a(x)
    assert abs(xs - 10.0) < 0.2 and ss < 0.6
    assert abs(x.mean() - 10.0) > 4


# ---------------------------------------------------------------------------------------------
# the random-effects comparator for estimates with standard errors (known structure)


def test_random_effects_dl_matches_statsmodels():
    # Source: statsmodels.stats.meta_analysis.combine_effects(method_re="dl"), a general-purpose
    # implementation of DerSimonian and Laird (1986). Heterogeneous estimates (invented, seeded), so
    # that tau^2 > 0: statsmodels reports an untruncated tau^2, which differs from the method's
    # max(0, .) only when Q < df.
    from statsmodels.stats.meta_analysis import combine_effects

    from pooling.report.interlab import random_effects_dl

    g = np.random.default_rng(4)
    for offset in (0.0, 1e9):
        se = g.uniform(0.5, 2.0, 12)
        x = offset + g.normal(0.0, 2.5, 12) + g.normal(0.0, 1.0, 12) * se
        ref = combine_effects(x - offset, se**2, method_re="dl")
        got = random_effects_dl(x, se)
        assert ref.tau2 > 0 and not got["truncated"]
        assert got["between_sd"] ** 2 == pytest.approx(ref.tau2, rel=1e-10)
        assert got["consensus"] - offset == pytest.approx(ref.mean_effect_re, rel=1e-9, abs=1e-6 if offset else 0)
        assert got["consensus_se"] == pytest.approx(ref.sd_eff_w_re, rel=1e-10)
        assert got["q"] == pytest.approx(ref.q, rel=1e-10)
        assert got["i2"] == pytest.approx(ref.i2, rel=1e-10)
        assert got["p_value"] == pytest.approx(stats.chi2.sf(ref.q, 11), rel=1e-10)


def test_random_effects_dl_on_the_eight_schools():
    # Source: Rubin (1981) eight schools estimates and standard errors, and the pooled estimate
    # 7.7 with standard error 4.1 quoted for them in Gelman et al., Bayesian Data Analysis (3rd ed.),
    # section 5.5 (values from memory): Q = 4.7 < 7 df, so tau^2 is truncated at 0 and the
    # random-effects consensus is the fixed-effect one.
    from pooling.report.interlab import random_effects_dl

    y = np.array([28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0])
    se = np.array([15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0])
    got = random_effects_dl(y, se)
    assert got["truncated"] and got["between_sd"] == 0.0 and got["i2"] == 0.0
    assert round(got["consensus"], 1) == 7.7 and round(got["consensus_se"], 1) == 4.1
    assert got["consensus"] == got["fixed_effect"]
    assert random_effects_dl(y[:1], se[:1]) is None


def test_known_structure_report_shows_the_random_effects_comparator(tmp_path):
    # The report of estimates with standard errors carries the comparator (summary.json, and the page when the
    # groups are labs in a round: --labs).
    import json

    from pooling import cli

    path = tmp_path / "est.csv"
    y = [28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0]
    se = [15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0]
    path.write_text("school,effect,se\n" + "".join(f"S{j},{a},{b}\n" for j, (a, b) in enumerate(zip(y, se))))
    out = tmp_path / "run"
    code = cli.main(
        [
            "fit",
            str(path),
            "--group",
            "school",
            "--estimate",
            "effect",
            "--std-error",
            "se",
            "--tau",
            "half-cauchy:10",
            "--out",
            str(out),
            "--seed",
            "1",
            "--quiet",
            "--labs",
        ]
    )
    assert code in (0, 3)
    re_ = json.loads((out / "summary.json").read_text())["interlab"]["random_effects"]
    assert round(re_["consensus"], 1) == 7.7
    assert "DerSimonian-Laird" in (out / "report.html").read_text()


def test_with_a_method_predictor_the_iso_5725_components_count_every_lab_difference(tmp_path):
    # Labs of two methods whose results differ by 1.0 (between-lab sd 0.2 within a method, repeatability sd 0.3;
    # invented data, fixed seed). ISO 5725's model y = m + B + e counts every lab-to-lab difference in B, the
    # method's too; the fit with the predictor leaves the method out of tau. The view's overall figures must be
    # those of the fit without the predictor (an identity: the same code on pooling.fit's `without`), and their
    # intervals must hold the classical estimates that ignore the method, while the within-level ones hold those
    # that remove it. Source of the classical estimates: statsmodels' REML fit of the one-way random-effects model
    # (mixedlm "y ~ 1", groups = lab) and of the same with the method as a fixed effect ("y ~ C(method)"); s_R =
    # sqrt(between-lab variance + residual variance). The posterior and REML differ by prior and method, so the
    # check is containment in the 95 % interval, not equality.
    from pooling.asked import ReportOptions
    from pooling.output import summary_dict
    from pooling.report.page import render
    from pooling.results import compute

    rng = np.random.default_rng(11)
    rows = []
    for j in range(24):
        method = "B" if j % 3 == 0 else "A"
        centre = 50.0 + (1.0 if method == "B" else 0.0) + rng.normal(0, 0.2)
        rows += [(f"L{j:02d}", method, x) for x in rng.normal(centre, 0.3, 3)]
    df = pd.DataFrame(rows, columns=["lab", "method", "y"])
    stats_ = pooling.from_frame(df, "lab", "y", group_columns=["method"])
    model = pooling.Model(predictors=(pooling.Category("method"),))
    settings = pooling.Settings(chains=2, warmup=500, draws=1500, max_draws=1500, seed=3)
    fit = pooling.fit(stats_, model, settings, progress=False)
    res = compute(fit, ReportOptions(labs=True))
    plain = compute(fit.without, ReportOptions(labs=True))
    over = res.lab["overall"]
    for key in ("consensus", "between_sd", "repeatability_sd", "reproducibility_sd", "icc", "reproducibility_limit"):
        assert over[key] == plain.lab[key], key

    def reml_sR(formula: str) -> float:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            r = mixedlm(formula, df, groups=df["lab"]).fit(reml=True)
        return float(np.sqrt(r.cov_re.iloc[0, 0] + r.scale))

    every, within = reml_sR("y ~ 1"), reml_sR("y ~ C(method)")
    assert every > within + 0.15  # the data do carry the method effect
    assert over["reproducibility_sd"]["low"] < every < over["reproducibility_sd"]["high"]
    assert res.lab["reproducibility_sd"]["high"] < every
    assert res.lab["reproducibility_sd"]["low"] < within < res.lab["reproducibility_sd"]["high"]
    # the page shows the overall figures as the components, the fit's own as within a level; summary.json keeps both
    page = render(res, "t", None)
    table = page[page.index('<section id="labs">') : page.index("</table>", page.index('<section id="labs">'))]
    assert "within a level (with the predictors)" in table and "fit of the same data without them" in page
    s = summary_dict(res, ["pooling"])["interlab"]
    assert s["overall"]["reproducibility_sd"]["low_95"] == over["reproducibility_sd"]["low"]
    assert s["reproducibility_sd"]["median"] == res.lab["reproducibility_sd"]["median"]
    # without predictors there is no separate overall view
    assert plain.lab["overall"] is None and "within a level" not in render(plain, "t", None)
