"""Summary mode (pooling.summary) against full draws of the same chains.

The design makes the two modes draw the same numbers (same start, same sweeps, same Generators), so
most checks are exact or to rounding, and the interval limits are checked against each limit's
stated bound. The references are computed here, from the full-draw fit's arrays, with numpy alone
(numpy.quantile's default linear method, numpy.argsort for ranks): not with the code under test.
Both runs go through pooling.results, which must give every group's row for both.
"""

from __future__ import annotations

import csv

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import pooling
from pooling import summary
from pooling import summary_kernel as sk
from pooling.asked import PURPOSE_KEPT, ReportOptions, derived_rng
from pooling.model import build
from pooling.results import compute

LEVEL = 0.9
PROBS = [(1 - LEVEL) / 2, (1 + LEVEL) / 2]


def _stats(J: int, seed: int, known: bool = False):
    # invented data for the check (common practice: the property checked is equality of two modes)
    rng = np.random.default_rng(seed)
    if known:
        se = rng.uniform(0.5, 1.5, J)
        est = rng.normal(0.0, 1.0, J) + se * rng.normal(size=J)
        return pooling.from_estimates(
            pd.DataFrame({"g": [f"k{j:02d}" for j in range(J)], "e": est, "s": se}), "g", "e", "s"
        )
    labels, values = [], []
    for j in range(J):
        n = int(rng.integers(2, 10))
        labels += [f"g{j:02d}"] * n
        values += list(rng.normal(100.0 + rng.normal(0, 1.5), 2.0, n))
    return pooling.from_frame(pd.DataFrame({"g": labels, "y": values}), "g", "y")


SETTINGS = pooling.Settings(chains=2, warmup=60, draws=200, max_draws=200, seed=17)
KEEP = summary.SummaryOptions(sample=4, top=3)


class Part:
    """A summary-mode run with its results: the SummaryFit, its table, and the kept groups' positions."""

    def __init__(self, fit, o):
        self.fit = fit
        self.res = compute(fit, o)
        self.table = self.res.table
        self.kept = fit.kept_index
        self.idata = fit.kept.idata


@pytest.fixture(scope="module")
def separate():
    stats = _stats(40, 1)
    model = pooling.Model(within="separate")  # the default between-group distribution: heavy tails
    o = ReportOptions(level=LEVEL, k=3, threshold=100.5, lower=96.0, upper=104.0, allowed_bias=1.0)
    full = pooling.fit(stats, model, SETTINGS, summary=False)
    part = Part(pooling.fit(stats, model, SETTINGS, summary=True, options=o, keep=KEEP), o)
    return full, part, o


def _draws(fit, name):
    return fit.draws(name)


def _t2(full):
    """tau^2 / lambda_j per draw (heavy tails) or tau^2, the prior variance of theta_j in a draw."""
    tau2 = _draws(full, "tau")[:, None] ** 2
    return tau2 / _draws(full, "lambda") if full.problem.heavy else tau2


def test_same_seed_same_draws(separate):
    """Hyperparameters and the kept groups' draws are the full-draw chains' own numbers."""
    full, part, _ = separate
    # Source: the design (pooling.summary docstring): the same sweeps on the same Generators
    for name in ("mu", "tau", "s", "nu", "df"):
        np.testing.assert_array_equal(full.idata.posterior[name].values, part.idata.posterior[name].values)
    kept = part.kept
    assert 0 < len(kept) < 40 // 2  # most groups must go through the summaries, or the test checks little
    np.testing.assert_array_equal(
        full.idata.posterior["theta"].values[:, :, kept], part.idata.posterior["theta"].values
    )
    np.testing.assert_array_equal(
        full.idata.posterior["sigma"].values[:, :, kept], part.idata.posterior["sigma"].values
    )
    np.testing.assert_array_equal(
        full.idata.posterior["lambda"].values[:, :, kept], part.idata.posterior["lambda"].values
    )


