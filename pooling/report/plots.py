"""Pictures for the report, drawn with the project's own SVG layer (svg.py) and returned as SVG text
to be embedded inline. Labels from the data are escaped by svg.text and clipped by `plain`.

Above MANY groups the per-group pictures switch to forms that scale (a scatter, a band); they stay
vector drawings, about 40 bytes a point, so a report for 10,000 groups stays a few megabytes.
"""

from __future__ import annotations

import re

import numpy as np

from .numbers import Values, given, typical_sd
from .svg import Canvas, nice_ticks

MANY = 60

INK = "#1f2a36"
MUTED = "#7b8591"
GRID = "#e3e6ea"
POST = "#1f6f78"  # posterior quantities
RAW = "#a7763c"  # the groups' own means
POOL = "#5a3d8a"  # mu, the pooled mean
LIMIT = "#b23a2a"  # specification limits and thresholds
CHAINS = ["#1f6f78", "#c0672a", "#5a3d8a", "#6b8e23", "#b23a2a", "#3b6ea8", "#8c6d1f", "#555f6b"]
HEAT_STOPS = ["#fbfaf7", "#cfe4e1", "#5fa3a3", "#1f6f78", "#132f3a"]  # low to high, evenly spaced on 0..1

WIDE = 960.0  # px; the report's column is about 1,000 px, so pictures show near their drawn size
ROW = 18.0  # px per group in one-row-per-group pictures
WHITE = "#ffffff"

_STOP_RGB = np.array([[int(c[i : i + 2], 16) for i in (1, 3, 5)] for c in HEAT_STOPS], dtype=float)


def plain(label: str, width: int = 28) -> str:
    """A label fit for an axis: control characters become spaces, long labels are clipped."""
    label = re.sub(r"[\x00-\x1f\x7f]", " ", str(label))
    return label if len(label) <= width else label[: width - 1] + "…"


def heat_rgb(x) -> np.ndarray:
    """Colours of the heat scale at x in [0, 1] (clipped): linear interpolation between the
    HEAT_STOPS, evenly spaced (a missing value takes the lowest colour); returns (..., 3) floats 0..255."""
    x = np.clip(np.nan_to_num(np.asarray(x, dtype=float), nan=0.0), 0.0, 1.0)
    pos = x * (len(HEAT_STOPS) - 1)
    i = np.minimum(pos.astype(np.int64), len(HEAT_STOPS) - 2)
    f = (pos - i)[..., None]
    return _STOP_RGB[i] * (1.0 - f) + _STOP_RGB[i + 1] * f


def heat_hex(x):
    """'#rrggbb' of the heat scale at x in [0, 1]; an array of them for an array x."""
    rgb = np.rint(heat_rgb(x)).astype(np.int64)
    flat = rgb.reshape(-1, 3)
    out = np.array([f"#{r:02x}{g:02x}{b:02x}" for r, g, b in flat.tolist()], dtype=object)
    return out[0] if rgb.ndim == 1 else out.reshape(rgb.shape[:-1])


def _labels(labels) -> list[str]:
    return [plain(x) for x in labels]


def _rows_height(rows: int, extra: float = 0.0) -> float:
    return max(260.0, ROW * (rows + 0.4) + 84.0 + extra)


def _marker_area(n: np.ndarray, most: float) -> np.ndarray:
    """Marker area in px^2 proportional to n (largest group: `most`), at least a visible dot."""
    n = np.asarray(n, dtype=float)
    top = np.nanmax(n) if n.size else 0.0
    if not (top > 0 and np.isfinite(top)):  # no sizes, or 1/se^2 beyond the float range: equal markers
        return np.full(n.shape, most / 3)
    return np.maximum(most * n / top, 5.0)


# ---------------------------------------------------------------------------------------------


def _outlying(table) -> np.ndarray:
    return table["outlying"].to_numpy(dtype=bool) if "outlying" in table else np.zeros(len(table), dtype=bool)


def _ring_outlying(panel, table, x, y, area: float, width: float) -> None:
    """Rings around the groups flagged outlying, over their points at (x, y)."""
    out = _outlying(table)
    if out.any():
        panel.points(
            x[out], y[out], area, fill="none", stroke=LIMIT, stroke_width=width, key="flagged outlying", role="outlying"
        )


