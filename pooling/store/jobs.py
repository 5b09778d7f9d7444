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
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from ..errors import InputError, NothingNew
from .base import BatchInfo, GroupResult, NewBatch, RunRecord, Snapshot, StoreContent
from .changes import Watch, changes_csv, compare, digest
from .combine import combine, final_state_record, forgetting_weights, iso, parse_when, warm_start
from .ledger import DEFAULT_BUSY_SECONDS
from .location import parse_location
from .opening import open_store

CHANGES_JSON = "changes.json"
CHANGES_CSV = "changes.csv"


def ingest_file(
    store_path,
    file,
    group: str,
    value: str,
    *,
    batch: str | None = None,
    at: str | None = None,
    replace: bool = False,
    encoding: str | None = None,
    delimiter: str | None = None,
    thousands: str | None = None,
    decimal: str | None = None,
    columns=(),
    same_quantity: bool = False,
    busy_seconds: float = DEFAULT_BUSY_SECONDS,
) -> tuple[BatchInfo, bool]:
    """Read one delivery (long table: a group and a value column) and add it to the store as one batch.

    `columns`: group-level columns to keep with the batch (one value per group, as `pooling fit` reads them
    for --category and --numeric); a refit uses them as predictors when asked. Returns the ledger line and
    whether the store was created. The file is read and checked before the store is touched, and the batch
    is written in one transaction (refused whole when its group-level columns disagree with the store's).
    `same_quantity`: the group or value column was only renamed; accept a name no active batch uses.
    """
    from ..stats import check_unicode_twins, read_table, unit_hint

    loc = parse_location(store_path)
    name = Path(file).name if batch is None else batch
    if not name.strip() or any(ord(ch) < 32 for ch in name):
        raise InputError(f"bad option --batch: expected a name of printable characters; found {name!r}")
    dated = iso(parse_when(at, "--at")) if at is not None else None
    # a foreign or unreachable store is refused before the file is read
    st = open_store(loc, missing_ok=True, busy_seconds=busy_seconds)
    try:
        stats = read_table(
            file,
            group,
            value,
            encoding=encoding,
            delimiter=delimiter,
            thousands=thousands,
            decimal=decimal,
            group_columns=list(columns),
        )
        check_unicode_twins(stats.labels, str(file))  # within the batch; across batches refit checks (model.build)
        if stats.unit != 1.0:  # hardening: the store keeps n, mean, M2 in the user's units, with no unit column
            raise InputError(
                f"bad input in '{file}': the values are of magnitude near {stats.unit:.0e}, beyond what "
                f"the store keeps exactly; express them in other units (for example times "
                f"{unit_hint(stats.unit)})"
            )
        new = NewBatch(
            name=name,
            sha256=stats.file_sha256,
            source=str(file),
            dated_at=dated or iso(datetime.now(UTC)),
            group_column=group,
            value_column=value,
        )
        if st is None:
            st = open_store(loc, create=True, busy_seconds=busy_seconds)
        info = st.add_batch(
            new,
            stats.labels,
            stats.n,
            stats.mean,
            stats.mean_lo,
            stats.m2,
            columns={name: list(v) for name, v in stats.columns.items()},
            replace=replace,
            same_quantity=same_quantity,
        )
        return info, st.created
    finally:
        if st is not None:
            st.close()


def withdraw_batch(store_path, name: str, note: str | None = None) -> BatchInfo:
    with open_store(store_path) as st:
        return st.withdraw(name, note)


def list_batches(store_path) -> tuple[list[BatchInfo], list[RunRecord]]:
    with open_store(store_path) as st:
        return st.batches(), st.runs()


def ledger_listing(store_path) -> tuple[list[BatchInfo], list[RunRecord], dict[int, tuple[str, ...]]]:
    """What `pooling batches` lists: the ledger, the recorded runs, and the group-level columns each batch keeps
    (by batch id; every batch's statistics and columns are checked against its checksum first)."""
    with open_store(store_path) as st:
        return st.batches(), st.runs(), st.columns()


@dataclass
class RefitPlan:
    """Everything a refit decided before sampling: the snapshot, the merged statistics, the last run."""

    store_path: str
    store_shown: str  # how messages and changes.json name the store (no password, ever)
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


