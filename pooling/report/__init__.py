"""The reporter: the answers people come for, computed from the draws.

    from pooling import report
    table = report.group_table(fit, level=0.95, k=3, best="highest", threshold=400.0, lower=380.0)
    report.rank_probabilities(fit)            # P(rank_j = r), groups by ranks
    report.pairwise(fit, ["S03", "S17"])      # P(theta_row > theta_column)
    report.interlab(fit, allowed_bias=5.0)    # consensus value, ISO 5725 components, bias, z-scores
    report.write_report(fit, "run-folder", report.ReportOptions(k=5))  # groups.csv + report.html

Every function takes a `Fit`, or an arviz InferenceData with pooling's layout (a run's draws.nc).
"""
from __future__ import annotations

import json
from pathlib import Path

from .assemble import ReportOptions, Results, check_args, compute
from .export import neutralise, records, safe_frame, write_csv
from .groups import COLUMNS, PREDICTION_SEED, group_table, outside_fraction, pairwise, rank_draws, rank_probabilities
from .interlab import algorithm_a, interlab, oneway_anova, z_scores, z_signal

__all__ = [
    "ReportOptions", "Results", "check_args", "compute", "group_table", "rank_probabilities", "pairwise", "interlab",
    "outside_fraction", "rank_draws", "oneway_anova", "algorithm_a", "z_scores", "z_signal", "neutralise",
    "write_report", "write_report_files", "render_html", "COLUMNS", "PREDICTION_SEED",
]


def render_html(res: Results, summary: dict | None = None) -> str:
    """report.html as a string, from computed results."""
    from .page import render

    return render(res, summary)


def summary_extra(res: Results) -> dict:
    """The reporter's keys for summary.json: options, per-group rows, the interlab view, head to head."""
    lab = dict(res.lab)
    lab["labs"] = records(lab["labs"])
    out = {
        "report_options": res.options.to_dict(),
        "groups_table": records(res.table),
        "interlab": lab,
        "new_group_outside": res.new_group,
        "predictive_checks": {"spread_of_means": None if res.spread is None else
                              {k: res.spread[k] for k in ("observed", "p_value", "draws")},
                              "within_sd": None if res.sd is None else
                              {"groups_checked": int(len(res.sd["groups"])), "outside_interval": res.sd["outside"],
                               "extreme_p": res.sd["extreme"], "level": res.sd["level"]}},
    }
    if res.pairs is not None:
        out["pairwise"] = {"groups": list(res.pairs.index), "p_row_greater": res.pairs.to_numpy()}
    return out


def write_report(fit, folder, options: ReportOptions | None = None) -> Results:
    """Write groups.csv and report.html into `folder` (created if absent) and, when the folder holds a
    summary.json, add the reporter's keys to it. Returns the computed results.

    Needs a `Fit` (the page states the model, priors, data fingerprint and diagnostics of the run);
    the table functions also accept a re-opened draws.nc."""
    from ..output import _clean, write_json

    if getattr(fit, "summary_mode", False):  # many groups: pooling.summary's results (report/summary_view.py)
        from .summary_view import write_summary_report

        return write_summary_report(fit, folder, options)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    res = compute(fit, options)
    write_csv(res.table, folder / "groups.csv")
    summary_path = folder / "summary.json"
    summary = None
    if summary_path.exists():
        with open(summary_path, encoding="utf-8") as fh:
            summary = json.load(fh)
        summary.update(_clean(summary_extra(res)))
        write_json(summary_path, summary)
    (folder / "report.html").write_text(render_html(res, summary), encoding="utf-8")
    return res


def write_report_files(fit, folder, args) -> None:
    """The command line's hook (pooling.cli.run_fit): the reporter's files for one run folder."""
    write_report(fit, folder, ReportOptions.from_args(args))