def marker_size(table) -> tuple[np.ndarray, str]:
    """What a group's marker area shows: n, or, for estimates with standard errors (no n), the precision
    1/se^2, the weight the estimate carries."""
    if "std_error" in table:
        se = table["std_error"].to_numpy(dtype=float)
        with np.errstate(divide="ignore"):
            return 1.0 / se**2, "area ∝ 1/se²"
    return table["n"].to_numpy(dtype=float), "area ∝ n"


def shrinkage(table, mu_mean: float, title: str = "") -> str:
    """Each group's own mean pulled to its posterior mean; markers sized by n (by 1/se^2 for estimates); mu
    drawn as a line; groups flagged outlying (heavy tails) ringed."""
    J = len(table)
    size, size_key = marker_size(table)
    if J <= MANY:
        order = np.argsort(table["theta_mean"].to_numpy(), kind="stable")
        t = table.iloc[order]
        y = np.arange(J, dtype=float)
        raw, post = t["raw_mean"].to_numpy(dtype=float), t["theta_mean"].to_numpy(dtype=float)
        area = _marker_area(size[order], 200.0)
        h = _rows_height(J, 22.0 if title else 0.0)
        c = Canvas(WIDE, h, "shrinkage", "Each group's own mean and its posterior mean")
        p = c.panel(
            0,
            0,
            WIDE,
            h,
            title=title,
            xlabel="theta",
            yticks=(y, _labels(t["group"])),
            ygrid=False,
            ylim=(-0.7, J - 0.3),
        )
        p.vline(mu_mean, POOL, 1.5, "dashed", key="pooled mean (mu)")
        moved = raw != post
        post_area = 18.0
        p.arrows(
            raw[moved],
            y[moved],
            post[moved],
            y[moved],
            MUTED,
            1.1,
            head=6.0,
            shrink_start=np.sqrt(area[moved] / np.pi) + 1.0,
            shrink_end=np.sqrt(post_area / np.pi) + 0.5,
        )
        p.points(
            raw,
            y,
            area,
            fill=WHITE,
            stroke=RAW,
            stroke_width=1.6,
            key=f"group's own mean ({size_key})",
            role="own-mean",
        )
        p.points(post, y, post_area, fill=POST, key="posterior mean", role="posterior-mean")
        _ring_outlying(p, t, post, y, 150.0, 2.0)
    else:
        raw, post = table["raw_mean"].to_numpy(dtype=float), table["theta_mean"].to_numpy(dtype=float)
        area = _marker_area(size, 40.0)
        c = Canvas(720, 580 + (22 if title else 0), "shrinkage", "Posterior mean against own mean, every group")
        p = c.panel(
            0, 0, 720, 580 + (22 if title else 0), title=title, xlabel="group's own mean", ylabel="posterior mean"
        )
        lo, hi = np.nanmin(raw), np.nanmax(raw)
        p.line([lo, hi], [lo, hi], MUTED, 1.2, key="no pooling (posterior = own mean)")
        p.hline(mu_mean, POOL, 1.5, "dashed", key="complete pooling (mu)")
        p.points(raw, post, area, fill=POST, opacity=0.45, key=f"group ({size_key})", role="posterior-mean")
        _ring_outlying(p, table, raw, post, 90.0, 1.6)
    return c.svg()


def intervals(table, mu_mean: float, level: float, lower=None, upper=None, threshold=None, key: str = "95") -> str:
    """Credible intervals of theta_j sorted by posterior mean, with mu, limits and threshold drawn in; groups
    flagged outlying drawn in the limit colour. `key` names the interval columns (theta_low_<key>)."""
    J = len(table)
    order = np.argsort(table["theta_mean"].to_numpy(), kind="stable")
    t = table.iloc[order]
    m, lo, hi = (t[col].to_numpy(dtype=float) for col in ("theta_mean", f"theta_low_{key}", f"theta_high_{key}"))
    out = _outlying(t)
    if J <= MANY:  # one row per group, values across
        h = _rows_height(J)
        c = Canvas(WIDE, h, "intervals", f"{level:.0%} credible intervals of theta, by group")
        p = c.panel(
            0, 0, WIDE, h, xlabel="theta", yticks=(np.arange(J), _labels(t["group"])), ygrid=False, ylim=(-0.7, J - 0.3)
        )
        y = np.arange(J, dtype=float)
        p.hsegments(y, lo, hi, POST, 3.4, 0.5, key=f"{level:.0%} credible interval", role="interval")
        p.points(m, y, 18.0, fill=POST, key="posterior mean", role="posterior-mean")
        p.vsegments(t["raw_mean"].to_numpy(dtype=float), y - 0.3, y + 0.3, RAW, 1.5, key="own mean", role="own-mean")
        if out.any():
            p.hsegments(y[out], lo[out], hi[out], LIMIT, 3.4, 0.8, key="flagged outlying", role="outlying")
        line = p.vline
    else:  # groups along the bottom as a band: thousands of rows would be unreadable
        c = Canvas(WIDE, 440, "intervals", f"{level:.0%} credible intervals of theta, groups sorted")
        p = c.panel(0, 0, WIDE, 440, xlabel="groups, sorted by posterior mean", ylabel="theta", xpad=0.0)
        x = np.arange(J, dtype=float)
        p.band(x, lo, hi, POST, 0.25, key=f"{level:.0%} credible interval", role="interval")
        p.line(x, m, POST, 1.3, key="posterior mean", role="posterior-mean")
        line = p.hline
    line(mu_mean, POOL, 1.5, "dashed", key="pooled mean (mu)")
    for val, name, style in (
        (lower, "lower limit", "solid"),
        (upper, "upper limit", "solid"),
        (threshold, "threshold", "dotted"),
    ):
        if val is not None:
            line(val, LIMIT, 1.5, style, key=f"{name} {given(val)}")
    return c.svg()