def plan_refit(
    store_path, *, half_life_days: float | None = None, as_of: str | None = None, force: bool = False
) -> RefitPlan:
    """Read the store, refuse (NothingNew) when no batch changed since the last run, merge the statistics."""
    t0 = time.perf_counter()
    with open_store(store_path) as st:
        shown = st.path
        snap = st.snapshot()
        ledger = st.batches()
        last = st.last_run()
    if not snap.batches:
        raise InputError(
            f"bad input: the store '{shown}' holds no active batch; "
            f"ingest one with `pooling ingest {shown} FILE --group COL --value COL`"
        )
    if last is not None and last.state_sha256 == snap.state_sha256 and not force:
        raise NothingNew(
            f"nothing new in the store '{shown}' since run {last.id} of {last.created_at} "
            f"(folder '{last.folder}'): no batch added or withdrawn; pass --force to refit anyway"
        )
    reference = parse_when(as_of, "--as-of") if as_of is not None else datetime.now(UTC)
    weights = forgetting_weights(list(snap.batches), reference, half_life_days)
    stats = combine(snap.stats, weights, source=f"store '{shown}' ({len(snap.batches)} active batches)")
    return RefitPlan(
        str(store_path),
        shown,
        snap,
        ledger,
        last,
        reference,
        half_life_days,
        [float(w) for w in weights],
        stats,
        seconds_merge=time.perf_counter() - t0,
    )


def _shown_path(plan: RefitPlan) -> str:
    loc = parse_location(plan.store_path)
    return plan.store_shown if loc.is_postgresql else str(Path(loc.path).resolve())


