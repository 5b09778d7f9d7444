"""report.html: one self-contained page (inline CSS and SVG, no script, no network).

Every piece of text that comes from the data or the command line passes through `esc`
(html.escape with quotes), and the SVG pictures are written by report/svg.py, which escapes every
text it draws. Tables with many groups show the head and the tail; groups.csv holds every row.
"""
from __future__ import annotations

import html
import math
import time

import numpy as np

from .. import __version__
from .assemble import Results
from .groups import COLUMNS, PREDICTION_SEED
from .plots import MANY, heat_hex

TABLE_ROWS = 60  # rows shown per table; the rest is in groups.csv

CAUTION = ("Statistical screening supports, and never replaces, the applicable standards, local codes and "
           "licensed professional judgment. Where a result feeds a decision that can hurt people or "
           "livelihoods (accepting a part, dropping a supplier, failing a laboratory), that decision "
           "belongs to the people and the rules responsible for it; use these numbers as evidence for them.")


def esc(x) -> str:
    return html.escape(str(x), quote=True)


# ---------------------------------------------------------------------------------------------
# number formats

class Fmt:
    """Values shown to a precision set by their uncertainty: two significant digits of a typical
    posterior sd, so 412.37 ± 3 reads 412.4 and 1000000000.123 ± 0.01 keeps its last digits."""

    def __init__(self, typical_sd: float):
        if typical_sd > 0 and math.isfinite(typical_sd):
            self.dec = int(min(10, max(0, 1 - math.floor(math.log10(typical_sd)))))
        else:
            self.dec = 4

    def v(self, x, extra: int = 0) -> str:
        if x is None or not np.isfinite(x):
            return "–"
        text = f"{x:,.{self.dec + extra}f}".replace(",", "\u2009")
        return text[1:] if text.startswith("-") and not any(c in "123456789" for c in text) else text  # no "-0.0"

    @staticmethod
    def p(x) -> str:
        if x is None or not np.isfinite(x):
            return "–"
        if x < 0.0005:
            return "<0.001"
        if x > 0.9995:
            return ">0.999"
        return f"{x:.3f}"

    @staticmethod
    def g(x, digits: int = 3) -> str:
        if x is None or (isinstance(x, float) and not math.isfinite(x)):
            return "–"
        return f"{x:.{digits}g}"


def _p_eq(x) -> str:
    text = Fmt.p(x)
    return text[0] + " " + text[1:] if text[0] in "<>" else "= " + text


def _interval(f: Fmt, lo, hi, extra: int = 0) -> str:
    return f'{f.v(lo, extra)} to {f.v(hi, extra)}'


# ---------------------------------------------------------------------------------------------
# page pieces