def test_means_and_probabilities_match_full_draws(separate):
    full, part, o = separate
    t = part.table
    theta, sigma, mu = (_draws(full, x) for x in ("theta", "sigma", "mu"))
    v = sigma**2 / full.problem.stats.n[None, :]
    w = v / (v + _t2(full))
    from scipy.special import ndtr

    f = ndtr((o.lower - theta) / sigma) + ndtr((theta - o.upper) / sigma)
    # Means to rounding: running (Welford) means against numpy's sums over the same 400 draws differ
    # by a few ulps of the values (|theta| ~ 100, so 1e-10 absolute is far above rounding, far below MC error).
    np.testing.assert_allclose(t["theta_mean"], theta.mean(axis=0), rtol=0, atol=1e-10)
    np.testing.assert_allclose(t["theta_sd"], theta.std(axis=0, ddof=1), rtol=1e-9)
    np.testing.assert_allclose(t["sigma_mean"], sigma.mean(axis=0), rtol=1e-10)
    np.testing.assert_allclose(t["shrink_weight"], w.mean(axis=0), rtol=0, atol=1e-12)
    np.testing.assert_allclose(t["outside_mean"], f.mean(axis=0), rtol=0, atol=1e-12)
    np.testing.assert_allclose(t["bias_mean"], (theta - mu[:, None]).mean(axis=0), rtol=0, atol=1e-10)
    # Probabilities are counts of the same draws: exactly equal.
    np.testing.assert_array_equal(t["p_above"], (theta > o.threshold).mean(axis=0))
    np.testing.assert_array_equal(t["p_below"], (theta < o.threshold).mean(axis=0))
    np.testing.assert_array_equal(t["p_bias_over"], (np.abs(theta - mu[:, None]) > o.allowed_bias).mean(axis=0))
    np.testing.assert_array_equal(t["p_mean_outside"], ((theta < o.lower) | (theta > o.upper)).mean(axis=0))
    # and the full run's own table, through the same results code, agrees
    ft = compute(full, o).table
    for col in (
        "theta_mean",
        "shrink_weight",
        "p_above",
        "p_bias_over",
        "p_best",
        "p_top_k",
        "tail_weight",
        "p_outlying",
    ):
        np.testing.assert_allclose(t[col], ft[col], rtol=0, atol=1e-10, err_msg=col)


def test_top_k_and_best_exact(separate):
    """P(best) and P(top 3) equal the full-draw computation exactly."""
    full, part, _ = separate
    theta = _draws(full, "theta")
    # Source: ranks by numpy.argsort of each draw (stable, so ties would go to the earlier group)
    order = np.argsort(-theta, axis=1, kind="stable")
    ranks = np.empty_like(order)
    np.put_along_axis(ranks, order, np.arange(1, theta.shape[1] + 1)[None, :], axis=1)
    np.testing.assert_array_equal(part.table["p_best"], (ranks == 1).mean(axis=0))
    np.testing.assert_array_equal(part.table["p_top_k"], (ranks <= 3).mean(axis=0))
    kept = part.kept
    np.testing.assert_array_equal(part.fit.acc.ranks.reshape(-1, len(kept)), ranks[:, kept])
    # mean rank: exact for kept groups, within its stated bound for the others
    exact_mean = ranks.mean(axis=0)
    err = np.abs(part.table["rank_mean"].to_numpy() - exact_mean)
    assert np.all(err <= part.table["rank_mean_error"].to_numpy() + 1e-9)
    assert np.all(err[kept] < 1e-9)
    # Source: the inverted empirical CDF (numpy.quantile method 'inverted_cdf'), the reporter's rank interval
    lo, hi = np.quantile(ranks[:, kept], PROBS, axis=0, method="inverted_cdf")
    np.testing.assert_array_equal(part.table["rank_low_90"].to_numpy()[kept].astype(int), lo)
    np.testing.assert_array_equal(part.table["rank_high_90"].to_numpy()[kept].astype(int), hi)


