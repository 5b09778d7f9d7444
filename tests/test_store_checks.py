"""What a store verifies: checksums on every read, the checkup command, schema versions and upgrades,
random byte flips in a store file, copies between SQLite and PostgreSQL, and credentials.

These are fault and hostile-input tests: they check behaviour (what is refused, with which exit code
and message; what is copied bit for bit), not statistics; the data are small invented tables.
"""

from __future__ import annotations

import json
import os
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from store_helpers import execute, sql_dump, store_exists

from pooling import cli
from pooling.errors import InputError, OutputError
from pooling.stats import read_table
from pooling.store import GroupResult, RunRecord, jobs, open_store
from pooling.store.location import parse_location

V1 = Path(__file__).parent / "data" / "store-v1"
TINY = ["--chains", "2", "--warmup", "100", "--draws", "100", "--max-draws", "100", "--seed", "7", "--quiet"]


def _days(folder: Path, k: int = 3, groups: int = 6, seed: int = 1) -> list[Path]:
    """Deliveries of the labs L0, L1, ...: a value column y, and the group-level column 'method' (A or B by lab)."""
    rng = np.random.default_rng(seed)
    out = []
    for d in range(k):
        rows = [
            (f"L{j}", "AB"[j % 2], rng.normal(50 + j, 2)) for j in range(groups) for _ in range(int(rng.integers(2, 6)))
        ]
        p = folder / f"day-{d}.csv"
        pd.DataFrame(rows, columns=["lab", "method", "y"]).to_csv(p, index=False, float_format="%.17g")
        out.append(p)
    return out


def _run_record(batch_ids, n_groups=6) -> RunRecord:
    """A recorded run as a refit keeps it (invented numbers; a NaN where a value was not computed)."""
    groups = tuple(
        GroupResult(
            f"L{j}",
            4.0 + j,
            50.0 + j,
            50.5 + j,
            0.7,
            49.0 + j,
            52.0 + j,
            1.0 + j,
            0.4,
            p_above=0.25 * (j % 4),
            p_outside=float("nan"),
        )
        for j in range(n_groups)
    )
    # (a 'shared' run's state: a refit of the default 'separate' structure starts afresh from it)
    state = {
        "within": "shared",
        "center": 52.0,
        "scale": 2.0,
        "nu_grid": [1.0, 2.0],
        "labels": [g.label for g in groups],
        "chains": [{"state": [0.1, -0.2, 0.3], "theta": [0.5] * n_groups, "sigma2": [1.5] * n_groups}],
    }
    return RunRecord(
        "2026-11-05T02:30:00+00:00",
        "/srv/runs/2026-11-05",
        "ab" * 32,
        tuple(batch_ids),
        "2026-11-05T02:30:00+00:00",
        30.0,
        True,
        {"model": {"within": "separate"}, "mu": [50.1, 0.3]},
        groups,
        state,
    )


def _store_with_history(store, folder: Path) -> list[Path]:
    """Three deliveries, one withdrawn, one replaced, and a recorded run; every batch keeps its labs' method."""
    files = _days(folder, k=4)
    for d, f in enumerate(files[:3]):
        jobs.ingest_file(store, f, "lab", "y", at=f"2026-11-0{d + 1}", columns=["method"])
    jobs.withdraw_batch(store, "day-1.csv", "bad gauge")
    jobs.ingest_file(store, files[3], "lab", "y", batch="day-2.csv", replace=True, at="2026-11-04", columns=["method"])
    with open_store(store) as st:
        st.record_run(_run_record([b.id for b in st.snapshot().batches]))
    return files


def _one_line(capsys, argv) -> tuple[int, str, str]:
    capsys.readouterr()
    code = cli.main([str(a) for a in argv])
    out, err = capsys.readouterr()
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) <= 1 and "Traceback" not in err, err
    return code, out, lines[0] if lines else ""


# ---------------------------------------------------------------------------------------------
# checksums on every read, on both stores

