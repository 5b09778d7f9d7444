"""report.html: one self-contained page (inline CSS and SVG, no script, no network), for both ways of running.

The page is laid out around the decisions a run was asked for. Under the title stands the answer: for each
decision the options ask for (the threshold, the specification limits, outlying groups, the interlaboratory
signals, the likely best and top K) the counts, then the groups that are the exception, by name; the caution
about what screening can and cannot decide stands beside those decisions. A refit's page opens with what
changed since the last run. The evidence follows, section by section, and the long tables fold
(HTML <details>, so the page needs no script); the run's health, the model and the column guide close it.
Sections appear only where they fit: the interlaboratory view only when the groups are labs in a round
(`ReportOptions.interlab`), the threshold and limits only when asked.

The page presents a results.Results and computes nothing from draws. Every piece of text that comes from
the data or the command line passes through `esc` (html.escape with quotes), and the SVG pictures are
written by report/svg.py, which escapes every text it draws.
"""

from __future__ import annotations

import time

import numpy as np

from .. import __version__
from ..asked import level_label
from ..results import Results, describe_column
from . import decisions as D
from . import numbers as N
from . import plots
from .numbers import Values, given, percent, plural, rhat, sig, typical_sd, whole
from .pieces import card, esc, html_table, interval_html, label, prob, prob_eq
from .plots import MANY, PAIRS_AS_TABLE, heat_hex

ALL_ROWS = 200  # a full table up to this many groups; beyond, the first and last ALL_ROWS // 2 (groups.csv: all)
OPEN_ROWS = 12  # a table of at most this many rows is shown open; a longer one folds
NAMED = 10  # names listed per side of a decision before "and N more"
FOLD_PICTURE = 25  # one-row-per-group pictures of more groups than this fold (the interval picture never does)
SHOWN = 25  # summary mode: rows of the best and of the worst groups

CAUTION = (
    "These are screening results: probabilities computed from the data and the model on this page. "
    f"{D.SCREENING[0].upper()}{D.SCREENING[1:]}. A decision that can hurt people or livelihoods (accepting a part, "
    "dropping a supplier, failing a laboratory) belongs to the people and the rules responsible for it; "
    "use these numbers as evidence for them."
)


# ---------------------------------------------------------------------------------------------
# small pieces

CSS = """
:root{--ink:#1f2a36;--muted:#5d6773;--line:#dde1e6;--paper:#fbfaf7;--card:#ffffff;--post:#1f6f78;
--raw:#a7763c;--alarm:#b23a2a;--ok:#2f7d4f;--soft:#eef4f3;--warn:#f0c36d}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.5 "DejaVu Sans","Segoe UI",Helvetica,Arial,sans-serif}
header.top{background:var(--ink);color:#fff;padding:16px 0 12px;border-bottom:5px solid var(--post)}
.wrap{max-width:1120px;margin:0 auto;padding:0 22px}
header.top h1{margin:0 0 2px;font-size:23px;font-weight:600;letter-spacing:.2px}
header.top .sub{color:#c9d3dc;font-size:13px}
header.top .flag{background:var(--alarm);color:#fff;padding:1px 8px;border-radius:3px}
nav.toc{background:#fff;border-bottom:1px solid var(--line);font-size:13px}
nav.toc a{display:inline-block;padding:6px 12px 6px 0;color:var(--post);text-decoration:none}
section{background:var(--card);border:1px solid var(--line);border-radius:6px;margin:14px 0;padding:4px 20px 12px}
h2{font-size:18px;margin:12px 0 8px;padding-bottom:5px;border-bottom:2px solid var(--soft)}
h3{font-size:15px;margin:14px 0 6px;color:var(--post)}
p{margin:8px 0}
p.note,.note{color:var(--muted);font-size:13px}
section.verdict{border:2px solid var(--post);padding-bottom:14px}
.verdict-grid{display:grid;grid-template-columns:minmax(0,1fr) 290px;gap:14px 22px;align-items:start}
.decision{border-bottom:1px solid var(--line);padding:2px 0 8px}
.decision:last-child{border-bottom:0}
.decision h3{margin:8px 0 4px}
.decision h3 .rule{color:var(--muted);font-weight:400;font-size:13px}
.decision ul{margin:4px 0;padding-left:18px}.decision li{margin:2px 0}
.pill{display:inline-block;padding:1px 10px;margin:2px 6px 2px 0;border-radius:11px;font-size:13.5px;font-weight:600;
background:var(--soft);color:var(--ink)}
.pill.bad{background:#f6dcd7;color:#6d1d12}.pill.good{background:#dcefe3;color:#1d4d31}
.pill.open{background:#f7ecd0;color:#4d3a05}
.p{color:var(--muted);font-variant-numeric:tabular-nums}
aside.caution{border-left:5px solid var(--raw);background:#fff8ee;padding:10px 14px;border-radius:4px;font-size:13.5px}
aside.caution strong{display:block;margin-bottom:2px}
.alarm{border:2px solid var(--alarm);background:#fdf0ee;color:#6d1d12;padding:10px 14px;margin:10px 0;border-radius:6px}
.alarm strong{color:var(--alarm)}
.okline{color:var(--ok);font-size:13.5px}
.cards{display:grid;grid-template-columns:repeat(auto-fit,minmax(190px,1fr));gap:10px;margin:8px 0 6px}
.card{background:var(--soft);border-radius:6px;padding:8px 12px}
.card .k{font-size:12px;color:var(--muted);text-transform:uppercase;letter-spacing:.6px}
.card .v{font-size:20px;font-weight:600;margin:1px 0}
.card .i{font-size:12.5px;color:var(--muted)}
table{border-collapse:collapse;width:100%;font-size:13px;margin:6px 0 10px;font-variant-numeric:tabular-nums}
th{text-align:left;background:#f1f3f5;font-weight:600;padding:5px 6px;border-bottom:2px solid var(--line);
vertical-align:bottom}
td{padding:3px 6px;border-bottom:1px solid #eef0f2;vertical-align:top}
td.n,th.n{text-align:right}
td:first-child,th:first-child{overflow-wrap:anywhere;min-width:6em}
.nw{white-space:nowrap}
tbody tr:nth-child(even){background:#fafbfc}
tr.gap td{text-align:center;color:var(--muted);font-style:italic;background:#fff}
.tag{display:inline-block;padding:0 7px;border-radius:9px;font-size:12px;font-weight:600;white-space:nowrap}
.tag.bad{background:var(--alarm);color:#fff}.tag.open{background:var(--warn);color:#3a2a00}.tag.good{color:var(--ok)}
.tag.none{color:var(--muted);font-weight:400}
details{margin:8px 0;border:1px solid var(--line);border-radius:5px;padding:4px 10px;background:#fcfcfb}
details>summary{cursor:pointer;color:var(--post);font-weight:600;font-size:14px;padding:2px 0}
details[open]>summary{margin-bottom:4px}
.fig{margin:8px 0 4px;text-align:center}
svg.figure{width:100%;height:auto}
dl.kv{display:grid;grid-template-columns:minmax(0,max-content) minmax(0,1fr);gap:3px 16px;font-size:13.5px;margin:6px 0}
dl.kv dt{color:var(--muted);overflow-wrap:anywhere}dl.kv dd{margin:0;overflow-wrap:anywhere}
code,.mono{font-family:"DejaVu Sans Mono",Consolas,monospace;font-size:12.5px}
pre.model{background:var(--soft);padding:10px 14px;border-radius:5px;font-size:12.5px;white-space:pre-wrap;
overflow-wrap:anywhere}
footer{color:var(--muted);font-size:12px;padding:8px 0 24px}
@media (max-width:900px){.verdict-grid{grid-template-columns:minmax(0,1fr)}.wrap{padding:0 12px}
section{padding:4px 12px 10px}}
@media print{nav.toc{display:none}section{break-inside:avoid-page;border:0}details{border:0}}
"""


def _fold(summary: str, inner: str, rows: int | None = None, open_: bool = False, open_rows: int = OPEN_ROWS) -> str:
    """Content folded under a one-line summary; a table of at most `open_rows` rows is shown as it is."""
    if rows is not None and rows <= open_rows:
        return inner
    return f"<details{' open' if open_ else ''}><summary>{summary}</summary>{inner}</details>"


def _head_tail(order: np.ndarray) -> tuple[np.ndarray, int | None, int]:
    if len(order) <= ALL_ROWS:
        return order, None, 0
    h = ALL_ROWS // 2
    return np.concatenate([order[:h], order[-h:]]), h - 1, len(order) - 2 * h


def _n(n) -> str:
    if not n > 0:
        return "–"
    return whole(n)


SIDE_TONE = {
    "above": "open",
    "below": "open",
    "outside": "bad",
    "inside": "good",
    "over": "bad",
    "within": "good",
    "undecided": "none",
    "action": "bad",
    "warning": "open",
    "none": "none",
}


def _tag(side) -> str:
    side = str(side)
    if not side:
        return ""
    return f'<span class="tag {SIDE_TONE.get(side, "none")}">{esc(side)}</span>'


def _groups_word(res: Results, n: float = 2) -> str:
    return ("lab" if n == 1 else "labs") if res.options.interlab else ("group" if n == 1 else "groups")