CSS = """
:root{--ink:#1f2a36;--muted:#5d6773;--line:#dde1e6;--paper:#fbfaf7;--card:#ffffff;--post:#1f6f78;
--raw:#a7763c;--alarm:#b23a2a;--ok:#2f7d4f;--soft:#eef4f3}
*{box-sizing:border-box}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.5 "DejaVu Sans","Segoe UI",Helvetica,Arial,sans-serif}
header.top{background:var(--ink);color:#fff;padding:22px 0 18px;border-bottom:5px solid var(--post)}
.wrap{max-width:1120px;margin:0 auto;padding:0 26px}
header.top h1{margin:0 0 4px;font-size:25px;font-weight:600;letter-spacing:.2px}
header.top .sub{color:#c9d3dc;font-size:13.5px}
header.top .flag{background:var(--alarm);color:#fff;padding:1px 8px;border-radius:3px}
nav.toc{background:#fff;border-bottom:1px solid var(--line);font-size:13px}
nav.toc a{display:inline-block;padding:8px 10px 8px 0;margin-right:8px;color:var(--post);text-decoration:none}
section{background:var(--card);border:1px solid var(--line);border-radius:6px;margin:18px 0;padding:6px 22px 16px}
h2{font-size:19px;margin:14px 0 8px;padding-bottom:6px;border-bottom:2px solid var(--soft)}
h3{font-size:15px;margin:16px 0 6px;color:var(--post)}
p.note,.note{color:var(--muted);font-size:13px}
.caution{border-left:6px solid var(--raw);background:#fff8ee;padding:12px 16px;margin:18px 0;border-radius:4px}
.caution strong{display:block;margin-bottom:2px}
.alarm{border:2px solid var(--alarm);background:#fdf0ee;color:#6d1d12;padding:14px 18px;margin:18px 0;border-radius:6px}
.alarm h2{border:0;color:var(--alarm);margin:0 0 6px;font-size:21px}
.good{border-left:6px solid var(--ok);background:#eef7f1;padding:10px 16px;margin:18px 0;border-radius:4px}
.cards{display:grid;grid-template-columns:repeat(auto-fit,minmax(200px,1fr));gap:12px;margin:10px 0 6px}
.card{background:var(--soft);border-radius:6px;padding:10px 14px}
.card .k{font-size:12px;color:var(--muted);text-transform:uppercase;letter-spacing:.6px}
.card .v{font-size:21px;font-weight:600;margin:2px 0}
.card .i{font-size:12.5px;color:var(--muted)}
table{border-collapse:collapse;width:100%;font-size:13px;margin:6px 0 10px;font-variant-numeric:tabular-nums}
th{text-align:left;background:#f1f3f5;font-weight:600;padding:6px 8px;border-bottom:2px solid var(--line);position:sticky;top:0}
td{padding:4px 8px;border-bottom:1px solid #eef0f2;vertical-align:top}
td.n,th.n{text-align:right;white-space:nowrap}
td:first-child{max-width:22em;overflow-wrap:anywhere}
tbody tr:nth-child(even){background:#fafbfc}
tr.gap td{text-align:center;color:var(--muted);font-style:italic;background:#fff}
.scroll{overflow-x:auto}
.tag{display:inline-block;padding:0 7px;border-radius:9px;font-size:12px;font-weight:600}
.tag.action{background:var(--alarm);color:#fff}.tag.warning{background:#f0c36d;color:#3a2a00}.tag.none{color:var(--muted)}
.fig{margin:8px 0 4px;text-align:center}
svg.figure{width:100%;height:auto}
dl.kv{display:grid;grid-template-columns:max-content 1fr;gap:3px 16px;font-size:13.5px;margin:6px 0}
dl.kv dt{color:var(--muted)}dl.kv dd{margin:0;overflow-wrap:anywhere}
code,.mono{font-family:"DejaVu Sans Mono",Consolas,monospace;font-size:12.5px}
pre.model{background:var(--soft);padding:10px 14px;border-radius:5px;font-size:13px;overflow-x:auto}
footer{color:var(--muted);font-size:12px;padding:10px 0 30px}
@media print{nav.toc{display:none}section{break-inside:avoid-page;border:0}th{position:static}}
"""


def _table(head: list[tuple[str, bool]], rows: list[list[str]], gap_after: int | None = None, hidden: int = 0) -> str:
    """head: (title, numeric) pairs; cells are already escaped HTML."""
    out = ['<div class="scroll"><table><thead><tr>']
    out += [f'<th class="{"n" if num else ""}">{t}</th>' for t, num in head]
    out.append("</tr></thead><tbody>")
    for i, r in enumerate(rows):
        out.append("<tr>" + "".join(f'<td class="{"n" if num else ""}">{c}</td>' for c, (_, num) in zip(r, head)) + "</tr>")
        if gap_after is not None and i == gap_after and hidden:
            out.append(f'<tr class="gap"><td colspan="{len(head)}">… {hidden} more groups, in groups.csv …</td></tr>')
    out.append("</tbody></table></div>")
    return "".join(out)


def _head_tail(order: np.ndarray) -> tuple[np.ndarray, int | None, int]:
    if len(order) <= TABLE_ROWS:
        return order, None, 0
    h = TABLE_ROWS // 2
    return np.concatenate([order[:h], order[-h:]]), h - 1, len(order) - 2 * h


def _card(k: str, v: str, i: str = "") -> str:
    return f'<div class="card"><div class="k">{k}</div><div class="v">{v}</div><div class="i">{i}</div></div>'


def _best_and_shrink_cards(title: str, best: str, label: str, t, j: int, k: int) -> list[str]:
    """The 'at a glance' cards shared by the full and the summary report: the group most often best
    (row j of the group table t) and the spread of the shrinkage weights."""
    w = t["shrink_weight"].to_numpy()
    return [
        _card(f"{title} ({esc(best)})", esc(plots_label(label)),
              f"P(best) {Fmt.p(t['p_best'].iat[j])}; P(top {k}) {Fmt.p(t['p_top_k'].iat[j])}"),
        _card("shrinkage weight", f"{np.median(w):.2f}", f"median over groups; range {w.min():.2f} to {w.max():.2f}"),
    ]


