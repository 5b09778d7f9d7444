"""The reporter: the answers people come for, presented. Every number comes from pooling.results.

    from pooling import report
    table = report.group_table(fit, level=0.95, k=3, best="highest", threshold=400.0, lower=380.0)
    report.rank_probabilities(fit)            # P(rank_j = r), groups by ranks
    report.pairwise(fit, ["S03", "S17"])      # P(theta_row > theta_column)
    report.interlab(fit, allowed_bias=5.0)    # consensus value, ISO 5725 components, bias, z-scores
    output.write_report(fit, "folder", ReportOptions(k=5))  # groups.csv, summary.json, report.html (pooling.output)

Every function takes a `posterior.Fit`; group_table and interlab also take a summary-mode fit (every
group's row); rank_probabilities needs every group's draws and refuses one.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..asked import ReportOptions, split_compare
from .export import neutralise, records, safe_frame, write_csv
from .interlab import algorithm_a, oneway_anova, random_effects_dl, z_scores, z_signal

__all__ = [
    "ReportOptions",
    "group_table",
    "rank_probabilities",
    "pairwise",
    "interlab",
    "render_html",
    "oneway_anova",
    "algorithm_a",
    "z_scores",
    "z_signal",
    "random_effects_dl",
    "neutralise",
    "records",
    "safe_frame",
    "write_csv",
    "split_compare",
]


def _results(fit, **options):
    from ..results import compute

    return compute(fit, ReportOptions(**options) if options else None)


def group_table(
    fit,
    level: float = 0.95,
    k: int | None = None,
    best: str = "highest",
    threshold: float | None = None,
    lower: float | None = None,
    upper: float | None = None,
    allowed_bias: float | None = None,
    assigned: float | None = None,
    sigma_pt: float | None = None,
) -> pd.DataFrame:
    """One row per group, every group (in the fit's order), with every per-group answer; see
    pooling.results.COLUMNS. Interval columns are named by the level (theta_low_95 at 0.95)."""
    opts = dict(
        level=level,
        k=k,
        best=best,
        threshold=threshold,
        lower=lower,
        upper=upper,
        allowed_bias=allowed_bias,
        assigned=assigned,
        sigma_pt=sigma_pt,
    )
    if getattr(fit, "summary_mode", False):
        o = fit.options
        opts.update(
            {
                name: getattr(o, name)
                for name in ("level", "k", "best", "threshold", "lower", "upper", "allowed_bias")
                if opts[name] == ReportOptions.__dataclass_fields__[name].default
            }
        )
    return _results(fit, **opts).table


def rank_probabilities(fit, best: str = "highest", groups=None, max_rank: int | None = None) -> pd.DataFrame:
    """Table of P(rank_j = r): one row per group, one column per rank (1 = best).

    With many groups, ask for a few rows (`groups`) or ranks (`max_rank`); the full J x J table is
    refused above 2,000 groups. A last column '>m' holds P(rank > m) when max_rank = m < J.
    """
    from ..errors import InputError
    from ..results import needs_draws, rank_draws, rank_matrix, resolve_groups

    needs_draws(fit, "rank_probabilities")
    if best not in ("highest", "lowest"):
        raise InputError(f"bad option: best must be 'highest' or 'lowest'; found '{best}'")
    J = fit.J
    labels = fit.labels
    rows = None if groups is None else resolve_groups(labels, groups)
    if rows is None and max_rank is None and J > 2000:
        raise InputError(
            f"rank_probabilities: {J} groups would make a {J} x {J} table; pass groups=[...] or max_rank=..."
        )
    th = fit.raw.theta.reshape(-1, J)
    mat = rank_matrix(rank_draws(th, highest=best == "highest"), rows, max_rank)
    m = mat.shape[1] if max_rank is None or max_rank >= J else int(max_rank)
    cols = list(range(1, m + 1)) + ([f">{m}"] if mat.shape[1] > m else [])
    idx = [labels[j] for j in (range(J) if rows is None else rows)]
    return pd.DataFrame(mat, index=pd.Index(idx, name="group"), columns=pd.Index(cols, name="rank"))


def pairwise(fit, groups) -> pd.DataFrame:
    """P(theta_row > theta_column) for the listed groups (at most 400), from the draws (summary mode: kept groups)."""
    res = _results(
        fit,
        compare=tuple(groups),
        **(
            {}
            if not getattr(fit, "summary_mode", False)
            else {
                k: getattr(fit.options, k)
                for k in ("level", "k", "best", "threshold", "lower", "upper", "allowed_bias")
            }
        ),
    )
    return res.pairs


def interlab(
    fit,
    level: float = 0.95,
    allowed_bias: float | None = None,
    assigned: float | None = None,
    sigma_pt: float | None = None,
) -> dict:
    """Consensus value, tau, repeatability and reproducibility sd, ICC and limits, the classical comparators, and
    a per-lab table (bias with interval, P(|bias| > allowed), z, signal)."""
    res = _results(fit, level=level, allowed_bias=allowed_bias, assigned=assigned, sigma_pt=sigma_pt)
    out = dict(res.lab)
    t = res.table
    cols = ["group", "n", "raw_mean", "bias_mean", res.col("bias_low"), res.col("bias_high")]
    if allowed_bias is not None:
        cols.append("p_bias_over")
    labs = t[cols].copy()
    labs["interval_excludes_0"] = np.asarray(out.pop("interval_excludes_0"))
    labs["z_score"], labs["z_signal"] = t["z_score"], t["z_signal"]
    out["labs"] = labs
    return out


def render_html(res, created: str | None = None, command=None, changes: dict | None = None) -> str:
    """report.html as a string, from computed results (pooling.results.compute); `changes`: a refit's change
    report, shown first."""
    from .page import render

    return render(res, created, command, changes)
