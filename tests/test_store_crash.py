"""Crashes and concurrent jobs, on both stores: a SIGKILL in the middle of an ingest, three ingests at
the same time, a refit while another process ingests, the PostgreSQL server stopped in the middle of
a transaction, and store creations killed half-way (SQLite).

Why a controlled pause rather than kills at random times: an ingest spends almost all of its
wall time starting Python and reading the file, before its transaction opens, so random kills
nearly always land where there is nothing to prove. The test-only hook in pooling.store.ledger
(POOLING_TEST_INGEST_PAUSE*) stops the process inside its open transaction, at two points: with
half of the group rows written, and with every row written just before COMMIT; a resume file ends
the pause when the test says so. With 60,000 groups the uncommitted pages spill from SQLite's
cache into the WAL file, so the kill leaves uncommitted frames on disk that recovery must
discard; the test checks that they were there.

Every subprocess is bounded in time.
"""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from store_helpers import sql_dump as _dump
from store_helpers import store_exists

from pooling.stats import read_table
from pooling.store import combine, jobs, open_store
from pooling.store.ledger import PAUSE_AT_ENV, PAUSE_ENV, PAUSE_SECONDS_ENV, RESUME_ENV
from pooling.store.location import parse_location

BOUND = 120  # seconds any one subprocess may take before the test fails
TINY_REFIT = [
    "--chains",
    "2",
    "--warmup",
    "100",
    "--draws",
    "100",
    "--max-draws",
    "100",
    "--seed",
    "4",
    "--quiet",
    "--tau",
    "half-cauchy:1",
]


def _integrity(store) -> list[str]:
    """SQLite's integrity check and every checksum (the store's own `checkup`)."""
    return jobs.check_store(store)[1]


def _ingest_cmd(store, file, group="g", value="y", *extra):
    return [
        sys.executable,
        "-m",
        "pooling.cli",
        "ingest",
        str(store),
        str(file),
        "--group",
        group,
        "--value",
        value,
        *extra,
    ]


def _spawn(cmd, env=None):
    return subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _paused_env(tmp_path: Path, point: str, seconds: float = 100) -> tuple[dict, Path, Path]:
    marker, resume = tmp_path / f"paused-{point}", tmp_path / f"resume-{point}"
    env = dict(
        os.environ,
        **{PAUSE_ENV: str(marker), PAUSE_AT_ENV: point, PAUSE_SECONDS_ENV: str(seconds), RESUME_ENV: str(resume)},
    )
    return env, marker, resume


def _wait_for(path: Path, proc: subprocess.Popen, seconds: float = BOUND):
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if path.exists():
            return
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"the process ended before its pause (exit {proc.returncode}): {err}")
        time.sleep(0.05)
    proc.kill()
    raise AssertionError("the process never reached its pause")


def _finish(proc: subprocess.Popen) -> tuple[int, str, str]:
    out, err = proc.communicate(timeout=BOUND)
    return proc.returncode, out, err


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("crash")
    rng = np.random.default_rng(21)
    J = 60_000
    labels = np.array([f"site-{i:05d}" for i in range(J)])
    pd.DataFrame({"g": np.concatenate([labels, labels[:5000]]), "y": rng.normal(1e9, 0.1, J + 5000)}).to_csv(
        d / "big.csv", index=False, float_format="%.17g"
    )
    for k in range(4):
        pd.DataFrame({"g": rng.choice(labels[:40], 300), "y": rng.normal(5.0, 1.0, 300)}).to_csv(
            d / f"small-{k}.csv", index=False, float_format="%.17g"
        )
    return d


def _same_as_files(store, folder: Path) -> None:
    """Each active batch's statistics are exactly those of its own file."""
    with open_store(store) as st:
        snap = st.snapshot()
    for b, s in zip(snap.batches, snap.stats):
        ref = read_table(folder / b.source.split("/")[-1], "g", "y")
        assert s.labels == ref.labels and np.array_equal(s.n, ref.n) and np.array_equal(s.m2, ref.m2)
        assert np.array_equal(s.mean, ref.mean) and np.array_equal(s.mean_lo, ref.mean_lo)


