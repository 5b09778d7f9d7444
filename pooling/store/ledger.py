"""The SQL core shared by both stores: the ledger's rules, its checksums, and what every read verifies.

`SqlLedger` implements the whole `BatchStore` interface in portable SQL over five tables; a
driver (`sqlite.py`, `postgres.py`) supplies the connection, its transactions, how the next id is
taken, how a bulk of rows is written, and how concurrent writers are kept apart:

    SQLite      BEGIN IMMEDIATE: one writer at a time for the whole file; `_lock` does nothing
    PostgreSQL  READ COMMITTED with transaction-level advisory locks on the batch's name and on its
                content hash, so ingests of different deliveries run side by side; the head row is
                locked (SELECT ... FOR UPDATE) only for its final update, just before COMMIT

Tables (schema version 3; `pooling_store` holds the version under the key 'format'):

    pooling_store  key/value: format, created_at, created_by (and copied_from, copied_at on a copy)
    store_head     one row: how many ledger and run lines there are, and the running sums of their checksums
    batches        the ledger: one line per delivery, never deleted; status active, withdrawn or replaced, with
                   when and why it changed; stats_sum and line_sum
    batch_groups   per batch and position: label, n, mean (hi), mean_lo (its double-double low part), m2
    batch_columns  per batch, group-level column and position: the group's value in that column, as text (a
                   method, an instrument, an age: what `pooling refit --category/--numeric` reads); covered by the
                   batch's stats_sum. Schema version 3; a version-2 store gains the empty table on opening, and
                   every checksum it holds stays valid (a batch without columns has its version-2 stats_sum)
    runs           one line per refit (when, folder, state fingerprint, batch ids, reference date, half-life,
                   targets met, JSON summary, groups_sum, line_sum) and, for the latest run only, the chains'
                   final state (JSON) with its state_sum
    run_groups     per run and position: the results the next run's change report compares against

Every active batch is a distinct delivery of one quantity: an ingest whose per-group statistics equal an active
batch's exactly (the same delivery in another file: other line endings, CSV and Parquet) is refused as nothing new
(`_check_same_statistics`; PostgreSQL locks on the statistics' checksum, so two such ingests never pass side by
side), and one whose value or group column has a name no active batch uses is refused unless told the column was
only renamed (`_check_quantity`). Replacing or taking back a withdrawn batch keeps the withdrawal's time and
reason in the replaced line's note (covered by its line sum; no schema change).

Group-level columns are one value per group across the active batches: an ingest whose batch gives a group
another value than an active batch holds, or keeps other columns than the active batches do, is refused in
its own transaction (`_check_columns`). PostgreSQL keeps such checks apart from each other with an advisory
lock on the store's columns: exclusive for a batch that keeps columns, shared for one that keeps none (so that
ingests into a store without columns still run side by side).
"""

from __future__ import annotations

import json
import math
import os
import re
import time
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from ..errors import InputError, NothingNew
from . import checksums as C
from .base import (
    BatchInfo,
    BatchStats,
    BatchStore,
    GroupResult,
    NewBatch,
    RunRecord,
    Snapshot,
    StoreContent,
    state_fingerprint,
)

SCHEMA_VERSION = 3
DEFAULT_BUSY_SECONDS = 60.0

LINE_COLS = (
    "id",
    "name",
    "sha256",
    "source",
    "group_column",
    "value_column",
    "rows",
    "groups",
    "dated_at",
    "ingested_at",
    "status",
    "changed_at",
    "note",
    "stats_sum",
    "line_sum",
)
GROUP_COLS = ("batch_id", "position", "label", "n", "mean", "mean_lo", "m2")
RUN_COLS = (
    "id",
    "created_at",
    "folder",
    "state_sha256",
    "batch_ids",
    "reference_at",
    "half_life_days",
    "targets_met",
    "summary",
    "groups_sum",
    "line_sum",
    "final_state",
    "state_sum",
)
RUN_GROUP_COLS = (
    "run_id",
    "position",
    "label",
    "n",
    "raw_mean",
    "post_mean",
    "post_sd",
    "q_lo",
    "q_hi",
    "rank_mean",
    "rank_sd",
    "p_above",
    "p_outside",
)
GROUP_TYPES = ("bigint", "integer", "text", "bigint", "float8", "float8", "float8")
COLUMN_COLS = ("batch_id", "column_name", "position", "value")
COLUMN_TYPES = ("bigint", "text", "integer", "text")
RUN_GROUP_TYPES = ("bigint", "integer", "text") + ("float8",) * 10

# test-only hook: when set, an ingest (or a store creation) pauses so that a test can kill it there
PAUSE_ENV = "POOLING_TEST_INGEST_PAUSE"  # file to create when the pause starts
PAUSE_AT_ENV = "POOLING_TEST_INGEST_PAUSE_AT"  # "middle", "before-commit" or "create"
PAUSE_SECONDS_ENV = "POOLING_TEST_INGEST_PAUSE_SECONDS"
RESUME_ENV = "POOLING_TEST_INGEST_RESUME"  # a file whose appearance ends the pause early

_HEX64 = re.compile(r"[0-9a-f]{64}")
_HEX16 = re.compile(r"[0-9a-f]{16}")


def now_utc() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def q(name: str) -> str:
    """A column name quoted for both SQL dialects ("rows" and "groups" are key words in both)."""
    return f'"{name}"'


def cols(names) -> str:
    return ", ".join(q(c) for c in names)


def _real(x) -> float | None:
    """A run's number as stored: non-finite numbers become NULL, -0.0 becomes 0.0."""
    x = float(x)
    return x + 0.0 if math.isfinite(x) else None


def _unreal(x) -> float:
    return float("nan") if x is None else float(x)


def _is_sum(x, pattern=_HEX64) -> bool:
    return isinstance(x, str) and pattern.fullmatch(x) is not None


def _safe(sum_fn, fields):
    """A checksum of values read back; None when they are of a kind no checksum can hold (damage)."""
    try:
        return sum_fn(fields)
    except (TypeError, ValueError, UnicodeError, OverflowError):
        return None


def _who(line) -> str:
    return f"batch {line[0]} ({str(line[1])!r})"


