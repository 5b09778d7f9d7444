"""The run folder's reporter files for a summary-mode fit (pooling.summary): groups.csv with every group,
the summary-mode keys of summary.json, and report.html with the best and worst groups, the kept groups,
histograms of all groups' posterior means and shrinkage, and how each number was computed.

The page reuses the reporter's look (page.CSS, its tables and cards); the numbers come from the fit's
table, computed while the chains ran. Every text from the data passes through page.esc; groups.csv
goes through export.write_csv, which neutralises text cells against spreadsheet formula injection.
"""
from __future__ import annotations

import json
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from .. import __version__
from ..errors import InputError
from . import plots
from .export import records, write_csv
from .groups import COLUMNS, pairwise
from .page import (CAUTION, CSS, Fmt, _best_and_shrink_cards, _card, _head_tail, _table, esc, plots_label,
                   threshold_sentence)

SHOWN = 25  # rows of the best and of the worst groups
KERNEL_FIELDS = ("level", "k", "best", "threshold", "lower", "upper", "allowed_bias")


def _options(fit, options):
    """The fit's options (they were applied while sampling); post-hoc ones (z-score basis, pairwise
    groups) may come from `options`; options that the run applied cannot change afterwards."""
    o = fit.options
    if options is None:
        return o
    for name in KERNEL_FIELDS:
        a, b = getattr(options, name), getattr(o, name)
        if a != b and not (name == "k" and min(a, fit.problem.J) == min(b, fit.problem.J)):
            raise InputError(f"bad option: summary mode applied {name} = {b!r} while sampling; a report with "
                             f"{name} = {a!r} needs a new run")
    return replace(o, compare=options.compare, assigned=options.assigned, sigma_pt=options.sigma_pt)


def _table_for(fit, o):
    """fit.table, with the z-scores redone when the report asks for another x_pt or sigma_pt."""
    t = fit.table
    if (o.assigned, o.sigma_pt) != (fit.options.assigned, fit.options.sigma_pt):
        from .interlab import z_scores

        t = t.copy()
        t["z_score"], t["z_signal"], _ = z_scores(t["raw_mean"].to_numpy(), o.assigned, o.sigma_pt)
    return t


def _pairs(fit, o):
    if not o.compare:
        return None
    from .assemble import split_compare

    wanted = split_compare(o.compare, fit.labels)
    kept = set(fit.kept_labels)
    missing = [g for g in wanted if g not in kept]
    if missing:
        raise InputError(f"bad option: summary mode compares only groups whose draws were kept; '{missing[0]}' was "
                         "not kept (name it with --keep, or pass it to --compare before the run)")
    return pairwise(fit, wanted)


def summary_keys(fit, o, pairs) -> dict:
    """What summary mode adds to summary.json (labels kept exactly as they are)."""
    t = fit.table
    kept = t.iloc[fit.kept]
    out = {
        "report_options": o.to_dict(),
        "summary_mode": {
            "groups": int(fit.problem.J), "kept_groups": int(len(fit.kept)),
            "methods": fit.methods, "figures": fit.figures,
            "settings": {"bins": fit.summary_options.bins, "sample": fit.summary_options.sample,
                         "top_candidates": fit.summary_options.top, "named": list(fit.summary_options.keep)},
        },
        "kept_groups_table": records(kept),
        "best_groups": records(_ends(t, o.best)[0].head(20)),
    }
    if pairs is not None:
        out["pairwise"] = {"groups": list(pairs.index), "p_row_greater": pairs.to_numpy()}
    return out


def _ends(t, best: str):
    """(best first, worst first) orderings of the table by posterior mean."""
    order = np.argsort(t["theta_mean"].to_numpy(), kind="stable")
    if best == "highest":
        order = order[::-1]
    return t.iloc[order[:SHOWN]], t.iloc[order[::-1][:SHOWN]]


def write_summary_report(fit, folder, options=None):
    """groups.csv (every group), the summary-mode keys of summary.json (when present) and report.html."""
    from ..output import _clean, write_json

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    o = _options(fit, options)
    t = _table_for(fit, o)
    pairs = _pairs(fit, o)
    write_csv(t, folder / "groups.csv")
    summary_path = folder / "summary.json"
    summary = None
    if summary_path.exists():
        with open(summary_path, encoding="utf-8") as fh:
            summary = json.load(fh)
        summary.update(_clean(summary_keys(fit, o, pairs)))
        write_json(summary_path, summary)
    (folder / "report.html").write_text(render(fit, o, t, pairs, summary), encoding="utf-8")
    return t