@pytest.mark.parametrize("point", ["middle", "before-commit"])
def test_sigkill_inside_the_ingest_transaction_leaves_the_store_as_before(files, tmp_path, point, backend, new_store):
    store = new_store()
    jobs.ingest_file(store, files / "small-0.csv", "g", "y")
    before = _dump(store)
    env, marker, _ = _paused_env(tmp_path, point)
    proc = _spawn(_ingest_cmd(store, files / "big.csv"), env)
    _wait_for(marker, proc)
    loc = parse_location(store)
    wal = Path(f"{loc.path}-wal") if not loc.is_postgresql else None
    uncommitted = wal.stat().st_size if wal is not None and wal.exists() else 0
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=BOUND)
    assert proc.returncode == -signal.SIGKILL
    if point == "before-commit" and backend == "sqlite":
        # the transaction's pages had reached the WAL file: there was something to roll back
        assert uncommitted > 100 * 4096  # over a hundred pages of frames
    if backend == "postgresql":
        time.sleep(0.5)  # the server ends the dead client's session (and its transaction) when it sees the socket close
    assert _dump(store) == before
    assert _integrity(store) == []
    # no lock is left behind: the same file now ingests normally, whole
    info, _ = jobs.ingest_file(store, files / "big.csv", "g", "y")
    with open_store(store) as st:
        snap = st.snapshot()
    assert len(snap.batches) == 2
    got = combine(snap.stats[1:])
    ref = read_table(files / "big.csv", "g", "y")
    assert info.rows == ref.N and got.labels == ref.labels
    assert np.array_equal(got.n, ref.n) and np.array_equal(got.m2, ref.m2)


def test_three_ingests_at_the_same_time_all_land(files, tmp_path, backend, new_store):
    # 1) three start together on a store that does not exist yet: a race to create it and to write
    store = new_store()
    procs = [_spawn(_ingest_cmd(store, files / f"small-{k}.csv")) for k in (0, 1, 2)]
    for p in procs:
        code, _, err = _finish(p)
        assert code == 0, err
    with open_store(store) as st:
        names = sorted(b.name for b in st.snapshot().batches)
    assert names == ["small-0.csv", "small-1.csv", "small-2.csv"]

    # 2) one is paused inside its transaction; two more start meanwhile. The store holds a batch already:
    # ingests into a store without active batches wait for each other on PostgreSQL, since the first to
    # land chooses the store's value and group columns (ledger._check_quantity)
    store = new_store("second")
    assert _finish(_spawn(_ingest_cmd(store, files / "small-0.csv")))[0] == 0
    env, marker, resume = _paused_env(tmp_path, "middle")
    first = _spawn(_ingest_cmd(store, files / "big.csv"), env)
    _wait_for(marker, first)
    others = [_spawn(_ingest_cmd(store, files / f"small-{k}.csv")) for k in (1, 2)]
    if backend == "postgresql":
        # different deliveries do not wait for each other (advisory locks on name and content, not a table
        # lock): both land while the first is still paused in the middle of its transaction
        for p in others:
            code, _, err = _finish(p)
            assert code == 0, err
        assert first.poll() is None
        resume.touch()
    else:
        # SQLite has one writer at a time: the others wait on the busy timeout and land after the first
        time.sleep(1.0)
        assert all(p.poll() is None for p in others)
        resume.touch()
        for p in others:
            code, _, err = _finish(p)
            assert code == 0, err
    code, _, err = _finish(first)
    assert code == 0, err
    with open_store(store) as st:
        ledger = st.batches()
    if backend == "sqlite":
        assert [b.name for b in ledger][:2] == ["small-0.csv", "big.csv"]
    assert sorted(b.name for b in ledger) == ["big.csv", "small-0.csv", "small-1.csv", "small-2.csv"]
    _same_as_files(store, files)
    assert _integrity(store) == []


def test_a_refit_while_another_process_ingests(files, tmp_path, backend, new_store):
    store = new_store()
    for k in (0, 1, 2):
        jobs.ingest_file(store, files / f"small-{k}.csv", "g", "y")
    env, marker, resume = _paused_env(tmp_path, "middle")
    ingest = _spawn(_ingest_cmd(store, files / "small-3.csv"), env)
    _wait_for(marker, ingest)
    out = tmp_path / "run-1"
    refit = _spawn([sys.executable, "-m", "pooling.cli", "refit", str(store), "--out", str(out), *TINY_REFIT])
    if backend == "sqlite":
        # the refit reads without waiting (WAL); recording its run needs the write lock, which the paused
        # ingest holds: let the ingest go once the run folder is in place
        deadline = time.monotonic() + BOUND
        while not (out / "summary.json").exists():
            assert refit.poll() is None and time.monotonic() < deadline, refit.communicate()
            time.sleep(0.05)
    else:
        code, _, err = _finish(refit)  # PostgreSQL: reads and records without waiting for the ingest
        assert code in (0, 3), err
        assert ingest.poll() is None
    resume.touch()
    code, _, err = _finish(ingest)
    assert code == 0, err
    code, _, err = _finish(refit)
    assert code in (0, 3), err
    with open_store(store) as st:
        runs = st.runs()
        ledger = {b.name: b.id for b in st.batches()}
    # the refit saw exactly the three batches committed before it read, none of the half-written one
    assert len(runs) == 1 and sorted(runs[0].batch_ids) == sorted(ledger[f"small-{k}.csv"] for k in (0, 1, 2))
    rows = sum(len(pd.read_csv(files / f"small-{k}.csv")) for k in (0, 1, 2))
    import json

    assert json.loads((out / "summary.json").read_text())["data"]["measurements"] == rows
    # and the next refit sees the new batch: something new, not exit 4
    plan = jobs.plan_refit(store)
    assert sorted(b.id for b in plan.snapshot.batches) == sorted(ledger.values())
    assert _integrity(store) == []


