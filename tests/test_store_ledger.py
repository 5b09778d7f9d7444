"""The store's ledger: exact merges, idempotent ingestion, replacement, withdrawal, forgetting, bad stores.

Every test that takes `new_store` runs on both stores (SQLite and PostgreSQL; conftest.py). No
sampling here; these run in a few seconds.
"""

from __future__ import annotations

import json
import sqlite3
import statistics
from fractions import Fraction
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from store_helpers import sql_dump as _dump
from store_helpers import store_exists

from pooling import cli
from pooling.errors import InputError, NothingNew
from pooling.stats import read_table
from pooling.store import combine, forgetting_weights, jobs, open_store
from pooling.store.combine import parse_when


def _write_batches(tmp: Path, rng, k: int, offset: float, spread: float, rows: int, groups: int):
    frames = []
    for b in range(k):
        labels = rng.choice([f"lab-{i:02d}" for i in range(groups)], size=rows)
        # uneven group means and spreads, so that the merge's d^2 na nb / n term matters
        codes = np.array([int(s[-2:]) for s in labels])
        y = offset + codes * spread * 3 + rng.normal(0.0, spread * (1 + codes % 3), size=rows)
        df = pd.DataFrame({"lab": labels, "y": y})
        df.to_csv(tmp / f"batch-{b}.csv", index=False, float_format="%.17g")
        frames.append(df)
    whole = pd.concat(frames, ignore_index=True)
    whole.to_csv(tmp / "all.csv", index=False, float_format="%.17g")
    return whole


@pytest.mark.parametrize("offset,spread", [(0.0, 1.0), (1e9, 0.1), (-3e9, 1e-3)])
def test_merged_batches_equal_statistics_of_concatenated_data(tmp_path, offset, spread, new_store):
    rng = np.random.default_rng(11)
    whole = _write_batches(tmp_path, rng, k=5, offset=offset, spread=spread, rows=400, groups=9)
    store = new_store()
    for b in range(5):
        jobs.ingest_file(store, tmp_path / f"batch-{b}.csv", "lab", "y")
    with open_store(store) as st:
        merged = combine(st.snapshot().stats)
    # read back from the CSV text the batches were written as (17 significant digits: exact doubles)
    back = pd.read_csv(tmp_path / "all.csv", dtype={"lab": str})
    assert np.array_equal(back["y"].to_numpy(), whole["y"].to_numpy())
    for j, lab in enumerate(merged.labels):
        y = back.loc[back["lab"] == lab, "y"].to_numpy()
        # Source: numpy as reference, on the concatenated raw data. Subtracting one data value first
        # is exact here (Sterbenz: the values are within a factor of 2 of each other), so numpy's
        # two-pass mean and sum of squares work on numbers of the size of the spread.
        d = y - y[0]
        ref_mean = y[0] + (d.mean())
        ref_m2 = float(np.sum((d - d.mean()) ** 2))
        # Source: Python's statistics.variance sums exact fractions for float input (second reference)
        exact_m2 = float(Fraction(statistics.variance(y.tolist())) * (len(y) - 1))
        assert merged.n[j] == len(y)
        got_mean = merged.mean[j] + merged.mean_lo[j]
        assert abs(got_mean - ref_mean) <= 1e-12 * max(abs(ref_mean), spread)
        assert abs(merged.m2[j] - ref_m2) <= 1e-12 * ref_m2
        assert abs(merged.m2[j] - exact_m2) <= 1e-12 * exact_m2
    # and the store's merge agrees with reading the concatenated file in one go
    one = read_table(tmp_path / "all.csv", "lab", "y")
    order = [one.labels.index(lab) for lab in merged.labels]
    assert np.array_equal(one.n[order], merged.n)
    np.testing.assert_allclose(merged.m2, one.m2[order], rtol=1e-12, atol=0)