def test_interval_limits_within_their_stated_error(separate):
    full, part, o = separate
    t = part.table
    theta, sigma, mu = (_draws(full, x) for x in ("theta", "sigma", "mu"))
    v = sigma**2 / full.problem.stats.n[None, :]
    from scipy.special import ndtr

    exact = {  # Source: numpy.quantile, default linear method (Hyndman and Fan type 7), on the same draws
        "theta": np.quantile(theta, PROBS, axis=0),
        "sigma": np.quantile(sigma, PROBS, axis=0),
        "shrink": np.quantile(v / (v + _t2(full)), PROBS, axis=0),
        "outside": np.quantile(ndtr((o.lower - theta) / sigma) + ndtr((theta - o.upper) / sigma), PROBS, axis=0),
        "bias": np.quantile(theta - mu[:, None], PROBS, axis=0),
    }
    sd = t["theta_sd"].to_numpy()
    for name, q in exact.items():
        bound = t[f"{name}_limit_error"].to_numpy()
        for side, col in enumerate(("low", "high")):
            got = t[f"{name}_{col}_90"].to_numpy()
            # the stated error of the method: at most one histogram bin (rounding of bin edges aside)
            assert np.all(np.abs(got - q[side]) <= bound + 1e-12), (name, col)
        assert np.all(bound[part.kept] == 0)
    # The bound must be tight enough to mean something: one bin of a grid of +-(z + 2.5) warm-up sds
    # cut in 64 is about 0.13 sd, so a theta bound above 0.5 sd would say the grid was misplaced.
    others = np.setdiff1d(np.arange(len(t)), part.kept)
    assert np.median(t["theta_limit_error"].to_numpy()[others] / sd[others]) < 0.5


@pytest.mark.parametrize("within", ["shared", "known"])
def test_shared_and_known_exact_parts(within):
    """For shared and known, the shrinkage interval (and shared sigma) come exactly from hyperparameter draws."""
    stats = _stats(30, 2, known=within == "known")
    model = pooling.Model(within=within, between="normal")  # with heavy tails the weight has no such shortcut
    o = ReportOptions(level=LEVEL, k=2, best="lowest")
    full = pooling.fit(stats, model, SETTINGS, summary=False)
    part = Part(pooling.fit(stats, model, SETTINGS, summary=True, options=o, keep=KEEP), o)
    t = part.table
    theta, tau = _draws(full, "theta"), _draws(full, "tau")
    if within == "shared":
        sig = _draws(full, "sigma")
        v = sig[:, None] ** 2 / stats.n[None, :]
        np.testing.assert_allclose(t["sigma_low_90"], np.quantile(sig, PROBS[0]), rtol=1e-14)
        np.testing.assert_allclose(t["sigma_high_90"], np.quantile(sig, PROBS[1]), rtol=1e-14)
    else:
        v = np.broadcast_to(stats.raw_se[None, :] ** 2, theta.shape)
    w = v / (v + tau[:, None] ** 2)
    # Source: numpy.quantile of the per-draw weights; equal to rounding (1e-12 absolute on a weight in [0, 1])
    np.testing.assert_allclose(t["shrink_low_90"], np.quantile(w, PROBS[0], axis=0), rtol=0, atol=1e-12)
    np.testing.assert_allclose(t["shrink_high_90"], np.quantile(w, PROBS[1], axis=0), rtol=0, atol=1e-12)
    assert np.all(t["shrink_limit_error"] == 0)
    # best = lowest: P(best) is the share of draws where the group has the smallest theta
    np.testing.assert_array_equal(t["p_best"], np.bincount(np.argmin(theta, axis=1), minlength=30) / theta.shape[0])