def rank_heat(matrix: np.ndarray, labels, columns) -> str:
    """P(rank = r) as a heat map: groups down the side in order of mean rank, ranks across."""
    return heat(
        matrix, labels, columns, "rank (1 = best)", "rank_heat", "Probability of each rank, by group", sqrt_scale=True
    )


def heat(
    matrix: np.ndarray,
    labels,
    columns,
    xlabel: str,
    name: str,
    description: str,
    sqrt_scale: bool = False,
    vmax: float | None = None,
) -> str:
    """A matrix of probabilities as coloured cells: rows down the side, columns across the top. sqrt_scale:
    colours on a square-root scale (with many groups most probabilities are small, and they are the story)."""
    matrix = np.asarray(matrix, dtype=float)
    rows, cols = matrix.shape
    if vmax is None:
        vmax = max(0.05, float(np.nanmax(matrix))) if np.isfinite(matrix).any() else 0.05
    frac = np.clip(np.nan_to_num(matrix) / vmax, 0.0, 1.0)
    colors = heat_hex(np.sqrt(frac) if sqrt_scale else frac)
    w = max(560.0, min(WIDE, 300.0 + 22.0 * cols))
    top = 56.0
    h = max(240.0, ROW * rows + top + 14.0)
    c = Canvas(w, h, name, description)
    step = max(1, int(np.ceil(cols / 20)))
    ticks = np.arange(0, cols, step)
    p = c.panel(
        0,
        0,
        w,
        h,
        xlabel=xlabel,
        xside="top",
        flip_y=True,
        frame=False,
        xgrid=False,
        ygrid=False,
        xlim=(-0.5, cols - 0.5),
        ylim=(-0.5, rows - 0.5),
        xticks=(ticks, [str(columns[i]) for i in ticks]),
        yticks=(np.arange(rows), _labels(labels)),
    )
    p.minimum["top"] = top  # room for the rank labels and the axis label above the cells
    p.cells(np.arange(cols + 1) - 0.5, np.arange(rows + 1) - 0.5, colors, skip=HEAT_STOPS[0], role="cells")
    vals, labs, _ = nice_ticks(0.0, vmax)
    keep = vals <= vmax * (1 + 1e-9)
    where = np.sqrt(vals[keep] / vmax) if sqrt_scale else vals[keep] / vmax
    p.colorbar(
        HEAT_STOPS, where, [x for x, k in zip(labs, keep) if k], label="probability", height=min(260.0, ROW * rows)
    )
    return c.svg()


