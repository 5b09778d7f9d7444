"""What a run prints (plain text, no colours), from a results.Results: the same for both ways of running. It
presents; it computes nothing from draws.

It leads with the decision, in the page's order (report/page.py's answer block; report/decisions.py chooses which
groups each decision names, for both): the groups flagged against what the run was asked (threshold, limits, the
labs' z-scores and allowed bias, outlying), each with the probability behind its flag, or one line saying none was,
and the caution; then the consensus value and the spreads, the labs' repeatability and reproducibility, the
head-to-head answers, a refit's changes, the likely best; then the hyperparameters, the groups' table, the model,
the diagnostics (first of all when the targets were missed) and the files.

What it follows: the interval level (columns named by it), --best (best first), the number rules of
report/numbers.py (decimals from the data's own spread, no scientific notation for ordinary numbers, probabilities
whose ends are told apart, figures the user gave read back as given, then and now told apart), estimates without n,
and a missed-targets line that says what to do. Its tables are laid out from the cells they print, so no two cells
touch whatever the magnitude (1e15 or 1e-9); a long label is clipped in a table so the rows stay told apart, and
named in full in a line.
"""

from __future__ import annotations

import sys
import unicodedata

import numpy as np

from .asked import level_label
from .report import decisions as D
from .report.interlab import Z_ACTION, Z_WARNING
from .report.numbers import (
    Values,
    ess,
    given,
    percent,
    plural,
    prob,
    prob_near,
    rerun_advice,
    rhat,
    sig,
    then_now,
    typical_sd,
    whole,
)
from .results import OUTLYING_AT

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


def print_results(res, out, stream=None, changes: dict | None = None) -> None:
    """The terminal summary of a run whose folder is `out`, in the page's order: the answer first (the groups to
    act on or look at, with the probability behind each, and the caution), then the consensus value and the
    spreads (with the ISO 5725 precision figures for labs, and the head-to-head answers of --compare), what changed
    since the last run (`changes`: a refit's change report), the likely best; then the evidence in short (the
    hyperparameters, the groups' table) and the run's model, data, diagnostics and files."""
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
    diag = res.diagnostics
    tg = diag["targets"]
    if not res.targets_met:  # as on the page: before the answer, since every figure below may be wrong
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
    for line in answer_lines(res, num):
        w(line)
    w()
    for line in pooled_lines(res, num, lvl):
        w(line)
    if o.interlab:
        for line in lab_lines(res, num, lvl):
            w(line)
    if res.pairs is not None:
        for line in compare_lines(res, num):
            w(line)
    if changes is not None:
        for line in change_lines(changes, num):
            w(line)
    if not o.interlab:  # labs in a round are judged against the consensus, not ranked (as on the page)
        for line in ranking_lines(res):
            w(line)
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
        cols.append((f"vs {given(o.threshold)}", ">"))
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
    w()
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
    if res.targets_met:
        scope = "hyperparameters and kept groups" if res.mode == "summary" else "every checked quantity"
        w(f"diagnostics targets met ({scope}; R-hat < {tg['rhat_below']}, ESS >= {tg['ess_at_least']:g})")
    else:
        w("diagnostics targets MISSED: see the first line")
    if res.mode == "summary":
        cr = res.summary["figures"]["classic_rhat"]
        if cr["groups"]:
            w(
                f"all groups, classic R-hat of theta: largest {rhat(cr['max'], '-')}, {whole(cr['above_1.01'])} at 1.01 "
                "or more"
            )
    w(
        f"run folder: {out} (report.html: the whole answer on one page; groups.csv: every {noun}'s row; summary.json: "
        "every figure)"
    )


def _names(t, rows, key, show, most: int = NAMED) -> str:
    """'S04 0.948, S05 0.840 and 3 more': labels in full, each with show(key)."""
    parts = [f"{_one_line(t['group'].iat[j])} {show(key[j])}" for j in rows[:most]]
    more = len(rows) - most
    return ", ".join(parts) + (f" and {whole(more)} more" if more > 0 else "")


def _tally(dec: D.Decision, noun: str) -> str:
    """'33 groups above, 0 below, 3 undecided'."""
    return ", ".join(
        f"{plural(s.count, noun)} {s.name}" if i == 0 else f"{whole(s.count)} {s.name}" for i, s in enumerate(dec.sides)
    )


