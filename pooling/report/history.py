"""history.html: how a store's answers moved over its recorded runs, on one self-contained page (inline CSS
and SVG, no script, no network).

It is drawn from what the store recorded of each run (its summary: mu and tau, the watch, and, since runs
record them, each group's posterior mean and interval at the watch's level with its threshold and limit
probabilities), never from draws, so it costs the same for one run or a thousand. `pooling history STORE
--out FILE` writes it for the recorded runs; `pooling refit` writes one into each run folder, with that run
as its last. Batches added or withdrawn between runs come from the runs' active batch ids and the ledger.
"""

from __future__ import annotations

import math
import os
import time

import numpy as np

from .. import __version__
from ..asked import level_label
from . import plots
from .numbers import Values, given, plural, whole
from .page import CAUTION, CSS, _fold
from .pieces import esc, html_table, label

HISTORY_FILE = "history.html"  # the name a refit gives it in its run folder
MAX_PANELS = 60  # groups drawn one by one; beyond, those whose decision changed, then those that moved most

HISTORY_CSS = """
.grid{display:grid;grid-template-columns:repeat(auto-fill,minmax(250px,1fr));gap:8px 12px;margin:8px 0}
.grid .fig{margin:0}
"""


PAGE_START = '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">'
PAGE_TITLE = "<title>History of the store "


def _side(p: float, at: float, yes: str, no: str) -> str | None:
    if p is None or not math.isfinite(p):
        return None
    return yes if p >= at else no if p <= 1 - at else "undecided"


def _num(x) -> float:
    return float("nan") if x is None else float(x)


class _Runs:
    """The recorded runs laid out by run: dates, batch events, pooled figures and per-group series."""

    def __init__(self, ledger, runs):
        self.runs = list(runs)
        R = len(self.runs)
        by_id = {b.id: b for b in ledger}
        dates = [str(r.reference_at or r.created_at)[:10] for r in self.runs]
        self.labels = [
            d if dates.count(d) == 1 else f"{d} #{r.id if r.id is not None else 'new'}"
            for d, r in zip(dates, self.runs)
        ]
        self.added = np.zeros(R)
        self.withdrawn = np.zeros(R)
        self.events: list[tuple[list[str], list[str]]] = []
        prev: set = set()
        for i, r in enumerate(self.runs):
            now = set(r.batch_ids)
            add = sorted(now - prev)
            gone = sorted(prev - now) if i else []
            self.added[i], self.withdrawn[i] = len(add), len(gone)
            self.events.append(
                (
                    [by_id[b].name if b in by_id else f"batch {b}" for b in add],
                    [f"{by_id[b].name} ({by_id[b].status})" if b in by_id else f"batch {b}" for b in gone],
                )
            )
            prev = now
        self.hyper = {}
        for name in ("mu", "tau"):
            rows = [r.summary.get("hyperparameters", {}).get(name) or {} for r in self.runs]
            self.hyper[name] = tuple(np.array([_num(h.get(k)) for h in rows]) for k in ("mean", "q_lo", "q_hi"))
        # per-group series, from the runs that recorded them
        self.with_groups = [i for i, r in enumerate(self.runs) if r.summary.get("group_intervals")]
        order: dict[str, int] = {}
        for i in self.with_groups:
            for lab in self.runs[i].summary["group_intervals"]["labels"]:
                order.setdefault(lab, len(order))
        G = len(order)
        self.group_labels = list(order)
        self.series = {
            k: np.full((G, R), np.nan) for k in ("mean", "low", "high", "p_above", "p_mean_outside", "rank_mean")
        }
        for i in self.with_groups:
            gi = self.runs[i].summary["group_intervals"]
            rows = np.array([order[lab] for lab in gi["labels"]], dtype=np.int64)
            for k in self.series:
                if k in gi:
                    self.series[k][rows, i] = np.array([_num(x) for x in gi[k]])
        self.watch = [r.summary.get("watch", {}) for r in self.runs]

    def sides(self, kind: str) -> list[list[str | None]]:
        """Per group, per run: its side of the threshold ('above', 'below', 'undecided') or of the limits."""
        key, yes, no = ("p_above", "above", "below") if kind == "threshold" else ("p_mean_outside", "outside", "inside")
        out = []
        for g in range(len(self.group_labels)):
            out.append(
                [
                    _side(self.series[key][g, i], float(self.watch[i].get("decide_at", 0.95)), yes, no)
                    for i in range(len(self.runs))
                ]
            )
        return out

    def watched(self, i: int, kind: str):
        w = self.watch[i]
        return w.get("threshold") if kind == "threshold" else (w.get("lower"), w.get("upper"))


