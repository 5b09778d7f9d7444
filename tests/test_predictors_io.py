"""Group-level predictors at the edges: reading per-group columns, refusing what the data cannot identify, the
command line, the run folder, and summary mode against full draws.

These tests check behaviour, not statistics, so their tables are invented (the statistical checks are in
test_predictors_exact.py, test_predictors_kernel.py and test_predictors_sbc.py). Messages must name the file,
column, group or rows and say what to do; bad input exits with code 2 and no traceback.
"""

from __future__ import annotations

import json
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pandas as pd
import pytest

import pooling
from pooling.errors import InputError, ModelError
from pooling.model import Category, Model, Numeric, build
from pooling.results import compute, level_contrast

SETTINGS = pooling.Settings(chains=2, warmup=200, draws=300, max_draws=300, seed=5)


def _long(n_groups=12, seed=0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(n_groups):
        method = "A" if j % 3 else "B"
        site = ["north", "south"][j % 2]
        age = 2 + j % 5
        theta = 50 + (0.8 if method == "B" else 0.0) + 0.1 * age + rng.normal(0, 0.2)
        for _ in range(3 + j % 3):
            rows.append((f"L{j:02d}", method, site, age, theta + rng.normal(0, 0.3)))
    return pd.DataFrame(rows, columns=["lab", "method", "site", "age", "y"])


# ---------------------------------------------------------------------------------------------
# reading group-level columns


def test_long_table_keeps_one_value_per_group(tmp_path):
    df = _long()
    path = tmp_path / "labs.csv"
    df.to_csv(path, index=False)
    st = pooling.read_table(path, "lab", "y", group_columns=["method", "age"])
    first = df.groupby("lab", sort=False).first()
    assert list(st.columns["method"]) == list(first.loc[list(st.labels), "method"])
    assert list(st.columns["age"]) == [str(x) for x in first.loc[list(st.labels), "age"]]
    # small chunks: the check holds across chunks too
    st2 = pooling.read_table(path, "lab", "y", group_columns=["method"], chunk_rows=4)
    assert list(st2.columns["method"]) == list(st.columns["method"])


def test_a_group_with_two_values_is_refused_naming_the_group_and_rows(tmp_path):
    df = _long()
    rows = np.flatnonzero(df.lab == "L04")
    df.loc[rows[-1], "method"] = "B"  # L04 is method A in its other rows
    path = tmp_path / "labs.csv"
    df.to_csv(path, index=False)
    with pytest.raises(InputError) as e:
        pooling.read_table(path, "lab", "y", group_columns=["method"], chunk_rows=5)
    msg = str(e.value)
    assert "labs.csv'" in msg and "column 'method'" in msg and "group 'L04'" in msg
    # a CSV names the lines as the file has them: the header is line 1, so data row r is on line r + 1
    assert f"'A' in line {rows[0] + 2} and 'B' in line {rows[-1] + 2}" in msg, msg
    # a frame (and a Parquet file) names its data rows
    with pytest.raises(InputError) as e:
        pooling.from_frame(df, "lab", "y", group_columns=["method"])
    assert f"'A' in row {rows[0] + 1} and 'B' in row {rows[-1] + 1}" in str(e.value)


def test_numbers_written_two_ways_are_one_value_and_empty_cells_are_refused(tmp_path):
    df = pd.DataFrame({"g": ["a", "a", "b", "b"], "y": [1.0, 2.0, 3.0, 4.0], "age": ["5", "5.0", "7", "7"]})
    st = pooling.from_frame(df, "g", "y", group_columns=["age"])
    assert list(st.columns["age"]) == ["5", "7"]
    df.loc[3, "age"] = ""
    with pytest.raises(InputError, match=r"column 'age', row 4: expected a value of the group-level column"):
        pooling.from_frame(df, "g", "y", group_columns=["age"])
    with pytest.raises(InputError, match="no column 'missing'"):
        pooling.from_frame(df, "g", "y", group_columns=["missing"])
    with pytest.raises(InputError, match="'g' is the column of the group labels"):
        pooling.from_frame(df, "g", "y", group_columns=["g"])


def test_summary_and_estimate_tables_and_parquet_carry_columns(tmp_path):
    summ = pd.DataFrame(
        {
            "lab": ["a", "b", "c", "d"],
            "n": [3, 4, 5, 3],
            "mean": [1.0, 2.0, 1.5, 1.2],
            "sd": [0.3, 0.2, 0.4, 0.3],
            "method": ["X", "Y", "X", "Y"],
            "age": [1.5, 2, 3, 4],
        }
    )
    path = tmp_path / "summary.csv"
    summ.to_csv(path, index=False)
    st = pooling.from_summaries(path, "lab", "n", "mean", "sd", group_columns=["method", "age"])
    # a CSV cell keeps its text as written (numbers are read as numbers where a model asks for them)
    assert list(st.columns["method"]) == ["X", "Y", "X", "Y"]
    assert list(st.columns["age"]) == ["1.5", "2.0", "3.0", "4.0"]
    est = pooling.from_estimates(summ.assign(se=0.2), "lab", "mean", "se", group_columns=["method"])
    assert list(est.columns["method"]) == ["X", "Y", "X", "Y"]
    pq = tmp_path / "long.parquet"
    _long().to_parquet(pq)
    st = pooling.read_table(pq, "lab", "y", group_columns=["age", "method"])
    assert set(st.columns["age"]) == {"2", "3", "4", "5", "6"}


def test_merge_refuses_a_group_whose_value_changed():
    a = pooling.from_frame(
        pd.DataFrame({"g": ["a", "b"], "y": [1.0, 2.0], "m": ["X", "Y"]}),
        "g",
        "y",
        group_columns=["m"],
        source="day1.csv",
    )
    b = pooling.from_frame(
        pd.DataFrame({"g": ["a", "c"], "y": [1.5, 2.5], "m": ["Z", "Y"]}),
        "g",
        "y",
        group_columns=["m"],
        source="day2.csv",
    )
    with pytest.raises(InputError, match=r"group 'a': .*'X' in 'day1.csv' and 'Z' here"):
        pooling.merge(a, b)
    ok = pooling.from_frame(
        pd.DataFrame({"g": ["a", "c"], "y": [1.5, 2.5], "m": ["X", "Y"]}), "g", "y", group_columns=["m"]
    )
    merged = pooling.merge(a, ok)
    assert dict(zip(merged.labels, merged.columns["m"])) == {"a": "X", "b": "Y", "c": "Y"}


def test_fingerprint_is_unchanged_without_columns():
    st = pooling.from_frame(_long(), "lab", "y")
    assert st.fingerprint() == st.with_columns({}).fingerprint()
    assert st.fingerprint() != st.with_columns({"method": ["A"] * st.J}).fingerprint()


# ---------------------------------------------------------------------------------------------
# what the data cannot identify


@pytest.fixture(scope="module")
def labs():
    return pooling.from_frame(_long(), "lab", "y", group_columns=["method", "site", "age"])


@pytest.mark.parametrize(
    "predictors,kw,pattern",
    [
        ((Category("region"),), {}, r"the predictor 'region' is not among the data's group-level columns"),
        ((Category("method", reference="C"),), {}, r"reference level 'C' of 'method' has no groups .*choose one"),
        ((Category("method", levels=("A", "B", "C")),), {}, r"level 'C' of 'method' has no groups.*drop it"),
        ((Category("method", levels=("A",)),), {}, r"level 'B' of 'method', which is not among the stated levels"),
        ((Numeric("method"),), {}, r"numeric predictor 'method' has 'B' for group 'L00'; expected a finite number"),
    ],
)
def test_unidentifiable_set_ups_are_refused(labs, predictors, kw, pattern):
    with pytest.raises(ModelError, match=pattern):
        build(labs, Model(predictors=predictors, **kw))


def test_one_level_a_constant_and_collinear_columns_are_refused(labs):
    one = labs.with_columns(
        {
            "kit": ["K1"] * labs.J,
            "temp": [20.0] * labs.J,
            "copy": list(labs.columns["method"]),
            "twice": [str(2 * float(a)) for a in labs.columns["age"]],
        }
    )
    with pytest.raises(ModelError, match=r"'kit' has the one level 'K1' in every group.*drop it"):
        build(one, Model(predictors=(Category("kit"),)))
    with pytest.raises(ModelError, match=r"numeric predictor 'temp' is 20 in every group.*drop it"):
        build(one, Model(predictors=(Numeric("temp"),)))
    with pytest.raises(ModelError, match=r"'copy: B vs A' cannot be told apart.*drop one"):
        build(one, Model(predictors=(Category("method"), Category("copy"))))
    with pytest.raises(ModelError, match=r"'twice' cannot be told apart"):
        build(one, Model(predictors=(Numeric("age"), Numeric("twice"))))


def test_more_coefficients_than_groups_allow(labs):
    few = labs.subset(np.arange(4))  # 4 groups; method, site and age: mu and 3 effects
    with pytest.raises(
        ModelError,
        match=r"4 coefficients with flat priors .* too many for 4 groups.*--tau "
        r"half-normal:SCALE.*--effects normal:SCALE",
    ):
        build(few, Model(predictors=(Category("method"), Category("site"), Numeric("age"))))
    # a normal prior on the effects leaves mu alone flat: identified
    build(
        few,
        Model(
            predictors=(Category("method"), Numeric("age")),
            effects=pooling.Normal(0.0, 1.0),
            tau=pooling.HalfNormal(1.0),
        ),
    )
    with pytest.raises(ModelError, match="named as a predictor twice"):
        Model(predictors=(Category("method"), Numeric("method")))


def test_reference_defaults_to_the_level_with_most_groups(labs):
    d = build(labs, Model(predictors=(Category("method"),))).design
    counts = pd.Series(labs.columns["method"]).value_counts()
    assert d.categories[0]["reference"] == counts.idxmax()
    d = build(labs, Model(predictors=(Category("method", reference="B"),))).design
    assert d.names == ["method: A vs B"]


def test_model_record_round_trips_and_is_unchanged_without_predictors():
    m = Model(
        predictors=(Category("method", reference="B", levels=("A", "B")), Numeric("age", pooling.Normal(0, 2))),
        effects=pooling.Normal(0.0, 0.5),
    )
    assert Model.from_dict(json.loads(json.dumps(m.to_dict()))) == m
    assert "predictors" not in Model().to_dict() and "effects" not in Model().to_dict()


# ---------------------------------------------------------------------------------------------
# the answers, both ways of running


def test_summary_mode_draws_the_same_coefficients_as_a_full_run(labs):
    model = Model(predictors=(Category("method"), Numeric("age")))
    o = pooling.ReportOptions(level=0.9, allowed_bias=0.3)
    full = pooling.fit(labs, model, SETTINGS, progress=False, summary=False, without=False)
    part = pooling.fit(labs, model, SETTINGS, progress=False, summary=True, options=o, without=False)
    # the same sweeps on the same Generators (pooling.summary): identical draws
    np.testing.assert_array_equal(part.raw.beta, full.raw.beta)
    np.testing.assert_array_equal(part.raw.mu, full.raw.mu)
    a, b = compute(full, o), compute(part, o)
    for col in ("bias_mean", "consensus_mean", "p_best_in_level", "p_bias_over"):
        np.testing.assert_allclose(a.table[col], b.table[col], rtol=1e-9, atol=1e-12, err_msg=col)
    err = b.table["rank_in_level_mean_error"].to_numpy()
    assert np.all(np.abs(a.table["rank_in_level_mean"] - b.table["rank_in_level_mean"]) <= err + 1e-9)
    assert a.predictors["coefficients"][0]["mean"] == pytest.approx(b.predictors["coefficients"][0]["mean"])


def test_bias_is_against_each_level_and_ranks_within_levels(labs):
    model = Model(predictors=(Category("method"),))
    fit = pooling.fit(labs, model, SETTINGS, progress=False, without=False)
    res = compute(fit)
    t = res.table
    cons = {c["level"]: c["mean"] for c in res.predictors["consensus"]}
    np.testing.assert_allclose(t.consensus_mean, [cons[lv] for lv in t.level], rtol=1e-12)
    np.testing.assert_allclose(t.bias_mean, t.theta_mean - t.consensus_mean, atol=1e-9)
    for _, sub in t.groupby("level"):
        assert min(sub[res.col("rank_in_level_low")]) == 1
        assert sub.rank_in_level_mean.sum() == pytest.approx(len(sub) * (len(sub) + 1) / 2)
        assert sub.p_best_in_level.sum() == pytest.approx(1.0)
    c = level_contrast(fit, "method", "B", "A")
    coef = res.predictors["coefficients"][0]
    assert c["mean"] == pytest.approx(coef["mean"] if coef["level"] == "B" else -coef["mean"])
    with pytest.raises(InputError, match="'method' has no level 'Z'"):
        level_contrast(fit, "method", "Z", "A")


# ---------------------------------------------------------------------------------------------
# the command line and the run folder


def _cli(*args, cwd):
    return subprocess.run(
        [sys.executable, "-m", "pooling.cli", *args], cwd=cwd, capture_output=True, text=True, timeout=600, check=False
    )


def test_command_line_run_folder(tmp_path):
    _long(n_groups=15, seed=3).to_csv(tmp_path / "labs.csv", index=False)
    r = _cli(
        "fit",
        "labs.csv",
        "--group",
        "lab",
        "--value",
        "y",
        "--category",
        "method",
        "--numeric",
        "age",
        "--reference",
        "method=A",
        "--effects",
        "normal:5",
        "--out",
        "run",
        "--draws",
        "300",
        "--warmup",
        "300",
        "--seed",
        "2",
        cwd=tmp_path,
    )
    assert r.returncode in (0, 3), r.stderr
    assert "why groups differ" in r.stdout and "without them (a second fit of the same data" in r.stdout
    s = json.loads((tmp_path / "run" / "summary.json").read_text())
    pr = s["predictors"]
    assert [c["name"] for c in pr["coefficients"]] == ["method: B vs A", "age"]
    assert {"low_95", "high_95", "p_above_0"} <= set(pr["coefficients"][0])
    assert pr["spread"]["tau_without"]["mean"] > 0 and pr["spread"]["share_explained"] is not None
    assert s["model"]["spec"]["predictors"][0] == {
        "kind": "category",
        "column": "method",
        "reference": "A",
        "levels": None,
        "prior": None,
    }
    g = pd.read_csv(tmp_path / "run" / "groups.csv")
    assert {"level", "consensus_mean", "consensus_low_95", "rank_in_level_mean", "p_best_in_level"} <= set(g.columns)
    html = (tmp_path / "run" / "report.html").read_text()
    assert 'id="predictors"' in html and "Why groups differ" in html
    for name in ("by_level", "along_numeric"):
        start = html.index(f'data-figure="{name}"')
        svg = html[html.rindex("<svg", 0, start) : html.index("</svg>", start) + 6]
        ET.fromstring(svg)  # well-formed
    import xarray as xr

    post = xr.open_dataset(tmp_path / "run" / "draws.nc", group="posterior")
    beta = post["beta"].values.reshape(-1, 2)
    assert list(post["coefficient"].values) == ["method: B vs A", "age"]
    assert np.mean(beta[:, 0]) == pytest.approx(pr["coefficients"][0]["mean"], rel=1e-9)


@pytest.mark.parametrize(
    "args,pattern",
    [
        (("--reference", "method:A", "--category", "method"), "bad option --reference: expected COLUMN=LEVEL"),
        (("--effects", "cauchy:1", "--category", "method"), "bad option --effects: expected flat or normal:SCALE"),
        (("--category", "method", "--numeric", "method"), "named twice"),
        (("--category", "nothere"), "no column 'nothere'"),
    ],
)
def test_command_line_refusals(tmp_path, args, pattern):
    _long().to_csv(tmp_path / "labs.csv", index=False)
    r = _cli("fit", "labs.csv", "--group", "lab", "--value", "y", "--out", "run", *args, cwd=tmp_path)
    assert r.returncode == 2, r.stderr
    assert pattern in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "run").exists()