def test_same_file_twice_changes_nothing(tmp_path, new_store):
    rng = np.random.default_rng(3)
    _write_batches(tmp_path, rng, k=2, offset=10.0, spread=1.0, rows=50, groups=4)
    store = new_store()
    jobs.ingest_file(store, tmp_path / "batch-0.csv", "lab", "y")
    before = _dump(store)
    with pytest.raises(NothingNew, match="in the store already as batch 'batch-0.csv'"):
        jobs.ingest_file(store, tmp_path / "batch-0.csv", "lab", "y")
    # the same content under another name is the same delivery: refused too
    with pytest.raises(NothingNew):
        jobs.ingest_file(store, tmp_path / "batch-0.csv", "lab", "y", batch="other-name")
    assert _dump(store) == before
    # from the command line: exit 4 (nothing new), one line on stderr
    code = cli.main(["ingest", str(store), str(tmp_path / "batch-0.csv"), "--group", "lab", "--value", "y"])
    assert code == 4
    assert _dump(store) == before


def test_a_batch_with_decimal_commas_ingests_the_same_numbers(tmp_path, new_store):
    # Source: the number notation of ISO 80000-1 (decimal comma, digit groups), as `pooling fit`
    # reads it (--thousands, --decimal-comma); the store must hold the same statistics as for the
    # same measurements written with a decimal point.
    point = tmp_path / "point.csv"
    comma = tmp_path / "comma.csv"
    values = [("A", "1234.5"), ("A", "1236.25"), ("B", "999.75"), ("B", "1001.5"), ("B", "1000.125")]
    point.write_text("lab,y\n" + "".join(f"{g},{v}\n" for g, v in values))

    def european(v):
        whole, frac = v.split(".")
        return (f"{whole[:-3]}.{whole[-3:]}" if len(whole) > 3 else whole) + "," + frac

    comma.write_text("lab;y\n" + "".join(f"{g};{european(v)}\n" for g, v in values))
    a, b = new_store("a"), new_store("b")
    assert cli.main(["ingest", str(a), str(point), "--group", "lab", "--value", "y", "--quiet"]) == 0
    assert (
        cli.main(
            [
                "ingest",
                str(b),
                str(comma),
                "--group",
                "lab",
                "--value",
                "y",
                "--thousands",
                ".",
                "--decimal-comma",
                "--quiet",
            ]
        )
        == 0
    )
    with open_store(a) as sa, open_store(b) as sb:
        x, y = sa.snapshot(), sb.snapshot()
    assert len(y.stats) == len(x.stats) == 1
    for got, want in zip(y.stats, x.stats):
        assert got.labels == want.labels
        np.testing.assert_array_equal(got.n, want.n)
        np.testing.assert_array_equal(got.mean, want.mean)
        np.testing.assert_array_equal(got.m2, want.m2)


def test_name_with_other_content_is_refused_unless_replaced(tmp_path, capsys, new_store):
    rng = np.random.default_rng(4)
    _write_batches(tmp_path, rng, k=2, offset=10.0, spread=1.0, rows=50, groups=4)
    store = new_store()
    jobs.ingest_file(store, tmp_path / "batch-0.csv", "lab", "y", batch="monday")
    before = _dump(store)
    code = cli.main(
        ["ingest", str(store), str(tmp_path / "batch-1.csv"), "--group", "lab", "--value", "y", "--batch", "monday"]
    )
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "a batch named 'monday'" in err[0] and "--replace" in err[0]
    assert _dump(store) == before
    info, _ = jobs.ingest_file(store, tmp_path / "batch-1.csv", "lab", "y", batch="monday", replace=True)
    with open_store(store) as st:
        ledger = st.batches()
        snap = st.snapshot()
    assert [b.status for b in ledger] == ["replaced", "active"]
    assert ledger[0].changed_at is not None  # the ledger keeps the replaced delivery's record
    assert [b.id for b in snap.batches] == [info.id]
    assert snap.stats[0].n.sum() == 50


