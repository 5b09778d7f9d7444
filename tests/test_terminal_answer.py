"""What `pooling fit` prints leads with the decision, as the page's answer does: the groups flagged against what the
run was asked (each with the probability behind its flag) or one line saying none was, and the caution; then the
consensus value and the spreads, the labs' repeatability and reproducibility, the head-to-head answers, the likely
best; then the tables, the diagnostics and where the files are. Figures the user gave (a threshold, limits) read back
as given at any offset, and a refit's then/now figures never read the same when they differ.

These are presentation tests: the data are invented here with fixed seeds, and every expected text is made from
the run's own summary.json (or changes.json) with the number rules of report/numbers.py, never written by hand.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from pooling import cli
from pooling.report.numbers import given, prob, prob_near, typical_sd
from pooling.terminal import Numbers, change_lines

FAST = ["--chains", "2", "--draws", "300", "--warmup", "200", "--max-draws", "300", "--seed", "3"]
PLAIN = re.compile(r"^[+-]?\d+(\.\d+)?$")  # a number in plain decimals: no exponent, no separators


def _frame(offset: float, far: float = 4.0, seed: int = 5) -> pd.DataFrame:
    """10 groups (G0..G9) of 3 to 8 values offset + N(0, 0.3^2) about group means N(0, 0.2^2); G9 sits `far` away.
    Values are multiples of 1/64, exact at 1e9 and (as multiples of 1/8 there) close to it at 1e15."""
    rng = np.random.default_rng(seed)
    rows = []
    for j in range(10):
        centre = rng.normal(0.0, 0.2) + (far if j == 9 else 0.0)
        for _ in range(int(rng.integers(3, 9))):
            rows.append((f"G{j}", offset + np.round((centre + rng.normal(0.0, 0.3)) * 64) / 64))
    return pd.DataFrame(rows, columns=["g", "y"])


def _run(argv: list[str]) -> tuple[int, list[str]]:
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf), contextlib.redirect_stderr(io.StringIO()):
        code = cli.main([str(a) for a in argv])
    return code, buf.getvalue().splitlines()


def _fit(tmp, name: str, df: pd.DataFrame, *options) -> tuple[list[str], dict]:
    path = tmp / f"{name}.csv"
    df.to_csv(path, index=False, float_format="%.17g")
    out = tmp / name
    code, lines = _run(["fit", path, "--group", "g", "--value", "y", "--out", out, *FAST, *options])
    assert code in (0, 3), lines
    return lines, json.loads((out / "summary.json").read_text())


def _num(summary: dict) -> Numbers:
    return Numbers(typical_sd([r["theta_sd"] for r in summary["groups_table"]]))


def _index(lines: list[str], start: str) -> int:
    return next(i for i, ln in enumerate(lines) if ln.startswith(start))


def _named(line: str) -> tuple[str, str, dict[str, str]]:
    """'  outside, P(mean outside): G9 1, G3 0.960' -> ('outside', 'P(mean outside)', {'G9': '1', 'G3': '0.960'})."""
    m = re.match(r"^  (\w+), (.+?): (.*)$", line)
    assert m, line
    items = dict(x.rsplit(" ", 1) for x in re.sub(r" and \d+ more$", "", m.group(3)).split(", "))
    return m.group(1), m.group(2), items


@pytest.fixture(scope="module")
def asked(tmp_path_factory):
    """One run asked for a threshold, limits and a comparison, with an outlying group."""
    tmp = tmp_path_factory.mktemp("asked")
    return _fit(
        tmp,
        "asked",
        _frame(0.0),
        "--threshold",
        "0.1",
        "--lower-limit",
        "-0.4",
        "--upper-limit",
        "0.35",
        "--compare",
        "G9,G0",
        "--compare",
        "G3",
    )


def test_the_decision_comes_first_then_the_consensus_then_the_rest(asked):
    lines, s = asked
    rows = {r["group"]: r for r in s["groups_table"]}
    o = s["report_options"]
    first = 1 if lines[0].startswith("diagnostics targets MISSED") else 0
    assert first == (0 if s["diagnostics"]["met"] else 1)  # a missed target heads the answer, as on the page
    assert lines[first].startswith(f"threshold {given(o['threshold'])}: ")
    order = [
        _index(lines, "threshold "),
        _index(lines, "limits lower -0.4 and upper 0.35, by the mean: "),
        _index(lines, "outlying (P(outlying) >= 0.5): "),
        _index(lines, "caution: statistical screening supports, and never replaces, the applicable standards"),
        _index(lines, "consensus value mu "),
        _index(lines, "spread: between groups "),
        _index(lines, "compare: "),
        _index(lines, "most likely best "),
        next(i for i, ln in enumerate(lines) if "median" in ln and "R-hat" in ln),  # the hyperparameters' table
        _index(lines, "group  "),  # the groups' table
        _index(lines, "model: "),
        max(i for i, ln in enumerate(lines) if ln.startswith("diagnostics targets ")),  # met, or see the first line
    ]
    assert order == sorted(order), order
    assert lines[-1].startswith("run folder: ") and "report.html" in lines[-1] and "groups.csv" in lines[-1]
    # every line before the caution belongs to the answer: a decision's count or its named groups
    assert all(
        ln.startswith(("threshold ", "limits ", "outlying ", "  ", "diagnostics targets MISSED"))
        for ln in lines[: order[3]]
    )
    # each named group is on the side it is named on, with the probability behind it (decided at 0.95)
    column = {"P(above)": "p_above", "P(below)": "p_below", "P(mean outside)": "p_mean_outside"}
    seen = 0
    for ln in lines[: order[3]]:
        if not ln.startswith("  ") or ln.startswith("  predicted share"):
            continue
        side, what, items = _named(ln)
        for g, p in items.items():
            r = rows[g]
            if what == "P(outlying)":
                assert r["outlying"] and side == "flagged" and p == prob(r["p_outlying"], "-")
            elif what == "P(above or below)":
                assert r["threshold_side"] == side == "undecided"
                assert p == prob_near(max(r["p_above"], r["p_below"]), o["decide_at"], "-")
            elif what == "P(mean inside)":
                assert r["limits_side"] == side and p == prob_near(1 - r["p_mean_outside"], o["decide_at"], "-")
            else:
                assert r["threshold_side" if what != "P(mean outside)" else "limits_side"] == side
                assert p == prob_near(r[column[what]], o["decide_at"], "-")
            seen += 1
    # G9 sits 4 sds of the groups away, beyond the upper limit and flagged outlying: it must be among the named
    assert rows["G9"]["outlying"] and rows["G9"]["limits_side"] == "outside"
    assert seen >= 2 and any(ln.startswith("  outside, P(mean outside): G9 ") for ln in lines)
    assert any(ln.startswith("  flagged, P(outlying): G9 ") for ln in lines)


def test_the_consensus_and_the_comparison_are_the_runs_own_figures(asked):
    lines, s = asked
    num = _num(s)
    c = s["interlab"]["consensus"]
    assert f"consensus value mu {num(c['median'])} (95% interval {num(c['low_95'])} to {num(c['high_95'])})" in lines
    tau, sr = s["interlab"]["between_sd"], s["interlab"]["repeatability_sd"]
    spread = next(ln for ln in lines if ln.startswith("spread: "))
    assert f"tau {num(tau['median'])} ({num(tau['low_95'])} to {num(tau['high_95'])})" in spread
    assert f"within a group (typical sd) {num(sr['median'])} ({num(sr['low_95'])} to {num(sr['high_95'])})" in spread
    # --compare G9,G0 --compare G3: every pair, in the order given, with P(row > column) and the difference of means
    pw = s["pairwise"]
    assert pw["groups"] == ["G9", "G0", "G3"]
    mean = {r["group"]: r["theta_mean"] for r in s["groups_table"]}
    printed = [ln for ln in lines if ln.startswith("compare: ")]
    assert len(printed) == 3

    def signed(v):
        return ("+" if v >= 0 else "-") + num(abs(v), 1)

    for ln, (a, b) in zip(printed, [(0, 1), (0, 2), (1, 2)]):
        x, y = pw["groups"][a], pw["groups"][b]
        assert ln == (
            f"compare: P({x} > {y}) {prob(pw['p_row_greater'][a][b], '-')}; posterior means {x} {num(mean[x])}, "
            f"{y} {num(mean[y])}; {x} - {y} {signed(pw['difference_mean'][a][b])} (95% interval "
            f"{signed(pw['difference_low_95'][a][b])} to {signed(pw['difference_high_95'][a][b])})"
        )
    assert printed[0].startswith("compare: P(G9 > G0) ")  # G9 sits far above: P(G9 > G0) near 1
    assert float(printed[0].split(")")[1].split(";")[0].strip(" >")) > 0.99


def test_one_plain_line_when_no_group_is_flagged(tmp_path):
    lines, s = _fit(tmp_path, "calm", _frame(0.0, far=0.0, seed=8), "--lower-limit", "-5", "--upper-limit", "5")
    rows = s["groups_table"]
    assert not any(r["outlying"] for r in rows) and all(r["limits_side"] == "inside" for r in rows)
    first = 1 if lines[0].startswith("diagnostics targets MISSED") else 0
    assert lines[first].startswith("no group flagged: all 10 inside the limits lower -5 and upper 5 (")
    assert "; none outlying (P(outlying) >= 0.5; the largest P(outlying) is " in lines[first]
    assert lines[first + 1].startswith("caution: statistical screening supports, and never replaces")
    assert lines[first + 2] == ""
    assert lines[first + 3].startswith("consensus value mu ")


def test_the_labs_view_prints_repeatability_and_reproducibility(tmp_path):
    lines, s = _fit(tmp_path, "labs", _frame(0.0), "--labs", "--allowed-bias", "0.5")
    num = _num(s)
    lab = s["interlab"]

    def iv(x, full=False):
        return f"{num(x['median'])} ({'95% interval ' if full else ''}{num(x['low_95'])} to {num(x['high_95'])})"

    r = (
        f"repeatability (ISO 5725): sd s_r {iv(lab['repeatability_sd'], True)}, limit r = 2.8 s_r "
        f"{iv(lab['repeatability_limit'])}"
    )
    big_r = (
        f"reproducibility (ISO 5725): sd s_R {iv(lab['reproducibility_sd'])}, limit R = 2.8 s_R "
        f"{iv(lab['reproducibility_limit'])}"
    )
    assert r in lines and big_r in lines
    # after the consensus value, before the tables; the lab answer (z-scores, bias) before both
    assert _index(lines, "z-scores: ") < _index(lines, "bias beyond +-0.5: ") < _index(lines, "caution: ")
    assert _index(lines, "consensus value mu ") < lines.index(r) < lines.index(big_r) < _index(lines, "lab  ")
    # the lab flagged by its z-score and by its bias is named with the figure behind each flag
    g9 = next(x for x in s["groups_table"] if x["group"] == "G9")
    assert g9["z_signal"] == "action" and g9["bias_side"] == "over"
    assert f"  action, |z|: G9 {abs(g9['z_score']):.1f}" in lines
    assert any(
        ln.startswith(f"  over, P(|bias| > allowed): G9 {prob_near(g9['p_bias_over'], 0.95, '-')}") for ln in lines
    )
    # without --labs none of it is printed
    plain, _ = _fit(tmp_path, "nolabs", _frame(0.0))
    assert not any(ln.startswith(("repeatability", "reproducibility", "z-scores")) for ln in plain)


# ---------------------------------------------------------------------------------------------
# large offsets: figures the user gave, and a refit's then and now


@pytest.mark.parametrize("offset", [1e9, 1e15], ids=["1e9", "1e15"])
def test_given_figures_read_back_exactly_at_large_offsets(tmp_path, offset):
    thr, lo, hi = offset + 0.375, offset - 0.25, offset + 1.5  # multiples of 1/8: exact doubles at 1e15 too
    lines, s = _fit(
        tmp_path, "big", _frame(offset), "--threshold", repr(thr), "--lower-limit", repr(lo), "--upper-limit", repr(hi)
    )
    o = s["report_options"]
    line = next(ln for ln in lines if ln.startswith("threshold "))
    shown = line.split(":")[0].removeprefix("threshold ")
    assert PLAIN.match(shown) and float(shown) == o["threshold"]
    lim = re.match(r"^limits lower (\S+) and upper (\S+), by the mean: ", _lines_from(lines, "limits "))
    assert lim and float(lim.group(1)) == o["lower_limit"] and float(lim.group(2)) == o["upper_limit"]
    assert all(PLAIN.match(x) for x in lim.groups())
    head = lines[_index(lines, "group  ")]
    assert f"vs {shown}" in head
    # two thresholds a double apart still read apart: the rule is the shortest text that reads as the same double
    assert given(o["threshold"]) != given(np.nextafter(o["threshold"], math.inf))


def _lines_from(lines, start):
    return lines[_index(lines, start)]


def _decimals(text: str) -> int:
    return len(text.split(".")[1]) if "." in text else 0


@pytest.mark.parametrize("offset", [1e9, 1e15], ids=["1e9", "1e15"])
def test_a_refits_change_lines_tell_then_and_now_apart_at_large_offsets(tmp_path, offset):
    df = _frame(offset, seed=11)
    first, second = df.iloc[::2], df.iloc[1::2]
    store = tmp_path / "s.store"
    for k, part in enumerate((first, second)):
        path = tmp_path / f"day{k}.csv"
        part.to_csv(path, index=False, float_format="%.17g")
        code, _ = _run(["ingest", store, path, "--group", "g", "--value", "y", "--at", f"2026-01-0{k + 1}", "--quiet"])
        assert code == 0
        out = tmp_path / f"run{k}"
        code, lines = _run(["refit", store, "--out", out, *FAST])
        assert code in (0, 3), lines
    changes = json.loads((out / "changes.json").read_text())
    s = json.loads((out / "summary.json").read_text())
    num = _num(s)
    # the change lines come after the answer and the consensus value, before the tables
    at = _index(lines, "changes since run ")
    assert _index(lines, "consensus value mu ") < at < _index(lines, "group  ")
    for name, h in changes["hyperparameters"].items():
        ln = _lines_from(lines, f"  {name}: ")
        m = re.match(rf"^  {name}: (\S+) -> (\S+) \(shift ([+-]\S+?)[,;]", ln)
        assert m, ln
        then, now, shift = m.groups()
        assert PLAIN.match(then) and PLAIN.match(now) and PLAIN.match(shift), ln
        for text, x in ((then, h["then_mean"]), (now, h["now_mean"])):  # each reads as its figure, rounded
            assert abs(float(text) - x) <= 0.5 * 10 ** -_decimals(text) + abs(x) * 2**-52, (text, x)
        assert (then != now) == (h["then_mean"] != h["now_mean"])
        assert float(shift) != 0 or h["shift"] == 0
    # the same report with this run's mu a few doubles from the last run's: still two texts
    h = changes["hyperparameters"]["mu"]
    near = dict(h, now_mean=float(np.nextafter(np.nextafter(h["then_mean"], math.inf), math.inf)))
    near["shift"] = near["now_mean"] - h["then_mean"]
    report = dict(changes, hyperparameters={"mu": near})
    ln = next(x for x in change_lines(report, num) if x.startswith("  mu: "))
    then, now = re.match(r"^  mu: (\S+) -> (\S+) ", ln).groups()
    assert then != now and float(then) < float(now) and PLAIN.match(then) and PLAIN.match(now), ln


def test_the_readme_shows_the_order_the_demo_prints(tmp_path):
    # The README's sample of the terminal is the demo's (seed 1) with a threshold and limits; the figures may move
    # with the sampler, the order of the lines may not.
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    sample = re.search(r"```text\n(threshold 400: .*?)```", readme, re.S).group(1).splitlines()
    assert sample[-1] == "..."
    code, lines = _run(
        ["demo", "--out", tmp_path / "d", "--threshold", "400", "--lower-limit", "385", "--upper-limit", "425"]
    )
    assert code in (0, 3) and lines[0].startswith("demo: ")
    lines = lines[1:]

    def first_word(ln: str) -> str:
        return re.match(r"^(\s*\S*)", ln).group(1)

    assert [first_word(x) for x in sample[:-1]] == [first_word(x) for x in lines[: len(sample) - 1]]
    assert sample[0] == lines[0]  # the counts against the threshold