def test_refit_says_the_store_keeps_no_such_group_column(tmp_path):
    _long().to_csv(tmp_path / "day1.csv", index=False)
    r = _cli("ingest", "s.store", "day1.csv", "--group", "lab", "--value", "y", "--quiet", cwd=tmp_path)
    assert r.returncode == 0
    r = _cli("refit", "s.store", "--out", "run", "--category", "method", cwd=tmp_path)
    assert r.returncode == 2 and "keeps no group-level column 'method'" in r.stderr and "--column method" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and not (tmp_path / "run").exists()


def test_refit_path_takes_predictors_from_the_statistics(tmp_path, monkeypatch):
    # the refit command takes its predictors from the columns its plan's statistics carry (GroupStats.columns),
    # whatever put them there: here they are added to the plan of a store that keeps none (the store's own
    # columns, `pooling ingest --column`, are tested in test_store_columns.py)
    from pooling import cli
    from pooling.store import jobs

    df = _long()
    df[["lab", "y"]].to_csv(tmp_path / "day1.csv", index=False)
    methods = dict(zip(df.lab, df.method))
    assert (
        cli.main(
            [
                "ingest",
                str(tmp_path / "s.store"),
                str(tmp_path / "day1.csv"),
                "--group",
                "lab",
                "--value",
                "y",
                "--quiet",
            ]
        )
        == 0
    )
    real = jobs.plan_refit

    def with_columns(*args, **kw):
        plan = real(*args, **kw)
        plan.stats = plan.stats.with_columns({"method": methods})
        return plan

    monkeypatch.setattr(jobs, "plan_refit", with_columns)
    code = cli.main(
        [
            "refit",
            str(tmp_path / "s.store"),
            "--out",
            str(tmp_path / "run"),
            "--category",
            "method",
            "--draws",
            "200",
            "--warmup",
            "200",
            "--quiet",
            "--seed",
            "1",
        ]
    )
    assert code in (0, 3)
    s = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert [c["name"] for c in s["predictors"]["coefficients"]] == ["method: B vs A"]
    assert (tmp_path / "run" / "changes.json").exists()
