"""report.html: one self-contained page (inline CSS and SVG, no script, no network), for both ways of running.

The page presents a results.Results and computes nothing from draws. Every piece of text that comes from
the data or the command line passes through `esc` (html.escape with quotes), and the SVG pictures are
written by report/svg.py, which escapes every text it draws. Tables with many groups show the head and
the tail; groups.csv holds every row.
"""
from __future__ import annotations

import html
import math
import time

import numpy as np

from .. import __version__
from ..asked import level_label
from ..results import Results, describe_column
from . import plots
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


def _summ_cells(f: Fmt, s: dict | None, extra: int = 0) -> tuple[str, str]:
    if s is None:
        return "–", "–"
    return f.v(s["mean"], extra), _interval(f, s["low"], s["high"], extra)


def _n(n) -> str:
    if not n > 0:
        return "–"  # the known structure may not know the group sizes
    return f"{int(n)}" if float(n) == int(n) else f"{n:.1f}"


def plots_label(label: str) -> str:
    return label if len(label) <= 40 else label[:39] + "…"


def _nowrap(text) -> str:
    return f'<span style="white-space:nowrap">{esc(text)}</span>'


def threshold_sentence(res: Results) -> str:
    """How many groups are decidedly above and below the threshold, as a paragraph."""
    t, o = res.table, res.options
    side = t["threshold_side"]
    above, below = int(np.sum(side == "above")), int(np.sum(side == "below"))
    return (f"<p>Threshold {esc(f'{o.threshold:g}')}: {above:,} groups have P(theta above it) of at least "
            f"{o.decide_at:g}, {below:,} have P(theta below it) of at least {o.decide_at:g}; "
            f"{len(t) - above - below:,} are undecided.</p>")


# ---------------------------------------------------------------------------------------------