# ---------------------------------------------------------------------------------------------
# the answer: counts, then the named exceptions


def _near(at: float):
    """numbers.prob_near as HTML text, for the probabilities beside a decision made at `at`."""
    return lambda p: esc(N.prob_near(p, at))


def _named(t, rows: np.ndarray, key: np.ndarray, show=prob, shown: bool = True) -> str:
    """Up to NAMED labels of `rows` (in their order), each with show(key)."""
    parts = [
        f"{esc(label(t['group'].iat[j]))}" + (f' <span class="p">{show(key[j])}</span>' if shown else "")
        for j in rows[:NAMED]
    ]
    more = len(rows) - NAMED
    return ", ".join(parts) + (f" and {whole(more)} more" if more > 0 else "")


def _sides(t, dec: D.Decision, show=prob) -> str:
    """A tally of the sides of one decision, then the names on each side but the largest (which is given as a
    count, when it holds more than NAMED groups); report/decisions.py orders them."""
    tally = "".join(f'<span class="pill {s.tone}">{whole(s.count)} {esc(s.name)}</span>' for s in dec.sides)
    items = [
        f'<li><strong>{esc(s.name.capitalize())}</strong> <span class="p">· {s.what}</span>: '
        f"{_named(t, s.rows, s.key, show)}</li>"
        for s in dec.named(NAMED)
    ]
    return f'<div class="tally">{tally}</div>' + (f"<ul>{''.join(items)}</ul>" if items else "")


def _decision(title: str, rule: str, body: str) -> str:
    return (
        f'<div class="decision"><h3>{title}'
        + (f' <span class="rule">{rule}</span>' if rule else "")
        + f"</h3>{body}</div>"
    )


def _ranking_block(res: Results) -> str:
    o = res.options
    t = res.table
    rk = D.ranking(res)
    k, best, top, pb, pk, out = rk.k, rk.best, rk.top, rk.p_best, rk.p_top, rk.outside
    first = best[0]

    # with specification limits, a group judged outside them is marked wherever the ranking names it: the top of
    # the order is no recommendation for a group whose parts miss the limits
    def named(j) -> str:
        return esc(label(t["group"].iat[j])) + (" (outside the limits)" if out[j] else "")

    nxt = ", ".join(f'{named(j)} <span class="p">{prob(pb[j])}</span>' for j in best[1:] if pb[j] > 0)
    body = (
        f"<p>Most likely best: <strong>{named(first)}</strong>, P(best) {prob(pb[first])}"
        + (f"; then {nxt}" if nxt else "")
        + ".</p>"
    )
    if len(top):
        body += (
            f"<p>Likely top {k}, P(among the {k} best): "
            + ", ".join(f'{named(j)} <span class="p">{prob(pk[j])}</span>' for j in top)
            + ".</p>"
        )
    if out[best].any() or out[top].any():
        end = "highest" if o.best == "highest" else "lowest"
        body += (
            '<p class="note">The order ranks theta alone; the specification limits (above) decide which groups '
            "meet them."
            + (
                f" With limits on both sides the {end} theta is rarely the aim: the order says only which group "
                "sits furthest that way."
                if o.lower is not None and o.upper is not None
                else ""
            )
            + "</p>"
        )
    if pb[first] < 0.5:
        body += (
            f'<p class="note">No {_groups_word(res, 1)} is best with even odds: the data do not settle the '
            "top of the order (How sure is the order, below).</p>"
        )
    which = "highest" if o.best == "highest" else "lowest"
    return _decision("The best", f"({which} theta is best)", body)


def _threshold_block(res: Results, dec: D.Decision) -> str:
    o = res.options
    return _decision(
        f"Against the threshold {esc(given(o.threshold))}",
        f"(a side needs a probability of at least {o.decide_at:g})",
        _sides(res.table, dec, show=_near(o.decide_at)),
    )


def _limits_block(res: Results, dec: D.Decision) -> str:
    t, o = res.table, res.options
    body = _sides(t, dec, show=_near(o.decide_at))
    if "outside_mean" in t:
        f = t["outside_mean"].to_numpy(dtype=float)
        j = D.largest_outside(res)
        extra = []
        if j is not None:
            extra.append(
                f"largest predicted share of measurements outside: {esc(label(t['group'].iat[j]))} {percent(f[j])}"
            )
        ng = res.new_group
        if ng is not None:
            extra.append(
                f"a {_groups_word(res, 1)} not yet seen: {percent(ng['mean'])} "
                f"({level_label(o.level)} interval {percent(ng['low'])} to {percent(ng['high'])})"
            )
        if extra:
            body += '<p class="note">' + "; ".join(extra) + ".</p>"
    return _decision(
        f"Specification limits ({esc(D.limits_text(o))})",
        f"(by the group's mean; a side needs a probability of at least {o.decide_at:g})",
        body,
    )


def _outlying_block(res: Results, dec: D.Decision) -> str:
    t = res.table
    flagged = dec.side("flagged")
    if flagged.count:
        body = (
            f'<div class="tally"><span class="pill bad">{whole(flagged.count)} flagged</span>'
            f'<span class="pill">{whole(res.J - flagged.count)} ordinary</span></div>'
            f'<ul><li><strong>Flagged</strong> <span class="p">· P(outlying)</span>: '
            f"{_named(t, flagged.rows, flagged.key)}</li></ul>"
        )
    else:
        po = flagged.key
        j = int(np.argmax(po))
        largest = (
            f'the largest P(outlying) is {esc(label(t["group"].iat[j]))}\'s, <span class="p">{prob(po[j])}</span>'
            if po[j] > 0
            else "P(outlying) is 0 for every one"
        )
        body = f"<p>None of the {whole(res.J)} {_groups_word(res)} is flagged; {largest}.</p>"
    return _decision("Outlying groups", "(flagged when P(outlying) ≥ 0.5)", body)


def _labs_block(res: Results, v, z: D.Decision, bias: D.Decision | None) -> str:
    t, o, lab = res.table, res.options, res.lab
    zb = lab["z_basis"]
    body = _sides(t, z, show=lambda x: f"{x:.1f}")
    basis = (
        f"z = (own mean − x<sub>pt</sub>) / sigma<sub>pt</sub> with x<sub>pt</sub> = {v(zb['assigned'], 1)} "
        f"({esc(zb['assigned_from'])}), sigma<sub>pt</sub> = {v(zb['sigma_pt'], 1)} ({esc(zb['sigma_pt_from'])}); "
        "action at |z| ≥ 3, warning above 2 (ISO 13528)."
    )
    out = _decision("z-scores", "", body + f'<p class="note">{basis}</p>')
    if bias is not None:
        out += _decision(
            f"Bias against the consensus, allowed ± {esc(given(o.allowed_bias))}",
            f"(a side needs a probability of at least {o.decide_at:g})",
            _sides(t, bias, show=_near(o.decide_at)),
        )
    else:
        ex = D.bias_excluding_zero(res)
        body = (
            f"<p>{whole(ex.size)} of {whole(res.J)} labs have a {level_label(o.level)} bias interval that excludes "
            "zero" + (f": {_named(t, ex, ex, shown=False)}" if ex.size else "") + ".</p>"
        )
        out += _decision("Bias against the consensus", "(give --allowed-bias to decide each lab)", body)
    return out


def _health_line(res: Results) -> str:
    diag, run = res.diagnostics, res.run
    tg = diag["targets"]
    if res.targets_met:
        scope = (
            f"the hyperparameters and the {res.summary['kept_groups']} kept groups"
            if res.mode == "summary"
            else "every checked quantity"
        )
        return (
            f'<p class="okline">✓ The chains agree for {scope}: R-hat below {tg["rhat_below"]} and at least '
            f"{tg['ess_at_least']:g} effective draws (Run health).</p>"
        )
    worst = diag["missed"][0] if diag["missed"] else {}
    what = esc(worst.get("name", ""))
    if "group" in worst:
        what += f" of {esc(label(worst['group'], 30))}"
    req = run["draws_requested"]
    advice = N.rerun_advice(diag, req, lambda c: f"<code>{c}</code>")
    return (
        '<div class="alarm"><strong>Do not use these answers yet: the diagnostics targets were missed.</strong> '
        f"{plural(diag['missed_count'], 'quantity', 'quantities')} missed R-hat below {tg['rhat_below']} or "
        f"{tg['ess_at_least']:g} effective draws after {whole(run['draws_per_chain'])} draws per chain (worst: "
        f"{what}, R-hat {rhat(worst.get('rhat'))}, bulk ESS {N.ess(worst.get('bulk_ess'))}, tail ESS "
        f"{N.ess(worst.get('tail_ess'))}). The chains may not have explored the posterior, so every number below "
        f"may be wrong. {advice[0].upper()}{advice[1:]}.</div>"
    )


