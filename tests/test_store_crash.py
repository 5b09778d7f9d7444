"""Crashes and concurrent jobs: a SIGKILL in the middle of an ingest, and two ingests at the same time.

Why a controlled pause rather than kills at random times: an ingest spends almost all of its
wall time starting Python and reading the file, before its transaction opens, so random kills
nearly always land where there is nothing to prove. The test-only hook in pooling.store.sqlite
(POOLING_TEST_INGEST_PAUSE*) stops the process inside its open transaction, at two points: with
half of the group rows written, and with every row written just before COMMIT. With 60,000
groups the uncommitted pages spill from SQLite's cache into the WAL file, so the kill leaves
uncommitted frames on disk that recovery must discard; the test checks that they were there.

Every subprocess is bounded in time; the whole file takes about 30 s on a loaded 2-core machine.
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

from pooling.stats import read_table
from pooling.store import combine, jobs, open_store
from pooling.store.sqlite import PAUSE_AT_ENV, PAUSE_ENV, PAUSE_SECONDS_ENV
from store_helpers import sql_dump as _dump

BOUND = 120  # seconds any one subprocess may take before the test fails



def _integrity(path) -> str:
    con = sqlite3.connect(str(path))
    try:
        return con.execute("PRAGMA integrity_check").fetchone()[0]
    finally:
        con.close()


def _ingest_cmd(store, file, group="g", value="y", *extra):
    return [sys.executable, "-m", "pooling.cli", "ingest", str(store), str(file), "--group", group, "--value", value,
            *extra]


def _wait_for(path: Path, proc: subprocess.Popen, seconds: float = BOUND):
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        if path.exists():
            return
        if proc.poll() is not None:
            out, err = proc.communicate()
            raise AssertionError(f"the ingest ended before its pause (exit {proc.returncode}): {err}")
        time.sleep(0.05)
    proc.kill()
    raise AssertionError("the ingest never reached its pause")


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("crash")
    rng = np.random.default_rng(21)
    J = 60_000
    labels = np.array([f"site-{i:05d}" for i in range(J)])
    pd.DataFrame({"g": np.concatenate([labels, labels[:5000]]),
                  "y": rng.normal(1e9, 0.1, J + 5000)}).to_csv(d / "big.csv", index=False, float_format="%.17g")
    for k in range(3):
        pd.DataFrame({"g": rng.choice(labels[:40], 300), "y": rng.normal(5.0, 1.0, 300)}).to_csv(
            d / f"small-{k}.csv", index=False, float_format="%.17g")
    return d


@pytest.mark.parametrize("point", ["middle", "before-commit"])
def test_sigkill_inside_the_ingest_transaction_leaves_the_store_as_before(files, tmp_path, point):
    store = tmp_path / "s.store"
    jobs.ingest_file(store, files / "small-0.csv", "g", "y")
    before = _dump(store)
    marker = tmp_path / "paused"
    env = dict(os.environ, **{PAUSE_ENV: str(marker), PAUSE_AT_ENV: point, PAUSE_SECONDS_ENV: "100"})
    proc = subprocess.Popen(_ingest_cmd(store, files / "big.csv"), env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    _wait_for(marker, proc)
    wal = Path(f"{store}-wal")
    uncommitted = wal.stat().st_size if wal.exists() else 0
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=BOUND)
    assert proc.returncode == -signal.SIGKILL
    if point == "before-commit":
        # the transaction's pages had reached the WAL file: there was something to roll back
        assert uncommitted > 100 * 4096  # over a hundred pages of frames
    assert _dump(store) == before
    assert _integrity(store) == "ok"
    # no lock is left behind: the same file now ingests normally, whole
    info, _ = jobs.ingest_file(store, files / "big.csv", "g", "y")
    with open_store(store) as st:
        snap = st.snapshot()
    assert len(snap.batches) == 2
    got = combine(snap.stats[1:])
    ref = read_table(files / "big.csv", "g", "y")
    assert info.rows == ref.N and got.labels == ref.labels
    assert np.array_equal(got.n, ref.n) and np.array_equal(got.m2, ref.m2)


def test_two_ingests_at_the_same_time_both_land(files, tmp_path):
    # 1) both start together on a store that does not exist yet: a race to create it and to write
    store = tmp_path / "s.store"
    procs = [subprocess.Popen(_ingest_cmd(store, files / f"small-{k}.csv"), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True) for k in (0, 1)]
    for p in procs:
        out, err = p.communicate(timeout=BOUND)
        assert p.returncode == 0, err
    with open_store(store) as st:
        names = sorted(b.name for b in st.snapshot().batches)
    assert names == ["small-0.csv", "small-1.csv"]

    # 2) one holds the write lock (paused inside its transaction for 3 s); the other must wait for
    # it on the busy timeout and land after it, not fail and not be lost
    marker = tmp_path / "paused"
    env = dict(os.environ, **{PAUSE_ENV: str(marker), PAUSE_AT_ENV: "middle", PAUSE_SECONDS_ENV: "3"})
    first = subprocess.Popen(_ingest_cmd(store, files / "big.csv"), env=env, stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True)
    _wait_for(marker, first)
    second = subprocess.Popen(_ingest_cmd(store, files / "small-2.csv"), stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True)
    out2, err2 = second.communicate(timeout=BOUND)
    out1, err1 = first.communicate(timeout=BOUND)
    assert first.returncode == 0, err1
    assert second.returncode == 0, err2
    with open_store(store) as st:
        ledger = st.batches()
        snap = st.snapshot()
    # the waiting ingest landed after the one holding the lock
    assert [b.name for b in ledger][2:] == ["big.csv", "small-2.csv"]
    assert sorted(b.name for b in snap.batches) == ["big.csv", "small-0.csv", "small-1.csv", "small-2.csv"]
    # each batch's statistics are exactly those of its own file
    for b, s in zip(snap.batches, snap.stats):
        ref = read_table(files / b.name, "g", "y")
        assert s.labels == ref.labels and np.array_equal(s.n, ref.n) and np.array_equal(s.m2, ref.m2)
    assert _integrity(store) == "ok"