def render(res: Results, created: str | None = None, command: list[str] | None = None) -> str:
    """The whole page as one string."""
    o, t = res.options, res.table
    p = res.problem
    st = p.stats
    J = res.J
    f = Fmt(float(np.median(t["theta_sd"])))
    lvl = level_label(o.level)
    missed = not res.targets_met
    summary = res.mode == "summary"
    figs = plots.make_figures(res)
    parts: list[str] = []
    add = parts.append
    created = created or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    run = res.run
    title = "Group comparison"
    add("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
        f"<title>{esc(title)}: {esc(st.source)}</title><style>{CSS}</style></head><body>")
    mode = (f"summary mode: every draw kept for the hyperparameters and {res.summary['kept_groups']} groups · "
            if summary else "")
    add(f'<header class="top"><div class="wrap"><h1>{title}: {J:,} groups, partial pooling</h1>'
        f'<div class="sub">data {esc(st.source)} · {esc(p.model.within)} within-group variances · '
        f'{esc(p.model.between.name)} between-group distribution · '
        f'{run["chains"]} chains × {run["draws_per_chain"]} draws · {mode}made {esc(created)} by pooling '
        f'{esc(__version__)}' + (' · <strong class="flag">DIAGNOSTICS TARGETS MISSED</strong>' if missed else "")
        + "</div></div></header>")
    sections = [("glance", "At a glance"), ("health", "Run health"), ("groups", "Groups"),
                ("predictors", "Why groups differ"),
                ("pull", "Pull toward the pool"), ("order", "Ranking"), ("tails", "Outlying groups"),
                ("limits", "Limits"), ("h2h", "Head to head"), ("labs", "Interlaboratory view"),
                ("fitcheck", "Model checks"), ("how", "How computed"), ("setup", "Model and data"),
                ("guide", "Column guide")]
    have = {"limits": o.threshold is not None or o.limits, "h2h": res.pairs is not None,
            "order": not summary, "fitcheck": not summary, "how": summary, "tails": res.tail is not None,
            "predictors": res.predictors is not None}
    add('<nav class="toc"><div class="wrap">' + "".join(
        f'<a href="#{a}">{b}</a>' for a, b in sections if have.get(a, True)) + "</div></nav>")
    add('<main class="wrap">')

    # --- warnings first: the caution and the diagnostics ---------------------------------------
    add(f'<div class="caution"><strong>Read this first</strong>{esc(CAUTION)}</div>')
    diag = res.diagnostics
    tg = diag["targets"]
    if missed:
        items = "".join(
            f"<li>{esc(m.get('name'))}{esc(' ' + repr(m['group'])) if 'group' in m else ''}: "
            f"R-hat {Fmt.g(m.get('rhat'), 4)}, bulk ESS {Fmt.g(m.get('bulk_ess'), 4)}, tail ESS {Fmt.g(m.get('tail_ess'), 4)}</li>"
            for m in diag["missed"][:12])
        add('<div class="alarm"><h2>Diagnostics targets were MISSED</h2>'
            f"<p>{diag['missed_count']} quantities missed the targets (R-hat below {tg['rhat_below']}, bulk and tail "
            f"effective sample size at least {tg['ess_at_least']:g}) after {run['draws_per_chain']} draws per chain. "
            "The chains may not have explored the posterior: every number and picture in this report may be "
            "wrong. Rerun with more draws (--draws, --max-draws) or a more informative prior before using it.</p>"
            f"<ul>{items}</ul></div>")
    else:
        scope = (f"the hyperparameters and the {res.summary['kept_groups']} kept groups, whose every draw was stored; "
                 "the other groups are screened by a classic R-hat (Run health)" if summary else
                 "every checked quantity")
        add(f'<div class="good">Diagnostics targets met by {scope}: R-hat below {tg["rhat_below"]} '
            f'and bulk and tail effective sample size of at least {tg["ess_at_least"]:g}.</div>')

    # --- at a glance ------------------------------------------------------------------------------
    lab = res.lab
    cs = lab["consensus"]
    scale_word = "scale" if p.heavy else "sd"
    mu_name = "pooled mean mu" if res.predictors is None else "mu (reference level; see Why groups differ)"
    cards = [_card(mu_name, f.v(cs["mean"]), f"{lvl} interval {_interval(f, cs['low'], cs['high'])}"),
             _card(f"between-group {scale_word} tau", f.v(lab["between_sd"]["mean"]),
                   f"{lvl} interval {_interval(f, lab['between_sd']['low'], lab['between_sd']['high'])}")]
    if lab["repeatability_sd"] is not None:
        r = lab["repeatability_sd"]
        cards.append(_card("typical within-group sd", f.v(r["mean"]),
                           f"sqrt(mean of sigma<sub>j</sub>²); {lvl} interval {_interval(f, r['low'], r['high'])}"))
    jb = int(np.argmax(t["p_best"].to_numpy()))
    k = int(min(o.k, J))
    cards.append(_card(f"most likely best ({esc(o.best)})", esc(plots_label(t["group"].iat[jb])),
                       f"P(best) {Fmt.p(t['p_best'].iat[jb])}; P(top {k}) {Fmt.p(t['p_top_k'].iat[jb])}"))
    w = t["shrink_weight"].to_numpy()
    if np.isfinite(w).any():
        cards.append(_card("shrinkage weight", f"{np.nanmedian(w):.2f}",
                           f"median over groups; range {np.nanmin(w):.2f} to {np.nanmax(w):.2f}"))
    if res.tail is not None:
        flagged = res.tail["outlying"]
        cards.append(_card("outlying groups", f"{len(flagged):,}",
                           (", ".join(esc(plots_label(x)) for x in flagged[:4]) + (" …" if len(flagged) > 4 else ""))
                           or "none flagged"))
    measurements = f", {_count(st.N)} measurements" if st.kind == "raw" else ""
    add(f'<section id="glance"><h2>At a glance</h2><div class="cards">{"".join(cards)}</div>'
        f'<p class="note">{J:,} groups{measurements}. Intervals are central {lvl} credible intervals; every '
        f"probability is the share of {run['draws_total']:,} posterior draws in which the statement holds."
        + (" With this many groups only summaries were kept while the chains ran; <a href=\"#how\">How computed</a> "
           "says how, and how large each error can be." if summary else "") + "</p></section>")

    # --- run health -----------------------------------------------------------------------------
    rows = []
    for name, sm in res.hyper.items():
        rows.append([esc(name), f.v(sm["mean"], 1), f.v(sm["sd"], 1), f.v(sm["median"], 1),
                     _interval(f, sm["low"], sm["high"], 1), Fmt.g(sm["rhat"], 4), f"{sm['bulk_ess']:.0f}",
                     f"{sm['tail_ess']:.0f}", Fmt.g(sm["mean_mc_error"], 2)])
    hyper_tab = _table([("quantity", False), ("mean", True), ("sd", True), ("median", True), (f"{lvl} interval", True),
                        ("R-hat", True), ("bulk ESS", True), ("tail ESS", True), ("MC error of mean", True)], rows)
    wrows = [[esc(name), Fmt.g(wv.get("rhat_max"), 4), Fmt.g(wv.get("bulk_ess_min"), 4), Fmt.g(wv.get("tail_ess_min"), 4)]
             for name, wv in (diag.get("worst") or {}).items()]
    worst_tab = _table([("draws of", False), ("largest R-hat", True), ("smallest bulk ESS", True),
                        ("smallest tail ESS", True)], wrows) if wrows else ""
    screen = ""
    if summary:
        cr = res.summary["figures"]["classic_rhat"]
        screen = ("<p>" + esc(
            f"Every group, classic R-hat of theta from the chains' running means and variances (not split, not "
            f"rank-normalised): largest {Fmt.g(cr['max'], 4)}, {cr['above_1.01']:,} of {cr['groups']:,} groups at "
            "1.01 or more. Over many groups a few exceed 1.01 by chance; a large share would mean the chains disagree."
            if cr["groups"] else "A classic R-hat for every group needs two or more chains.") + "</p>")
    rounds = ", ".join(str(r["draws_per_chain"]) for r in diag["rounds"])
    add('<section id="health"><h2>Run health</h2>'
        f"<p>Hyperparameters (nu, if drawn from a grid, is discrete: its R-hat and ESS are rough guides).</p>{hyper_tab}"
        f"<h3>{'Kept groups (every draw stored)' if summary else 'Worst over all groups'}</h3>{worst_tab}{screen}"
        f'<p class="note">Targets: R-hat below {tg["rhat_below"]}, ESS at least {tg["ess_at_least"]:g} '
        f"(rank-normalised split R-hat and ESS). Draws per chain after each round: {esc(rounds)}. "
        f"Sampling took {run['seconds']:.1f} s.</p>"
        f'<div class="fig">{figs.get("traces", "")}</div></section>')

    # --- groups ------------------------------------------------------------------------------------
    add(_groups(res, f, lvl, k))
    if res.predictors is not None:  # group-level predictors: report/predictors.py
        from .predictors import section

        add(section(res, f, lvl, figs))

    # --- pictures of pulling and intervals -------------------------------------------------------
    if summary:
        add('<section id="pull"><h2>Pull toward the pool</h2>'
            f"<p>Posterior means of all {J:,} groups against their own means, and the shrinkage weight of each. "
            f'Every row is in groups.csv.</p><div class="fig">{figs.get("histograms", "")}</div></section>')
    else:
        add('<section id="pull"><h2>Pull toward the pool</h2>'
            "<p>Each group's own mean (open circle, area by the number of measurements) and where partial pooling puts "
            "it (filled dot)" + ("; groups flagged outlying are ringed" if res.tail is not None else "")
            + ". Small or noisy groups travel further toward the pooled mean.</p>"
            f'<div class="fig">{figs.get("shrinkage", "")}</div>'
            "<h3>Estimates and shrinkage</h3><p>Shrinkage is the posterior mean of the weight "
            "v<sub>j</sub>/(v<sub>j</sub>+tau²" + ("/lambda<sub>j</sub>" if p.heavy else "") + ") that partial pooling "
            "gives the pooled mean, with v<sub>j</sub> = sigma<sub>j</sub>²/n<sub>j</sub> (the squared standard error "
            "for given estimates): near 0 the group speaks for itself, near 1 it is mostly the pool. <em>Moved</em> "
            "is the share of the way from the group's own mean to mu that its estimate actually travelled (unsteady "
            "for groups whose own mean sits close to mu).</p>" + _estimates(res, f, lvl)
            + f"<h3>Credible intervals</h3><div class=\"fig\">{figs.get('intervals', '')}</div></section>")

    # --- ranks ----------------------------------------------------------------------------------
    if not summary and res.heat is not None:
        note = ("every group over every rank" if J <= MANY else
                f"the {len(res.heat['rows'])} groups with the best mean rank, over ranks 1 to {MANY} (the last column "
                f"collects every rank beyond {MANY})")
        add('<section id="order"><h2>Ranking</h2>'
            f"<p>How sure is the order? The map shows P(rank = r) for {note}. A long smear along a row means the data "
            "cannot place that group; a dark single cell means they can.</p>"
            f'<div class="fig">{figs.get("ranks", "")}</div></section>')
    if res.tail is not None:
        add(_tails(res, f, lvl, figs))
    if have["limits"]:
        add(_limits(res, f, lvl))
    if res.pairs is not None:
        add(_pairs(res))
    add(_labs(res, f, lvl))
    if not summary:
        add(_checks(res, f, figs))
    else:
        add(_how(res))
    add(_setup(res, command))
    guide = "".join(f"<dt><code>{esc(c)}</code></dt><dd>{esc(describe_column(c, o.level))}</dd>"
                    for c in t.columns if describe_column(c, o.level))
    add(f'<section id="guide"><h2>Column guide (groups.csv)</h2><dl class="kv">{guide}</dl>'
        f'<p class="note">Interval level {lvl}; k = {k}; best = {esc(o.best)}; decided at probability '
        f"{o.decide_at:g}.</p></section>")
    add(f"<footer>Made by pooling {esc(__version__)}. {esc(CAUTION)}</footer></main></body></html>")
    return "".join(parts)