def _named_lines(t, dec: D.Decision, show) -> list[str]:
    """One indented line per side whose groups are named (report/decisions.py: every side but the largest when it
    holds more than NAMED), strongest first, each with the probability behind its side."""
    return [f"  {s.name}, {s.what}: {_names(t, s.rows, s.key, show)}" for s in dec.named(NAMED)]


def answer_lines(res, num: Numbers) -> list[str]:
    """The decisions the run was asked for, as the page's answer tells them (report/decisions.py): for each, the
    count on every side, then by name the groups on each side but the largest, with the probability behind it;
    one plain line when no group is flagged or undecided on any of them; and the caution."""
    t, o = res.table, res.options
    noun = "lab" if o.interlab else "group"
    near = lambda p: prob_near(p, o.decide_at, "-")  # noqa: E731
    rule = f"a side needs a probability of at least {o.decide_at:g}"
    decisions = D.asked(res)
    by_kind = {d.kind: d for d in decisions}
    excl = D.bias_excluding_zero(res) if o.interlab and o.allowed_bias is None else np.zeros(0, dtype=np.int64)
    # nothing to act on or look at: no group on a flagging side or undecided, and no threshold (whose every side
    # is an answer)
    clean = (
        "threshold" not in by_kind
        and all(d.flagged == 0 for d in decisions)
        and all(s.count == 0 for d in decisions for s in d.sides if s.name == "undecided")
        and excl.size == 0
    )
    out = []
    if decisions and clean:
        said = []
        for d in decisions:
            if d.kind == "limits":
                said.append(f"all {whole(res.J)} inside the limits {D.limits_text(o)} ({rule})")
            elif d.kind == "z":
                said.append(f"no z-score signal (|z| above {Z_WARNING:g})")
                if o.allowed_bias is None:
                    said.append(f"no lab's {level_label(o.level)} bias interval excludes zero")
            elif d.kind == "bias":
                said.append(f"all {whole(res.J)} within the allowed bias +-{given(o.allowed_bias)} ({rule})")
            elif d.kind == "outlying":
                said.append(f"none outlying (P(outlying) >= {OUTLYING_AT:g}; {_largest_outlying(res, d)})")
        out.append(f"no {noun} flagged: " + "; ".join(said))
    for d in [] if clean else decisions:
        if d.kind == "threshold":
            out.append(f"threshold {given(o.threshold)}: {_tally(d, noun)}; {rule}")
            out += _named_lines(t, d, near)
        elif d.kind == "limits":
            out.append(f"limits {D.limits_text(o)}, by the mean: {_tally(d, noun)}; {rule}")
            out += _named_lines(t, d, near)
            j = D.largest_outside(res)
            ng = res.new_group
            bits = []
            if j is not None:
                bits.append(f"largest {_one_line(t['group'].iat[j])} {percent(t['outside_mean'].iat[j])}")
            if ng is not None:
                bits.append(
                    f"a {noun} not yet seen {percent(ng['mean'])} ({level_label(o.level)} interval "
                    f"{percent(ng['low'])} to {percent(ng['high'])})"
                )
            if bits:
                out.append("  predicted share of measurements outside: " + "; ".join(bits))
        elif d.kind == "z":
            zb = res.lab["z_basis"]
            out.append(
                f"z-scores: {plural(d.side('action').count, 'action signal')}, "
                f"{plural(d.side('warning').count, 'warning')}, {whole(d.side('none').count)} none "
                f"(action at |z| >= {Z_ACTION:g}, warning above {Z_WARNING:g}; ISO 13528)"
            )
            out += [ln for ln in _named_lines(t, d, lambda x: f"{x:.1f}") if not ln.startswith("  none,")]
            out.append(
                f"  z = (own mean - x_pt) / sigma_pt with x_pt {num(zb['assigned'], 1)} ({zb['assigned_from']}), "
                f"sigma_pt {num(zb['sigma_pt'], 1)} ({zb['sigma_pt_from']})"
            )
            if o.allowed_bias is None:
                b = t["bias_mean"].to_numpy(dtype=float)
                out.append(
                    f"bias: {whole(excl.size)} of {plural(res.J, 'lab')} with a {level_label(o.level)} bias interval "
                    "that excludes zero"
                    + (f" (bias: {_names(t, excl, b, num)})" if excl.size else "")
                    + "; give --allowed-bias to decide each lab"
                )
        elif d.kind == "bias":
            out.append(f"bias beyond +-{given(o.allowed_bias)}: {_tally(d, noun)}; {rule}")
            out += _named_lines(t, d, near)
        elif d.kind == "outlying":
            flagged = d.side("flagged")
            if flagged.count:
                out.append(
                    f"outlying (P(outlying) >= {OUTLYING_AT:g}): {plural(flagged.count, noun)} flagged, "
                    f"{whole(d.side('ordinary').count)} ordinary"
                )
                out.append(f"  flagged, P(outlying): {_names(t, flagged.rows, flagged.key, lambda p: prob(p, '-'))}")
            else:
                out.append(
                    f"outlying (P(outlying) >= {OUTLYING_AT:g}): none of the {plural(res.J, noun)}; "
                    + _largest_outlying(res, d)
                )
    if not decisions:
        out.append(
            "no decision asked: no --threshold, no specification limits, and the normal model flags no outlying "
            f"{noun}s; the consensus and the order follow"
        )
    out.append(f"caution: {D.SCREENING}")
    return out


