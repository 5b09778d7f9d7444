"""Pure computations on a store's contents: merging batches (with optional forgetting) and warm starts.

Forgetting. With a half-life of h days, batch b of age a_b days (from its date, --at or its
ingest time, to the refit's reference date; a batch dated after the reference counts as age 0)
gets the weight

    w_b = 0.5 ** (a_b / h)

and enters the merge with its statistics scaled as

    n_bj -> w_b * n_bj,    mean_bj kept,    M2_bj -> w_b * M2_bj.

This is exactly the batch's likelihood raised to the power w_b: the normal log-likelihood of a
group's data is -n/2 log sigma^2 - (M2 + n (ybar - theta)^2) / (2 sigma^2), which depends on the
data only through (n, ybar, M2), and multiplying it by w_b multiplies n and M2 by w_b. A batch one
half-life old counts as half of its measurements, two half-lives old as a quarter. The merged
statistics are then the exponentially weighted counts, means and sums of squared deviations,
and the effective n is fractional. Without a half-life every weight is 1 and the merge is the
plain, exact one.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime

import numpy as np
import pandas as pd

from ..errors import InputError
from ..stats import GroupStats, merge_moments
from .base import BatchInfo, BatchStats


def parse_when(text: str, what: str) -> datetime:
    """A date (YYYY-MM-DD, midnight UTC) or an ISO 8601 date and time; without an offset it is UTC."""
    try:
        t = datetime.fromisoformat(str(text).strip())
    except ValueError:
        raise InputError(
            f"bad option {what}: expected a date such as 2024-05-31 or 2024-05-31T22:00:00+02:00; found '{text}'"
        ) from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=UTC)
    try:
        return t.astimezone(UTC)
    except OverflowError:  # e.g. 9999-12-31T23:59-14:00 is past the last instant a datetime holds in UTC
        raise InputError(
            f"bad option {what}: '{text}' is outside the dates this program can hold (0001-01-01 to 9999-12-31 in UTC)"
        ) from None


def iso(t: datetime) -> str:
    return t.astimezone(UTC).isoformat(timespec="seconds")


def age_days(dated_at: str, reference: datetime) -> float:
    """Days from a batch's date to the reference date; 0 for a batch dated after it."""
    t = parse_when(dated_at, "dated_at")
    return max((reference - t).total_seconds() / 86400.0, 0.0)


def forgetting_weights(batches: list[BatchInfo], reference: datetime, half_life_days: float | None) -> np.ndarray:
    """w_b = 0.5 ** (age_b / half_life) per batch; all ones without a half-life."""
    if half_life_days is None:
        return np.ones(len(batches))
    if not (math.isfinite(half_life_days) and half_life_days > 0):
        raise InputError(f"bad option --half-life: expected a number of days > 0; found {half_life_days:g}")
    ages = np.array([age_days(b.dated_at, reference) for b in batches], dtype=np.float64)
    return np.power(0.5, ages / half_life_days)


def combine(
    stats: list[BatchStats] | tuple[BatchStats, ...], weights: np.ndarray | None = None, source: str = "<store>"
) -> GroupStats:
    """Merge batches group by group with the Chan-Golub-LeVeque update, batch b scaled by weights[b].

    Groups are ordered by first appearance (batch order, then order within the batch). The cost is
    O(total group-rows of the batches): the raw rows behind them are never touched again.
    """
    if not stats:
        raise InputError(f"bad input: the store {source} holds no active batch; ingest one first")
    weights = np.ones(len(stats)) if weights is None else np.asarray(weights, dtype=np.float64)
    sizes = np.array([len(b.labels) for b in stats])
    all_labels = np.concatenate([np.asarray(b.labels, dtype=object) for b in stats])
    codes, uniques = pd.factorize(all_labels, sort=False)
    J = len(uniques)
    n = np.zeros(J)
    hi = np.zeros(J)
    lo = np.zeros(J)
    m2 = np.zeros(J)
    start = 0
    for b, w, size in zip(stats, weights, sizes):
        pos = codes[start : start + size]
        start += size
        nb = b.n.astype(np.float64) * w
        n[pos], hi[pos], lo[pos], m2[pos] = merge_moments(
            n[pos], hi[pos], lo[pos], m2[pos], nb, b.mean, b.mean_lo, b.m2 * w
        )
    columns = _merge_columns(stats, codes, sizes, J, source)
    keep = n > 0  # a weight can underflow to 0 for batches very many half-lives old
    labels = tuple(str(u) for u in uniques)
    if not keep.all():
        labels = tuple(lab for lab, k in zip(labels, keep) if k)
        n, hi, lo, m2 = n[keep], hi[keep], lo[keep], m2[keep]
        columns = {name: values[keep] for name, values in columns.items()}
    if np.all(weights == 1.0):
        n = n.astype(np.int64)  # sums of whole counts: exact below 2^53
    return GroupStats(labels, n, hi, m2, mean_lo=lo, source=source, columns=columns)