CHANGES = {
    "n": ("UPDATE batch_groups SET n = n + 1 WHERE batch_id = 1 AND position = 2", "statistics of batch 1"),
    "mean": (
        "UPDATE batch_groups SET mean = mean * (1 + 1e-15) WHERE batch_id = 1 AND position = 0",
        "statistics of batch 1",
    ),
    "mean_lo": (
        "UPDATE batch_groups SET mean_lo = 1e-300 WHERE batch_id = 4 AND position = 1",
        "statistics of batch 4",
    ),
    "m2": ("UPDATE batch_groups SET m2 = 0 WHERE batch_id = 1 AND position = 3", "statistics of batch 1"),
    "label": ("UPDATE batch_groups SET label = 'L9' WHERE batch_id = 1 AND position = 4", "statistics of batch 1"),
    "a group-level value": (
        "UPDATE batch_columns SET value = 'B' WHERE batch_id = 1 AND position = 2",
        "statistics of batch 1",
    ),
    "a group-level row gone": (
        "DELETE FROM batch_columns WHERE batch_id = 4 AND position = 0",
        "statistics of batch 4",
    ),
    "a group-level row added": (
        "INSERT INTO batch_columns (batch_id, column_name, position, value) VALUES (1, 'age', 0, '7')",
        "statistics of batch 1",
    ),
    "a group row gone": ("DELETE FROM batch_groups WHERE batch_id = 4 AND position = 5", "statistics of batch 4"),
    "date": ("UPDATE batches SET dated_at = '2026-10-01T00:00:00+00:00' WHERE id = 1", "ledger line of batch 1"),
    "status": ("UPDATE batches SET status = 'active' WHERE id = 2", "ledger line of batch 2"),
    "rows": ('UPDATE batches SET "rows" = 1000 WHERE id = 3', "ledger line of batch 3"),
    "a ledger line gone": ("DELETE FROM batches WHERE id = 2", "ledger head"),
    "the head": ("UPDATE store_head SET batch_lines = batch_lines + 1", "ledger head"),
    "run result": ("UPDATE run_groups SET post_mean = 0 WHERE position = 1", "group results of run 1"),
    "run state": ("UPDATE runs SET final_state = replace(final_state, '0.5', '0.6')", "final state kept by run 1"),
    "run line": ("UPDATE runs SET half_life_days = 7", "record of run 1"),
}


@pytest.mark.parametrize("change", list(CHANGES))
def test_a_number_changed_behind_the_store_refuses_the_refit(change, tmp_path, capsys, backend, new_store):
    store = new_store()
    _store_with_history(store, tmp_path)
    sql, names = CHANGES[change]
    if change == "a ledger line gone":  # its statistics go first (the foreign key would refuse otherwise)
        execute(store, "DELETE FROM batch_columns WHERE batch_id = 2")
        execute(store, "DELETE FROM batch_groups WHERE batch_id = 2")
    execute(store, sql)
    out = tmp_path / "run"
    code, _, line = _one_line(capsys, ["refit", store, "--out", out, "--force", *TINY])
    assert code == 2 and names in line, line
    assert line.startswith("pooling: bad store") and not out.exists()
    code, listed, line = _one_line(capsys, ["checkup", store])
    assert code == 2 and "problem(s) found" in line
    assert any(names in ln for ln in listed.splitlines()), listed


def test_checkup_of_a_sound_store_and_its_exit_codes(tmp_path, capsys, backend, new_store):
    store = new_store()
    _store_with_history(store, tmp_path)
    code, out, err = _one_line(capsys, ["checkup", store])
    assert code == 0 and err == ""
    assert "sound" in out and "4 batches in the ledger (2 active" in out and "1 recorded runs" in out
    # several problems: one line each
    execute(store, "UPDATE batch_groups SET m2 = m2 + 1 WHERE batch_id = 1 AND position = 0")
    execute(store, "UPDATE batches SET note = 'edited' WHERE id = 2")
    code, out, err = _one_line(capsys, ["checkup", store])
    problems = out.strip().splitlines()
    assert code == 2 and "2 problem(s)" in err and len(problems) == 2
    assert sum("statistics of batch 1" in p for p in problems) == 1
    assert sum("ledger line of batch 2" in p for p in problems) == 1


def test_a_newer_schema_version_is_refused_with_one_line(tmp_path, capsys, backend, new_store):
    store = new_store()
    _store_with_history(store, tmp_path)
    execute(store, "UPDATE pooling_store SET value = '4' WHERE key = 'format'")
    before = sql_dump(store)
    for argv in (
        ["batches", store],
        ["checkup", store],
        ["withdraw", store, "day-0.csv"],
        ["ingest", store, tmp_path / "day-3.csv", "--group", "lab", "--value", "y", "--batch", "x"],
    ):
        code, _, line = _one_line(capsys, argv)
        assert code == 2 and "schema version 4 was written by a newer pooling" in line, line
    assert sql_dump(store) == before


