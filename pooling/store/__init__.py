"""A store of batches for nightly reruns: idempotent ingestion, withdrawal, refits and what changed.

base.py       the storage interface (BatchStore) and its records
ledger.py     the SQL core both stores share: the ledger's rules, checksums verified on every read
checksums.py  pure: the checksums over batches, ledger lines, runs and the ledger head
location.py   pure: the store argument (a file path, a postgresql:// URL, or service=NAME)
sqlite.py     the embedded store: one SQLite file, WAL mode, one transaction per change
postgres.py   a team's store: one schema in a PostgreSQL database (psycopg 3, imported only when used)
combine.py  pure: merging batches' statistics, forgetting (half-life weights), warm starts
changes.py  pure: a run's digest and the change report against the previous run
jobs.py     the jobs behind `pooling ingest | batches | withdraw | refit`
"""

from __future__ import annotations

from .base import BatchInfo, BatchStats, BatchStore, GroupResult, NewBatch, RunRecord, Snapshot, state_fingerprint
from .changes import Watch
from .combine import combine, forgetting_weights
from .opening import open_store
from .sqlite import SqliteStore

__all__ = [
    "BatchStore",
    "SqliteStore",
    "open_store",
    "BatchInfo",
    "BatchStats",
    "GroupResult",
    "NewBatch",
    "RunRecord",
    "Snapshot",
    "state_fingerprint",
    "Watch",
    "combine",
    "forgetting_weights",
]
