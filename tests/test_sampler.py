"""Sampler contract: seeded reproducibility whatever the thread count, labelled output, run-length
control, and a clean stop. These are properties of the design (DESIGN.md, "Kernel rules"), checked
directly; the statistical correctness of the draws is checked against outside references elsewhere.
"""
from __future__ import annotations

import numpy as np
import pytest

import pooling
from pooling import sampler
from pooling.errors import Interrupted


@pytest.fixture(scope="module")
def stats():
    rng = np.random.default_rng(3)
    labels, values = [], []
    for j, n in enumerate([2, 3, 5, 8, 13, 4, 2, 6]):
        labels += [f"g{j}"] * n
        values += list(rng.normal(10 + 0.5 * j, 1.0, n))
    import pandas as pd

    return pooling.from_frame(pd.DataFrame({"g": labels, "y": values}), "g", "y")


@pytest.mark.parametrize("within", ["separate", "shared"])
def test_same_seed_same_draws_whatever_the_threads(stats, within):
    model = pooling.Model(within=within)
    a = pooling.fit(stats, model, pooling.Settings(chains=3, draws=200, warmup=100, seed=11, threads=1, max_draws=200))
    b = pooling.fit(stats, model, pooling.Settings(chains=3, draws=200, warmup=100, seed=11, threads=3, max_draws=200))
    for name in a.idata.posterior.data_vars:
        np.testing.assert_array_equal(a.idata.posterior[name].values, b.idata.posterior[name].values)
    c = pooling.fit(stats, model, pooling.Settings(chains=3, draws=200, warmup=100, seed=12, max_draws=200))
    assert not np.array_equal(a.idata.posterior["mu"].values, c.idata.posterior["mu"].values)


def test_layout_of_the_posterior(stats):
    fit = pooling.fit(stats, pooling.Model(), pooling.Settings(chains=2, draws=100, warmup=50, seed=1, max_draws=100))
    post = fit.idata.posterior
    assert post["mu"].dims == ("chain", "draw") and post["tau"].dims == ("chain", "draw")
    assert post["theta"].dims == ("chain", "draw", "group") and post["sigma"].dims == ("chain", "draw", "group")
    assert list(post["group"].values) == list(stats.labels)
    # the default between-group distribution is heavy-tailed: df per draw and lambda_j per draw and group
    assert set(post.data_vars) == {"mu", "tau", "theta", "sigma", "s", "nu", "df", "lambda"}
    assert post["lambda"].dims == ("chain", "draw", "group") and (post["lambda"].values > 0).all()
    assert set(np.unique(post["df"].values)) <= set(pooling.model.DEFAULT_DF_GRID)
    assert (post["tau"].values > 0).all() and (post["sigma"].values > 0).all()
    assert set(np.unique(post["nu"].values)) <= set(pooling.model.DEFAULT_NU_GRID)


def test_run_length_control_extends_until_the_cap(stats):
    """With a target no chain can meet, the run extends to its cap and reports what misses."""
    tight = pooling.Targets(rhat_max=1.0, ess_min=1e9)
    fit = pooling.fit(stats, pooling.Model(within="shared"),
                      pooling.Settings(chains=2, draws=100, warmup=50, seed=2, max_draws=260, targets=tight))
    assert fit.idata.posterior.sizes["draw"] == 260
    assert not fit.targets_met and len(fit.misses) > 0
    rounds = fit.diagnostics()["rounds"]
    assert rounds[0]["draws_per_chain"] == 100 and rounds[-1]["draws_per_chain"] == 260


def test_run_length_control_stops_when_met(stats):
    loose = pooling.Targets(rhat_max=2.0, ess_min=10)
    fit = pooling.fit(stats, pooling.Model(within="shared"),
                      pooling.Settings(chains=2, draws=100, warmup=50, seed=2, targets=loose))
    assert fit.idata.posterior.sizes["draw"] == 100 and fit.targets_met


def test_interrupt_discards_the_draws(stats, monkeypatch):
    """Ctrl-C between chunks stops every chain and raises Interrupted (nothing returned)."""
    calls = {"n": 0}
    real = sampler._Chain.run

    def run_then_interrupt(self, *a, **k):
        calls["n"] += 1
        raise KeyboardInterrupt

    monkeypatch.setattr(sampler._Chain, "run", run_then_interrupt)
    with pytest.raises(Interrupted):
        pooling.fit(stats, pooling.Model(), pooling.Settings(chains=2, draws=50, warmup=10, seed=1))
    assert calls["n"] >= 1
    monkeypatch.setattr(sampler._Chain, "run", real)


def test_one_chain_checks_only_the_ess_targets(stats):
    """R-hat needs two chains (NaN with one); a single long chain can still meet the ESS targets."""
    loose = pooling.Targets(rhat_max=1.01, ess_min=50)
    fit = pooling.fit(stats, pooling.Model(within="shared"),
                      pooling.Settings(chains=1, draws=400, warmup=200, seed=4, max_draws=400, targets=loose))
    assert fit.targets_met, fit.misses
    tight = pooling.Targets(rhat_max=1.01, ess_min=1e9)
    fit = pooling.fit(stats, pooling.Model(within="shared"),
                      pooling.Settings(chains=1, draws=100, warmup=50, seed=4, max_draws=100, targets=tight))
    assert not fit.targets_met and all(np.isnan(m["rhat"]) for m in fit.misses)