def test_an_ingest_dated_past_the_last_instant_is_refused(tmp_path, capsys, backend, new_store):
    store = new_store()
    f = _days(tmp_path, k=1)[0]
    for at in ("9999-12-31T23:59-14:00", "0001-01-01T00:00+14:00"):
        code, _, line = _one_line(capsys, ["ingest", store, f, "--group", "lab", "--value", "y", "--at", at])
        assert code == 2 and "--at" in line and at in line, line
    assert not store_exists(store)


# ---------------------------------------------------------------------------------------------
# SQLite: random single-byte flips in a store file


def _raw_tables(path: Path):
    """Every row of every data table, read with plain sqlite3 (no checks of ours): what the file holds."""
    con = sqlite3.connect(str(path))
    con.text_factory = bytes  # text as stored, even when a flip made it invalid UTF-8
    try:
        out = {}
        for t in ("pooling_store", "store_head", "batches", "batch_groups", "batch_columns", "runs", "run_groups"):
            rows = con.execute(f"SELECT * FROM {t} ORDER BY 1, 2").fetchall()
            out[t] = [
                tuple(("f", np.float64(x).view(np.uint64).item()) if isinstance(x, float) else x for x in r)
                for r in rows
            ]
        return out
    finally:
        con.close()


def _read_back(path: Path):
    """Everything a refit and `pooling batches` read, through the store (its checks included)."""
    with open_store(path) as st:
        snap = st.snapshot()
        ledger = st.batches()
        runs = st.runs()
        last = st.last_run()

    def bits(a):
        return np.asarray(a, dtype=np.float64).view(np.uint64).tolist()

    stats = [
        (s.batch_id, s.labels, s.n.tolist(), bits(s.mean), bits(s.mean_lo), bits(s.m2), s.columns) for s in snap.stats
    ]
    groups = [
        (
            g.label,
            bits(
                [
                    g.n,
                    g.raw_mean,
                    g.post_mean,
                    g.post_sd,
                    g.q_lo,
                    g.q_hi,
                    g.rank_mean,
                    g.rank_sd,
                    g.p_above,
                    g.p_outside,
                ]
            ),
        )
        for g in last.groups
    ]
    run_fields = [
        (
            r.id,
            r.created_at,
            r.folder,
            r.state_sha256,
            r.batch_ids,
            r.reference_at,
            r.half_life_days,
            r.targets_met,
            json.dumps(r.summary),
        )
        for r in runs
    ]
    return (
        snap.batches,
        stats,
        snap.state_sha256,
        ledger,
        run_fields,
        groups,
        json.dumps(last.final_state),
        json.dumps(last.summary),
    )