@pytest.mark.parametrize("within", ["shared", "known"])
def test_heavy_tail_weights_from_their_histogram(within):
    """With heavy tails (the default) lambda_j moves each group's weight in every draw, so shared and known
    summarise the weight by its histogram too: finite limits, each within its stated error of the exact one."""
    stats = _stats(30, 3, known=within == "known")
    model = pooling.Model(within=within)  # the default between-group distribution: heavy tails
    o = ReportOptions(level=LEVEL, k=2)
    full = pooling.fit(stats, model, SETTINGS, summary=False)
    part = Part(pooling.fit(stats, model, SETTINGS, summary=True, options=o, keep=KEEP), o)
    t = part.table
    if within == "shared":
        v = _draws(full, "sigma")[:, None] ** 2 / stats.n[None, :]
    else:
        v = np.broadcast_to(stats.raw_se[None, :] ** 2, (full.raw.mu.size, 30))
    w = v / (v + _t2(full))
    bound = t["shrink_limit_error"].to_numpy()
    assert np.all(np.isfinite(bound)) and np.all(bound[part.kept] == 0)
    for side, col in enumerate(("low", "high")):
        # Source: numpy.quantile (default linear method) of the per-draw weights of the full run; the summary's
        # limit may differ by at most its stated error (one histogram bin; 1e-12 for the rounding of bin edges)
        got = t[f"shrink_{col}_90"].to_numpy()
        assert np.all(np.abs(got - np.quantile(w, PROBS[side], axis=0)) <= bound + 1e-12), col
    # the bound means something: a bin is a small part of the weight's range
    assert np.median(bound) < 0.1


def test_same_results_whatever_the_threads():
    stats = _stats(25, 3)
    o = ReportOptions(level=LEVEL, threshold=100.0)
    runs = [
        Part(
            pooling.fit(
                stats,
                pooling.Model(),
                pooling.Settings(chains=3, warmup=40, draws=80, max_draws=80, seed=5, threads=th),
                summary=True,
                options=o,
                keep=KEEP,
            ),
            o,
        )
        for th in (1, 3)
    ]
    pd.testing.assert_frame_equal(runs[0].table, runs[1].table, check_exact=True)
    np.testing.assert_array_equal(runs[0].idata.posterior["theta"].values, runs[1].idata.posterior["theta"].values)


def test_histogram_quantiles_against_numpy():
    """The histogram quantile on its own, for a symmetric and a skewed sample, beyond the grid too."""
    rng = np.random.default_rng(9)
    J, S, B = 6, 3000, 32
    x = np.column_stack(
        [
            rng.normal(0, 1, S),
            rng.normal(5, 2, S),
            rng.lognormal(0, 1, S),
            rng.standard_t(2, S),
            rng.exponential(1, S),
            rng.uniform(-1, 1, S),
        ]
    )
    C = 2
    hist = np.zeros((C, 1, J, B + 2), dtype=np.uint16)
    ext = np.empty((C, 1, J, 2))
    ext[..., 0], ext[..., 1] = np.inf, -np.inf
    # a grid deliberately narrower than the data (+-1.5 sd), so the outer bins and their bounds are used
    glo = (x.mean(axis=0) - 1.5 * x.std(axis=0))[None, :]
    gw = (3.0 * x.std(axis=0) / B)[None, :]
    ginv = 1.0 / gw
    for c in range(C):
        for s in range(c, S, C):
            for j in range(J):
                sk._hist_add(hist[c], ext[c], glo, ginv, 0, j, x[s, j], B)
    probs = np.array([0.025, 0.5, 0.9, 0.975])
    est, err = np.empty((4, J)), np.empty((4, J))
    sk.hist_quantiles(hist, ext, glo, gw, 0, probs, 0, est, err)
    ref = np.quantile(x, probs, axis=0)  # Source: numpy.quantile, linear method
    assert np.all(np.abs(est - ref) <= err * (1 + 1e-9) + 1e-12)
    inside = (ref > glo + gw) & (ref < glo + (B - 1) * gw)  # both order statistics inside the grid
    assert np.all(err[inside] <= np.broadcast_to(gw, err.shape)[inside] * (1 + 1e-9))


