"""Refits from a store: against one fit of the concatenated file, nothing new, a withdrawn batch,
the change report, forgetting, warm starts, and the run recorded only once its folder exists.

The data are the embedded demo (36 invented casting suppliers), dealt into batches at random.
Every test runs on both stores (SQLite and PostgreSQL; the `backend` fixture of conftest.py).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr

import pooling
from pooling import cli
from pooling import diagnostics as dg
from pooling.errors import NothingNew, OutputError
from pooling.stats import read_table
from pooling.store import jobs, open_store
from pooling.store.combine import final_state_record, warm_start

RUN = ["--chains", "4", "--warmup", "500", "--draws", "1000", "--quiet"]
GROUP, VALUE = "supplier", "strength_mpa"
THRESHOLD = 411.0  # near the demo's pooled mean, so that a small group starts out 'unsure'


def _posterior(folder: Path) -> xr.Dataset:
    return xr.open_dataset(folder / "draws.nc", group="posterior", engine="h5netcdf").load()


@pytest.fixture(scope="module")
def world(tmp_path_factory, new_module_store):
    """A store holding the demo data in four batches, refitted once, and a one-shot fit of the same rows."""
    d = tmp_path_factory.mktemp("refit")
    df = pd.read_csv(cli.demo_path())
    rng = np.random.default_rng(42)
    part = rng.integers(0, 4, len(df))
    for k in range(4):
        df[part == k].to_csv(d / f"day-{k}.csv", index=False)
    df.to_csv(d / "all.csv", index=False)
    store = new_module_store("castings")
    for k in range(4):
        assert (
            cli.main(
                [
                    "ingest",
                    str(store),
                    str(d / f"day-{k}.csv"),
                    "--group",
                    GROUP,
                    "--value",
                    VALUE,
                    "--at",
                    f"2024-06-0{k + 1}",
                    "--quiet",
                ]
            )
            == 0
        )
    code = cli.main(
        ["refit", str(store), "--out", str(d / "run-1"), "--seed", "101", "--threshold", str(THRESHOLD), *RUN]
    )
    assert code == 0
    one = pooling.fit(
        read_table(d / "all.csv", GROUP, VALUE),
        pooling.Model(),
        pooling.Settings(chains=4, warmup=500, draws=1000, seed=202),
        progress=False,
    )
    return d, store, one


def test_refit_after_several_batches_matches_one_fit_of_the_concatenated_file(world):
    d, store, one = world
    run = d / "run-1"
    for name in ("draws.nc", "summary.json", "changes.json", "changes.csv"):
        assert (run / name).is_file()
    post = _posterior(run)
    labels = list(one.labels)
    assert sorted(post["group"].values.tolist()) == sorted(labels)
    # the statistics that reached the sampler are those of the concatenated file
    summary = json.loads((run / "summary.json").read_text())
    assert summary["data"]["groups"] == one.problem.stats.J
    assert summary["data"]["measurements"] == one.problem.stats.N
    # Reference: the one-shot fit of all.csv with another seed. Both sample the same posterior, so
    # each posterior mean may differ only by Monte Carlo error: |a - b| <= 4.5 sqrt(mcse_a^2 + mcse_b^2),
    # with the MCSE of each run from its own draws (mean ESS). Over 38 two-sided checks at 4.5 sd the
    # chance of a false alarm is about 38 * 7e-6 = 3e-4.
    checks = [("mu", None), ("tau", None)] + [("theta", lab) for lab in labels]
    for name, lab in checks:
        a = post[name] if lab is None else post[name].sel(group=lab)
        b = one.idata.posterior[name] if lab is None else one.idata.posterior[name].sel(group=lab)
        a, b = a.values, b.values
        tol = 4.5 * np.hypot(dg.mean_mc_error(a), dg.mean_mc_error(b))
        assert abs(a.mean() - b.mean()) <= tol, (name, lab, a.mean(), b.mean(), tol)
    with open_store(store) as st:
        runs = st.runs()
    assert len(runs) == 1 and Path(runs[0].folder) == run.resolve() and runs[0].targets_met


def test_nothing_new_gives_exit_4_and_writes_nothing(world, capsys):
    d, store, _ = world
    capsys.readouterr()
    code = cli.main(["refit", str(store), "--out", str(d / "run-none"), "--seed", "1", *RUN])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 4 and len(err) == 1 and "nothing new" in err[0] and "--force" in err[0]
    assert not (d / "run-none").exists()
    with pytest.raises(NothingNew):
        jobs.plan_refit(store)
    assert jobs.plan_refit(store, force=True).stats.J == 36


def test_withdrawn_batch_new_group_and_the_change_report(world):
    d, store, _ = world
    # a later delivery: 60 high bars from the small supplier S15, and a supplier never seen before
    rng = np.random.default_rng(7)
    extra = pd.DataFrame(
        {
            GROUP: ["S15"] * 60 + ["S99"] * 10,
            VALUE: np.concatenate([rng.normal(428.0, 3.0, 60), rng.normal(405.0, 8.0, 10)]),
        }
    )
    extra.to_csv(d / "day-5.csv", index=False)
    assert cli.main(["withdraw", str(store), "day-2.csv", "--reason", "gauge out of calibration"]) == 0
    assert (
        cli.main(
            [
                "ingest",
                str(store),
                str(d / "day-5.csv"),
                "--group",
                GROUP,
                "--value",
                VALUE,
                "--at",
                "2024-06-05",
                "--quiet",
            ]
        )
        == 0
    )
    code = cli.main(
        ["refit", str(store), "--out", str(d / "run-2"), "--seed", "303", "--threshold", str(THRESHOLD), *RUN]
    )
    assert code == 0
    rep = json.loads((d / "run-2" / "changes.json").read_text())
    table = pd.read_csv(d / "run-2" / "changes.csv", keep_default_na=False, na_values=[""])
    post = _posterior(d / "run-2")
    # the batches: one withdrawn since the last run, one added; the ledger still holds the withdrawn one
    assert rep["batches"]["added"] == ["day-5.csv"]
    assert [b["name"] for b in rep["batches"]["removed"]] == ["day-2.csv"]
    assert rep["batches"]["removed"][0]["status"] == "withdrawn"
    with open_store(store) as st:
        assert [b.status for b in st.batches() if b.name == "day-2.csv"] == ["withdrawn"]
        assert len(st.runs()) == 2
    # n now counts exactly the rows of the active files
    df = pd.concat([pd.read_csv(d / f) for f in ("day-0.csv", "day-1.csv", "day-3.csv", "day-5.csv")])
    counts = df.groupby(GROUP)[VALUE].size()
    now = table.set_index("group")
    for lab, n in counts.items():
        assert now.loc[lab, "n_now"] == n
    # the new supplier is reported as new; groups that lost all their rows would be 'gone'
    assert [g["group"] for g in rep["new_groups"]] == ["S99"] and now.loc["S99", "change"] == "new"
    assert set(rep["gone_groups"]) == set(table.loc[table["change"] == "gone", "group"])
    # S15 was unsure against the threshold, and now, with 60 bars near 428, is above it
    crossed = {c["group"]: c for c in rep["threshold_crossings"]}
    assert crossed["S15"]["then"] == "unsure" and crossed["S15"]["now"] == "above"
    # every probability 'now' is the share of this run's draws (consistency with draws.nc)
    theta = post["theta"].values.reshape(-1, post.sizes["group"])
    col = {lab: j for j, lab in enumerate(post["group"].values.tolist())}
    for lab in ("S15", "S16", "S99"):
        x = theta[:, col[lab]]
        assert now.loc[lab, "p_above_now"] == pytest.approx((x > THRESHOLD).mean(), abs=1e-12)
    mu = post["mu"].values.reshape(-1)
    h = rep["hyperparameters"]["mu"]
    assert h["p_now_above_then_mean"] == pytest.approx((mu > h["then_mean"]).mean(), abs=1e-12)
    assert h["shift"] == pytest.approx(h["now_mean"] - h["then_mean"], rel=1e-12)
    # sides follow from the probabilities and decide_at; crossings are exactly the changed sides
    kept = table[table["change"] == "kept"]
    for _, r in kept.iterrows():
        for p_col, side_col in (("p_above_then", "side_then"), ("p_above_now", "side_now")):
            p = r[p_col]
            assert r[side_col] == ("above" if p >= 0.95 else "below" if p <= 0.05 else "unsure")
    changed = set(kept.loc[kept["side_then"] != kept["side_now"], "group"])
    assert changed == set(crossed)
    # rank moves: the listed groups are those whose mean rank moved by a place or more
    moved = {m["group"] for m in rep["rank_moves"]}
    assert moved == set(kept.loc[kept["rank_move_up"].abs() >= 1.0, "group"])
    # the second run started from the first one's final states, and still warmed up
    assert json.loads((d / "run-2" / "summary.json").read_text())["run"]["warmup"] == 500
    with open_store(store) as st:
        assert st.runs()[-1].summary["settings"]["warm_start"] is True


def test_forgetting_weights_reach_the_statistics(world):
    d, store, _ = world
    plan = jobs.plan_refit(store, half_life_days=2.0, as_of="2024-06-05", force=True)
    # ages 4, 3, 1 and 0 days for the active batches dated June 1, 2, 4 and 5
    np.testing.assert_allclose(plan.weights, [2.0**-2, 2.0**-1.5, 2.0**-0.5, 1.0], rtol=1e-15)
    files = ["day-0.csv", "day-1.csv", "day-3.csv", "day-5.csv"]
    parts = [pd.read_csv(d / f).assign(w=w) for f, w in zip(files, plan.weights)]
    df = pd.concat(parts)
    for j, lab in enumerate(plan.stats.labels):
        sub = df[df[GROUP] == lab]
        # Source: numpy weighted sums on the raw rows, the exponentially weighted statistics
        assert plan.stats.n[j] == pytest.approx(sub["w"].sum(), rel=1e-13)
        m = np.sum(sub["w"] * sub[VALUE]) / sub["w"].sum()
        assert plan.stats.mean[j] + plan.stats.mean_lo[j] == pytest.approx(m, rel=1e-13)


def test_warm_start_carries_states_across_units_and_new_groups(world):
    d, store, one = world
    fs = final_state_record(one)
    # another problem: data shifted by 1000 and with one more group, so centre, scale and labels differ
    s = one.problem.stats
    labels = s.labels + ("NEW",)
    st2 = pooling.GroupStats(labels, np.append(s.n, 5), np.append(s.mean, 400.0) + 1000.0, np.append(s.m2, 40.0) * 4.0)
    prob = pooling.build(st2, one.problem.model)
    assert (prob.center, prob.scale) != (one.problem.center, one.problem.scale)
    init = warm_start(fs, prob, chains=6)
    assert len(init) == 6
    for i, start in enumerate(init):
        old = fs["chains"][i % 4]
        c0, k0, c1, k1 = fs["center"], fs["scale"], prob.center, prob.scale
        # user units are preserved: theta and mu map through (x * k + c), variances through k^2
        np.testing.assert_allclose(start["theta"][:-1] * k1 + c1, np.asarray(old["theta"]) * k0 + c0, rtol=1e-13)
        assert start["theta"][-1] == prob.ybar[-1]
        np.testing.assert_allclose(start["sigma2"][:-1] * k1**2, np.asarray(old["sigma2"]) * k0**2, rtol=1e-13)
        from pooling import kernel

        assert start["state"][kernel.MU] * k1 + c1 == pytest.approx(old["state"][kernel.MU] * k0 + c0, rel=1e-13)
        assert np.exp(start["state"][kernel.ETA]) * k1 == pytest.approx(
            np.exp(old["state"][kernel.ETA]) * k0, rel=1e-12
        )
    # another structure: nothing is carried over
    assert warm_start(fs, pooling.build(st2, pooling.Model(within="shared")), chains=4) is None


def test_the_run_is_recorded_only_once_its_folder_is_in_place(world, monkeypatch):
    d, store, _ = world
    with open_store(store) as st:
        before = len(st.runs())

    def broken(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(jobs, "write_changes", broken)
    code = cli.main(["refit", str(store), "--out", str(d / "run-broken"), "--seed", "5", "--force", *RUN])
    assert code == 6
    assert not (d / "run-broken").exists()
    assert not list(d.glob(".run-broken*"))
    with open_store(store) as st:
        assert len(st.runs()) == before
    # an existing folder is refused before any sampling, and nothing is recorded either
    code = cli.main(["refit", str(store), "--out", str(d / "run-1"), "--seed", "5", "--force", *RUN])
    assert code == 6
    with open_store(store) as st:
        assert len(st.runs()) == before
    with pytest.raises(OutputError):
        from pooling.output import check_target

        check_target(d / "run-1", replace=False)


def test_the_first_refit_page_history_and_the_recorded_intervals(world, tmp_path):
    d, store, _ = world
    page = (d / "run-1" / "report.html").read_text(encoding="utf-8")
    # the page of a refit opens with what changed (here: the first recorded run) and says how batches count
    assert page.index('id="changes"') < page.index('id="verdict"')
    assert "First recorded run of this store" in page and "every active batch counts fully" in page
    # the run folder holds the history as it stood with this run
    hist = (d / "run-1" / "history.html").read_text(encoding="utf-8")
    assert "<script" not in hist.lower() and "this run" in hist
    # the store recorded each group's mean and interval at the watched level (for the history page), the same
    # numbers the change report compares against
    with open_store(store) as st:
        first = st.runs()[0]
    gi = first.summary["group_intervals"]
    table = pd.read_csv(d / "run-1" / "changes.csv", keep_default_na=False, na_values=[""]).set_index("group")
    assert gi["level"] == 0.95 and len(gi["labels"]) == len(table)
    for lab, mean in zip(gi["labels"], gi["mean"]):
        assert mean == pytest.approx(table.loc[lab, "mean_now"], rel=1e-12)
    assert gi["p_above"] == pytest.approx([table.loc[lab, "p_above_now"] for lab in gi["labels"]], abs=1e-12)
    assert "p_mean_outside" not in gi  # no limits were watched
    # `pooling history` writes the page from the recorded runs; a folder in its place is refused (exit 6)
    out = tmp_path / "pages" / "history.html"
    assert cli.main(["history", str(store), "--out", str(out)]) == 0
    text = out.read_text(encoding="utf-8")
    with open_store(store) as st:
        n_runs = len(st.runs())
    assert f"{n_runs} run" in text and "Each group over the runs" in text
    (tmp_path / "taken").mkdir()
    assert cli.main(["history", str(store), "--out", str(tmp_path / "taken")]) == 6
    # the page has the mode of a new file (0666 less the umask), as every page of a run folder
    mask = os.umask(0)
    os.umask(mask)
    assert out.stat().st_mode & 0o777 == 0o666 & ~mask
    assert (d / "run-1" / "history.html").stat().st_mode & 0o777 == 0o666 & ~mask
    # a history page is replaced night after night; any other file is refused untouched (exit 6): the store
    # itself, a table of data (common practice: an output option never overwrites what is not its own output)
    assert cli.main(["history", str(store), "--out", str(out)]) == 0
    data = tmp_path / "measurements.csv"
    data.write_text("lab,y\nA,1\n")
    for target in ([Path(store)] if Path(str(store)).is_file() else []) + [data]:  # SQLite: the store is a file
        before = target.read_bytes()
        assert cli.main(["history", str(store), "--out", str(target)]) == 6
        assert target.read_bytes() == before


def test_history_of_runs_recorded_before_group_intervals():
    # Runs recorded by an earlier version kept no per-group intervals: the page still draws mu and tau and says so.
    from pooling.report.history import render_history
    from pooling.store.base import BatchInfo, RunRecord

    ledger = [
        BatchInfo(
            i,
            f"b{i}.csv",
            "0" * 64,
            f"b{i}.csv",
            10,
            3,
            f"2024-06-0{i}T00:00:00+00:00",
            f"2024-06-0{i}T01:00:00+00:00",
            "withdrawn" if i == 1 else "active",
        )
        for i in (1, 2, 3)
    ]
    hyper = {
        "mu": {"mean": 10.0, "sd": 0.5, "q_lo": 9.0, "q_hi": 11.0},
        "tau": {"mean": 1.0, "sd": 0.3, "q_lo": 0.5, "q_hi": 1.6},
    }
    runs = [
        RunRecord(
            f"2024-06-0{k}T02:00:00+00:00",
            f"/runs/{k}",
            "x",
            ids,
            f"2024-06-0{k}T00:00:00+00:00",
            None,
            True,
            {"hyperparameters": hyper, "watch": {"threshold": 10.0, "level": 0.9}, "groups": 3},
            id=k,
        )
        for k, ids in ((1, (1, 2)), (2, (2, 3)))
    ]
    page = render_history("'old.store'", ledger, runs)
    assert "2 runs from 2024-06-01 to 2024-06-02" in page
    assert "None of the recorded runs kept its groups" in page
    assert "withdrawn or replaced b1.csv (withdrawn)" in page
    assert page.count("<svg") == 1
    assert "no recorded run yet" in render_history("'new.store'", ledger, [])