# ---------------------------------------------------------------------------------------------
# pictures

def histograms(t, mu_mean: float) -> str:
    """Two histograms over all groups: posterior means (own means drawn as a line) and shrinkage weights."""
    from .svg import Canvas

    w, h = 960.0, 340.0
    split = w * 1.4 / 2.4
    c = Canvas(w, h, "summary-hist", "Histograms over all groups: posterior and own means, shrinkage weights")
    a = c.panel(0, 0, split, h, title="where the groups sit", ylabel="groups", ylim=(0, None), ypad=0.05,
                xlabel="theta (the outermost 0.05% of each end folded into the end bins)")
    post, raw = t["theta_mean"].to_numpy(dtype=float), t["raw_mean"].to_numpy(dtype=float)
    both = np.concatenate([post, raw])
    both = both[np.isfinite(both)]
    lo, hi = np.quantile(both, [0.0005, 0.9995]) if both.size else (0.0, 1.0)
    if not hi > lo:
        lo, hi = lo - 0.5, hi + 0.5
    edges = np.linspace(lo, hi, 81)
    a.steps(edges, np.histogram(np.clip(post[np.isfinite(post)], lo, hi), edges)[0], fill=plots.POST, opacity=0.6,
            key="posterior means", role="posterior-means")
    a.steps(edges, np.histogram(np.clip(raw[np.isfinite(raw)], lo, hi), edges)[0], color=plots.RAW, width=1.3,
            key="own means", role="own-means")
    a.vline(mu_mean, plots.POOL, 1.5, "dashed", key="pooled mean (mu)")
    b = c.panel(split, 0, w - split, h, title="how far each was pulled", ylabel="groups", ylim=(0, None), ypad=0.05,
                xlim=(0, 1), xlabel="shrinkage weight v/(v + tau²): 0 own mean, 1 pooled mean")
    wt = t["shrink_weight"].to_numpy(dtype=float)
    bins = np.linspace(0, 1, 51)
    b.steps(bins, np.histogram(wt[np.isfinite(wt)], bins)[0], fill=plots.POST, opacity=0.6, role="weights")
    c.align(a, b, sides="top bottom")
    return c.svg()


# ---------------------------------------------------------------------------------------------
# the page

def _lvl(level: float) -> str:
    return f"{level:.0%}" if round(level * 100) == level * 100 else f"{level:.1%}"


def _group_rows(t, f: Fmt, o, rows_of) -> tuple[list, list]:
    k = int(min(o.k, len(t)))
    head = [("group", False), ("n", True), ("own mean", True), ("posterior mean", True), (f"{_lvl(o.level)} interval", True),
            ("± limit error", True), ("shrinkage", True), ("mean rank", True), ("P(best)", True), (f"P(top {k})", True)]
    if o.threshold is not None:
        head.append((f"P(&gt; {esc(f'{o.threshold:g}')})", True))
    head.append(("kept", False))
    rows = []
    for _, r in rows_of.iterrows():
        rank = f"{r['rank_mean']:.1f}"
        if not r["kept"] and r["rank_mean_error"] > 0.05:
            rank += f" ± {r['rank_mean_error']:.1f}"
        rank += f" ({int(r['rank_low'])}–{int(r['rank_high'])}"
        if not r["kept"] and r.get("rank_limit_error", 0) > 0:  # the interval's stated slack, in ranks
            rank += f", ends ± {int(r['rank_limit_error'])}"
        rank += ")"
        cells = [_nowrap(plots_label(r["group"])), f"{int(r['n'])}", f.v(r["raw_mean"]), f.v(r["theta_mean"]),
                 f"{f.v(r['theta_low'])} to {f.v(r['theta_high'])}", f.v(r["theta_limit_error"], 1), f"{r['shrink_weight']:.2f}",
                 rank, Fmt.p(r["p_best"]), Fmt.p(r["p_top_k"])]
        if o.threshold is not None:
            cells.append(Fmt.p(r["p_above"]))
        cells.append(_nowrap(r["kept"]) if r["kept"] else "")
        rows.append(cells)
    return head, rows


def _nowrap(text) -> str:
    return f'<span style="white-space:nowrap">{esc(text)}</span>'


