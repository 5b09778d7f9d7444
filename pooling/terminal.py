"""The short table printed after a run (plain text, no colours), from a results.Results: the same for both ways
of running. It presents; it computes nothing from draws."""
from __future__ import annotations

import math
import sys

import numpy as np

from .asked import level_label

MAX_ROWS = 12


def plural(n, one: str, many: str | None = None) -> str:
    """'1 group', '2 groups', '1,234 measurements', '58.9 measurements' (down-weighted counts)."""
    x = float(n)
    word = one if x == 1 else (many or one + "s")
    text = f"{int(x):,}" if x == int(x) else f"{x:,.1f}"
    return f"{text} {word}"


class Numbers:
    """Numbers shown to the precision of the data's own spread: decimals from a typical posterior sd (two
    significant digits of it), so 1e7 + 0.123 with an sd of 0.01 prints 10000000.123, never '1e+07'."""

    def __init__(self, typical_sd: float):
        if typical_sd > 0 and math.isfinite(typical_sd):
            self.dec = int(min(12, max(0, 1 - math.floor(math.log10(typical_sd)))))
        else:
            self.dec = 4

    def __call__(self, x, extra: int = 0) -> str:
        if x is None or not np.isfinite(x):
            return "-"
        text = f"{x:.{self.dec + extra}f}"
        if text.startswith("-") and not any(c in "123456789" for c in text):
            text = text[1:]
        return text


def prob(x) -> str:
    """A probability to three decimals; below 0.0005 '<0.001', above 0.9995 '>0.999' (so 0.9995 never reads 1.000)."""
    if x is None or not np.isfinite(x):
        return "-"
    if x < 0.0005:
        return "<0.001"
    if x >= 0.9995:
        return ">0.999" if x < 1.0 else "1"
    return f"{x:.3f}"


def _weight(x) -> str:
    return "-" if x is None or not np.isfinite(x) else f"{x:.2f}"


def _clip(label: str, width: int = 24) -> str:
    label = str(label).replace("\n", " ").replace("\r", " ").replace("\t", " ")
    return label if len(label) <= width else label[: width - 1] + "…"