def write_changes(plan: RefitPlan, fit, watch: Watch, folder: Path) -> dict:
    """Compute this run's digest and the change report, and write changes.json and changes.csv into `folder`."""
    summary, groups = digest(fit, watch)
    report = compare(fit, watch, groups, plan.last, plan.snapshot.batches, plan.ledger)
    report["store"] = {
        "path": _shown_path(plan),
        "state_sha256": plan.snapshot.state_sha256,
        "reference_at": iso(plan.reference),
        "half_life_days": plan.half_life_days,
        "forgetting": None
        if plan.half_life_days is None
        else "w_b = 0.5 ** (age_b_days / half_life_days); n and M2 of batch b scaled by w_b, its means kept",
        "batches": [
            {"id": b.id, "name": b.name, "sha256": b.sha256, "dated_at": b.dated_at, "rows": b.rows, "weight": w}
            for b, w in zip(plan.snapshot.batches, plan.weights)
        ],
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
    summary.update(
        model=fit.problem.model.to_dict(),
        settings=settings_dict,
        statistics_sha256=fit.problem.stats.fingerprint(),
        groups=fit.problem.stats.J,
        weights=plan.weights,
        seed=int(fit.raw.seed),
    )
    g = plan.groups
    intervals = {
        "level": summary.get("watch", {}).get("level"),
        "labels": [x.label for x in g],
        "n": [x.n for x in g],
        "mean": [x.post_mean for x in g],
        "low": [x.q_lo for x in g],
        "high": [x.q_hi for x in g],
        "rank_mean": [x.rank_mean for x in g],
    }
    if any(x.p_above == x.p_above for x in g):  # not NaN: a threshold was watched
        intervals["p_above"] = [x.p_above for x in g]
    if any(x.p_outside == x.p_outside for x in g):
        intervals["p_mean_outside"] = [x.p_outside for x in g]
    summary["group_intervals"] = intervals
    return RunRecord(
        created_at=iso(datetime.now(UTC)),
        folder=str(Path(out).resolve()),
        state_sha256=plan.snapshot.state_sha256,
        batch_ids=tuple(b.id for b in plan.snapshot.batches),
        reference_at=iso(plan.reference),
        half_life_days=plan.half_life_days,
        targets_met=bool(fit.targets_met),
        summary=_clean(summary),
        groups=tuple(plan.groups),
        final_state=_clean(final_state_record(fit)),
    )


def record_run(plan: RefitPlan, fit, out: Path, settings_dict: dict) -> int:
    """Record the run in the store; call only once its folder is in place."""
    run = run_record(plan, fit, out, settings_dict)
    with open_store(plan.store_path) as st:
        return st.record_run(run)


# ---------------------------------------------------------------------------------------------
# checking a whole store, and copying one between SQLite and PostgreSQL


def check_store(store_path, busy_seconds: float = DEFAULT_BUSY_SECONDS) -> tuple[str, list[str], str]:
    """Check a whole store: (how it is named, every problem found, one line of what it holds when sound).

    Opening it already refuses (InputError) what is not a store at all, or one of a newer schema
    version; an older schema version is upgraded on opening, as by every command.
    """
    with open_store(store_path, busy_seconds=busy_seconds) as st:
        problems = st.check()
        facts = ""
        if not problems:
            lines, runs = st.batches(), st.runs()
            active = sum(b.status == "active" for b in lines)
            rows = sum(b.groups for b in lines)
            facts = (
                f"{len(lines)} batches in the ledger ({active} active, {rows} group rows), {len(runs)} recorded runs"
            )
        return st.path, problems, facts


def _exact(x):
    """A stored value with its type, floats by their bits (so -0.0, 0.0 and NaN payloads are told apart)."""
    if isinstance(x, float):
        return ("float", np.float64(x).view(np.uint64).item())
    return (type(x).__name__, x)


def content_differences(a: StoreContent, b: StoreContent) -> list[str]:
    """Where two stores' contents differ: every ledger field, every statistic bit for bit, every label, every
    run field and group result. An empty list means the stores hold the same thing."""
    out = []

    def rows_differ(x, y) -> bool:
        return len(x) != len(y) or any(len(r) != len(t) or [*map(_exact, r)] != [*map(_exact, t)] for r, t in zip(x, y))

    if rows_differ(a.lines, b.lines):
        out.append("the ledger lines differ")
    for bid, sa in a.stats.items():
        sb = b.stats.get(bid)
        if sb is None or sa.labels != sb.labels or not all(type(x) is str for x in sb.labels):
            out.append(f"batch {bid}: the labels differ")
            continue
        if sa.n.dtype != sb.n.dtype or not np.array_equal(sa.n, sb.n):
            out.append(f"batch {bid}: n differs")
        if sa.columns != sb.columns or not all(type(x) is str for v in sb.columns.values() for x in v):
            out.append(f"batch {bid}: the group-level columns differ")
        for what in ("mean", "mean_lo", "m2"):
            x, y = getattr(sa, what), getattr(sb, what)
            if x.shape != y.shape or not np.array_equal(x.view(np.uint64), y.view(np.uint64)):
                out.append(f"batch {bid}: {what} differs")
    if set(b.stats) - set(a.stats):
        out.append("the copy holds statistics of batches the original does not")
    if rows_differ(a.runs, b.runs):
        out.append("the recorded runs differ")
    if set(a.run_groups) != set(b.run_groups) or any(
        rows_differ(a.run_groups[k], b.run_groups[k]) for k in a.run_groups
    ):
        out.append("the runs' group results differ")
    return out


def copy_store(source, target, busy_seconds: float = DEFAULT_BUSY_SECONDS) -> tuple[str, str, StoreContent]:
    """Copy a whole store into a new one (SQLite or PostgreSQL, either way): every batch with its statistics and
    checksums, the ledger's history and every recorded run, with their ids. The new store is written in one
    transaction (a file linked into place once complete), read back and compared with the original before it is
    committed. Returns (source as shown, target as shown, the content copied)."""
    src_loc, dst_loc = parse_location(source), parse_location(target)
    with open_store(src_loc, busy_seconds=busy_seconds) as src:
        content = src.export()
        shown = src.path

    def verify(st) -> None:
        diff = content_differences(content, st.export())
        if diff:  # a bug of ours, never the user's: refuse to leave a copy that differs
            raise RuntimeError(f"the copy differs from '{shown}': {'; '.join(diff[:3])}")

    if dst_loc.is_postgresql:
        try:
            from .postgres import create_pg_copy
        except ImportError:
            raise InputError(
                f"bad store '{dst_loc.display}': a PostgreSQL store needs psycopg, which is not "
                "installed: pip install 'pooling[postgresql]'"
            ) from None

        create_pg_copy(dst_loc, content, shown, verify, busy_seconds=busy_seconds)
    else:
        from .sqlite import create_sqlite_copy

        create_sqlite_copy(dst_loc, content, shown, verify, busy_seconds=busy_seconds)
    return shown, dst_loc.display, content
