"""The tables the terminal prints stay readable for any data: columns as wide as their header and widest cell with
at least two spaces between them, so no two numbers touch at a huge common offset (1e12, 1e15) or a tiny scale
(1e-9); each cell holds exactly the text the number rules of report/numbers.py give it (the layout moves cells,
never rounds them); long labels that share a long start stay told apart in the table and are named in full in
the prose lines.

These are layout tests, not statistical ones: the data are invented in the test with fixed seeds, and any draws
would do; the expected cell texts are made here from the results table with the same formatters the terminal has
always used for each cell, then compared with the fields of each printed row split on runs of two or more spaces.
"""

from __future__ import annotations

import io
import re

import numpy as np
import pandas as pd
import pytest

import pooling
from pooling.report.numbers import ess, prob, rhat, sig, typical_sd, whole
from pooling.results import compute
from pooling.terminal import Numbers, _fit_labels, _lay_out, print_results

SMALL = pooling.Settings(chains=2, draws=300, warmup=200, max_draws=300, seed=11)
CITIES = ["Zürich", "Bern", "Basel", "Genève", "Lugano", "Chur", "Sion", "Aarau", "Zug", "Thun"]


def _fields(line: str) -> list[str]:
    return re.split(r" {2,}", line.strip())


def _long_frame(offset: float, scale: float, seed: int = 4) -> pd.DataFrame:
    """10 groups x 4 values offset + scale * normal(0, 0.3), and a two-level column for the predictors."""
    rng = np.random.default_rng(seed)
    rows = [
        (g, "A" if i % 2 else "B", offset + scale * rng.normal(0.0, 0.3))
        for i, g in enumerate(CITIES)
        for _ in range(4)
    ]
    return pd.DataFrame(rows, columns=["g", "m", "y"])


def _printed(res) -> list[str]:
    buf = io.StringIO()
    print_results(res, "run", stream=buf)
    return buf.getvalue().splitlines()


def _hyper_rows(res, lines):
    """The printed rows of the hyperparameter table, by name, and the expected cells of each."""
    num = Numbers(typical_sd(res.table["theta_sd"]))
    head = next(i for i, ln in enumerate(lines) if "median" in ln and "R-hat" in ln)
    printed = {_fields(ln)[0]: _fields(ln) for ln in lines[head + 1 : head + 1 + len(res.hyper)]}
    want = {}
    for name, s in res.hyper.items():
        f = (lambda x, extra=0: sig(x, 4, dash="-")) if name == "nu" else num
        want[name] = [name, f(s["median"]), f"{f(s['low'])} to {f(s['high'])}", f(s["mean"]), f(s["sd"], 1)]
        want[name] += [rhat(s["rhat"], "-"), ess(s["bulk_ess"], "-"), ess(s["tail_ess"], "-")]
    return printed, want


def _group_rows(res, lines, header: str):
    """The printed rows of the group table (label -> fields) and the header's fields."""
    head = next(i for i, ln in enumerate(lines) if ln.startswith(header + " "))
    end = lines.index("", head) if "" in lines[head:] else len(lines)
    # the prose lines after the table ('threshold ...: ', 'z-scores: ...') have no run of two spaces
    body = [ln for ln in lines[head + 1 : end] if len(_fields(ln)) > 1]
    return _fields(lines[head]), {_fields(ln)[0]: _fields(ln) for ln in body}


def _group_cells(res, j, num):
    """What the terminal has always written in each cell of group j (before the decision columns)."""
    t = res.table
    lo, hi = res.col("theta_low"), res.col("theta_high")
    cells = [str(t["group"].iat[j])]
    if "level" in t:
        cells.append(str(t["level"].iat[j]))
    if res.problem.stats.kind != "known":
        cells.append(whole(t["n"].iat[j], "-").replace(",", ""))
    cells += [num(t["raw_mean"].iat[j]), num(t["theta_mean"].iat[j]), f"{num(t[lo].iat[j])} to {num(t[hi].iat[j])}"]
    if res.options.interlab:
        z = t["z_score"].iat[j]
        cells += [num(t["bias_mean"].iat[j]), f"{z:.2f}" if np.isfinite(z) else "-"]
    else:
        w = t["shrink_weight"].iat[j]
        cells += ["-" if not np.isfinite(w) else f"{w:.2f}", prob(t["p_best"].iat[j], "-")]
    return cells