def test_random_single_byte_flips_never_pass_silently(tmp_path):
    """Every flip that changes a stored value is refused: by the refit's own reads (a checksum, or SQLite)
    when a refit reads that value, and by `pooling checkup` when only the checkup reads it (the
    statistics of withdrawn and replaced batches); no flip changes what a refit reads unrefused.

    5,000 flips at offsets drawn uniformly over the file (fixed seed), each XOR-ing one byte with a
    value in 1..255, each in a fresh copy of the store; the store holds four ledger lines (one
    withdrawn, one replaced), their statistics and a recorded run. For each flip: what plain sqlite3
    reads from the tables (did a stored value change?), then everything a refit and `pooling batches`
    read through the store. The counts are printed (pytest -s shows them).
    """
    store = tmp_path / "s.store"
    _store_with_history(store, tmp_path)
    reference = _read_back(store)
    raw_reference = _raw_tables(store)
    original = store.read_bytes()
    rng = np.random.default_rng(20261203)
    counts = dict.fromkeys(
        [
            "flips",
            "changed a stored value",
            "of which refused",
            "refused by a checksum",
            "refused by SQLite or the file checks",
            "changed only the creation note",
            "damage off the read path, reported by checkup",
            "changed a value no refit reads, refused by checkup",
            "changed nothing read back",
            "silent changes",
        ],
        0,
    )
    silent = []
    copy = tmp_path / "flip.store"

    def fresh(data: bytes) -> None:
        for suffix in ("", "-wal", "-shm"):
            Path(f"{copy}{suffix}").unlink(missing_ok=True)
        copy.write_bytes(data)

    for _ in range(5000):
        at = int(rng.integers(0, len(original)))
        data = bytearray(original)
        data[at] ^= int(rng.integers(1, 256))
        counts["flips"] += 1
        fresh(bytes(data))
        try:
            raw = _raw_tables(copy)
            changed = raw != raw_reference
            note_only = (
                changed
                and all(raw[t] == raw_reference[t] for t in raw if t != "pooling_store")
                and [r for r in raw["pooling_store"] if r[0] == b"format"]
                == [r for r in raw_reference["pooling_store"] if r[0] == b"format"]
            )
        except (sqlite3.DatabaseError, ValueError):  # ValueError: a column name that is no longer UTF-8
            raw, changed, note_only = None, False, False  # plain queries cannot read the tables
        counts["changed a stored value"] += changed
        fresh(bytes(data))
        try:
            got = _read_back(copy)
        except (InputError, OutputError) as exc:  # OutputError: e.g. SQLite's 'disk I/O error' on a bad header
            msg = str(exc)
            by_sum = "checksum" in msg or "ledger head" in msg
            counts["refused by a checksum" if by_sum else "refused by SQLite or the file checks"] += 1
            counts["of which refused"] += changed
            continue
        if got != reference:
            counts["silent changes"] += 1
            silent.append(at)
        elif note_only:
            counts["changed only the creation note"] += 1  # created_at / created_by: no command reads them
        elif raw is None:
            # damage where no command reads (an index, free space of a page): SQLite's integrity check, run by
            # `pooling checkup`, must report it
            fresh(bytes(data))
            try:
                found = jobs.check_store(copy)[1]
            except (InputError, OutputError):
                found = ["refused"]
            assert found, f"flip at {at}: plain queries fail, yet the checkup found nothing"
            counts["damage off the read path, reported by checkup"] += 1
        elif changed:
            # a value a refit does not read (the statistics of a withdrawn or replaced batch): the checkup,
            # which reads everything, must refuse it
            fresh(bytes(data))
            found = jobs.check_store(copy)[1]
            assert found, f"flip at {at} changed a stored value, yet neither a refit nor the checkup refused it"
            counts["changed a value no refit reads, refused by checkup"] += 1
            counts["of which refused"] += 1
        else:
            counts["changed nothing read back"] += 1
    print("\nbyte flips in a store file:", json.dumps(counts))
    assert counts["silent changes"] == 0, f"flips at offsets {silent[:10]} changed what a refit reads, unrefused"
    assert counts["changed a stored value"] == counts["of which refused"] + counts["changed only the creation note"]
    assert counts["refused by a checksum"] >= 100  # the flips did reach the stored numbers


# ---------------------------------------------------------------------------------------------
# SQLite: stores of schema version 1 (made before checksums) are upgraded in place


def test_a_schema_1_store_is_upgraded_in_place_by_the_first_command(tmp_path, capsys):
    store = tmp_path / "v1.store"
    shutil.copy(V1 / "v1.store", store)
    con = sqlite3.connect(str(store))
    assert con.execute("SELECT value FROM pooling_store WHERE key = 'format'").fetchone() == ("1",)
    before = {t: con.execute(f"SELECT * FROM {t} ORDER BY 1, 2").fetchall() for t in ("batch_groups", "run_groups")}
    ledger_before = con.execute("SELECT id, name, status, changed_at, note FROM batches ORDER BY id").fetchall()
    con.close()
    code, out, _ = _one_line(capsys, ["batches", store])
    assert code == 0 and "4 batches in the ledger, 2 active; 1 recorded runs" in out
    con = sqlite3.connect(str(store))
    assert con.execute("SELECT value FROM pooling_store WHERE key = 'format'").fetchone() == ("3",)  # 1 -> 2 -> 3
    assert con.execute("PRAGMA user_version").fetchone() == (3,)
    after = {t: con.execute(f"SELECT * FROM {t} ORDER BY 1, 2").fetchall() for t in ("batch_groups", "run_groups")}
    assert after == before  # not a number changed
    assert con.execute("SELECT id, name, status, changed_at, note FROM batches ORDER BY id").fetchall() == ledger_before
    con.close()
    # the statistics are those of the delivered files; the history and the run are kept
    with open_store(store) as st:
        snap, last = st.snapshot(), st.last_run()
    for b, s in zip(snap.batches, snap.stats):
        ref = read_table(V1 / {"day-1.csv": "day-1.csv", "day-3.csv": "day-4.csv"}[b.name], "lab", "y")
        assert s.labels == ref.labels and np.array_equal(s.n, ref.n) and np.array_equal(s.m2, ref.m2)
    assert len(last.groups) == 6 and last.final_state["chains"]
    code, out, _ = _one_line(capsys, ["checkup", store])
    assert code == 0 and "sound" in out
    # and from now on a changed number is refused
    execute(store, "UPDATE batch_groups SET n = n + 1 WHERE batch_id = 1 AND position = 0")
    code, _, line = _one_line(capsys, ["refit", store, "--out", tmp_path / "r", "--force", *TINY])
    assert code == 2 and "statistics of batch 1" in line