def _summ_cells(f: Fmt, s: dict | None, extra: int = 0) -> tuple[str, str]:
    if s is None:
        return "–", "–"
    return f.v(s["mean"], extra), _interval(f, s["low"], s["high"], extra)


# ---------------------------------------------------------------------------------------------

def render(res: Results, summary: dict | None = None) -> str:
    """The whole page as one string."""
    fit, o, t, v, lab = res.fit, res.options, res.table, res.view, res.lab
    p = fit.problem
    st = p.stats
    f = Fmt(float(np.median(t["theta_sd"])))
    lvl = f"{o.level:.0%}" if round(o.level * 100) == o.level * 100 else f"{o.level:.1%}"
    missed = not fit.targets_met
    parts: list[str] = []
    add = parts.append
    created = (summary or {}).get("created_utc") or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    source = st.source
    title = "Group comparison"
    add("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
        f"<title>{esc(title)}: {esc(source)}</title><style>{CSS}</style></head><body>")
    add(f'<header class="top"><div class="wrap"><h1>{title}: {v.J} groups, partial pooling</h1>'
        f'<div class="sub">data {esc(source)} · {esc(p.model.within)} within-group variances · '
        f'{fit.raw.settings.chains} chains × {fit.raw.mu.shape[1]} draws · made {esc(created)} by pooling {esc(__version__)}'
        + (' · <strong class="flag">DIAGNOSTICS TARGETS MISSED</strong>' if missed else "") + "</div>"
        "</div></header>")
    sections = [("glance", "At a glance"), ("health", "Run health"), ("groups", "Groups"), ("pull", "Pull toward the pool"),
                ("order", "Ranking"), ("limits", "Limits"), ("h2h", "Head to head"), ("labs", "Interlaboratory view"),
                ("fitcheck", "Model checks"), ("setup", "Model and data"), ("guide", "Column guide")]
    have = {"limits": o.threshold is not None or o.lower is not None or o.upper is not None, "h2h": res.pairs is not None}
    add('<nav class="toc"><div class="wrap">' + "".join(
        f'<a href="#{a}">{b}</a>' for a, b in sections if have.get(a, True)) + "</div></nav>")
    add('<main class="wrap">')

    # --- warnings first: the caution and the diagnostics ---------------------------------------
    add(f'<div class="caution"><strong>Read this first</strong>{esc(CAUTION)}</div>')
    diag = fit.diagnostics()
    tg = diag["targets"]
    if missed:
        items = "".join(
            f"<li>{esc(m.get('name'))}{esc(' ' + repr(m['group'])) if 'group' in m else ''}: "
            f"R-hat {Fmt.g(m.get('rhat'), 4)}, bulk ESS {Fmt.g(m.get('bulk_ess'), 4)}, tail ESS {Fmt.g(m.get('tail_ess'), 4)}</li>"
            for m in diag["missed"][:12])
        add('<div class="alarm"><h2>Diagnostics targets were MISSED</h2>'
            f"<p>{diag['missed_count']} quantities missed the targets (R-hat below {tg['rhat_below']}, bulk and tail "
            f"effective sample size at least {tg['ess_at_least']:g}) after {fit.raw.mu.shape[1]} draws per chain. "
            "The chains may not have explored the posterior: every number and picture in this report may be "
            "wrong. Rerun with more draws (--draws, --max-draws) or a more informative prior before using it.</p>"
            f"<ul>{items}</ul></div>")
    else:
        add(f'<div class="good">Diagnostics targets met: every checked quantity has R-hat below {tg["rhat_below"]} '
            f'and bulk and tail effective sample size of at least {tg["ess_at_least"]:g}.</div>')

    # --- at a glance ------------------------------------------------------------------------------
    best_j = int(np.argmax(t["p_best"].to_numpy()))
    cs = lab["consensus"]
    cards = [_card("pooled mean mu", f.v(cs["mean"]), f"{lvl} interval {_interval(f, cs['low'], cs['high'])}"),
             _card("between-group sd tau", f.v(lab["between_sd"]["mean"]),
                   f"{lvl} interval {_interval(f, lab['between_sd']['low'], lab['between_sd']['high'])}")]
    if lab["repeatability_sd"] is not None:
        r = lab["repeatability_sd"]
        cards.append(_card("typical within-group sd", f.v(r["mean"]), f"{lvl} interval {_interval(f, r['low'], r['high'])}"))
    cards += _best_and_shrink_cards("most likely best", o.best, v.labels[best_j], t, best_j, int(min(o.k, v.J)))
    add(f'<section id="glance"><h2>At a glance</h2><div class="cards">{"".join(cards)}</div>'
        f'<p class="note">{st.J} groups' + (f", {st.N} measurements" if st.kind == "raw" else "")
        + f". Intervals are central {lvl} credible intervals; every probability is the share of "
        f"{v.S} posterior draws in which the statement holds.</p></section>")

    # --- run health -----------------------------------------------------------------------------
    rows = []
    for name, s in fit.hyper_summary().items():
        rows.append([esc(name), f.v(s["mean"], 1), f.v(s["sd"], 1), _interval(f, s["q025"], s["q975"], 1),
                     Fmt.g(s["rhat"], 4), f"{s['bulk_ess']:.0f}", f"{s['tail_ess']:.0f}", Fmt.g(s["mean_mc_error"], 2)])
    hyper_tab = _table([("quantity", False), ("mean", True), ("sd", True), ("95% interval", True), ("R-hat", True),
                        ("bulk ESS", True), ("tail ESS", True), ("MC error of mean", True)], rows)
    wrows = []
    for name, wv in (diag.get("worst") or {}).items():
        wrows.append([esc(name), Fmt.g(wv.get("rhat_max"), 4), Fmt.g(wv.get("bulk_ess_min"), 4), Fmt.g(wv.get("tail_ess_min"), 4)])
    worst_tab = _table([("draws of", False), ("largest R-hat", True), ("smallest bulk ESS", True),
                        ("smallest tail ESS", True)], wrows) if wrows else ""
    rounds = ", ".join(str(r["draws_per_chain"]) for r in diag["rounds"])
    add('<section id="health"><h2>Run health</h2>'
        f"<p>Hyperparameters (nu, if drawn from a grid, is discrete: its R-hat and ESS are rough guides).</p>{hyper_tab}"
        f"<h3>Worst over all groups</h3>{worst_tab}"
        f'<p class="note">Targets: R-hat below {tg["rhat_below"]}, ESS at least {tg["ess_at_least"]:g} '
        f"(rank-normalised split R-hat and ESS). Draws per chain after each round: {esc(rounds)}. "
        f"Sampling took {fit.raw.seconds:.1f} s. The traces are under Model checks.</p></section>")

    # --- groups: the order, then the estimates and how far they were pulled ----------------------
    order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    shown, gap, hidden = _head_tail(order)
    k = int(min(o.k, v.J))
    head = [("group", False), ("n", True), ("posterior mean", True), (f"{lvl} interval", True), ("mean rank", True),
            (f"rank {lvl}", True), ("P(best)", True), (f"P(top {k})", True)]
    if o.threshold is not None:
        th_txt = esc(f"{o.threshold:g}")
        head += [(f"P(&gt; {th_txt})", True), (f"P(&lt; {th_txt})", True)]
    rows = []
    for j in shown:
        r = [esc(v.labels[j]), _n(t["n"].iat[j]), f.v(t["theta_mean"].iat[j]),
             _interval(f, t["theta_low"].iat[j], t["theta_high"].iat[j]), f"{t['rank_mean'].iat[j]:.1f}",
             f"{int(t['rank_low'].iat[j])}–{int(t['rank_high'].iat[j])}", Fmt.p(t["p_best"].iat[j]),
             Fmt.p(t["p_top_k"].iat[j])]
        if o.threshold is not None:
            r += [Fmt.p(t["p_above"].iat[j]), Fmt.p(t["p_below"].iat[j])]
        rows.append(r)
    add('<section id="groups"><h2>Groups</h2>'
        f"<p>Sorted by mean rank, best first ({'highest' if o.best == 'highest' else 'lowest'} theta is best). "
        f"The rank interval holds the group's rank in {lvl} of the draws; P(top {k}) is the chance of being among "
        f"the {k} best.</p>" + _table(head, rows, gap, hidden) + "</section>")

    own = "own sd" if v.within != "known" else "std error"
    own_sd = t["std_error"] if v.within == "known" else t["raw_sd"]
    head = [("group", False), ("n", True), ("own mean", True), (own, True), ("posterior mean", True),
            ("posterior sd", True)]
    if v.within != "known":
        head += [("sigma<sub>j</sub>", True), (f"sigma<sub>j</sub> {lvl}", True)]
    head += [("shrinkage", True), (f"shrinkage {lvl}", True), ("moved", True)]
    rows = []
    for j in shown:
        r = [esc(v.labels[j]), _n(t["n"].iat[j]), f.v(t["raw_mean"].iat[j]), f.v(own_sd.iat[j]),
             f.v(t["theta_mean"].iat[j]), f.v(t["theta_sd"].iat[j], 1)]
        if v.within != "known":
            r += [f.v(t["sigma_mean"].iat[j]), _interval(f, t["sigma_low"].iat[j], t["sigma_high"].iat[j])]
        moved = t["shrink_realised"].iat[j]
        r += [f"{t['shrink_weight'].iat[j]:.2f}", f"{t['shrink_low'].iat[j]:.2f} to {t['shrink_high'].iat[j]:.2f}",
              f"{moved:.2f}" if np.isfinite(moved) else "–"]
        rows.append(r)
    estimates = _table(head, rows, gap, hidden)

    # --- pictures of pulling and intervals -------------------------------------------------------
    add('<section id="pull"><h2>Pull toward the pool</h2>'
        "<p>Each group's own mean (open circle, area by the number of measurements) and where partial pooling puts it "
        "(filled dot). Small or noisy groups travel further toward the pooled mean.</p>"
        f'<div class="fig">{res.figures.get("shrinkage", "")}</div>'
        "<h3>Estimates and shrinkage</h3><p>Shrinkage is the posterior mean of the weight "
        "v<sub>j</sub>/(v<sub>j</sub>+tau²) that partial pooling gives the pooled mean, with v<sub>j</sub> = "
        "sigma<sub>j</sub>²/n<sub>j</sub> (the squared standard error for given estimates): near 0 the group speaks "
        "for itself, near 1 it is mostly the pool. <em>Moved</em> is the share of the way from the group's own mean "
        "to mu that its estimate actually travelled (unsteady for groups whose own mean sits close to mu).</p>"
        + estimates +
        f"<h3>Credible intervals</h3><div class=\"fig\">{res.figures.get('intervals', '')}</div></section>")

    # --- ranks ----------------------------------------------------------------------------------
    note = ("every group over every rank" if v.J <= MANY else
            f"the {len(res.heat['rows'])} groups with the best mean rank, over ranks 1 to {MANY} (the last column collects "
            f"every rank beyond {MANY})")
    add('<section id="order"><h2>Ranking</h2>'
        f"<p>How sure is the order? The map shows P(rank = r) for {note}. A long smear along a row means the data "
        "cannot place that group; a dark single cell means they can.</p>"
        f'<div class="fig">{res.figures.get("ranks", "")}</div></section>')

    # --- limits ---------------------------------------------------------------------------------
    if have["limits"]:
        add(_limits(res, f, lvl))
    if res.pairs is not None:
        add(_pairs(res))
    add(_labs(res, f, lvl))

    # --- model checks ---------------------------------------------------------------------------
    sp = res.spread
    sdc = res.sd
    msg = "" if sp is None else (
        f"Spread of the group means: observed {f.v(sp['observed'], 1)}, posterior predictive p = {sp['p_value']:.2f} "
        f"({sp['draws']} draws; values near 0 or 1 say the model misjudges the spread between groups).")
    if sdc is not None:
        msg += (f" Within-group sd: {sdc['outside']} of {len(sdc['groups'])} groups fall outside their {sdc['level']:.0%} "
                f"replicated range and {sdc['extreme']} have p below 0.01 or above 0.99.")
    add('<section id="fitcheck"><h2>Model checks</h2>'
        f"<h3>Replicated data against the data</h3><p>{msg}</p>"
        f'<div class="fig">{res.figures.get("predictive", "")}</div>'
        "<h3>Hyperparameter draws</h3><p>Chains should overlap like one fuzzy band, and the rank histograms "
        "should be flat (the dotted line).</p>"
        f'<div class="fig">{res.figures.get("traces", "")}</div></section>')

    # --- model and data ---------------------------------------------------------------------------
    add(_setup(res, summary))

    # --- guide ------------------------------------------------------------------------------------
    add('<section id="guide"><h2>Column guide (groups.csv)</h2><dl class="kv">'
        + "".join(f"<dt><code>{esc(c)}</code></dt><dd>{esc(COLUMNS[c])}</dd>" for c in t.columns if c in COLUMNS)
        + f'</dl><p class="note">Interval level {lvl}; k = {k}; best = {esc(o.best)}.</p></section>')
    add(f"<footer>Made by pooling {esc(__version__)}. {esc(CAUTION)}</footer></main></body></html>")
    return "".join(parts)