def hyper_traces(named: dict[str, np.ndarray]) -> str:
    """For each hyperparameter (chains, draws): the trace by chain and a rank histogram per chain."""
    k = len(named)
    row_h = 150.0
    head = 24.0
    foot = 34.0
    h = head + row_h * k + foot
    c = Canvas(WIDE, h, "hyper_traces", "Hyperparameter draws by chain, and rank histograms by chain")
    left_w = WIDE * 2.3 / 3.3
    rng = np.random.default_rng(0)  # breaks ties in the ranks of a discrete quantity (nu) at random
    lefts, rights = [], []
    for row, (name, x) in enumerate(named.items()):
        x = np.asarray(x, dtype=float)
        C, D = x.shape
        last = row == k - 1
        y = (0.0 if row == 0 else head) + row * row_h
        hh = row_h + (head if row == 0 else 0.0) + (foot if last else 0.0)
        a = c.panel(
            0,
            y,
            left_w,
            hh,
            title="draws by chain" if row == 0 else "",
            ylabel=name,
            xlabel="draw" if last else "",
            xpad=0.0,
            ypad=0.05,
        )
        b = c.panel(
            left_w,
            y,
            WIDE - left_w,
            hh,
            title="ranks by chain (flat = mixed)" if row == 0 else "",
            xlabel="rank bins over all chains" if last else "",
            xticks=False,
            yticks=False,
            xlim=(0, 20),
            ylim=(0, None),
            ypad=0.0,
        )
        lefts.append(a)
        rights.append(b)
        step = max(1, int(np.ceil(D / 500)))  # thinned for the picture only; every draw enters the ranks
        flat = x.reshape(-1)
        # tied draws (nu lives on a grid) get their order at random, so a rank histogram of a
        # well-mixed discrete quantity is flat too (common practice)
        ranks = np.empty(flat.size)
        ranks[np.lexsort((rng.random(flat.size), flat))] = np.arange(1, flat.size + 1)
        ranks = ranks.reshape(C, D)
        edges = np.linspace(0.5, C * D + 0.5, 21)
        tallest = D / 20 * 2
        idx = np.arange(0, D, step)
        for ch in range(C):
            col = CHAINS[ch % len(CHAINS)]
            a.line(idx, x[ch, ::step], col, 0.7, opacity=0.75, role="trace")
            hist, _ = np.histogram(ranks[ch], edges)
            tallest = max(tallest, float(hist.max()) * 1.05)
            b.steps(np.arange(21), hist, color=col, width=1.2, closed=False, role="ranks")
        b.hline(D / 20, MUTED, 1.0, "dotted")
        b.lims["y"] = (0.0, tallest)
    c.align(*lefts, sides="left")
    for a, b in zip(lefts, rights):
        c.align(a, b, sides="top bottom")
    return c.svg()


def predictive(spread: dict | None, sd: dict | None, labels, extreme: dict | None = None) -> str:
    """Replicated against observed: the spread of the group means, the most extreme standardised deviation
    (observed and replicated, draw by draw) and each group's within-group sd."""
    panels = [name for name, x in (("spread", spread), ("extreme", extreme), ("sd", sd)) if x is not None]
    if not panels:
        return ""
    w = WIDE if len(panels) >= 2 else WIDE * 0.6
    h = 340.0
    c = Canvas(w, h, "predictive", "Posterior predictive checks: replicated against observed")
    each = w / len(panels)
    made = []
    at = 0.0
    if spread is not None:
        p = c.panel(
            at,
            0,
            each,
            h,
            title="spread of the group means",
            xlabel="sd over groups of the means, replicated",
            yticks=False,
            ylim=(0, None),
            ypad=0.05,
        )
        rep = np.asarray(spread["replicated"], dtype=float)
        rep = rep[np.isfinite(rep)]
        if rep.size:
            counts, edges = np.histogram(rep, bins=40)
            p.steps(edges, counts, fill=POST, opacity=0.55, role="replicated")
        p.vline(spread["observed"], LIMIT, 2.0, key=f"observed (p = {spread['p_value']:.2f})", role="observed")
        made.append(p)
        at += each
    if extreme is not None:
        who = plain(labels[extreme["group"]], 18)
        p = c.panel(
            at,
            0,
            each,
            h,
            title="most extreme group",
            ylabel="replicated",
            xlabel=f"observed: most extreme / typical deviation (mostly {who})",
            ypad=0.05,
            xpad=0.05,
        )
        obs = np.asarray(extreme["observed"], dtype=float)
        rep = np.asarray(extreme["replicated"], dtype=float)
        ok = np.isfinite(obs) & np.isfinite(rep)
        top = float(max(np.max(obs[ok]), np.max(rep[ok]))) if ok.any() else 1.0
        p.line([0.0, top], [0.0, top], MUTED, 1.0, key=f"replicated = observed (p = {extreme['p_value']:.2f})")
        p.points(obs[ok], rep[ok], 6.0, fill=POST, opacity=0.4, role="draws")
        made.append(p)
        at += each
    if sd is not None:
        p = c.panel(
            at,
            0,
            each,
            h,
            title="within-group sd",
            ylabel="sd",
            xlabel="groups with n ≥ 2, in order of replicated median sd",
            xpad=0.01,
        )
        order = np.argsort(sd["median"], kind="stable")
        x = np.arange(len(order), dtype=float)
        many = len(order) > MANY
        lo, hi = np.asarray(sd["low"])[order], np.asarray(sd["high"])[order]
        obs = np.asarray(sd["observed"])[order]
        p.band(x, lo, hi, POST, 0.22, step=not many, key=f"replicated, {sd['level']:.0%}", role="replicated")
        inside = (obs >= lo) & (obs <= hi)
        p.points(x[inside], obs[inside], 8.0 if many else 16.0, fill=RAW, key="observed", role="observed")
        if (~inside).any():
            p.points(
                x[~inside],
                obs[~inside],
                12.0 if many else 22.0,
                fill=LIMIT,
                key="observed, outside its band",
                role="observed-outside",
            )
        made.append(p)
    if len(made) >= 2:
        c.align(*made, sides="top bottom")
    return c.svg()