def _changes_of(h: _Runs, kind: str) -> list[tuple[int, list[tuple[int, str, str]]]]:
    """Groups whose side changed between two runs watching the same value: (group, [(run, then, now), ...])."""
    out = []
    for g, seq in enumerate(h.sides(kind)):
        moves = []
        last, last_i = None, None
        for i, s in enumerate(seq):
            if s is None:
                continue
            if last is not None and s != last and h.watched(i, kind) == h.watched(last_i, kind):
                moves.append((i, last, s))
            last, last_i = s, i
        if moves:
            out.append((g, moves))
    return out


def render_history(source: str, ledger, runs, created: str | None = None) -> str:
    """The page, as one string. `ledger`: every BatchInfo of the store; `runs`: its RunRecords, oldest first
    (the last may be a run not yet recorded, id None)."""
    created = created or time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    h = _Runs(ledger, runs)
    R = len(h.runs)
    title = f"History of the store {source}"
    parts = [
        (
            f"{PAGE_START}"
            '<meta name="viewport" content="width=device-width,initial-scale=1">'
            f"<title>{esc(title)}</title><style>{CSS}{HISTORY_CSS}</style></head><body>"
        )
    ]
    active = sum(b.status == "active" for b in ledger)
    span = f"from {esc(h.labels[0])} to {esc(h.labels[-1])}" if R else "none yet"
    parts.append(
        f'<header class="top"><div class="wrap"><h1>{esc(title)}</h1><div class="sub">'
        f"{plural(R, 'run')} {span} · {plural(len(ledger), 'batch', 'batches')} in the ledger, "
        f"{whole(active)} active · drawn from the runs' recorded summaries · made {esc(created)} by pooling "
        f"{esc(__version__)}</div></div></header>"
    )
    parts.append(
        '<nav class="toc"><div class="wrap"><a href="#latest">Where things stand</a>'
        '<a href="#pooled">Pooled figures over the runs</a><a href="#each">Each group over the runs</a>'
        '<a href="#runs">The runs</a><a href="#ledger">The batches</a></div></nav><main class="wrap">'
    )
    if not R:
        parts.append(
            '<section id="latest"><h2>Where things stand</h2><p>The store has no recorded run yet: '
            "<code>pooling refit</code> records one.</p></section></main></body></html>"
        )
        return "".join(parts)
    last = h.runs[-1]
    lw = h.watch[-1]
    level = float(lw.get("level") or 0.95)
    lvl = level_label(level)
    width = (h.series["high"][:, -1] - h.series["low"][:, -1]) / 4.0 if h.with_groups else np.array([])
    mu_sd = last.summary.get("hyperparameters", {}).get("mu", {}).get("sd")
    v = Values(float(np.nanmedian(width)) if np.isfinite(width).any() else _num(mu_sd) if mu_sd else 1.0)
    parts.append(_latest(h, v, lvl))
    parts.append(_pooled_over_runs(h, v, level))
    parts.append(_each_group(h, level))
    parts.append(_runs_table(h))
    rows = [
        [
            esc(b.name),
            esc(str(b.dated_at)[:16].replace("T", " ")),
            _tag_status(b.status),
            esc(str(b.changed_at or "")[:16].replace("T", " ")),
            esc(b.note or ""),
            whole(b.rows),
            whole(b.groups),
        ]
        for b in ledger
    ]
    parts.append(
        '<section id="ledger"><h2>The batches</h2>'
        + _fold(
            f"Every batch in the ledger ({whole(len(ledger))})",
            html_table(
                [
                    ("batch", False),
                    ("dated", False),
                    ("status", False),
                    ("changed", False),
                    ("note", False),
                    ("measurements", True),
                    ("groups", True),
                ],
                rows,
            ),
            len(rows),
        )
        + "</section>"
    )
    parts.append(
        f"<footer>Made by pooling {esc(__version__)} on {esc(created)} from the store's recorded runs."
        "</footer></main></body></html>"
    )
    return "".join(parts)


def _tag_status(status: str) -> str:
    tone = {"active": "good", "withdrawn": "bad", "replaced": "open"}.get(status, "none")
    return f'<span class="tag {tone}">{esc(status)}</span>'


