"""The report's pictures (pooling/report/plots.py on the project's own SVG layer, svg.py).

References outside the project: Python's xml.etree.ElementTree (every figure is well-formed XML
and reads back the label text exactly), html.escape semantics (a label appears only escaped), the
nice-number labelling idea for axis ticks (steps of 1, 2 or 5 times a power of ten, covering the
data; common practice, from memory), plain geometry (a linear scale is an increasing affine map),
and the definition of linear interpolation between colour stops.

The tables below are generated with fixed seeds only to exercise the drawing code; the expected
values come from the references above, never from an earlier output.
"""

from __future__ import annotations

import math
import re
import subprocess
import sys
import xml.etree.ElementTree as ET

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pooling.report import plots, svg

NS = "{http://www.w3.org/2000/svg}"
SCRIPT = "<script>alert(1)</script>"
AMP = "a & b $x$"
HOSTILE = [SCRIPT, AMP, "say \"hi\" & 'bye'", "bell\x07inside", "</svg><svg>", "plain"]
# Coordinates are written rounded to 0.1 px, so a written value is within 0.05 px of the exact one;
# a line through two written points then predicts a third within 0.05 px, and the third is itself
# within 0.05 px: 0.1 px in all (plus a relative 1e-6 for the floating-point arithmetic).
PX_TOL = 0.1


def _table(labels, seed=0):
    rng = np.random.default_rng(seed)
    J = len(labels)
    n = rng.integers(2, 40, J)
    raw = 100 + 4 * rng.standard_normal(J)
    w = 4 / (4 + 16 / n)
    post = 100 + w * (raw - 100)
    sd = 4 / np.sqrt(n + 4)
    return pd.DataFrame(
        {
            "group": list(labels),
            "n": n,
            "raw_mean": raw,
            "theta_mean": post,
            "theta_low_95": post - 2 * sd,
            "theta_high_95": post + 2 * sd,
            "shrink_weight": 1 - w,
            "outlying": np.arange(J) % 7 == 3,
        }
    )


def _predictive(J, seed=1):
    rng = np.random.default_rng(seed)
    med = 2 + rng.random(J)
    spread = {"observed": 2.2, "replicated": 2 + 0.1 * rng.standard_normal(400), "p_value": 0.37}
    sd = {
        "median": med,
        "low": med * 0.5,
        "high": med * 1.6,
        "observed": med * (0.7 + 0.6 * rng.random(J)),
        "level": 0.9,
    }
    return spread, sd


def _traces(seed=2, chains=4, draws=700):
    rng = np.random.default_rng(seed)
    return {
        "mu": 10 + rng.standard_normal((chains, draws)),
        "tau": np.abs(rng.standard_normal((chains, draws))),
        "nu": rng.choice([3.0, 5.0, 8.0], (chains, draws)),
    }


def _heat(J, seed=3):
    rng = np.random.default_rng(seed)
    m = rng.dirichlet(np.ones(J), J)
    return m, [f"g{j}" for j in range(J)], [str(r) for r in range(1, J + 1)]


def _all_figures(labels):
    t = _table(labels)
    spread, sd = _predictive(len(labels))
    m, _, cols = _heat(len(labels))
    rng = np.random.default_rng(5)
    extreme = {"observed": 2 + rng.random(300), "replicated": 2 + rng.random(300), "p_value": 0.4, "group": 0}
    return {
        "shrinkage": plots.shrinkage(t, 100.0, title="pull"),
        "intervals": plots.intervals(t, 100.0, 0.95, lower=95.0, upper=106.0, threshold=101.0),
        "rank_heat": plots.rank_heat(m, labels, cols),
        "predictive": plots.predictive(spread, sd, labels, extreme),
        "hyper_traces": plots.hyper_traces(_traces()),
        "summary-hist": plots.histograms(t, 100.0),
        "df_posterior": plots.df_posterior([1.0, 4.0, 16.0, np.inf], [0.1, 0.3, 0.4, 0.2], [0.5, 0.3, 0.1, 0.1]),
    }


def _parse(text):
    root = ET.fromstring(text)  # raises on anything that is not well-formed XML
    assert root.tag == NS + "svg"
    return root


def _texts(root):
    return ["".join(e.itertext()) for e in root.iter(NS + "text")]


# ---------------------------------------------------------------------------------------------
# well-formed, self-contained, unique ids


@pytest.mark.parametrize("labels", [HOSTILE, [f"group {j}" for j in range(200)]], ids=["few", "many"])
def test_every_figure_parses_and_ids_are_unique_across_the_report(labels):
    figs = _all_figures(labels)
    seen = []
    for name, text in figs.items():
        assert text.startswith("<svg ") and text.endswith("</svg>"), name  # one element, no XML prolog
        root = _parse(text)
        assert root.get("class") == "figure" and root.get("role") == "img" and root.get("data-figure") == name
        w, h = (float(v) for v in root.get("viewBox").split()[2:])
        assert root.get("viewBox") == f"0 0 {w:g} {h:g}" and root.get("style") == f"max-width:{w:g}px"
        assert root.find(NS + "title") is not None and root.find(NS + "title").text
        ids = [e.get("id") for e in root.iter() if e.get("id") is not None]
        assert all(i.startswith(name + "-") for i in ids), (name, ids)
        for ref in re.findall(r"url\(#([^)]+)\)", text):  # every reference points inside the same figure
            assert ref in ids, (name, ref)
        seen += ids
    assert len(seen) == len(set(seen))
    assert seen  # the colour bar's gradient at least: the check above is not vacuous