def _largest_outlying(res, d: D.Decision) -> str:
    po = d.side("ordinary").key
    j = int(np.argmax(po))
    return (
        f"the largest P(outlying) is {_one_line(res.table['group'].iat[j])}'s, {prob(po[j], '-')}"
        if po[j] > 0
        else "P(outlying) is 0 for every one"
    )


def pooled_lines(res, num: Numbers, lvl: str) -> list[str]:
    """The consensus value with its interval, and the spreads between and within groups: the figures of the
    page's 'Pooled figures' (results.interlab_view)."""
    lab, p = res.lab, res.problem
    cs, bs, r = lab["consensus"], lab["between_sd"], lab["repeatability_sd"]

    def iv(s, full=False):
        return f"{num(s['median'])} ({lvl + ' interval ' if full else ''}{num(s['low'])} to {num(s['high'])})"

    name = "consensus value mu" if res.predictors is None else "mu, the consensus value of the reference level,"
    within = (
        f"within a group (typical sd) {iv(r)}" if r is not None else "within a group: each estimate's standard error"
    )
    scale = "scale" if p.heavy else "sd"
    return [f"{name} {iv(cs, True)}", f"spread: between groups ({scale}) tau {iv(bs)}; {within}"]


def lab_lines(res, num: Numbers, lvl: str) -> list[str]:
    """The ISO 5725 precision figures of the labs view (posterior medians and intervals), as on the page."""
    lab = D.lab_figures(res)
    if lab["repeatability_sd"] is None:
        return [
            "repeatability and reproducibility: not given for estimates with standard errors (no measurements "
            "within a lab)"
        ]

    def iv(s, full=False):
        return f"{num(s['median'])} ({lvl + ' interval ' if full else ''}{num(s['low'])} to {num(s['high'])})"

    out = [
        f"repeatability (ISO 5725): sd s_r {iv(lab['repeatability_sd'], True)}, limit r = 2.8 s_r "
        f"{iv(lab['repeatability_limit'])}",
        f"reproducibility (ISO 5725): sd s_R {iv(lab['reproducibility_sd'])}, limit R = 2.8 s_R "
        f"{iv(lab['reproducibility_limit'])}",
    ]
    if res.lab.get("overall"):
        out.append(
            "  (across all labs, from the fit without the predictors; within a level, with them: s_R "
            f"{iv(res.lab['reproducibility_sd'])})"
            if res.lab["reproducibility_sd"] is not None
            else "  (across all labs, from the fit without the predictors)"
        )
    return out


PAIR_LINES = 10  # head-to-head pairs printed; every pair is in summary.json and on the page