def render(fit, o, t, pairs, summary: dict | None = None) -> str:
    """report.html for a summary-mode fit, as one string."""
    p = fit.problem
    st = p.stats
    J = st.J
    lvl = _lvl(o.level)
    f = Fmt(float(np.median(t["theta_sd"])))
    diag = fit.diagnostics()
    tg = diag["targets"]
    post = fit.parts["posterior"]
    parts: list[str] = []
    add = parts.append
    created = (summary or {}).get("created_utc") or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    add("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">"
        f"<title>Group comparison: {esc(st.source)}</title><style>{CSS}</style></head><body>")
    add(f'<header class="top"><div class="wrap"><h1>Group comparison: {J:,} groups, summary mode</h1>'
        f'<div class="sub">data {esc(st.source)} · {esc(p.model.within)} within-group variances · '
        f'{fit.raw.settings.chains} chains × {fit.raw.mu.shape[1]} draws · every draw kept for the hyperparameters '
        f'and {len(fit.kept)} groups · made {esc(created)} by pooling {esc(__version__)}</div></div></header>')
    sections = [("glance", "At a glance"), ("health", "Run health"), ("ends", "Best and worst"), ("kept", "Kept groups"),
                ("all", "All groups"), ("limits", "Limits"), ("h2h", "Head to head"), ("how", "How computed"),
                ("setup", "Model and data"), ("guide", "Column guide")]
    have = {"limits": o.threshold is not None or o.lower is not None or o.upper is not None, "h2h": pairs is not None}
    add('<nav class="toc"><div class="wrap">' + "".join(
        f'<a href="#{a}">{b}</a>' for a, b in sections if have.get(a, True)) + "</div></nav>")
    add('<main class="wrap">')
    add(f'<div class="caution"><strong>Read this first</strong>{esc(CAUTION)}</div>')
    if not fit.targets_met:
        items = "".join(f"<li>{esc(m.get('name'))}{esc(' ' + repr(m['group'])) if 'group' in m else ''}: R-hat "
                        f"{Fmt.g(m.get('rhat'), 4)}, bulk ESS {Fmt.g(m.get('bulk_ess'), 4)}, tail ESS "
                        f"{Fmt.g(m.get('tail_ess'), 4)}</li>" for m in diag["missed"][:12])
        add('<div class="alarm"><h2>Diagnostics targets were MISSED</h2>'
            f"<p>{diag['missed_count']} quantities missed the targets (R-hat below {tg['rhat_below']}, bulk and tail "
            f"effective sample size at least {tg['ess_at_least']:g}) after {fit.raw.mu.shape[1]} draws per chain. "
            "Every number below may be wrong; rerun with more draws (--draws, --max-draws) before using it.</p>"
            f"<ul>{items}</ul></div>")
    else:
        add(f'<div class="good">Diagnostics targets met (R-hat below {tg["rhat_below"]}, bulk and tail ESS at least '
            f'{tg["ess_at_least"]:g}) by the hyperparameters and the {len(fit.kept)} kept groups, whose every draw '
            "was stored; the other groups are screened by a classic R-hat (Run health).</div>")

    # --- at a glance -----------------------------------------------------------------------------
    mu = post["mu"].reshape(-1)
    tau = post["tau"].reshape(-1)
    ql, qh = (1 - o.level) / 2, (1 + o.level) / 2
    cards = [_card("pooled mean mu", f.v(mu.mean()), f"{lvl} interval {f.v(np.quantile(mu, ql))} to {f.v(np.quantile(mu, qh))}"),
             _card("between-group sd tau", f.v(tau.mean()),
                   f"{lvl} interval {f.v(np.quantile(tau, ql))} to {f.v(np.quantile(tau, qh))}")]
    if "within_sd" in post:
        sr = post["within_sd"].reshape(-1)
        cards.append(_card("typical within-group sd", f.v(sr.mean()),
                           f"sqrt(mean of sigma²); {lvl} interval {f.v(np.quantile(sr, ql))} to {f.v(np.quantile(sr, qh))}"))
    jb = int(np.argmax(t["p_best"].to_numpy()))
    cards += _best_and_shrink_cards("most often best", o.best, t["group"].iat[jb], t, jb, int(min(o.k, J)))
    add(f'<section id="glance"><h2>At a glance</h2><div class="cards">{"".join(cards)}</div>'
        f'<p class="note">{J:,} groups' + (f", {st.N:,} measurements" if st.kind == "raw" else "")
        + f". Intervals are central {lvl} credible intervals; probabilities are shares of all "
        f"{fit.figures['draws_total']:,} posterior draws. With this many groups only summaries were kept while the "
        "chains ran; <a href=\"#how\">How computed</a> says how, and how large each error can be.</p></section>")

    # --- run health ------------------------------------------------------------------------------
    rows = []
    for name, s in fit.hyper_summary().items():
        rows.append([esc(name), f.v(s["mean"], 1), f.v(s["sd"], 1), f"{f.v(s['q025'], 1)} to {f.v(s['q975'], 1)}",
                     Fmt.g(s["rhat"], 4), f"{s['bulk_ess']:.0f}", f"{s['tail_ess']:.0f}", Fmt.g(s["mean_mc_error"], 2)])
    hyper = _table([("quantity", False), ("mean", True), ("sd", True), ("95% interval", True), ("R-hat", True),
                    ("bulk ESS", True), ("tail ESS", True), ("MC error of mean", True)], rows)
    wrows = [[esc(name), Fmt.g(wv.get("rhat_max"), 4), Fmt.g(wv.get("bulk_ess_min"), 4), Fmt.g(wv.get("tail_ess_min"), 4)]
             for name, wv in (diag.get("worst") or {}).items()]
    worst = _table([("draws of", False), ("largest R-hat", True), ("smallest bulk ESS", True), ("smallest tail ESS", True)],
                   wrows)
    cr = fit.figures["classic_rhat"]
    screen = (f"Every group, classic R-hat of theta from the chains' running means and variances (not split, not "
              f"rank-normalised): largest {Fmt.g(cr['max'], 4)}, {cr['above_1.01']:,} of {cr['groups']:,} groups at "
              "1.01 or more. Over many groups a few exceed 1.01 by chance; a large share would mean the chains disagree."
              if cr["groups"] else "A classic R-hat for every group needs two or more chains.")
    add('<section id="health"><h2>Run health</h2>'
        f"<p>Hyperparameters, from every draw.</p>{hyper}"
        f"<h3>Kept groups (every draw stored)</h3>{worst}<p>{esc(screen)}</p>"
        f'<p class="note">Rounds (draws per chain): {esc(", ".join(str(r["draws_per_chain"]) for r in diag["rounds"]))}. '
        f"Sampling took {fit.raw.seconds:.1f} s.</p>"
        f'<div class="fig">{plots.hyper_traces(_hyper_named(fit))}</div></section>')

    # --- best and worst --------------------------------------------------------------------------
    top, bottom = _ends(t, o.best)
    head, rows_top = _group_rows(t, f, o, top)
    _, rows_bottom = _group_rows(t, f, o, bottom)
    add('<section id="ends"><h2>Best and worst</h2>'
        f"<p>The {len(top)} groups with the {'highest' if o.best == 'highest' else 'lowest'} posterior means (best first; "
        f"{esc(o.best)} theta is best), then the {len(bottom)} at the other end (worst first). Mean ranks and rank intervals "
        "of kept groups are exact; the others carry their largest possible error (the rank interval contains "
        "the exact one).</p>"
        f"<h3>Best</h3>{_table(head, rows_top)}<h3>Worst</h3>{_table(head, rows_bottom)}</section>")

    # --- kept ------------------------------------------------------------------------------------
    kt = t.iloc[fit.kept]
    order = np.argsort(kt["theta_mean"].to_numpy(), kind="stable")
    if o.best == "highest":
        order = order[::-1]
    shown, gap, hidden = _head_tail(order)
    head, rows = _group_rows(t, f, o, kt.iloc[shown])
    counts = {r: int(np.sum(kt["kept"] == r)) for r in ("named", "sample", "top candidate")}
    add('<section id="kept"><h2>Kept groups</h2>'
        f"<p>Every draw of these {len(fit.kept)} groups is in draws.nc ({counts['named']} named, {counts['sample']} from "
        f"the fixed sample, {counts['top candidate']} candidates for the top {int(min(o.k, J))}); their every column "
        f"is computed from the draws, as in a full run. Ordered best first.</p>{_table(head, rows, gap, hidden)}</section>")

    # --- all groups ------------------------------------------------------------------------------
    add('<section id="all"><h2>All groups</h2>'
        f"<p>Posterior means of all {J:,} groups against their own means, and the shrinkage weight of each. "
        "Every row is in groups.csv.</p>"
        f'<div class="fig">{histograms(t, float(mu.mean()))}</div></section>')

    # --- limits ----------------------------------------------------------------------------------
    if have["limits"]:
        add(_limits(t, f, o, lvl, fit))
    if pairs is not None:
        add(_pairs_html(pairs))

    # --- how -------------------------------------------------------------------------------------
    err = fit.figures["limit_error"]
    erows = [[esc("rank interval" if name == "rank_limit_error" else
                  name.replace("_limit_error", "").replace("_error", "")), Fmt.g(e["median"], 3), Fmt.g(e["max"], 3)]
             for name, e in err.items()]
    add('<section id="how"><h2>How computed</h2><dl class="kv">'
        + "".join(f"<dt>{esc(k.replace('_', ' '))}</dt><dd>{esc(v)}</dd>" for k, v in fit.methods.items()) + "</dl>"
        "<h3>Largest possible error, over groups (user units; rank in ranks)</h3>"
        + _table([("quantity", False), ("median bound", True), ("largest bound", True)], erows)
        + '<p class="note">A bound is what the method can guarantee; the error in a given group is usually smaller. '
        "Kept groups have no such error.</p></section>")
    add(_setup(fit, summary))
    from ..summary import EXTRA_COLUMNS

    guide = {**COLUMNS, **EXTRA_COLUMNS}
    add('<section id="guide"><h2>Column guide (groups.csv)</h2><dl class="kv">'
        + "".join(f"<dt><code>{esc(c)}</code></dt><dd>{esc(guide[c])}</dd>" for c in t.columns if c in guide)
        + '</dl><p class="note">rank_low and rank_high of groups that were not kept contain the exact rank '
        "interval; rank_limit_error bounds how far each end can be from it.</p></section>")
    add(f"<footer>Made by pooling {esc(__version__)}. {esc(CAUTION)}</footer></main></body></html>")
    return "".join(parts)