def df_posterior(grid, prior, post) -> str:
    """The posterior of the between-group df over its grid, beside its prior (inf drawn as 'normal')."""
    from .svg import Canvas

    k = len(grid)
    labels = ["normal" if not np.isfinite(g) else f"{g:g}" for g in grid]
    c = Canvas(WIDE * 0.7, 300, "df_posterior", "Posterior and prior probability of each df of the between-group tail")
    p = c.panel(
        0,
        0,
        WIDE * 0.7,
        300,
        xlabel="degrees of freedom of the between-group distribution (heavier tail left)",
        ylabel="probability",
        xticks=(np.arange(k), labels),
        xlim=(-0.6, k - 0.4),
        ylim=(0, None),
        ypad=0.05,
    )
    x = np.arange(k, dtype=float)
    p.vsegments(x - 0.15, np.zeros(k), np.asarray(prior, dtype=float), MUTED, 9.0, key="prior", role="prior")
    p.vsegments(x + 0.15, np.zeros(k), np.asarray(post, dtype=float), POST, 9.0, key="posterior", role="posterior")
    return c.svg()


def histograms(t, mu_mean: float) -> str:
    """Two histograms over all groups: posterior means (own means drawn as a line) and shrinkage weights."""
    w, h = 960.0, 340.0
    split = w * 1.4 / 2.4
    c = Canvas(w, h, "summary-hist", "Histograms over all groups: posterior and own means, shrinkage weights")
    a = c.panel(
        0,
        0,
        split,
        h,
        title="where the groups sit",
        ylabel="groups",
        ylim=(0, None),
        ypad=0.05,
        xlabel="theta (the outermost 0.05% of each end folded into the end bins)",
    )
    post, raw = t["theta_mean"].to_numpy(dtype=float), t["raw_mean"].to_numpy(dtype=float)
    both = np.concatenate([post, raw])
    both = both[np.isfinite(both)]
    lo, hi = np.quantile(both, [0.0005, 0.9995]) if both.size else (0.0, 1.0)
    if not hi > lo:
        lo, hi = lo - 0.5, hi + 0.5
    edges = np.linspace(lo, hi, 81)
    a.steps(
        edges,
        np.histogram(np.clip(post[np.isfinite(post)], lo, hi), edges)[0],
        fill=POST,
        opacity=0.6,
        key="posterior means",
        role="posterior-means",
    )
    a.steps(
        edges,
        np.histogram(np.clip(raw[np.isfinite(raw)], lo, hi), edges)[0],
        color=RAW,
        width=1.3,
        key="own means",
        role="own-means",
    )
    a.vline(mu_mean, POOL, 1.5, "dashed", key="pooled mean (mu)")
    b = c.panel(
        split,
        0,
        w - split,
        h,
        title="how far each was pulled",
        ylabel="groups",
        ylim=(0, None),
        ypad=0.05,
        xlim=(0, 1),
        xlabel="shrinkage weight: 0 own mean, 1 pooled mean",
    )
    wt = t["shrink_weight"].to_numpy(dtype=float)
    bins = np.linspace(0, 1, 51)
    b.steps(bins, np.histogram(wt[np.isfinite(wt)], bins)[0], fill=POST, opacity=0.6, role="weights")
    c.align(a, b, sides="top bottom")
    return c.svg()


PAIRS_AS_TABLE = 8  # head to head: up to this many groups a table of numbers, beyond it a picture