def _verdict(res: Results, v) -> str:
    o = res.options
    blocks = []
    by_kind = {d.kind: d for d in D.asked(res)}
    if "threshold" in by_kind:
        blocks.append(_threshold_block(res, by_kind["threshold"]))
    if "limits" in by_kind:
        blocks.append(_limits_block(res, by_kind["limits"]))
    if "z" in by_kind:
        blocks.append(_labs_block(res, v, by_kind["z"], by_kind.get("bias")))
    if "outlying" in by_kind:
        blocks.append(_outlying_block(res, by_kind["outlying"]))
    if not o.interlab:  # labs in a round are judged against the consensus, not ranked
        blocks.append(_ranking_block(res))
    health = _health_line(res)
    head = health if not res.targets_met else ""
    foot = health if res.targets_met else ""
    return (
        '<section id="verdict" class="verdict"><h2>The answer</h2>'
        + head
        + f'<div class="verdict-grid"><div>{"".join(blocks)}</div>'
        f'<aside class="caution"><strong>What these decisions are</strong>{esc(CAUTION)}</aside></div>'
        + foot
        + "</section>"
    )


# ---------------------------------------------------------------------------------------------
# what changed since the last run (refit)


def _undecided(x) -> str:
    """The change report says 'unsure' where the page says 'undecided'."""
    return "undecided" if x == "unsure" else ("–" if x is None else str(x))


def _signed(x: float, show) -> str:
    """+0.05 or −0.05 (a true minus sign), the size written by show."""
    return ("+" if x >= 0 else "−") + show(abs(x))


def _changes(ch: dict, v, res: Results) -> str:
    prev = ch.get("previous_run")
    b = ch.get("batches", {})
    store = ch.get("store") or {}
    parts = []
    if prev is None:
        title = "First recorded run of this store"
        parts.append(
            f"<p>{plural(b.get('active', 0), 'active batch', 'active batches')}, "
            f"{plural(len(ch.get('new_groups', [])), 'group')}. The next refit lists what changed against "
            "this run.</p>"
        )
    else:
        title = f"What changed since run {esc(prev['id'])} ({esc(str(prev['created_at'])[:16].replace('T', ' '))})"
        added = b.get("added", [])
        removed = b.get("removed", [])
        names = ", ".join(esc(x) for x in added[:NAMED]) + (" …" if len(added) > NAMED else "")
        txt = [f"{plural(len(added), 'batch', 'batches')} added" + (f": {names}" if added else "")]
        txt.append(
            f"{plural(len(removed), 'batch', 'batches')} withdrawn or replaced"
            + (": " + ", ".join(f"{esc(r['name'])} ({esc(r['status'])})" for r in removed[:NAMED]) if removed else "")
        )
        parts.append("<p><strong>Batches.</strong> " + "; ".join(txt) + f"; {whole(b.get('active', 0))} active.</p>")
        new, gone = ch.get("new_groups", []), ch.get("gone_groups", [])
        if new or gone:
            parts.append(
                f"<p><strong>Groups.</strong> {plural(len(new), 'new group')}"
                + (": " + ", ".join(esc(label(g["group"])) for g in new[:NAMED]) if new else "")
                + f"; {whole(len(gone))} gone"
                + (": " + ", ".join(esc(label(g)) for g in gone[:NAMED]) if gone else "")
                + ".</p>"
            )
        hyp = ch.get("hyperparameters", {})
        if hyp:
            bits = []
            for name, h in hyp.items():
                s = h.get("shift_in_sd")
                then, now, size = N.then_now(h["then_mean"], h["now_mean"], v)
                bits.append(
                    f"{esc(name)} {then} → <strong>{now}</strong> "
                    f'<span class="p">({"+" if h["shift"] >= 0 else "−"}{size}'
                    + (f", {_signed(s, lambda x: f'{x:.2f}')} posterior sd" if s is not None else "")
                    + ")</span>"
                )
            parts.append("<p><strong>Pooled figures</strong> (posterior means). " + "; ".join(bits) + ".</p>")
        crossings = [("threshold", c, "p_above") for c in ch.get("threshold_crossings", [])] + [
            ("limits", c, "p_mean_outside") for c in ch.get("limit_crossings", [])
        ]
        if crossings:
            rows = [
                [
                    esc(c["group"]),
                    esc(what),
                    _tag(_undecided(c["then"])),
                    _tag(_undecided(c["now"])),
                    prob(c.get(f"{key}_then")),
                    prob(c.get(f"{key}_now")),
                ]
                for what, c, key in crossings
            ]
            table = html_table(
                [
                    ("group", False),
                    ("against", False),
                    ("then", False),
                    ("now", False),
                    ("P then", True),
                    ("P now", True),
                ],
                rows,
            )
            parts.append(
                f"<p><strong>Decisions that changed: {whole(len(crossings))}.</strong> The probability is "
                "P(above the threshold) or P(mean outside the limits), each from its own run.</p>"
                + _fold(f"All {whole(len(crossings))} changed decisions", table, len(rows), open_rows=5)
            )
        else:
            comp = ch.get("comparable", {})
            same = [w for w, key in (("threshold", "threshold"), ("limits", "limits")) if comp.get(key)]
            watched = (res.options.threshold is not None) or res.options.limits
            if watched:
                parts.append(
                    "<p><strong>Decisions.</strong> No group changed side"
                    + ("" if same else " (the previous run watched other values, so none is compared)")
                    + ".</p>"
                )
        moves = ch.get("rank_moves", [])
        if moves:
            m = moves[0]
            rows = [
                [
                    esc(r["group"]),
                    f"{r['rank_then']:.1f}",
                    f"{r['rank_now']:.1f}",
                    f"{'up' if r['move_up'] > 0 else 'down'} {abs(r['move_up']):.1f}",
                    prob(r.get("p_now_better_than_then_rank")),
                ]
                for r in moves
            ]
            table = html_table(
                [
                    ("group", False),
                    ("mean rank then", True),
                    ("now", True),
                    ("move", True),
                    ("P(rank now better than then)", True),
                ],
                rows,
            )
            parts.append(
                f"<p><strong>Ranks.</strong> {plural(len(moves), 'group')} moved one place or more in mean "
                f"rank; the largest move: {esc(label(m['group']))} from {m['rank_then']:.1f} to "
                f"{m['rank_now']:.1f}.</p>"
                + _fold(f"All {whole(len(moves))} rank moves", table, len(rows), open_rows=0)
            )
    half = store.get("half_life_days")
    bl = store.get("batches", [])
    if half is None:
        parts.append('<p class="note"><strong>Forgetting.</strong> None: every active batch counts fully.</p>')
    elif bl:
        w = np.array([x["weight"] for x in bl], dtype=float)
        lo, hi = int(np.argmin(w)), int(np.argmax(w))
        rows = [
            [
                esc(x["name"]),
                esc(str(x["dated_at"])[:10]),
                whole(x["rows"]),
                f"{x['weight']:.3f}",
                whole(round(x["rows"] * x["weight"], 1)),
            ]
            for x in bl
        ]
        table = html_table(
            [("batch", False), ("dated", False), ("measurements", True), ("weight", True), ("counts as", True)], rows
        )
        parts.append(
            f"<p><strong>Forgetting.</strong> Older batches count less: a batch {sig(half)} days old counts "
            f"half (weights at {esc(str(store.get('reference_at', ''))[:10])}). The weights run from "
            f"{w[lo]:.3f} ({esc(bl[lo]['name'])}) to {w[hi]:.3f} ({esc(bl[hi]['name'])}); group sizes are "
            "therefore fractional.</p>"
            + _fold(f"The weight of each of the {whole(len(bl))} batches", table, len(rows), open_rows=0)
        )
    return (
        f'<section id="changes"><h2>{title}</h2>'
        + "".join(parts)
        + '<p class="note">changes.json and changes.csv in this folder hold every number; a probability there is '
        "computed from this run's draws against a figure of the previous run.</p></section>"
    )


# ---------------------------------------------------------------------------------------------


