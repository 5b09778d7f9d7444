"""Everything the report shows, computed once from a fit and a set of options."""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from ..errors import InputError
from . import checks, plots
from .draws import View, parts_of, view
from .groups import (BEST, MAX_PAIRWISE, PREDICTION_SEED, check_k, check_level, check_limits, group_table,
                     new_group_outside, pairwise, rank_draws, rank_matrix)
from .interlab import interlab

HEAT_ROWS_MANY = 40  # above plots.MANY groups the heat map shows the best 40 over ranks 1..60


@dataclass(frozen=True)
class ReportOptions:
    """What the reader asked for. level: credible interval level; k: size of the top group; best:
    'highest' or 'lowest'; threshold; lower/upper specification limits; allowed_bias; compare:
    group labels for the head-to-head matrix; assigned/sigma_pt: x_pt and sigma_pt of the z-scores
    (default: ISO 13528 Algorithm A on the group means)."""

    level: float = 0.95
    k: int = 3
    best: str = "highest"
    threshold: float | None = None
    lower: float | None = None
    upper: float | None = None
    allowed_bias: float | None = None
    compare: tuple[str, ...] = ()
    assigned: float | None = None
    sigma_pt: float | None = None

    def __post_init__(self):
        if isinstance(self.compare, str):  # one string is one label (or one comma-separated list)
            object.__setattr__(self, "compare", (self.compare,))
        object.__setattr__(self, "compare", tuple(str(x) for x in self.compare))
        check_level(self.level)
        if self.best not in BEST:
            raise InputError(f"bad option: best must be 'highest' or 'lowest'; found '{self.best}'")
        check_limits(self.lower, self.upper)
        for name in ("threshold", "lower", "upper", "allowed_bias", "assigned", "sigma_pt"):
            x = getattr(self, name)
            if x is not None and not math.isfinite(x):
                raise InputError(f"bad option: {name} must be a finite number; found {x}")
        if self.allowed_bias is not None and not self.allowed_bias > 0:
            raise InputError(f"bad option: the allowed bias must be positive; found {self.allowed_bias:g}")
        if self.sigma_pt is not None and not self.sigma_pt > 0:
            raise InputError(f"bad option: sigma_pt must be positive; found {self.sigma_pt:g}")

    def to_dict(self) -> dict:
        return {"level": self.level, "k": self.k, "best": self.best, "threshold": self.threshold,
                "lower_limit": self.lower, "upper_limit": self.upper, "allowed_bias": self.allowed_bias,
                "compare": list(self.compare), "assigned_value": self.assigned, "sigma_pt": self.sigma_pt,
                "prediction_seed": PREDICTION_SEED}

    @staticmethod
    def from_args(args) -> "ReportOptions":
        """From the command line's namespace; options it lacks keep their defaults."""
        get = lambda name, default=None: getattr(args, name, default)  # noqa: E731
        compare = []
        for item in get("compare") or []:
            compare.append(item)
        return ReportOptions(level=get("level", 0.95) or 0.95, k=get("top", 3) or 3, best=get("best", "highest") or "highest",
                             threshold=get("threshold"), lower=get("lower_limit"), upper=get("upper_limit"),
                             allowed_bias=get("allowed_bias"), compare=tuple(compare), assigned=get("assigned_value"),
                             sigma_pt=get("sigma_pt"))


def split_compare(items, labels: tuple[str, ...]) -> tuple[str, ...]:
    """Each --compare value is one label, or (when it is not a label) a comma-separated list of labels."""
    known = set(labels)
    out: list[str] = []
    for item in items:
        parts = [item] if item in known else [p.strip() for p in item.split(",") if p.strip()]
        out.extend(parts)
    return tuple(out)


@dataclass
class Results:
    fit: object
    options: ReportOptions
    view: View
    table: pd.DataFrame
    heat: dict
    pairs: pd.DataFrame | None
    lab: dict
    new_group: dict | None
    spread: dict
    sd: dict | None
    figures: dict[str, str] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)


def compute(fit, options: ReportOptions | None = None, figures: bool = True) -> Results:
    """All numbers (and, unless figures=False, all pictures) for the report of one fit."""
    o = options or ReportOptions()
    clock = {"start": time.perf_counter()}
    v = view(fit)
    k = check_k(o.k, v.J)
    compare = split_compare(o.compare, v.labels)
    o = replace(o, compare=compare)  # as resolved, for the summary
    if len(compare) > MAX_PAIRWISE:
        raise InputError(f"bad option: at most {MAX_PAIRWISE} groups can be compared pairwise; found {len(compare)}")
    ranks = rank_draws(v.theta, o.best)
    table = group_table(fit, o.level, k, o.best, o.threshold, o.lower, o.upper, o.allowed_bias, o.assigned,
                        o.sigma_pt, ranks=ranks)
    clock["table"] = time.perf_counter()
    order = np.argsort(table["rank_mean"].to_numpy(), kind="stable")
    rows, max_rank = (order, None) if v.J <= plots.MANY else (order[:HEAT_ROWS_MANY], plots.MANY)
    mat = rank_matrix(ranks, rows, max_rank)
    del ranks
    m = mat.shape[1] if max_rank is None else max_rank
    heat = {"rows": rows, "matrix": mat,
            "columns": [str(i) for i in range(1, m + 1)] + ([f">{m}"] if mat.shape[1] > m else [])}
    clock["ranks"] = time.perf_counter()
    pairs = pairwise(fit, compare) if compare else None
    lab = interlab(fit, o.level, o.allowed_bias, o.assigned, o.sigma_pt, table=table)
    new = new_group_outside(v, o.lower, o.upper, o.level)
    spread = checks.spread_check(v)
    sd = checks.sd_check(v)
    clock["other"] = time.perf_counter()
    res = Results(fit, o, v, table, heat, pairs, lab, new, spread, sd)
    if figures:
        res.figures = make_figures(res)
    clock["figures"] = time.perf_counter()
    names = list(clock)
    res.seconds = {b: round(clock[b] - clock[a], 3) for a, b in zip(names, names[1:])}
    return res


def make_figures(res: Results) -> dict[str, str]:
    o, t, v = res.options, res.table, res.view
    mu = float(v.mu.mean())
    figs = {
        "shrinkage": plots.shrinkage(t, mu),
        "intervals": plots.intervals(t, mu, o.level, o.lower, o.upper, o.threshold),
        "ranks": plots.rank_heat(res.heat["matrix"], [v.labels[j] for j in res.heat["rows"]], res.heat["columns"]),
        "predictive": plots.predictive(res.spread, res.sd, v.labels),
    }
    post = parts_of(res.fit)["posterior"]
    names = ["mu", "tau"] + [x for x in ("s", "nu") if x in post] + (["sigma"] if v.within == "shared" else [])
    figs["traces"] = plots.hyper_traces({x: post[x] for x in names})
    return figs


def check_args(args, labels) -> None:
    """The checks of the report options that need the data's labels, for the command line to run
    before sampling (so a typo costs nothing): crossed limits and unknown --compare groups."""
    from .groups import resolve_groups

    o = ReportOptions.from_args(args)  # numbers and the limits' order
    resolve_groups(tuple(labels), split_compare(o.compare, tuple(labels)))