def test_automatic_switch():
    small = build(_stats(10, 4), pooling.Model())
    assert not summary.wants_summary(small, None)
    assert summary.wants_summary(small, None, "on") and not summary.wants_summary(small, None, False)
    # 20,001 groups would switch it on; so does a draw budget above AUTO_BYTES
    assert summary.full_draw_bytes(summary.AUTO_GROUPS + 1, "shared", pooling.Settings()) < summary.AUTO_BYTES
    big_draws = pooling.Settings(draws=100_000)
    assert summary.wants_summary(small, big_draws) == (
        summary.full_draw_bytes(10, "separate", big_draws) > summary.AUTO_BYTES
    )
    with pytest.raises(pooling.InputError):
        summary.wants_summary(small, None, "sometimes")


def test_kept_sample_follows_the_stated_rule(separate):
    _, part, _ = separate
    # the stated rule: a sample from a stream of the run's own seed (asked.derived_rng, purpose 'kept')
    rule = derived_rng(SETTINGS.seed, PURPOSE_KEPT).choice(40, size=4, replace=False)
    assert set(rule) <= set(part.kept.tolist())
    reasons = dict(zip(part.kept.tolist(), part.fit.acc.setup.kept_reason))
    assert all(reasons[j] == "sample" for j in rule)


@pytest.fixture(scope="module")
def cli_runs(tmp_path_factory):
    from pooling.cli import main

    d = tmp_path_factory.mktemp("summary_cli")
    rng = np.random.default_rng(6)
    rows = []
    for j in range(30):
        label = "=SUM(A1:A9)" if j == 0 else "<b>bold</b>" if j == 1 else f"line-{j:02d}"
        for _ in range(int(rng.integers(2, 8))):
            rows.append((label, 20.0 + 0.3 * j + rng.normal(0, 1)))
    data = d / "lines.csv"
    pd.DataFrame(rows, columns=["line", "width"]).to_csv(data, index=False)
    common = [
        "fit",
        str(data),
        "--group",
        "line",
        "--value",
        "width",
        "--seed",
        "3",
        "--chains",
        "2",
        "--warmup",
        "40",
        "--draws",
        "100",
        "--max-draws",
        "100",
        "--quiet",
        "--threshold",
        "24",
        "--upper-limit",
        "28",
    ]
    codes = {
        mode: main(common + ["--out", str(d / mode), "--summary", mode, "--keep-sample", "3", "--keep", "line-05"])
        for mode in ("on", "off")
    }
    return d, codes