def test_withdraw_is_recorded_and_leaves_the_batch_out(tmp_path, capsys, new_store):
    rng = np.random.default_rng(5)
    _write_batches(tmp_path, rng, k=3, offset=0.0, spread=1.0, rows=60, groups=5)
    store = new_store()
    for b in range(3):
        jobs.ingest_file(store, tmp_path / f"batch-{b}.csv", "lab", "y")
    with open_store(store) as st:
        fp_before = st.snapshot().state_sha256
    assert cli.main(["withdraw", str(store), "batch-1.csv", "--reason", "wrong gauge"]) == 0
    with open_store(store) as st:
        ledger = {b.name: b for b in st.batches()}
        snap = st.snapshot()
    assert ledger["batch-1.csv"].status == "withdrawn" and ledger["batch-1.csv"].note == "wrong gauge"
    assert ledger["batch-1.csv"].changed_at is not None
    assert [b.name for b in snap.batches] == ["batch-0.csv", "batch-2.csv"]
    assert snap.state_sha256 != fp_before
    # the merge of what is left equals the two remaining files read together
    merged = combine(snap.stats)
    two = pd.concat([pd.read_csv(tmp_path / f"batch-{b}.csv") for b in (0, 2)])
    for j, lab in enumerate(merged.labels):
        assert merged.n[j] == int((two["lab"] == lab).sum())
    # twice: nothing new (4); unknown name: bad input (2)
    assert cli.main(["withdraw", str(store), "batch-1.csv"]) == 4
    assert cli.main(["withdraw", str(store), "no-such-batch"]) == 2
    # withdrawn content comes back only when asked
    capsys.readouterr()
    assert (
        cli.main(
            ["ingest", str(store), str(tmp_path / "batch-1.csv"), "--group", "lab", "--value", "y", "--batch", "again"]
        )
        == 2
    )
    assert "was withdrawn as batch 'batch-1.csv'" in capsys.readouterr().err
    assert (
        cli.main(
            [
                "ingest",
                str(store),
                str(tmp_path / "batch-1.csv"),
                "--group",
                "lab",
                "--value",
                "y",
                "--replace",
                "--quiet",
            ]
        )
        == 0
    )
    with open_store(store) as st:
        statuses = [(b.name, b.status) for b in st.batches()]
    assert statuses == [
        ("batch-0.csv", "active"),
        ("batch-1.csv", "replaced"),
        ("batch-2.csv", "active"),
        ("batch-1.csv", "active"),
    ]
    # the ledger as JSON
    capsys.readouterr()
    assert cli.main(["batches", str(store), "--json"]) == 0
    listed = json.loads(capsys.readouterr().out)
    assert [b["status"] for b in listed["batches"]] == ["active", "replaced", "active", "active"]


def test_the_ledger_table_is_sized_from_its_cells_and_shows_the_notes(tmp_path, new_store, capsys):
    # names longer than any fixed width, a withdrawal with a reason (a line break and an escape code in it) and one
    # without: every cell in full, every column starting where its header starts, the notes in the last column
    rng = np.random.default_rng(8)
    _write_batches(tmp_path, rng, k=3, offset=10.0, spread=1.0, rows=30, groups=3)
    store = new_store()
    names = ["b", "delivery-from-the-north-plant-" + "x" * 40 + "-end", "third"]
    for b, name in enumerate(names):
        jobs.ingest_file(store, tmp_path / f"batch-{b}.csv", "lab", "y", batch=name, at=f"2024-03-0{b + 1}")
    jobs.withdraw_batch(store, names[1], "gauge out of calibration\nsee ticket \x1b[31m42")
    jobs.withdraw_batch(store, names[2])
    capsys.readouterr()
    assert cli.main(["batches", str(store)]) == 0
    lines = capsys.readouterr().out.splitlines()
    head, rows, last = lines[0], lines[1:4], lines[4]
    assert head.split() == ["id", "name", "status", "rows", "groups", "dated", "changed", "sha256", "columns", "note"]
    assert "3 batches in the ledger, 1 active" in last and "\x1b" not in "".join(lines)
    with open_store(store) as st:
        ledger = st.batches()
    for row, b in zip(rows, ledger):
        # left-aligned columns start where their headers start; right-aligned ones end where theirs end
        for col, text in (("name", b.name), ("status", b.status), ("dated", b.dated_at), ("sha256", b.sha256[:12])):
            at, end = head.index(col), head.index(col) + len(text)
            assert row[at:end] == text and row[end : end + 1] in ("", " "), (col, row)
        for col, text in (("rows", str(b.rows)), ("groups", str(b.groups))):
            end = head.index(col) + len(col)
            assert row[:end].endswith(" " + text), (col, row)
        assert row[: len(head[: head.index("name")].rstrip())].strip() == str(b.id)
    note_at = head.index("note")
    assert rows[1][note_at:] == "gauge out of calibration see ticket \\x1b[31m42"
    assert len(rows[2]) <= note_at and len(rows[0]) <= note_at  # no note: nothing after the columns
    assert len(head) > 40 + len(names[1])  # the long name widened its column instead of being cut