def _n(n) -> str:
    return f"{int(n)}" if n > 0 else "–"  # the known structure may not know the group sizes


def plots_label(label: str) -> str:
    return label if len(label) <= 40 else label[:39] + "…"


def threshold_sentence(t, threshold: float, tail: str = "") -> str:
    """How many groups are clearly above and below the threshold (probability over 0.95), as a paragraph."""
    above = int(np.sum(t["p_above"] > 0.95))
    below = int(np.sum(t["p_below"] > 0.95))
    return (f"<p>Threshold {esc(f'{threshold:g}')}: {above:,} groups have P(theta above it) over 0.95, {below:,} have "
            f"P(theta below it) over 0.95; {len(t) - above - below:,} are undecided.{' ' + tail if tail else ''}</p>")


def _limits(res: Results, f: Fmt, lvl: str) -> str:
    o, t, v = res.options, res.table, res.view
    lim = []
    if o.lower is not None:
        lim.append(f"lower limit {esc(f'{o.lower:g}')}")
    if o.upper is not None:
        lim.append(f"upper limit {esc(f'{o.upper:g}')}")
    out = ['<section id="limits"><h2>Limits</h2>']
    if o.threshold is not None:
        out.append(threshold_sentence(t, o.threshold, "P(above) is in the Groups table."))
    if lim and "outside_mean" in t:
        ng = res.new_group
        out.append(f"<p>Specification: {' and '.join(lim)}. The predicted fraction outside is the posterior mean of "
                   "P(a new measurement of the group falls outside | theta<sub>j</sub>, sigma<sub>j</sub>), with its "
                   f"{lvl} interval; it uses each group's own within-group sd.</p>")
        if ng is not None:
            card = _card("a group not yet seen", f"{100 * ng['mean']:.2f}%",
                         f"{lvl} interval {100 * ng['low']:.2f}% to {100 * ng['high']:.2f}%; "
                         f"MC error {100 * ng['mc_error']:.2f}%")
            out.append(f'<div class="cards">{card}</div>'
                       f'<p class="note">For a new group each draw takes theta<sub>new</sub> ~ N(mu, tau²)'
                       + (" and sigma<sub>new</sub>² ~ Scaled-Inv-χ²(nu, s²)" if v.within == "separate" else
                          " and the shared sigma")
                       + f", from a fixed-seed generator (seed {PREDICTION_SEED}).</p>")
        order = np.argsort(-t["outside_mean"].to_numpy(), kind="stable")[: min(25, v.J)]
        rows = [[esc(v.labels[j]), _n(t["n"].iat[j]), f.v(t["theta_mean"].iat[j]), f.v(t["sigma_mean"].iat[j]),
                 f"{100 * t['outside_mean'].iat[j]:.2f}%",
                 f"{100 * t['outside_low'].iat[j]:.2f}% to {100 * t['outside_high'].iat[j]:.2f}%"] for j in order]
        out.append(f"<h3>Groups with the largest predicted fraction outside (up to 25)</h3>"
                   + _table([("group", False), ("n", True), ("theta", True), ("sigma", True), ("outside", True),
                             (f"{lvl} interval", True)], rows))
    elif lim:
        out.append(f"<p>Specification: {' and '.join(lim)}. The fraction of future measurements outside needs a "
                   "within-group sd; with given standard errors (the known structure) there is none, so it is not shown.</p>")
    out.append("</section>")
    return "".join(out)