def compare_lines(res, num: Numbers) -> list[str]:
    """--compare: for each pair, P(theta_a > theta_b) (results.Results.pairs, as the page's head-to-head table),
    the two posterior means and the difference theta_a - theta_b: its mean and credible interval
    (results.Results.pair_diff)."""
    pairs = res.pairs
    names = list(pairs.index)
    t = res.table
    mean = dict(zip(t["group"], t["theta_mean"].to_numpy(dtype=float)))
    diff = res.pair_diff
    out = []
    every = [(a, b) for a in range(len(names)) for b in range(a + 1, len(names))]

    def signed(x) -> str:
        return ("+" if x >= 0 else "-") + num(abs(x), 1)

    for a, b in every[:PAIR_LINES]:
        x, y = _one_line(names[a]), _one_line(names[b])
        line = (
            f"compare: P({x} > {y}) {prob(pairs.iat[a, b], '-')}; posterior means {x} {num(mean[names[a]])}, "
            f"{y} {num(mean[names[b]])}"
        )
        if diff is None:
            line += f", difference {signed(mean[names[a]] - mean[names[b]])}"
        else:
            lo, hi = diff["low"].iat[a, b], diff["high"].iat[a, b]
            line += (
                f"; {x} - {y} {signed(diff['mean'].iat[a, b])} "
                f"({level_label(diff['level'])} interval {signed(lo)} to {signed(hi)})"
            )
        out.append(line)
    if len(every) > PAIR_LINES:
        out.append(f"  ... {len(every) - PAIR_LINES} more pairs on the page and in summary.json ('pairwise')")
    return out


def ranking_lines(res) -> list[str]:
    """The likely best and top k with their probabilities (report/decisions.py's ranking, as the page's)."""
    t = res.table
    rk = D.ranking(res)

    def named(j) -> str:
        return _one_line(t["group"].iat[j]) + (" (outside the limits)" if rk.outside[j] else "")

    first = rk.best[0]
    nxt = ", ".join(f"{named(j)} {prob(rk.p_best[j], '-')}" for j in rk.best[1:] if rk.p_best[j] > 0)
    end = "highest" if res.options.best == "highest" else "lowest"
    out = [
        f"most likely best ({end} is best): {named(first)}, P(best) {prob(rk.p_best[first], '-')}"
        + (f"; then {nxt}" if nxt else "")
    ]
    if len(rk.top):
        out.append(
            f"likely top {rk.k}, P(among the {rk.k} best): "
            + ", ".join(f"{named(j)} {prob(rk.p_top[j], '-')}" for j in rk.top)
        )
    return out


def change_lines(report: dict, num: Numbers) -> list[str]:
    """A refit's change report (store/changes.py) in a few lines: mu and tau then and now told apart at any offset
    (numbers.then_now), and each group whose side changed, with its probability in each run."""
    prev = report["previous_run"]
    if prev is None:
        return [
            f"changes: first recorded run of this store ({report['batches']['active']} active batches, "
            f"{len(report['new_groups'])} groups)"
        ]
    b = report["batches"]
    out = [
        f"changes since run {prev['id']} of {prev['created_at']}: {len(b['added'])} batch(es) added, "
        f"{len(b['removed'])} withdrawn or replaced; {len(report['new_groups'])} new group(s), "
        f"{len(report['gone_groups'])} gone; {len(report['rank_moves'])} rank move(s)"
    ]
    for name, h in report["hyperparameters"].items():
        then, now, size = then_now(h["then_mean"], h["now_mean"], num)
        sd = "" if h["shift_in_sd"] is None else f", {h['shift_in_sd']:+.2f} posterior sd"
        out.append(
            f"  {name}: {then} -> {now} (shift {'+' if h['shift'] >= 0 else '-'}{size}{sd}; "
            f"P(now above the previous mean) {prob(h['p_now_above_then_mean'], '-')})"
        )
    crossings = (
        ("threshold_crossings", "threshold", "p_above", "P(above)"),
        ("limit_crossings", "limits", "p_mean_outside", "P(mean outside)"),
    )
    for key, what, p, shown in crossings:
        for c in report[key][:10]:
            out.append(
                f"  {_one_line(c['group'])}: {c['then']} -> {c['now']} ({what}; {shown} "
                f"{prob(c.get(p + '_then'), '-')} -> {prob(c.get(p + '_now'), '-')})"
            )
        if len(report[key]) > 10:
            out.append(f"  ... and {len(report[key]) - 10} more {what} changes (see changes.json)")
    return out


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
