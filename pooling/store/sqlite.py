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
  table holding the schema version. Anything else given as a store is refused with one line.

The tables and their checksums are described in `ledger.py`, which holds the SQL shared with the
PostgreSQL store. Schema versions: 1 (no checksums; stores made before them), 2 (checksums) and 3
(group-level columns: the table batch_columns). An older file is upgraded in place, step by step, by
the first command that opens it, in one transaction, after SQLite's quick check; a file of a newer
version is refused.

A new store is built in a hidden sibling `.NAME.new-XXXXXXXXXXXX` and linked into place, so a
half-made store is never seen. Its maker holds an exclusive flock on it meanwhile; a maker killed
with SIGKILL leaves it behind, and the next command that creates or opens the store removes
such leftovers when no process holds them.
"""

from __future__ import annotations

import fcntl
import os
import re
import sqlite3
import uuid
from contextlib import contextmanager
from pathlib import Path

from .. import __version__
from ..errors import InputError, OutputError, PoolingError
from .ledger import DEFAULT_BUSY_SECONDS, SCHEMA_VERSION, SqlLedger, _test_pause, now_utc
from .location import Location, parse_location

FORMAT = SCHEMA_VERSION  # the schema version, kept under the key 'format' (the name stores of version 1 use)
APPLICATION_ID = int.from_bytes(b"pool", "big")  # lets `file`-like tools and our own check tell the file apart
SQLITE_MAGIC = b"SQLite format 3\x00"

# each batch's group-level columns: in the schema, and added by the upgrade from version 2
BATCH_COLUMNS = """CREATE TABLE batch_columns (
    batch_id INTEGER NOT NULL REFERENCES batches (id),
    column_name TEXT NOT NULL,
    position INTEGER NOT NULL,
    value TEXT NOT NULL,
    PRIMARY KEY (batch_id, column_name, position)
) WITHOUT ROWID;
"""

SCHEMA = f"""
CREATE TABLE pooling_store (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE store_head (
    one INTEGER PRIMARY KEY CHECK (one = 1),
    batch_lines INTEGER NOT NULL, batch_acc TEXT NOT NULL,
    run_lines INTEGER NOT NULL, run_acc TEXT NOT NULL
);
CREATE TABLE batches (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    source TEXT NOT NULL,
    group_column TEXT NOT NULL,
    value_column TEXT NOT NULL,
    "rows" INTEGER NOT NULL,
    "groups" INTEGER NOT NULL,
    dated_at TEXT NOT NULL,
    ingested_at TEXT NOT NULL,
    status TEXT NOT NULL CHECK (status IN ('active', 'withdrawn', 'replaced')),
    changed_at TEXT,
    note TEXT,
    stats_sum TEXT NOT NULL,
    line_sum TEXT NOT NULL
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
{BATCH_COLUMNS}CREATE TABLE runs (
    id INTEGER PRIMARY KEY,
    created_at TEXT NOT NULL,
    folder TEXT NOT NULL,
    state_sha256 TEXT NOT NULL,
    batch_ids TEXT NOT NULL,
    reference_at TEXT NOT NULL,
    half_life_days REAL,
    targets_met INTEGER NOT NULL,
    summary TEXT NOT NULL,
    groups_sum TEXT NOT NULL,
    line_sum TEXT NOT NULL,
    final_state TEXT,
    state_sum TEXT
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

# version 1 -> 2: the checksums and the head (ledger.SqlLedger.fill_checksums computes them)
UPGRADE_1_TO_2 = """
ALTER TABLE batches ADD COLUMN stats_sum TEXT NOT NULL DEFAULT '';
ALTER TABLE batches ADD COLUMN line_sum TEXT NOT NULL DEFAULT '';
ALTER TABLE runs ADD COLUMN groups_sum TEXT NOT NULL DEFAULT '';
ALTER TABLE runs ADD COLUMN line_sum TEXT NOT NULL DEFAULT '';
ALTER TABLE runs ADD COLUMN state_sum TEXT;
CREATE TABLE store_head (
    one INTEGER PRIMARY KEY CHECK (one = 1),
    batch_lines INTEGER NOT NULL, batch_acc TEXT NOT NULL,
    run_lines INTEGER NOT NULL, run_acc TEXT NOT NULL
);
"""

# version 2 -> 3: the group-level columns of each batch (none in a version-2 store, so no checksum changes)
UPGRADE_2_TO_3 = f"""
{BATCH_COLUMNS}"""


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
        raise InputError(
            f"bad store '{path}': not a pooling store (not an SQLite database); give the path of "
            "a store made by `pooling ingest`"
        )
    if len(head) < 100:
        raise InputError(f"bad store '{path}': the file is damaged (cut short at {len(head)} bytes)")
    app = int.from_bytes(head[68:72], "big")
    if app != APPLICATION_ID:
        raise InputError(
            f"bad store '{path}': an SQLite database, but not a pooling store "
            "(it lacks the pooling marker); give the path of a store made by `pooling ingest`"
        )


def _connect(path: Path, busy_seconds: float) -> sqlite3.Connection:
    # isolation_level=None: we issue BEGIN/COMMIT ourselves, so a transaction is exactly what we say
    con = sqlite3.connect(str(path), timeout=busy_seconds, isolation_level=None)
    con.execute(f"PRAGMA busy_timeout = {int(busy_seconds * 1000)}")
    con.execute("PRAGMA synchronous = FULL")
    con.execute("PRAGMA foreign_keys = ON")
    return con


# -- the hidden siblings a store is built in ---------------------------------------------------

_SIBLINGS = ("-wal", "-shm", "-journal")


def _temp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.new-{uuid.uuid4().hex[:12]}")


def _claim(path: Path) -> tuple[Path, int]:
    """A fresh hidden sibling, created and flock-ed by us (so that no sweep removes it while we build it)."""
    for _ in range(8):
        tmp = _temp_name(path)
        fd = os.open(tmp, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o666)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            if os.stat(tmp).st_ino == os.fstat(fd).st_ino:  # not swept away between open and flock
                return tmp, fd
        except OSError:
            pass
        os.close(fd)
    raise OutputError(f"cannot create the store '{path}': could not claim a temporary file beside it")


def _looks_ours(tmp: Path) -> bool:
    """A hidden sibling this program made: empty (killed before SQLite wrote), or an SQLite file that is
    ours or not yet marked (the application id is written with the first page)."""
    try:
        with open(tmp, "rb") as fh:
            head = fh.read(100)
    except OSError:
        return False
    if not head:
        return True
    if not head.startswith(SQLITE_MAGIC[: len(head)]):
        return False
    return len(head) < 72 or int.from_bytes(head[68:72], "big") in (0, APPLICATION_ID)


def sweep_leftovers(path: Path) -> list[str]:
    """Remove the hidden siblings `.NAME.new-*` (and their -wal, -shm, -journal) left by store creations that
    were killed: only files this program made, and only when no process holds them. Returns the names removed."""
    folder = path.parent if str(path.parent) else Path(".")
    prefix = f".{path.name}.new-"
    pattern = re.compile(re.escape(prefix) + r"([0-9a-f]{12})(-wal|-shm|-journal)?")
    try:
        names = [e.name for e in os.scandir(folder) if e.name.startswith(prefix)]
    except OSError:
        return []
    removed = []
    for name in sorted(names):
        m = pattern.fullmatch(name)
        if not m or m.group(2):
            continue
        tmp = folder / name
        if not _looks_ours(tmp):
            continue
        try:
            fd = os.open(tmp, os.O_RDWR)
        except OSError:
            continue
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError:
                continue  # its maker is alive and building it
            try:
                if os.stat(tmp).st_ino != os.fstat(fd).st_ino:
                    continue
            except OSError:
                continue
            for suffix in ("", *_SIBLINGS):
                try:
                    os.unlink(f"{tmp}{suffix}")
                    removed.append(f"{name}{suffix}")
                except OSError:
                    pass
        finally:
            os.close(fd)
    # siblings whose main file is gone (a maker killed while it removed them)
    for name in sorted(names):
        m = pattern.fullmatch(name)
        if m and m.group(2) and not (folder / f"{prefix}{m.group(1)}").exists():
            try:
                os.unlink(folder / name)
                removed.append(name)
            except OSError:
                pass
    return removed


def _create(path: Path, busy_seconds: float, fill=None) -> bool:
    """Make a new store beside `path` and link it into place; a store made meanwhile by another job wins.

    `fill(store)`, when given, writes content into the new store before it is linked (a copy). Returns
    whether this call put the store in place."""
    tmp, fd = _claim(path)
    placed = False
    try:
        con = sqlite3.connect(str(tmp), isolation_level=None)
        try:
            con.execute(f"PRAGMA application_id = {APPLICATION_ID}")
            con.execute(f"PRAGMA user_version = {FORMAT}")
            con.execute("PRAGMA journal_mode = WAL")  # persistent: recorded in the file
            _test_pause("create")
            # the file is private until linked into place, so no transaction is needed here
            con.executescript(SCHEMA)
            con.executemany(
                "INSERT INTO pooling_store (key, value) VALUES (?, ?)",
                [("format", str(FORMAT)), ("created_at", now_utc()), ("created_by", f"pooling {__version__}")],
            )
            con.execute(
                "INSERT INTO store_head (one, batch_lines, batch_acc, run_lines, run_acc) "
                "VALUES (1, 0, '0000000000000000', 0, '0000000000000000')"
            )
        finally:
            con.close()  # the last connection checkpoints the WAL into the file and removes it
        if fill is not None:
            with SqliteStore(tmp, busy_seconds, shown=str(path)) as st:
                fill(st)
        try:
            os.link(tmp, path)  # fails if a store appeared meanwhile: never clobber one
            placed = True
        except FileExistsError:
            pass
        except OSError:
            if not path.exists():  # a file system without hard links
                os.replace(tmp, path)
                placed = True
    except sqlite3.Error as exc:
        raise OutputError(f"cannot create the store '{path}': {exc}") from None
    except OSError as exc:
        raise OutputError(f"cannot create the store '{path}': {exc.strerror or exc}") from None
    finally:
        for suffix in ("", *_SIBLINGS):
            try:
                os.unlink(f"{tmp}{suffix}")
            except OSError:
                pass
        os.close(fd)
    return placed


def open_sqlite(
    where, *, create: bool = False, missing_ok: bool = False, busy_seconds: float = DEFAULT_BUSY_SECONDS
) -> SqliteStore | None:
    """Open the store file at `where` (creating it when `create` and it does not exist)."""
    loc = parse_location(where) if not isinstance(where, Location) else where
    path = loc.path
    created = False
    if path.parent.is_dir():
        sweep_leftovers(path)
    if not path.exists():
        if missing_ok and not create:
            return None
        if not create:
            raise InputError(f"bad store '{path}': no such file; `pooling ingest {path} FILE ...` creates a store")
        parent = path.resolve().parent
        if not parent.is_dir():
            raise OutputError(f"cannot create the store '{path}': the folder '{parent}' does not exist")
        created = _create(path, busy_seconds)
    _identify(path)
    store = SqliteStore(path, busy_seconds)
    store.created = created
    return store


def create_sqlite_copy(where, content, copied_from: str, verify, busy_seconds: float = DEFAULT_BUSY_SECONDS) -> None:
    """Write a whole store's content as a new store file (refused if the file exists), linked into place whole."""
    loc = parse_location(where) if not isinstance(where, Location) else where
    path = loc.path
    if path.exists():
        raise InputError(f"bad store '{path}': the file exists already; copy into a new store")
    parent = path.resolve().parent
    if not parent.is_dir():
        raise OutputError(f"cannot create the store '{path}': the folder '{parent}' does not exist")
    sweep_leftovers(path)

    def fill(st):
        st.load(content, copied_from)
        verify(st)  # read back from the new file before it is linked into place

    if not _create(path, busy_seconds, fill=fill):
        raise InputError(f"bad store '{path}': the file appeared while the copy was written; nothing was changed")


class _Tx:
    """One SQLite transaction, as the shared ledger uses it."""

    def __init__(self, con: sqlite3.Connection):
        self.con = con

    def one(self, sql, params=()):
        return self.con.execute(sql, params).fetchone()

    def all(self, sql, params=()):
        return self.con.execute(sql, params).fetchall()

    def run(self, sql, params=(), many: bool = False):
        if many:
            self.con.executemany(sql, params)
        else:
            self.con.execute(sql, params)

    def bulk(self, table, columns, rows, types=None):
        if rows:
            names = ", ".join(f'"{c}"' for c in columns)
            self.con.executemany(f"INSERT INTO {table} ({names}) VALUES ({', '.join('?' * len(columns))})", rows)


class SqliteStore(SqlLedger):
    """The embedded store. Use `open_store`, which checks the file first."""

    def __init__(self, path: Path, busy_seconds: float = DEFAULT_BUSY_SECONDS, shown: str | None = None):
        self.path = shown or str(path)
        self.file = Path(path)
        self.busy_seconds = busy_seconds
        self.created = False
        self.location = parse_location(self.file)
        with self._guard():
            self._con = _connect(self.file, busy_seconds)
            self._check_format()

    # -- plumbing -------------------------------------------------------------------------------

    @contextmanager
    def _guard(self):
        """Turn SQLite's exceptions into one-line pooling errors that name the store."""
        try:
            yield
        except PoolingError:
            raise  # our own refusal from inside a transaction (an InputError is a ValueError: not damage)
        except sqlite3.IntegrityError:
            raise  # a broken invariant of ours, not of the user's: let it surface as a bug
        except sqlite3.OperationalError as exc:
            msg = str(exc)
            if "locked" in msg or "busy" in msg:
                raise OutputError(
                    f"the store '{self.path}' is busy: another job held it for more than "
                    f"{self.busy_seconds:g} s; nothing was changed, try again later"
                ) from None
            if "readonly" in msg or "unable to open" in msg or "disk I/O" in msg:
                raise OutputError(
                    f"cannot use the store '{self.path}': {msg} (check the permissions of the file "
                    "and of its folder, which must take the -wal and -shm files)"
                ) from None
            if "full" in msg:
                raise OutputError(
                    f"cannot write the store '{self.path}': the disk is full; nothing was changed"
                ) from None
            raise InputError(
                f"bad store '{self.path}': the file is damaged or not a pooling store (SQLite: {msg})"
            ) from None
        except (sqlite3.DatabaseError, ValueError, OverflowError) as exc:
            # ValueError/OverflowError: sqlite3 could not convert a stored value (damaged text or numbers)
            raise InputError(
                f"bad store '{self.path}': the file is damaged (SQLite: {exc}); restore it from a backup"
            ) from None

    @contextmanager
    def _write(self):
        """One write transaction: BEGIN IMMEDIATE takes the write lock first, so checks and writes never interleave."""
        with self._guard():
            self._con.execute("BEGIN IMMEDIATE")
            try:
                yield _Tx(self._con)
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
                yield _Tx(self._con)
            finally:
                self._con.execute("COMMIT")

    def _next_id(self, tx, table: str) -> int:
        return int(tx.one(f"SELECT coalesce(max(id), 0) + 1 FROM {table}")[0])

    def _format(self) -> int:
        con = self._con
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        if "pooling_store" not in tables:
            raise InputError(
                f"bad store '{self.path}': an SQLite database, but not a pooling store (no pooling_store table)"
            )
        row = con.execute("SELECT value FROM pooling_store WHERE key = 'format'").fetchone()
        if row is None:
            raise InputError(
                f"bad store '{self.path}': the pooling_store table has no schema version; the file is damaged"
            )
        try:
            fmt = int(row[0])
        except (TypeError, ValueError):
            raise InputError(
                f"bad store '{self.path}': unreadable schema version {row[0]!r}; the file is damaged"
            ) from None
        if fmt > FORMAT:
            raise InputError(
                f"bad store '{self.path}': schema version {fmt} was written by a newer pooling; "
                f"this version ({__version__}) reads versions up to {FORMAT}; upgrade pooling"
            )
        if fmt < 1:
            raise InputError(f"bad store '{self.path}': unknown schema version {fmt}; the file is damaged")
        missing = {"batches", "batch_groups", "runs", "run_groups"} - tables
        if missing:
            raise InputError(
                f"bad store '{self.path}': the table(s) {', '.join(sorted(missing))} are missing; the file is damaged"
            )
        return fmt

    def _check_format(self):
        if self._format() < FORMAT:
            self._upgrade()
        tables = {r[0] for r in self._con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
        for table in ("store_head", "batch_columns"):
            if table not in tables:
                raise InputError(f"bad store '{self.path}': the table {table} is missing; the file is damaged")
        mode = self._con.execute("PRAGMA journal_mode").fetchone()[0]
        if mode.lower() != "wal":
            self._con.execute("PRAGMA journal_mode = WAL")

    def _upgrade(self) -> None:
        """An older store, upgraded in place in one transaction (after SQLite's quick check, so that damage is
        not sealed with fresh checksums)."""
        problems = [r[0] for r in self._con.execute("PRAGMA quick_check")]
        if problems != ["ok"]:
            raise InputError(
                f"bad store '{self.path}': the file is damaged (SQLite: {problems[0]}); it was not "
                "upgraded; restore it from a backup"
            )
        with self._write() as tx:
            fmt = self._format()  # another job may have upgraded it while we waited for the lock
            if fmt == FORMAT:
                return
            if fmt == 1:  # executescript would COMMIT: the statements run one by one inside this transaction
                for stmt in UPGRADE_1_TO_2.split(";"):
                    if stmt.strip():
                        tx.run(stmt)
                self.fill_checksums(tx)
                fmt = 2
            if fmt == 2:
                tx.run(UPGRADE_2_TO_3)
                fmt = 3
            tx.run("UPDATE pooling_store SET value = ? WHERE key = 'format'", (str(fmt),))
            tx.run("INSERT OR REPLACE INTO pooling_store (key, value) VALUES ('upgraded_at', ?)", (now_utc(),))
            tx.run(f"PRAGMA user_version = {fmt}")

    def _own_problems(self) -> list[str]:
        try:
            rows = [r[0] for r in self._con.execute("PRAGMA integrity_check")]
            user_version = self._con.execute("PRAGMA user_version").fetchone()[0]
        except sqlite3.DatabaseError as exc:  # damage that stops the check itself
            return [f"SQLite's integrity check: {exc}"]
        out = [] if rows == ["ok"] else [f"SQLite's integrity check: {r}" for r in rows]
        if user_version != FORMAT:
            out.append(f"the file header's schema version is {user_version}, expected {FORMAT}")
        return out

    def close(self) -> None:
        con = getattr(self, "_con", None)
        if con is not None:
            con.close()
            self._con = None
