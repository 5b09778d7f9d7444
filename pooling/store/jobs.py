"""The nightly jobs: ingest a file into a store, plan a refit, write its change report, record the run.

This module talks to the world (files and the store); the computations it calls are pure
(`combine.py`, `changes.py`). The command line (`pooling ingest | batches | withdraw | refit`) is a
thin shell over these functions, and the same functions serve Python users:

    >>> from pooling.store import jobs                                   # doctest: +SKIP
    >>> jobs.ingest_file("plant.store", "2024-05-31.csv", group="line", value="torque")
    >>> plan = jobs.plan_refit("plant.store", half_life_days=30)
    >>> fit = pooling.fit(plan.stats, model, settings, init=plan.init_for(model, settings.chains))
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

from ..errors import InputError, NothingNew
from .base import BatchInfo, GroupResult, NewBatch, RunRecord, Snapshot
from .changes import Watch, changes_csv, compare, digest
from .combine import combine, final_state_record, forgetting_weights, iso, parse_when, warm_start
from .sqlite import DEFAULT_BUSY_SECONDS, open_store

CHANGES_JSON = "changes.json"
CHANGES_CSV = "changes.csv"


def ingest_file(store_path, file, group: str, value: str, *, batch: str | None = None, at: str | None = None,
                replace: bool = False, encoding: str | None = None, delimiter: str | None = None,
                thousands: str | None = None, decimal: str | None = None,
                busy_seconds: float = DEFAULT_BUSY_SECONDS) -> tuple[BatchInfo, bool]:
    """Read one delivery (long table: a group and a value column) and add it to the store as one batch.

    Returns the ledger line and whether the store was created. The file is read and checked before
    the store is touched, and the batch is written in one transaction.
    """
    from ..stats import check_unicode_twins, read_table

    store_path = Path(store_path)
    name = Path(file).name if batch is None else batch
    if not name.strip() or any(ord(ch) < 32 for ch in name):
        raise InputError(f"bad option --batch: expected a name of printable characters; found {name!r}")
    dated = iso(parse_when(at, "--at")) if at is not None else None
    existed = store_path.exists()
    if existed:
        open_store(store_path, busy_seconds=busy_seconds).close()  # a foreign store is refused before the read
    stats = read_table(file, group, value, encoding=encoding, delimiter=delimiter, thousands=thousands, decimal=decimal)
    check_unicode_twins(stats.labels, str(file))  # within the batch; across batches refit checks (model.build)
    if stats.unit != 1.0:  # hardening: the store keeps n, mean, M2 in the user's units, with no unit column
        raise InputError(f"bad input in '{file}': the values are of magnitude near {stats.unit:.0e}, beyond what the "
                         f"store keeps exactly; express them in other units (for example times {1 / stats.unit:.0e})")
    new = NewBatch(name=name, sha256=stats.file_sha256, source=str(file),
                   dated_at=dated or iso(datetime.now(timezone.utc)), group_column=group, value_column=value)
    with open_store(store_path, create=True, busy_seconds=busy_seconds) as st:
        info = st.add_batch(new, stats.labels, stats.n, stats.mean, stats.mean_lo, stats.m2, replace=replace)
    return info, not existed


def withdraw_batch(store_path, name: str, note: str | None = None) -> BatchInfo:
    with open_store(store_path) as st:
        return st.withdraw(name, note)


def list_batches(store_path) -> tuple[list[BatchInfo], list[RunRecord]]:
    with open_store(store_path) as st:
        return st.batches(), st.runs()


@dataclass
class RefitPlan:
    """Everything a refit decided before sampling: the snapshot, the merged statistics, the last run."""

    store_path: str
    snapshot: Snapshot
    ledger: list[BatchInfo]
    last: RunRecord | None
    reference: datetime
    half_life_days: float | None
    weights: list[float]
    stats: object  # GroupStats
    groups: list[GroupResult] = field(default_factory=list)
    summary: dict = field(default_factory=dict)
    report: dict | None = None
    seconds_merge: float = 0.0

    def init_for(self, model, chains: int, problem=None):
        """Chains' starting states carried over from the last run (None: fresh, over-dispersed starts)."""
        if self.last is None:
            return None
        from ..model import build

        problem = problem or build(self.stats, model)
        return warm_start(self.last.final_state, problem, chains)