def constant_draws(named: dict) -> list[str]:
    """Names whose every draw is the same value (a fixed nu, or one pinned at the end of its grid): a trace
    of them is a flat line that says nothing."""
    out = []
    for k, v in named.items():
        x = np.asarray(v, dtype=float)
        if x.size and np.nanmin(x) == np.nanmax(x):
            out.append(k)
    return out


def make_figures(res) -> dict[str, str]:
    """Every picture of a Results, as SVG text."""
    o, t = res.options, res.table
    mu = res.lab["consensus"]["mean"]
    figs = {}
    if res.mode == "full":
        figs["shrinkage"] = shrinkage(t, mu)
        figs["intervals"] = intervals(t, mu, o.level, o.lower, o.upper, o.threshold, key=res.key)
        if res.heat is not None:
            figs["ranks"] = rank_heat(
                res.heat["matrix"], [res.labels[j] for j in res.heat["rows"]], res.heat["columns"]
            )
        ch = res.checks or {}
        figs["predictive"] = predictive(ch.get("spread"), ch.get("sd"), res.labels, ch.get("extreme"))
    else:
        figs["histograms"] = histograms(t, mu)
    named = {k: v for k, v in res.hyper_draws.items() if k != "within_sd"}
    flat = constant_draws(named)
    moving = {k: v for k, v in named.items() if k not in flat}
    if moving:
        figs["traces"] = hyper_traces(moving)
    figs.update(predictor_figures(res))
    if res.tail is not None and res.tail["fixed_df"] is None:
        figs["df"] = df_posterior(res.tail["grid"], res.tail["prior"], res.tail["posterior"])
    if res.pairs is not None and len(res.pairs) > PAIRS_AS_TABLE:
        names = [plain(x, 18) for x in res.pairs.index]
        figs["pairs"] = heat(
            res.pairs.to_numpy(dtype=float),
            names,
            names,
            "column group",
            "head_to_head",
            "P(theta of the row group > theta of the column group)",
            vmax=1.0,
        )
    return figs


# ---------------------------------------------------------------------------------------------
# the history of a store: runs along x


def _run_ticks(labels: list[str], most: int = 10) -> tuple[np.ndarray, list[str]]:
    """At most `most` evenly spaced run labels (always the first and the last)."""
    R = len(labels)
    if R <= most:
        idx = np.arange(R)
    else:
        idx = np.unique(np.round(np.linspace(0, R - 1, most)).astype(np.int64))
    return idx.astype(float), [labels[i] for i in idx]


