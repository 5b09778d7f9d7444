"""Pictures for the report, drawn with matplotlib's Agg machinery and returned as SVG text to be
embedded inline. Labels from the data are drawn with mathtext parsing off, so a '$' in a group
name is just a dollar sign; matplotlib escapes the SVG it writes.

Above MANY groups the per-group pictures switch to forms that scale (a scatter, a band), drawn
rasterised inside the SVG so a report for 10,000 groups stays a few megabytes.
"""
from __future__ import annotations

import io
import re
import warnings

import matplotlib

matplotlib.use("Agg", force=False)  # no display is ever needed; a no-op if a backend is already chosen
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap, PowerNorm  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

MANY = 60

INK = "#1f2a36"
MUTED = "#7b8591"
GRID = "#e3e6ea"
POST = "#1f6f78"      # posterior quantities
RAW = "#a7763c"       # the groups' own means
POOL = "#5a3d8a"      # mu, the pooled mean
LIMIT = "#b23a2a"     # specification limits and thresholds
CHAINS = ["#1f6f78", "#c0672a", "#5a3d8a", "#6b8e23", "#b23a2a", "#3b6ea8", "#8c6d1f", "#555f6b"]
HEAT = LinearSegmentedColormap.from_list("pooling_heat", ["#fbfaf7", "#cfe4e1", "#5fa3a3", "#1f6f78", "#132f3a"])

_RC = {
    "text.parse_math": False, "svg.fonttype": "none",
    "font.family": "DejaVu Sans", "font.size": 10, "axes.edgecolor": "#9aa3ad", "axes.labelcolor": INK,
    "xtick.color": INK, "ytick.color": INK, "axes.titlesize": 10, "axes.titleweight": "bold",
    "axes.spines.top": False, "axes.spines.right": False, "axes.grid": True, "grid.color": GRID,
    "grid.linewidth": 0.7, "axes.axisbelow": True, "legend.frameon": False, "legend.fontsize": 9,
}


def plain(label: str, width: int = 28) -> str:
    """A label fit for an axis: control characters become spaces, long labels are clipped."""
    label = re.sub(r"[\x00-\x1f\x7f]", " ", str(label))
    return label if len(label) <= width else label[: width - 1] + "…"


def _svg(fig: Figure, name: str) -> str:
    buf = io.StringIO()
    # a fixed salt for the ids matplotlib derives by hashing, so the same draws give the same file
    # labels in scripts the plotting font lacks (CJK, emoji) draw as boxes; the tables beside each
    # picture carry the exact labels, so the per-glyph warnings would only be noise on a good run
    with plt.rc_context({"svg.hashsalt": "pooling"}), warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from (current )?font", category=UserWarning)
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": "pooling"}, dpi=150)
    plt.close(fig)
    text = buf.getvalue()
    text = text[text.index("<svg"):]  # drop the XML prolog and doctype: the SVG goes inline into HTML
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, count=1, flags=re.S)  # RDF boilerplate
    # every picture shares one HTML document, where an id must be unique: prefix them all
    text = re.sub(r'(\sid=")([^"]+)"', rf'\1{name}-\2"', text)
    text = re.sub(r'(url\(#|href="#)([^)"]+)', rf'\1{name}-\2', text)
    m = re.match(r'<svg([^>]*)width="([\d.]+)pt" height="([\d.]+)pt"', text)
    if m:
        w = float(m.group(2)) * 4 / 3
        text = text.replace(f'width="{m.group(2)}pt" height="{m.group(3)}pt"',
                            f'class="figure" style="max-width:{w:.0f}px" role="img"', 1)
    return text


def _fig(w: float, h: float) -> Figure:
    return plt.figure(figsize=(w, h), dpi=100, layout="constrained")


def _tick_labels(ax, labels, axis="y"):
    labs = [plain(x) for x in labels]
    if axis == "y":
        ax.set_yticks(np.arange(len(labs)), labs)
    else:
        ax.set_xticks(np.arange(len(labs)), labs, rotation=90)


def _height(rows: int) -> float:
    return max(2.6, 0.9 + 0.2 * rows)


WIDE = 10.0  # inches; the report's column is about 1,000 px, so pictures show near their drawn size


def _legend_top(ax, ncol: int = 5):
    ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.0), ncol=ncol, borderaxespad=0.3, handletextpad=0.4,
              columnspacing=1.4)


# ---------------------------------------------------------------------------------------------

