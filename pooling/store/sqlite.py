"""The embedded store: one SQLite file (standard library sqlite3), WAL mode, a busy timeout.

Why these choices:
- WAL lets `batches` and a refit read a consistent snapshot while an ingest writes;
- every change is one `BEGIN IMMEDIATE ... COMMIT` transaction, so a batch lands whole or not at
  all, even when the process is killed in the middle (SQLite rolls the unfinished transaction
  back when the file is next opened), and two jobs never interleave their checks and writes:
  the second waits up to the busy timeout for the first;
- synchronous=FULL, because a nightly job that printed "ingested" must not lose the batch on a
  power cut;
- the file is marked as ours twice: the SQLite header's application id, and a `pooling_store`
  table holding the format number. Anything else given as a store is refused with one line.

Tables (format 1):
    pooling_store  key/value: format, created_at, created_by
    batches        the ledger: one line per delivery, never deleted; status active, withdrawn or
                   replaced, with when and why it changed
    batch_groups   per batch and group: n, mean (hi), mean_lo (its double-double low part), m2
    runs           one line per refit: when, folder, state fingerprint, the active batch ids, the
                   reference date and half-life, whether targets were met, a JSON summary (model,
                   settings, mu/tau summaries, change settings) and, for the latest run only, the
                   chains' final state (JSON)
    run_groups     per run and group: the results the next run's change report compares against
"""
from __future__ import annotations

import json
import math
import os
import sqlite3
import time
import uuid
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .. import __version__
from ..errors import InputError, NothingNew, OutputError
from .base import BatchInfo, BatchStats, BatchStore, GroupResult, NewBatch, RunRecord, Snapshot, state_fingerprint

FORMAT = 1
APPLICATION_ID = int.from_bytes(b"pool", "big")  # lets `file`-like tools and our own check tell the file apart
SQLITE_MAGIC = b"SQLite format 3\x00"
DEFAULT_BUSY_SECONDS = 60.0

# test-only hook: when set, ingest pauses inside its transaction so that a test can kill it there
PAUSE_ENV = "POOLING_TEST_INGEST_PAUSE"            # file to create when the pause starts
PAUSE_AT_ENV = "POOLING_TEST_INGEST_PAUSE_AT"      # "middle" (half the group rows written) or "before-commit"
PAUSE_SECONDS_ENV = "POOLING_TEST_INGEST_PAUSE_SECONDS"

SCHEMA = """
CREATE TABLE pooling_store (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE batches (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    source TEXT NOT NULL,
    group_column TEXT NOT NULL,
    value_column TEXT NOT NULL,
    rows INTEGER NOT NULL,
    groups INTEGER NOT NULL,
    dated_at TEXT NOT NULL,
    ingested_at TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('active', 'withdrawn', 'replaced')),
    changed_at TEXT,
    note TEXT
);
CREATE UNIQUE INDEX batches_one_per_name ON batches (name) WHERE status != 'replaced';
CREATE UNIQUE INDEX batches_content_once ON batches (sha256) WHERE status = 'active';
CREATE TABLE batch_groups (
    batch_id INTEGER NOT NULL REFERENCES batches (id),
    position INTEGER NOT NULL,
    label TEXT NOT NULL,
    n INTEGER NOT NULL,
    mean REAL NOT NULL,
    mean_lo REAL NOT NULL,
    m2 REAL NOT NULL,
    PRIMARY KEY (batch_id, position)
) WITHOUT ROWID;
CREATE TABLE runs (
    id INTEGER PRIMARY KEY,
    created_at TEXT NOT NULL,
    folder TEXT NOT NULL,
    state_sha256 TEXT NOT NULL,
    batch_ids TEXT NOT NULL,
    reference_at TEXT NOT NULL,
    half_life_days REAL,
    targets_met INTEGER NOT NULL,
    summary TEXT NOT NULL,
    final_state TEXT
);
CREATE TABLE run_groups (
    run_id INTEGER NOT NULL REFERENCES runs (id),
    position INTEGER NOT NULL,
    label TEXT NOT NULL,
    n REAL, raw_mean REAL, post_mean REAL, post_sd REAL, q_lo REAL, q_hi REAL,
    rank_mean REAL, rank_sd REAL, p_above REAL, p_outside REAL,
    PRIMARY KEY (run_id, position)
) WITHOUT ROWID;
"""