def _check_tables(res, lines, extra=lambda j: []):
    num = Numbers(typical_sd(res.table["theta_sd"]))
    printed, want = _hyper_rows(res, lines)
    assert printed == want
    noun = "lab" if res.options.interlab else "group"
    head, rows = _group_rows(res, lines, noun)
    t = res.table
    assert len(rows) == len(t)
    for j in range(len(t)):
        cells = _group_cells(res, j, num) + extra(j)
        if "outlying" in t:
            cells.append("yes" if t["outlying"].iat[j] else "")
        # an empty cell (not flagged outlying) is blank: every other cell is its own field
        assert rows[str(t["group"].iat[j])] == [c for c in cells if c], (j, rows[str(t["group"].iat[j])])
    return head


# at 1e15 two neighbouring doubles are 0.125 apart, so the noise there is 100 times wider (sd 30) to stay data
@pytest.fixture(scope="module", params=[(1e12, 1.0), (1e15, 100.0), (0.0, 1e-9)], ids=["1e12", "1e15", "1e-9"])
def plain(request):
    offset, scale = request.param
    df = _long_frame(offset, scale)
    fit = pooling.fit(pooling.from_frame(df, "g", "y"), settings=SMALL, progress=False)
    return offset, scale, compute(fit)


def test_no_two_numbers_touch_at_any_magnitude(plain):
    offset, scale, res = plain
    lines = _printed(res)
    head = _check_tables(res, lines)
    assert head == ["group", "n", "own mean", "posterior", "95% interval", "shrink", "P(best)", "outlying"]
    # the numbers are as long as the magnitude makes them: the old fixed widths could not hold them
    cell = Numbers(typical_sd(res.table["theta_sd"]))(res.table["theta_mean"].iat[0])
    assert len(cell) >= (15 if offset >= 1e12 else 13)


def test_labs_with_every_decision_column_at_1e12():
    df = _long_frame(1e12, 1.0, seed=6)
    o = pooling.ReportOptions(labs=True, threshold=1e12, lower=1e12 - 1, upper=1e12 + 1, allowed_bias=0.5)
    fit = pooling.fit(pooling.from_frame(df, "g", "y"), settings=SMALL, progress=False)
    res = compute(fit, o)
    t = res.table
    head = _check_tables(
        res,
        _printed(res),
        lambda j: [str(t["threshold_side"].iat[j]), str(t["limits_side"].iat[j]), str(t["bias_side"].iat[j])],
    )
    assert head == ["lab", "n", "own mean", "posterior", "95% interval", "bias", "z", "vs 1000000000000", "limits"] + [
        "bias side",
        "outlying",
    ]


def test_known_standard_errors_at_1e15():
    df = _long_frame(1e15, 100.0, seed=7)
    est = df.groupby("g", sort=False)["y"].agg(["mean", "sem"]).reset_index()
    stats = pooling.from_estimates(est, "g", "mean", "sem")
    fit = pooling.fit(stats, pooling.Model(within="known"), SMALL, progress=False)
    res = compute(fit)
    head = _check_tables(res, _printed(res))
    assert head[:2] == ["group", "own mean"]  # no n for estimates


@pytest.fixture(scope="module")
def by_level():
    df = _long_frame(0.0, 1e-9, seed=8)
    stats = pooling.from_frame(df, "g", "y", group_columns=["m"])
    model = pooling.Model(predictors=(pooling.Category("m", reference="A"),))
    return compute(pooling.fit(stats, model, SMALL, progress=False))