def shrinkage(table, mu_mean: float, title: str = "") -> str:
    """Each group's own mean pulled to its posterior mean; markers sized by n; mu drawn as a line."""
    with plt.rc_context(_RC):
        J = len(table)
        size = 12 + 110 * np.sqrt(table["n"].to_numpy() / max(1, table["n"].max()))
        if J <= MANY:
            order = np.argsort(table["theta_mean"].to_numpy())
            t = table.iloc[order]
            fig = _fig(WIDE, _height(J))
            ax = fig.add_subplot()
            y = np.arange(J)
            raw, post = t["raw_mean"].to_numpy(), t["theta_mean"].to_numpy()
            ax.axvline(mu_mean, color=POOL, lw=1.2, ls="--", label="pooled mean (mu)")
            for yi, a, b in zip(y, raw, post):
                if a != b:
                    ax.annotate("", xy=(b, yi), xytext=(a, yi),
                                arrowprops=dict(arrowstyle="-|>", color=MUTED, lw=0.9, shrinkA=3, shrinkB=2,
                                                mutation_scale=8))
            ax.scatter(raw, y, s=size[order], facecolor="white", edgecolor=RAW, lw=1.3, zorder=3,
                       label="group's own mean (area ∝ n)")
            ax.scatter(post, y, s=16, color=POST, zorder=4, label="posterior mean")
            _tick_labels(ax, t["group"].tolist())
            ax.set_ylim(-0.7, J - 0.3)
            ax.grid(axis="y", visible=False)
            ax.set_xlabel("theta")
            _legend_top(ax)
        else:
            fig = _fig(7.0, 5.6)
            ax = fig.add_subplot()
            raw, post = table["raw_mean"].to_numpy(), table["theta_mean"].to_numpy()
            lo, hi = np.nanmin(raw), np.nanmax(raw)
            ax.plot([lo, hi], [lo, hi], color=MUTED, lw=1, label="no pooling (posterior = own mean)")
            ax.axhline(mu_mean, color=POOL, lw=1.2, ls="--", label="complete pooling (mu)")
            ax.scatter(raw, post, s=size * 0.35, color=POST, alpha=0.45, lw=0, rasterized=True,
                       label="group (area ∝ n)")
            ax.set_xlabel("group's own mean")
            ax.set_ylabel("posterior mean")
            ax.legend(loc="upper left")
        if title:
            ax.set_title(title, loc="left")
        return _svg(fig, "shrinkage")


def intervals(table, mu_mean: float, level: float, lower=None, upper=None, threshold=None) -> str:
    """Credible intervals of theta_j sorted by posterior mean, with mu, limits and threshold drawn in."""
    with plt.rc_context(_RC):
        J = len(table)
        order = np.argsort(table["theta_mean"].to_numpy())
        t = table.iloc[order]
        m, lo, hi = (t[c].to_numpy() for c in ("theta_mean", "theta_low", "theta_high"))
        few = J <= MANY
        fig = _fig(WIDE, _height(J) if few else 4.4)
        ax = fig.add_subplot()
        if few:  # one row per group, values across
            y = np.arange(J)
            ax.hlines(y, lo, hi, color=POST, lw=2.4, alpha=0.5, label=f"{level:.0%} credible interval")
            ax.scatter(m, y, s=15, color=POST, zorder=3, label="posterior mean")
            ax.scatter(t["raw_mean"].to_numpy(), y, marker="|", s=50, color=RAW, zorder=3, label="own mean")
            _tick_labels(ax, t["group"].tolist())
            ax.set_ylim(-0.7, J - 0.3)
            ax.grid(axis="y", visible=False)
            line = ax.axvline
            ax.set_xlabel("theta")
        else:  # groups along the bottom as a band: thousands of rows would be unreadable
            x = np.arange(J)
            ax.fill_between(x, lo, hi, color=POST, alpha=0.25, lw=0, rasterized=True, label=f"{level:.0%} credible interval")
            ax.plot(x, m, color=POST, lw=1.2, rasterized=True, label="posterior mean")
            ax.set_xlabel("groups, sorted by posterior mean")
            ax.set_ylabel("theta")
            line = ax.axhline
        line(mu_mean, color=POOL, lw=1.2, ls="--", label="pooled mean (mu)")
        for val, name, style in ((lower, "lower limit", "-"), (upper, "upper limit", "-"), (threshold, "threshold", ":")):
            if val is not None:
                line(val, color=LIMIT, lw=1.3, ls=style, label=f"{name} {val:g}")
        _legend_top(ax)
        return _svg(fig, "intervals")


