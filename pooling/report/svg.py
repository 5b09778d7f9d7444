"""A small SVG drawing layer of our own for the report's pictures.

A `Canvas` (width and height in CSS pixels, a name) holds panels; a `Panel` has a pixel box, linear
x and y scales, "nice" ticks, light grid lines, left and bottom axis lines, axis labels, a bold
title and a legend row above its plot area, and a handful of primitives (points, segments,
reference lines, polylines, bands, step curves, arrows, heat-map cells, a colour bar).

Primitives are recorded in data units and placed when the canvas is written, once every panel's
ticks and margins are known: the left margin is sized from the longest tick label, estimated at
EM_WIDTH em per character (more for capitals and wide characters; no font is measured). Large
inputs are converted with numpy and written with one string join; coordinates are rounded to
0.1 px to keep files small. Every text from the data goes through `text()`: control characters
become spaces, characters XML cannot carry become U+FFFD, and the rest is escaped with
html.escape(quote=True), so no label can become markup.

`Canvas.svg()` returns one `<svg>` element (no XML prolog) for inline use in HTML, carrying the
canvas's name in `data-figure`; the only ids it writes (colour-bar gradients) start with that
name, so several figures can share a page. The same input gives the same bytes.
"""

from __future__ import annotations

import html
import math
import re
import unicodedata

import numpy as np

FONT = "DejaVu Sans, Verdana, sans-serif"
FONT_SIZE = 12.0  # px: tick labels, axis labels, legend
TITLE_SIZE = 13.0  # px, bold
EM_WIDTH = 0.6  # estimated width of one character, in em
LINE = 1.3  # line height, in em
TEXT = "#1f2a36"
AXIS = "#9aa3ad"
GRID = "#e3e6ea"
TICK = 4.0  # px, tick mark length
GAP = 4.0  # px between a tick mark and its label
PAD = 6.0  # px around a panel
KEY_ROW = 18.0  # px per legend row
KEY_SWATCH = 22.0  # px, width of a legend swatch
DASHES = {"solid": None, "dashed": "6 4", "dotted": "1.5 3"}
MOST_TICKS = 8
_MANTISSAS = (1, 2, 5)

_CONTROL = re.compile(r"[\x00-\x1f\x7f]")
_NOT_XML = re.compile("[\ud800-\udfff\ufffe\uffff]")
_ID_UNSAFE = re.compile(r"[^A-Za-z0-9_-]")


# ---------------------------------------------------------------------------------------------
# text


def text(s) -> str:
    """Text fit for SVG inside HTML: control characters as spaces, non-XML characters as U+FFFD,
    then escaped (&, <, >, both quotes)."""
    s = _NOT_XML.sub("\ufffd", _CONTROL.sub(" ", str(s)))
    return html.escape(s, quote=True)


def text_width(s, size: float = FONT_SIZE) -> float:
    """Estimated width in px of a one-line text: EM_WIDTH em per character, 0.7 em for a capital
    and a full em for a wide character (East Asian wide or full-width, and the ellipsis)."""
    s = str(s)
    if s.isascii():
        caps = sum(1 for ch in s if "A" <= ch <= "Z")
        return (len(s) * EM_WIDTH + caps * (0.7 - EM_WIDTH)) * size
    em = 0.0
    for ch in s:
        if ch == "…" or unicodedata.east_asian_width(ch) in "WF":
            em += 1.0
        elif ch.isupper():
            em += 0.7
        else:
            em += EM_WIDTH
    return em * size


def wrap(s: str, width: float, size: float = FONT_SIZE) -> list[str]:
    """Greedy word wrap of `s` to lines of estimated width <= width (a long word stays whole)."""
    words = str(s).split(" ")
    lines, cur = [], ""
    for w in words:
        trial = w if not cur else cur + " " + w
        if cur and text_width(trial, size) > width:
            lines.append(cur)
            cur = w
        else:
            cur = trial
    if cur or not lines:
        lines.append(cur)
    return lines


# ---------------------------------------------------------------------------------------------
# ticks


def _power(m: int, e: int) -> float:
    """m * 10**e as the float nearest to the decimal (division by an exact power of ten for e < 0)."""
    return float(m * 10**e) if e >= 0 else m / 10.0 ** (-e)


