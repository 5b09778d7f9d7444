"""The report's section on group-level predictors ("Why groups differ"), self-contained: it presents
results.Results.predictors and the per-group columns of the predictors, and computes nothing from draws.
page.render adds it when the run has predictors; its pictures are plots.by_level and plots.along_numeric."""

from __future__ import annotations

import numpy as np

from .numbers import Values, ess, rhat, sig
from .pieces import card, esc, html_table, interval_html, label, prob

LEVEL_ROWS = 5  # groups shown per level in the table of ranks within levels


def section(res, v: Values, lvl: str, figs: dict) -> str:
    """The whole section as HTML, or '' for a run without predictors."""
    pr = res.predictors
    if pr is None:
        return ""
    t = res.table
    des = res.problem.design
    out = ['<section id="predictors"><h2>Why groups differ</h2>']
    parts = []
    for cat in pr["categories"]:
        parts.append(
            f"the categorical predictor <code>{esc(cat['column'])}</code> (levels "
            + ", ".join(esc(x) for x in cat["levels"])
            + f"; each compared with the reference level <strong>{esc(cat['reference'])}</strong>)"
        )
    for num in pr["numeric"]:
        parts.append(
            f"the numeric predictor <code>{esc(num['column'])}</code> (centred at its mean over the groups, "
            f"{sig(num['centred_at'], 6)}; its effect is per unit of the column)"
        )
    priors = "; ".join(f"{esc(k)}: {esc(v)}" for k, v in pr["prior"].items())
    out.append(
        "<p>Each group's mean is pulled toward the centre of groups like it, mu + x<sub>j</sub>'beta, rather "
        f"than toward one pooled mean. The centre depends on {'; '.join(parts)}. "
        f"Here mu is {esc(pr['mu_means'])}. "
        f"Prior on the effects: {priors}.</p>"
    )
    rows = []
    for c in pr["coefficients"]:
        extra = 1 if c["kind"] == "category" else 2
        rows.append(
            [
                esc(c["name"]),
                v(c["mean"], extra),
                interval_html(v, c["low"], c["high"], extra),
                prob(c["p_above_0"]),
                rhat(c["rhat"]),
                ess(c["bulk_ess"]),
                esc(c["unit"]),
            ]
        )
    out.append(
        "<h3>Effects</h3>"
        + html_table(
            [
                ("coefficient", False),
                ("posterior mean", True),
                (f"{lvl} interval", True),
                ("P(&gt; 0)", True),
                ("R-hat", True),
                ("bulk ESS", True),
                ("unit", False),
            ],
            rows,
        )
    )
    more = [c for c in pr["contrasts"] if c["b"] != _reference(pr, c["column"])]
    if more:
        crow = [
            [
                esc(c["column"]),
                esc(f"{c['a']} − {c['b']}"),
                v(c["mean"], 1),
                interval_html(v, c["low"], c["high"], 1),
                prob(c["p_above_0"]),
            ]
            for c in more[:60]
        ]
        out.append(
            "<h3>Differences between levels</h3><p>Every pair of levels that does not include the reference "
            "(those are the effects above). P(&gt; 0) is the probability that the first level reads higher."
            "</p>"
            + html_table(
                [
                    ("predictor", False),
                    ("levels", False),
                    ("posterior mean", True),
                    (f"{lvl} interval", True),
                    ("P(&gt; 0)", True),
                ],
                crow,
            )
        )
    if pr["consensus"]:
        crow = [
            [esc(label(c["level"])), f"{c['groups']:,}", v(c["mean"], 1), interval_html(v, c["low"], c["high"], 1)]
            for c in pr["consensus"]
        ]
        note = " (numeric predictors at their means)" if pr["numeric"] else ""
        out.append(
            f"<h3>Consensus value per level</h3><p>mu + x'beta for each level{note}: the value groups of "
            "that level agree on. Each group's bias (groups.csv, bias_mean) is taken against the consensus "
            "value of its own level.</p>"
            + html_table(
                [("level", False), ("groups", True), ("consensus value", True), (f"{lvl} interval", True)], crow
            )
        )
    sp = pr["spread"]
    cards = [
        card(
            "tau with the predictors",
            v(sp["tau_with"]["mean"]),
            f"{lvl} interval {interval_html(v, sp['tau_with']['low'], sp['tau_with']['high'])}",
        )
    ]
    if sp["tau_without"] is not None:
        wo = sp["tau_without"]
        cards.append(
            card("tau without them", v(wo["mean"]), f"{lvl} interval {interval_html(v, wo['low'], wo['high'])}")
        )
        share = sp["share_explained"]
        cards.append(
            card(
                "share of tau² explained",
                "–" if share is None else f"{100 * share:.0f}%",
                "1 − E[tau² with] / E[tau² without]",
            )
        )
        wf = sp["without_fit"]
        how = (
            f"Tau without the predictors comes from a second fit of the same data with the same model and settings "
            f"but no predictors, run by the same command (seed {wf['seed']}, {wf['chains']} chains × "
            f"{wf['draws_per_chain']} draws; diagnostics targets {'met' if wf['targets_met'] else 'MISSED'}). The "
            "two fits' draws cannot be paired, so the share has no interval; the two intervals of tau show how "
            "sure it is."
        )
    else:
        how = "No fit without the predictors was made, so tau without them is not shown."
    out.append(f'<h3>Between-group spread</h3><div class="cards">{"".join(cards)}</div><p class="note">{esc(how)}</p>')
    for name, title in (
        ("by_level", "Estimates by level"),
        ("along_numeric", "Estimates against the numeric predictor"),
    ):
        if figs.get(name):
            out.append(f'<h3>{title}</h3><div class="fig">{figs[name]}</div>')
    if "rank_in_level_mean" in t:
        out.append(_ranks_in_level(res, t, des, lvl))
    out.append("</section>")
    return "".join(out)


def _reference(pr, column: str) -> str:
    return next(c["reference"] for c in pr["categories"] if c["column"] == column)


def _ranks_in_level(res, t, des, lvl: str) -> str:
    """Like with like: the best groups of each level by their rank among the groups of that level."""
    rlo, rhi = res.col("rank_in_level_low"), res.col("rank_in_level_high")
    rows = []
    level = t["level"].to_numpy()
    mean = t["rank_in_level_mean"].to_numpy(dtype=float)
    for name in des.level_names:
        idx = np.flatnonzero(level == name)
        idx = idx[np.argsort(mean[idx], kind="stable")][:LEVEL_ROWS]
        for j in idx:
            lo, hi = t[rlo].iat[j], t[rhi].iat[j]
            span = f"{int(lo)}–{int(hi)}" if np.isfinite(float(lo)) and np.isfinite(float(hi)) else "–"
            rows.append(
                [
                    esc(label(name)),
                    esc(label(t["group"].iat[j])),
                    f"{mean[j]:.1f}",
                    span,
                    prob(t["p_best_in_level"].iat[j]),
                    f"{t['rank_mean'].iat[j]:.1f}",
                ]
            )
    return (
        f"<h3>Ranks within each level</h3><p>Each group ranked among the groups of its own level (up to "
        f"{LEVEL_ROWS} per level, best first; every group is in groups.csv), beside its rank among all groups.</p>"
        + html_table(
            [
                ("level", False),
                ("group", False),
                ("mean rank in level", True),
                (f"rank {lvl}", True),
                ("P(best in level)", True),
                ("mean rank overall", True),
            ],
            rows,
        )
    )