def _count(x) -> str:
    """A count for prose: whole numbers with separators, down-weighted ones with one decimal."""
    x = float(x)
    return f"{int(x):,}" if x == int(x) else f"{x:,.1f}"


def _groups(res: Results, f: Fmt, lvl: str, k: int) -> str:
    t, o = res.table, res.options
    summary = res.mode == "summary"
    lo, hi = res.col("theta_low"), res.col("theta_high")
    rlo, rhi = res.col("rank_low"), res.col("rank_high")
    order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    head = [("group", False), ("n", True), ("posterior mean", True), (f"{lvl} interval", True), ("mean rank", True),
            (f"rank {lvl}", True), ("P(best)", True), (f"P(top {k})", True)]
    if o.threshold is not None:
        th_txt = esc(f"{o.threshold:g}")
        head += [(f"P(&gt; {th_txt})", True), (f"P(&lt; {th_txt})", True)]
    if "outlying" in t:
        head.append(("outlying", False))
    if summary:
        head.append(("kept", False))

    def row(j):
        rank = f"{t['rank_mean'].iat[j]:.1f}"
        span = f"{int(t[rlo].iat[j])}–{int(t[rhi].iat[j])}"
        if summary and not t["kept"].iat[j]:
            if t["rank_mean_error"].iat[j] > 0.05:
                rank += f" ± {t['rank_mean_error'].iat[j]:.1f}"
            if t["rank_limit_error"].iat[j] > 0:
                span += f", ends ± {int(t['rank_limit_error'].iat[j])}"
        r = [_nowrap(plots_label(t["group"].iat[j])), _n(t["n"].iat[j]), f.v(t["theta_mean"].iat[j]),
             _interval(f, t[lo].iat[j], t[hi].iat[j]), rank, span, Fmt.p(t["p_best"].iat[j]), Fmt.p(t["p_top_k"].iat[j])]
        if o.threshold is not None:
            r += [Fmt.p(t["p_above"].iat[j]), Fmt.p(t["p_below"].iat[j])]
        if "outlying" in t:
            r.append('<span class="tag action">outlying</span>' if t["outlying"].iat[j] else "")
        if summary:
            r.append(_nowrap(t["kept"].iat[j]) if t["kept"].iat[j] else "")
        return r

    intro = (f"<p>Sorted by mean rank, best first ({'highest' if o.best == 'highest' else 'lowest'} theta is best). "
             f"The rank interval holds the group's rank in {lvl} of the draws; P(top {k}) is the chance of being among "
             f"the {k} best.</p>")
    if not summary:
        shown, gap, hidden = _head_tail(order)
        return '<section id="groups"><h2>Groups</h2>' + intro + _table(head, [row(j) for j in shown], gap, hidden) \
            + "</section>"
    ends = min(SHOWN, len(order))
    kept = res.problem  # noqa: F841 (the kept groups are marked in the table)
    kept_rows = np.flatnonzero(t["kept"].to_numpy() != "")
    kept_rows = kept_rows[np.argsort(t["rank_mean"].to_numpy()[kept_rows], kind="stable")]
    ks, kgap, khidden = _head_tail(kept_rows)
    return ('<section id="groups"><h2>Groups</h2>' + intro
            + "<p>Mean ranks and rank intervals of kept groups are exact; the others carry their largest possible error "
            "(the rank interval contains the exact one).</p>"
            f"<h3>Best {ends}</h3>" + _table(head, [row(j) for j in order[:ends]])
            + f"<h3>Worst {ends}</h3>" + _table(head, [row(j) for j in order[::-1][:ends]])
            + f"<h3>Kept groups</h3><p>Every draw of these {len(kept_rows)} groups is in draws.nc; their every column is "
            "computed from the draws, as in a full run.</p>" + _table(head, [row(j) for j in ks], kgap, khidden)
            + "</section>")