def render(
    res: Results, created: str | None = None, command: list[str] | None = None, changes: dict | None = None
) -> str:
    """The whole page as one string. `changes`: a refit's change report (store/changes.py), shown first."""
    o, t = res.options, res.table
    p = res.problem
    st = p.stats
    J = res.J
    v = Values(typical_sd(t["theta_sd"]))
    lvl = level_label(o.level)
    summary = res.mode == "summary"
    figs = plots.make_figures(res)
    parts: list[str] = []
    add = parts.append
    created = created or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    run = res.run
    if o.interlab:
        title = f"Interlaboratory round: {whole(J)} {'laboratory' if J == 1 else 'laboratories'}"
    else:
        title = f"Group comparison: {plural(J, 'group')}"
    add(
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width,initial-scale=1">'
        f"<title>{esc(title)}: {esc(st.source)}</title><style>{CSS}</style></head><body>"
    )
    mode = f"summary mode ({res.summary['kept_groups']} groups kept whole) · " if summary else ""
    measured = f"{plural(st.N, 'measurement')} · " if st.kind == "raw" else "estimates with standard errors · "
    add(
        f'<header class="top"><div class="wrap"><h1>{esc(title)}</h1>'
        f'<div class="sub">{esc(st.source)} · {measured}partial pooling, {esc(p.model.within)} within-group '
        f"variances, {esc(p.model.between.name)} between-group distribution · {lvl} intervals · {mode}"
        f"made {esc(created)} by pooling {esc(__version__)}"
        + (' · <strong class="flag">DIAGNOSTICS TARGETS MISSED</strong>' if not res.targets_met else "")
        + "</div></div></header>"
    )
    sections = [
        ("changes", "What changed"),
        ("verdict", "The answer"),
        ("pooled", "Pooled figures"),
        ("groups", "Groups"),
        ("predictors", "Why groups differ"),
        ("sides", _sides_title(o)),
        ("tails", "Outlying groups"),
        ("labs", "Laboratories"),
        ("order", "How sure is the order"),
        ("h2h", "Head to head"),
        ("pull", "Pull toward the pool"),
        ("fitcheck", "Model checks"),
        ("health", "Run health"),
        ("how", "How computed"),
        ("setup", "Model and data"),
        ("guide", "Column guide"),
    ]
    have = {
        "changes": changes is not None,
        "sides": o.threshold is not None or o.limits,
        "tails": res.tail is not None,
        "labs": o.interlab,
        "order": not summary and res.heat is not None,
        "h2h": res.pairs is not None,
        "fitcheck": not summary,
        "how": summary,
        "predictors": res.predictors is not None,
    }
    add(
        '<nav class="toc"><div class="wrap">'
        + "".join(f'<a href="#{a}">{b}</a>' for a, b in sections if have.get(a, True))
        + "</div></nav>"
    )
    add('<main class="wrap">')
    if changes is not None:
        add(_changes(changes, v, res))
    add(_verdict(res, v))
    add(_pooled(res, v, lvl))
    add(_groups(res, v, lvl, figs))
    if have["predictors"]:  # group-level predictors: report/predictors.py
        from .predictors import section

        add(section(res, v, lvl, figs))
    if have["sides"]:
        add(_sides_section(res, v, lvl))
    if have["tails"]:
        add(_tails(res, v, lvl, figs))
    if have["labs"]:
        add(_labs(res, v, lvl))
    if have["order"]:
        add(_order(res, figs))
    if have["h2h"]:
        add(_pairs(res, figs))
    add(_pull(res, v, lvl, figs))
    if have["fitcheck"]:
        add(_checks(res, v, figs))
    add(_health(res, v, figs))
    if have["how"]:
        add(_how(res))
    add(_setup(res, command))
    guide = "".join(
        f"<dt><code>{esc(c)}</code></dt><dd>{esc(describe_column(c, o.level))}</dd>"
        for c in t.columns
        if describe_column(c, o.level)
    )
    add(
        '<section id="guide"><h2>Column guide (groups.csv)</h2>'
        + _fold("What each column of groups.csv holds", f'<dl class="kv">{guide}</dl>')
        + f'<p class="note">Interval level {lvl}; k = {int(min(o.k, J))}; best = {esc(o.best)}; decided at probability '
        f"{o.decide_at:g}.</p></section>"
    )
    add(
        f"<footer>Made by pooling {esc(__version__)} on {esc(created)}; seed {esc(run['seed'])}. Every probability is "
        f"the share of {whole(run['draws_total'])} posterior draws in which the statement holds.</footer>"
        "</main></body></html>"
    )
    return "".join(parts)


# ---------------------------------------------------------------------------------------------
# pooled figures


def _pooled(res: Results, v, lvl: str) -> str:
    t, p, lab = res.table, res.problem, res.lab
    cs, bs = lab["consensus"], lab["between_sd"]
    heavy = p.heavy
    mu_name = "pooled mean mu" if res.predictors is None else "mu (reference level; see Why groups differ)"
    cards = [
        card(mu_name, v(cs["median"]), f"{lvl} interval {interval_html(v, cs['low'], cs['high'])}"),
        card(
            "between-group " + ("scale" if heavy else "sd") + " tau",
            v(bs["median"]),
            f"{lvl} interval {interval_html(v, bs['low'], bs['high'])}",
        ),
    ]
    if lab["repeatability_sd"] is not None:
        r = lab["repeatability_sd"]
        cards.append(
            card("typical within-group sd", v(r["median"]), f"{lvl} interval {interval_html(v, r['low'], r['high'])}")
        )
    w = t["shrink_weight"].to_numpy(dtype=float)
    if np.isfinite(w).any():
        cards.append(
            card(
                "pull toward mu",
                f"{np.nanmedian(w):.2f}",
                f"median shrinkage weight; from {np.nanmin(w):.2f} to {np.nanmax(w):.2f}",
            )
        )
    words = {
        "mu": "the pooled mean: the centre of the group means",
        "tau": (
            "the scale of the group means around mu (Student-t with df degrees of freedom)"
            if heavy
            else "the sd of the group means around mu"
        ),
        "s": "the scale of the within-group variances: sigma<sub>j</sub>² ~ Scaled-Inv-χ²(nu, s²). Their mean is "
        "nu·s²/(nu − 2), so the typical within-group sd sits above s",
        "nu": "how alike the groups' within-group sds are (larger: more alike)",
        "sigma": "the one within-group sd every group shares",
    }
    rows = []
    for name, sm in res.hyper.items():
        f = (lambda x, extra=0: sig(x, 3)) if name == "nu" else v
        rows.append(
            [
                esc(name),
                words.get(name, ""),
                f(sm["median"], 1),
                interval_html(f, sm["low"], sm["high"], 1),
                f(sm["mean"], 1),
                f(sm["sd"], 1),
            ]
        )
    if lab["repeatability_sd"] is not None and p.model.within == "separate":
        r = lab["repeatability_sd"]
        rows.append(
            [
                "typical within-group sd",
                ("√(mean over groups of sigma<sub>j</sub>²): the sd of a typical measurement about its group's mean"),
                v(r["median"], 1),
                interval_html(v, r["low"], r["high"], 1),
                v(r["mean"], 1),
                v(r["sd"], 1),
            ]
        )
    table = html_table(
        [
            ("quantity", False),
            ("what it is", False),
            ("median", True),
            (f"{lvl} interval", True),
            ("mean", True),
            ("sd", True),
        ],
        rows,
    )
    return (
        '<section id="pooled"><h2>Pooled figures</h2>'
        f'<div class="cards">{"".join(cards)}</div>'
        + _fold("The hyperparameters: median, interval, mean and sd", table)
        + "</section>"
    )


# ---------------------------------------------------------------------------------------------
# the groups


def _rank_cells(res: Results, j: int) -> tuple[str, str]:
    """Mean rank and rank interval of group j. In summary mode a group that was not kept carries error bounds;
    where the bound is as wide as half the interval the interval cannot place the group, and says so."""
    t = res.table
    rlo, rhi = int(t[res.col("rank_low")].iat[j]), int(t[res.col("rank_high")].iat[j])
    mean = f"{t['rank_mean'].iat[j]:,.1f}"
    span = f'<span class="nw">{rlo:,}–{rhi:,}</span>'
    if res.mode != "summary" or t["kept"].iat[j]:
        return mean, span
    e_mean, e = float(t["rank_mean_error"].iat[j]), int(t["rank_limit_error"].iat[j])
    if e_mean > 0.05:
        mean += f' <span class="p">±{e_mean:,.1f}</span>'
    if e > 0 and 2 * e >= rhi - rlo:
        span = f'<span class="p">coarse: within</span> {span}'
    elif e > 0:
        span += f' <span class="p">ends ±{e:,}</span>'
    return mean, span


def _group_head(res: Results, lvl: str, k: int) -> list[tuple[str, bool]]:
    o, t = res.options, res.table
    head = [("group", False)] + ([] if res.problem.stats.kind == "known" else [("n", True)])
    head += [
        ("posterior mean", True),
        (f"{lvl} interval", True),
        ("mean rank", True),
        (f"rank, {lvl}", True),
        ("P(best)", True),
        (f"P(top {k})", True),
    ]
    if o.threshold is not None:
        head.append((f"vs {esc(given(o.threshold))}", False))
    if o.limits:
        head.append(("limits", False))
    if "outlying" in t and t["outlying"].any():
        head.append(("outlying", False))
    if res.mode == "summary":
        head.append(("kept", False))
    return head


def _group_row(res: Results, v, j: int) -> list[str]:
    o, t = res.options, res.table
    r = [esc(t["group"].iat[j])] + ([] if res.problem.stats.kind == "known" else [_n(t["n"].iat[j])])
    mean, span = _rank_cells(res, j)
    r += [
        v(t["theta_mean"].iat[j]),
        interval_html(v, t[res.col("theta_low")].iat[j], t[res.col("theta_high")].iat[j]),
        mean,
        span,
        prob(t["p_best"].iat[j]),
        prob(t["p_top_k"].iat[j]),
    ]
    if o.threshold is not None:
        r.append(_tag(t["threshold_side"].iat[j]))
    if o.limits:
        r.append(_tag(t["limits_side"].iat[j]))
    if "outlying" in t and t["outlying"].any():
        r.append(_tag("outlying") if t["outlying"].iat[j] else "")
    if res.mode == "summary":
        r.append(esc(t["kept"].iat[j]))
    return r