def test_the_server_stopped_in_the_middle_of_a_transaction(files, tmp_path, pg_cluster):
    """The PostgreSQL server is stopped while an ingest holds an open transaction: the ingest exits 6 with one
    line naming the host and the database, and nothing of the batch landed."""
    store = pg_cluster.new_url()
    jobs.ingest_file(store, files / "small-0.csv", "g", "y")
    before = _dump(store)
    env, marker, resume = _paused_env(tmp_path, "middle")
    proc = _spawn(_ingest_cmd(store, files / "big.csv"), env)
    _wait_for(marker, proc)
    try:
        pg_cluster.stop("fast")
        resume.touch()
        code, out, err = _finish(proc)
    finally:
        pg_cluster.start()
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 6, err
    assert len(lines) == 1 and "Traceback" not in err
    assert f"host {pg_cluster.sock}" in lines[0] and "database pooltest" in lines[0] and "try again later" in lines[0]
    assert _dump(store) == before
    assert _integrity(store) == []
    # the same command again lands whole
    code, _, err = _finish(_spawn(_ingest_cmd(store, files / "big.csv")))
    assert code == 0, err
    _same_as_files(store, files)


# ---------------------------------------------------------------------------------------------
# SQLite: store creations killed half-way leave hidden siblings; the next command removes them


def _leftovers(folder: Path, name: str) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(f".{name}.new-"))


def test_a_killed_store_creation_is_cleaned_up_by_the_next_command(files, tmp_path):
    store = tmp_path / "s.store"
    env, marker, resume = _paused_env(tmp_path, "create")
    proc = _spawn(_ingest_cmd(store, files / "small-0.csv"), env)
    _wait_for(marker, proc)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=BOUND)
    left = _leftovers(tmp_path, "s.store")
    assert left and not store.exists()  # the half-made store, and SQLite's -wal and -shm beside it
    # a file of somebody else's under a name of that shape is not ours: it stays
    foreign = tmp_path / ".s.store.new-0123456789ab"
    foreign.write_text("not a store")
    code, _, err = _finish(_spawn(_ingest_cmd(store, files / "small-1.csv")))
    assert code == 0, err
    assert _leftovers(tmp_path, "s.store") == [foreign.name]
    assert _integrity(store) == []


def test_a_store_creation_in_progress_is_not_removed(files, tmp_path):
    store = tmp_path / "s.store"
    env, marker, resume = _paused_env(tmp_path, "create")
    maker = _spawn(_ingest_cmd(store, files / "small-0.csv"), env)
    _wait_for(marker, maker)
    building = _leftovers(tmp_path, "s.store")
    assert building
    # another command opens the (not yet existing) store meanwhile: it must not touch the live sibling
    code, _, err = _finish(_spawn([sys.executable, "-m", "pooling.cli", "batches", str(store)]))
    assert code == 2 and "no such file" in err
    assert set(building) <= set(_leftovers(tmp_path, "s.store"))
    resume.touch()
    code, _, err = _finish(maker)
    assert code == 0, err
    assert _leftovers(tmp_path, "s.store") == [] and store_exists(store)
    assert _integrity(store) == []


def test_integrity_check_of_sqlite_itself_after_the_faults(files, tmp_path):
    """The checkup includes SQLite's own integrity check: a page overwritten with noise is reported."""
    store = tmp_path / "s.store"
    jobs.ingest_file(store, files / "big.csv", "g", "y")
    raw = bytearray(store.read_bytes())
    rng = np.random.default_rng(3)
    page = 4096 * 20
    raw[page : page + 4096] = rng.integers(0, 256, 4096, dtype=np.uint8).tobytes()
    store.write_bytes(bytes(raw))
    con = sqlite3.connect(str(store))
    try:
        own = con.execute("PRAGMA integrity_check").fetchall()
    except sqlite3.DatabaseError as exc:
        own = [(str(exc),)]
    finally:
        con.close()
    found = _integrity(store)
    assert own != [("ok",)] and any(line.startswith("SQLite's integrity check") for line in found)