def test_cli_run_folder(cli_runs):
    d, codes = cli_runs
    assert codes["on"] in (0, 3) and codes["off"] in (0, 3)
    on, off = d / "on", d / "off"
    with open(on / "groups.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    with open(off / "groups.csv", newline="", encoding="utf-8") as fh:
        head_full = next(csv.reader(fh))
    head = rows[0]
    # every column of the full-draw groups.csv is there, in the same order (summary mode adds its own)
    assert [c for c in head if c in head_full] == head_full
    assert len(rows) == 31
    labels = [r[0] for r in rows[1:]]
    # Source: OWASP CSV injection guidance, as the reporter applies it: a leading apostrophe
    assert "'=SUM(A1:A9)" in labels and "=SUM(A1:A9)" not in labels
    html = (on / "report.html").read_text(encoding="utf-8")
    assert "<b>bold</b>" not in html and "&lt;b&gt;bold&lt;/b&gt;" in html
    assert 'id="groups"' in html and "Kept groups" in html and "summary-hist" in html
    draws = xr.open_dataset(on / "draws.nc", engine="h5netcdf", group="posterior")
    kept = list(draws["group"].values)
    assert "line-05" in kept and len(kept) < 30
    assert set(draws.data_vars) >= {"mu", "tau", "theta", "sigma", "s", "nu", "rank"}
    draws.close()


def test_cli_bad_options(run_cli, small_csv, tmp_path):
    code, _, err = run_cli(
        "fit",
        small_csv,
        "--group",
        "plant",
        "--value",
        "thickness",
        "--out",
        tmp_path / "a",
        "--summary",
        "on",
        "--warmup",
        "5",
        "--quiet",
    )
    assert code == 2 and err.count("\n") == 1 and "warm-up" in err
    code, _, err = run_cli(
        "fit",
        small_csv,
        "--group",
        "plant",
        "--value",
        "thickness",
        "--out",
        tmp_path / "b",
        "--summary",
        "on",
        "--keep",
        "P9",
        "--quiet",
    )
    assert code == 2 and "P9" in err and err.count("\n") == 1
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


# --- rank intervals for every group -------------------------------------------------------------


def _exact_ranks(theta: np.ndarray, sign: float = 1.0) -> np.ndarray:
    # Source: ranks by numpy.argsort of each draw (stable), 1 = best
    order = np.argsort(-sign * theta, axis=1, kind="stable")
    ranks = np.empty_like(order)
    np.put_along_axis(ranks, order, np.arange(1, theta.shape[1] + 1)[None, :], axis=1)
    return ranks


def _check_rank_intervals(part, ranks):
    """The summary interval contains the exact one, each end within the stated rank_limit_error, and kept
    groups carry the exact ends with error 0."""
    t = part.table
    # Source: numpy.quantile method 'inverted_cdf', the reporter's rank interval (whole ranks)
    lo, hi = np.quantile(ranks, PROBS, axis=0, method="inverted_cdf")
    got_lo, got_hi = t["rank_low_90"].to_numpy().astype(int), t["rank_high_90"].to_numpy().astype(int)
    e = t["rank_limit_error"].to_numpy()
    assert np.all(got_lo <= lo) and np.all(got_hi >= hi)  # contains the exact interval
    assert np.all(lo - got_lo <= e) and np.all(got_hi - hi <= e)  # off by at most the stated bound
    assert np.all(got_lo >= 1) and np.all(got_hi <= ranks.shape[1])
    kept = part.kept
    np.testing.assert_array_equal(got_lo[kept], lo[kept])
    np.testing.assert_array_equal(got_hi[kept], hi[kept])
    assert np.all(e[kept] == 0)
    return lo, hi, e


def test_rank_intervals_of_every_group(separate):
    full, part, _ = separate
    lo, hi, e = _check_rank_intervals(part, _exact_ranks(_draws(full, "theta")))
    others = np.setdiff1d(np.arange(40), part.kept)
    # J = 40 <= RANK_BINS: every rank has its own bin, so the only slack is the bucket count (with
    # G = 1024 buckets for 40 groups, rarely more than one group a bucket): the bound must be small
    assert np.median(e[others]) <= 2


def test_rank_intervals_on_a_geometric_grid(monkeypatch):
    """A coarse rank grid (4 unit bins, then geometric) on 60 groups: containment and the bound still hold."""
    monkeypatch.setattr(summary, "RANK_BINS", 10)
    monkeypatch.setattr(summary, "RANK_EXACT", 4)
    stats = _stats(60, 8)
    o = ReportOptions(level=LEVEL, k=3, best="lowest")
    full = pooling.fit(stats, pooling.Model(within="shared"), SETTINGS, summary=False)
    part = Part(pooling.fit(stats, pooling.Model(within="shared"), SETTINGS, summary=True, options=o, keep=KEEP), o)
    assert part.res.summary["figures"]["rank_grid_bins"] <= 10
    lo, hi, e = _check_rank_intervals(part, _exact_ranks(_draws(full, "theta"), sign=-1.0))
    others = np.setdiff1d(np.arange(60), part.kept)
    assert np.any(e[others] > 2)  # the coarse bins do show in the bound (else this test checks little)


def test_rank_grid():
    for J in (1, 5, 96, 97, 1000, 10**6):
        e = summary.rank_grid(J)
        assert e[0] == 1 and e[-1] == J + 1 and np.all(np.diff(e) >= 1)
        assert len(e) - 1 <= max(summary.RANK_BINS, 1)
        head = min(J, summary.RANK_EXACT)
        np.testing.assert_array_equal(e[: head + 1], np.arange(1, head + 2))  # one rank a bin at the top