def _latest(h: _Runs, v, lvl: str) -> str:
    R = len(h.runs)
    last = h.runs[-1]
    out = ['<section id="latest" class="verdict"><h2>Where things stand</h2>']
    if not last.targets_met:
        out.append(
            '<div class="alarm"><strong>The latest run missed its diagnostics targets</strong>: look at its '
            "report before using its numbers.</div>"
        )
    bits = []
    for name, (mean, lo, hi) in h.hyper.items():
        if not np.isfinite(mean[-1]):
            continue
        txt = f"{esc(name)} <strong>{v(mean[-1])}</strong> ({lvl} interval {v(lo[-1])} to {v(hi[-1])})"
        if R > 1 and np.isfinite(mean[0]):
            d = mean[-1] - mean[0]
            txt += f', <span class="p">{"+" if d >= 0 else "−"}{v(abs(d), 1)} since {esc(h.labels[0])}</span>'
        bits.append(txt)
    where = "this run" if last.id is None else f"run {esc(last.id)}"
    out.append(f"<p>At the latest run ({where}, {esc(h.labels[-1])}): " + "; ".join(bits) + ".</p>")
    items = []
    G = len(h.group_labels)
    latest_has = bool(h.with_groups) and h.with_groups[-1] == R - 1
    for kind, what in (("threshold", "the threshold"), ("limits", "the limits")):
        watched = h.watched(R - 1, kind)
        if kind == "threshold" and watched is None or kind == "limits" and watched == (None, None):
            continue
        if not latest_has:
            continue
        sides = [s[-1] for s in h.sides(kind)]
        names = ("above", "below", "undecided") if kind == "threshold" else ("outside", "inside", "undecided")
        tally = ", ".join(f"{whole(sum(s == n for s in sides))} {n}" for n in names)
        ch = _changes_of(h, kind)
        val = given(watched) if kind == "threshold" else " to ".join("–" if x is None else given(x) for x in watched)
        line = f"<li><strong>Against {what} ({esc(val)})</strong>: {tally} now. "
        if ch:
            shown = ", ".join(
                f'{esc(label(h.group_labels[g]))} <span class="p">{esc(moves[-1][1])} → {esc(moves[-1][2])} at '
                f"{esc(h.labels[moves[-1][0]])}"
                + (f", {len(moves)} changes in all" if len(moves) > 1 else "")
                + "</span>"
                for g, moves in ch[:10]
            )
            line += (
                f"{plural(len(ch), 'group')} changed side over the runs (the latest change shown): {shown}"
                + (f" and {whole(len(ch) - 10)} more" if len(ch) > 10 else "")
                + "."
            )
        else:
            line += "No group changed side over the runs."
        items.append(line + "</li>")
    if items:
        out.append(
            f'<div class="verdict-grid"><div><ul>{"".join(items)}</ul></div>'
            f'<aside class="caution"><strong>What these decisions are</strong>{esc(CAUTION)}</aside></div>'
        )
    out.append(
        f'<p class="note">{plural(G, "group")} over {plural(R, "run")}; each run\'s own report has every '
        "number of that night.</p></section>"
    )
    return "".join(out)


def _pooled_over_runs(h: _Runs, v, level: float) -> str:
    svg = plots.history_pooled(h.labels, h.hyper, h.added, h.withdrawn, level)
    ev = []
    for i, (_added, gone) in enumerate(h.events):
        if i and gone:
            ev.append(f"{esc(h.labels[i])}: withdrawn or replaced " + ", ".join(esc(x) for x in gone))
    txt = (
        f"Each run's posterior mean (dot) and central {level_label(level)} interval (bar) of mu and tau. The "
        "strip below counts the batches each run added (grey, up) and those withdrawn or replaced since the run "
        "before (red, down)."
    )
    return (
        '<section id="pooled"><h2>Pooled figures over the runs</h2>'
        + f"<p>{txt}</p>"
        + f'<div class="fig">{svg}</div>'
        + (f'<p class="note">{"; ".join(ev)}.</p>' if ev else "")
        + "</section>"
    )