SHOWN = 25  # summary mode: rows of the best and of the worst groups


def _estimates(res: Results, f: Fmt, lvl: str) -> str:
    t, p = res.table, res.problem
    known = p.model.within == "known"
    order = np.argsort(t["rank_mean"].to_numpy(), kind="stable")
    shown, gap, hidden = _head_tail(order)
    own = "std error" if known else "own sd"
    own_sd = t["std_error"] if known else t["raw_sd"]
    head = [("group", False), ("n", True), ("own mean", True), (own, True), ("posterior mean", True),
            ("posterior sd", True)]
    if not known:
        head += [("sigma<sub>j</sub>", True), (f"sigma<sub>j</sub> {lvl}", True)]
    head += [("shrinkage", True), (f"shrinkage {lvl}", True), ("moved", True)]
    if "tail_weight" in t:
        head += [("tail weight", True), ("P(outlying)", True)]
    rows = []
    for j in shown:
        r = [esc(t["group"].iat[j]), _n(t["n"].iat[j]), f.v(t["raw_mean"].iat[j]), f.v(own_sd.iat[j]),
             f.v(t["theta_mean"].iat[j]), f.v(t["theta_sd"].iat[j], 1)]
        if not known:
            r += [f.v(t["sigma_mean"].iat[j]), _interval(f, t[res.col("sigma_low")].iat[j], t[res.col("sigma_high")].iat[j])]
        moved = t["shrink_realised"].iat[j]
        r += [f"{t['shrink_weight'].iat[j]:.2f}",
              f"{t[res.col('shrink_low')].iat[j]:.2f} to {t[res.col('shrink_high')].iat[j]:.2f}",
              f"{moved:.2f}" if np.isfinite(moved) else "–"]
        if "tail_weight" in t:
            r += [f"{t['tail_weight'].iat[j]:.2f}", Fmt.p(t["p_outlying"].iat[j])]
        rows.append(r)
    return _table(head, rows, gap, hidden)