def test_two_jobs_opening_a_schema_1_store_at_once_upgrade_it_once(tmp_path):
    store = tmp_path / "v1.store"
    shutil.copy(V1 / "v1.store", store)
    procs = [
        subprocess.Popen(
            [sys.executable, "-m", "pooling.cli", "checkup", str(store)],
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for _ in range(3)
    ]
    for p in procs:
        out, err = p.communicate(timeout=120)
        assert p.returncode == 0 and "sound" in out, err
    con = sqlite3.connect(str(store))
    assert con.execute("SELECT count(*) FROM store_head").fetchone() == (1,)
    con.close()


def test_a_damaged_schema_1_store_is_not_upgraded(tmp_path, capsys):
    store = tmp_path / "v1.store"
    raw = bytearray((V1 / "v1.store").read_bytes())
    raw[4096 * 3 : 4096 * 3 + 200] = bytes(200)  # zeros over the top of a page
    store.write_bytes(bytes(raw))
    code, _, line = _one_line(capsys, ["batches", store])
    assert code == 2 and line.startswith("pooling: bad store") and "damaged" in line
    con = sqlite3.connect(str(store))
    try:
        fmt = con.execute("SELECT value FROM pooling_store WHERE key = 'format'").fetchone()
    except sqlite3.DatabaseError:
        fmt = ("1",)
    con.close()
    assert fmt == ("1",)


# ---------------------------------------------------------------------------------------------
# copies between SQLite and PostgreSQL, both ways, bit for bit


def test_a_store_copied_to_postgresql_and_back_is_the_same_bit_for_bit(tmp_path, capsys, pg_cluster):
    first = tmp_path / "first.store"
    _store_with_history(first, tmp_path)
    # a real refit, so that the copied run holds what refits keep (summary, results, chains' final state)
    assert cli.main(["refit", str(first), "--out", str(tmp_path / "run-1"), "--force", *TINY]) in (0, 3)
    pg = pg_cluster.new_url()
    back = tmp_path / "back.store"
    code, out, err = _one_line(capsys, ["copy-store", first, pg])
    assert code == 0 and "identical to the original" in out, err
    code, out, err = _one_line(capsys, ["copy-store", pg, back])
    assert code == 0, err
    with open_store(first) as a, open_store(pg) as b, open_store(back) as c:
        ca, cb, cc = a.export(), b.export(), c.export()
    assert jobs.content_differences(ca, cb) == [] and jobs.content_differences(ca, cc) == []

    # the same, independently of the copying code: every row of every table, floats by their bits
    def rows(where):
        return [ln for ln in sql_dump(where) if "copied_" not in ln]

    assert rows(first) == rows(pg) == rows(back)
    stored = sum(len(s.labels) for s in ca.stats.values())
    assert len([ln for ln in rows(pg) if ln.startswith("batch_groups")]) == stored
    with open_store(first) as a, open_store(pg) as b:
        sa, sb = a.snapshot(), b.snapshot()
        assert [x.to_dict() for x in a.batches()] == [x.to_dict() for x in b.batches()]
        la, lb = a.last_run(), b.last_run()
    for x, y in zip(sa.stats, sb.stats):
        assert x.labels == y.labels and x.n.tolist() == y.n.tolist()
        assert x.columns == y.columns and set(x.columns) == {"method"}
        for f in ("mean", "mean_lo", "m2"):
            assert getattr(x, f).view(np.uint64).tolist() == getattr(y, f).view(np.uint64).tolist()
    assert sa.state_sha256 == sb.state_sha256 and la.final_state == lb.final_state and la.summary == lb.summary
    # the copy carries the run record: nothing new to refit there
    code, _, line = _one_line(capsys, ["refit", pg, "--out", tmp_path / "run-2", *TINY])
    assert code == 4 and "nothing new" in line
    # and it works as a store: a new delivery lands, is checked and refitted
    late = _days(tmp_path / "late", k=1, seed=99)[0] if (tmp_path / "late").mkdir() is None else None
    assert (
        cli.main(
            [
                "ingest",
                pg,
                str(late),
                "--group",
                "lab",
                "--value",
                "y",
                "--batch",
                "late",
                "--column",
                "method",
                "--quiet",
            ]
        )
        == 0
    )
    assert cli.main(["refit", pg, "--out", str(tmp_path / "run-3"), *TINY]) in (0, 3)


def test_copy_refuses_an_existing_target_and_a_damaged_source(tmp_path, capsys, pg_cluster):
    src = tmp_path / "src.store"
    _store_with_history(src, tmp_path)
    taken = pg_cluster.new_url()
    assert cli.main(["copy-store", str(src), taken]) == 0
    before = sql_dump(taken)
    code, _, line = _one_line(capsys, ["copy-store", src, taken])
    assert code == 2 and "exists already" in line and sql_dump(taken) == before
    other = tmp_path / "other.store"
    other.write_text("mine")
    code, _, line = _one_line(capsys, ["copy-store", taken, other])
    assert code == 2 and "exists already" in line and other.read_text() == "mine"
    execute(src, "UPDATE batch_groups SET mean = 0 WHERE batch_id = 3 AND position = 0")
    fresh = pg_cluster.new_url()
    code, _, line = _one_line(capsys, ["copy-store", src, fresh])
    assert code == 2 and "statistics of batch 3" in line and not store_exists(fresh)


# ---------------------------------------------------------------------------------------------
# PostgreSQL: stores in one database, connections, credentials


def test_several_stores_share_one_database_and_a_foreign_schema_is_refused(tmp_path, capsys, pg_cluster):
    files = _days(tmp_path, k=2)
    a, b = pg_cluster.url("plant_a"), pg_cluster.url("plant_b")
    assert cli.main(["ingest", a, str(files[0]), "--group", "lab", "--value", "y", "--quiet"]) == 0
    assert cli.main(["ingest", b, str(files[1]), "--group", "lab", "--value", "y", "--quiet"]) == 0
    with open_store(a) as sa, open_store(b) as sb:
        assert [x.name for x in sa.batches()] == ["day-0.csv"] and [x.name for x in sb.batches()] == ["day-1.csv"]
    import psycopg

    with psycopg.connect(parse_location(a).conninfo, autocommit=True) as con:
        con.execute("CREATE SCHEMA theirs")
        con.execute("CREATE TABLE theirs.parts (id int)")
    code, _, line = _one_line(capsys, ["ingest", pg_cluster.url("theirs"), files[0], "--group", "lab", "--value", "y"])
    assert code == 2 and "not a pooling store" in line
    code, _, line = _one_line(capsys, ["batches", pg_cluster.url("nothing_here")])
    assert code == 2 and "no store 'nothing_here'" in line
    code, _, line = _one_line(capsys, ["batches", pg_cluster.url("Bad")])
    assert code == 2 and "store name" in line


def _run_cmd(argv, env_extra=None, env_drop=()):
    env = {k: v for k, v in os.environ.items() if k not in env_drop}
    env.update(env_extra or {})
    p = subprocess.run(
        [sys.executable, "-m", "pooling.cli", *map(str, argv)], capture_output=True, text=True, timeout=120, env=env
    )
    return p.returncode, p.stdout, p.stderr


def test_credentials_never_on_the_command_line_nor_in_any_output(tmp_path, pg_cluster):
    from pg_cluster import PASSWORD, ROLE

    f = _days(tmp_path, k=1)[0]
    store = pg_cluster.new_url()
    # a URL holding the password is refused before anything happens, and the password is not echoed
    with_pw = store.replace(f"{ROLE}@", f"{ROLE}:{PASSWORD}@")
    code, out, err = _run_cmd(["ingest", with_pw, f, "--group", "lab", "--value", "y"])
    assert code == 2 and "holds a password" in err and PASSWORD not in out + err
    base, _, name = store.partition("#")
    code, out, err = _run_cmd(["ingest", f"{base}&password={PASSWORD}#{name}", f, "--group", "lab", "--value", "y"])
    assert code == 2 and PASSWORD not in out + err
    code, out, err = _run_cmd(["ingest", f"{store}&password={PASSWORD}", f, "--group", "lab", "--value", "y"])
    assert code == 2 and PASSWORD not in out + err
    assert not store_exists(store)
    # the password file is how it gets there; a whole nightly round leaves it nowhere
    assert _run_cmd(["ingest", store, f, "--group", "lab", "--value", "y"])[0] == 0
    code, out, err = _run_cmd(["refit", store, "--out", tmp_path / "run", "--tau", "half-cauchy:2", *TINY])
    assert code in (0, 3), err
    texts = [out, err] + [
        p.read_text(errors="replace") for p in (tmp_path / "run").iterdir() if p.suffix in (".json", ".csv", ".html")
    ]
    assert all(PASSWORD not in t for t in texts)
    assert json.loads((tmp_path / "run" / "changes.json").read_text())["store"]["path"] == store
    # a wrong password (from a password file, or PGPASSWORD): exit 6, one line naming host and database
    wrong = tmp_path / "wrong-pgpass"
    wrong.write_text(f"*:*:*:{ROLE}:not-{PASSWORD}\n")
    wrong.chmod(0o600)
    for extra in ({"PGPASSFILE": str(wrong)}, {"PGPASSWORD": "Wrong-" + PASSWORD, "PGPASSFILE": str(wrong)}):
        code, out, err = _run_cmd(["batches", store], extra)
        lines = err.strip().splitlines()
        assert code == 6 and len(lines) == 1, err
        assert f"host {pg_cluster.sock}" in lines[0] and "database pooltest" in lines[0]
        assert "password authentication failed" in lines[0] and "try again later" in lines[0]
        assert PASSWORD not in out + err
    # no server there: exit 6 too
    code, out, err = _run_cmd(["batches", store.replace(str(pg_cluster.sock), str(tmp_path))])
    assert code == 6 and len(err.strip().splitlines()) == 1 and f"host {tmp_path}" in err


def test_a_libpq_service_names_the_database(tmp_path, pg_cluster):
    from pg_cluster import DATABASE, PORT, ROLE

    services = tmp_path / "services.conf"
    services.write_text(f"[plant]\nhost={pg_cluster.sock}\nport={PORT}\ndbname={DATABASE}\nuser={ROLE}\n")
    env = {"PGSERVICEFILE": str(services)}
    f = _days(tmp_path, k=1)[0]
    code, out, err = _run_cmd(["ingest", "service=plant#by_service", f, "--group", "lab", "--value", "y"], env)
    assert code == 0 and "created the store 'service=plant#by_service'" in out, err
    code, out, err = _run_cmd(["batches", "service=plant#by_service", "--json"], env)
    assert code == 0 and json.loads(out)["store"] == "service=plant#by_service"
    code, out, err = _run_cmd(["batches", "service=elsewhere"], env)
    assert code == 2 and "elsewhere" in err and len(err.strip().splitlines()) == 1
    # a file whose name begins with service= is written ./service=...
    code, out, err = _run_cmd(["ingest", "./service=plant.store", f, "--group", "lab", "--value", "y"], env_extra=env)
    assert code == 0 and (Path.cwd() / "service=plant.store").exists(), err
    (Path.cwd() / "service=plant.store").unlink()


def test_the_command_line_imports_psycopg_only_for_a_postgresql_store(tmp_path):
    store = tmp_path / "s.store"
    jobs.ingest_file(store, _days(tmp_path, k=1)[0], "lab", "y")
    probe = (
        "import sys; from pooling.cli import main; code = main(['batches', sys.argv[1]]); "
        "print('psycopg' in sys.modules, code)"
    )
    out = subprocess.run([sys.executable, "-c", probe, str(store)], capture_output=True, text=True, timeout=120).stdout
    assert out.strip().splitlines()[-1] == "False 0"


def test_the_readme_team_commands_run_against_a_server(tmp_path, pg_cluster):
    """The README's PostgreSQL section, as written: its service file, its nightly lines and its copies, with the
    example server replaced by the throwaway cluster (the password comes from the cluster's password file)."""
    from pg_cluster import DATABASE, PORT, ROLE

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = readme.split("<!-- team store section -->")[1].split("<!-- /team store section -->")[0]
    service = section[section.index("[plant]") :].split("\n\n")[0]
    values = {"host": str(pg_cluster.sock), "port": str(PORT), "dbname": DATABASE, "user": ROLE}
    lines = [ln.strip() for ln in service.splitlines()]
    assert [ln.split("=")[0] for ln in lines[1:]] == list(values)
    (tmp_path / "services.conf").write_text("[plant]\n" + "".join(f"{k}={v}\n" for k, v in values.items()))
    commands = [ln.strip() for ln in section.splitlines() if ln.strip().startswith(".venv/bin/pooling")]
    assert len(commands) == 4
    example = "postgresql://quality@db.plant.example/quality"
    day = "2026-12-01"
    (tmp_path / "incoming").mkdir()
    (tmp_path / "incoming" / f"{day}.csv").write_text(
        "supplier,strength\n" + "".join(f"S{j},{400 + j + 0.5 * k}\n" for j in range(5) for k in range(4))
    )
    jobs.ingest_file(tmp_path / "parts.store", tmp_path / "incoming" / f"{day}.csv", "supplier", "strength")
    env = dict(os.environ, PGSERVICEFILE=str(tmp_path / "services.conf"))
    for cmd in commands:
        # (the cluster's URL holds '&', which the shell must not see unquoted)
        cmd = cmd.replace(".venv/bin/pooling", f"{sys.executable} -m pooling.cli")
        cmd = cmd.replace(example, f"'{pg_cluster.url()}'")
        cmd = cmd.replace("$day", day) + (" --draws 200 --warmup 200" if " refit " in cmd else "")
        proc = subprocess.run(["bash", "-c", cmd], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)
        assert proc.returncode in (0, 3), f"{cmd}\n{proc.stdout}\n{proc.stderr}"
    assert (tmp_path / "castings-2026-12.store").exists() and (tmp_path / "runs" / day / "changes.json").exists()
    assert store_exists(pg_cluster.url("parts")) and store_exists(pg_cluster.url("castings"))


def test_without_psycopg_a_postgresql_store_is_one_line(tmp_path):
    probe = (
        "import sys; sys.modules['psycopg'] = None; from pooling.cli import main; "
        "sys.exit(main(['batches', 'postgresql://quality@db.plant.example/quality#castings']))"
    )
    p = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, timeout=120)
    lines = p.stderr.strip().splitlines()
    assert p.returncode == 2 and len(lines) == 1 and "pip install 'pooling[postgresql]'" in lines[0], p.stderr


def test_a_postgresql_store_held_too_long_is_busy_exit_6(tmp_path, pg_cluster):
    """Two jobs with the same delivery name meet on an advisory lock; past the busy timeout: exit 6, nothing changed."""
    import psycopg

    store = pg_cluster.new_url()
    files = _days(tmp_path, k=2)
    jobs.ingest_file(store, files[0], "lab", "y")
    before = sql_dump(store)
    loc = parse_location(store)
    with psycopg.connect(loc.conninfo) as other:  # another job, inside its transaction, holding the name
        other.execute("SELECT pg_advisory_xact_lock(hashtextextended(%s, 0))", (f"pooling:{loc.name}:name:late",))
        with pytest.raises(OutputError, match="is busy: another job held it for more than 1 s"):
            jobs.ingest_file(store, files[1], "lab", "y", batch="late", busy_seconds=1.0)
        # a delivery of another name is not held up
        jobs.ingest_file(store, files[1], "lab", "y", batch="other", busy_seconds=1.0)
    assert len(sql_dump(store)) > len(before)
    with open_store(store) as st:
        assert [b.name for b in st.batches()] == ["day-0.csv", "other"]