def now_utc() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def _real(x) -> float | None:
    """SQLite keeps NaN as NULL anyway; say so explicitly."""
    x = float(x)
    return x if math.isfinite(x) else None


def _unreal(x) -> float:
    return float("nan") if x is None else float(x)


def _identify(path: Path) -> None:
    """Refuse, with one line, anything at `path` that is not a pooling store file."""
    if path.is_dir():
        raise InputError(f"bad store '{path}': it is a folder, expected a store file")
    if not os.access(path, os.R_OK):
        raise InputError(f"bad store '{path}': the file cannot be read (permission denied)")
    with open(path, "rb") as fh:
        head = fh.read(100)
    if not head:
        raise InputError(f"bad store '{path}': the file is empty, not a pooling store")
    if not head.startswith(SQLITE_MAGIC):
        raise InputError(f"bad store '{path}': not a pooling store (not an SQLite database); give the path of "
                         "a store made by `pooling ingest`")
    if len(head) < 100:
        raise InputError(f"bad store '{path}': the file is damaged (cut short at {len(head)} bytes)")
    app = int.from_bytes(head[68:72], "big")
    if app != APPLICATION_ID:
        raise InputError(f"bad store '{path}': an SQLite database, but not a pooling store "
                         "(it lacks the pooling marker); give the path of a store made by `pooling ingest`")


def _connect(path: Path, busy_seconds: float) -> sqlite3.Connection:
    # isolation_level=None: we issue BEGIN/COMMIT ourselves, so a transaction is exactly what we say
    con = sqlite3.connect(str(path), timeout=busy_seconds, isolation_level=None)
    con.execute(f"PRAGMA busy_timeout = {int(busy_seconds * 1000)}")
    con.execute("PRAGMA synchronous = FULL")
    con.execute("PRAGMA foreign_keys = ON")
    return con


def _create(path: Path, busy_seconds: float) -> None:
    """Make a new store beside `path` and link it into place; a store made meanwhile by another job wins."""
    tmp = path.with_name(f".{path.name}.new-{uuid.uuid4().hex[:12]}")
    try:
        con = sqlite3.connect(str(tmp), isolation_level=None)
        try:
            con.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            con.execute(f"PRAGMA user_version = {FORMAT}")
            con.execute("PRAGMA journal_mode = WAL")  # persistent: recorded in the file
            # the file is private until linked into place, so no transaction is needed here
            con.executescript(SCHEMA)
            con.executemany("INSERT INTO pooling_store (key, value) VALUES (?, ?)",
                            [("format", str(FORMAT)), ("created_at", now_utc()), ("created_by", f"pooling {__version__}")])
        finally:
            con.close()  # the last connection checkpoints the WAL into the file and removes it
        try:
            os.link(tmp, path)  # fails if a store appeared meanwhile: never clobber one
        except FileExistsError:
            pass
        except OSError:
            if not path.exists():  # a file system without hard links
                os.replace(tmp, path)
    except sqlite3.Error as exc:
        raise OutputError(f"cannot create the store '{path}': {exc}") from None
    except OSError as exc:
        raise OutputError(f"cannot create the store '{path}': {exc.strerror or exc}") from None
    finally:
        for suffix in ("", "-wal", "-shm", "-journal"):
            try:
                os.unlink(f"{tmp}{suffix}")
            except OSError:
                pass


def open_store(path, *, create: bool = False, busy_seconds: float = DEFAULT_BUSY_SECONDS) -> "SqliteStore":
    """Open the store at `path` (creating it when `create` and it does not exist)."""
    path = Path(path)
    if not path.exists():
        if not create:
            raise InputError(f"bad store '{path}': no such file; `pooling ingest {path} FILE ...` creates a store")
        parent = path.resolve().parent
        if not parent.is_dir():
            raise OutputError(f"cannot create the store '{path}': the folder '{parent}' does not exist")
        _create(path, busy_seconds)
    _identify(path)
    return SqliteStore(path, busy_seconds)