def widen(lo: float, hi: float) -> tuple[float, float]:
    """A usable range from data extents: ordered, finite, and not narrower than 1e-12 of its
    magnitude (one value gets +-5 % of itself, or +-0.5 at zero)."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        lo, hi = (lo, lo) if math.isfinite(lo) else (hi, hi) if math.isfinite(hi) else (0.0, 1.0)
    if lo > hi:
        lo, hi = hi, lo
    mag = max(abs(lo), abs(hi))
    if hi - lo <= 1e-12 * mag or hi == lo:
        mid = 0.5 * (lo + hi)
        half = max(0.5 * (hi - lo), 0.05 * mag if hi == lo else 5e-13 * mag) or 0.5
        lo, hi = mid - half, mid + half
    return lo, hi


def nice_step(lo: float, hi: float, most: int = MOST_TICKS) -> tuple[int, int]:
    """(m, e): the smallest step m * 10**e, m in (1, 2, 5), whose ticks covering [lo, hi] number at
    most `most` (for most = 8 that is 4 to 8 ticks). Common practice: the nice-number labelling idea
    (steps of 1, 2 or 5 times a power of ten), from memory."""
    lo, hi = widen(lo, hi)
    e = math.floor(math.log10((hi - lo) / most)) - 1
    while True:
        for m in _MANTISSAS:
            s = _power(m, e)
            k0, k1 = _cover(lo, hi, s)
            if k1 - k0 + 1 <= most:
                return m, e
        e += 1


def _cover(lo: float, hi: float, s: float) -> tuple[int, int]:
    """Integer tick indexes k0 <= k1 with k0*s <= lo and k1*s >= hi (to 1e-9 of a step)."""
    return math.floor(lo / s + 1e-9), math.ceil(hi / s - 1e-9)


def nice_ticks(lo: float, hi: float, most: int = MOST_TICKS) -> tuple[np.ndarray, list[str], float]:
    """Ticks covering [lo, hi] at a nice step, their labels, and the step."""
    lo, hi = widen(lo, hi)
    m, e = nice_step(lo, hi, most)
    s = _power(m, e)
    k0, k1 = _cover(lo, hi, s)
    ks = np.arange(k0, k1 + 1)
    if e >= 0:
        vals = (ks * m).astype(float) * 10.0**e
    else:
        vals = (ks * m).astype(float) / 10.0 ** (-e)
    return vals, tick_labels(ks * m, e), s


def tick_labels(units, e: int) -> list[str]:
    """Labels of ticks at units * 10**e (integer units), all with one format: fixed decimals set by
    the step, or, when that is longer than 8 characters and a shared exponent is shorter, a mantissa
    with the exponent written out ('2.5e-7'). Zero is always '0' or '0.0...'; never '-0'."""
    units = [int(u) for u in units]
    d = max(0, -e)
    fixed = [_fixed(u, e, d) for u in units]
    longest = max((len(x) for x in fixed), default=0)
    if longest <= 8:
        return fixed
    big = max(abs(u) for u in units)
    if big == 0:
        return fixed
    p = e + len(str(big)) - 1  # exponent of the largest tick's leading digit
    dm = p - e  # mantissa decimals that keep the step exact
    sci = ["0" if u == 0 else f"{_fixed(u, e - p, dm)}e{p}" for u in units]
    return sci if max(len(x) for x in sci) < longest else fixed


def _fixed(u: int, e: int, d: int) -> str:
    """u * 10**e written with d decimals, exactly (integer arithmetic, no float rounding)."""
    neg = u < 0
    a = abs(u)
    if e >= 0:
        whole, frac = str(a * 10**e), ""
    else:
        digits = str(a).rjust(-e + 1, "0")
        whole, frac = digits[:e], digits[e:]
    frac = (frac + "0" * d)[:d]
    s = whole + ("." + frac if d else "")
    return "-" + s if neg and a else s


# ---------------------------------------------------------------------------------------------
# numbers into SVG


class Scale:
    """Linear map from data [d0, d1] to pixels [p0, p1] (p1 < p0 inverts)."""

    __slots__ = ("d0", "d1", "p0", "p1", "k")

    def __init__(self, d0: float, d1: float, p0: float, p1: float):
        self.d0, self.d1, self.p0, self.p1 = float(d0), float(d1), float(p0), float(p1)
        self.k = (self.p1 - self.p0) / (self.d1 - self.d0) if self.d1 != self.d0 else 0.0

    def __call__(self, v):
        return self.p0 + (np.asarray(v, dtype=float) - self.d0) * self.k


def nums(a) -> list[str]:
    """Pixel values rounded to 0.1 and written short ('12', '12.5'; never '-0')."""
    a = np.round(np.asarray(a, dtype=float).ravel(), 1) + 0.0
    return [f"{v:g}" for v in a.tolist()]


def num(v: float) -> str:
    return nums([v])[0]


def pairs(x, y) -> str:
    """'x,y x,y ...' for a polyline or polygon."""
    return " ".join(f"{a},{b}" for a, b in zip(nums(x), nums(y)))


def _attrs(**kw) -> str:
    out = []
    for k, v in kw.items():
        if v is None:
            continue
        out.append(f' {k.rstrip("_").replace("_", "-")}="{v}"')
    return "".join(out)


def _finite(*arrays):
    arrays = np.broadcast_arrays(*[np.asarray(a, dtype=float).ravel() for a in arrays])
    ok = np.ones(arrays[0].shape, dtype=bool)
    for a in arrays:
        ok &= np.isfinite(a)
    return [a[ok] for a in arrays], ok


def _steps_mid(x, lo, hi):
    """Each x_i as a flat run between the midpoints to its neighbours (half a spacing past the ends)."""
    if x.size == 1:
        edges = np.array([x[0] - 0.5, x[0] + 0.5])
    else:
        mid = 0.5 * (x[1:] + x[:-1])
        edges = np.concatenate([[x[0] - (mid[0] - x[0])], mid, [x[-1] + (x[-1] - mid[-1])]])
    return np.repeat(edges, 2)[1:-1], np.repeat(lo, 2), np.repeat(hi, 2)


def _radius(area) -> np.ndarray:
    return np.sqrt(np.maximum(np.asarray(area, dtype=float), 0.8) / math.pi)


# ---------------------------------------------------------------------------------------------
# legend swatches: functions (x, y centre) -> svg


def _swatch_line(color, width, dash, opacity):
    def draw(x, y):
        return (
            f'<path d="M{num(x)} {num(y)}h{KEY_SWATCH:g}"'
            + _attrs(
                stroke=color,
                stroke_width=f"{width:g}",
                stroke_dasharray=DASHES.get(dash),
                stroke_opacity=_op(opacity),
                fill="none",
            )
            + "/>"
        )

    return draw


def _swatch_dot(fill, stroke, stroke_width, r, opacity):
    def draw(x, y):
        return (
            f'<circle cx="{num(x + KEY_SWATCH / 2)}" cy="{num(y)}" r="{num(r)}"'
            + _attrs(
                fill=fill,
                fill_opacity=_op(opacity),
                stroke=stroke,
                stroke_width=f"{stroke_width:g}" if stroke else None,
            )
            + "/>"
        )

    return draw


def _swatch_patch(fill, opacity):
    def draw(x, y):
        return (
            f'<rect x="{num(x)}" y="{num(y - 5)}" width="{KEY_SWATCH:g}" height="10"'
            + _attrs(fill=fill, fill_opacity=_op(opacity))
            + "/>"
        )

    return draw


def _swatch_tick(color, width):
    def draw(x, y):
        return (
            f'<path d="M{num(x + KEY_SWATCH / 2)} {num(y - 6)}v12"'
            + _attrs(stroke=color, stroke_width=f"{width:g}")
            + "/>"
        )

    return draw


def _op(opacity) -> str | None:
    return None if opacity is None or opacity >= 1 else f"{opacity:g}"


# ---------------------------------------------------------------------------------------------

SNAP = 0.06  # a free axis end moves out to the next tick when that is within this share of the span


def _axis_ticks(lo: float, hi: float, free_lo: bool, free_hi: bool):
    """Ticks of an axis from lo to hi: the ticks covering the range, with each free end moved out to
    its outer tick when that is near (SNAP); otherwise the ticks inside, at least four where a nice
    step allows. Returns (low, high, values, labels)."""
    span = hi - lo
    vals, labels, step = nice_ticks(lo, hi)
    if free_lo and lo - vals[0] <= SNAP * span:
        lo = float(vals[0])
    if free_hi and vals[-1] - hi <= SNAP * span:
        hi = float(vals[-1])
    for most in (8, 10, 12, 16):
        if most > 8:
            vals, labels, step = nice_ticks(lo, hi, most)
        eps = 1e-9 * step
        keep = (vals >= lo - eps) & (vals <= hi + eps)
        if keep.sum() >= 4:
            break
    return lo, hi, vals[keep], [x for x, k in zip(labels, keep) if k]


class Panel:
    """One plot area inside a pixel box of its canvas. Build it with Canvas.panel.

    xlim, ylim: (low, high) with None for a side taken from the data (then padded by xpad/ypad of
    the span, and moved out to the next tick when that is near; see SNAP). xticks, yticks: True for nice ticks, False for none,
    or (values, labels) given. xside: 'bottom' or 'top' for the x ticks and label. flip_y puts the
    low y value at the top (rows of a heat map). frame: axis lines and tick marks.
    """

    def __init__(
        self,
        canvas,
        box,
        *,
        title="",
        xlabel="",
        ylabel="",
        xlim=(None, None),
        ylim=(None, None),
        xpad=0.02,
        ypad=0.04,
        xticks=True,
        yticks=True,
        xgrid=True,
        ygrid=True,
        xside="bottom",
        flip_y=False,
        frame=True,
    ):
        self.canvas = canvas
        self.box = tuple(float(v) for v in box)
        self.title, self.xlabel, self.ylabel = str(title), str(xlabel), str(ylabel)
        self.lims = {"x": tuple(xlim), "y": tuple(ylim)}
        self.pads = {"x": float(xpad), "y": float(ypad)}
        self.tick_opts = {"x": xticks, "y": yticks}
        self.grids = {"x": bool(xgrid), "y": bool(ygrid)}
        self.xside, self.flip_y, self.frame = xside, bool(flip_y), bool(frame)
        self.items: list = []
        self.keys: list = []
        self.ext = {"x": [math.inf, -math.inf], "y": [math.inf, -math.inf]}
        self.extra_right = 0.0
        self.minimum = {"top": 0.0, "right": 0.0, "bottom": 0.0, "left": 0.0}

    # --- extents ---------------------------------------------------------------------------------
    def _extend(self, axis: str, v) -> None:
        v = np.asarray(v, dtype=float).ravel()
        v = v[np.isfinite(v)]
        if v.size:
            e = self.ext[axis]
            e[0] = min(e[0], float(v.min()))
            e[1] = max(e[1], float(v.max()))

    def _key(self, label, swatch) -> None:
        if label:
            self.keys.append((swatch, str(label)))

    # --- primitives ------------------------------------------------------------------------------
    def points(self, x, y, area=16.0, fill="#000000", stroke=None, stroke_width=1.0, opacity=1.0, key=None, role=None):
        """Circles at (x, y); `area` in px^2 (one value or one per point)."""
        (x, y, area), _ = _finite(x, y, area)
        self._extend("x", x)
        self._extend("y", y)
        r = _radius(area)

        def draw(sx, sy):
            if not x.size:
                return ""
            cx, cy, rr = nums(sx(x)), nums(sy(y)), nums(r)
            body = "".join(f'<circle cx="{a}" cy="{b}" r="{c}"/>' for a, b, c in zip(cx, cy, rr))
            style = _attrs(
                class_=role,
                fill=fill,
                fill_opacity=_op(opacity),
                stroke=stroke,
                stroke_opacity=_op(opacity) if stroke else None,
                stroke_width=f"{stroke_width:g}" if stroke else None,
            )
            return f"<g{style}>{body}</g>"

        self.items.append(draw)
        kr = float(min(np.median(r), 5.0)) if r.size else 3.0
        self._key(key, _swatch_dot(fill, stroke, stroke_width, max(kr, 2.5), opacity))

    def segments(self, x0, y0, x1, y1, color, width=1.0, opacity=1.0, dash="solid", key=None, role=None, swatch="line"):
        """Straight segments from (x0, y0) to (x1, y1), all in one path."""
        (x0, y0, x1, y1), _ = _finite(x0, y0, x1, y1)
        self._extend("x", np.concatenate([x0, x1]))
        self._extend("y", np.concatenate([y0, y1]))

        def draw(sx, sy):
            if not x0.size:
                return ""
            a, b, c, d = nums(sx(x0)), nums(sy(y0)), nums(sx(x1)), nums(sy(y1))
            path = "".join(f"M{p} {q}L{r} {s}" for p, q, r, s in zip(a, b, c, d))
            return (
                f'<path d="{path}"'
                + _attrs(
                    class_=role,
                    fill="none",
                    stroke=color,
                    stroke_width=f"{width:g}",
                    stroke_opacity=_op(opacity),
                    stroke_dasharray=DASHES.get(dash),
                )
                + "/>"
            )

        self.items.append(draw)
        self._key(key, _swatch_tick(color, width) if swatch == "tick" else _swatch_line(color, width, dash, opacity))

    def hsegments(self, y, x0, x1, color, width=1.0, opacity=1.0, key=None, role=None):
        self.segments(x0, y, x1, y, color, width, opacity, key=key, role=role)

    def vsegments(self, x, y0, y1, color, width=1.0, opacity=1.0, key=None, role=None):
        self.segments(x, y0, x, y1, color, width, opacity, key=key, role=role, swatch="tick")

    def hline(self, y, color, width=1.0, dash="solid", key=None, role=None):
        """A reference line across the plot area at y (it widens the y range to include y)."""
        self._ref("y", y, color, width, dash, key, role)

    def vline(self, x, color, width=1.0, dash="solid", key=None, role=None):
        """A reference line down the plot area at x (it widens the x range to include x)."""
        self._ref("x", x, color, width, dash, key, role)

    def _ref(self, axis, v, color, width, dash, key, role):
        v = float(v)
        if not math.isfinite(v):
            return
        self._extend(axis, v)

        def draw(sx, sy):
            x0, x1, y0, y1 = self._px
            if axis == "x":
                d = f"M{num(sx(v))} {num(y0)}V{num(y1)}"
            else:
                d = f"M{num(x0)} {num(sy(v))}H{num(x1)}"
            return (
                f'<path d="{d}"'
                + _attrs(
                    class_=role, fill="none", stroke=color, stroke_width=f"{width:g}", stroke_dasharray=DASHES.get(dash)
                )
                + "/>"
            )

        self.items.append(draw)
        self._key(key, _swatch_line(color, width, dash, None))

    def line(self, x, y, color, width=1.0, opacity=1.0, dash="solid", key=None, role=None):
        """A polyline through (x, y); points with a missing coordinate are left out."""
        (x, y), _ = _finite(x, y)
        self._extend("x", x)
        self._extend("y", y)

        def draw(sx, sy):
            if x.size < 2:
                return ""
            return (
                f'<polyline points="{pairs(sx(x), sy(y))}"'
                + _attrs(
                    class_=role,
                    fill="none",
                    stroke=color,
                    stroke_width=f"{width:g}",
                    stroke_opacity=_op(opacity),
                    stroke_dasharray=DASHES.get(dash),
                    stroke_linejoin="round",
                )
                + "/>"
            )

        self.items.append(draw)
        self._key(key, _swatch_line(color, width, dash, opacity))

    def band(self, x, lo, hi, color, opacity=0.25, step=False, key=None, role=None):
        """The region between the curves lo(x) and hi(x), as one polygon; step=True makes each x
        a flat run reaching halfway to its neighbours."""
        (x, lo, hi), _ = _finite(x, lo, hi)
        if step and x.size:
            x, lo, hi = _steps_mid(x, lo, hi)
        self._extend("x", x)
        self._extend("y", np.concatenate([lo, hi]))

        def draw(sx, sy):
            if not x.size:
                return ""
            px = sx(np.concatenate([x, x[::-1]]))
            py = sy(np.concatenate([hi, lo[::-1]]))
            return (
                f'<polygon points="{pairs(px, py)}"' + _attrs(class_=role, fill=color, fill_opacity=_op(opacity)) + "/>"
            )

        self.items.append(draw)
        self._key(key, _swatch_patch(color, opacity))

    def steps(
        self, edges, heights, color=None, width=1.2, fill=None, opacity=1.0, base=0.0, closed=True, key=None, role=None
    ):
        """A histogram-like step curve: heights[i] over [edges[i], edges[i+1]]. With `fill`, the area
        down to `base` is filled (bars without gaps); with `color`, the outline is drawn (down to
        `base` at both ends when `closed`)."""
        edges = np.asarray(edges, dtype=float)
        heights = np.asarray(heights, dtype=float)
        x = np.repeat(edges, 2)[1:-1]
        y = np.repeat(heights, 2)
        if closed or fill:
            x = np.concatenate([[edges[0]], x, [edges[-1]]])
            y = np.concatenate([[base], y, [base]])
        self._extend("x", edges)
        self._extend("y", np.concatenate([heights, [base]]) if (closed or fill) else heights)

        def draw(sx, sy):
            px, py = sx(x), sy(y)
            out = ""
            if fill:
                out += (
                    f'<polygon points="{pairs(px, py)}"'
                    + _attrs(class_=role, fill=fill, fill_opacity=_op(opacity))
                    + "/>"
                )
            if color:
                out += (
                    f'<polyline points="{pairs(px, py)}"'
                    + _attrs(
                        class_=role,
                        fill="none",
                        stroke=color,
                        stroke_width=f"{width:g}",
                        stroke_opacity=_op(opacity) if not fill else None,
                        stroke_linejoin="miter",
                    )
                    + "/>"
                )
            return out

        self.items.append(draw)
        self._key(key, _swatch_patch(fill, opacity) if fill else _swatch_line(color, width, "solid", opacity))

    def arrows(self, x0, y0, x1, y1, color, width=1.0, head=7.0, shrink_start=0.0, shrink_end=0.0, role=None):
        """Arrows from (x0, y0) to (x1, y1): a line and a filled triangle head of length `head` px;
        each end is pulled in by its shrink (px, one value or one per arrow) so it stops at a marker's
        edge. An arrow with no room for its head is left out."""
        (x0, y0, x1, y1, s0, s1), _ = _finite(x0, y0, x1, y1, shrink_start, shrink_end)
        self._extend("x", np.concatenate([x0, x1]))
        self._extend("y", np.concatenate([y0, y1]))

        def draw(sx, sy):
            if not x0.size:
                return ""
            ax, ay, bx, by = sx(x0), sy(y0), sx(x1), sy(y1)
            dx, dy = bx - ax, by - ay
            length = np.hypot(dx, dy)
            room = length - s0 - s1
            ok = room >= head * 0.8
            if not ok.any():
                return ""
            ux, uy = dx[ok] / length[ok], dy[ok] / length[ok]
            tipx, tipy = bx[ok] - ux * s1[ok], by[ok] - uy * s1[ok]
            h = np.minimum(head, room[ok])
            basex, basey = tipx - ux * h, tipy - uy * h
            startx, starty = ax[ok] + ux * s0[ok], ay[ok] + uy * s0[ok]
            stem = room[ok] > h + 0.5
            hw = 0.42 * h
            stems = "".join(
                f"M{a} {b}L{c} {d}"
                for a, b, c, d in zip(
                    nums(startx[stem]), nums(starty[stem]), nums(basex[stem] + ux[stem]), nums(basey[stem] + uy[stem])
                )
            )
            heads = "".join(
                f"M{a} {b}L{c} {d}L{e} {f}Z"
                for a, b, c, d, e, f in zip(
                    nums(tipx),
                    nums(tipy),
                    nums(basex - uy * hw),
                    nums(basey + ux * hw),
                    nums(basex + uy * hw),
                    nums(basey - ux * hw),
                )
            )
            out = f"<g{_attrs(class_=role)}>"
            if stems:
                out += f'<path d="{stems}" fill="none" stroke="{color}" stroke-width="{width:g}"/>'
            return out + f'<path d="{heads}" fill="{color}"/></g>'

        self.items.append(draw)

    def cells(self, x_edges, y_edges, colors, skip=None, role=None):
        """Rectangles of a heat map: colors[i][j] ('#rrggbb') fills [x_edges[j], x_edges[j+1]] x
        [y_edges[i], y_edges[i+1]]; cells whose colour equals `skip` are left out (the background
        is drawn once instead)."""
        xe, ye = np.asarray(x_edges, dtype=float), np.asarray(y_edges, dtype=float)
        colors = np.asarray(colors)
        self._extend("x", xe)
        self._extend("y", ye)

        def draw(sx, sy):
            px, py = sx(xe), sy(ye)
            left, w = np.minimum(px[:-1], px[1:]), np.abs(np.diff(px))
            top, h = np.minimum(py[:-1], py[1:]), np.abs(np.diff(py))
            # cells meet exactly: each edge is rounded once, widths are differences of rounded edges
            lx, rx = np.round(left, 1), np.round(left + w, 1)
            ty, by = np.round(top, 1), np.round(top + h, 1)
            xs, ws = nums(lx), nums(rx - lx)
            ys, hs = nums(ty), nums(by - ty)
            out = [f'<g{_attrs(class_=role)} shape-rendering="crispEdges">']
            if skip is not None:
                out.append(
                    f'<rect x="{num(lx.min())}" y="{num(ty.min())}" width="{num(rx.max() - lx.min())}" '
                    f'height="{num(by.max() - ty.min())}" fill="{skip}"/>'
                )
            for i in range(colors.shape[0]):
                row = colors[i]
                for j in np.flatnonzero(row != skip) if skip is not None else range(row.size):
                    out.append(f'<rect x="{xs[j]}" y="{ys[i]}" width="{ws[j]}" height="{hs[i]}" fill="{row[j]}"/>')
            out.append("</g>")
            return "".join(out)

        self.items.append(draw)

    def colorbar(self, stops, ticks, labels, label="", height=260.0):
        """A vertical colour bar right of the plot area, its colours `stops` evenly spaced bottom to
        top; `ticks` are positions 0..1 along it with their `labels`."""
        stops = list(stops)
        ticks = np.asarray(ticks, dtype=float)
        labels = [str(x) for x in labels]
        width, gap = 14.0, 16.0
        wide = max((text_width(x) for x in labels), default=0.0)
        self.extra_right = gap + width + TICK + GAP + wide + (FONT_SIZE * LINE + 6 if label else 0) + 4
        gid = f"{self.canvas.ident}-bar{len(self.canvas.ids)}"
        self.canvas.ids.append(gid)

        def draw(sx, sy):
            x0, x1, y0, y1 = self._px
            bx = x1 + gap
            h = min(height, y1 - y0)
            grad = "".join(
                f'<stop offset="{i / max(1, len(stops) - 1):.4g}" stop-color="{c}"/>' for i, c in enumerate(stops)
            )
            ty = y0 + h - ticks * h
            out = [
                f'<defs><linearGradient id="{gid}" x1="0" y1="1" x2="0" y2="0">{grad}</linearGradient></defs>',
                f'<rect x="{num(bx)}" y="{num(y0)}" width="{width:g}" height="{num(h)}" fill="url(#{gid})"/>',
                '<path d="'
                + "".join(f"M{num(bx + width)} {v}h{TICK:g}" for v in nums(ty))
                + f'" stroke="{AXIS}" fill="none"/>',
                f'<g fill="{TEXT}">'
                + "".join(
                    f'<text x="{num(bx + width + TICK + GAP)}" y="{v}" dy=".35em">{text(s)}</text>'
                    for v, s in zip(nums(ty), labels)
                )
                + "</g>",
            ]
            if label:
                lx = bx + width + TICK + GAP + wide + 4 + FONT_SIZE * 0.8
                ly = y0 + h / 2
                out.append(
                    f'<text x="{num(lx)}" y="{num(ly)}" text-anchor="middle" fill="{TEXT}" '
                    f'transform="rotate(90 {num(lx)} {num(ly)})">{text(label)}</text>'
                )
            return "".join(out)

        self.items.append(draw)

    # --- layout ----------------------------------------------------------------------------------
    def _resolve(self, axis: str):
        """(low, high, tick values, tick labels) of one axis."""
        fixed = self.lims[axis]
        dlo, dhi = self.ext[axis]
        lo = float(fixed[0]) if fixed[0] is not None else dlo
        hi = float(fixed[1]) if fixed[1] is not None else dhi
        if not math.isfinite(lo) and not math.isfinite(hi):
            lo, hi = 0.0, 1.0
        lo, hi = widen(lo, hi)
        span = hi - lo
        if fixed[0] is None:
            lo -= self.pads[axis] * span
        if fixed[1] is None:
            hi += self.pads[axis] * span
        opt = self.tick_opts[axis]
        if opt is True:
            return _axis_ticks(lo, hi, fixed[0] is None, fixed[1] is None)
        if opt is False or opt is None:
            return lo, hi, np.empty(0), []
        vals, labels = opt
        return lo, hi, np.asarray(vals, dtype=float), [str(x) for x in labels]

    def _measure(self) -> None:
        self._x = self._resolve("x")
        self._y = self._resolve("y")
        _, _, box_w, _ = self.box
        ylabs, xlabs = self._y[3], self._x[3]
        left = PAD + (FONT_SIZE * LINE + 2 if self.ylabel else 0)
        if ylabs:
            left += max(text_width(x) for x in ylabs) + (TICK if self.frame else 0) + GAP
        left = max(left, PAD + 4, self.minimum["left"])
        right = PAD + 4 + self.extra_right
        if xlabs and not self.extra_right:
            right = max(right, text_width(xlabs[-1]) / 2 + 2)
        right = max(right, self.minimum["right"])
        plot_w = max(20.0, box_w - left - right)
        self._xlines = wrap(self.xlabel, plot_w) if self.xlabel else []
        xt = (FONT_SIZE + (TICK if self.frame else 0) + GAP) if xlabs else 0.0
        xl = len(self._xlines) * FONT_SIZE * LINE
        self._rows = self._key_rows(box_w - left - PAD)
        top = PAD + (TITLE_SIZE * 1.6 if self.title else 0) + len(self._rows) * KEY_ROW
        if self._rows:
            top += 4
        bottom = PAD
        if self.xside == "top":
            top += xt + xl
        else:
            bottom += xt + xl
        if ylabs:
            top = max(top, PAD + FONT_SIZE / 2)
        self.inset = {
            "top": max(top, self.minimum["top"]),
            "right": right,
            "bottom": max(bottom, self.minimum["bottom"]),
            "left": left,
        }

    def _key_rows(self, width: float) -> list[list]:
        rows, cur, used = [], [], 0.0
        for swatch, label in self.keys:
            w = KEY_SWATCH + 5 + text_width(label) + 16
            if cur and used + w > width:
                rows.append(cur)
                cur, used = [], 0.0
            cur.append((swatch, label, used))
            used += w
        if cur:
            rows.append(cur)
        return rows

    # --- drawing ---------------------------------------------------------------------------------
    def _render(self) -> str:
        bx, by, bw, bh = self.box
        ins = self.inset
        x0, x1 = bx + ins["left"], bx + bw - ins["right"]
        y0, y1 = by + ins["top"], by + bh - ins["bottom"]
        self._px = (x0, x1, y0, y1)
        xlo, xhi, xv, xl = self._x
        ylo, yhi, yv, yl = self._y
        sx = Scale(xlo, xhi, x0, x1)
        sy = Scale(ylo, yhi, y0, y1) if self.flip_y else Scale(ylo, yhi, y1, y0)
        self.sx, self.sy = sx, sy
        out = ["<g>"]
        # grid below everything
        grid = ""
        if self.grids["x"] and xv.size:
            grid += "".join(f"M{v} {num(y0)}V{num(y1)}" for v in nums(sx(xv)))
        if self.grids["y"] and yv.size:
            grid += "".join(f"M{num(x0)} {v}H{num(x1)}" for v in nums(sy(yv)))
        if grid:
            out.append(f'<path d="{grid}" fill="none" stroke="{GRID}" stroke-width="1"/>')
        out.extend(draw(sx, sy) for draw in self.items)
        # axes
        xtop = self.xside == "top"
        xaxis_y = y0 if xtop else y1
        if self.frame:
            out.append(
                f'<path d="M{num(x0)} {num(y0)}V{num(y1)}M{num(x0)} {num(xaxis_y)}H{num(x1)}" '
                f'fill="none" stroke="{AXIS}" stroke-width="1"/>'
            )
            marks = "".join(f"M{v} {num(xaxis_y)}v{-TICK if xtop else TICK:g}" for v in nums(sx(xv)))
            marks += "".join(f"M{num(x0)} {v}h{-TICK:g}" for v in nums(sy(yv)))
            if marks:
                out.append(f'<path d="{marks}" fill="none" stroke="{AXIS}" stroke-width="1"/>')
        tick = TICK if self.frame else 0.0
        if xl:
            ty = y0 - tick - GAP - FONT_SIZE * 0.25 if xtop else y1 + tick + GAP + FONT_SIZE * 0.8
            out.append(
                f'<g fill="{TEXT}" text-anchor="middle">'
                + "".join(f'<text x="{v}" y="{num(ty)}">{text(s)}</text>' for v, s in zip(nums(sx(xv)), xl))
                + "</g>"
            )
        if yl:
            tx = x0 - tick - GAP
            out.append(
                f'<g fill="{TEXT}" text-anchor="end">'
                + "".join(f'<text x="{num(tx)}" y="{v}" dy=".35em">{text(s)}</text>' for v, s in zip(nums(sy(yv)), yl))
                + "</g>"
            )
        # axis labels
        if self._xlines:
            xt = (FONT_SIZE + tick + GAP) if xl else 0.0
            cx = (x0 + x1) / 2
            lines = []
            for i, s in enumerate(self._xlines):
                if xtop:
                    ly = y0 - xt - (len(self._xlines) - 1 - i) * FONT_SIZE * LINE - FONT_SIZE * 0.7
                else:
                    ly = y1 + xt + (i + 1) * FONT_SIZE * LINE - FONT_SIZE * 0.25
                lines.append(f'<text x="{num(cx)}" y="{num(ly)}">{text(s)}</text>')
            out.append(f'<g fill="{TEXT}" text-anchor="middle">{"".join(lines)}</g>')
        if self.ylabel:
            lx = bx + PAD + FONT_SIZE * 0.9
            ly = (y0 + y1) / 2
            out.append(
                f'<text x="{num(lx)}" y="{num(ly)}" text-anchor="middle" fill="{TEXT}" '
                f'transform="rotate(-90 {num(lx)} {num(ly)})">{text(self.ylabel)}</text>'
            )
        # title and legend above the plot area
        ty = by + PAD
        if self.title:
            ty += TITLE_SIZE * 1.1
            out.append(
                f'<text x="{num(x0)}" y="{num(ty)}" font-size="{TITLE_SIZE:g}" font-weight="bold" '
                f'fill="{TEXT}">{text(self.title)}</text>'
            )
            ty += TITLE_SIZE * 0.5
        if self._rows:
            keys = []
            for r, row in enumerate(self._rows):
                cy = ty + (r + 0.5) * KEY_ROW
                for swatch, label, off in row:
                    keys.append(swatch(x0 + off, cy))
                    keys.append(
                        f'<text x="{num(x0 + off + KEY_SWATCH + 5)}" y="{num(cy)}" dy=".35em" '
                        f'fill="{TEXT}">{text(label)}</text>'
                    )
            out.append(f'<g class="legend">{"".join(keys)}</g>')
        out.append("</g>")
        return "".join(out)


class Canvas:
    """A picture of width x height CSS pixels holding panels; `name` prefixes every id it writes and
    titles it for assistive technology (`description`, when given, is the title's text)."""

    def __init__(self, width: float, height: float, name: str, description: str = ""):
        self.width, self.height = float(width), float(height)
        self.name = str(name)
        self.ident = _ID_UNSAFE.sub("-", self.name) or "figure"
        self.description = str(description) or self.name
        self.panels: list[Panel] = []
        self.groups: list[tuple[tuple[Panel, ...], str]] = []
        self.ids: list[str] = []

    def panel(self, x: float, y: float, w: float, h: float, **options) -> Panel:
        """A new panel in the pixel box (x, y, w, h); options as for Panel."""
        p = Panel(self, (x, y, w, h), **options)
        self.panels.append(p)
        return p

    def align(self, *panels: Panel, sides: str = "top left") -> None:
        """Give these panels the same margins on the named sides (the largest each needs)."""
        self.groups.append((panels, sides))

    def svg(self) -> str:
        for p in self.panels:
            p._measure()
        for _ in range(2):  # a wider margin can wrap a legend, which can widen the top margin
            for panels, sides in self.groups:
                for side in sides.split():
                    m = max(p.inset[side] for p in panels)
                    for p in panels:
                        p.minimum[side] = m
            for p in self.panels:
                p._measure()
        w, h = num(self.width), num(self.height)
        head = (
            f'<svg xmlns="http://www.w3.org/2000/svg" class="figure" viewBox="0 0 {w} {h}" '
            f'style="max-width:{w}px" role="img" data-figure="{self.ident}" font-family="{FONT}" '
            f'font-size="{FONT_SIZE:g}">'
            f"<title>{text(self.description)}</title>"
        )
        return head + "".join(p._render() for p in self.panels) + "</svg>"
