"""Small HTML pieces the report's sections share (report/page.py, report/predictors.py): escaping, tables,
cards and intervals. Cells handed to them are already escaped HTML."""

from __future__ import annotations

import html

from . import numbers as N
from .numbers import whole


def esc(x) -> str:
    return html.escape(str(x), quote=True)


def prob(x, dash: str = N.DASH) -> str:
    """numbers.prob as HTML text: '<0.001' and '>0.999' escaped, like every other text on the page."""
    return esc(N.prob(x, dash))


def prob_eq(x) -> str:
    """numbers.prob_eq as HTML text ('p &lt; 0.001')."""
    return esc(N.prob_eq(x))


def cell(c, num: bool) -> str:
    return f'<td class="n">{c}</td>' if num else f"<td>{c}</td>"


def html_table(
    head: list[tuple[str, bool]], rows: list[list[str]], gap_after: int | None = None, hidden: int = 0
) -> str:
    """head: (title, numeric) pairs; cells are already escaped HTML. A gap row after row `gap_after` says how
    many rows are left out (they are in groups.csv)."""
    out = ["<table><thead><tr>"]
    out += [f'<th class="n">{t}</th>' if num else f"<th>{t}</th>" for t, num in head]
    out.append("</tr></thead><tbody>")
    for i, r in enumerate(rows):
        out.append("<tr>" + "".join(cell(c, num) for c, (_, num) in zip(r, head)) + "</tr>")
        if gap_after is not None and i == gap_after and hidden:
            out.append(
                f'<tr class="gap"><td colspan="{len(head)}">… {whole(hidden)} more groups, in groups.csv …</td></tr>'
            )
    out.append("</tbody></table>")
    return "".join(out)


def card(k: str, v: str, i: str = "") -> str:
    return f'<div class="card"><div class="k">{k}</div><div class="v">{v}</div><div class="i">{i}</div></div>'


def interval_html(v, lo, hi, extra: int = 0) -> str:
    """An interval that may wrap between its ends, never inside a number."""
    return f'<span class="nw">{v(lo, extra)}</span> to <span class="nw">{v(hi, extra)}</span>'


def label(x, width: int = 40) -> str:
    """A group label for prose (clipped); tables show it whole."""
    x = str(x)
    return x if len(x) <= width else x[: width - 1] + "…"