def _pairs(res: Results) -> str:
    df = res.pairs
    names = list(df.index)
    head = "".join(f'<th class="n">{esc(plots_label(c))}</th>' for c in names)
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
            cells.append(f'<td class="n" style="background:{bg};color:{fg}">{Fmt.p(x)}</td>')
        body.append(f"<tr><th>{esc(plots_label(name))}</th>{''.join(cells)}</tr>")
    return ('<section id="h2h"><h2>Head to head</h2><p>Each cell is P(theta of the row group &gt; theta of the column '
            "group), the share of draws in which it holds.</p>"
            f'<div class="scroll"><table><thead><tr><th>row &gt; column</th>{head}</tr></thead><tbody>{"".join(body)}'
            "</tbody></table></div></section>")


def _labs(res: Results, f: Fmt, lvl: str) -> str:
    lab, t, v, o = res.lab, res.table, res.view, res.options
    an = lab["anova"]
    rows = []

    def row(name, s, classical, extra=0):
        m, i = _summ_cells(f, s, extra)
        rows.append([name, m, i, classical])

    re_ = lab.get("random_effects")
    if an:
        row("consensus value (mu)", lab["consensus"], f.v(an["grand_mean"]) + " (grand mean)")
        row("between-lab sd s<sub>L</sub> (tau)", lab["between_sd"],
            f.v(an["between_sd"]) + (" (truncated at 0)" if an["truncated"] else ""))
    elif re_:
        row("consensus value (mu)", lab["consensus"], f"{f.v(re_['consensus'])} ± {f.v(re_['consensus_se'], 1)} (se)")
        row("between-lab sd s<sub>L</sub> (tau)", lab["between_sd"],
            f.v(re_["between_sd"]) + (" (truncated at 0)" if re_["truncated"] else ""))
    else:
        row("consensus value (mu)", lab["consensus"], "–")
        row("between-lab sd s<sub>L</sub> (tau)", lab["between_sd"], "–")
    if lab["repeatability_sd"] is not None:
        row("repeatability sd s<sub>r</sub>", lab["repeatability_sd"], f.v(an["repeatability_sd"]) if an else "–")
        row("reproducibility sd s<sub>R</sub>", lab["reproducibility_sd"], f.v(an["reproducibility_sd"]) if an else "–")
        row("repeatability limit r = 2.8 s<sub>r</sub>", lab["repeatability_limit"], f.v(2.8 * an["repeatability_sd"]) if an else "–")
        row("reproducibility limit R = 2.8 s<sub>R</sub>", lab["reproducibility_limit"], f.v(2.8 * an["reproducibility_sd"]) if an else "–")
        icc = lab["icc"]
        rows.append(["intraclass correlation", f"{icc['mean']:.3f}", f"{icc['low']:.3f} to {icc['high']:.3f}",
                     f"{an['icc']:.3f}" if an else "–"])
    classical = "one-way ANOVA (moments)" if an or not re_ else "DerSimonian-Laird (moments)"
    comp = _table([("quantity", False), ("posterior mean", True), (f"{lvl} interval", True),
                   (classical, True)], rows)
    anova_note = ""
    if re_ and not an:
        anova_note = (f"<p class=\"note\">DerSimonian-Laird random-effects estimate from the {re_['k']} estimates and their "
                      f"standard errors: Q = {re_['q']:.3g} on {re_['df']} df, p {_p_eq(re_['p_value'])}, I² = "
                      f"{re_['i2']:.0%}; tau² = max(0, (Q − df) / (Σw − Σw²/Σw)) with w = 1/se², and the consensus is "
                      "the mean weighted by 1/(se² + tau²). Its standard error ignores the uncertainty of tau, which "
                      "the posterior interval includes.</p>")
    if an:
        anova_note = (f"<p class=\"note\">ANOVA: MS between {Fmt.g(an['ms_between'], 5)} on {an['df_between']} df, MS within "
                      f"{Fmt.g(an['ms_within'], 5)} on {an['df_within']:g} df, F = {an['f']:.3g}, p {_p_eq(an['p_value'])}; "
                      f"s<sub>L</sub>² = (MS between − MS within) / n0 with n0 = {an['n0']:.3g} (ISO 5725-2 for unequal group sizes).</p>")
    zb = lab["z_basis"]
    labs = lab["labs"]
    order = np.argsort(-np.abs(labs["bias_mean"].to_numpy()), kind="stable")
    shown, gap, hidden = _head_tail(order)
    head = [("lab", False), ("n", True), ("own mean", True), ("bias θ−μ", True), (f"{lvl} interval", True)]
    if o.allowed_bias is not None:
        head.append((f"P(|bias| &gt; {esc(f'{o.allowed_bias:g}')})", True))
    head += [("z", True), ("z signal", False)]
    body = []
    for j in shown:
        r = [esc(v.labels[j]), _n(labs["n"].iat[j]), f.v(labs["raw_mean"].iat[j]), f.v(labs["bias_mean"].iat[j]),
             _interval(f, labs["bias_low"].iat[j], labs["bias_high"].iat[j])]
        if o.allowed_bias is not None:
            r.append(Fmt.p(labs["p_bias_over"].iat[j]))
        sig = labs["z_signal"].iat[j]
        r += [f"{labs['z_score'].iat[j]:.2f}" if np.isfinite(labs["z_score"].iat[j]) else "–",
              f'<span class="tag {esc(sig)}">{esc(sig)}</span>' if sig else "–"]
        body.append(r)
    ag = lab["agreement"]
    return ('<section id="labs"><h2>Interlaboratory view</h2>'
            "<p>When the groups are laboratories measuring one material: the consensus value, the variance components in "
            "the terms of ISO 5725, and each lab's bias. Beside the posterior stand the classical comparators, so you "
            "can see where the two approaches agree.</p>" + comp + anova_note
            + "<h3>Bias and z-scores, largest bias first</h3>"
            + f"<p>z = (own mean − x<sub>pt</sub>) / sigma<sub>pt</sub> with x<sub>pt</sub> = {f.v(zb['assigned'], 1)} "
            f"({esc(zb['assigned_from'])}) and sigma<sub>pt</sub> = {f.v(zb['sigma_pt'], 1)} ({esc(zb['sigma_pt_from'])}). "
            "ISO 13528 signals: |z| ≤ 2 none, 2 &lt; |z| &lt; 3 warning, |z| ≥ 3 action. "
            f"Here {ag['z_action']} labs have an action signal and {ag['z_warning']} a warning; the {lvl} bias interval "
            f"excludes zero for {ag['interval_excludes_0']} labs; {ag['both']} labs are flagged both ways.</p>"
            + _table(head, body, gap, hidden) + "</section>")