def _hyper_named(fit) -> dict:
    post = fit.parts["posterior"]
    names = ["mu", "tau"] + [x for x in ("s", "nu") if x in post]
    if fit.problem.model.within == "shared":
        names.append("sigma")
    return {x: post[x] for x in names}


def _limits(t, f: Fmt, o, lvl: str, fit) -> str:
    out = ['<section id="limits"><h2>Limits</h2>']
    if o.threshold is not None:
        out.append(threshold_sentence(t, o.threshold))
    if "outside_mean" in t:
        lim = [f"lower limit {esc(f'{o.lower:g}')}"] if o.lower is not None else []
        lim += [f"upper limit {esc(f'{o.upper:g}')}"] if o.upper is not None else []
        order = np.argsort(-t["outside_mean"].to_numpy(), kind="stable")[:SHOWN]
        rows = [[esc(plots_label(t["group"].iat[j])), f"{int(t['n'].iat[j])}", f.v(t["theta_mean"].iat[j]),
                 f.v(t["sigma_mean"].iat[j]), f"{100 * t['outside_mean'].iat[j]:.2f}%",
                 f"{100 * t['outside_low'].iat[j]:.2f}% to {100 * t['outside_high'].iat[j]:.2f}%"] for j in order]
        out.append(f"<p>Specification: {' and '.join(lim)}. The predicted fraction of a group's future measurements "
                   "outside is the posterior mean of P(outside | theta<sub>j</sub>, sigma<sub>j</sub>); "
                   f"{int(np.sum(t['outside_mean'] > 0.01)):,} groups exceed 1%.</p>"
                   f"<h3>Largest predicted fraction outside</h3>"
                   + _table([("group", False), ("n", True), ("theta", True), ("sigma", True), ("outside", True),
                             (f"{lvl} interval", True)], rows))
    elif o.lower is not None or o.upper is not None:
        out.append("<p>The fraction outside the specification limits needs a within-group sd; the known structure "
                   "has none.</p>")
    out.append("</section>")
    return "".join(out)