def plan_refit(store_path, *, half_life_days: float | None = None, as_of: str | None = None,
               force: bool = False) -> RefitPlan:
    """Read the store, refuse (NothingNew) when no batch changed since the last run, merge the statistics."""
    t0 = time.perf_counter()
    with open_store(store_path) as st:
        snap = st.snapshot()
        ledger = st.batches()
        last = st.last_run()
    if not snap.batches:
        raise InputError(f"bad input: the store '{store_path}' holds no active batch; "
                         f"ingest one with `pooling ingest {store_path} FILE --group COL --value COL`")
    if last is not None and last.state_sha256 == snap.state_sha256 and not force:
        raise NothingNew(f"nothing new in the store '{store_path}' since run {last.id} of {last.created_at} "
                         f"(folder '{last.folder}'): no batch added or withdrawn; pass --force to refit anyway")
    reference = parse_when(as_of, "--as-of") if as_of is not None else datetime.now(timezone.utc)
    weights = forgetting_weights(list(snap.batches), reference, half_life_days)
    stats = combine(snap.stats, weights, source=f"store '{store_path}' ({len(snap.batches)} active batches)")
    return RefitPlan(str(store_path), snap, ledger, last, reference, half_life_days, [float(w) for w in weights],
                     stats, seconds_merge=time.perf_counter() - t0)


def write_changes(plan: RefitPlan, fit, watch: Watch, folder: Path) -> dict:
    """Compute this run's digest and the change report, and write changes.json and changes.csv into `folder`."""
    summary, groups = digest(fit, watch)
    report = compare(fit, watch, groups, plan.last, plan.snapshot.batches, plan.ledger)
    report["store"] = {
        "path": str(Path(plan.store_path).resolve()), "state_sha256": plan.snapshot.state_sha256,
        "reference_at": iso(plan.reference), "half_life_days": plan.half_life_days,
        "forgetting": None if plan.half_life_days is None else "w_b = 0.5 ** (age_b_days / half_life_days); "
                      "n and M2 of batch b scaled by w_b, its means kept",
        "batches": [{"id": b.id, "name": b.name, "sha256": b.sha256, "dated_at": b.dated_at, "rows": b.rows,
                     "weight": w} for b, w in zip(plan.snapshot.batches, plan.weights)],
    }
    from ..output import _clean, write_json

    write_json(folder / CHANGES_JSON, _clean(report))
    (folder / CHANGES_CSV).write_text(changes_csv(report), encoding="utf-8")
    plan.groups, plan.summary, plan.report = groups, summary, report
    return report


def run_record(plan: RefitPlan, fit, out: Path, settings_dict: dict) -> RunRecord:
    """The record of this run as `record_run` stores it (not yet stored). Its summary also keeps each group's
    posterior mean and interval at the watch's level (`group_intervals`), so that a history page can be drawn
    from the recorded summaries alone."""
    from ..output import _clean

    summary = dict(plan.summary)
    summary.update(model=fit.problem.model.to_dict(), settings=settings_dict,
                   statistics_sha256=fit.problem.stats.fingerprint(), groups=fit.problem.stats.J,
                   weights=plan.weights, seed=int(fit.raw.seed))
    g = plan.groups
    intervals = {"level": summary.get("watch", {}).get("level"), "labels": [x.label for x in g],
                 "n": [x.n for x in g], "mean": [x.post_mean for x in g], "low": [x.q_lo for x in g],
                 "high": [x.q_hi for x in g], "rank_mean": [x.rank_mean for x in g]}
    if any(x.p_above == x.p_above for x in g):  # not NaN: a threshold was watched
        intervals["p_above"] = [x.p_above for x in g]
    if any(x.p_outside == x.p_outside for x in g):
        intervals["p_mean_outside"] = [x.p_outside for x in g]
    summary["group_intervals"] = intervals
    return RunRecord(
        created_at=iso(datetime.now(timezone.utc)), folder=str(Path(out).resolve()),
        state_sha256=plan.snapshot.state_sha256, batch_ids=tuple(b.id for b in plan.snapshot.batches),
        reference_at=iso(plan.reference), half_life_days=plan.half_life_days, targets_met=bool(fit.targets_met),
        summary=_clean(summary), groups=tuple(plan.groups), final_state=_clean(final_state_record(fit)),
    )


def record_run(plan: RefitPlan, fit, out: Path, settings_dict: dict) -> int:
    """Record the run in the store; call only once its folder is in place."""
    run = run_record(plan, fit, out, settings_dict)
    with open_store(plan.store_path) as st:
        return st.record_run(run)