def _tails(res: Results, f: Fmt, lvl: str, figs: dict) -> str:
    tl, t = res.tail, res.table
    flagged = np.flatnonzero(t["outlying"].to_numpy())
    order = flagged[np.argsort(-t["p_outlying"].to_numpy()[flagged], kind="stable")]
    if tl["fixed_df"] is None:
        grid_txt = ("The data choose how heavy the tail is: the picture shows the posterior probability of each df "
                    f"beside its prior. P(normal) = {Fmt.p(tl['p_normal'])}; P(df ≤ 4) = {Fmt.p(tl['p_df_at_most_4'])}; "
                    f"posterior median df {tl['median_df']:g}.")
    else:
        grid_txt = f"df is fixed at {tl['fixed_df']:g}."
    rows = [[esc(t["group"].iat[j]), _n(t["n"].iat[j]), f.v(t["raw_mean"].iat[j]), f.v(t["theta_mean"].iat[j]),
             _interval(f, t[res.col("bias_low")].iat[j], t[res.col("bias_high")].iat[j]),
             f"{t['tail_weight'].iat[j]:.3f}", Fmt.p(t["p_outlying"].iat[j])] for j in order[:60]]
    table = (_table([("group", False), ("n", True), ("own mean", True), ("posterior mean", True),
                     (f"bias {lvl}", True), ("tail weight", True), ("P(outlying)", True)], rows)
             if rows else "<p>No group is flagged.</p>")
    return ('<section id="tails"><h2>Outlying groups</h2>'
            "<p>The between-group distribution is a Student-t with df degrees of freedom (heavy tails): each group j has "
            "a weight lambda<sub>j</sub>, with theta<sub>j</sub> ~ N(mu, tau²/lambda<sub>j</sub>). An ordinary group has "
            "a weight near 1; a group far from the others gets a small weight, which lets it stay near its own mean "
            "instead of dragging mu and tau (a weight w allows a deviation about 1/√w times as wide as tau). "
            f"{esc(grid_txt)}</p>"
            f'<div class="fig">{figs.get("df", "")}</div>'
            f"<p>A group is flagged outlying when P(outlying) ≥ 0.5: the probability that its weight falls below "
            f"the 5% point of the weights the between-group distribution gives (at the drawn df). "
            f"{len(flagged):,} of {res.J:,} groups are flagged.</p>" + table + "</section>")