def history_pooled(run_labels: list[str], series: dict, added: np.ndarray, withdrawn: np.ndarray, level: float) -> str:
    """mu and tau over the runs (posterior mean and interval at each run), and below them a strip of the batches
    added (up) and withdrawn (down) since the previous run. series: name -> (mean, low, high) arrays."""
    R = len(run_labels)
    x = np.arange(R, dtype=float)
    ticks = _run_ticks(run_labels)
    names = list(series)
    row_h, strip_h, foot = 190.0, 110.0, 40.0
    h = row_h * len(names) + strip_h + foot + 24.0
    c = Canvas(WIDE, h, "history_pooled", "The pooled mean and the between-group spread over the runs")
    made = []
    for i, name in enumerate(names):
        mean, lo, hi = (np.asarray(a, dtype=float) for a in series[name])
        p = c.panel(
            0,
            24.0 + i * row_h if i else 0.0,
            WIDE,
            row_h + (24.0 if i == 0 else 0.0),
            title=f"{name} over the runs" if i == 0 else "",
            ylabel=name,
            xticks=(ticks[0], [""] * len(ticks[0])),
            xlim=(-0.5, R - 0.5),
        )
        p.vsegments(x, lo, hi, POST, 5.0 if R <= 60 else 2.0, 0.45, key=f"{level:.0%} interval", role="interval")
        p.line(x, mean, POST, 1.2, opacity=0.6)
        p.points(x, mean, 16.0 if R <= 60 else 6.0, fill=POST, key="posterior mean", role="mean")
        made.append(p)
    y0 = 24.0 + row_h * len(names)
    up, down = np.asarray(added, dtype=float), np.asarray(withdrawn, dtype=float)
    top, bottom = int(max(1, up.max() if R else 1)), int(down.max() if R else 0)
    step = max(1, int(np.ceil((top + bottom) / 4)))
    counts = np.arange(-(bottom // step) * step, top + 1, step)
    s = c.panel(
        0,
        y0,
        WIDE,
        strip_h + foot,
        ylabel="batches",
        xlabel="run (its date)",
        xticks=ticks,
        xlim=(-0.5, R - 0.5),
        ylim=(-bottom - 0.2 if bottom else -0.2, top + 0.2),
        ygrid=False,
        yticks=(counts.astype(float), [str(abs(int(k))) for k in counts]),
    )
    s.hline(0.0, MUTED, 1.0)
    s.vsegments(x, np.zeros(R), up, MUTED, 7.0 if R <= 60 else 2.0, key="added since the previous run", role="added")
    if down.any():
        s.vsegments(
            x, np.zeros(R), -down, LIMIT, 7.0 if R <= 60 else 2.0, key="withdrawn or replaced", role="withdrawn"
        )
    made.append(s)
    c.align(*made, sides="left right")
    return c.svg()


def history_group(
    name: str, run_labels: list[str], mean, lo, hi, withdrawn_at, threshold=None, limits=(None, None)
) -> str:
    """One group's posterior mean and interval over the runs (gaps where it had no data), with the runs at which
    batches were withdrawn marked and the threshold or limits drawn in: a small picture for a grid of them."""
    R = len(run_labels)
    x = np.arange(R, dtype=float)
    mean, lo, hi = (np.asarray(a, dtype=float) for a in (mean, lo, hi))
    w, h = 300.0, 170.0
    c = Canvas(w, h, "history_group", f"{plain(name, 60)} over the runs")
    first, last = run_labels[0] if R else "", run_labels[-1] if R else ""
    p = c.panel(
        0,
        0,
        w,
        h,
        title=plain(name, 34),
        xticks=(np.array([0.0, R - 1.0]) if R > 1 else np.array([0.0]), [first, last] if R > 1 else [first]),
        xlim=(-0.5, R - 0.5),
        xgrid=False,
    )
    for i in np.flatnonzero(np.asarray(withdrawn_at, dtype=bool)):
        p.vline(float(i), LIMIT, 1.0, "dashed")
    if threshold is not None:
        p.hline(threshold, LIMIT, 1.0, "dotted")
    for val in limits:
        if val is not None:
            p.hline(val, LIMIT, 1.0)
    p.vsegments(x, lo, hi, POST, 4.0 if R <= 40 else 1.6, 0.45, role="interval")
    p.points(x, mean, 10.0 if R <= 40 else 4.0, fill=POST, role="mean")
    return c.svg()


# ---------------------------------------------------------------------------------------------
# group-level predictors

LEVEL_COLORS = ["#1f6f78", "#c0672a", "#5a3d8a", "#6b8e23", "#b23a2a", "#3b6ea8", "#8c6d1f", "#555f6b"]


def level_color(i: int) -> str:
    return LEVEL_COLORS[i % len(LEVEL_COLORS)]


def by_level(table, consensus: list[dict], key: str = "95") -> str:
    """The groups' posterior means and intervals coloured by their level, each level's consensus value drawn as its
    own line (dashed, over that level's groups) with its interval as a light band. Up to MANY groups one row per
    group, grouped by level; above, one row per level with every group's posterior mean as a dot."""
    names = [c["level"] for c in consensus]
    v = Values(typical_sd(table["theta_sd"]), sep="")  # 1000000000.31, never 1e+09
    where = {name: i for i, name in enumerate(names)}
    lev = np.array([where[x] for x in table["level"]], dtype=np.int64)
    m = table["theta_mean"].to_numpy(dtype=float)
    lo, hi = table[f"theta_low_{key}"].to_numpy(dtype=float), table[f"theta_high_{key}"].to_numpy(dtype=float)
    J = len(table)
    if J <= MANY:
        order = np.lexsort((m, lev))  # by level, then by posterior mean
        y_of = np.empty(J)
        y_of[order] = np.arange(J, dtype=float)
        h = _rows_height(J, 10.0)
        c = Canvas(WIDE, h, "by_level", "Group estimates by level, with each level's consensus value")
        p = c.panel(
            0,
            0,
            WIDE,
            h,
            xlabel="theta",
            yticks=(np.arange(J), _labels(table["group"].to_numpy()[order])),
            ygrid=False,
            ylim=(-0.7, J - 0.3),
        )
        for i, cons in enumerate(consensus):
            rows = y_of[lev == i]
            if not rows.size:
                continue
            y0, y1 = float(rows.min()) - 0.45, float(rows.max()) + 0.45
            col = level_color(i)
            p.band([cons["low"], cons["high"]], [y0, y0], [y1, y1], col, 0.12, role="level-band")
            p.segments(
                [cons["mean"]],
                [y0],
                [cons["mean"]],
                [y1],
                col,
                1.8,
                dash="dashed",
                key=f"{plain(cons['level'], 20)}: consensus {v(cons['mean'])}",
                role="level-line",
            )
            sel = lev == i
            p.hsegments(y_of[sel], lo[sel], hi[sel], col, 3.0, 0.45, role="interval")
            p.points(m[sel], y_of[sel], 20.0, fill=col, role="posterior-mean")
    else:
        L = len(names)
        h = max(220.0, 60.0 * L + 90.0)
        c = Canvas(WIDE, h, "by_level", "Posterior means of every group by level, with each level's consensus value")
        p = c.panel(
            0,
            0,
            WIDE,
            h,
            xlabel="posterior mean of theta",
            yticks=(np.arange(L), [plain(x) for x in names]),
            ygrid=False,
            ylim=(-0.6, L - 0.4),
        )
        # a deterministic spread inside each level's row, so that dots do not sit on one line
        spread = ((np.arange(J) * 0.6180339887) % 1.0 - 0.5) * 0.6
        for i, cons in enumerate(consensus):
            col = level_color(i)
            p.band(
                [cons["low"], cons["high"]], [i - 0.42, i - 0.42], [i + 0.42, i + 0.42], col, 0.12, role="level-band"
            )
            p.segments(
                [cons["mean"]],
                [i - 0.45],
                [cons["mean"]],
                [i + 0.45],
                col,
                1.8,
                dash="dashed",
                key=f"{plain(cons['level'], 20)}: consensus {v(cons['mean'])}",
                role="level-line",
            )
            sel = lev == i
            p.points(m[sel], i + spread[sel], 6.0, fill=col, opacity=0.45, role="posterior-mean")
    return c.svg()


def along_numeric(x, m, lo, hi, lev, lines: list[tuple[str, float]], slope: float, centre: float, column: str) -> str:
    """The groups' posterior means m (with intervals lo, hi) against a numeric predictor x, coloured by level (lev:
    each group's index into lines), each level's line c_l + slope (x - centre) drawn from its consensus value c_l
    (lines: (name, c_l) per level; c_l at the numeric predictors' means)."""
    x, m, lo, hi = (np.asarray(a, dtype=float) for a in (x, m, lo, hi))
    many = len(m) > MANY
    c = Canvas(WIDE * 0.8, 420, "along_numeric", f"Group estimates against {plain(column)}, with each level's line")
    p = c.panel(0, 0, WIDE * 0.8, 420, xlabel=plain(column, 60), ylabel="theta")
    xs = np.array([np.nanmin(x), np.nanmax(x)])
    for i, (name, base) in enumerate(lines):
        col = level_color(i)
        sel = lev == i
        if not many:
            p.vsegments(x[sel], lo[sel], hi[sel], col, 2.0, 0.4, role="interval")
        p.points(x[sel], m[sel], 8.0 if many else 20.0, fill=col, opacity=0.5 if many else 1.0, role="posterior-mean")
        p.line(
            xs, base + slope * (xs - centre), col, 1.8, dash="dashed", key=f"{plain(name, 20)}: line", role="level-line"
        )
    return c.svg()


def predictor_figures(res) -> dict[str, str]:
    """The pictures of the group-level predictors: estimates by level (with categorical predictors) and against the
    first numeric predictor (each level's line)."""
    pr = res.predictors
    if pr is None:
        return {}
    figs = {}
    t = res.table
    if pr["consensus"]:
        figs["by_level"] = by_level(t, pr["consensus"], res.key)
    des = res.problem.design
    if des.numerics:
        num = des.numerics[0]
        coef = next(c for c in pr["coefficients"] if c["column"] == num["column"])
        if pr["consensus"]:
            lines = [(cons["level"], cons["mean"]) for cons in pr["consensus"]]
            lev = des.level_of
        else:
            lines = [("all groups", res.hyper["mu"]["mean"])]
            lev = np.zeros(len(t), dtype=np.int64)
        figs["along_numeric"] = along_numeric(
            num["values"],
            t["theta_mean"],
            t[res.col("theta_low")],
            t[res.col("theta_high")],
            lev,
            lines,
            coef["mean"],
            num["centre"],
            num["column"],
        )
    return figs