def _groups(res: Results, v, lvl: str, figs: dict) -> str:
    t, o = res.table, res.options
    J = res.J
    k = int(min(o.k, J))
    head = _group_head(res, lvl, k)
    order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    which = "highest" if o.best == "highest" else "lowest"
    intro = (
        f"<p>Each group's mean theta as partial pooling estimates it, with its central {lvl} credible interval; "
        f"ranks count from the best ({which} theta). The rank interval holds the group's rank in {lvl} of the "
        f"draws; P(top {k}) is the chance of being among the {k} best.</p>"
    )
    if res.mode == "full":
        shown, gap, hidden = _head_tail(order)
        table = html_table(head, [_group_row(res, v, j) for j in shown], gap, hidden)
        return (
            '<section id="groups"><h2>Groups</h2>'
            + intro
            + f'<div class="fig">{figs.get("intervals", "")}</div>'
            + _fold(
                f"Every group, best first: estimate, interval, rank and decisions ({whole(J)} rows)", table, len(shown)
            )
            + "</section>"
        )
    kept_rows = np.flatnonzero(t["kept"].to_numpy() != "")
    kept_rows = kept_rows[np.argsort(t["rank_mean"].to_numpy()[kept_rows], kind="stable")]
    ks, kgap, khidden = _head_tail(kept_rows)
    ends = min(SHOWN, J)
    best_open = min(10, J)
    coarse = (
        '<p class="note">With this many groups the ranks of groups that were not kept come from counts of '
        "rank buckets, with a stated bound: an interval marked <em>coarse</em> contains the exact rank interval "
        "but cannot place the group more finely (its bound is half the interval or more); the mean rank, "
        "with its ± bound, orders such groups. Kept groups' ranks are exact.</p>"
    )
    return (
        '<section id="groups"><h2>Groups</h2>'
        + intro
        + coarse
        + f"<h3>The {best_open} best</h3>"
        + html_table(head, [_group_row(res, v, j) for j in order[:best_open]])
        + _fold(f"The {ends} best", html_table(head, [_group_row(res, v, j) for j in order[:ends]]))
        + _fold(f"The {ends} worst", html_table(head, [_group_row(res, v, j) for j in order[::-1][:ends]]))
        + _fold(
            f"The {whole(len(kept_rows))} kept groups (every draw in draws.nc, every column exact)",
            html_table(head, [_group_row(res, v, j) for j in ks], kgap, khidden),
        )
        + f'<p class="note">Every one of the {whole(J)} groups is in groups.csv.</p></section>'
    )


# ---------------------------------------------------------------------------------------------
# threshold and limits


def _sides_title(o) -> str:
    return (
        "Threshold and limits"
        if o.threshold is not None and o.limits
        else "Threshold"
        if o.threshold is not None
        else "Specification limits"
    )


def _sides_section(res: Results, v, lvl: str) -> str:
    o, t = res.options, res.table
    out = [f'<section id="sides"><h2>{_sides_title(o)}</h2>']
    if o.threshold is not None:
        side = t["threshold_side"].to_numpy()
        counts = {s: int(np.sum(side == s)) for s in ("above", "below", "undecided")}
        out.append(
            f"<p>Threshold {esc(given(o.threshold))}: a group is <em>above</em> when P(theta above it) is at "
            f"least {o.decide_at:g}, <em>below</em> when P(theta below it) is, and <em>undecided</em> otherwise "
            f"(more data would settle it). Here {whole(counts['above'])} above, {whole(counts['below'])} below, "
            f"{whole(counts['undecided'])} undecided.</p>"
        )
        idx = np.flatnonzero(side != max(counts, key=lambda s: counts[s]))
        idx = idx[np.argsort(t["theta_mean"].to_numpy()[idx], kind="stable")]
        shown, gap, hidden = _head_tail(idx)
        rows = [
            [
                esc(t["group"].iat[j]),
                v(t["theta_mean"].iat[j]),
                interval_html(v, t[res.col("theta_low")].iat[j], t[res.col("theta_high")].iat[j]),
                prob(t["p_above"].iat[j]),
                prob(t["p_below"].iat[j]),
                _tag(t["threshold_side"].iat[j]),
            ]
            for j in shown
        ]
        if rows:
            out.append(
                _fold(
                    f"The {whole(len(idx))} groups not on the majority side",
                    html_table(
                        [
                            ("group", False),
                            ("posterior mean", True),
                            (f"{lvl} interval", True),
                            ("P(above)", True),
                            ("P(below)", True),
                            ("side", False),
                        ],
                        rows,
                        gap,
                        hidden,
                    ),
                    len(rows),
                )
            )
    if o.limits:
        lim = " and ".join(
            x
            for x in (
                f"lower limit {given(o.lower)}" if o.lower is not None else "",
                f"upper limit {given(o.upper)}" if o.upper is not None else "",
            )
            if x
        )
        if "outside_mean" in t:
            out.append(
                f"<p>Specification: {esc(lim)}. A group's side is judged by its mean: <em>outside</em> when "
                f"P(theta outside the limits) is at least {o.decide_at:g}, <em>inside</em> when it is at most "
                f"{1 - o.decide_at:.2g}. Its single measurements spread about that mean by sigma<sub>j</sub>, "
                "so the predicted share of its future measurements outside (with its "
                f"{lvl} interval) says how many parts would fail.</p>"
            )
            ng = res.new_group
            if ng is not None:
                new_card = card(
                    f"a {_groups_word(res, 1)} not yet seen",
                    percent(ng["mean"]),
                    f"{lvl} interval {percent(ng['low'])} to {percent(ng['high'])}; MC error {percent(ng['mc_error'])}",
                )
                out.append(
                    f'<div class="cards">{new_card}</div><p class="note">For a new group each draw takes '
                    "theta<sub>new</sub> from the between-group distribution"
                    + (
                        " and sigma<sub>new</sub>² ~ Scaled-Inv-χ²(nu, s²)"
                        if res.problem.within_code == 0
                        else " and the shared sigma"
                    )
                    + ", from a generator seeded by the run's own seed.</p>"
                )
            order = np.argsort(-t["outside_mean"].to_numpy(), kind="stable")[: min(25, res.J)]
            kn = res.problem.stats.kind == "known"
            rows = [
                [esc(t["group"].iat[j])]
                + ([] if kn else [_n(t["n"].iat[j])])
                + [
                    v(t["theta_mean"].iat[j]),
                    v(t["sigma_mean"].iat[j]),
                    prob(t["p_mean_outside"].iat[j]),
                    _tag(t["limits_side"].iat[j]),
                    percent(t["outside_mean"].iat[j]),
                    (
                        f'<span class="nw">{percent(t[res.col("outside_low")].iat[j])}</span> to '
                        f'<span class="nw">{percent(t[res.col("outside_high")].iat[j])}</span>'
                    ),
                ]
                for j in order
            ]
            head = (
                [("group", False)]
                + ([] if kn else [("n", True)])
                + [
                    ("theta", True),
                    ("sigma", True),
                    ("P(mean outside)", True),
                    ("side", False),
                    ("measurements outside", True),
                    (f"{lvl} interval", True),
                ]
            )
            out.append(
                _fold(
                    f"The {len(rows)} groups with the largest predicted share outside",
                    html_table(head, rows),
                    len(rows),
                )
            )
        else:
            out.append(
                f"<p>Specification: {esc(lim)}. A group's side is judged by its mean (P(theta outside the "
                "limits), p_mean_outside in groups.csv). The share of future measurements outside needs a "
                "within-group sd; with given standard errors (the known structure) there is none.</p>"
            )
    out.append("</section>")
    return "".join(out)


# ---------------------------------------------------------------------------------------------
# heavy tails


def _tails(res: Results, v, lvl: str, figs: dict) -> str:
    tl, t = res.tail, res.table
    flagged = np.flatnonzero(t["outlying"].to_numpy())
    order = flagged[np.argsort(-t["p_outlying"].to_numpy()[flagged], kind="stable")]
    if tl["fixed_df"] is None:
        grid_txt = (
            "The data choose how heavy the tail is; the picture shows the posterior probability of each df "
            f"beside its prior. P(normal) = {prob(tl['p_normal'])}; P(df ≤ 4) = {prob(tl['p_df_at_most_4'])}; "
            "posterior median df "
            + (f"{tl['median_df']:g}." if np.isfinite(tl["median_df"]) else "∞ (the normal limit).")
        )
    else:
        grid_txt = f"df is fixed at {tl['fixed_df']:g}."
    kn = res.problem.stats.kind == "known"
    rows = [
        [esc(t["group"].iat[j])]
        + ([] if kn else [_n(t["n"].iat[j])])
        + [
            v(t["raw_mean"].iat[j]),
            v(t["theta_mean"].iat[j]),
            interval_html(v, t[res.col("bias_low")].iat[j], t[res.col("bias_high")].iat[j]),
            f"{t['tail_weight'].iat[j]:.3f}",
            prob(t["p_outlying"].iat[j]),
        ]
        for j in order[:ALL_ROWS]
    ]
    head = (
        [("group", False)]
        + ([] if kn else [("n", True)])
        + [
            ("own mean", True),
            ("posterior mean", True),
            (f"bias, {lvl}", True),
            ("tail weight", True),
            ("P(outlying)", True),
        ]
    )
    table = (
        _fold(f"The {whole(len(order))} flagged groups", html_table(head, rows), len(rows))
        if rows
        else "<p>No group is flagged.</p>"
    )
    return (
        '<section id="tails"><h2>Outlying groups</h2>'
        "<p>The between-group distribution is a Student-t with df degrees of freedom (heavy tails): each group j has "
        "a weight lambda<sub>j</sub>, with theta<sub>j</sub> ~ N(mu, tau²/lambda<sub>j</sub>). An ordinary group has "
        "a weight near 1; a group far from the others gets a small weight, which lets it stay near its own mean "
        "instead of dragging mu and tau (a weight w allows a deviation about 1/√w times as wide as tau). "
        f"{esc(grid_txt)} A group is flagged outlying when P(outlying) ≥ 0.5: the probability that its weight "
        "falls below the 5% point of the weights the between-group distribution gives (at the drawn df). "
        f"{whole(len(flagged))} of {whole(res.J)} groups are flagged.</p>"
        + (f'<div class="fig">{figs["df"]}</div>' if "df" in figs else "")
        + table
        + "</section>"
    )