def _limits(res: Results, f: Fmt, lvl: str) -> str:
    o, t = res.options, res.table
    lim = []
    if o.lower is not None:
        lim.append(f"lower limit {esc(f'{o.lower:g}')}")
    if o.upper is not None:
        lim.append(f"upper limit {esc(f'{o.upper:g}')}")
    out = ['<section id="limits"><h2>Limits</h2>']
    if o.threshold is not None:
        out.append(threshold_sentence(res))
    if lim and "outside_mean" in t:
        ng = res.new_group
        side = t["limits_side"]
        out.append(f"<p>Specification: {' and '.join(lim)}. The predicted fraction outside is the posterior mean of "
                   "P(a new measurement of the group falls outside | theta<sub>j</sub>, sigma<sub>j</sub>), with its "
                   f"{lvl} interval; it uses each group's own within-group sd. By their means, {int(np.sum(side == 'outside')):,} "
                   f"groups are outside the limits and {int(np.sum(side == 'inside')):,} inside with probability of at "
                   f"least {o.decide_at:g}.</p>")
        if ng is not None:
            card = _card("a group not yet seen", f"{100 * ng['mean']:.2f}%",
                         f"{lvl} interval {100 * ng['low']:.2f}% to {100 * ng['high']:.2f}%; "
                         f"MC error {100 * ng['mc_error']:.2f}%")
            out.append(f'<div class="cards">{card}</div>'
                       '<p class="note">For a new group each draw takes theta<sub>new</sub> from the between-group '
                       "distribution" + (" and sigma<sub>new</sub>² ~ Scaled-Inv-χ²(nu, s²)" if res.problem.within_code == 0
                                         else " and the shared sigma")
                       + ", from a generator seeded by the run's own seed.</p>")
        order = np.argsort(-t["outside_mean"].to_numpy(), kind="stable")[: min(25, res.J)]
        rows = [[esc(t["group"].iat[j]), _n(t["n"].iat[j]), f.v(t["theta_mean"].iat[j]), f.v(t["sigma_mean"].iat[j]),
                 f"{100 * t['outside_mean'].iat[j]:.2f}%",
                 f"{100 * t[res.col('outside_low')].iat[j]:.2f}% to {100 * t[res.col('outside_high')].iat[j]:.2f}%"]
                for j in order]
        out.append("<h3>Groups with the largest predicted fraction outside (up to 25)</h3>"
                   + _table([("group", False), ("n", True), ("theta", True), ("sigma", True), ("outside", True),
                             (f"{lvl} interval", True)], rows))
    elif lim:
        out.append(f"<p>Specification: {' and '.join(lim)}. The fraction of future measurements outside needs a "
                   "within-group sd; with given standard errors (the known structure) there is none, so only "
                   "P(theta<sub>j</sub> outside the limits) is given (groups.csv, p_mean_outside).</p>")
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
    lab, t, o = res.lab, res.table, res.options
    an = lab["anova"]
    rows = []

    def row(name, s, classical, extra=0):
        m, i = _summ_cells(f, s, extra)
        rows.append([name, m, i, classical])

    re_ = lab.get("random_effects")
    tau_name = "between-lab scale tau (robust s<sub>L</sub>)" if res.problem.heavy else "between-lab sd s<sub>L</sub> (tau)"
    if an:
        row("consensus value (mu)", lab["consensus"], f.v(an["grand_mean"]) + " (grand mean)")
        row(tau_name, lab["between_sd"], f.v(an["between_sd"]) + (" (truncated at 0)" if an["truncated"] else ""))
    elif re_:
        row("consensus value (mu)", lab["consensus"], f"{f.v(re_['consensus'])} ± {f.v(re_['consensus_se'], 1)} (se)")
        row(tau_name, lab["between_sd"], f.v(re_["between_sd"]) + (" (truncated at 0)" if re_["truncated"] else ""))
    else:
        row("consensus value (mu)", lab["consensus"], "–")
        row(tau_name, lab["between_sd"], "–")
    if lab["repeatability_sd"] is not None:
        row("repeatability sd s<sub>r</sub>", lab["repeatability_sd"], f.v(an["repeatability_sd"]) if an else "–")
        row("reproducibility sd s<sub>R</sub>", lab["reproducibility_sd"], f.v(an["reproducibility_sd"]) if an else "–")
        row("repeatability limit r = 2.8 s<sub>r</sub>", lab["repeatability_limit"], f.v(2.8 * an["repeatability_sd"]) if an else "–")
        row("reproducibility limit R = 2.8 s<sub>R</sub>", lab["reproducibility_limit"], f.v(2.8 * an["reproducibility_sd"]) if an else "–")
        icc = lab["icc"]
        rows.append(["intraclass correlation", f"{icc['mean']:.3f}", f"{icc['low']:.3f} to {icc['high']:.3f}",
                     f"{an['icc']:.3f}" if an else "–"])
    classical = "one-way ANOVA (moments)" if an or not re_ else "DerSimonian-Laird (moments)"
    comp = _table([("quantity", False), ("posterior mean", True), (f"{lvl} interval", True), (classical, True)], rows)
    note = ""
    if re_ and not an:
        note = (f"<p class=\"note\">DerSimonian-Laird random-effects estimate from the {re_['k']} estimates and their "
                f"standard errors: Q = {re_['q']:.3g} on {re_['df']} df, p {_p_eq(re_['p_value'])}, I² = "
                f"{re_['i2']:.0%}; tau² = max(0, (Q − df) / (Σw − Σw²/Σw)) with w = 1/se², and the consensus is "
                "the mean weighted by 1/(se² + tau²). Its standard error ignores the uncertainty of tau, which "
                "the posterior interval includes.</p>")
    if an:
        note = (f"<p class=\"note\">ANOVA: MS between {Fmt.g(an['ms_between'], 5)} on {an['df_between']} df, MS within "
                f"{Fmt.g(an['ms_within'], 5)} on {an['df_within']:g} df, F = {an['f']:.3g}, p {_p_eq(an['p_value'])}; "
                f"s<sub>L</sub>² = (MS between − MS within) / n0 with n0 = {an['n0']:.3g} (ISO 5725-2 for unequal group "
                "sizes). The ANOVA treats an outlying lab like any other; the posterior with heavy tails does not.</p>")
    zb = lab["z_basis"]
    order = np.argsort(-np.abs(t["bias_mean"].to_numpy()), kind="stable")
    shown, gap, hidden = _head_tail(order)
    head = [("lab", False), ("n", True), ("own mean", True), ("bias θ−μ", True), (f"{lvl} interval", True)]
    if o.allowed_bias is not None:
        head.append((f"P(|bias| &gt; {esc(f'{o.allowed_bias:g}')})", True))
    if "outlying" in t:
        head.append(("outlying", False))
    head += [("z", True), ("z signal", False)]
    body = []
    for j in shown:
        r = [esc(t["group"].iat[j]), _n(t["n"].iat[j]), f.v(t["raw_mean"].iat[j]), f.v(t["bias_mean"].iat[j]),
             _interval(f, t[res.col("bias_low")].iat[j], t[res.col("bias_high")].iat[j])]
        if o.allowed_bias is not None:
            r.append(Fmt.p(t["p_bias_over"].iat[j]))
        if "outlying" in t:
            r.append('<span class="tag action">outlying</span>' if t["outlying"].iat[j] else "")
        sig = t["z_signal"].iat[j]
        z = t["z_score"].iat[j]
        r += [f"{z:.2f}" if np.isfinite(z) else "–", f'<span class="tag {esc(sig)}">{esc(sig)}</span>' if sig else "–"]
        body.append(r)
    ag = lab["agreement"]
    return ('<section id="labs"><h2>Interlaboratory view</h2>'
            "<p>When the groups are laboratories measuring one material: the consensus value, the variance components in "
            "the terms of ISO 5725, and each lab's bias. Beside the posterior stand the classical comparators, so you "
            "can see where the two approaches agree.</p>" + comp + note
            + "<h3>Bias and z-scores, largest bias first</h3>"
            + f"<p>z = (own mean − x<sub>pt</sub>) / sigma<sub>pt</sub> with x<sub>pt</sub> = {f.v(zb['assigned'], 1)} "
            f"({esc(zb['assigned_from'])}) and sigma<sub>pt</sub> = {f.v(zb['sigma_pt'], 1)} ({esc(zb['sigma_pt_from'])}). "
            "ISO 13528 signals: |z| ≤ 2 none, 2 &lt; |z| &lt; 3 warning, |z| ≥ 3 action. "
            f"Here {ag['z_action']} labs have an action signal and {ag['z_warning']} a warning; the {lvl} bias interval "
            f"excludes zero for {ag['interval_excludes_0']} labs; {ag['both']} labs are flagged both ways.</p>"
            + _table(head, body, gap, hidden) + "</section>")