def _pairs_html(df) -> str:
    names = list(df.index)
    head = "".join(f'<th class="n">{esc(plots_label(c))}</th>' for c in names)
    body = []
    for a, name in enumerate(names):
        cells = "".join('<td class="n">·</td>' if not np.isfinite(df.iat[a, b]) else f'<td class="n">{Fmt.p(df.iat[a, b])}</td>'
                        for b in range(len(names)))
        body.append(f"<tr><th>{esc(plots_label(name))}</th>{cells}</tr>")
    return ('<section id="h2h"><h2>Head to head</h2><p>P(theta of the row group &gt; theta of the column group), from '
            f'the kept draws.</p><div class="scroll"><table><thead><tr><th>row &gt; column</th>{head}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div></section>')


def _setup(fit, summary) -> str:
    p = fit.problem
    st = p.stats
    s = fit.raw.settings
    priors = "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in p.model.priors().items())
    kv = [("source", st.source), ("file SHA-256", st.file_sha256 or "– (not read from a file)"),
          ("statistics SHA-256", st.fingerprint()), ("groups", f"{st.J:,}"),
          ("chains × draws", f"{s.chains} × {fit.raw.mu.shape[1]} after {s.warmup} warm-up sweeps"),
          ("seed", fit.raw.seed)]
    cmd = (summary or {}).get("command")
    if cmd:
        kv.append(("command", " ".join(str(c) for c in cmd)))
    return ('<section id="setup"><h2>Model and data</h2>'
            f'<pre class="model">{esc("theta_j ~ N(mu, tau^2); " + p.model.within + " within-group variances")}</pre>'
            f'<h3>Priors</h3><dl class="kv">{priors}</dl><h3>Data fingerprint and run</h3><dl class="kv">'
            + "".join(f"<dt>{esc(k)}</dt><dd class=\"mono\">{esc(v)}</dd>" for k, v in kv) + "</dl></section>")


