"""Group-level columns in the store (schema version 3): kept with each batch, refused at ingest when a group's value
changes between batches or the batches keep other columns, carried by the refit into a model with predictors,
upgraded from version-2 stores, and summary mode on the store's statistics.

The data are an invented interlaboratory round (labs with a method and an instrument age), dealt into daily
deliveries. The refit is checked against `pooling fit` of the concatenated deliveries with the same seed: the same
sweeps on the same random streams, from statistics that agree to a few units in the last place (the store merges
batch by batch, the fit reads the rows at once), so the draws and every answer agree to round-off. Every test
that takes `backend` runs on both stores (SQLite and PostgreSQL; conftest.py).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import sqlite3
import time
import uuid
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from store_helpers import execute, sql_dump

import pooling
from pooling import cli
from pooling.model import Category, Model, Numeric
from pooling.stats import read_table
from pooling.store import jobs, open_store
from pooling.store.ledger import PAUSE_AT_ENV, PAUSE_ENV, PAUSE_SECONDS_ENV, RESUME_ENV
from pooling.store.location import parse_location

V2 = Path(__file__).parent / "data" / "store-v2"
V1_DAYS = Path(__file__).parent / "data" / "store-v1"
RUN = ["--chains", "2", "--warmup", "300", "--draws", "400", "--max-draws", "400", "--seed", "11", "--quiet"]
PREDICTORS = ["--category", "method", "--numeric", "age"]


def _round(folder: Path, days: int = 3, labs: int = 14, seed: int = 3) -> list[Path]:
    """Daily deliveries of an invented round: lab, method (A or B), instrument age in years, value."""
    rng = np.random.default_rng(seed)
    method = {f"L{j:02d}": "B" if j % 3 == 0 else "A" for j in range(labs)}
    age = {f"L{j:02d}": 1 + (j * 7) % 9 for j in range(labs)}
    theta = {lab: 20.0 + (0.6 if method[lab] == "B" else 0.0) + 0.05 * age[lab] + rng.normal(0, 0.15) for lab in method}
    out = []
    for d in range(days):
        rows = [
            (lab, method[lab], age[lab], theta[lab] + rng.normal(0, 0.25))
            for lab in method
            for _ in range(int(rng.integers(1, 4)))
        ]
        p = folder / f"day-{d}.csv"
        pd.DataFrame(rows, columns=["lab", "method", "age", "y"]).to_csv(p, index=False, float_format="%.17g")
        out.append(p)
    return out


def _ingest(store, file, *extra) -> int:
    return cli.main(["ingest", str(store), str(file), "--group", "lab", "--value", "y", "--quiet", *map(str, extra)])


def _err_line(capsys) -> str:
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


RANK_BASED = ("rhat", "bulk_ess", "tail_ess")


def _numbers_agree(a, b, path="predictors"):
    """Every number of two JSON trees within round-off (rtol 1e-9), every other value equal. R-hat and the ESS
    are rank-based: folding the draws about their median ties the two draws either side of it exactly, and
    round-off breaks the tie one way or the other, which moves R-hat by about 1e-4; they get rtol 1e-3."""
    if isinstance(a, dict):
        assert set(a) == set(b), path
        for k in a:
            _numbers_agree(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            _numbers_agree(x, y, f"{path}[{i}]")
    elif isinstance(a, float) or isinstance(b, float):
        rtol = 1e-3 if path.rsplit(".", 1)[-1] in RANK_BASED else 1e-9
        assert (a is None and b is None) or math.isclose(a, b, rel_tol=rtol, abs_tol=1e-12), (path, a, b)
    else:
        assert a == b, (path, a, b)


# ---------------------------------------------------------------------------------------------
# the refit carries the predictors: the same answers as one fit of all the rows


def test_a_refit_with_predictors_matches_a_fit_of_the_concatenated_deliveries(tmp_path, capsys, backend, new_store):
    files = _round(tmp_path)
    store = new_store()
    for f in files:
        assert _ingest(store, f, "--column", "method", "--column", "age") == 0
    pd.concat([pd.read_csv(f) for f in files]).to_csv(tmp_path / "all.csv", index=False, float_format="%.17g")
    # what the store keeps is what the file holds: one value per lab, as text
    with open_store(store) as st:
        snap = st.snapshot()
    for s, f in zip(snap.stats, files):
        ref = read_table(f, "lab", "y", group_columns=["method", "age"])
        assert s.labels == ref.labels and set(s.columns) == {"method", "age"}
        assert list(s.columns["method"]) == list(ref.columns["method"]) and list(s.columns["age"]) == list(
            ref.columns["age"]
        )
    refit, one = tmp_path / "refit", tmp_path / "one"
    assert cli.main(["refit", store, "--out", str(refit), *PREDICTORS, *RUN]) in (0, 3)
    assert cli.main(
        ["fit", str(tmp_path / "all.csv"), "--group", "lab", "--value", "y", "--out", str(one), *PREDICTORS, *RUN]
    ) in (0, 3)
    a = json.loads((refit / "summary.json").read_text())
    b = json.loads((one / "summary.json").read_text())
    assert a["model"] == b["model"] and [c["name"] for c in a["predictors"]["coefficients"]] == [
        "method: B vs A",
        "age",
    ]
    # coefficients, contrasts, consensus per level, tau with and without the predictors: equal to round-off
    _numbers_agree(a["predictors"], b["predictors"])
    pa = xr.open_dataset(refit / "draws.nc", group="posterior", engine="h5netcdf").load()
    pb = xr.open_dataset(one / "draws.nc", group="posterior", engine="h5netcdf").load()
    for name in ("beta", "mu", "tau", "theta"):
        np.testing.assert_allclose(pa[name].values, pb[name].values, rtol=1e-9, atol=1e-12, err_msg=name)
    ga, gb = pd.read_csv(refit / "groups.csv"), pd.read_csv(one / "groups.csv")
    assert list(ga["level"]) == list(gb["level"])
    # the run is recorded with its model, predictors included: a second refit after a new delivery warm-starts
    (tmp_path / "late").mkdir()
    late = _round(tmp_path / "late", days=1, seed=4)[0]
    assert _ingest(store, late, "--column", "method", "--column", "age", "--batch", "late") == 0
    assert cli.main(["refit", store, "--out", str(tmp_path / "refit-2"), *PREDICTORS, *RUN]) in (0, 3)
    with open_store(store) as st:
        runs = st.runs()
    assert [r.summary["model"]["predictors"] for r in runs] == [a["model"]["spec"]["predictors"]] * 2


def test_a_refit_asking_for_a_column_the_store_does_not_keep_is_one_line(tmp_path, capsys, backend, new_store):
    files = _round(tmp_path, days=1)
    store = new_store()
    assert _ingest(store, files[0], "--column", "method") == 0
    capsys.readouterr()
    code = cli.main(["refit", store, "--out", str(tmp_path / "run"), "--numeric", "age", *RUN])
    line = _err_line(capsys)
    assert code == 2 and "--numeric" in line and "no group-level column 'age'" in line and "'method'" in line
    assert "--column age" in line and not (tmp_path / "run").exists()


# ---------------------------------------------------------------------------------------------
# ingest refuses what would give a group two values, or batches with other columns


def test_a_group_whose_value_changes_between_batches_is_refused_whole(tmp_path, capsys, backend, new_store):
    files = _round(tmp_path, days=2)
    store = new_store()
    assert _ingest(store, files[0], "--column", "method", "--column", "age") == 0
    shown = parse_location(store).display
    before = sql_dump(store)
    changed = pd.read_csv(files[1])
    changed.loc[changed.lab == "L04", "method"] = "C"  # L04 is method A in day-0
    changed.to_csv(tmp_path / "changed.csv", index=False)
    capsys.readouterr()
    code = _ingest(store, tmp_path / "changed.csv", "--column", "method", "--column", "age")
    line = _err_line(capsys)
    assert code == 2 and line.startswith("pooling: bad input in ")
    for part in (
        f"'{tmp_path / 'changed.csv'}'",
        f"store '{shown}'",
        "group 'L04'",
        "column 'method'",
        "'A'",
        "'C'",
        "batch 'day-0.csv'",
        "nothing was changed",
    ):
        assert part in line, (part, line)
    assert sql_dump(store) == before
    # a number written another way is the same value: age 7 and 7.0
    same = pd.read_csv(files[1]).astype({"age": float})
    same.to_csv(tmp_path / "same.csv", index=False, float_format="%.1f")
    assert "7.0" in (tmp_path / "same.csv").read_text()
    assert _ingest(store, tmp_path / "same.csv", "--column", "method", "--column", "age") == 0


@pytest.mark.parametrize(
    "day0,day1,says",
    [
        (["method", "age"], ["method"], "ingest it with --column age"),
        (["method"], [], "ingest it with --column method"),
        (["method"], ["method", "age"], "ingest it without --column age"),
        ([], ["method"], "ingest it without --column method"),
    ],
)
def test_a_batch_keeping_other_columns_than_the_store_is_refused(
    tmp_path, capsys, backend, new_store, day0, day1, says
):
    files = _round(tmp_path, days=2)
    store = new_store()
    assert _ingest(store, files[0], *[x for c in day0 for x in ("--column", c)]) == 0
    before = sql_dump(store)
    capsys.readouterr()
    code = _ingest(store, files[1], *[x for c in day1 for x in ("--column", c)])
    line = _err_line(capsys)
    assert code == 2 and says in line and "active batch 'day-0.csv'" in line and "nothing was changed" in line, line
    assert sql_dump(store) == before


def test_the_same_delivery_with_other_group_level_columns_is_refused_unless_replaced(
    tmp_path, capsys, backend, new_store
):
    # "nothing new" (exit 4) would drop the new columns unseen: the same content, or the same statistics, with
    # other group-level columns is bad input (exit 2) naming what differs, unless --replace says to replace them
    day0 = _round(tmp_path, days=1)[0]
    store = new_store()
    assert _ingest(store, day0) == 0
    shown = parse_location(store).display
    before = sql_dump(store)
    capsys.readouterr()
    assert _ingest(store, day0, "--column", "method") == 2  # the same file, now with a column
    line = _err_line(capsys)
    for part in (
        f"bad input in '{day0}'",
        f"store '{shown}'",
        "active batch 'day-0.csv'",
        "this delivery keeps 'method', which the batch 'day-0.csv' does not",
        "nothing was changed",
        "--batch 'day-0.csv' --replace",
    ):
        assert part in line, (part, line)
    assert sql_dump(store) == before
    assert _ingest(store, day0, "--column", "method", "--replace") == 0  # the batch's columns replaced
    with open_store(store) as st:
        ledger, stats = st.batches(), st.snapshot().stats
    assert [(b.name, b.status) for b in ledger] == [("day-0.csv", "replaced"), ("day-0.csv", "active")]
    assert "same content with other group-level columns" in ledger[0].note
    assert len(stats) == 1 and set(stats[0].columns) == {"method"}
    assert _ingest(store, day0, "--column", "method") == 4  # now the same content and columns: nothing new
    # the same statistics in another file, one lab's method corrected
    fixed = pd.read_csv(day0)
    fixed.loc[fixed.lab == "L04", "method"] = "B"  # L04 is method A in day-0
    fixed.to_csv(tmp_path / "fixed.csv", index=False, float_format="%.17g")
    before = sql_dump(store)
    capsys.readouterr()
    for extra, says in (((), "withdraw 'day-0.csv' first"), (("--batch", "day-0.csv"), "pass --replace")):
        assert _ingest(store, tmp_path / "fixed.csv", "--column", "method", *extra) == 2
        line = _err_line(capsys)
        for part in ("group 'L04', column 'method'", "holds 'A', this delivery 'B'", "nothing was changed", says):
            assert part in line, (part, line)
        assert sql_dump(store) == before
    assert _ingest(store, tmp_path / "fixed.csv", "--column", "method", "--batch", "day-0.csv", "--replace") == 0
    with open_store(store) as st:
        (s,) = st.snapshot().stats
    assert dict(zip(s.labels, s.columns["method"]))["L04"] == "B"
    assert jobs.check_store(store)[1] == []


def test_withdrawn_and_replaced_batches_do_not_bind_the_values(tmp_path, capsys, backend, new_store):
    files = _round(tmp_path, days=2)
    store = new_store()
    assert _ingest(store, files[0], "--column", "method") == 0
    fixed = pd.read_csv(files[0])
    fixed.loc[fixed.lab == "L04", "method"] = "B"  # the first delivery named L04's method wrongly
    fixed.to_csv(tmp_path / "fixed.csv", index=False, float_format="%.17g")
    # replacing the only batch that holds a value may change it
    assert _ingest(store, tmp_path / "fixed.csv", "--column", "method", "--batch", "day-0.csv", "--replace") == 0
    with open_store(store) as st:
        s = st.snapshot().stats[0]
    assert dict(zip(s.labels, s.columns["method"]))["L04"] == "B"
    # day-1 still says A for L04: refused while the corrected batch is active, accepted once it is withdrawn
    capsys.readouterr()
    assert _ingest(store, files[1], "--column", "method") == 2
    assert "'B'" in _err_line(capsys)
    jobs.withdraw_batch(store, "day-0.csv")
    assert _ingest(store, files[1], "--column", "method") == 0
    # and a withdrawn batch keeping other columns does not bind the column names either
    jobs.withdraw_batch(store, "day-1.csv")
    assert _ingest(store, files[0], "--batch", "plain") == 0
    assert jobs.check_store(store)[1] == []


def test_the_ledger_lists_the_columns_each_batch_keeps(tmp_path, capsys, backend, new_store):
    files = _round(tmp_path, days=2)
    store = new_store()
    assert _ingest(store, files[0], "--column", "method", "--column", "age") == 0
    jobs.withdraw_batch(store, "day-0.csv")
    assert _ingest(store, files[1]) == 0  # the store's only active batch keeps none
    capsys.readouterr()
    assert cli.main(["batches", store, "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)["batches"]
    assert [(b["name"], b["columns"]) for b in listed] == [("day-0.csv", ["age", "method"]), ("day-1.csv", [])]
    assert cli.main(["batches", store]) == 0
    table = capsys.readouterr().out.splitlines()
    assert table[0].split()[-2:] == ["columns", "note"] and table[1].endswith("age, method")
    assert table[2].split()[-1] == listed[1]["sha256"][:12]
    # a batch whose statistics fail their checksum is listed, its columns not: checkup names the damage
    execute(
        store, "UPDATE batch_columns SET value = 'C' WHERE batch_id = 1 AND position = 0 AND column_name = 'method'"
    )
    assert cli.main(["batches", store, "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)["batches"]
    assert [(b["columns"], b["checksum_ok"]) for b in listed] == [(None, False), ([], True)]
    assert cli.main(["batches", store]) == 0
    table = capsys.readouterr().out.splitlines()
    assert table[1].endswith("(damaged: see pooling checkup)") and "1 batch failing" in table[-1]
    assert any("statistics of batch 1" in p for p in jobs.check_store(store)[1])


def _paused(tmp_path: Path) -> tuple[dict, Path, Path]:
    marker, resume = tmp_path / f"paused-{uuid.uuid4().hex[:6]}", tmp_path / "resume"
    env = dict(
        os.environ,
        **{PAUSE_ENV: str(marker), PAUSE_AT_ENV: "before-commit", PAUSE_SECONDS_ENV: "100", RESUME_ENV: str(resume)},
    )
    return env, marker, resume


def test_two_ingests_at_once_cannot_give_a_group_two_values(tmp_path, backend, new_store):
    """The first ingest stops inside its transaction, every row written; the second, giving L04 another method,
    starts meanwhile. It must wait for the first and then be refused: checked against uncommitted rows it would
    pass (PostgreSQL's advisory lock on the store's columns, SQLite's single writer)."""
    import subprocess
    import sys

    files = _round(tmp_path, days=2)
    store = new_store()
    assert _ingest(store, files[0], "--column", "method") == 0  # the store exists, with its columns
    mine = pd.read_csv(files[1])
    mine.to_csv(tmp_path / "first.csv", index=False)
    other = pd.read_csv(files[1]).assign(y=lambda d: d.y + 1.0)
    other.loc[other.lab == "L04", "method"] = "C"
    other.to_csv(tmp_path / "second.csv", index=False)
    env, marker, resume = _paused(tmp_path)

    def cmd(f):
        return [
            sys.executable,
            "-m",
            "pooling.cli",
            "ingest",
            str(store),
            str(f),
            "--group",
            "lab",
            "--value",
            "y",
            "--column",
            "method",
        ]

    first = subprocess.Popen(
        cmd(tmp_path / "first.csv"), env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    end = time.monotonic() + 120
    while not marker.exists():
        assert first.poll() is None and time.monotonic() < end, first.communicate()
        time.sleep(0.05)
    second = subprocess.Popen(cmd(tmp_path / "second.csv"), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    time.sleep(3.0)  # long enough for the second to have read the store, were it not kept waiting
    assert second.poll() is None, second.communicate()
    resume.write_text("go")
    out1, err1 = first.communicate(timeout=120)
    out2, err2 = second.communicate(timeout=120)
    assert first.returncode == 0, err1
    assert second.returncode == 2 and "group 'L04', column 'method'" in err2 and "'C'" in err2, err2
    with open_store(store) as st:
        assert [b.name for b in st.snapshot().batches] == ["day-0.csv", "first.csv"]


# ---------------------------------------------------------------------------------------------
# stores of schema version 2 are upgraded in place, every number and checksum kept


def _upgrade_checks(store, before: list[str], capsys, tmp_path: Path) -> None:
    code = cli.main(["checkup", str(store)])
    out = capsys.readouterr().out
    assert code == 0 and "sound: every checksum matches" in out and "4 batches in the ledger" in out, out
    after = sql_dump(store)
    kept = [ln for ln in before if not ln.startswith("pooling_store")]
    assert [ln for ln in after if not ln.startswith("pooling_store")] == kept  # every row, floats by their bits
    meta = {ln for ln in after if ln.startswith("pooling_store")}
    assert any("('value', '3')" in ln and "format" in ln for ln in meta) and any("upgraded_at" in ln for ln in meta)
    assert not [ln for ln in after if ln.startswith("batch_columns")]
    # the upgraded store works: the refit reads it; a batch keeping columns is refused while batches without
    # them are active, one without is taken
    assert cli.main(["refit", str(store), "--out", str(tmp_path / "run"), "--force", *RUN]) in (0, 3)
    extra = tmp_path / "day-5.csv"
    # day 4's rows but its last (the store holds day 4 already: the same statistics again are nothing new)
    pd.read_csv(V1_DAYS / "day-4.csv").iloc[:-1].assign(method="A").to_csv(extra, index=False)
    capsys.readouterr()
    assert _ingest(store, extra, "--column", "method") == 2
    assert "ingest it without --column method" in _err_line(capsys)
    assert _ingest(store, extra) == 0


def test_a_version_2_sqlite_store_is_upgraded_keeping_every_number_and_checksum(tmp_path, capsys):
    store = tmp_path / "v2.store"
    shutil.copy(V2 / "v2.store", store)
    con = sqlite3.connect(str(store))
    assert con.execute("SELECT value FROM pooling_store WHERE key = 'format'").fetchone() == ("2",)
    con.close()
    before = sql_dump(store)
    _upgrade_checks(store, before, capsys, tmp_path)
    con = sqlite3.connect(str(store))
    assert con.execute("PRAGMA user_version").fetchone() == (3,)
    con.close()


def test_a_version_2_postgresql_store_is_upgraded_keeping_every_number_and_checksum(tmp_path, capsys, pg_cluster):
    import psycopg

    url = pg_cluster.new_url()
    loc = parse_location(url)
    dump = (V2 / "v2-postgresql.sql").read_text()
    dump = dump.replace("SCHEMA v2store;", f"SCHEMA {loc.name};").replace("v2store.", f"{loc.name}.")
    with psycopg.connect(loc.conninfo, autocommit=True) as con:
        con.execute(dump)
    before = sql_dump(url)
    assert any("('value', '2')" in ln and "format" in ln for ln in before)
    _upgrade_checks(url, before, capsys, tmp_path)


# ---------------------------------------------------------------------------------------------
# summary mode on the store's statistics carries the predictors


def test_summary_mode_carries_the_predictors_of_the_store_statistics(tmp_path, capsys):
    files = _round(tmp_path)
    store = tmp_path / "s.store"
    for f in files:
        assert _ingest(store, f, "--column", "method", "--column", "age") == 0
    plan = jobs.plan_refit(store)
    model = Model(predictors=(Category("method"), Numeric("age")))
    settings = pooling.Settings(chains=2, warmup=200, draws=300, max_draws=300, seed=9)
    full = pooling.fit(plan.stats, model, settings, progress=False, summary=False, without=False)
    part = pooling.fit(
        plan.stats, model, settings, progress=False, summary=True, options=pooling.ReportOptions(), without=False
    )
    # the same sweeps on the same Generators (pooling.summary): identical draws of the coefficients
    np.testing.assert_array_equal(part.raw.beta, full.raw.beta)
    np.testing.assert_array_equal(part.raw.mu, full.raw.mu)
    # and through the command line: --summary on and off give the same answers about the predictors
    pd.concat([pd.read_csv(f) for f in files]).to_csv(tmp_path / "all.csv", index=False, float_format="%.17g")
    for mode in ("on", "off"):
        assert cli.main(
            [
                "fit",
                str(tmp_path / "all.csv"),
                "--group",
                "lab",
                "--value",
                "y",
                "--out",
                str(tmp_path / mode),
                "--summary",
                mode,
                *PREDICTORS,
                *RUN,
            ]
        ) in (0, 3)
    on = json.loads((tmp_path / "on" / "summary.json").read_text())
    off = json.loads((tmp_path / "off" / "summary.json").read_text())
    assert on["mode"] != off["mode"]
    for part_ in ("coefficients", "contrasts", "consensus"):
        _numbers_agree(on["predictors"][part_], off["predictors"][part_], part_)