def _merge_columns(stats, codes, sizes, J: int, source: str) -> dict:
    """Each group's value in each group-level column, from the first batch that has the group. Every active batch
    keeps the same columns and one value per group (the ingest refused anything else); a store that holds batches
    with other columns all the same is refused here with one line."""
    names = set(stats[0].columns)
    out = {name: np.full(J, None, dtype=object) for name in names}
    start = 0
    for b, size in zip(stats, sizes):
        pos = codes[start : start + size]
        start += size
        if set(b.columns) != names:
            raise InputError(
                f"bad store {source}: batch {b.batch_id} keeps the group-level columns "
                f"{sorted(b.columns)}, batch {stats[0].batch_id} keeps {sorted(names)}; every active "
                "batch must keep the same ones (withdraw one of them)"
            )
        for name in names:
            values = np.asarray(b.columns[name], dtype=object)
            col = out[name]
            empty = np.array([x is None for x in col[pos]], dtype=bool)
            col[pos[empty]] = values[empty]
    return out


def warm_start(final_state: dict | None, problem, chains: int) -> list[dict] | None:
    """Per-chain starting states for `problem`, mapped from a previous run's final states.

    The previous states are in that run's internal units (y - c_old) / k_old; each is carried to
    this problem's (y - c) / k. Groups new since then start at their data mean with the pooled
    variance; if the structure changed, nothing is carried over (None: fresh start); if only the
    nu grid changed, nu starts at the grid's middle. The sampler still warms up from these states.
    They are draws from the previous posterior, so they are less spread out than the sampler's
    own over-dispersed starts: R-hat then checks mixing around the old posterior rather than from
    far away, which suits nightly runs on slowly growing data; `--fresh-start` restores the usual starts.
    """
    if not final_state or not final_state.get("chains"):
        return None
    from .. import kernel

    if final_state.get("within") != problem.model.within:
        return None
    grid = np.asarray(final_state.get("nu_grid", []), dtype=float)
    same_grid = grid.shape == problem.nu_grid.shape and np.array_equal(grid, problem.nu_grid)
    c0, k0 = float(final_state["center"]), float(final_state["scale"])
    c1, k1 = problem.center, problem.scale
    ratio = k0 / k1
    old_index = {lab: i for i, lab in enumerate(final_state["labels"])}
    idx = np.array([old_index.get(lab, -1) for lab in problem.stats.labels], dtype=np.int64)
    have = idx >= 0
    J = problem.J
    pooled = float(np.sum(problem.m2) / max(np.sum(problem.n) - J, 1.0)) if problem.within_code != 2 else 1.0
    if not pooled > 0:
        pooled = 1.0
    out = []
    old = final_state["chains"]
    for i in range(chains):
        prev = old[i % len(old)]
        st = np.asarray(prev["state"], dtype=np.float64).copy()
        th0 = np.asarray(prev["theta"], dtype=np.float64)
        s20 = np.asarray(prev["sigma2"], dtype=np.float64)
        st[kernel.ETA] = st[kernel.ETA] + math.log(ratio)
        st[kernel.MU] = ((st[kernel.MU] * k0 + c0) - c1) / k1
        st[kernel.S2] = st[kernel.S2] * ratio * ratio
        st[kernel.SIGMA2] = st[kernel.SIGMA2] * ratio * ratio
        if not same_grid:
            st[kernel.NU_IDX] = len(problem.nu_grid) // 2
        theta = problem.ybar.copy()
        theta[have] = ((th0[idx[have]] * k0 + c0) - c1) / k1
        sigma2 = np.full(J, pooled)
        if s20.size == len(old_index):
            sigma2[have] = s20[idx[have]] * ratio * ratio
        if not (np.all(np.isfinite(st)) and np.all(np.isfinite(theta)) and np.all(sigma2 > 0)):
            return None
        out.append({"state": st, "theta": theta, "sigma2": sigma2})
    return out


def final_state_record(fit) -> dict:
    """What the next refit needs to start from this run's last states (plain JSON values)."""
    p = fit.problem
    return {
        "within": p.model.within,
        "center": p.center,
        "scale": p.scale,
        "nu_grid": [float(x) for x in p.nu_grid],
        "labels": list(p.stats.labels),
        "chains": fit.raw.final_states,
    }
