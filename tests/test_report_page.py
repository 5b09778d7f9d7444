"""The page and the terminal around the decisions: which sections appear for which options, the answer block
naming the groups that are the exception, the number rules, the terminal following --level, --best, the
threshold and limits, estimates without n, and the line that says what to do when targets are missed.

These check behaviour, not statistics: the data are small invented tables (and the eight schools' published
estimates where a known structure is needed)."""

from __future__ import annotations

import io
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

import pooling
from pooling.asked import ReportOptions
from pooling.report.numbers import Values, plural, prob, rerun_advice, sig, whole
from pooling.report.page import NAMED, render
from pooling.results import compute
from pooling.terminal import Numbers, print_results

SMALL = pooling.Settings(chains=2, draws=300, warmup=300, max_draws=300, seed=5)


def _frame(means, sizes, sd, seed, label="G"):
    rng = np.random.default_rng(seed)
    rows = [(f"{label}{j:02d}", x) for j, (m, n) in enumerate(zip(means, sizes)) for x in rng.normal(m, sd, n)]
    return pd.DataFrame(rows, columns=["g", "y"])


@pytest.fixture(scope="module")
def fit20():
    """20 groups spread well around 100 (sd of the means 6), 5 to 20 measurements each."""
    rng = np.random.default_rng(3)
    df = _frame(rng.normal(100.0, 6.0, 20), rng.integers(5, 21, 20), 2.0, 4)
    return pooling.fit(pooling.from_frame(df, "g", "y"), settings=SMALL, progress=False)


