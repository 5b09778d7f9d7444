"""The short table printed after a run (plain text, no colours), from a results.Results: the same for both ways
of running. It presents; it computes nothing from draws.

What it follows: the interval level (columns named by it), --best (best first), the threshold and limit sides
(decision columns and a line each, naming the few groups on the smaller sides), the interlaboratory signals when
the groups are labs, the number rules of report/numbers.py (decimals from the data's own spread, no scientific
notation for ordinary numbers, probabilities whose ends are told apart), estimates without n, and a missed-targets
line that says what to do. Its tables are laid out from the cells they print, so no two cells touch whatever the
magnitude (1e15 or 1e-9); a long label is clipped in a table so the rows stay told apart, and named in full in a line.
"""

from __future__ import annotations

import sys
import unicodedata

import numpy as np

from .asked import level_label
from .report.numbers import Values, ess, plural, prob, rerun_advice, rhat, sig, typical_sd, whole

MAX_ROWS = 12
NAMED = 5  # names listed on a side of a decision before "and N more"
LABEL_CAP = 40  # the widest a group's label may make the group column
LEVEL_CAP = 24  # the same for a predictor's level column
GAP = "  "  # between two columns: the least that keeps two numbers apart


class Numbers(Values):
    """Values for the terminal: decimals from a typical posterior sd, no digit-group separators."""

    def __init__(self, typical_sd: float):
        super().__init__(typical_sd, sep="", dash="-")


def _weight(x) -> str:
    return "-" if x is None or not np.isfinite(x) else f"{x:.2f}"


def _one_line(label) -> str:
    """A label as it may be printed: on one line (the readers keep newlines and tabs inside quoted labels)."""
    return str(label).replace("\n", " ").replace("\r", " ").replace("\t", " ")