# ---------------------------------------------------------------------------------------------
# laboratories


def _files_read(files) -> str:
    """Several files read (a folder, a glob): how many, and each one's name and SHA-256 (12 digits) up to 20."""
    if not files:
        return "– (not read from a file)"
    shown = "; ".join(f"{f['path']} {(f['sha256'] or '–')[:12]}" for f in files[:20])
    more = f"; and {len(files) - 20} more (summary.json data.files)" if len(files) > 20 else ""
    return f"{plural(len(files), 'file')}: {shown}{more}"


def _components_note(res: Results) -> str:
    """With group-level predictors: which fit the consensus value and the ISO 5725 components come from."""
    if res.predictors is None:
        return ""
    if res.lab.get("overall"):
        return (
            '<p class="note">With group-level predictors the consensus value and the components above come from '
            "the fit of the same data without them (made by the same command): one consensus value for every lab, "
            "and every lab-to-lab difference, the predictors' too, counted in s<sub>L</sub> and s<sub>R</sub>, as "
            "the ISO 5725 model y = m + B + e and the ANOVA beside them count it. The rows marked within a level "
            "are from the fit with the predictors: the spread left among labs of the same level (the precision of "
            "one method, for example). Each lab's bias below is against the consensus value of its own level.</p>"
        )
    return (
        '<p class="note">With group-level predictors, and no fit without them given, mu above is the consensus '
        "value of the reference level and tau the spread within a level: they leave out what the predictors "
        "explain, and do not compare with the ANOVA beside them, which counts every lab-to-lab difference.</p>"
    )


def _labs(res: Results, v, lvl: str) -> str:
    t, o = res.table, res.options
    lab = D.lab_figures(res)  # the figures across all labs
    an = lab["anova"]
    rows = []

    def row(name, s, classical, extra=0):
        if s is None:
            rows.append([name, "–", "–", classical])
        else:
            rows.append([name, v(s["median"], extra), interval_html(v, s["low"], s["high"], extra), classical])

    re_ = lab.get("random_effects")
    tau_name = (
        "between-lab scale tau (robust s<sub>L</sub>)" if res.problem.heavy else "between-lab sd s<sub>L</sub> (tau)"
    )
    if an:
        row("consensus value (mu)", lab["consensus"], v(an["grand_mean"]) + " (grand mean)")
        row(tau_name, lab["between_sd"], v(an["between_sd"]) + (" (truncated at 0)" if an["truncated"] else ""))
    elif re_:
        row("consensus value (mu)", lab["consensus"], f"{v(re_['consensus'])} ± {v(re_['consensus_se'], 1)} (se)")
        row(tau_name, lab["between_sd"], v(re_["between_sd"]) + (" (truncated at 0)" if re_["truncated"] else ""))
    else:
        row("consensus value (mu)", lab["consensus"], "–")
        row(tau_name, lab["between_sd"], "–")
    if lab["repeatability_sd"] is not None:
        row("repeatability sd s<sub>r</sub>", lab["repeatability_sd"], v(an["repeatability_sd"]) if an else "–")
        row("reproducibility sd s<sub>R</sub>", lab["reproducibility_sd"], v(an["reproducibility_sd"]) if an else "–")
        row(
            "repeatability limit r = 2.8 s<sub>r</sub>",
            lab["repeatability_limit"],
            v(2.8 * an["repeatability_sd"]) if an else "–",
        )
        row(
            "reproducibility limit R = 2.8 s<sub>R</sub>",
            lab["reproducibility_limit"],
            v(2.8 * an["reproducibility_sd"]) if an else "–",
        )
        icc = lab["icc"]
        rows.append(
            [
                "intraclass correlation",
                f"{icc['median']:.3f}",
                f'<span class="nw">{icc["low"]:.3f}</span> to <span class="nw">{icc["high"]:.3f}</span>',
                f"{an['icc']:.3f}" if an else "–",
            ]
        )
    if lab.get("overall"):  # with group-level predictors: the spread left within a level, from the fit with them
        row("tau within a level (with the predictors)", res.lab["between_sd"], "–")
        if res.lab["reproducibility_sd"] is not None:
            row("s<sub>R</sub> within a level (with the predictors)", res.lab["reproducibility_sd"], "–")
    classical = "one-way ANOVA (moments)" if an or not re_ else "DerSimonian-Laird (moments)"
    comp = html_table(
        [("quantity", False), ("posterior median", True), (f"{lvl} interval", True), (classical, True)], rows
    )
    note = ""
    if re_ and not an:
        note = (
            f'<p class="note">DerSimonian-Laird random-effects estimate from the {re_["k"]} estimates and their '
            f"standard errors: Q = {sig(re_['q'], 4)} on {re_['df']} df, p {prob_eq(re_['p_value'])}, I² = "
            f"{re_['i2']:.0%}; tau² = max(0, (Q − df) / (Σw − Σw²/Σw)) with w = 1/se², and the consensus is "
            "the mean weighted by 1/(se² + tau²). Its standard error ignores the uncertainty of tau, which "
            "the posterior interval includes.</p>"
        )
    if an:
        note = (
            f'<p class="note">ANOVA: mean square between labs {sig(an["ms_between"], 5)} on '
            f"{an['df_between']} df, "
            f"within labs {sig(an['ms_within'], 5)} on {sig(an['df_within'], 6)} df, F = {sig(an['f'], 4)}, "
            f"p {prob_eq(an['p_value'])}; s<sub>L</sub>² = (MS between − MS within) / n0 with n0 = "
            f"{sig(an['n0'], 4)} (ISO 5725-2 for unequal group sizes). The ANOVA treats an outlying lab like any "
            "other; the posterior with heavy tails does not.</p>"
        )
    zb = lab["z_basis"]
    order = np.argsort(-np.abs(t["bias_mean"].to_numpy()), kind="stable")
    shown, gap, hidden = _head_tail(order)
    kn = res.problem.stats.kind == "known"
    head = (
        [("lab", False)]
        + ([] if kn else [("n", True)])
        + [("own mean", True), ("bias θ−μ", True), (f"{lvl} interval", True)]
    )
    if o.allowed_bias is not None:
        head += [(f"P(|bias| &gt; {esc(given(o.allowed_bias))})", True), ("bias side", False)]
    if "outlying" in t:
        head.append(("outlying", False))
    head += [("z", True), ("z signal", False)]
    body = []
    for j in shown:
        r = [esc(t["group"].iat[j])] + ([] if kn else [_n(t["n"].iat[j])])
        r += [
            v(t["raw_mean"].iat[j]),
            v(t["bias_mean"].iat[j]),
            interval_html(v, t[res.col("bias_low")].iat[j], t[res.col("bias_high")].iat[j]),
        ]
        if o.allowed_bias is not None:
            r += [prob(t["p_bias_over"].iat[j]), _tag(t["bias_side"].iat[j])]
        if "outlying" in t:
            r.append(_tag("outlying") if t["outlying"].iat[j] else "")
        z = t["z_score"].iat[j]
        r += [f"{z:.2f}" if np.isfinite(z) else "–", _tag(t["z_signal"].iat[j]) if t["z_signal"].iat[j] else "–"]
        body.append(r)
    ag = lab["agreement"]
    return (
        '<section id="labs"><h2>Laboratories</h2>'
        "<p>The groups are laboratories measuring one material: the consensus value, the variance components in "
        "the terms of ISO 5725, and each lab's bias. Beside the posterior stand the classical comparators, so you "
        "can see where the two approaches agree.</p>"
        + comp
        + note
        + _components_note(res)
        + f"<p>z = (own mean − x<sub>pt</sub>) / sigma<sub>pt</sub> with x<sub>pt</sub> = {v(zb['assigned'], 1)} "
        f"({esc(zb['assigned_from'])}) and sigma<sub>pt</sub> = {v(zb['sigma_pt'], 1)} "
        f"({esc(zb['sigma_pt_from'])}). "
        "ISO 13528 signals: |z| ≤ 2 none, 2 &lt; |z| &lt; 3 warning, |z| ≥ 3 action. "
        f"Here {plural(ag['z_action'], 'lab')} {'has' if ag['z_action'] == 1 else 'have'} an action signal and "
        f"{whole(ag['z_warning'])} a warning; the {lvl} bias interval excludes zero for "
        f"{plural(ag['interval_excludes_0'], 'lab')}; {plural(ag['both'], 'lab')} "
        f"{'is' if ag['both'] == 1 else 'are'} flagged both ways.</p>"
        + _fold(f"Every lab, largest bias first ({whole(res.J)} rows)", html_table(head, body, gap, hidden), len(body))
        + "</section>"
    )