def test_figures_are_deterministic():
    a, b = _all_figures(HOSTILE), _all_figures(HOSTILE)
    assert a == b


# ---------------------------------------------------------------------------------------------
# labels from the data


def test_labels_are_escaped_and_read_back_as_text():
    # Source: html.escape(quote=True) semantics and XML well-formedness (ElementTree): the raw label
    # never appears in the SVG source, and the parsed text equals the label (control characters as
    # spaces, long labels clipped by plots.plain).
    figs = _all_figures(HOSTILE)
    for name in ("shrinkage", "intervals", "rank_heat"):
        text = figs[name]
        assert SCRIPT not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text
        assert AMP not in text and "a &amp; b $x$" in text
        assert "</svg><svg>" not in text
        root = _parse(text)
        assert not [e for e in root.iter() if e.tag.endswith("script")]
        shown = _texts(root)
        for lab in HOSTILE:
            assert plots.plain(lab) in shown, (name, lab)
        assert "bell inside" in shown
        assert not any(ch in s for s in shown for ch in "\x00\x07\x1f\x7f")


def test_text_escape_property():
    # Source: Python's html.escape and the XML 1.0 character range (ElementTree refuses the rest).
    for raw in ["<b>", "&amp;", '"', "'", "\x00\x1b[2J", "\ud800lone", "\ufffe", "ok ✓"]:
        out = svg.text(raw)
        assert "<" not in out and ">" not in out and '"' not in out and "'" not in out
        el = ET.fromstring(f"<t>{out}</t>")
        assert "\ud800" not in (el.text or "")


# ---------------------------------------------------------------------------------------------
# ticks


def _mantissa(step):
    e = math.floor(math.log10(step))
    m = step / 10.0**e
    return m, e


@settings(max_examples=400, deadline=None)
@given(
    centre_m=st.floats(-9.99, 9.99, allow_nan=False),
    centre_e=st.integers(-200, 200),
    rel_span=st.floats(1e-6, 50.0),
    negative=st.booleans(),
)
def test_ticks_are_nice_and_cover_the_range(centre_m, centre_e, rel_span, negative):
    # Common practice (the nice-number labelling idea, from memory): a step of 1, 2 or 5 times a
    # power of ten; the ticks cover the data range; 4 to 8 of them; labels consistent and exact.
    mag = 10.0**centre_e
    centre = centre_m * mag
    span = rel_span * mag
    lo, hi = (centre - span, centre) if negative else (centre, centre + span)
    vals, labels, step = svg.nice_ticks(lo, hi)
    m, _ = _mantissa(step)
    assert min(abs(m - c) for c in (1, 2, 5, 10)) < 1e-9, step
    assert 4 <= len(vals) <= 8, (lo, hi, vals)
    ulp = np.spacing(max(abs(vals[0]), abs(vals[-1])))
    tol = 1e-9 * step + 2 * ulp  # a tick is a product u * step: it may miss an end by its rounding
    assert vals[0] <= lo + tol and vals[-1] >= hi - tol, (lo, hi, vals)
    assert np.allclose(np.diff(vals), step, rtol=1e-9, atol=8 * ulp)
    # the labels: one per tick, distinct, read back as the tick's value, and in one format
    assert len(labels) == len(vals) == len(set(labels))
    for lab, v in zip(labels, vals):
        assert abs(float(lab) - v) <= 1e-9 * step + 8 * ulp, (lab, v)
        assert not lab.startswith("-0") or re.fullmatch(r"-0\.\d*[1-9]\d*(e-?\d+)?", lab), lab
    if "e" in "".join(labels):
        exps = {lab.split("e")[1] for lab in labels if lab != "0"}
        assert len(exps) == 1, labels
    else:
        decimals = {len(lab.split(".")[1]) if "." in lab else 0 for lab in labels}
        assert len(decimals) == 1, labels


def test_tick_labels_are_short_for_ordinary_ranges():
    # Common practice: 0.1 + 0.2 style float noise never reaches a label.
    for lo, hi in [(0.1, 0.7), (0.3, 0.9), (-0.35, 0.05), (385.9, 431.2), (0, 1e-3), (2e-7, 9e-7), (0, 4.5e9)]:
        _, labels, _ = svg.nice_ticks(lo, hi)
        assert max(len(x) for x in labels) <= 8, labels