def test_forgetting_is_the_weighted_likelihood_of_the_raw_data(tmp_path, new_store):
    rng = np.random.default_rng(6)
    whole = _write_batches(tmp_path, rng, k=3, offset=500.0, spread=2.0, rows=120, groups=4)
    store = new_store()
    days = ["2024-03-01", "2024-03-11", "2024-03-21"]
    for b, day in enumerate(days):
        jobs.ingest_file(store, tmp_path / f"batch-{b}.csv", "lab", "y", at=day)
    with open_store(store) as st:
        snap = st.snapshot()
    ref = parse_when("2024-03-31", "ref")
    w = forgetting_weights(list(snap.batches), ref, half_life_days=10.0)
    # ages 30, 20, 10 days with a 10-day half-life: weights 1/8, 1/4, 1/2 (the formula, by hand)
    np.testing.assert_allclose(w, [0.125, 0.25, 0.5], rtol=1e-15)
    merged = combine(snap.stats, w)
    batch_of = np.repeat(np.arange(3), 120)
    wy = w[batch_of]
    for j, lab in enumerate(merged.labels):
        sel = whole["lab"].to_numpy() == lab
        y, ww = whole["y"].to_numpy()[sel], wy[sel]
        # Source: numpy, weighted sums on the raw rows: n_eff = sum w, mean = sum w y / sum w,
        # M2 = sum w (y - mean)^2 — the statistics of the likelihood with each row's log-density times w
        n_eff = ww.sum()
        mean = np.sum(ww * y) / n_eff
        m2 = np.sum(ww * (y - mean) ** 2)
        assert merged.n[j] == pytest.approx(n_eff, rel=1e-14)
        assert merged.mean[j] + merged.mean_lo[j] == pytest.approx(mean, rel=1e-14)
        assert merged.m2[j] == pytest.approx(m2, rel=1e-11)
    assert merged.n.dtype == np.float64
    # a batch dated after the reference date counts in full
    assert forgetting_weights(list(snap.batches), parse_when("2024-02-01", "ref"), 10.0).tolist() == [1.0, 1.0, 1.0]


def _one_line_exit_2(capsys, argv):
    capsys.readouterr()
    code = cli.main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2, err
    assert len(err) == 1 and err[0].startswith("pooling: bad store") and "Traceback" not in err[0]
    return err[0]


def test_foreign_and_damaged_store_files_give_one_line_and_exit_2(tmp_path, capsys):
    rng = np.random.default_rng(7)
    _write_batches(tmp_path, rng, k=1, offset=0.0, spread=1.0, rows=40, groups=3)
    data = str(tmp_path / "batch-0.csv")
    # a CSV given as the store
    line = _one_line_exit_2(capsys, ["batches", data])
    assert "not an SQLite database" in line
    before = (tmp_path / "batch-0.csv").read_bytes()
    _one_line_exit_2(capsys, ["ingest", data, data, "--group", "lab", "--value", "y"])
    assert (tmp_path / "batch-0.csv").read_bytes() == before
    # an SQLite database of somebody else's
    other = tmp_path / "other.db"
    con = sqlite3.connect(str(other))
    con.execute("CREATE TABLE parts (id INTEGER, strength REAL)")
    con.commit()
    con.close()
    assert "not a pooling store" in _one_line_exit_2(capsys, ["refit", str(other), "--out", str(tmp_path / "r")])
    assert not (tmp_path / "r").exists()
    # an empty file, a folder, a missing file
    (tmp_path / "empty.store").write_bytes(b"")
    assert "empty" in _one_line_exit_2(capsys, ["batches", str(tmp_path / "empty.store")])
    assert "folder" in _one_line_exit_2(capsys, ["batches", str(tmp_path)])
    assert "no such file" in _one_line_exit_2(capsys, ["withdraw", str(tmp_path / "none.store"), "x"])
    # a real store, damaged: pages overwritten with noise, and one cut short
    store = tmp_path / "s.store"
    jobs.ingest_file(store, data, "lab", "y")
    raw = bytearray(store.read_bytes())
    noisy = tmp_path / "noisy.store"
    noisy.write_bytes(bytes(raw[:100]) + rng.integers(0, 256, len(raw) - 100, dtype=np.uint8).tobytes())
    _one_line_exit_2(capsys, ["batches", str(noisy)])
    cut = tmp_path / "cut.store"
    cut.write_bytes(bytes(raw[:60]))
    assert "damaged" in _one_line_exit_2(capsys, ["batches", str(cut)])
    # a store written by a newer format
    newer = tmp_path / "newer.store"
    newer.write_bytes(bytes(raw))
    con = sqlite3.connect(str(newer))
    con.execute("UPDATE pooling_store SET value = '99' WHERE key = 'format'")
    con.commit()
    con.close()
    assert "newer pooling" in _one_line_exit_2(capsys, ["batches", str(newer)])