# ---------------------------------------------------------------------------------------------
# ranks, head to head, pooling


def _order(res: Results, figs: dict) -> str:
    J = res.J
    note = (
        "every group over every rank"
        if J <= MANY
        else f"the {len(res.heat['rows'])} groups with the best mean rank, over ranks 1 to {MANY} (the last column "
        f"collects every rank beyond {MANY})"
    )
    fig = f'<div class="fig">{figs.get("ranks", "")}</div>'
    rows = len(res.heat["rows"])
    return (
        '<section id="order"><h2>How sure is the order</h2>'
        f"<p>The map shows P(rank = r) for {note}. A long smear along a row means the data cannot place that "
        "group; a dark single cell means they can.</p>"
        + (_fold(f"The map of rank probabilities ({rows} rows)", fig) if rows > FOLD_PICTURE else fig)
        + "</section>"
    )


def _pairs(res: Results, figs: dict) -> str:
    df = res.pairs
    names = list(df.index)
    if len(names) > PAIRS_AS_TABLE:
        return (
            '<section id="h2h"><h2>Head to head</h2><p>Each cell is P(theta of the row group &gt; theta of the '
            f"column group), the share of draws in which it holds (dark: near 1).</p>"
            f'<div class="fig">{figs.get("pairs", "")}</div></section>'
        )
    head = "".join(f'<th class="n">{esc(label(c, 18))}</th>' for c in names)
    body = []
    for a, name in enumerate(names):
        cells = []
        for b in range(len(names)):
            x = df.iat[a, b]
            if not np.isfinite(x):
                cells.append('<td class="n">·</td>')
                continue
            bg = heat_hex(0.1 + 0.8 * x)
            fg = "#ffffff" if x > 0.6 else "#1f2a36"
            cells.append(f'<td class="n" style="background:{bg};color:{fg}">{prob(x)}</td>')
        body.append(f"<tr><td>{esc(label(name, 18))}</td>{''.join(cells)}</tr>")
    return (
        '<section id="h2h"><h2>Head to head</h2><p>Each cell is P(theta of the row group &gt; theta of the column '
        "group), the share of draws in which it holds.</p>"
        f"<table><thead><tr><th>row &gt; column</th>{head}</tr></thead><tbody>{''.join(body)}"
        f"</tbody></table>{_pair_differences(res)}</section>"
    )


def _pair_differences(res: Results) -> str:
    """Each pair's difference theta_a - theta_b: its posterior mean and credible interval (results.pair_differences)."""
    d = res.pair_diff
    if d is None:
        return ""
    names = list(d["mean"].index)
    v = Values(typical_sd(res.table["theta_sd"]))
    rows = [
        [
            f"{esc(label(names[a], 18))} − {esc(label(names[b], 18))}",
            v(d["mean"].iat[a, b]),
            interval_html(v, d["low"].iat[a, b], d["high"].iat[a, b]),
        ]
        for a in range(len(names))
        for b in range(a + 1, len(names))
    ]
    lvl = level_label(d["level"])
    return (
        f"<p>The difference between two groups' true values, with its {lvl} credible interval (an interval that "
        "excludes 0 says the two differ at that level).</p>"
        + html_table([("difference", False), ("mean", True), (f"{lvl} interval", True)], rows)
    )


def _pull(res: Results, v, lvl: str, figs: dict) -> str:
    p = res.problem
    J = res.J
    if res.mode == "summary":
        return (
            '<section id="pull"><h2>Pull toward the pool</h2>'
            f"<p>Posterior means of all {whole(J)} groups against their own means, and the shrinkage weight of "
            f'each. Every row is in groups.csv.</p><div class="fig">{figs.get("histograms", "")}</div></section>'
        )
    known = p.stats.kind == "known"
    size = "the precision 1/se² of its estimate" if known else "the number of measurements"
    fig = f'<div class="fig">{figs.get("shrinkage", "")}</div>'
    intro = (
        "<p>Each group's own mean (open circle, area by " + size + ") and where partial pooling puts it (filled "
        "dot)"
        + ("; groups flagged outlying are ringed" if res.tail is not None else "")
        + ". Small or noisy groups travel further toward the pooled mean.</p>"
    )
    expl = (
        "<p>The shrinkage weight is the posterior mean of v<sub>j</sub>/(v<sub>j</sub>+tau²"
        + ("/lambda<sub>j</sub>" if p.heavy else "")
        + ") with v<sub>j</sub> = sigma<sub>j</sub>²/n<sub>j</sub> "
        "(the squared standard error for given estimates): near 0 the group speaks for itself, near 1 it is mostly "
        "the pool. <em>Moved</em> is the share of the way from the group's own mean to mu that its estimate "
        "travelled: 0 not at all, 1 all the way; a negative value means it moved away from mu, above 1 past it "
        "(both happen when the other groups, not only mu, pull). For a group whose own mean lies within one "
        "posterior sd of mu the share is unsteady and shown as –.</p>"
    )
    return (
        '<section id="pull"><h2>Pull toward the pool</h2>'
        + intro
        + (_fold(f"The picture of each group's pull ({whole(J)} rows)", fig) if J > FOLD_PICTURE else fig)
        + _fold(f"Estimates and shrinkage of every group ({whole(J)} rows)", expl + _estimates(res, v, lvl))
        + "</section>"
    )


def _estimates(res: Results, v, lvl: str) -> str:
    t, p = res.table, res.problem
    known = p.model.within == "known"
    order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    shown, gap, hidden = _head_tail(order)
    own = "std error" if known else "own sd"
    own_sd = t["std_error"] if known else t["raw_sd"]
    head = [("group", False)] + ([] if p.stats.kind == "known" else [("n", True)])
    head += [("own mean", True), (own, True), ("posterior mean (sd)", True)]
    if not known:
        head.append((f"sigma<sub>j</sub> ({lvl} interval)", True))
    head += [(f"shrinkage ({lvl} interval)", True), ("moved", True)]
    if "tail_weight" in t:
        head += [("tail weight", True), ("P(outlying)", True)]
    mu = res.lab["consensus"]["mean"]
    rows = []
    for j in shown:
        r = [esc(t["group"].iat[j])] + ([] if p.stats.kind == "known" else [_n(t["n"].iat[j])])
        r += [
            v(t["raw_mean"].iat[j]),
            v(own_sd.iat[j]),
            (
                f'<span class="nw">{v(t["theta_mean"].iat[j])}</span> <span class="nw p">({v(t["theta_sd"].iat[j], 1)})'
                "</span>"
            ),
        ]
        if not known:
            r.append(
                f'<span class="nw">{v(t["sigma_mean"].iat[j])}</span> <span class="p">('
                + interval_html(v, t[res.col("sigma_low")].iat[j], t[res.col("sigma_high")].iat[j])
                + ")</span>"
            )
        moved = t["shrink_realised"].iat[j]
        steady = abs(t["raw_mean"].iat[j] - mu) > t["theta_sd"].iat[j]
        lo, hi = t[res.col("shrink_low")].iat[j], t[res.col("shrink_high")].iat[j]
        r += [
            f'<span class="nw">{t["shrink_weight"].iat[j]:.2f}</span>'
            + (
                f' <span class="p">(<span class="nw">{lo:.2f}</span> to <span class="nw">{hi:.2f}</span>)</span>'
                if np.isfinite(lo)
                else ""
            ),
            f"{moved:.2f}" if np.isfinite(moved) and steady else "–",
        ]
        if "tail_weight" in t:
            r += [f"{t['tail_weight'].iat[j]:.2f}", prob(t["p_outlying"].iat[j])]
        rows.append(r)
    return html_table(head, rows, gap, hidden)


# ---------------------------------------------------------------------------------------------
# checks and health


def _checks(res: Results, v, figs: dict) -> str:
    ch = res.checks or {}
    sp, sdc, ex = ch.get("spread"), ch.get("sd"), ch.get("extreme")
    items = []
    if sp is not None:
        items.append(
            f"<li><strong>Spread of the group means</strong>: observed {v(sp['observed'], 1)}; the share of "
            f"replicated data sets with a larger spread is {sp['p_value']:.2f}.</li>"
        )
    if ex is not None:
        who = res.labels[ex["group"]]
        items.append(
            f"<li><strong>The most extreme group</strong> (mostly {esc(label(who))}, in "
            f"{ex['group_share']:.0%} of the draws): its standardised deviation |own mean − mu| / "
            "√(tau² + v<sub>j</sub>) against the median one is matched or exceeded by the replicated data "
            f"in a share {ex['p_value']:.3f} of the draws; below 0.05 the fitted between-group distribution "
            "seldom produces a group that far beyond the typical one."
            + (
                " With heavy tails such a group does not drag the others: the model's answer to it is its "
                "tail weight and outlying flag (section on outlying groups), and the consensus value is "
                "computed with it allowed to lie far away."
                if res.problem.heavy and ex["p_value"] < 0.05
                else ""
            )
            + "</li>"
        )
    if sdc is not None:
        obs, lo, hi = (np.asarray(sdc[k], dtype=float) for k in ("observed", "low", "high"))
        out = np.flatnonzero((obs < lo) | (obs > hi))
        groups = np.asarray(sdc["groups"])
        names = ", ".join(
            f'{esc(label(res.labels[groups[i]]))} <span class="p">{v(obs[i], 1)}</span>' for i in out[:NAMED]
        ) + (f" and {whole(len(out) - NAMED)} more" if len(out) > NAMED else "")
        items.append(
            f"<li><strong>Within-group sd</strong>: {whole(len(out))} of {whole(len(groups))} groups (n ≥ 2) "
            f"have an observed sd outside the {sdc['level']:.0%} range of their replicated sds"
            + (f" (red in the picture): {names}" if len(out) else "")
            + f"; about {1 - sdc['level']:.0%} of them would be by chance alone.</li>"
        )
    return (
        '<section id="fitcheck"><h2>Model checks</h2>'
        "<p>Data replicated from the fitted model, set against the data (posterior predictive checks; "
        f"{whole(ch.get('draws', 0))} draws, from a generator seeded by the run's own seed). Shares near 0 or 1 "
        f"are the warning.</p><ul>{''.join(items)}</ul>"
        f'<div class="fig">{figs.get("predictive", "")}</div></section>'
    )