# ---------------------------------------------------------------------------------------------
# the terminal

def print_summary(fit, out, stream=None) -> None:
    """The short table after a summary-mode run: hyperparameters, the best and worst groups, diagnostics."""
    stream = stream or sys.stdout
    p = fit.problem
    t = fit.table
    o = fit.options

    def g(x):
        return "-" if x is None or not np.isfinite(x) else f"{x:.4g}"

    w = lambda text="": print(text, file=stream)  # noqa: E731
    w(f"model: {p.model.within} within-group variances; priors: " + "; ".join(f"{k} {v}" for k, v in p.model.priors().items()))
    w(f"data: {p.stats.J} groups; {fit.raw.settings.chains} chains x {fit.raw.mu.shape[1]} draws, seed {fit.raw.seed}; "
      f"summary mode: every draw kept for the hyperparameters and {len(fit.kept)} groups")
    w()
    w(f"{'':8}{'mean':>11}{'sd':>11}{'2.5%':>11}{'97.5%':>11}{'R-hat':>8}{'bulk ESS':>10}{'tail ESS':>10}")
    for name, s in fit.hyper_summary().items():
        w(f"{name:8}{g(s['mean']):>11}{g(s['sd']):>11}{g(s['q025']):>11}{g(s['q975']):>11}"
          f"{s['rhat']:>8.3f}{s['bulk_ess']:>10.0f}{s['tail_ess']:>10.0f}")
    order = np.argsort(t["theta_mean"].to_numpy(), kind="stable")
    order = order[::-1] if o.best == "highest" else order
    rows = order if len(order) <= 12 else np.concatenate([order[:6], order[-6:]])
    w()
    w(f"{'group':24}{'n':>7}{'raw mean':>11}{'posterior':>11}{'low':>11}{'high':>11}{'P(best)':>9}")
    for i, (_, r) in enumerate(t.iloc[rows].iterrows()):
        if len(order) > 12 and i == 6:
            w("...")
        label = str(r["group"]).replace("\n", " ").replace("\r", " ").replace("\t", " ")
        label = label if len(label) <= 23 else label[:22] + "…"
        w(f"{label:24}{int(r['n']):>7}{g(r['raw_mean']):>11}{g(r['theta_mean']):>11}{g(r['theta_low']):>11}"
          f"{g(r['theta_high']):>11}{r['p_best']:>9.3f}")
    w()
    status = "met" if fit.targets_met else f"MISSED for {len(fit.misses)} quantities"
    w(f"diagnostics targets (hyperparameters and kept groups; R-hat < {fit.raw.settings.targets.rhat_max}, "
      f"ESS >= {fit.raw.settings.targets.ess_min:g}): {status}")
    cr = fit.figures["classic_rhat"]
    if cr["groups"]:
        w(f"all groups, classic R-hat of theta: largest {g(cr['max'])}, {cr['above_1.01']} at 1.01 or more")
    w(f"run folder: {out} (groups.csv has every group)")
