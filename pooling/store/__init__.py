"""A store of batches for nightly reruns: idempotent ingestion, withdrawal, refits and what changed.

    base.py     the storage interface (BatchStore) and its records; a server database plugs in here
    sqlite.py   the embedded implementation: one SQLite file, WAL mode, one transaction per change
    combine.py  pure: merging batches' statistics, forgetting (half-life weights), warm starts
    changes.py  pure: a run's digest and the change report against the previous run
    jobs.py     the jobs behind `pooling ingest | batches | withdraw | refit`
"""
from __future__ import annotations

from .base import BatchInfo, BatchStats, BatchStore, GroupResult, NewBatch, RunRecord, Snapshot, state_fingerprint
from .changes import Watch
from .combine import combine, forgetting_weights
from .sqlite import SqliteStore, open_store

__all__ = ["BatchStore", "SqliteStore", "open_store", "BatchInfo", "BatchStats", "GroupResult", "NewBatch",
           "RunRecord", "Snapshot", "state_fingerprint", "Watch", "combine", "forgetting_weights"]