def _fit_labels(labels, cap: int) -> list[str]:
    """Labels for a table column at most `cap` characters wide. A longer label keeps its start and its end around an
    ellipsis, because labels of one set often differ only at the end ('... et d essais L05', '... L07'); the split
    moves until the labels shown are told apart, and when no split at `cap` does that, they are shown whole (a wide
    column is better than two rows no one can tell apart). Prose lines name groups with _one_line, never clipped."""
    flat = [_one_line(x) for x in labels]
    if all(len(x) <= cap for x in flat):
        return flat
    distinct = len(set(flat))
    first = max(1, cap // 3)
    for tail in [*range(first, cap - 1), *range(first - 1, 0, -1)]:
        shown = [x if len(x) <= cap else x[: cap - 1 - tail] + "…" + x[-tail:] for x in flat]
        if len(set(shown)) == distinct:
            return shown
    return flat


def _wide(text: str) -> int:
    """The columns a text takes in a terminal: East Asian wide and full-width characters two, combining marks none
    (so a table of labels such as '東京' or 'Zu\u0308rich' stays aligned)."""
    return sum(0 if unicodedata.combining(ch) else 2 if unicodedata.east_asian_width(ch) in "WF" else 1 for ch in text)


def _pad(text: str, width: int, align: str) -> str:
    fill = " " * max(0, width - _wide(text))
    return text + fill if align == "<" else fill + text


def _lay_out(cols, rows, head: bool = True) -> list[str]:
    """Rows of cells in columns as wide as their header and their widest cell, GAP between columns, so no two
    cells touch whatever the numbers' magnitude. `cols`: (header, align) with align '<', '>' or 'to' (cells are
    (low, high) pairs written 'low to high' with the lows right-aligned and the highs left-aligned, so that every
    'to' lines up); a row None is the '...' between the first and the last rows."""
    cells = [r for r in rows if r is not None]
    pair = {
        i: (max([_wide(r[i][0]) for r in cells], default=0), max([_wide(r[i][1]) for r in cells], default=0))
        for i, (_, a) in enumerate(cols)
        if a == "to"
    }

    def text(c, i):
        return c if i not in pair else f"{_pad(c[0], pair[i][0], '>')} to {_pad(c[1], pair[i][1], '<')}"

    body = [None if r is None else [text(c, i) for i, c in enumerate(r)] for r in rows]
    widths = [
        max([_wide(h) if head else 0] + [_wide(r[i]) for r in body if r is not None]) for i, (h, _) in enumerate(cols)
    ]

    def line(row):
        return GAP.join(_pad(c, wd, "<" if a == "<" else ">") for c, (_, a), wd in zip(row, cols, widths)).rstrip()

    return ([line([h for h, _ in cols])] if head else []) + ["..." if r is None else line(r) for r in body]


def _cell(text) -> str:
    """A cell on one line: line breaks and tabs as blanks, other control characters (an escape code in a note)
    written out as Python writes them, so that no cell can move the cursor or recolour the terminal."""
    return "".join(
        " " if ch in "\n\r\t" else repr(ch)[1:-1] if unicodedata.category(ch) == "Cc" else ch for ch in str(text)
    )


def text_table(cols, rows) -> list[str]:
    """The lines of a plain-text table, for listings such as `pooling batches`. `cols`: (header, align) with align
    '<' (text) or '>' (numbers); `rows`: lists of cells (None for an empty cell). Each column is as wide as its
    header and its widest cell (wide characters count two), with two blanks between columns; nothing is cut,
    and each cell is kept on one line (_cell)."""
    return _lay_out(cols, [["" if c is None else _cell(c) for c in r] for r in rows])


def _side_line(t, col: str, sides: tuple[str, ...], what: str, decide_at: float, noun: str) -> str:
    """'threshold 400: 46 groups above, 1 below (V47), 13 undecided; a side needs ...': a side other than the
    largest names its groups when it holds at most NAMED."""
    values = t[col].to_numpy()
    counts = {s: int(np.sum(values == s)) for s in sides}
    biggest = max(counts, key=lambda s: counts[s])
    bits = []
    for i, s in enumerate(sides):
        c = counts[s]
        text = f"{plural(c, noun)} {s}" if i == 0 else f"{whole(c)} {s}"
        if 0 < c <= NAMED and s != biggest:
            text += " (" + ", ".join(_one_line(x) for x in t.loc[values == s, "group"].tolist()) + ")"
        bits.append(text)
    return f"{what}: " + ", ".join(bits) + f"; a side needs a probability of at least {decide_at:g}"


def print_results(res, out, stream=None) -> None:
    """The terminal summary of a run whose folder is `out`."""
    stream = stream or sys.stdout
    o, t = res.options, res.table
    p = res.problem
    st = p.stats
    run = res.run
    lvl = level_label(o.level)
    noun = "lab" if o.interlab else "group"

    def w(text=""):
        print(text, file=stream)

    num = Numbers(typical_sd(t["theta_sd"]) if len(t) else 1.0)
    w(
        f"model: {p.model.within} within-group variances, {p.model.between.name} between-group distribution; priors: "
        + "; ".join(f"{k} {v}" for k, v in p.model.priors().items() if k != "between")
    )
    data = plural(st.J, noun) + (
        f", {plural(st.N, 'measurement')}" if st.kind == "raw" else ", estimates with standard errors"
    )
    mode = (
        f"; summary mode: every draw kept for the hyperparameters and {plural(res.summary['kept_groups'], 'group')}"
        if res.mode == "summary"
        else ""
    )
    w(f"data: {data}; {run['chains']} chains x {run['draws_per_chain']} draws, seed {run['seed']}{mode}")
    w()
    cols = [("", "<"), ("median", ">"), (f"{lvl} interval", "to"), ("mean", ">"), ("sd", ">"), ("R-hat", ">")]
    cols += [("bulk ESS", ">"), ("tail ESS", ">")]
    hyper = []
    for name, s in res.hyper.items():
        f = (lambda x, extra=0: sig(x, 4, dash="-")) if name == "nu" else num
        hyper.append(
            [name, f(s["median"]), (f(s["low"]), f(s["high"])), f(s["mean"]), f(s["sd"], 1), rhat(s["rhat"], "-")]
            + [ess(s["bulk_ess"], "-"), ess(s["tail_ess"], "-")]
        )
    for line in _lay_out(cols, hyper):
        w(line)
    if res.tail is not None:
        tl = res.tail
        median = "normal" if not np.isfinite(tl["median_df"]) else f"{tl['median_df']:g}"
        df_txt = (
            f"df fixed at {tl['fixed_df']:g}"
            if tl["fixed_df"] is not None
            else f"df median {median}, P(normal) {prob(tl['p_normal'], '-')}"
        )
        flagged = tl["outlying"]
        names = ", ".join(_one_line(x) for x in flagged[:5]) + (" ..." if len(flagged) > 5 else "")
        w(f"heavy tails: {df_txt}; {plural(len(flagged), noun)} flagged outlying" + (f": {names}" if flagged else ""))
    if res.predictors is not None:
        print_predictors(res, num, lvl, w)
    # the groups: best first, or for labs in a round the largest bias first
    if o.interlab:
        order = np.argsort(-np.abs(t["bias_mean"].to_numpy(dtype=float)), kind="stable")
    else:
        order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    rows = order if len(order) <= MAX_ROWS else np.concatenate([order[: MAX_ROWS // 2], order[-MAX_ROWS // 2 :]])
    lo, hi = res.col("theta_low"), res.col("theta_high")
    known = st.kind == "known"
    cols = [(noun, "<"), ("n", ">")] if not known else [(noun, "<")]
    if "level" in t:
        cols.insert(1, ("level", "<"))
    cols += [("own mean", ">"), ("posterior", ">"), (f"{lvl} interval", "to")]
    cols += [("bias", ">"), ("z", ">")] if o.interlab else [("shrink", ">"), ("P(best)", ">")]
    if o.threshold is not None:
        cols.append((f"vs {o.threshold:g}", ">"))
    if o.limits:
        cols.append(("limits", ">"))
    if o.interlab and o.allowed_bias is not None:
        cols.append(("bias side", ">"))
    if "outlying" in t:
        cols.append(("outlying", ">"))
    w()
    half = MAX_ROWS // 2
    cut = "" if len(order) <= MAX_ROWS else f"; the first {half} and the last {half} of {whole(len(order))}"
    if o.interlab:
        w(f"labs, largest bias first (bias: posterior mean of theta - mu; z against x_pt and sigma_pt){cut}")
    else:
        w(
            f"{noun}s, best first ("
            + ("highest" if o.best == "highest" else "lowest")
            + " is best; shrink: the weight "
            f"of the pooled mean in the estimate, 0 own mean to 1 pooled mean){cut}"
        )
    labels = _fit_labels([t["group"].iat[j] for j in rows], LABEL_CAP)
    levels = _fit_labels([t["level"].iat[j] for j in rows], LEVEL_CAP) if "level" in t else None
    table = []
    for i, j in enumerate(rows):
        if len(order) > MAX_ROWS and i == MAX_ROWS // 2:
            table.append(None)
        cells = [labels[i]]
        if levels is not None:
            cells.append(levels[i])
        if not known:
            cells.append(whole(t["n"].iat[j], "-").replace(",", ""))
        cells += [num(t["raw_mean"].iat[j]), num(t["theta_mean"].iat[j]), (num(t[lo].iat[j]), num(t[hi].iat[j]))]
        if o.interlab:
            z = t["z_score"].iat[j]
            cells += [num(t["bias_mean"].iat[j]), f"{z:.2f}" if np.isfinite(z) else "-"]
        else:
            cells += [_weight(t["shrink_weight"].iat[j]), prob(t["p_best"].iat[j], "-")]
        if o.threshold is not None:
            cells.append(str(t["threshold_side"].iat[j]))
        if o.limits:
            cells.append(str(t["limits_side"].iat[j]))
        if o.interlab and o.allowed_bias is not None:
            cells.append(str(t["bias_side"].iat[j]))
        if "outlying" in t:
            cells.append("yes" if t["outlying"].iat[j] else "")
        table.append(cells)
    for line in _lay_out(cols, table):
        w(line)
    if o.threshold is not None:
        w(
            _side_line(
                t, "threshold_side", ("above", "below", "undecided"), f"threshold {o.threshold:g}", o.decide_at, noun
            )
        )
    if o.limits:
        w(_side_line(t, "limits_side", ("outside", "inside", "undecided"), "limits, by the mean", o.decide_at, noun))
    if o.interlab:
        sig_ = t["z_signal"].to_numpy()
        act = t.loc[sig_ == "action", "group"].tolist()
        warn = t.loc[sig_ == "warning", "group"].tolist()

        def few(names):
            return (
                f" ({', '.join(_one_line(x) for x in names[:NAMED])}{' ...' if len(names) > NAMED else ''})"
                if names
                else ""
            )

        w(f"z-scores: {plural(len(act), 'action signal')}{few(act)}, {plural(len(warn), 'warning')}{few(warn)}")
        if o.allowed_bias is not None:
            w(
                _side_line(
                    t,
                    "bias_side",
                    ("over", "within", "undecided"),
                    f"bias beyond +-{o.allowed_bias:g}",
                    o.decide_at,
                    noun,
                )
            )
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
            what += f" of {_one_line(worst['group'])}"
        bulk = worst.get("bulk_ess")
        w(
            f"diagnostics targets MISSED for {plural(diag['missed_count'], 'quantity', 'quantities')} after "
            f"{run['draws_per_chain']} draws per chain (worst: {what}, R-hat {rhat(worst.get('rhat'), '-')}, bulk ESS "
            f"{ess(bulk, '-')}, tail ESS {ess(worst.get('tail_ess'), '-')}); do not use these results yet: "
            f"{rerun_advice(diag, run['draws_requested'])}"
        )
    if res.mode == "summary":
        cr = res.summary["figures"]["classic_rhat"]
        if cr["groups"]:
            w(
                f"all groups, classic R-hat of theta: largest {rhat(cr['max'], '-')}, {whole(cr['above_1.01'])} at 1.01 "
                "or more"
            )
    w(f"run folder: {out}" + (" (groups.csv has every group)" if res.mode == "summary" else ""))


def print_predictors(res, num: Numbers, lvl: str, w) -> None:
    """Why groups differ: each effect with its interval and P(> 0), the consensus value per level, and tau with and
    without the predictors (the second from a fit of the same data without them, made by the same command)."""
    pr = res.predictors
    w()
    w(f"why groups differ (group-level predictors; mu is {pr['mu_means']}):")
    ref = {c["column"]: c["reference"] for c in pr["categories"]}
    more = [c for c in pr["contrasts"] if c["b"] != ref[c["column"]]]
    # (name, mean, low, high, P(> 0), extra decimals): each effect, then the differences between two other levels
    lines = [(c["name"], c, 1 if c["kind"] == "category" else 2) for c in pr["coefficients"]]
    lines += [(f"{c['column']}: {c['a']} vs {c['b']}", c, 1) for c in more[:10]]
    names = _fit_labels([name for name, _, _ in lines], LABEL_CAP)
    rows = [
        ["", name, num(c["mean"], extra), f"{lvl} interval", (num(c["low"], extra), num(c["high"], extra))]
        + ["P(> 0)", prob(c["p_above_0"])]
        for name, (_, c, extra) in zip(names, lines)
    ]
    cols = [("", "<"), ("", "<"), ("", ">"), ("", "<"), ("", "to"), ("", "<"), ("", ">")]
    for line in _lay_out(cols, rows, head=False):
        w(line)
    if len(more) > 10:
        w(f"  ... {len(more) - 10} more differences between levels in summary.json")
    if pr["consensus"]:
        shown = "; ".join(
            f"{_one_line(c['level'])} {num(c['mean'])} ({num(c['low'])} to {num(c['high'])})"
            for c in pr["consensus"][:6]
        )
        w(f"consensus value by level ({lvl} intervals): {shown}" + (" ..." if len(pr["consensus"]) > 6 else ""))
    sp = pr["spread"]
    tw = sp["tau_with"]
    line = f"between-group spread tau: {num(tw['mean'])} ({num(tw['low'])} to {num(tw['high'])}) with the predictors"
    if sp["tau_without"] is not None:
        wo = sp["tau_without"]
        share = sp["share_explained"]
        line += (
            f", {num(wo['mean'])} ({num(wo['low'])} to {num(wo['high'])}) without them (a second fit of the same "
            "data, made by this command)"
        )
        if share is not None:
            line += f"; they explain {100 * share:.0f}% of tau^2"
    w(line)