def _columns_of(rows, groups) -> dict | None:
    """One batch's batch_columns rows (batch_id, column_name, position, value) as {name: [value per position]},
    or None when they are not whole (a position missing or doubled, a value not text: damage)."""
    out: dict[str, list] = {}
    for _b, name, pos, value in rows:
        if type(name) is not str or type(value) is not str or type(pos) is not int:
            return None
        out.setdefault(name, []).append((pos, value))
    for name, pairs in out.items():
        pairs.sort()
        if [p for p, _ in pairs] != list(range(groups)):
            return None
        out[name] = [v for _, v in pairs]
    return out


def _by_label(labels, n, mean, mean_lo, m2) -> dict:
    """One batch's statistics as {label: (n, and the float64 bits of mean, mean_lo, M2)}: equal exactly or not."""
    bits = [C.stored_floats(x).view(np.uint64).tolist() for x in (mean, mean_lo, m2)]
    return {str(lab): (int(k), *b) for lab, k, *b in zip(labels, np.asarray(n).tolist(), *bits)}


def _by_batch(rows) -> dict:
    out: dict = {}
    for r in rows:
        out.setdefault(r[0], []).append(r)
    return out


def _stat_arrays(rows):
    """Columns of batch_groups rows (batch_id, position, label, n, mean, mean_lo, m2) as typed arrays, or
    None when any value is not of its stored type (a damaged row: text in a number column, a NULL, ...)."""
    if not rows:
        e = np.empty(0)
        return np.empty(0, np.int64), np.empty(0, np.int64), (), np.empty(0, np.int64), e, e, e
    c = list(zip(*rows))
    try:
        bid, pos, n = (np.array(c[k]) for k in (0, 1, 3))
        floats = [np.array(c[k]) for k in (4, 5, 6)]
    except (ValueError, OverflowError, TypeError):
        return None
    if not all(a.dtype == np.int64 for a in (bid, pos, n)) or not all(a.dtype == np.float64 for a in floats):
        return None
    if not all(type(x) is str for x in c[2]):
        return None
    # every float as a float: a damaged SQLite record can turn 0.0 into the integer 0, which numpy would take
    # silently (both stores return a float for every sound value of these columns)
    if not all(type(x) is float for k in (4, 5, 6) for x in c[k]):
        return None
    return (bid, pos, c[2], n, *floats)