def _setup(res: Results, summary: dict | None) -> str:
    fit, v = res.fit, res.view
    p = fit.problem
    st = p.stats
    s = fit.raw.settings
    within = p.model.within
    lines = ["y_ij    ~ N(theta_j, sigma_j^2)     measurement i of group j",
             "theta_j ~ N(mu, tau^2)              group means around the pooled mean"]
    if within == "separate":
        lines.append("sigma_j^2 ~ Scaled-Inv-chi2(nu, s^2)  each group its own within-group variance, pooled too")
    elif within == "shared":
        lines[0] = "y_ij    ~ N(theta_j, sigma^2)       one within-group sd for every group"
    else:
        lines[0] = "ybar_j  ~ N(theta_j, se_j^2)        each group's estimate with its given standard error"
    priors = "".join(f"<dt>{esc(k)}</dt><dd>{esc(val)}</dd>" for k, val in p.model.priors().items())
    cmd = (summary or {}).get("command")
    kv = [("source", st.source), ("file SHA-256", st.file_sha256 or "– (not read from a file)"),
          ("statistics SHA-256", st.fingerprint()), ("groups", st.J),
          ("measurements", st.N if st.kind == "raw" else "– (estimates with standard errors)"),
          ("chains × draws", f"{s.chains} × {fit.raw.mu.shape[1]} after {s.warmup} warm-up sweeps"),
          ("seed", fit.raw.seed), ("prediction seed", f"{PREDICTION_SEED} (new groups and model checks)")]
    if cmd:
        kv.append(("command", " ".join(str(c) for c in cmd)))
    kv.append(("report options", ", ".join(f"{k}={val}" for k, val in res.options.to_dict().items()
                                           if val not in (None, [], ()) and k != "prediction_seed")))
    return ('<section id="setup"><h2>Model and data</h2>'
            f'<pre class="model">{esc(chr(10).join(lines))}</pre><h3>Priors</h3><dl class="kv">{priors}</dl>'
            '<h3>Data fingerprint and run</h3><dl class="kv">'
            + "".join(f"<dt>{esc(k)}</dt><dd class=\"mono\">{esc(val)}</dd>" for k, val in kv) + "</dl></section>")
