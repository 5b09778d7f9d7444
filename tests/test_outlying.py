"""One outlying lab in a round: what the defaults must do with it (the acceptance case of heavy tails).

Invented round (a behaviour check, not a statistical reference): 15 labs with 2 to 6 replicates each,
between-lab sd 0.15 and within-lab sd 0.3, and one lab (Lab 10) 3 units high with an ordinary spread.
Under a normal between-group distribution such a lab either drags the consensus value and every other
lab or is dragged itself (and the chains cannot decide which); the defaults (Student-t between-group
distribution, df learned) must instead: meet the diagnostics targets, keep the lab near its own mean with
a bias interval that excludes zero, flag it (and no other lab), and leave mu at the other labs' mean.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

OUTLIER = "Lab 10"


def _round(path, seed=3):
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(15):
        n = 2 + (j * 7) % 5
        th = 50.0 + rng.normal(0, 0.15) + (3.0 if j == 9 else 0.0)
        rows += [(f"Lab {j + 1:02d}", round(th + rng.normal(0, 0.3), 3)) for _ in range(n)]
    pd.DataFrame(rows, columns=["lab", "result"]).to_csv(path, index=False)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    from pooling.cli import main

    d = tmp_path_factory.mktemp("round")
    _round(d / "round.csv")
    codes = {}
    for between in ("heavy", "normal"):
        codes[between] = main(
            [
                "fit",
                str(d / "round.csv"),
                "--group",
                "lab",
                "--value",
                "result",
                "--labs",
                "--out",
                str(d / between),
                "--seed",
                "2",
                "--quiet",
                "--between",
                between,
            ]
        )
    tables = {b: pd.DataFrame(json.loads((d / b / "summary.json").read_text())["groups_table"]) for b in codes}
    summaries = {b: json.loads((d / b / "summary.json").read_text()) for b in codes}
    return codes, tables, summaries, d


def test_defaults_meet_the_targets_and_keep_the_outlier_apart(runs):
    codes, tables, summaries, _ = runs
    assert codes["heavy"] == 0  # the diagnostics targets are met with the defaults
    assert summaries["heavy"]["model"]["between"] == "heavy"
    t = tables["heavy"]
    lab = t[t.group == OUTLIER].iloc[0]
    others = t[t.group != OUTLIER]
    mu = summaries["heavy"]["hyperparameters"]["mu"]
    # it keeps its own mean: it moved less than a tenth of the way to mu
    assert lab.shrink_realised < 0.1 and abs(lab.theta_mean - lab.raw_mean) < 0.1 * abs(lab.raw_mean - mu["mean"])
    # its bias against the consensus value is decided
    assert lab.bias_low_95 > 0
    # it is flagged, and no other lab is
    assert bool(lab.outlying) and lab.p_outlying > 0.9 and not others.outlying.any()
    assert summaries["heavy"]["heavy_tails"]["outlying"] == [OUTLIER]
    # mu stays at the other labs' mean: within two of its own posterior sds of their size-weighted mean
    ref = float(np.average(others.raw_mean, weights=others.n))
    assert abs(mu["mean"] - ref) < 2 * mu["sd"]


def test_the_normal_model_is_dragged(runs):
    # the contrast that motivates the default: under the normal model the outlier distorts the fit one of two ways,
    # and the chains cannot settle which (measured at seeds 2 and 3: exit 3 with R-hat of tau up to 1.47, or, with
    # the joint move of sigma_j and theta_j extended to groups of up to 10, converged on the second): the lab is
    # pulled in (shrink_realised 0.5 to 0.7, tau 0.3 to 0.5), or tau widens to take it in (about 0.93 against the
    # heavy model's 0.08) and every other lab is pulled less. Either way mu moves toward the outlier.
    codes, tables, summaries, _ = runs
    t = tables["normal"]
    hyper = {b: summaries[b]["hyperparameters"] for b in ("heavy", "normal")}
    lab = t[t.group == OUTLIER].iloc[0]
    dragged = lab.shrink_realised > 0.2
    widened = hyper["normal"]["tau"]["mean"] > 5 * hyper["heavy"]["tau"]["mean"]
    assert dragged or widened
    assert hyper["normal"]["tau"]["mean"] > 3 * hyper["heavy"]["tau"]["mean"]  # tau inflated in both modes
    assert hyper["normal"]["mu"]["mean"] > hyper["heavy"]["mu"]["mean"]
    assert "outlying" not in t  # the normal model has no tail weights


def test_the_extreme_group_check_sees_the_outlier(runs):
    # the posterior predictive check of the most extreme group names it under both models
    _, _, summaries, d = runs
    for b in ("heavy", "normal"):
        ex = summaries[b]["predictive_checks"]["most_extreme_group"]
        assert ex["group"] == OUTLIER and ex["group_share"] > 0.9
    # and neither model readily produces a lab that far beyond the typical one: the check's p-value is small
    # under both (a lab ~14 between-lab sds out is rare even for a Student-t with df near 2; the heavy model's
    # answer to it is the tail weight, not a large p). Measured at seeds 2 to 4: heavy 0.02-0.03, normal
    # 0.04-0.05. The p-value is a share of 400 replicates (CHECK_DRAWS): its Monte Carlo sd is at most
    # sqrt(0.05 * 0.95 / 400) = 0.011 there, so 0.1 sits four sds above the largest value seen.
    for b in ("heavy", "normal"):
        assert summaries[b]["predictive_checks"]["most_extreme_group"]["p_value"] < 0.1
    # the page says what a small p means under heavy tails (the lab is allowed far away), and only there
    said = "With heavy tails such a group does not drag the others"
    p_heavy = summaries["heavy"]["predictive_checks"]["most_extreme_group"]["p_value"]
    assert (said in (d / "heavy" / "report.html").read_text(encoding="utf-8")) == (p_heavy < 0.05)
    assert said not in (d / "normal" / "report.html").read_text(encoding="utf-8")