def _each_group(h: _Runs, level: float) -> str:
    R = len(h.runs)
    G = len(h.group_labels)
    if not G:
        return (
            '<section id="each"><h2>Each group over the runs</h2><p>None of the recorded runs kept its groups\' '
            "intervals (runs recorded by an earlier version of pooling do not); the next refit will.</p></section>"
        )
    mean, lo, hi = h.series["mean"], h.series["low"], h.series["high"]
    last = h.watch[-1]
    changed = {g for kind in ("threshold", "limits") for g, _ in _changes_of(h, kind)}
    note = ""
    chosen = np.arange(G)
    if G > MAX_PANELS:
        with np.errstate(all="ignore"):
            move = (np.nanmax(mean, axis=1) - np.nanmin(mean, axis=1)) / np.nanmedian(hi - lo, axis=1)
        move = np.nan_to_num(move, nan=-1.0)
        key = np.where([g in changed for g in range(G)], np.inf, move)
        chosen = np.sort(np.argsort(-key, kind="stable")[:MAX_PANELS])
        note = (
            f" Of the {whole(G)} groups, the {MAX_PANELS} shown are those whose decision changed, then those whose "
            "posterior mean moved most against their interval's width."
        )
    rank = h.series["rank_mean"][:, -1]
    rank = np.where(np.isfinite(rank), rank, np.inf)
    chosen = chosen[np.argsort(rank[chosen], kind="stable")]
    withdrawn_at = h.withdrawn > 0
    withdrawn_at[0] = False
    thr = last.get("threshold")
    lims = (last.get("lower"), last.get("upper"))
    figs = []
    for g in chosen:
        lo_g, hi_g = lo[g], hi[g]
        ok = np.isfinite(lo_g) & np.isfinite(hi_g)
        a, b = (float(np.min(lo_g[ok])), float(np.max(hi_g[ok]))) if ok.any() else (0.0, 1.0)
        figs.append(
            '<div class="fig">'
            + plots.history_group(
                h.group_labels[g],
                h.labels,
                mean[g],
                lo_g,
                hi_g,
                withdrawn_at,
                _near(thr, a, b),
                tuple(_near(x, a, b) for x in lims),
            )
            + "</div>"
        )
    missing = R - len(h.with_groups)
    gaps = (
        f" {plural(missing, 'run')} recorded by an earlier version of pooling kept no group intervals; they are "
        "empty in these pictures."
        if missing
        else ""
    )
    return (
        '<section id="each"><h2>Each group over the runs</h2>'
        f"<p>For each group, best first by its latest mean rank: its posterior mean (dot) and {level_label(level)} "
        "interval (bar) at every run in which it had data. A red dashed line marks a run at which batches were "
        "withdrawn; a dotted line is the threshold, a solid one a specification limit (when near the group). "
        f"Each picture has its own vertical scale.{note}{gaps}</p>"
        f'<div class="grid">{"".join(figs)}</div></section>'
    )


def _near(x, a: float, b: float):
    """x when a reference line there would not squash a picture spanning a..b (within one span of it), else None."""
    reach = max(b - a, 1e-300)
    return x if x is not None and a - reach <= x <= b + reach else None


def _runs_table(h: _Runs) -> str:
    rows = []
    for i, r in enumerate(h.runs):
        add, gone = h.events[i]
        hl = r.half_life_days
        rows.append(
            [
                esc("this run" if r.id is None else r.id),
                esc(h.labels[i]),
                esc(str(r.created_at)[:16].replace("T", " ")),
                whole(len(r.batch_ids)),
                esc(", ".join(add[:4]) + (f" and {len(add) - 4} more" if len(add) > 4 else "")) if add else "",
                esc(", ".join(gone)) if gone else "",
                whole(r.summary.get("groups", float("nan"))),
                "–" if hl is None else f"{hl:g}",
                '<span class="tag good">met</span>' if r.targets_met else '<span class="tag bad">missed</span>',
                f'<span class="mono">{esc(r.folder)}</span>',
            ]
        )
    table = html_table(
        [
            ("run", False),
            ("as of", False),
            ("made", False),
            ("active batches", True),
            ("added", False),
            ("withdrawn", False),
            ("groups", True),
            ("half-life (days)", True),
            ("targets", False),
            ("folder", False),
        ],
        rows,
    )
    return (
        '<section id="runs"><h2>The runs</h2>'
        + _fold(f"Every recorded run ({whole(len(rows))})", table, len(rows))
        + "</section>"
    )


def is_history_page(path) -> bool:
    """Whether the file at `path` is a history page this program wrote (its head, as render_history writes it):
    the only file `pooling history --out` replaces."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(1024).decode("utf-8", "replace")
    except OSError:
        return False
    return head.startswith(PAGE_START) and PAGE_TITLE in head


def write_history(path, source: str, ledger, runs) -> None:
    """history.html at `path`, written to a temporary sibling and renamed into place (never half-written), with
    the mode of a new file (0666 less the umask: readable by others where the umask allows, as every page of a
    run folder). An existing file at `path` is replaced only when it is a history page (is_history_page): a
    store, a table of data or any other file is refused, untouched."""
    import tempfile
    from pathlib import Path

    from ..errors import OutputError

    path = Path(path)
    if path.exists() and not path.is_dir() and not is_history_page(path):
        raise OutputError(
            f"cannot write '{path}': the file exists and is not a history page of pooling (a store, or data?); "
            "nothing was written: give a new file name, for example --out history.html"
        )
    text = render_history(source, ledger, runs)
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.partial-", dir=str(path.resolve().parent))
        mask = os.umask(0)  # mkstemp makes the file private (0600); the page gets the mode of a new file
        os.umask(mask)
        os.fchmod(fd, 0o666 & ~mask)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    except OSError as exc:
        _remove(tmp)
        raise OutputError(f"cannot write '{path}': {exc.strerror or exc}; nothing was written") from None
    except BaseException:
        _remove(tmp)
        raise


def _remove(tmp) -> None:
    if tmp is not None:
        try:
            os.unlink(tmp)
        except OSError:
            pass