def test_predictor_level_column_and_effect_lines_at_1e_9(by_level):
    res = by_level
    lines = _printed(res)
    head = _check_tables(res, lines)
    assert head[:3] == ["group", "level", "n"]
    num = Numbers(typical_sd(res.table["theta_sd"]))
    c = res.predictors["coefficients"][0]
    line = next(ln for ln in lines if ln.startswith("  m: B vs A"))
    assert _fields(line) == [
        "m: B vs A",
        num(c["mean"], 1),
        "95% interval",
        f"{num(c['low'], 1)} to {num(c['high'], 1)}",
        "P(> 0)",
        prob(c["p_above_0"]),
    ]


def test_summary_mode_at_1e_9():
    df = _long_frame(0.0, 1e-9, seed=9)
    fit = pooling.fit(pooling.from_frame(df, "g", "y"), settings=SMALL, progress=False, summary=True)
    res = compute(fit)
    assert res.mode == "summary"
    _check_tables(res, _printed(res))


# ---------------------------------------------------------------------------------------------
# long labels

LONG = "Laboratoire national de métrologie et d essais L{:02d}"


def test_labels_sharing_a_long_start_stay_apart_in_the_table_and_whole_in_the_prose():
    rng = np.random.default_rng(12)
    rows = [
        (LONG.format(i), 10.0 + (4.0 if i == 7 else 0.0) + rng.normal(0.0, 0.3)) for i in range(1, 9) for _ in range(5)
    ]
    df = pd.DataFrame(rows, columns=["g", "y"])
    fit = pooling.fit(pooling.from_frame(df, "g", "y"), settings=SMALL, progress=False)
    res = compute(fit, pooling.ReportOptions(labs=True))
    lines = _printed(res)
    head, table = _group_rows(res, lines, "lab")
    shown = list(table)
    assert len(shown) == 8 and len(set(shown)) == 8  # every row identifiable
    assert all(len(x) <= 40 for x in shown)
    for i in range(1, 9):  # each shown label is its own: the clipped text keeps the number at the end
        assert sum(x.endswith(f"L{i:02d}") for x in shown) == 1
    flagged = [str(g) for g, f in zip(res.table["group"], res.table["outlying"]) if f]
    assert flagged, "the invented lab 7 sits 4 sd of the repeatability away: it must be flagged"
    prose = next(ln for ln in lines if ln.startswith("heavy tails:"))
    assert prose.endswith("flagged outlying: " + ", ".join(flagged))
    act = [str(g) for g, s in zip(res.table["group"], res.table["z_signal"]) if s == "action"]
    if act:
        named = next(ln for ln in lines if ln.startswith("  action, |z|: "))
        assert all(f"{g} " in named for g in act)  # named in full, each with its |z|


def test_clipped_labels_that_differ_only_in_the_middle_are_told_apart():
    a = "A" * 20 + "x" + "B" * 30
    b = "A" * 20 + "y" + "B" * 30
    shown = _fit_labels([a, b, "short"], 40)
    assert len(set(shown)) == 3 and shown[2] == "short"
    assert all(len(x) <= 40 for x in shown[:2])
    # the same label twice (a level column) stays the same, and no split can tell these apart at 10: shown whole
    assert _fit_labels(["same level", "same level"], 40) == ["same level", "same level"]
    c, d = "q" * 20 + "1" + "q" * 20, "q" * 20 + "2" + "q" * 20
    assert _fit_labels([c, d], 10) == [c, d]


def test_wide_and_combining_characters_keep_the_columns_aligned():
    # '東京' takes four terminal columns in two characters (East Asian Width W, Unicode Standard Annex #11), and
    # 'Zu\u0308rich' six in seven (U+0308 combines with the u): padding counts terminal columns, not characters
    cols = [("group", "<"), ("mean", ">"), ("95% interval", "to")]
    lines = _lay_out(cols, [["東京", "1.5", ("1", "2")], ["Zu\u0308rich", "12.25", ("-0.5", "10")], None])
    assert lines == [
        "group    mean  95% interval",
        "東京      1.5       1 to 2",
        "Zu\u0308rich  12.25    -0.5 to 10",
        "...",
    ]
