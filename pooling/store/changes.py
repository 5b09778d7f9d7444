"""What changed since the previous run: pure computations on this run's draws and the last run's record.

Draws of two runs cannot be paired (they come from different chains on different data), so no
probability here is "the probability that mu increased". Each probability is computed from
THIS run's draws against a fixed number taken from the previous run:

    p_now_above_then_mean        P(x > previous posterior mean of x | today's data), for mu, tau, theta_j
    p_now_better_than_then_rank  P(rank_j < previous posterior mean rank of j | today's data)
    p_above (then / now)         P(theta_j > threshold | that run's data), computed in each run
    p_mean_outside (then / now)  P(theta_j < lower or theta_j > upper | that run's data): the group's
                                 mean outside the specification limits (the predicted fraction of
                                 its measurements outside them is in the reporter's groups.csv)

and every shift is also expressed against the posterior spreads,

    shift_in_sd = (mean_now - mean_then) / sqrt(sd_then^2 + sd_now^2),

which is a yardstick, not a test statistic: the two runs share most of their data, so their
estimates are strongly correlated and the spread of their difference is smaller than that.
Ranks: 1 is the group with the best theta in a draw (highest by default, or lowest).
"""

from __future__ import annotations

import csv
import io
from dataclasses import asdict, dataclass

import numpy as np

from ..errors import InputError
from .base import BatchInfo, GroupResult, RunRecord

CHANGES_FORMAT = 1
_RANK_BLOCK = 4_000_000  # rank draws in blocks of about this many cells, so memory stays bounded


@dataclass(frozen=True)
class Watch:
    """What the change report watches: a threshold, specification limits, and the decision level.

    A group is 'above' the threshold when P(theta_j > threshold) >= decide_at, 'below' when it is
    <= 1 - decide_at, otherwise 'unsure'; likewise 'outside' / 'inside' / 'unsure' for the limits
    with P(theta_j outside [lower, upper]). `level` is the central credible interval kept per group.
    """

    threshold: float | None = None
    lower: float | None = None
    upper: float | None = None
    decide_at: float = 0.95
    level: float = 0.95
    best: str = "highest"

    def __post_init__(self):
        if self.best not in ("highest", "lowest"):
            raise InputError(f"bad option: best must be 'highest' or 'lowest'; found '{self.best}'")
        if not 0.5 < self.decide_at < 1.0:
            raise InputError(
                f"bad option --decide-at: expected a probability between 0.5 and 1; found {self.decide_at:g}"
            )
        if not 0.0 < self.level < 1.0:
            raise InputError(f"bad option: the interval level must be between 0 and 1; found {self.level:g}")
        if self.lower is not None and self.upper is not None and not self.lower < self.upper:
            raise InputError(
                f"bad options: the lower limit ({self.lower:g}) must be below the upper limit ({self.upper:g})"
            )

    @property
    def has_limits(self) -> bool:
        return self.lower is not None or self.upper is not None

    def to_dict(self) -> dict:
        return asdict(self)