def _checks(res: Results, f: Fmt, figs: dict) -> str:
    ch = res.checks or {}
    sp, sdc, ex = ch.get("spread"), ch.get("sd"), ch.get("extreme")
    msg = ""
    if sp is not None:
        msg += (f"Spread of the group means: observed {f.v(sp['observed'], 1)}, posterior predictive p = "
                f"{sp['p_value']:.2f}. ")
    if ex is not None:
        who = res.labels[ex["group"]]
        msg += (f"Most extreme group (mostly {esc(plots_label(who))}, in {ex['group_share']:.0%} of the draws): "
                f"max |own mean − mu| / sqrt(tau² + v<sub>j</sub>) has p = {ex['p_value']:.3f}; a p below 0.05 says "
                "the fitted between-group distribution cannot produce a group that far. ")
    if sdc is not None:
        msg += (f"Within-group sd: {sdc['outside']} of {len(sdc['groups'])} groups fall outside their {sdc['level']:.0%} "
                f"replicated range and {sdc['extreme']} have p below 0.01 or above 0.99. ")
    return ('<section id="fitcheck"><h2>Model checks</h2>'
            f"<h3>Replicated data against the data</h3><p>{msg}(Values near 0 or 1 are the warning; "
            f"{ch.get('draws', 0)} draws, replicated from a generator seeded by the run's own seed.)</p>"
            f'<div class="fig">{figs.get("predictive", "")}</div></section>')