def test_degenerate_ranges_still_get_ticks():
    for lo, hi in [(5.0, 5.0), (0.0, 0.0), (-3e-30, -3e-30), (float("nan"), 1.0), (float("inf"), float("nan"))]:
        vals, labels, step = svg.nice_ticks(lo, hi)
        assert len(vals) >= 2 and step > 0 and all(np.isfinite(vals))


# ---------------------------------------------------------------------------------------------
# geometry


def _affine_check(values, pixels):
    """Pixels must be an increasing affine function of values: a line through the two extreme
    points predicts every other within PX_TOL (see above)."""
    values, pixels = np.asarray(values, float), np.asarray(pixels, float)
    i, k = int(np.argmin(values)), int(np.argmax(values))
    slope = (pixels[k] - pixels[i]) / (values[k] - values[i])
    pred = pixels[i] + slope * (values - values[i])
    return slope, float(np.max(np.abs(pred - pixels))), float(np.ptp(pixels))


def test_interval_points_sit_on_a_linear_scale():
    t = _table([f"g{j}" for j in range(30)], seed=5)
    root = _parse(plots.intervals(t, 100.0, 0.9))
    g = [e for e in root.iter(NS + "g") if e.get("class") == "posterior-mean"]
    assert len(g) == 1
    circles = list(g[0].iter(NS + "circle"))
    assert len(circles) == len(t)
    cx = [float(c.get("cx")) for c in circles]
    cy = [float(c.get("cy")) for c in circles]
    m = np.sort(t["theta_mean"].to_numpy())  # rows are drawn in order of posterior mean
    slope, err, width = _affine_check(m, cx)
    assert slope > 0 and err <= PX_TOL + 1e-6 * width, (slope, err)
    # one row per group, equally spaced, the lowest posterior mean at the bottom
    slope_y, err_y, height = _affine_check(np.arange(len(t)), cy)
    assert slope_y < 0 and err_y <= PX_TOL + 1e-6 * height


def test_band_line_sits_on_linear_scales():
    t = _table([f"g{j}" for j in range(400)], seed=6)
    root = _parse(plots.intervals(t, 100.0, 0.9))
    line = [e for e in root.iter(NS + "polyline") if e.get("class") == "posterior-mean"]
    assert len(line) == 1
    xy = np.array([p.split(",") for p in line[0].get("points").split()], dtype=float)
    m = np.sort(t["theta_mean"].to_numpy())
    slope_x, err_x, w = _affine_check(np.arange(len(t)), xy[:, 0])
    slope_y, err_y, h = _affine_check(m, xy[:, 1])
    assert slope_x > 0 and err_x <= PX_TOL + 1e-6 * w
    assert slope_y < 0 and err_y <= PX_TOL + 1e-6 * h  # SVG's y grows downwards: higher theta is higher up


# ---------------------------------------------------------------------------------------------
# colours and size


def test_heat_colour_reproduces_its_stops_and_interpolates_linearly():
    # Source: definition of piecewise-linear interpolation between evenly spaced stops.
    stops = plots.HEAT_STOPS
    for i, c in enumerate(stops):
        assert plots.heat_hex(i / (len(stops) - 1)) == c
    rgb = np.array([[int(c[k : k + 2], 16) for k in (1, 3, 5)] for c in stops], float)
    for i in range(len(stops) - 1):
        for f in (0.25, 0.5, 0.8):
            x = (i + f) / (len(stops) - 1)
            assert np.allclose(plots.heat_rgb(x), (1 - f) * rgb[i] + f * rgb[i + 1])
    assert plots.heat_hex(-0.5) == stops[0] and plots.heat_hex(2.0) == stops[-1]
    grid = plots.heat_hex(np.array([[0.0, 1.0]]))
    assert grid.shape == (1, 2) and list(grid[0]) == [stops[0], stops[-1]]


def test_ten_thousand_groups_stay_small():
    J = 10_000
    t = _table([f"site-{j:05d}" for j in range(J)], seed=7)
    spread, sd = _predictive(J)
    m, labels, cols = _heat(40)
    figs = {
        "shrinkage": plots.shrinkage(t, 100.0),
        "intervals": plots.intervals(t, 100.0, 0.95, threshold=101.0),
        "predictive": plots.predictive(spread, sd, t["group"]),
        "rank_heat": plots.rank_heat(m, labels, cols),
    }
    for name, text in figs.items():
        assert len(text.encode("utf-8")) < 1.5e6, (name, len(text))
        root = _parse(text)
        assert not [e for e in root.iter() if e.tag.endswith("image")]  # drawn as vectors, nothing rasterised
    circles = list(_parse(figs["shrinkage"]).iter(NS + "circle"))
    assert len(circles) >= J  # every group is a circle (plus the legend's swatch)


def test_no_plotting_library_is_imported():
    code = (
        "import sys, pooling.report, pooling.report.plots, pooling.report.page; "
        "print(sorted(m for m in sys.modules if m.split('.')[0] == 'matplotlib'))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