def print_results(res, out, stream=None) -> None:
    """The terminal summary of a run whose folder is `out`."""
    stream = stream or sys.stdout
    o, t = res.options, res.table
    p = res.problem
    st = p.stats
    run = res.run
    lvl = level_label(o.level)

    def w(text=""):
        print(text, file=stream)

    num = Numbers(float(np.median(t["theta_sd"])) if len(t) else 1.0)
    w(f"model: {p.model.within} within-group variances, {p.model.between.name} between-group distribution; priors: "
      + "; ".join(f"{k} {v}" for k, v in p.model.priors().items() if k != "between"))
    data = plural(st.J, "group") + (f", {plural(st.N, 'measurement')}" if st.kind == "raw" else "")
    mode = (f"; summary mode: every draw kept for the hyperparameters and {res.summary['kept_groups']} groups"
            if res.mode == "summary" else "")
    w(f"data: {data}; {run['chains']} chains x {run['draws_per_chain']} draws, seed {run['seed']}{mode}")
    w()
    head = f"{'':8}{'mean':>14}{'sd':>12}{lvl + ' interval':>31}{'R-hat':>8}{'bulk ESS':>10}{'tail ESS':>10}"
    w(head)
    for name, s in res.hyper.items():
        f = (lambda x: f"{x:.4g}") if name == "nu" else num
        interval = f"{f(s['low'])} to {f(s['high'])}"
        w(f"{name:8}{f(s['mean']):>14}{f(s['sd']) if name == 'nu' else num(s['sd'], 1):>12}{interval:>31}"
          f"{s['rhat']:>8.3f}{s['bulk_ess']:>10.0f}{s['tail_ess']:>10.0f}")
    if res.tail is not None:
        tl = res.tail
        df_txt = (f"df fixed at {tl['fixed_df']:g}" if tl["fixed_df"] is not None else
                  f"df median {tl['median_df']:g}, P(normal) {prob(tl['p_normal'])}")
        flagged = tl["outlying"]
        names = ", ".join(_clip(x, 20) for x in flagged[:5]) + (" ..." if len(flagged) > 5 else "")
        w(f"heavy tails: {df_txt}; {plural(len(flagged), 'group')} flagged outlying" + (f": {names}" if flagged else ""))
    if res.predictors is not None:
        print_predictors(res, num, lvl, w)
    # the groups, best first
    order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    rows = order if len(order) <= MAX_ROWS else np.concatenate([order[: MAX_ROWS // 2], order[-MAX_ROWS // 2:]])
    lo, hi = res.col("theta_low"), res.col("theta_high")
    known = st.kind == "known"
    cols = [("group", 24, "<"), ("n", 7, ">")] if not known else [("group", 24, "<")]
    if "level" in t:
        cols.insert(1, ("level", 14, "<"))
    cols += [("own mean", 14, ">"), ("posterior", 14, ">"), (f"{lvl} interval", 31, ">"), ("shrink", 8, ">"),
             ("P(best)", 8, ">")]
    if o.threshold is not None:
        cols.append((f"vs {o.threshold:g}", 11, ">"))
    if o.limits:
        cols.append(("limits", 11, ">"))
    if "outlying" in t:
        cols.append(("outlying", 9, ">"))
    w()
    w("groups, best first (" + ("highest" if o.best == "highest" else "lowest") + " is best; shrink: the weight "
      "of the pooled mean in the group's estimate, 0 own mean to 1 pooled mean)"
      + ("" if len(order) <= MAX_ROWS else f"; the {MAX_ROWS // 2} best and the {MAX_ROWS // 2} worst of {len(order):,}"))
    w("".join(f"{name:{align}{width}}" for name, width, align in cols))
    for i, j in enumerate(rows):
        if len(order) > MAX_ROWS and i == MAX_ROWS // 2:
            w("...")
        cells = [_clip(t["group"].iat[j])]
        if "level" in t:
            cells.append(_clip(t["level"].iat[j], 13))
        if not known:
            n = float(t["n"].iat[j])
            cells.append(f"{int(n)}" if n == int(n) else f"{n:.1f}")
        cells += [num(t["raw_mean"].iat[j]), num(t["theta_mean"].iat[j]),
                  f"{num(t[lo].iat[j])} to {num(t[hi].iat[j])}", _weight(t["shrink_weight"].iat[j]),
                  prob(t["p_best"].iat[j])]
        if o.threshold is not None:
            cells.append(str(t["threshold_side"].iat[j]))
        if o.limits:
            cells.append(str(t["limits_side"].iat[j]))
        if "outlying" in t:
            cells.append("yes" if t["outlying"].iat[j] else "")
        w("".join(f"{c:{align}{width}}" for c, (_, width, align) in zip(cells, cols)))
    if o.threshold is not None:
        side = t["threshold_side"]
        w(f"threshold {o.threshold:g}: {plural(int(np.sum(side == 'above')), 'group')} above and "
          f"{plural(int(np.sum(side == 'below')), 'group')} below with probability >= {o.decide_at:g}; "
          f"{int(np.sum(side == 'undecided')):,} undecided")
    if o.limits:
        side = t["limits_side"]
        w(f"limits: by their means, {plural(int(np.sum(side == 'outside')), 'group')} outside and "
          f"{plural(int(np.sum(side == 'inside')), 'group')} inside with probability >= {o.decide_at:g}; "
          f"{int(np.sum(side == 'undecided')):,} undecided")
    w()
    diag = res.diagnostics
    tg = diag["targets"]
    if res.targets_met:
        scope = "hyperparameters and kept groups" if res.mode == "summary" else "every checked quantity"
        w(f"diagnostics targets met ({scope}; R-hat < {tg['rhat_below']}, ESS >= {tg['ess_at_least']:g})")
    else:
        worst = diag["missed"][0] if diag["missed"] else {}
        what = worst.get("name", "")
        if "group" in worst:
            what += f" of {_clip(worst['group'], 20)}"
        w(f"diagnostics targets MISSED for {plural(diag['missed_count'], 'quantity', 'quantities')} after "
          f"{run['draws_per_chain']} draws per chain (worst: {what}, R-hat {worst.get('rhat', float('nan')):.3f}, "
          f"bulk ESS {worst.get('bulk_ess', float('nan')):.0f}); run again with more draws, for example "
          f"--draws {2 * run['draws_requested']} --max-draws {8 * run['draws_requested']}, or a proper prior on tau")
    if res.mode == "summary":
        cr = res.summary["figures"]["classic_rhat"]
        if cr["groups"]:
            w(f"all groups, classic R-hat of theta: largest {cr['max']:.4g}, {cr['above_1.01']:,} at 1.01 or more")
    w(f"run folder: {out}" + (" (groups.csv has every group)" if res.mode == "summary" else ""))


def print_predictors(res, num: Numbers, lvl: str, w) -> None:
    """Why groups differ: each effect with its interval and P(> 0), the consensus value per level, and tau with and
    without the predictors (the second from a fit of the same data without them, made by the same command)."""
    pr = res.predictors
    w()
    w(f"why groups differ (group-level predictors; mu is {pr['mu_means']}):")
    for c in pr["coefficients"]:
        extra = 1 if c["kind"] == "category" else 2
        w(f"  {_clip(c['name'], 30):32}{num(c['mean'], extra):>12}   {lvl} interval "
          f"{num(c['low'], extra)} to {num(c['high'], extra)}   P(> 0) {prob(c['p_above_0'])}")
    ref = {c["column"]: c["reference"] for c in pr["categories"]}
    more = [c for c in pr["contrasts"] if c["b"] != ref[c["column"]]]
    for c in more[:10]:
        w(f"  {_clip(c['column'] + ': ' + c['a'] + ' vs ' + c['b'], 30):32}{num(c['mean'], 1):>12}   {lvl} interval "
          f"{num(c['low'], 1)} to {num(c['high'], 1)}   P(> 0) {prob(c['p_above_0'])}")
    if len(more) > 10:
        w(f"  ... {len(more) - 10} more differences between levels in summary.json")
    if pr["consensus"]:
        shown = "; ".join(f"{_clip(c['level'], 16)} {num(c['mean'])} ({num(c['low'])} to {num(c['high'])})"
                          for c in pr["consensus"][:6])
        w(f"consensus value by level ({lvl} intervals): {shown}" + (" ..." if len(pr["consensus"]) > 6 else ""))
    sp = pr["spread"]
    tw = sp["tau_with"]
    line = f"between-group spread tau: {num(tw['mean'])} ({num(tw['low'])} to {num(tw['high'])}) with the predictors"
    if sp["tau_without"] is not None:
        wo = sp["tau_without"]
        share = sp["share_explained"]
        line += (f", {num(wo['mean'])} ({num(wo['low'])} to {num(wo['high'])}) without them (a second fit of the same "
                 "data, made by this command)")
        if share is not None:
            line += f"; they explain {100 * share:.0f}% of tau^2"
    w(line)