def test_bad_dates_and_names_are_refused_before_the_store_changes(tmp_path, capsys, new_store):
    rng = np.random.default_rng(8)
    _write_batches(tmp_path, rng, k=1, offset=0.0, spread=1.0, rows=40, groups=3)
    store = new_store()
    code = cli.main(
        ["ingest", str(store), str(tmp_path / "batch-0.csv"), "--group", "lab", "--value", "y", "--at", "last tuesday"]
    )
    assert code == 2 and "--at" in capsys.readouterr().err
    assert not store_exists(store)  # nothing was created for a refused ingest
    with pytest.raises(InputError, match="column 'nope'"):
        jobs.ingest_file(store, tmp_path / "batch-0.csv", "lab", "nope")
    assert not store_exists(store)


def test_bad_refit_options_are_refused_before_any_work(tmp_path, capsys, new_store):
    rng = np.random.default_rng(9)
    _write_batches(tmp_path, rng, k=1, offset=0.0, spread=1.0, rows=40, groups=3)
    store = new_store()
    jobs.ingest_file(store, tmp_path / "batch-0.csv", "lab", "y")
    before = _dump(store)
    for extra, word in (
        (["--half-life", "0"], "--half-life"),
        (["--half-life", "soon"], "--half-life"),
        (["--decide-at", "0.3"], "--decide-at"),
        (["--as-of", "yesterday"], "--as-of"),
        ([], "--out"),
    ):
        capsys.readouterr()
        out = [] if word == "--out" else ["--out", str(tmp_path / "run")]
        code = cli.main(["refit", str(store), *out, *extra])
        err = capsys.readouterr().err.strip().splitlines()
        assert code == 2 and len(err) == 1 and word in err[0], (extra, err)
        assert not (tmp_path / "run").exists()
    assert _dump(store) == before


def test_labels_in_two_unicode_forms_are_refused_at_ingest_and_at_refit(tmp_path, capsys, new_store):
    # Source: Unicode Standard Annex #15: U+00E9 and U+0065 U+0301 are canonically equivalent, so a
    # lab written both ways would silently become two groups.
    one = tmp_path / "mixed.csv"
    one.write_text("lab,y\nCaf\u00e9,1.0\nBar,2.0\nCafe\u0301,1.5\nBar,2.5\n")
    store = new_store()
    code = cli.main(["ingest", str(store), str(one), "--group", "lab", "--value", "y"])
    assert code == 2 and not store_exists(store)
    assert "Unicode form" in capsys.readouterr().err
    # each batch is consistent on its own; together they hold both forms: refit refuses before sampling
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_text("lab,y\nCaf\u00e9,1.0\nBar,2.0\nQux,3.0\nCaf\u00e9,1.2\n")
    b.write_text("lab,y\nCafe\u0301,1.5\nBar,2.5\nQux,2.9\n")
    for f in (a, b):
        assert cli.main(["ingest", str(store), str(f), "--group", "lab", "--value", "y", "--quiet"]) == 0
    capsys.readouterr()
    code = cli.main(["refit", str(store), "--out", str(tmp_path / "run"), "--quiet", "--tau", "half-cauchy:1"])
    err = capsys.readouterr().err
    assert code == 2 and "Unicode form" in err and not (tmp_path / "run").exists()