def _health(res: Results, v, figs: dict) -> str:
    diag, run = res.diagnostics, res.run
    tg = diag["targets"]
    summary = res.mode == "summary"
    rows = []

    def status(r, b, t_):
        if r is None or not np.isfinite(r):
            return '<span class="tag none">constant</span>'
        ok = r < tg["rhat_below"] and b >= tg["ess_at_least"] and t_ >= tg["ess_at_least"]
        return '<span class="tag good">✓ met</span>' if ok else '<span class="tag bad">missed</span>'

    J = res.J
    for name, sm in res.hyper.items():
        rows.append(
            [
                esc(name),
                status(sm["rhat"], sm["bulk_ess"], sm["tail_ess"]),
                rhat(sm["rhat"]),
                whole(round(sm["bulk_ess"])) if np.isfinite(sm["bulk_ess"]) else "–",
                whole(round(sm["tail_ess"])) if np.isfinite(sm["tail_ess"]) else "–",
                sig(sm["mean_mc_error"], 2),
            ]
        )
    scope = (
        f"worst of the {whole(res.summary['kept_groups'])} kept groups" if summary else f"worst of {plural(J, 'group')}"
    )
    for name, wv in (diag.get("worst") or {}).items():
        if name in res.hyper:
            continue
        what = (
            f"{esc(name)} ({scope})"
            if name in ("theta", "sigma")
            else (f"{esc(name)} (the between-group tail)" if name == "1/df" else esc(name))
        )
        r, b, t_ = wv.get("rhat_max"), wv.get("bulk_ess_min"), wv.get("tail_ess_min")
        rows.append(
            [
                what,
                status(r, b if b is not None else np.nan, t_ if t_ is not None else np.nan),
                rhat(r),
                whole(round(b)) if b is not None and np.isfinite(b) else "–",
                whole(round(t_)) if t_ is not None and np.isfinite(t_) else "–",
                "",
            ]
        )
    table = html_table(
        [
            ("draws of", False),
            ("targets", False),
            ("R-hat", True),
            ("effective draws, centre", True),
            ("effective draws, tails", True),
            ("MC error of the mean", True),
        ],
        rows,
    )
    screen = ""
    if summary:
        cr = res.summary["figures"]["classic_rhat"]
        screen = (
            "<p>"
            + esc(
                f"Every group, classic R-hat of theta from the chains' running means and variances (not split, not "
                f"rank-normalised): largest {rhat(cr['max'])}, {whole(cr['above_1.01'])} of {whole(cr['groups'])} groups "
                "at 1.01 or more. Over many groups a few exceed 1.01 by chance; a large share would mean the chains "
                "disagree."
                if cr["groups"]
                else "A classic R-hat for every group needs two or more chains."
            )
            + "</p>"
        )
    rounds = ", ".join(whole(r["draws_per_chain"]) for r in diag["rounds"])
    named = {k: x for k, x in res.hyper_draws.items() if k != "within_sd"}
    flat = plots.constant_draws(named)
    flat_txt = ""
    if flat:
        flat_txt = (
            '<p class="note">'
            + "; ".join(f"{esc(k)}: every draw is {sig(float(np.asarray(named[k]).ravel()[0]), 4)}" for k in flat)
            + " (fixed, or pinned at the end of its grid), so no trace is drawn.</p>"
        )
    traces = figs.get("traces", "")
    return (
        '<section id="health"><h2>Run health</h2>'
        f"<p>Whether the chains can be trusted: for each quantity, R-hat (below {tg['rhat_below']}: the chains "
        "agree) and the effective number of independent draws in the centre and in the tails of its distribution "
        f"(at least {tg['ess_at_least']:g} each; rank-normalised split R-hat and ESS). A quantity drawn on a grid "
        "(nu) is discrete, so its figures are rough guides.</p>"
        + table
        + screen
        + f'<p class="note">Draws per chain after each round: {esc(rounds)}; {run["chains"]} chains after '
        f"{whole(run['warmup'])} warm-up sweeps; sampling took {run['seconds']:.1f} s.</p>"
        + flat_txt
        + (_fold("Draws by chain: traces and rank histograms", f'<div class="fig">{traces}</div>') if traces else "")
        + "</section>"
    )


def _how(res: Results) -> str:
    fig = res.summary["figures"]
    erows = [
        [
            esc(
                "rank interval"
                if name == "rank_limit_error"
                else name.replace("_limit_error", "").replace("_error", "")
            ),
            sig(e["median"], 3),
            sig(e["max"], 3),
        ]
        for name, e in fig["limit_error"].items()
    ]
    methods = (
        '<dl class="kv">'
        + "".join(f"<dt>{esc(k.replace('_', ' '))}</dt><dd>{esc(val)}</dd>" for k, val in res.methods.items())
        + "</dl>"
    )
    return (
        '<section id="how"><h2>How computed</h2>'
        "<p>With this many groups the chains kept running summaries instead of every draw. Means and probabilities "
        "are exact counts over all draws; interval limits and ranks of groups not kept whole carry a bound on "
        "their error, below (user units; ranks in ranks).</p>"
        + html_table([("quantity", False), ("median bound", True), ("largest bound", True)], erows)
        + '<p class="note">A bound is what the method can guarantee; the error in a given group is usually smaller. '
        "Kept groups have no such error.</p>" + _fold("The methods, one by one", methods) + "</section>"
    )


def _setup(res: Results, command) -> str:
    p = res.problem
    st = p.stats
    run = res.run
    within = p.model.within
    lines = ["y_ij    ~ N(theta_j, sigma_j^2)     measurement i of group j"]
    centre = "mu" if p.design is None else "mu + x_j'beta"
    if p.heavy:
        lines.append(
            f"theta_j ~ N({centre}, tau^2 / lambda_j),  lambda_j ~ Gamma(df/2, rate df/2)   (Student-t, heavy tails)"
        )
    elif p.design is None:
        lines.append("theta_j ~ N(mu, tau^2)              group means around the pooled mean")
    else:
        lines.append("theta_j ~ N(mu + x_j'beta, tau^2)      group means around the centre of their level")
    if within == "separate":
        lines.append("sigma_j^2 ~ Scaled-Inv-chi2(nu, s^2)  each group its own within-group variance, pooled too")
    elif within == "shared":
        lines[0] = "y_ij    ~ N(theta_j, sigma^2)       one within-group sd for every group"
    else:
        lines[0] = "ybar_j  ~ N(theta_j, se_j^2)        each group's estimate with its given standard error"
    priors = "".join(f"<dt>{esc(k)}</dt><dd>{esc(val)}</dd>" for k, val in p.model.priors().items())
    kv = [
        ("source", st.source),
        ("file SHA-256", st.file_sha256 or _files_read(st.meta.get("file_list"))),
        ("statistics SHA-256", st.fingerprint()),
        ("groups", whole(st.J)),
        ("measurements", whole(st.N) if st.kind == "raw" else "– (estimates with standard errors)"),
        (
            "chains × draws",
            (f"{run['chains']} × {whole(run['draws_per_chain'])} after {whole(run['warmup'])} warm-up sweeps"),
        ),
        ("seed", run["seed"]),
    ]
    if command:
        kv.append(("command", " ".join(str(c) for c in command)))
    kv.append(
        (
            "report options",
            ", ".join(f"{k}={val}" for k, val in res.options.to_dict().items() if val not in (None, [], ())),
        )
    )
    inner = (
        f'<pre class="model">{esc(chr(10).join(lines))}</pre><h3>Priors</h3><dl class="kv">{priors}</dl>'
        '<h3>Data fingerprint and run</h3><dl class="kv">'
        + "".join(f'<dt>{esc(k)}</dt><dd class="mono">{esc(val)}</dd>' for k, val in kv)
        + "</dl>"
    )
    return (
        '<section id="setup"><h2>Model and data</h2>'
        + _fold("The model, its priors, the data's fingerprint and the command", inner)
        + "</section>"
    )