def _how(res: Results) -> str:
    fig = res.summary["figures"]
    erows = [[esc("rank interval" if name == "rank_limit_error" else
                  name.replace("_limit_error", "").replace("_error", "")), Fmt.g(e["median"], 3), Fmt.g(e["max"], 3)]
             for name, e in fig["limit_error"].items()]
    return ('<section id="how"><h2>How computed</h2><dl class="kv">'
            + "".join(f"<dt>{esc(k.replace('_', ' '))}</dt><dd>{esc(v)}</dd>" for k, v in res.methods.items()) + "</dl>"
            "<h3>Largest possible error, over groups (user units; rank in ranks)</h3>"
            + _table([("quantity", False), ("median bound", True), ("largest bound", True)], erows)
            + '<p class="note">A bound is what the method can guarantee; the error in a given group is usually smaller. '
            "Kept groups have no such error.</p></section>")


def _setup(res: Results, command) -> str:
    p = res.problem
    st = p.stats
    run = res.run
    within = p.model.within
    lines = ["y_ij    ~ N(theta_j, sigma_j^2)     measurement i of group j"]
    centre = "mu" if p.design is None else "mu + x_j'beta"
    if p.heavy:
        lines.append(f"theta_j ~ N({centre}, tau^2 / lambda_j),  lambda_j ~ Gamma(df/2, rate df/2)   "
                     "(Student-t, heavy tails)")
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
    kv = [("source", st.source), ("file SHA-256", st.file_sha256 or "– (not read from a file)"),
          ("statistics SHA-256", st.fingerprint()), ("groups", f"{st.J:,}"),
          ("measurements", _count(st.N) if st.kind == "raw" else "– (estimates with standard errors)"),
          ("chains × draws", f"{run['chains']} × {run['draws_per_chain']} after {run['warmup']} warm-up sweeps"),
          ("seed", run["seed"])]
    if command:
        kv.append(("command", " ".join(str(c) for c in command)))
    kv.append(("report options", ", ".join(f"{k}={val}" for k, val in res.options.to_dict().items()
                                           if val not in (None, [], ()))))
    return ('<section id="setup"><h2>Model and data</h2>'
            f'<pre class="model">{esc(chr(10).join(lines))}</pre><h3>Priors</h3><dl class="kv">{priors}</dl>'
            '<h3>Data fingerprint and run</h3><dl class="kv">'
            + "".join(f"<dt>{esc(k)}</dt><dd class=\"mono\">{esc(val)}</dd>" for k, val in kv) + "</dl></section>")