def rank_pass(theta: np.ndarray, then_rank: np.ndarray | None = None, best: str = "highest"):
    """Per group: mean and sd of the rank (1 = the best theta in a draw, highest or lowest) and, if
    given previous mean ranks, P(rank_j < then_rank_j) over today's draws. theta is (samples, groups)."""
    S, J = theta.shape
    total = np.zeros(J)
    total2 = np.zeros(J)
    better = np.zeros(J)
    step = max(1, _RANK_BLOCK // max(J, 1))
    for a in range(0, S, step):
        block = theta[a : a + step]
        order = np.argsort(-block if best == "highest" else block, axis=1, kind="stable")
        ranks = np.empty_like(order)
        rows = np.arange(block.shape[0])[:, None]
        ranks[rows, order] = np.arange(1, J + 1)[None, :]
        total += ranks.sum(axis=0)
        total2 += (ranks.astype(np.float64) ** 2).sum(axis=0)
        if then_rank is not None:
            better += (ranks < then_rank[None, :]).sum(axis=0)
    mean = total / S
    sd = np.sqrt(np.maximum(total2 / S - mean * mean, 0.0) * S / max(S - 1, 1))
    return mean, sd, (better / S if then_rank is not None else None)


def p_outside(theta: np.ndarray, watch: Watch) -> np.ndarray:
    """P(theta_j < lower or theta_j > upper), per group, from draws shaped (samples, groups)."""
    hit = np.zeros(theta.shape, dtype=bool)
    if watch.lower is not None:
        hit |= theta < watch.lower
    if watch.upper is not None:
        hit |= theta > watch.upper
    return hit.mean(axis=0)


def digest(fit, watch: Watch) -> tuple[dict, list[GroupResult]]:
    """This run's results that the next run compares against: hyperparameter summaries and per-group rows."""
    theta = fit.draws("theta")
    st = fit.problem.stats
    lo_q, hi_q = (1 - watch.level) / 2, 1 - (1 - watch.level) / 2
    q = np.quantile(theta, [lo_q, hi_q], axis=0)
    mean = theta.mean(axis=0)
    sd = theta.std(axis=0, ddof=1)
    rmean, rsd, _ = rank_pass(theta, best=watch.best)
    pa = (theta > watch.threshold).mean(axis=0) if watch.threshold is not None else np.full(st.J, np.nan)
    po = p_outside(theta, watch) if watch.has_limits else np.full(st.J, np.nan)
    raw = st.mean + st.mean_lo
    groups = [
        GroupResult(
            st.labels[j],
            float(st.n[j]),
            float(raw[j]),
            float(mean[j]),
            float(sd[j]),
            float(q[0, j]),
            float(q[1, j]),
            float(rmean[j]),
            float(rsd[j]),
            float(pa[j]),
            float(po[j]),
        )
        for j in range(st.J)
    ]
    hyper = {}
    for name in ("mu", "tau"):
        x = fit.draws(name)
        hyper[name] = {
            "mean": float(x.mean()),
            "sd": float(x.std(ddof=1)),
            "q_lo": float(np.quantile(x, lo_q)),
            "q_hi": float(np.quantile(x, hi_q)),
        }
    return {"hyperparameters": hyper, "watch": watch.to_dict()}, groups


def _status_threshold(p: float, level: float) -> str | None:
    if not np.isfinite(p):
        return None
    return "above" if p >= level else "below" if p <= 1 - level else "unsure"


def _status_limits(p: float, level: float) -> str | None:
    if not np.isfinite(p):
        return None
    return "outside" if p >= level else "inside" if p <= 1 - level else "unsure"


def _num(x):
    x = float(x)
    return x if np.isfinite(x) else None


def compare(
    fit,
    watch: Watch,
    now_groups: list[GroupResult],
    prev: RunRecord | None,
    active: tuple[BatchInfo, ...],
    ledger: list[BatchInfo],
) -> dict:
    """The change report as a JSON-able dict (see the module docstring for what each number means)."""
    theta = fit.draws("theta")
    labels = [g.label for g in now_groups]
    now_ids = [b.id for b in active]
    by_id = {b.id: b for b in ledger}
    report = {
        "format": CHANGES_FORMAT,
        "previous_run": None if prev is None else {"id": prev.id, "created_at": prev.created_at, "folder": prev.folder},
        "watch": watch.to_dict(),
        "rank_1_is": f"the group with the {watch.best} theta in a draw",
        "notes": NOTES,
    }
    if prev is None:
        report["batches"] = {"added": [by_id[i].name for i in now_ids], "removed": [], "active": len(now_ids)}
        report["hyperparameters"] = {}
        report["new_groups"] = [_group_line(g) for g in now_groups]
        report.update(
            gone_groups=[],
            rank_moves=[],
            threshold_crossings=[],
            limit_crossings=[],
            groups=[_row(g, None, None, None, None, watch) for g in now_groups],
        )
        return report
    prev_ids = set(prev.batch_ids)
    report["batches"] = {
        "added": [by_id[i].name for i in now_ids if i not in prev_ids],
        "removed": [
            {"name": by_id[i].name, "status": by_id[i].status, "when": by_id[i].changed_at}
            for i in sorted(prev_ids - set(now_ids))
            if i in by_id
        ],
        "active": len(now_ids),
    }
    hyper = {}
    then_h = prev.summary.get("hyperparameters", {})
    for name in ("mu", "tau"):
        t = then_h.get(name) or {}
        if not all(isinstance(t.get(k), (int, float)) for k in ("mean", "sd")):
            continue  # not recorded, or recorded as null by a run whose draws were not finite
        x = fit.draws(name)
        m, s = float(x.mean()), float(x.std(ddof=1))
        shift = m - t["mean"]
        hyper[name] = {
            "then_mean": t["mean"],
            "then_sd": t["sd"],
            "now_mean": m,
            "now_sd": s,
            "shift": shift,
            "shift_in_sd": _num(shift / np.hypot(t["sd"], s)) if np.hypot(t["sd"], s) > 0 else None,
            "p_now_above_then_mean": float((x > t["mean"]).mean()),
        }
    report["hyperparameters"] = hyper
    same_threshold = prev.summary.get("watch", {}).get("threshold") == watch.threshold
    same_limits = (
        prev.summary.get("watch", {}).get("lower") == watch.lower
        and prev.summary.get("watch", {}).get("upper") == watch.upper
    )
    same_best = prev.summary.get("watch", {}).get("best", "highest") == watch.best
    report["comparable"] = {"threshold": bool(same_threshold), "limits": bool(same_limits), "ranks": bool(same_best)}
    before = {g.label: g for g in prev.groups}
    idx_then = np.array([j for j, lab in enumerate(labels) if lab in before], dtype=np.int64)
    then_rank = np.full(len(labels), np.inf)  # new groups: no previous rank to beat
    if same_best:
        for j in idx_then:
            then_rank[j] = before[labels[j]].rank_mean
    _, _, p_better = rank_pass(theta, then_rank, watch.best)
    then_mean = np.array([before[lab].post_mean if lab in before else np.nan for lab in labels])
    with np.errstate(invalid="ignore"):
        p_above_then_mean = (theta > then_mean[None, :]).mean(axis=0)
    rows, moves, t_cross, l_cross, new = [], [], [], [], []
    for j, g in enumerate(now_groups):
        old = before.get(g.label)
        if old is None:
            new.append(_group_line(g))
            rows.append(_row(g, None, None, None, None, watch))
            continue
        pb = float(p_better[j]) if same_best else None
        pm = float(p_above_then_mean[j])
        rows.append(_row(g, old, pb, pm, (same_threshold, same_limits, same_best), watch))
        if same_best and abs(old.rank_mean - g.rank_mean) >= 1.0:
            moves.append(
                {
                    "group": g.label,
                    "rank_then": old.rank_mean,
                    "rank_now": g.rank_mean,
                    "move_up": old.rank_mean - g.rank_mean,
                    "p_now_better_than_then_rank": pb,
                }
            )
        if watch.threshold is not None and same_threshold:
            a, b = _status_threshold(old.p_above, watch.decide_at), _status_threshold(g.p_above, watch.decide_at)
            if a != b:
                t_cross.append(
                    {
                        "group": g.label,
                        "then": a,
                        "now": b,
                        "p_above_then": _num(old.p_above),
                        "p_above_now": _num(g.p_above),
                    }
                )
        if watch.has_limits and same_limits:
            a, b = _status_limits(old.p_outside, watch.decide_at), _status_limits(g.p_outside, watch.decide_at)
            if a != b:
                l_cross.append(
                    {
                        "group": g.label,
                        "then": a,
                        "now": b,
                        "p_mean_outside_then": _num(old.p_outside),
                        "p_mean_outside_now": _num(g.p_outside),
                    }
                )
    now_set = set(labels)
    gone = [g for g in prev.groups if g.label not in now_set]
    rows += [_row(None, g, None, None, None, watch) for g in gone]
    moves.sort(key=lambda m: -abs(m["move_up"]))
    report.update(
        new_groups=new,
        gone_groups=[g.label for g in gone],
        rank_moves=moves,
        threshold_crossings=t_cross,
        limit_crossings=l_cross,
        groups=rows,
    )
    return report


def _group_line(g: GroupResult) -> dict:
    return {
        "group": g.label,
        "n": g.n,
        "post_mean": g.post_mean,
        "post_sd": g.post_sd,
        "rank_mean": g.rank_mean,
        "p_above": _num(g.p_above),
        "p_mean_outside": _num(g.p_outside),
    }


CSV_COLUMNS = [
    "group",
    "change",
    "n_then",
    "n_now",
    "mean_then",
    "mean_now",
    "sd_then",
    "sd_now",
    "shift",
    "shift_in_sd",
    "p_now_above_then_mean",
    "rank_then",
    "rank_now",
    "rank_move_up",
    "p_now_better_than_then_rank",
    "p_above_then",
    "p_above_now",
    "side_then",
    "side_now",
    "p_mean_outside_then",
    "p_mean_outside_now",
    "limits_then",
    "limits_now",
]


def _row(now: GroupResult | None, then: GroupResult | None, p_better, p_above_then_mean, comparable, watch) -> dict:
    g = now or then
    r = {c: None for c in CSV_COLUMNS}
    r["group"] = g.label
    r["change"] = "new" if then is None else "gone" if now is None else "kept"
    for when, snap in (("then", then), ("now", now)):
        if snap is not None:
            r.update(
                {
                    f"n_{when}": snap.n,
                    f"mean_{when}": snap.post_mean,
                    f"sd_{when}": snap.post_sd,
                    f"rank_{when}": snap.rank_mean,
                    f"p_above_{when}": _num(snap.p_above),
                    f"p_mean_outside_{when}": _num(snap.p_outside),
                    f"side_{when}": _status_threshold(snap.p_above, watch.decide_at),
                    f"limits_{when}": _status_limits(snap.p_outside, watch.decide_at),
                }
            )
    if now is not None and then is not None:
        shift = now.post_mean - then.post_mean
        spread = float(np.hypot(now.post_sd, then.post_sd))
        r.update(
            shift=shift,
            shift_in_sd=_num(shift / spread) if spread > 0 else None,
            p_now_above_then_mean=p_above_then_mean,
            rank_move_up=then.rank_mean - now.rank_mean,
            p_now_better_than_then_rank=p_better,
        )
        if comparable is not None and not comparable[0]:
            r.update(p_above_then=None, side_then=None)
        if comparable is not None and not comparable[1]:
            r.update(p_mean_outside_then=None, limits_then=None)
        if comparable is not None and not comparable[2]:
            r.update(rank_then=None, rank_move_up=None)
    return {k: _num(v) if isinstance(v, (float, np.floating)) else v for k, v in r.items()}


def _safe_cell(text: str) -> str:
    """Neutralise cells a spreadsheet would run as a formula (OWASP's CSV-injection guidance)."""
    return "'" + text if text[:1] in ("=", "+", "-", "@", "\t", "\r") else text


def changes_csv(report: dict) -> str:
    """One line per group (kept, new or gone since the previous run), in the columns of CSV_COLUMNS."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    for r in report["groups"]:
        cells = []
        for c in CSV_COLUMNS:
            v = r[c]
            if v is None:
                cells.append("")
            elif isinstance(v, str):
                cells.append(_safe_cell(v) if c == "group" else v)
            else:
                cells.append(repr(float(v)))
        w.writerow(cells)
    return buf.getvalue()


NOTES = {
    "p_now_above_then_mean": "P(x > the previous run's posterior mean of x), from this run's draws; the draws of "
    "two runs cannot be paired, so this is not the probability that x increased",
    "p_now_better_than_then_rank": "P(rank now < the previous posterior mean rank), from this run's draws; ranks "
    "count among this run's groups, so new or gone groups shift them too",
    "rank_moves": "groups whose posterior mean rank moved by one place or more",
    "shift_in_sd": "(mean now - mean then) / sqrt(sd then^2 + sd now^2): a yardstick, not a test; the runs share "
    "most of their data, so the spread of the difference is smaller than this denominator",
    "p_above": "P(theta_j > threshold) in each run, each from its own draws",
    "p_mean_outside": "P(theta_j < lower or theta_j > upper): the group's mean outside the specification limits, "
    "in each run (not the fraction of its measurements outside them)",
    "crossings": "a group is listed when its side changed; side 'above'/'outside' needs a probability of at least "
    "decide_at, 'below'/'inside' at most 1 - decide_at, otherwise 'unsure'",
    "caution": "statistical screening supports, and never replaces, the applicable standards, local codes and "
    "licensed professional judgment",
}