class SqlLedger(BatchStore):
    """The ledger over a DB-API-like connection; see the module's docstring for what a driver provides."""

    location = None  # the parsed store argument (location.Location)
    _FOR_UPDATE = ""  # PostgreSQL: " FOR UPDATE"

    # -- what a driver provides ----------------------------------------------------------------

    @contextmanager
    def _write(self):  # yields a transaction: one(sql, p), all(sql, p), run(sql, p), bulk(table, cols, rows, types)
        raise NotImplementedError

    @contextmanager
    def _read(self):
        raise NotImplementedError

    def _lock(self, tx, keys) -> None:
        """Keep writers of the same batch name or content apart (SQLite's write lock does it already)."""

    def _next_id(self, tx, table: str) -> int:
        raise NotImplementedError

    def _after_load(self, tx) -> None:
        """After rows were written with their own ids (a copy): let the id sequence continue past them."""

    def _own_problems(self) -> list[str]:
        """The database's own checks (SQLite's integrity check); none for PostgreSQL."""
        return []

    def _lock_columns(self, tx, exclusive: bool) -> None:
        """Keep the group-level column checks of concurrent ingests apart (SQLite's write lock does it already)."""

    def _lock_quantity(self, tx) -> None:
        """Keep apart ingests into a store without active batches, which choose its quantity (SQLite: done)."""

    # -- messages ------------------------------------------------------------------------------

    def _damaged(self, problem: str) -> InputError:
        return InputError(
            f"bad store '{self.path}': {problem}: the store was changed outside pooling or is "
            f"damaged; nothing was done (`pooling checkup {self.path}` lists every problem; restore "
            "the store from a backup)"
        )

    # -- the ledger lines ----------------------------------------------------------------------

    def _line_problem(self, line) -> str | None:
        if (
            len(line) != len(LINE_COLS)
            or not _is_sum(line[-1])
            or _safe(C.line_sum, line[:-1]) != line[-1]
            or line[10] not in ("active", "withdrawn", "replaced")
        ):
            return f"the ledger line of {_who(line)} does not match its checksum"
        return None

    def _head_problems(self, tx, batch_sums=None, run_sums=None) -> list[str]:
        head = tx.one("SELECT batch_lines, batch_acc, run_lines, run_acc FROM store_head WHERE one = 1")
        if head is None:
            return ["the ledger head (the store's count of its lines) is missing"]
        out = []
        for sums, count, acc, what in ((batch_sums, head[0], head[1], "batch"), (run_sums, head[2], head[3], "run")):
            if sums is None:
                continue
            good = [s for s in sums if _is_sum(s)]
            if (
                type(count) is not int
                or not _is_sum(acc, _HEX16)
                or count != len(sums)
                or (len(good) == len(sums) and C.acc_of(good) != acc)
            ):
                out.append(
                    f"the {what} lines ({len(sums)} found) do not agree with the ledger head "
                    f"({count!r} recorded): a line was removed, added or altered"
                )
        return out

    def _lines(self, tx) -> list[tuple]:
        """Every ledger line, oldest first, each checked against its line sum and all against the head."""
        lines = tx.all(f"SELECT {cols(LINE_COLS)} FROM batches ORDER BY id")
        for line in lines:
            bad = self._line_problem(line)
            if bad:
                raise self._damaged(bad)
        heads = self._head_problems(tx, batch_sums=[ln[-1] for ln in lines])
        if heads:
            raise self._damaged(heads[0])
        return lines

    @staticmethod
    def _info(line) -> BatchInfo:
        (bid, name, sha, source, _g, _v, rows, groups, dated, ingested, status, changed, note) = line[:13]
        return BatchInfo(bid, name, sha, source, rows, groups, dated, ingested, status, changed, note)

    def _bump_head(self, tx, *, batch: tuple = (), run: tuple = ()) -> None:
        """Apply changes to the head: `batch` / `run` are (count change, sums added, sums removed)."""
        head = tx.one(
            "SELECT batch_lines, batch_acc, run_lines, run_acc FROM store_head WHERE one = 1" + self._FOR_UPDATE
        )
        if head is None:
            raise self._damaged("the ledger head is missing")
        bl, ba, rl, ra = head
        if not (type(bl) is int and type(rl) is int and _is_sum(ba, _HEX16) and _is_sum(ra, _HEX16)):
            raise self._damaged("the ledger head holds values of the wrong kind")
        for change, acc_name in ((batch, "b"), (run, "r")):
            if not change:
                continue
            count, added, removed = change
            acc = ba if acc_name == "b" else ra
            for s in added:
                acc = C.acc_add(acc, s, +1)
            for s in removed:
                acc = C.acc_add(acc, s, -1)
            if acc_name == "b":
                bl, ba = bl + count, acc
            else:
                rl, ra = rl + count, acc
        tx.run(
            "UPDATE store_head SET batch_lines = ?, batch_acc = ?, run_lines = ?, run_acc = ? WHERE one = 1",
            (bl, ba, rl, ra),
        )

    def _restate(self, tx, line, status: str, changed_at: str, note) -> tuple:
        """Change a line's status (its checksum rewritten, the head adjusted) after checking the line as it was."""
        bad = self._line_problem(line)
        if bad:
            raise self._damaged(bad)
        fields = list(line[:-1])
        fields[10], fields[11], fields[12] = status, changed_at, note
        new = C.line_sum(fields)
        tx.run(
            "UPDATE batches SET status = ?, changed_at = ?, note = ?, line_sum = ? WHERE id = ?",
            (status, changed_at, note, new, line[0]),
        )
        return line[-1], new

    # -- the interface -------------------------------------------------------------------------

    def add_batch(
        self,
        new: NewBatch,
        labels,
        n,
        mean,
        mean_lo,
        m2,
        *,
        columns: dict | None = None,
        replace: bool = False,
        same_quantity: bool = False,
    ) -> BatchInfo:
        labels = [str(x) for x in labels]
        n = np.asarray(n, dtype=np.int64)
        mean, mean_lo, m2 = (C.stored_floats(x) for x in (mean, mean_lo, m2))
        columns = {str(k): [str(x) for x in v] for k, v in (columns or {}).items()}
        for name, values in columns.items():
            if len(values) != len(labels):
                raise ValueError(f"the group-level column '{name}' has {len(values)} values for {len(labels)} groups")
        rows = int(n.sum())
        when = now_utc()
        ssum = C.stats_sum(labels, n, mean, mean_lo, m2, columns)
        sel = f"SELECT {cols(LINE_COLS)} FROM batches"
        # the statistics' own sum (no columns) keeps two ingests of one delivery in two files apart
        bare = C.stats_sum(labels, n, mean, mean_lo, m2)
        with self._write() as tx:
            self._lock(tx, [f"name:{new.name}", f"content:{new.sha256}", f"stats:{bare}"])
            same = tx.one(f"{sel} WHERE sha256 = ? AND status = 'active'", (new.sha256,))
            if same is not None:
                b = self._info(same)
                differ = self._columns_differ(tx, b, labels, columns)
                if differ is None:
                    raise NothingNew(
                        f"the content of '{new.source}' is in the store already as batch '{b.name}' "
                        f"(ingested {b.ingested_at}); nothing changed"
                    )
                if not (replace and b.name == new.name):  # with --replace, the batch's columns are replaced below
                    raise InputError(
                        f"bad input in '{new.source}': its content is in the store '{self.path}' already as the "
                        f"active batch '{b.name}' (ingested {b.ingested_at}), with other group-level columns: "
                        f"{differ}; nothing was changed (to replace the batch's columns with these, ingest it "
                        f"with --batch '{b.name}' --replace)"
                    )
            current = tx.one(f"{sel} WHERE name = ? AND status != 'replaced'", (new.name,))
            if current is not None and not replace:
                b = self._info(current)
                differ = None
                if b.status == "active" and self._same_statistics(tx, b.id, _by_label(labels, n, mean, mean_lo, m2)):
                    differ = self._columns_differ(tx, b, labels, columns)
                if differ is not None:
                    raise InputError(
                        f"bad input in '{new.source}': the batch '{b.name}' in the store '{self.path}' holds the "
                        f"same statistics with other group-level columns: {differ}; nothing was changed (pass "
                        "--replace to replace the batch's columns with these)"
                    )
                raise InputError(self._name_in_use(new, b))
            gone = tx.one(f"{sel} WHERE sha256 = ? AND status = 'withdrawn'", (new.sha256,))
            if gone is not None and not replace:
                b = self._info(gone)
                raise InputError(
                    f"bad input: the content of '{new.source}' was withdrawn as batch '{b.name}' at "
                    f"{b.changed_at}; pass --replace to take it back"
                )
            replacing = None if current is None else current[0]
            self._check_same_statistics(tx, new, labels, n, mean, mean_lo, m2, columns, replacing)
            self._lock_columns(tx, exclusive=bool(columns))
            if not same_quantity:
                self._check_quantity(tx, new, replacing)
            self._check_columns(tx, new, labels, columns, replacing)
            swapped = ()
            if current is not None:
                b = self._info(current)
                if b.status == "withdrawn":
                    # the withdrawal's time and reason stay in the ledger, in the note (covered by the line sum)
                    why = f": {b.note}" if b.note else " (no reason given)"
                    taken = (
                        f"taken back at {when} (the same content ingested again)"
                        if b.sha256 == new.sha256
                        else f"replaced by a new delivery of the same name at {when}"
                    )
                    note = f"withdrawn at {b.changed_at}{why}; {taken}"
                elif b.sha256 == new.sha256:
                    note = f"replaced at {when} by the same content with other group-level columns"
                else:
                    note = f"replaced by a new delivery of the same name at {when}"
                swapped = self._restate(tx, current, "replaced", when, note)
            bid = self._next_id(tx, "batches")
            fields = (
                bid,
                new.name,
                new.sha256,
                new.source,
                new.group_column,
                new.value_column,
                rows,
                len(labels),
                new.dated_at,
                when,
                "active",
                None,
                None,
                ssum,
            )
            lsum = C.line_sum(fields)
            tx.run(
                f"INSERT INTO batches ({cols(LINE_COLS)}) VALUES ({', '.join('?' * len(LINE_COLS))})", (*fields, lsum)
            )
            payload = [
                (bid, i, lab, int(n[i]), float(mean[i]), float(mean_lo[i]), float(m2[i]))
                for i, lab in enumerate(labels)
            ]
            half = len(payload) // 2
            tx.bulk("batch_groups", GROUP_COLS, payload[:half], GROUP_TYPES)
            _test_pause("middle")
            tx.bulk("batch_groups", GROUP_COLS, payload[half:], GROUP_TYPES)
            tx.bulk(
                "batch_columns",
                COLUMN_COLS,
                [(bid, name, i, v) for name in sorted(columns) for i, v in enumerate(columns[name])],
                COLUMN_TYPES,
            )
            added, removed = [lsum], []
            if swapped:
                removed.append(swapped[0])
                added.append(swapped[1])
            self._bump_head(tx, batch=(1, added, removed))
            _test_pause("before-commit")
        return self._info((*fields, lsum))

    def _name_in_use(self, new: NewBatch, b: BatchInfo) -> str:
        """The refusal of a name held by a batch that is active or withdrawn (without --replace)."""
        if b.status == "withdrawn":
            why = f"with the reason {b.note!r}" if b.note else "with no reason given"
            if b.sha256 == new.sha256:
                return (
                    f"bad input: '{new.source}' holds the same content as the batch '{new.name}', which was "
                    f"withdrawn from the store '{self.path}' at {b.changed_at} {why}; pass --replace to take it "
                    "back (the ledger keeps the withdrawal's time and reason)"
                )
            return (
                f"bad input: a batch named '{new.name}' was withdrawn from the store '{self.path}' at "
                f"{b.changed_at} {why}, with other content ({b.rows} rows, sha256 {b.sha256[:12]}); name this one "
                "with --batch NAME, or pass --replace to replace it (the ledger keeps the withdrawal's time and reason)"
            )
        return (
            f"bad input: a batch named '{new.name}' is in the store '{self.path}' already "
            f"({b.status}, {b.rows} rows, sha256 {b.sha256[:12]}) with other content; "
            "name this one with --batch NAME, or pass --replace to replace it"
        )

    def _check_same_statistics(self, tx, new: NewBatch, labels, n, mean, mean_lo, m2, columns, replacing) -> None:
        """Refuse (NothingNew) a batch whose per-group statistics equal an active batch's exactly (the batch it
        replaces aside): the same delivery in another file (other line endings, CSV and Parquet), whose second
        ingest would count every measurement twice. Exact: labels, n and the float64 bits of mean, mean_lo and M2
        as stored (the values stats_sum covers), groups in any order. The database finds the few active batches
        with as many rows and groups that hold the first group's statistics; only those are read whole.
        The same delivery with other group-level columns (a corrected method, a column added) is refused as bad
        input (InputError), naming what differs: saying "nothing new" would drop the new columns unseen."""
        if not len(labels):
            return
        found = tx.all(
            f"SELECT b.id FROM batches b WHERE b.status = 'active' AND b.id <> ? AND b.{q('rows')} = ? "
            f"AND b.{q('groups')} = ? AND EXISTS (SELECT 1 FROM batch_groups g WHERE g.batch_id = b.id AND g.label = ? "
            "AND g.n = ? AND g.mean = ? AND g.mean_lo = ? AND g.m2 = ?) ORDER BY b.id",
            (
                -1 if replacing is None else replacing,
                int(n.sum()),
                len(labels),
                labels[0],
                int(n[0]),
                float(mean[0]),
                float(mean_lo[0]),
                float(m2[0]),
            ),
        )
        if not found:
            return
        mine = _by_label(labels, n, mean, mean_lo, m2)
        for (bid,) in found:
            if not self._same_statistics(tx, bid, mine):
                continue
            b = self._info(tx.one(f"SELECT {cols(LINE_COLS)} FROM batches WHERE id = ?", (bid,)))
            differ = self._columns_differ(tx, b, labels, columns)
            if differ is not None:
                raise InputError(
                    f"bad input in '{new.source}': its statistics (every group's label, n, mean and M2) equal those "
                    f"of the active batch '{b.name}' (from '{b.source}', ingested {b.ingested_at}) exactly, with "
                    f"other group-level columns: {differ}; nothing was changed (to replace that batch's columns "
                    f"with these, ingest this file with --batch '{b.name}' --replace; if it is a new delivery, "
                    f"withdraw '{b.name}' first)"
                )
            raise NothingNew(
                f"the statistics of '{new.source}' (every group's label, n, mean and M2) equal those of the "
                f"active batch '{b.name}' (from '{b.source}', ingested {b.ingested_at}) exactly: the same "
                "delivery in another file, whose measurements would count twice; nothing changed (if it is a "
                f"new delivery, withdraw '{b.name}' first, or replace it with --batch '{b.name}' --replace)"
            )

    def _same_statistics(self, tx, bid: int, mine: dict) -> bool:
        """Whether batch `bid` holds exactly the statistics `mine` (_by_label); a damaged row equals nothing."""
        rows = tx.all(f"SELECT {cols(GROUP_COLS)} FROM batch_groups WHERE batch_id = ? ORDER BY position", (bid,))
        arrays = _stat_arrays(rows)
        return arrays is not None and _by_label(*arrays[2:]) == mine

    def _columns_differ(self, tx, b: BatchInfo, labels, columns: dict) -> str | None:
        """None when batch `b` keeps the same group-level columns as a delivery of the same statistics (the same
        names; per group the same value, '5' and '5.0' being one number), else what differs, for a message: the
        columns only one of them keeps, or the first group whose value differs (and how many more do)."""
        from ..stats import _same_number, _show

        held: dict[str, dict[str, str]] = {}
        for label, name, value in tx.all(
            "SELECT g.label, c.column_name, c.value FROM batch_columns c JOIN batch_groups g ON g.batch_id = "
            "c.batch_id AND g.position = c.position WHERE c.batch_id = ?",
            (b.id,),
        ):
            held.setdefault(str(name), {})[str(label)] = str(value)
        only_new, only_old = sorted(set(columns) - set(held)), sorted(set(held) - set(columns))
        if only_new or only_old:
            parts = []
            if only_new:
                named = ", ".join(f"'{c}'" for c in only_new)
                parts.append(f"this delivery keeps {named}, which the batch '{b.name}' does not")
            if only_old:
                named = ", ".join(f"'{c}'" for c in only_old)
                parts.append(f"the batch '{b.name}' keeps {named}, which this delivery does not")
            return "; ".join(parts)
        changed = [
            (name, label, held[name].get(label), value)
            for name in sorted(columns)
            for label, value in zip(labels, columns[name])
            if held[name].get(label) != value and not _same_number(held[name].get(label) or "", value)
        ]
        if not changed:
            return None
        name, label, old, value = changed[0]
        more = "" if len(changed) == 1 else f" (and {len(changed) - 1} more group-column values differ)"
        return (
            f"group {_show(label)}, column '{name}': the batch '{b.name}' holds {_show(old)}, this delivery "
            f"{_show(value)}{more}"
        )

    def _check_quantity(self, tx, new: NewBatch, replacing: int | None) -> None:
        """Refuse (InputError, one line) a batch whose value column (or group column) has a name no active batch
        uses (the batch it replaces aside): most likely a delivery of another quantity, or grouped otherwise.
        `pooling ingest --same-quantity` skips this when a column was only renamed."""
        sql = (
            "SELECT group_column, value_column, max(id) FROM batches WHERE status = 'active' AND id <> ? "
            "GROUP BY group_column, value_column"
        )
        skip = (-1 if replacing is None else replacing,)
        held = tx.all(sql, skip)
        if not held:
            # nothing to compare with: the first quantity of the store is chosen by one ingest at a time
            self._lock_quantity(tx)
            held = tx.all(sql, skip)
            if not held:
                return
        values = {v for _g, v, _i in held}
        groups = {g for g, _v, _i in held}
        if new.value_column in values and new.group_column in groups:
            return
        old_group, old_value, bid = max(held, key=lambda r: r[2])  # the latest active batch's names
        differ = []  # (what, this batch's name, the store's)
        if new.value_column not in values:
            differ.append(("value", new.value_column, old_value))
        if new.group_column not in groups:
            differ.append(("group", new.group_column, old_group))
        bname = tx.one("SELECT name FROM batches WHERE id = ?", (bid,))[0]
        mine = " and ".join(f"the {what} column '{name}'" for what, name, _ in differ)
        theirs = " and ".join(f"'{old}'" for _, _, old in differ)
        raise InputError(
            f"bad input in '{new.source}': {mine} {'is' if len(differ) == 1 else 'are'} named otherwise in the "
            f"store '{self.path}' (its latest active batch '{bname}' has {theirs}); every active batch measures "
            "one quantity on one kind of group; nothing was changed (ingest the right file, or pass "
            "--same-quantity if the column was only renamed)"
        )

    def _check_columns(self, tx, new: NewBatch, labels, columns: dict, replacing: int | None) -> None:
        """Refuse (InputError, one line) a batch whose group-level columns disagree with the active batches' (but
        the one it replaces): other column names, or a group with another value in a column. Reads the active
        batches' distinct (group, column, value) triples, O(their group rows)."""
        skip = -1 if replacing is None else replacing
        kept = tx.all(
            "SELECT b.id, b.name, c.column_name FROM batches b LEFT JOIN (SELECT DISTINCT batch_id, "
            "column_name FROM batch_columns) c ON c.batch_id = b.id WHERE b.status = 'active' AND b.id <> ? "
            "ORDER BY b.id",
            (skip,),
        )
        if not kept:
            return
        names: dict[int, tuple[str, set]] = {}
        for bid, bname, col in kept:
            names.setdefault(bid, (bname, set()))[1].update([col] if col is not None else [])
        mine = set(columns)
        for bname, theirs in names.values():
            if theirs == mine:
                continue
            shown = ", ".join(f"'{c}'" for c in sorted(theirs)) or "none"
            mine_shown = ", ".join(f"'{c}'" for c in sorted(mine)) or "none"
            lacks = sorted(theirs - mine)
            if lacks:
                fix = "ingest it with " + " ".join(f"--column {c}" for c in lacks)
            else:
                fix = (
                    "ingest it without "
                    + " ".join(f"--column {c}" for c in sorted(mine - theirs))
                    + ", or withdraw the active batches and ingest them again with these columns"
                )
            raise InputError(
                f"bad input in '{new.source}': the store '{self.path}' keeps the group-level columns "
                f"{shown} with its active batch '{bname}', and this batch keeps {mine_shown}; every active "
                f"batch keeps the same group-level columns: {fix}; nothing was changed"
            )
        if not columns:
            return
        from ..stats import _same_number, _show

        held = tx.all(
            "SELECT g.label, c.column_name, c.value, min(b.id) FROM batch_columns c JOIN batch_groups g "
            "ON g.batch_id = c.batch_id AND g.position = c.position JOIN batches b ON b.id = c.batch_id "
            "WHERE b.status = 'active' AND b.id <> ? GROUP BY g.label, c.column_name, c.value",
            (skip,),
        )
        stored: dict[tuple[str, str], list] = {}
        for label, col, value, bid in held:
            stored.setdefault((label, col), []).append((bid, value))
        for name in sorted(columns):
            for label, value in zip(labels, columns[name]):
                for bid, old in sorted(stored.get((label, name), ())):
                    if old != value and not _same_number(old, value):
                        raise InputError(
                            f"bad input in '{new.source}', group {_show(label)}, column '{name}': the store "
                            f"'{self.path}' holds {_show(old)} for this group (batch '{names[bid][0]}'), this batch "
                            f"has {_show(value)}; a group-level column holds one value per group; nothing was changed "
                            "(correct the file, or withdraw the batch that holds the other value)"
                        )

    def withdraw(self, name: str, note: str | None = None) -> BatchInfo:
        when = now_utc()
        with self._write() as tx:
            self._lock(tx, [f"name:{name}"])
            line = tx.one(f"SELECT {cols(LINE_COLS)} FROM batches WHERE name = ? AND status != 'replaced'", (name,))
            if line is None:
                raise InputError(
                    f"bad input: no batch named '{name}' in the store '{self.path}'; "
                    f"`pooling batches {self.path}` lists them"
                )
            b = self._info(line)
            if b.status == "withdrawn":
                raise NothingNew(f"batch '{name}' was withdrawn already at {b.changed_at}; nothing changed")
            old, new = self._restate(tx, line, "withdrawn", when, note)
            self._bump_head(tx, batch=(0, [new], [old]))
            line = tx.one(f"SELECT {cols(LINE_COLS)} FROM batches WHERE id = ?", (b.id,))
        return self._info(line)

    def batches(self) -> list[BatchInfo]:
        with self._read() as tx:
            return [self._info(ln) for ln in self._lines(tx)]

    def columns(self) -> dict[int, tuple[str, ...]]:
        with self._read() as tx:
            lines = self._lines(tx)
            rows = self._group_rows(tx)
            col_rows = self._column_rows(tx)
        damaged: list[str] = []  # a batch whose statistics fail their checksum is left out (checkup names it)
        return {s.batch_id: tuple(s.columns) for s in self._stats(lines, rows, damaged, col_rows)}

    def _group_rows(self, tx, active_only: bool = False) -> list[tuple]:
        if not active_only:
            return tx.all(f"SELECT {cols(GROUP_COLS)} FROM batch_groups ORDER BY batch_id, position")
        return tx.all(
            f"SELECT {', '.join('g.' + q(c) for c in GROUP_COLS)} FROM batch_groups g "
            "JOIN batches b ON b.id = g.batch_id WHERE b.status = 'active' ORDER BY g.batch_id, g.position"
        )

    def _column_rows(self, tx, active_only: bool = False) -> list[tuple]:
        """batch_columns rows; sorted by batch here (the database's text order depends on its collation)."""
        if not active_only:
            rows = tx.all(f"SELECT {cols(COLUMN_COLS)} FROM batch_columns")
        else:
            rows = tx.all(
                f"SELECT {', '.join('c.' + q(c) for c in COLUMN_COLS)} FROM batch_columns c "
                "JOIN batches b ON b.id = c.batch_id WHERE b.status = 'active'"
            )
        return sorted(
            rows, key=lambda r: (r[0] if type(r[0]) is int else -1, str(r[1]), r[2] if type(r[2]) is int else -1)
        )

    def _stats(self, lines, rows, collect: list | None = None, col_rows=()) -> list[BatchStats]:
        """Split group rows (and group-level column rows) by batch and check each batch's statistics and columns
        against its stats_sum, for `lines` (in id order). Raises on the first mismatch, or appends to `collect`
        when given."""
        arrays = _stat_arrays(rows)
        out = []
        if arrays is None:
            # some row is of the wrong type: find the batch it belongs to, for the message
            bad = {r[0] for r in rows if _stat_arrays([r]) is None}
            for line in lines:
                if line[0] in bad:
                    what = f"the statistics of {_who(line)} do not match their checksum"
                    if collect is None:
                        raise self._damaged(what)
                    collect.append(what)
            if collect is None:
                raise self._damaged("the statistics of a batch do not match their checksum")
            good = [r for r in rows if r[0] not in bad]
            return self._stats([ln for ln in lines if ln[0] not in bad], good, collect, col_rows)
        bid, pos, labels, n, mean, lo, m2 = arrays
        ids = np.array([ln[0] for ln in lines], dtype=np.int64)
        starts = np.searchsorted(bid, ids, side="left")
        ends = np.searchsorted(bid, ids, side="right")
        sorted_ok = bool(np.all(np.diff(bid) >= 0)) if len(bid) else True
        by_batch = _by_batch(col_rows)
        for line, s, e in zip(lines, starts, ends):
            k = int(e - s)
            ok = sorted_ok and k == line[7] and np.array_equal(pos[s:e], np.arange(k)) and _is_sum(line[13])
            columns = _columns_of(by_batch.get(line[0], ()), k)
            ok = ok and columns is not None
            if ok:
                got = _safe(lambda x: C.stats_sum(*x), (labels[s:e], n[s:e], mean[s:e], lo[s:e], m2[s:e], columns))
                ok = got == line[13]
            if not ok:
                what = f"the statistics of {_who(line)} do not match their checksum"
                if collect is None:
                    raise self._damaged(what)
                collect.append(what)
                continue
            out.append(
                BatchStats(
                    int(line[0]),
                    tuple(labels[s:e]),
                    n[s:e],
                    mean[s:e],
                    lo[s:e],
                    m2[s:e],
                    {name: tuple(v) for name, v in columns.items()},
                )
            )
        return out

    def snapshot(self) -> Snapshot:
        with self._read() as tx:
            lines = self._lines(tx)
            active = [ln for ln in lines if ln[10] == "active"]
            rows = self._group_rows(tx, active_only=True)
            col_rows = self._column_rows(tx, active_only=True)
        stats = self._stats(active, rows, col_rows=col_rows)
        infos = tuple(self._info(ln) for ln in active)
        return Snapshot(infos, tuple(stats), state_fingerprint(infos))

    # -- runs -----------------------------------------------------------------------------------

    def _run_problem(self, run) -> str | None:
        if not _is_sum(run[10]) or _safe(C.run_line_sum, run[:10]) != run[10]:
            return f"the record of run {run[0]} does not match its checksum"
        return None

    def _run_lines(self, tx, with_state: bool = False) -> list[tuple]:
        """Every run line (RUN_COLS; final_state only when asked), checked against its sum and the head."""
        names = RUN_COLS if with_state else RUN_COLS[:11]
        runs = tx.all(f"SELECT {cols(names)} FROM runs ORDER BY id")
        for run in runs:
            bad = self._run_problem(run)
            if bad:
                raise self._damaged(bad)
        heads = self._head_problems(tx, run_sums=[r[10] for r in runs])
        if heads:
            raise self._damaged(heads[0])
        return runs

    @staticmethod
    def _run(row, groups=(), final_state=None) -> RunRecord:
        (rid, created, folder, sha, ids, ref, hl, met, summary) = row[:9]
        return RunRecord(
            created_at=created,
            folder=folder,
            state_sha256=sha,
            batch_ids=tuple(json.loads(ids)),
            reference_at=ref,
            half_life_days=hl,
            targets_met=bool(met),
            summary=json.loads(summary),
            groups=tuple(groups),
            final_state=final_state,
            id=rid,
        )

    def runs(self) -> list[RunRecord]:
        with self._read() as tx:
            return [self._run(r) for r in self._run_lines(tx)]

    def _run_group_rows(self, tx, run_id=None) -> list[tuple]:
        where = "" if run_id is None else "WHERE run_id = ?"
        return tx.all(
            f"SELECT {cols(RUN_GROUP_COLS)} FROM run_groups {where} ORDER BY run_id, position",
            () if run_id is None else (run_id,),
        )

    def _run_groups_ok(self, run, rows) -> bool:
        body = [r[1:] for r in rows]
        if [r[0] for r in body] != list(range(len(body))):
            return False
        for r in body:
            if type(r[1]) is not str or not all(x is None or type(x) is float for x in r[2:]):
                return False
        return _safe(C.run_groups_sum, body) == run[9]

    def _state_ok(self, text, stored_sum) -> bool:
        if text is None or stored_sum is None:
            return text is None and stored_sum is None
        return isinstance(text, str) and _safe(C.state_sum, text) == stored_sum

    def last_run(self) -> RunRecord | None:
        with self._read() as tx:
            runs = self._run_lines(tx)
            if not runs:
                return None
            last = runs[-1]
            rows = self._run_group_rows(tx, last[0])
            state = tx.one("SELECT final_state, state_sum FROM runs WHERE id = ?", (last[0],))
        if not self._run_groups_ok(last, rows):
            raise self._damaged(f"the group results of run {last[0]} do not match their checksum")
        if state is None or not self._state_ok(*state):
            raise self._damaged(f"the chains' final state kept by run {last[0]} does not match its checksum")
        groups = [GroupResult(r[2], *(_unreal(x) for x in r[3:])) for r in rows]
        return self._run(last, groups, json.loads(state[0]) if state[0] else None)

    def record_run(self, run: RunRecord) -> int:
        summary = json.dumps(run.summary, allow_nan=False)
        fs = None if run.final_state is None else json.dumps(run.final_state, allow_nan=False)
        body = [
            (
                i,
                g.label,
                _real(g.n),
                _real(g.raw_mean),
                _real(g.post_mean),
                _real(g.post_sd),
                _real(g.q_lo),
                _real(g.q_hi),
                _real(g.rank_mean),
                _real(g.rank_sd),
                _real(g.p_above),
                _real(g.p_outside),
            )
            for i, g in enumerate(run.groups)
        ]
        gsum = C.run_groups_sum(body)
        half = None if run.half_life_days is None else float(run.half_life_days)
        with self._write() as tx:
            self._lock(tx, ["runs"])
            rid = self._next_id(tx, "runs")
            fields = (
                rid,
                run.created_at,
                run.folder,
                run.state_sha256,
                json.dumps(list(run.batch_ids)),
                run.reference_at,
                half,
                int(run.targets_met),
                summary,
                gsum,
            )
            lsum = C.run_line_sum(fields)
            tx.run(
                f"INSERT INTO runs ({cols(RUN_COLS)}) VALUES ({', '.join('?' * len(RUN_COLS))})",
                (*fields, lsum, fs, C.state_sum(fs)),
            )
            tx.bulk("run_groups", RUN_GROUP_COLS, [(rid, *r) for r in body], RUN_GROUP_TYPES)
            # only the latest run's chain states are ever used (to start the next refit); older ones
            # would make the store grow by chains x groups numbers every night
            tx.run(
                "UPDATE runs SET final_state = NULL, state_sum = NULL WHERE id < ? AND final_state IS NOT NULL", (rid,)
            )
            self._bump_head(tx, run=(1, [lsum], []))
        return rid

    # -- the whole store: checking, copying ---------------------------------------------------

    def _meta(self, tx) -> dict:
        return {k: v for k, v in tx.all("SELECT key, value FROM pooling_store ORDER BY key")}

    def check(self) -> list[str]:
        """Every problem, one line each (see BatchStore.check)."""
        found: list[str] = list(self._own_problems())
        try:
            with self._read() as tx:
                meta = self._meta(tx)
                if meta.get("format") != str(SCHEMA_VERSION):
                    found.append(f"schema version {meta.get('format')!r}, expected {SCHEMA_VERSION}")
                lines = tx.all(f"SELECT {cols(LINE_COLS)} FROM batches ORDER BY id")
                rows = self._group_rows(tx)
                col_rows = self._column_rows(tx)
                runs = tx.all(f"SELECT {cols(RUN_COLS)} FROM runs ORDER BY id")
                run_rows = self._run_group_rows(tx)
                heads = self._head_problems(tx, [ln[-1] for ln in lines], [r[10] for r in runs])
        except InputError as exc:  # the database itself refuses to read a table
            return found + [f"its tables cannot be read: {exc}"]
        sound = []
        for line in lines:
            bad = self._line_problem(line)
            if bad:
                found.append(bad)
            else:
                sound.append(line)
        stat_bad: list[str] = []
        self._stats(sound, [r for r in rows if r[0] in {ln[0] for ln in sound}], stat_bad, col_rows)
        found += stat_bad
        known = {ln[0] for ln in lines}
        stray = sorted({r[0] for r in rows} - known, key=str)
        if stray:
            found.append(f"statistics rows of batch id(s) {', '.join(map(str, stray[:5]))} that are not in the ledger")
        stray = sorted({r[0] for r in col_rows} - known, key=str)
        if stray:
            found.append(
                f"group-level column rows of batch id(s) {', '.join(map(str, stray[:5]))} that are not in the ledger"
            )
        by_run: dict = {}
        for r in run_rows:
            by_run.setdefault(r[0], []).append(r)
        for run in runs:
            bad = self._run_problem(run)
            if bad:
                found.append(bad)
                continue
            if not self._run_groups_ok(run, by_run.get(run[0], [])):
                found.append(f"the group results of run {run[0]} do not match their checksum")
            if not self._state_ok(run[11], run[12]):
                found.append(f"the chains' final state kept by run {run[0]} does not match its checksum")
        stray = sorted(set(by_run) - {r[0] for r in runs}, key=str)
        if stray:
            found.append(f"group results of run id(s) {', '.join(map(str, stray[:5]))} that are not in the ledger")
        found += heads
        return found

    def export(self) -> StoreContent:
        with self._read() as tx:
            meta = self._meta(tx)
            lines = self._lines(tx)
            rows = self._group_rows(tx)
            col_rows = self._column_rows(tx)
            runs = self._run_lines(tx, with_state=True)
            run_rows = self._run_group_rows(tx)
        stats = {s.batch_id: s for s in self._stats(lines, rows, col_rows=col_rows)}
        stray = sorted({r[0] for r in col_rows} - set(stats), key=str)
        if stray:
            raise self._damaged(
                f"group-level column rows of batch id(s) {', '.join(map(str, stray[:5]))} are not in the ledger"
            )
        by_run: dict = {r[0]: [] for r in runs}
        for r in run_rows:
            by_run.setdefault(r[0], []).append(r)
        for run in runs:
            if not self._run_groups_ok(run, by_run[run[0]]):
                raise self._damaged(f"the group results of run {run[0]} do not match their checksum")
            if not self._state_ok(run[11], run[12]):
                raise self._damaged(f"the chains' final state kept by run {run[0]} does not match its checksum")
        return StoreContent(meta, tuple(lines), stats, tuple(runs), by_run)

    def load(self, content: StoreContent, copied_from: str) -> None:
        """Write a whole store's content into this empty store in one transaction (ids and checksums kept)."""
        with self._write() as tx:
            if tx.one("SELECT count(*) FROM batches")[0] or tx.one("SELECT count(*) FROM runs")[0]:
                raise InputError(f"bad store '{self.path}': it is not empty; copy into a new store")
            tx.run(
                f"INSERT INTO batches ({cols(LINE_COLS)}) VALUES ({', '.join('?' * len(LINE_COLS))})",
                content.lines,
                many=True,
            )
            for line in content.lines:
                s = content.stats[line[0]]
                tx.bulk(
                    "batch_groups",
                    GROUP_COLS,
                    [
                        (s.batch_id, i, lab, int(s.n[i]), float(s.mean[i]), float(s.mean_lo[i]), float(s.m2[i]))
                        for i, lab in enumerate(s.labels)
                    ],
                    GROUP_TYPES,
                )
                tx.bulk(
                    "batch_columns",
                    COLUMN_COLS,
                    [(s.batch_id, name, i, v) for name in sorted(s.columns) for i, v in enumerate(s.columns[name])],
                    COLUMN_TYPES,
                )
            tx.run(
                f"INSERT INTO runs ({cols(RUN_COLS)}) VALUES ({', '.join('?' * len(RUN_COLS))})",
                content.runs,
                many=True,
            )
            for run in content.runs:
                tx.bulk("run_groups", RUN_GROUP_COLS, content.run_groups[run[0]], RUN_GROUP_TYPES)
            tx.run(
                "UPDATE store_head SET batch_lines = ?, batch_acc = ?, run_lines = ?, run_acc = ? WHERE one = 1",
                (
                    len(content.lines),
                    C.acc_of(ln[-1] for ln in content.lines),
                    len(content.runs),
                    C.acc_of(r[10] for r in content.runs),
                ),
            )
            for key in ("created_at", "created_by"):
                if key in content.meta:
                    tx.run("UPDATE pooling_store SET value = ? WHERE key = ?", (content.meta[key], key))
            tx.run("INSERT INTO pooling_store (key, value) VALUES (?, ?)", ("copied_from", copied_from))
            tx.run("INSERT INTO pooling_store (key, value) VALUES (?, ?)", ("copied_at", now_utc()))
            self._after_load(tx)

    def fill_checksums(self, tx) -> None:
        """Schema version 1 -> 2: compute every checksum and the head from the rows as they are."""
        lines = tx.all(f"SELECT {cols(LINE_COLS[:-2])} FROM batches ORDER BY id")
        rows = self._group_rows(tx)
        arrays = _stat_arrays(rows)
        if arrays is None:
            raise InputError(
                f"bad store '{self.path}': a statistics row holds a value of the wrong type; the file is "
                "damaged and cannot be upgraded (restore it from a backup)"
            )
        bid, pos, labels, n, mean, lo, m2 = arrays
        line_sums = []
        for line in lines:
            s, e = np.searchsorted(bid, line[0], "left"), np.searchsorted(bid, line[0], "right")
            ssum = C.stats_sum(
                labels[s:e], n[s:e], C.stored_floats(mean[s:e]), C.stored_floats(lo[s:e]), C.stored_floats(m2[s:e])
            )
            lsum = C.line_sum((*line, ssum))
            tx.run("UPDATE batches SET stats_sum = ?, line_sum = ? WHERE id = ?", (ssum, lsum, line[0]))
            line_sums.append(lsum)
        runs = tx.all(f"SELECT {cols(RUN_COLS[:9])}, final_state FROM runs ORDER BY id")
        run_rows = self._run_group_rows(tx)
        by_run: dict = {}
        for r in run_rows:
            by_run.setdefault(r[0], []).append(r[1:])
        run_sums = []
        for run in runs:
            gsum = C.run_groups_sum(by_run.get(run[0], []))
            lsum = C.run_line_sum((*run[:9], gsum))
            tx.run(
                "UPDATE runs SET groups_sum = ?, line_sum = ?, state_sum = ? WHERE id = ?",
                (gsum, lsum, C.state_sum(run[9]), run[0]),
            )
            run_sums.append(lsum)
        tx.run(
            "INSERT INTO store_head (one, batch_lines, batch_acc, run_lines, run_acc) VALUES (1, ?, ?, ?, ?)",
            (len(line_sums), C.acc_of(line_sums), len(run_sums), C.acc_of(run_sums)),
        )


def _test_pause(point: str) -> None:
    """Tests only: stop here (inside the open transaction) so that a test can SIGKILL the process."""
    marker = os.environ.get(PAUSE_ENV)
    if not marker or os.environ.get(PAUSE_AT_ENV, "middle") != point:
        return
    Path(marker).write_text(str(os.getpid()))
    end = time.monotonic() + float(os.environ.get(PAUSE_SECONDS_ENV, "60"))
    resume = os.environ.get(RESUME_ENV)
    while time.monotonic() < end and not (resume and os.path.exists(resume)):
        time.sleep(0.02)