class _Sections(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section" and "id" in a:
            self.ids.append(a["id"])


def sections(page: str) -> list[str]:
    p = _Sections()
    p.feed(page)
    return p.ids


def verdict(page: str) -> str:
    m = re.search(r'<section id="verdict".*?</section>', page, re.S)
    assert m
    return m.group(0)


def visible_text(page: str) -> str:
    """The page's text outside the SVG pictures, style and head."""
    page = re.sub(r"<svg.*?</svg>|<style>.*?</style>|<head>.*?</head>", " ", page, flags=re.S)
    return re.sub(r"<[^>]+>", " ", page)


# ---------------------------------------------------------------------------------------------
# the number rules


def test_probabilities_tell_their_ends_apart():
    assert prob(0.0) == "0" and prob(1.0) == "1"
    assert prob(0.0004) == "<0.001" and prob(0.9996) == ">0.999"
    assert prob(0.9995) == ">0.999"  # never '1.000': it is not certain
    assert prob(0.99949) == "0.999" and prob(0.5) == "0.500"
    assert prob(float("nan")) == "–"


def test_plain_decimals_for_ordinary_numbers():
    assert sig(1423.7, 3) == "1,424" and "e" not in sig(1423.7, 3)
    assert sig(0.000123, 3) == "0.000123"
    assert sig(0.5, 3) == "0.5"
    assert sig(3e13, 3) == "3.00e+13"  # only magnitudes no plain decimal can carry
    assert whole(1234) == "1,234" and whole(58.97133393105582) == "59.0"
    assert (
        plural(1, "group") == "1 group"
        and plural(2, "lab") == "2 labs"
        and plural(1.5, "batch", "batches") == "1.5 batches"
    )
    # values keep the digits their spread calls for, whatever their offset
    assert Numbers(0.01)(10_000_000.123) == "10000000.123"
    assert Values(3.0)(412.37) == "412.4"
    assert Values(3.0)(-0.01) == "0.0"


# ---------------------------------------------------------------------------------------------
# the page


def test_sections_follow_the_options(fit20):
    plain = render(compute(fit20, ReportOptions()), "t", None)
    ids = sections(plain)
    assert ids[0] == "verdict"
    assert "labs" not in ids and "sides" not in ids and "changes" not in ids and "h2h" not in ids
    assert {"pooled", "groups", "tails", "order", "pull", "fitcheck", "health", "setup", "guide"} <= set(ids)
    for options in (ReportOptions(labs=True), ReportOptions(assigned=100.0), ReportOptions(sigma_pt=2.0)):
        assert "labs" in sections(render(compute(fit20, options), "t", None)), options
    ids = sections(render(compute(fit20, ReportOptions(threshold=100.0, compare=("G00", "G01"))), "t", None))
    assert "sides" in ids and "h2h" in ids
    ids = sections(
        render(
            compute(fit20, ReportOptions(lower=90.0)),
            "t",
            None,
            changes={"previous_run": None, "batches": {"active": 2}, "new_groups": [], "store": {}},
        )
    )
    assert ids[:2] == ["changes", "verdict"] and "sides" in ids


def _raw_angle_brackets(page: str) -> list[str]:
    """Every '<' of the page's markup (outside <style> and <script>) that does not open a tag, a closing tag or a
    comment: the HTML standard makes such a '<' in text a parse error (invalid-first-character-of-tag-name);
    text carries it as &lt;."""
    page = re.sub(r"<style>.*?</style>|<script[^>]*>.*?</script>", " ", page, flags=re.S)
    return [page[max(0, m.start() - 30) : m.start() + 10] for m in re.finditer(r"<(?![A-Za-z/!])", page)]


def test_probabilities_shown_as_bounds_are_escaped_text(fit20):
    # Source: the WHATWG HTML standard, 13.2.5.6 "Tag open state": a '<' followed by a digit or a space is a
    # parse error; '<0.001' and 'p < 0.001' must be written &lt; in the page (numbers.prob writes them for text)
    res = compute(fit20, ReportOptions(threshold=100.0, labs=True))
    res.table["p_best"] = np.where(np.arange(len(res.table)) % 2 == 0, 0.0003, 0.9997)
    res.table["p_above"] = 0.0002
    page = render(res, "t", None)
    assert "&lt;0.001" in page and "&gt;0.999" in page
    assert _raw_angle_brackets(page) == []
    assert _raw_angle_brackets(render(compute(fit20, ReportOptions()), "t", None)) == []


def test_the_answer_counts_then_names_the_exceptions(fit20):
    res = compute(fit20, ReportOptions(threshold=100.0))
    block = verdict(render(res, "t", None))
    t = res.table
    counts = t["threshold_side"].value_counts()
    for side in ("above", "below", "undecided"):
        assert f"{counts.get(side, 0)} {side}" in block
    # every side but the largest (when that holds more than NAMED groups) is named, strongest first
    biggest = counts.idxmax()
    for side, n in counts.items():
        if side == biggest and n > NAMED:
            continue
        shown = t.loc[t["threshold_side"] == side, "group"].tolist()[:NAMED]
        for lab in shown:
            assert lab in block, (side, lab)
    # the likely best and the caution sit in the same block, beside the decisions
    best = t["group"].iat[int(np.argmax(t["p_best"]))]
    assert f"<strong>{best}</strong>" in block
    assert "never replaces, the applicable standards" in block


def test_labs_are_judged_not_ranked_in_the_answer(fit20):
    block = verdict(render(compute(fit20, ReportOptions(labs=True, allowed_bias=3.0)), "t", None))
    assert "z-scores" in block and "allowed ± 3" in block
    assert "Most likely best" not in block


def test_a_missed_target_heads_the_answer_with_what_to_do():
    rng = np.random.default_rng(11)
    df = _frame(rng.normal(0.0, 1.0, 8), [3] * 8, 1.0, 12)
    fit = pooling.fit(
        pooling.from_frame(df, "g", "y"),
        settings=pooling.Settings(chains=2, draws=30, warmup=30, max_draws=30, seed=2),
        progress=False,
    )
    res = compute(fit)
    assert not res.targets_met  # 30 draws cannot reach 400 effective draws
    block = verdict(render(res, "t", None))
    assert "Do not use these answers yet" in block and "--draws 60 --max-draws 240" in block
    out = io.StringIO()
    print_results(res, "run", stream=out)
    text = out.getvalue()
    assert "MISSED" in text and "--draws 60 --max-draws 240" in text and "do not use these results yet" in text
    # tau missed too (30 draws): a proper prior on tau is among the remedies, in both
    assert "--tau half-cauchy:SCALE" in block and "--tau half-cauchy:SCALE" in text


def test_the_remedy_for_a_missed_target_follows_what_missed():
    # A proper prior on tau helps the hyperparameters of a run with few groups (common practice); a group's theta or
    # sigma that mixes slowly (two or three measurements far from the rest) needs more draws, not another prior.
    ok = {"rhat_max": 1.001, "bulk_ess_min": 900.0, "tail_ess_min": 800.0}
    slow = {"rhat_max": 1.004, "bulk_ess_min": 650.0, "tail_ess_min": 300.0}
    targets = {"rhat_below": 1.01, "ess_at_least": 400}
    groups_only = {"targets": targets, "worst": {"mu": ok, "tau": ok, "theta": slow, "sigma": slow}}
    text = rerun_advice(groups_only, 1000)
    assert text == "run again with more draws, for example --draws 2000 --max-draws 8000"
    for name in ("tau", "mu", "nu"):
        hyper = {"targets": targets, "worst": {**groups_only["worst"], name: slow}}
        assert rerun_advice(hyper, 1000).endswith(", or with a proper prior on tau (--tau half-cauchy:SCALE)")
    nan = {"targets": targets, "worst": {"tau": {"rhat_max": float("nan"), "bulk_ess_min": 1e3, "tail_ess_min": 1e3}}}
    assert "proper prior" in rerun_advice(nan, 10)  # a NaN diagnostic counts as a miss, as check_targets counts it


def test_estimates_have_no_n(tmp_path):
    # Source: Rubin (1981), the eight schools: estimates and their standard errors (from memory).
    y = [28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0]
    se = [15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0]
    stats = pooling.from_estimates(pd.DataFrame({"school": list("ABCDEFGH"), "y": y, "se": se}), "school", "y", "se")
    fit = pooling.fit(stats, pooling.Model(within="known", tau=pooling.HalfCauchy(10.0)), SMALL, progress=False)
    res = compute(fit, ReportOptions(threshold=0.0))
    page = render(res, "t", None)
    assert "area ∝ 1/se²" in page and "area ∝ n" not in page
    assert '<th class="n">n</th>' not in page
    out = io.StringIO()
    print_results(res, "run", stream=out)
    header = next(ln for ln in out.getvalue().splitlines() if ln.startswith("group "))
    assert " n " not in header
    assert "estimates with standard errors" in out.getvalue()


def test_summary_mode_page_plain_numbers_and_rank_statement():
    rng = np.random.default_rng(21)
    J = 300
    n = rng.integers(2, 12, J)
    stats = pooling.from_summaries(
        pd.DataFrame(
            {"g": [f"S{j:04d}" for j in range(J)], "n": n, "m": 1500.0 + rng.normal(0, 40, J), "s": np.full(J, 30.0)}
        ),
        "g",
        "n",
        "m",
        "s",
    )
    o = ReportOptions(threshold=1500.0)
    fit = pooling.fit(stats, settings=SMALL, progress=False, summary=True, options=o)
    page = render(compute(fit, o), "t", None)
    text = visible_text(page)
    assert not re.search(r"\d\.\d+e[+-]\d\d", text), re.search(r"\S*\d\.\d+e[+-]\d\d\S*", text).group(0)
    assert "coarse" in text and "kept groups" in text.lower()
    assert {"how", "groups", "verdict"} <= set(sections(page)) and "order" not in sections(page)


# ---------------------------------------------------------------------------------------------
# the terminal


def test_terminal_follows_level_best_threshold_and_limits(fit20):
    res = compute(fit20, ReportOptions(level=0.9, best="lowest", threshold=100.0, lower=85.0, upper=115.0))
    out = io.StringIO()
    print_results(res, "run", stream=out)
    text = out.getvalue()
    assert "90% interval" in text and "2.5%" not in text and "97.5%" not in text
    assert "lowest is best" in text
    lines = text.splitlines()
    head = next(i for i, ln in enumerate(lines) if ln.startswith("group "))
    first = lines[head + 1].split()[0]
    assert first == res.table["group"].iat[int(np.argmin(res.table["rank_mean"]))]
    # with 'lowest' the best group has the smallest posterior mean
    assert first == res.table["group"].iat[int(np.argmin(res.table["theta_mean"]))]
    assert "vs 100" in lines[head] and "limits" in lines[head]
    assert any(ln.startswith("threshold 100:") for ln in lines)
    assert any(ln.startswith("limits lower 85 and upper 115, by the mean:") for ln in lines)


def test_terminal_values_near_1e7_in_plain_digits():
    rng = np.random.default_rng(5)
    df = _frame(1e7 + rng.normal(0.0, 0.05, 6), [6] * 6, 0.02, 6)
    fit = pooling.fit(pooling.from_frame(df, "g", "y"), settings=SMALL, progress=False)
    out = io.StringIO()
    print_results(compute(fit), "run", stream=out)
    text = out.getvalue()
    assert "e+0" not in text and "10000000.0" in text
    assert "1 measurements" not in text and "1 groups" not in text


def test_a_group_of_one_with_an_empty_sd_is_read_as_meant(tmp_path):
    # A one-row-per-group table writes an empty sd for a group of one measurement: it must read exactly as the
    # same measurement in a long table (n = 1, M2 = 0), and a group of two with an empty sd is still refused.
    path = tmp_path / "groups.csv"
    path.write_text("g,n,mean,sd\nA,1,10.2,\nB,3,10.5,0.4\nC,4,9.8,0.3\nD,1,11.0, \n")
    st = pooling.from_summaries(path, "g", "n", "mean", "sd")
    assert st.n.tolist() == [1, 3, 4, 1]
    assert st.m2[0] == 0.0 and st.m2[3] == 0.0 and np.isnan(st.raw_sd[0])
    long = pooling.from_frame(pd.DataFrame({"g": ["A", "D"], "y": [10.2, 11.0]}), "g", "y")
    assert long.n.tolist() == [1, 1] and long.m2.tolist() == [0.0, 0.0] and long.mean.tolist() == [10.2, 11.0]
    from pooling import cli

    code = cli.main(
        [
            "fit",
            str(path),
            "--group",
            "g",
            "--size",
            "n",
            "--mean",
            "mean",
            "--sd",
            "sd",
            "--out",
            str(tmp_path / "run"),
            "--chains",
            "2",
            "--draws",
            "200",
            "--warmup",
            "200",
            "--max-draws",
            "200",
            "--seed",
            "1",
            "--tau",
            "half-cauchy:1",
            "--quiet",
        ]
    )
    assert code in (0, 3) and (tmp_path / "run" / "report.html").exists()
    path.write_text("g,n,mean,sd\nA,2,10.2,\nB,3,10.5,0.4\n")
    with pytest.raises(pooling.InputError, match=r"column 'sd', line 2: expected a finite number, found an empty cell"):
        pooling.from_summaries(path, "g", "n", "mean", "sd")


def test_a_ranked_group_outside_the_limits_is_marked_as_such(fit20):
    # Common practice: with specification limits, the group at the top of the order may be the one whose parts
    # miss them (a diameter too large ranks "highest"); the ranking must not read as a recommendation of it.
    res = compute(fit20, ReportOptions(lower=80.0, upper=105.0))
    t = res.table
    first = int(np.argmax(t["p_best"].to_numpy()))
    assert t["limits_side"].iat[first] == "outside"  # the fixture's top group lies above 105
    ranking = verdict(render(res, "t", None))
    ranking = ranking[ranking.index("Most likely best") :]
    assert f"{t['group'].iat[first]} (outside the limits)</strong>" in ranking
    assert "With limits on both sides" in ranking
    inside = verdict(render(compute(fit20, ReportOptions(lower=0.0, upper=1000.0)), "t", None))
    assert "(outside the limits)" not in inside and "specification limits (above)" not in inside