class SqliteStore(BatchStore):
    """The embedded store. Use `open_store`, which checks the file first."""

    def __init__(self, path: Path, busy_seconds: float = DEFAULT_BUSY_SECONDS):
        self.path = str(path)
        self.busy_seconds = busy_seconds
        with self._guard():
            self._con = _connect(path, busy_seconds)
            self._check_format()

    # -- plumbing -------------------------------------------------------------------------------

    @contextmanager
    def _guard(self):
        """Turn SQLite's exceptions into one-line pooling errors that name the store."""
        try:
            yield
        except sqlite3.IntegrityError:
            raise  # a broken invariant of ours, not of the user's: let it surface as a bug
        except sqlite3.OperationalError as exc:
            msg = str(exc)
            if "locked" in msg or "busy" in msg:
                raise OutputError(f"the store '{self.path}' is busy: another job held it for more than "
                                  f"{self.busy_seconds:g} s; nothing was changed, try again later") from None
            if "readonly" in msg or "unable to open" in msg or "disk I/O" in msg:
                raise OutputError(f"cannot use the store '{self.path}': {msg} (check the permissions of the file "
                                  "and of its folder, which must take the -wal and -shm files)") from None
            if "full" in msg:
                raise OutputError(f"cannot write the store '{self.path}': the disk is full; nothing was changed") from None
            raise InputError(f"bad store '{self.path}': the file is damaged or not a pooling store (SQLite: {msg})") from None
        except sqlite3.DatabaseError as exc:
            raise InputError(f"bad store '{self.path}': the file is damaged (SQLite: {exc}); "
                             "restore it from a backup") from None

    @contextmanager
    def _write(self):
        """One write transaction: BEGIN IMMEDIATE takes the write lock first, so checks and writes never interleave."""
        with self._guard():
            self._con.execute("BEGIN IMMEDIATE")
            try:
                yield self._con
            except BaseException:
                self._con.execute("ROLLBACK")
                raise
            self._con.execute("COMMIT")

    @contextmanager
    def _read(self):
        """One read transaction: every SELECT inside sees the same committed state."""
        with self._guard():
            self._con.execute("BEGIN")
            try:
                yield self._con
            finally:
                self._con.execute("COMMIT")

    def _check_format(self):
        con = self._con
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if "pooling_store" not in tables:
            raise InputError(f"bad store '{self.path}': an SQLite database, but not a pooling store (no pooling_store table)")
        row = con.execute("SELECT value FROM pooling_store WHERE key = 'format'").fetchone()
        if row is None:
            raise InputError(f"bad store '{self.path}': the pooling_store table has no format number; the file is damaged")
        try:
            fmt = int(row[0])
        except ValueError:
            raise InputError(f"bad store '{self.path}': unreadable format number {row[0]!r}; the file is damaged") from None
        if fmt > FORMAT:
            raise InputError(f"bad store '{self.path}': store format {fmt} was written by a newer pooling; "
                             f"this version ({__version__}) reads format {FORMAT}; upgrade pooling")
        missing = {"batches", "batch_groups", "runs", "run_groups"} - tables
        if missing:
            raise InputError(f"bad store '{self.path}': the table(s) {', '.join(sorted(missing))} are missing; the file is damaged")
        mode = con.execute("PRAGMA journal_mode").fetchone()[0]
        if mode.lower() != "wal":
            con.execute("PRAGMA journal_mode = WAL")

    def close(self) -> None:
        con = getattr(self, "_con", None)
        if con is not None:
            con.close()
            self._con = None

    # -- ledger ---------------------------------------------------------------------------------

    _BATCH_COLS = "id, name, sha256, source, rows, groups, dated_at, ingested_at, status, changed_at, note"

    @staticmethod
    def _info(row) -> BatchInfo:
        return BatchInfo(*row)

    def add_batch(self, new: NewBatch, labels, n, mean, mean_lo, m2, *, replace: bool = False) -> BatchInfo:
        labels = list(labels)
        n = np.asarray(n)
        rows = int(n.sum())
        when = now_utc()
        with self._write() as con:
            same = con.execute(f"SELECT {self._BATCH_COLS} FROM batches WHERE sha256 = ? AND status = 'active'",
                               (new.sha256,)).fetchone()
            if same is not None:
                b = self._info(same)
                raise NothingNew(f"the content of '{new.source}' is in the store already as batch '{b.name}' "
                                 f"(ingested {b.ingested_at}); nothing changed")
            current = con.execute(f"SELECT {self._BATCH_COLS} FROM batches WHERE name = ? AND status != 'replaced'",
                                  (new.name,)).fetchone()
            if current is not None and not replace:
                b = self._info(current)
                raise InputError(f"bad input: a batch named '{new.name}' is in the store '{self.path}' already "
                                 f"({b.status}, {b.rows} rows, sha256 {b.sha256[:12]}) with other content; "
                                 "name this one with --batch NAME, or pass --replace to replace it")
            gone = con.execute(f"SELECT {self._BATCH_COLS} FROM batches WHERE sha256 = ? AND status = 'withdrawn'",
                               (new.sha256,)).fetchone()
            if gone is not None and not replace:
                b = self._info(gone)
                raise InputError(f"bad input: the content of '{new.source}' was withdrawn as batch '{b.name}' at "
                                 f"{b.changed_at}; pass --replace to take it back")
            if current is not None:
                con.execute("UPDATE batches SET status = 'replaced', changed_at = ?, note = ? WHERE id = ?",
                            (when, f"replaced by a new delivery of the same name at {when}", current[0]))
            cur = con.execute(
                "INSERT INTO batches (name, sha256, source, group_column, value_column, rows, groups, dated_at, "
                "ingested_at, status) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, 'active')",
                (new.name, new.sha256, new.source, new.group_column, new.value_column, rows, len(labels),
                 new.dated_at, when))
            bid = cur.lastrowid
            payload = [(bid, i, lab, int(n[i]), float(mean[i]), float(mean_lo[i]), float(m2[i]))
                       for i, lab in enumerate(labels)]
            half = len(payload) // 2
            con.executemany("INSERT INTO batch_groups (batch_id, position, label, n, mean, mean_lo, m2) "
                            "VALUES (?, ?, ?, ?, ?, ?, ?)", payload[:half])
            _test_pause("middle")
            con.executemany("INSERT INTO batch_groups (batch_id, position, label, n, mean, mean_lo, m2) "
                            "VALUES (?, ?, ?, ?, ?, ?, ?)", payload[half:])
            _test_pause("before-commit")
            row = con.execute(f"SELECT {self._BATCH_COLS} FROM batches WHERE id = ?", (bid,)).fetchone()
        return self._info(row)

    def withdraw(self, name: str, note: str | None = None) -> BatchInfo:
        when = now_utc()
        with self._write() as con:
            row = con.execute(f"SELECT {self._BATCH_COLS} FROM batches WHERE name = ? AND status != 'replaced'",
                              (name,)).fetchone()
            if row is None:
                raise InputError(f"bad input: no batch named '{name}' in the store '{self.path}'; "
                                 f"`pooling batches {self.path}` lists them")
            b = self._info(row)
            if b.status == "withdrawn":
                raise NothingNew(f"batch '{name}' was withdrawn already at {b.changed_at}; nothing changed")
            con.execute("UPDATE batches SET status = 'withdrawn', changed_at = ?, note = ? WHERE id = ?",
                        (when, note, b.id))
            row = con.execute(f"SELECT {self._BATCH_COLS} FROM batches WHERE id = ?", (b.id,)).fetchone()
        return self._info(row)

    def batches(self) -> list[BatchInfo]:
        with self._read() as con:
            return [self._info(r) for r in con.execute(f"SELECT {self._BATCH_COLS} FROM batches ORDER BY id")]

    def snapshot(self) -> Snapshot:
        with self._read() as con:
            infos = tuple(self._info(r) for r in con.execute(
                f"SELECT {self._BATCH_COLS} FROM batches WHERE status = 'active' ORDER BY id"))
            rows = con.execute(
                "SELECT g.batch_id, g.label, g.n, g.mean, g.mean_lo, g.m2 FROM batch_groups g "
                "JOIN batches b ON b.id = g.batch_id WHERE b.status = 'active' ORDER BY g.batch_id, g.position"
            ).fetchall()
        stats = []
        if rows:
            bid = np.fromiter((r[0] for r in rows), dtype=np.int64, count=len(rows))
            cut = np.flatnonzero(np.diff(bid)) + 1
            starts = np.concatenate([[0], cut])
            ends = np.concatenate([cut, [len(rows)]])
            cols = list(zip(*rows))
            n = np.asarray(cols[2], dtype=np.int64)
            mean, lo, m2 = (np.asarray(cols[k], dtype=np.float64) for k in (3, 4, 5))
            for s, e in zip(starts, ends):
                stats.append(BatchStats(int(bid[s]), tuple(cols[1][s:e]), n[s:e], mean[s:e], lo[s:e], m2[s:e]))
        return Snapshot(infos, tuple(stats), state_fingerprint(infos))

    # -- runs -----------------------------------------------------------------------------------

    _RUN_COLS = ("id, created_at, folder, state_sha256, batch_ids, reference_at, half_life_days, targets_met, "
                 "summary")

    @staticmethod
    def _run(row, groups=(), final_state=None) -> RunRecord:
        (rid, created, folder, sha, ids, ref, hl, met, summary) = row
        return RunRecord(created_at=created, folder=folder, state_sha256=sha, batch_ids=tuple(json.loads(ids)),
                         reference_at=ref, half_life_days=hl, targets_met=bool(met), summary=json.loads(summary),
                         groups=tuple(groups), final_state=final_state, id=rid)

    def runs(self) -> list[RunRecord]:
        with self._read() as con:
            return [self._run(r) for r in con.execute(f"SELECT {self._RUN_COLS} FROM runs ORDER BY id")]

    def last_run(self) -> RunRecord | None:
        with self._read() as con:
            row = con.execute(f"SELECT {self._RUN_COLS}, final_state FROM runs ORDER BY id DESC LIMIT 1").fetchone()
            if row is None:
                return None
            groups = [GroupResult(r[0], *(_unreal(x) for x in r[1:])) for r in con.execute(
                "SELECT label, n, raw_mean, post_mean, post_sd, q_lo, q_hi, rank_mean, rank_sd, p_above, p_outside "
                "FROM run_groups WHERE run_id = ? ORDER BY position", (row[0],))]
        fs = json.loads(row[-1]) if row[-1] else None
        return self._run(row[:-1], groups, fs)

    def record_run(self, run: RunRecord) -> int:
        with self._write() as con:
            cur = con.execute(
                "INSERT INTO runs (created_at, folder, state_sha256, batch_ids, reference_at, half_life_days, "
                "targets_met, summary, final_state) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (run.created_at, run.folder, run.state_sha256, json.dumps(list(run.batch_ids)), run.reference_at,
                 run.half_life_days, int(run.targets_met), json.dumps(run.summary, allow_nan=False),
                 None if run.final_state is None else json.dumps(run.final_state, allow_nan=False)))
            rid = cur.lastrowid
            # only the latest run's chain states are ever used (to start the next refit); older ones
            # would make the file grow by chains x groups numbers every night
            con.execute("UPDATE runs SET final_state = NULL WHERE id < ?", (rid,))
            con.executemany(
                "INSERT INTO run_groups (run_id, position, label, n, raw_mean, post_mean, post_sd, q_lo, q_hi, "
                "rank_mean, rank_sd, p_above, p_outside) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [(rid, i, g.label, _real(g.n), _real(g.raw_mean), _real(g.post_mean), _real(g.post_sd), _real(g.q_lo),
                  _real(g.q_hi), _real(g.rank_mean), _real(g.rank_sd), _real(g.p_above), _real(g.p_outside))
                 for i, g in enumerate(run.groups)])
        return rid


def _test_pause(point: str) -> None:
    """Tests only: stop here (inside the open transaction) so that a test can SIGKILL the process."""
    marker = os.environ.get(PAUSE_ENV)
    if not marker or os.environ.get(PAUSE_AT_ENV, "middle") != point:
        return
    Path(marker).write_text(str(os.getpid()))
    time.sleep(float(os.environ.get(PAUSE_SECONDS_ENV, "60")))
