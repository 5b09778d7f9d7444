"""summary.json's run figures against arviz, and run-length control on every target.

Source: arviz (the example data's library; az.rhat(method="rank"), az.ess(method="bulk"/"tail"), az.mcse)
and numpy's quantiles, applied to the draws the run wrote (draws.nc, read back with arviz). The run is made
at level 0.9, so an interval computed at another level under the same keys is caught.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import pooling
from pooling._compat import az

LEVEL = 0.9


def _f(x) -> float:
    return float(np.ravel(np.asarray(x, dtype=float))[0])


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    from pooling.cli import main

    d = tmp_path_factory.mktemp("summary")
    rng = np.random.default_rng(12)  # invented data: the check is of the bookkeeping, against arviz
    rows = [(f"m{j}", 20.0 + rng.normal(0, 1.0) + rng.normal(0, 0.8)) for j in range(9) for _ in range(4)]
    pd.DataFrame(rows, columns=["machine", "y"]).to_csv(d / "m.csv", index=False)
    code = main(
        [
            "fit",
            str(d / "m.csv"),
            "--group",
            "machine",
            "--value",
            "y",
            "--out",
            str(d / "run"),
            "--seed",
            "3",
            "--level",
            str(LEVEL),
            "--quiet",
        ]
    )
    assert code in (0, 3)
    return json.loads((d / "run" / "summary.json").read_text()), az.from_netcdf(str(d / "run" / "draws.nc"))


@pytest.mark.parametrize("name", ["mu", "tau", "s", "nu"])
def test_hyperparameter_summaries_match_arviz(run, name):
    summary, idata = run
    h = summary["hyperparameters"][name]
    x = idata.posterior[name].values
    flat = x.reshape(-1)
    assert set(h) >= {"mean", "sd", "median", "low_90", "high_90", "mean_mc_error", "rhat", "bulk_ess", "tail_ess"}
    assert h["mean"] == pytest.approx(flat.mean(), rel=1e-12)
    assert h["sd"] == pytest.approx(flat.std(ddof=1), rel=1e-10)
    lo, med, hi = np.quantile(flat, [(1 - LEVEL) / 2, 0.5, (1 + LEVEL) / 2])
    assert (h["low_90"], h["median"], h["high_90"]) == pytest.approx((lo, med, hi), rel=1e-12)
    # Our figures come from the internal-unit draws, arviz's from their decoding to the user's units: the
    # ranks agree, but the folded ranks |x - median| of two draws equal to rounding can swap, so R-hat and ESS
    # agree to 1e-4 here (tests/test_diagnostics.py compares the same arrays at 1e-8).
    assert h["rhat"] == pytest.approx(_f(az.rhat(x, method="rank")), rel=1e-4)
    assert h["bulk_ess"] == pytest.approx(_f(az.ess(x, method="bulk")), rel=1e-4)
    assert h["tail_ess"] == pytest.approx(_f(az.ess(x, method="tail")), rel=1e-4)
    assert h["mean_mc_error"] == pytest.approx(_f(az.mcse(x, method="mean")), rel=1e-4)


def test_worst_diagnostics_match_arviz(run):
    summary, idata = run
    worst = summary["diagnostics"]["worst"]
    for name in ("theta", "sigma"):
        x = idata.posterior[name].values
        rh = [_f(az.rhat(x[:, :, j], method="rank")) for j in range(x.shape[2])]
        bu = [_f(az.ess(x[:, :, j], method="bulk")) for j in range(x.shape[2])]
        ta = [_f(az.ess(x[:, :, j], method="tail")) for j in range(x.shape[2])]
        assert worst[name]["rhat_max"] == pytest.approx(max(rh), rel=1e-4)
        assert worst[name]["bulk_ess_min"] == pytest.approx(min(bu), rel=1e-4)
        assert worst[name]["tail_ess_min"] == pytest.approx(min(ta), rel=1e-4)
    # the tail index 1/df of the heavy-tailed default is checked too
    x = 1.0 / idata.posterior["df"].values
    if np.ptp(x) > 0:
        assert worst["1/df"]["tail_ess_min"] == pytest.approx(_f(az.ess(x, method="tail")), rel=1e-4)


@pytest.mark.parametrize("which", ["rhat", "bulk", "tail"])
def test_each_target_alone_extends_the_run(monkeypatch, which):
    # Source: the run-length rule (README): R-hat below 1.01 and bulk and tail ESS at least 400, for every
    # checked quantity. Diagnostics that miss only one target on the first round must still extend the run,
    # and the miss must be recorded with that figure.
    from pooling import sampler

    real = sampler.dg.rhat_ess
    calls = {"n": 0}

    def fake(x):
        rhat, bulk, tail = (np.array(v, dtype=float, copy=True) for v in real(x))
        calls["n"] += 1
        rhat[...], bulk[...], tail[...] = 1.0, 5000.0, 5000.0
        if sampler.dg is not None and first["round"]:
            {"rhat": rhat, "bulk": bulk, "tail": tail}[which][...] = 1.2 if which == "rhat" else 50.0
        return rhat, bulk, tail

    first = {"round": True}

    def diagnose(raw):
        misses, record = sampler.diagnose_raw(raw, sampler.Targets())
        first["round"] = False
        return misses, record

    monkeypatch.setattr(sampler.dg, "rhat_ess", fake)
    stats = pooling.from_frame(
        pd.DataFrame({"g": list("aabbccdd"), "y": [1.0, 1.2, 2.0, 2.1, 0.5, 0.9, 1.4, 1.6]}), "g", "y"
    )
    p = pooling.build(stats, pooling.Model(within="shared"))
    raw = sampler.sample_raw(
        p, pooling.Settings(chains=2, draws=50, warmup=20, seed=1), progress=False, diagnose=diagnose
    )
    assert [r["draws_per_chain"] for r in raw.rounds][0] == 50 and len(raw.rounds) == 2
    assert raw.rounds[0]["misses"] > 0 and raw.rounds[1]["misses"] == 0
    key = {"rhat": "rhat", "bulk": "bulk_ess", "tail": "tail_ess"}[which]
    assert all(m[key] == (1.2 if which == "rhat" else 50.0) for m in raw.rounds[0]["missed_list"])
