"""The storage interface: what the nightly commands need from a store of batches, and nothing more.

A store keeps a ledger of batches (each one delivery of measurements) with their per-group
statistics (n, mean as hi + lo, M2) and group-level columns (a method, an instrument), and a record
of every refit with the group-level results that the next refit compares against. Two implementations share one SQL core (`ledger.py`): the
embedded SQLite file (`sqlite.py`) and a PostgreSQL schema (`postgres.py`). The commands and the
pure computations (`combine.py`, `changes.py`) only see the records defined here.

Every method that changes the store is atomic: it lands whole or not at all. Every method that
reads verifies what it read against the checksums written with it (`checksums.py`), and refuses
(InputError, one line naming the batch or run) what does not match.
"""

from __future__ import annotations

import abc
import hashlib
from dataclasses import dataclass, field

import numpy as np

STATUSES = ("active", "withdrawn", "replaced")


def state_fingerprint(batches) -> str:
    """SHA-256 of the active set: every active batch's ledger id and content hash, in id order.

    Two store states with the same fingerprint hold the same data, so a refit would see
    nothing new; adding, withdrawing or replacing a batch changes it.
    """
    h = hashlib.sha256()
    for b in sorted(batches, key=lambda b: b.id):
        h.update(f"{b.id}:{b.sha256}\n".encode())
    return h.hexdigest()


@dataclass(frozen=True)
class BatchInfo:
    """One ledger line. `dated_at` is the batch's own date (--at, else its ingest time), ISO 8601 UTC."""

    id: int
    name: str
    sha256: str
    source: str
    rows: int
    groups: int
    dated_at: str
    ingested_at: str
    status: str
    changed_at: str | None = None
    note: str | None = None

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}


@dataclass(frozen=True, eq=False)
class BatchStats:
    """The per-group statistics of one batch, in the order the groups first appear in it, and its group-level
    columns (name -> one text value per group, aligned with the labels; empty when the batch keeps none)."""

    batch_id: int
    labels: tuple[str, ...]
    n: np.ndarray
    mean: np.ndarray
    mean_lo: np.ndarray
    m2: np.ndarray
    columns: dict = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class Snapshot:
    """A consistent read of the active batches (one read transaction), ordered by batch id."""

    batches: tuple[BatchInfo, ...]
    stats: tuple[BatchStats, ...]
    state_sha256: str


@dataclass(frozen=True, eq=False)
class GroupResult:
    """What a run keeps per group for the next run's change report (user units; NaN when not computed)."""

    label: str
    n: float
    raw_mean: float
    post_mean: float
    post_sd: float
    q_lo: float
    q_hi: float
    rank_mean: float
    rank_sd: float
    p_above: float = float("nan")
    p_outside: float = float("nan")


@dataclass(frozen=True, eq=False)
class RunRecord:
    """One recorded refit. `summary` and `final_state` are plain JSON-able dicts (never pickled)."""

    created_at: str
    folder: str
    state_sha256: str
    batch_ids: tuple[int, ...]
    reference_at: str
    half_life_days: float | None
    targets_met: bool
    summary: dict
    groups: tuple[GroupResult, ...] = ()
    final_state: dict | None = None
    id: int | None = None


@dataclass(frozen=True)
class NewBatch:
    """What `add_batch` is given besides the statistics."""

    name: str
    sha256: str
    source: str
    dated_at: str
    group_column: str = ""
    value_column: str = ""
    meta: dict = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class StoreContent:
    """A whole store as stored: rows of every table, checksums included (see ledger.LINE_COLS and friends).

    `stats` maps a batch id to its statistics; `run_groups` a run id to its rows. Copying a store
    writes exactly these values, so the copy has the same checksums as the original.
    """

    meta: dict
    lines: tuple
    stats: dict
    runs: tuple
    run_groups: dict


class BatchStore(abc.ABC):
    """A ledger of batches and runs. Implementations raise pooling errors with one clear line."""

    path: str  # how messages name the store (a file path, or a URL or service without a password)

    @abc.abstractmethod
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
        """Add one batch, its per-group statistics and its group-level columns (`columns`: name -> one text value
        per group) in one transaction.

        Refuses (NothingNew) content that is already active, or statistics (every group's label, n,
        mean and M2, exactly as stored) that equal an active batch's: the same delivery in another
        file. Refuses (InputError) a name in use by other content, or by withdrawn content, unless
        `replace`, in which case the old record is kept with status 'replaced' (a withdrawn one keeps
        the withdrawal's time and reason in its note). Content that was withdrawn comes back only with
        `replace`. Refuses (InputError) a value or group column name that no active batch uses unless
        `same_quantity` (the column was only renamed), group-level columns other than the active
        batches keep, and a group whose value in a column differs from the one an active batch holds
        (the batch it replaces aside, in every check).
        """

    @abc.abstractmethod
    def withdraw(self, name: str, note: str | None = None) -> BatchInfo:
        """Mark the active batch `name` withdrawn, keeping its record; NothingNew if it already is."""

    @abc.abstractmethod
    def batches(self) -> list[BatchInfo]:
        """Every ledger line, oldest first, whatever its status."""

    @abc.abstractmethod
    def columns(self) -> dict[int, tuple[str, ...]]:
        """The group-level columns each batch keeps (`pooling ingest --column`), by batch id, every batch's
        statistics and columns checked against its checksum first; a batch that fails the check is left out."""

    @abc.abstractmethod
    def snapshot(self) -> Snapshot:
        """The active batches and their statistics, read consistently."""

    @abc.abstractmethod
    def last_run(self) -> RunRecord | None:
        """The most recent recorded run with its group results and final state, or None."""

    @abc.abstractmethod
    def runs(self) -> list[RunRecord]:
        """Every recorded run, oldest first, without group results or final states."""

    @abc.abstractmethod
    def record_run(self, run: RunRecord) -> int:
        """Record a finished run (after its folder is in place); returns its id."""

    @abc.abstractmethod
    def check(self) -> list[str]:
        """Every problem found in the whole store (checksums, schema version, the database's own checks), one
        line each; an empty list when the store is sound."""

    @abc.abstractmethod
    def export(self) -> StoreContent:
        """Everything the store keeps, as stored, read consistently and verified (for copying)."""

    @abc.abstractmethod
    def close(self) -> None:
        """Release the connection."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