def rank_heat(matrix: np.ndarray, labels, columns) -> str:
    """P(rank = r) as a heat map: groups down the side in order of mean rank, ranks across."""
    with plt.rc_context(_RC):
        rows, cols = matrix.shape
        fig = _fig(max(5.5, min(WIDE, 2.2 + 0.22 * cols)), _height(rows) + 0.3)
        ax = fig.add_subplot()
        # a square-root scale: with many groups most probabilities are small, and they are the story
        im = ax.pcolormesh(np.arange(cols + 1) - 0.5, np.arange(rows + 1) - 0.5, matrix, cmap=HEAT,
                           norm=PowerNorm(0.5, vmin=0.0, vmax=max(0.05, float(matrix.max()))), lw=0,
                           rasterized=True)
        ax.set_xlim(-0.5, cols - 0.5)
        ax.set_ylim(rows - 0.5, -0.5)
        _tick_labels(ax, labels)
        step = max(1, int(np.ceil(cols / 20)))
        ticks = np.arange(0, cols, step)
        ax.set_xticks(ticks, [str(columns[i]) for i in ticks])
        ax.grid(False)
        ax.set_xlabel("rank (1 = best)")
        ax.xaxis.set_label_position("top")
        ax.xaxis.tick_top()
        for sp in ax.spines.values():
            sp.set_visible(False)
        cb = fig.colorbar(im, ax=ax, fraction=0.03, pad=0.015, shrink=min(1.0, 4.0 / _height(rows)), anchor=(0, 1))
        cb.set_label("probability")
        cb.outline.set_visible(False)
        return _svg(fig, "rank_heat")


def hyper_traces(named: dict[str, np.ndarray]) -> str:
    """For each hyperparameter (chains, draws): the trace by chain and a rank histogram per chain."""
    with plt.rc_context(_RC):
        k = len(named)
        fig = _fig(WIDE, 1.7 * k + 0.4)
        rng = np.random.default_rng(0)  # breaks ties in the ranks of a discrete quantity (nu) at random
        axes = fig.subplots(k, 2, squeeze=False, gridspec_kw={"width_ratios": [2.3, 1]})
        for row, (name, x) in enumerate(named.items()):
            C, D = x.shape
            step = max(1, int(np.ceil(D / 500)))  # thinned for the picture only; every draw enters the ranks
            flat = x.reshape(-1)
            # tied draws (nu lives on a grid) get their order at random, so a rank histogram of a
            # well-mixed discrete quantity is flat too (common practice)
            ranks = np.empty(flat.size)
            ranks[np.lexsort((rng.random(flat.size), flat))] = np.arange(1, flat.size + 1)
            ranks = ranks.reshape(C, D)
            edges = np.linspace(0.5, C * D + 0.5, 21)
            for c in range(C):
                col = CHAINS[c % len(CHAINS)]
                axes[row, 0].plot(np.arange(0, D, step), x[c, ::step], color=col, lw=0.55, alpha=0.75)
                h, _ = np.histogram(ranks[c], edges)
                axes[row, 1].step(np.arange(20), h, where="mid", color=col, lw=1.1)
            axes[row, 1].axhline(D / 20, color=MUTED, ls=":", lw=1)
            axes[row, 1].set_ylim(0, D / 20 * 2)
            axes[row, 0].set_ylabel(name)
            axes[row, 1].set_yticks([])
            axes[row, 1].set_xticks([])
            if row == 0:
                axes[row, 0].set_title("draws by chain", loc="left")
                axes[row, 1].set_title("ranks by chain (flat = mixed)", loc="left")
        axes[-1, 0].set_xlabel("draw")
        axes[-1, 1].set_xlabel("rank bins over all chains")
        return _svg(fig, "hyper_traces")


def predictive(spread: dict | None, sd: dict | None, labels) -> str:
    """Replicated against observed: the spread of the group means, and each group's within-group sd."""
    panels = [name for name, x in (("spread", spread), ("sd", sd)) if x is not None]
    if not panels:
        return ""
    with plt.rc_context(_RC):
        fig = _fig(WIDE if len(panels) == 2 else WIDE * 0.6, 3.4)
        axes = dict(zip(panels, fig.subplots(1, len(panels), squeeze=False)[0]))
        if spread is not None:
            ax = axes["spread"]
            ax.hist(spread["replicated"], bins=40, color=POST, alpha=0.55, lw=0)
            ax.axvline(spread["observed"], color=LIMIT, lw=1.6, label=f"observed (p = {spread['p_value']:.2f})")
            ax.set_title("spread of the group means", loc="left")
            ax.set_xlabel("sd over groups of the means, replicated")
            ax.set_yticks([])
            ax.legend(loc="upper right")
        if sd is not None:
            ax = axes["sd"]
            order = np.argsort(sd["median"])
            x = np.arange(len(order))
            many = len(order) > MANY
            ax.fill_between(x, sd["low"][order], sd["high"][order], color=POST, alpha=0.22, lw=0, step="mid",
                            rasterized=many, label=f"replicated, {sd['level']:.0%}")
            ax.scatter(x, sd["observed"][order], s=6 if many else 12, color=RAW, zorder=3, lw=0,
                       rasterized=many, label="observed")
            ax.set_title("within-group sd", loc="left")
            ax.set_xlabel("groups with n ≥ 2, by replicated median")
            ax.legend(loc="upper left")
        return _svg(fig, "predictive")
