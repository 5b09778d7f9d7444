"""The reporter's files from `pooling fit`: groups.csv, report.html and the summary.json keys.

The data here are generated with a fixed seed only to carry awkward group labels through the
whole command line; the checks compare the files with the draws written beside them (draws.nc)
and with independent routines (scipy.stats.rankdata, numpy quantiles, the csv module).
"""

from __future__ import annotations

import csv
import json
import re

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from pooling import cli
from pooling.report import neutralise, write_csv

SCRIPT = "<script>alert(1)</script>"
LABELS = [SCRIPT, "=1+2", "+SUM(A1)", "-2+3", "@cmd", 'A "quoted", label', "Ünïcode ✓", "$x$ dollars", "plain-name"]
THRESHOLD = 10.0


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """One real `pooling fit` run over awkward labels, with every reporter option set."""
    base = tmp_path_factory.mktemp("report")
    rng = np.random.default_rng(20)
    rows = []
    for j, lab in enumerate(LABELS):
        n = 3 + (j * 5) % 11
        rows += [(lab, v) for v in 10 + 0.6 * rng.standard_normal() + rng.standard_normal(n)]
    data = base / "bars.csv"
    pd.DataFrame(rows, columns=["lab", "y"]).to_csv(data, index=False)
    out = base / "run"
    argv = [
        "fit",
        str(data),
        "--group",
        "lab",
        "--value",
        "y",
        "--delimiter",
        ",",
        "--out",
        str(out),
        "--quiet",
        "--seed",
        "7",
        "--draws",
        "500",
        "--warmup",
        "300",
        "--max-draws",
        "500",
        "--level",
        "0.9",
        "--top",
        "2",
        "--best",
        "lowest",
        "--threshold",
        str(THRESHOLD),
        "--lower-limit",
        "8",
        "--upper-limit",
        "12.5",
        "--allowed-bias",
        "0.5",
        "--compare",
        "=1+2",
        "--compare",
        "plain-name,@cmd",
        "--compare",
        'A "quoted", label',
    ]
    code = cli.main(argv)
    assert code in (0, 3), code  # 3: written, but a short run may miss a diagnostics target
    return out


def _csv_rows(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def test_run_folder_has_the_reporters_files(run):
    assert {p.name for p in run.iterdir()} >= {"draws.nc", "summary.json", "groups.csv", "report.html"}
    assert not list(run.parent.glob(".run.partial-*"))


def test_report_html_escapes_every_label_and_needs_no_network(run):
    # Source: html.escape semantics (Python standard library); a label may only appear escaped.
    page = (run / "report.html").read_text(encoding="utf-8")
    assert "<script" not in page.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "A &quot;quoted&quot;, label" in page
    # self-contained: no stylesheet, script or image is fetched; the only URLs are SVG namespaces
    for bad in ("<link", " src=", "@import", "<iframe", "<object", "<embed"):
        assert bad not in page.lower(), bad
    assert not re.search(r"url\((?!#)", page)  # only references inside the page, url(#id)
    ids = re.findall(r'\sid="([^"]+)"', page)
    assert len(ids) == len(set(ids))  # one document: every id once, across all the pictures
    for m in re.finditer(r"https?://", page):
        assert page.startswith("http://www.w3.org/", m.start()), page[m.start() : m.start() + 60]
    # the caution and the stated model are present
    assert "never replaces" in page and "licensed professional judgment" in page
    assert "Scaled-Inv-chi2" in page and "statistics SHA-256" in page


def test_groups_csv_neutralises_formula_cells_and_keeps_numbers(run):
    # Source: OWASP "CSV Injection" guidance: cells beginning with =, +, -, @, tab or carriage
    # return get a leading single quote; fields are quoted and embedded quotes doubled.
    rows = _csv_rows(run / "groups.csv")
    head, body = rows[0], rows[1:]
    got = [r[head.index("group")] for r in body]
    want = [neutralise(lab) for lab in LABELS]
    assert sorted(got) == sorted(want)
    for lab in ("'=1+2", "'+SUM(A1)", "'-2+3", "'@cmd"):
        assert lab in got
    assert SCRIPT in got and 'A "quoted", label' in got  # the csv module undid the quoting
    raw = (run / "groups.csv").read_text(encoding="utf-8")
    assert '"A ""quoted"", label"' in raw
    # numeric cells stay numbers, unquoted, including negative ones
    i = head.index("bias_mean")
    assert any(r[i].startswith("-") for r in body)
    assert re.search(r'\n"[^"]*",\d+,-?\d', raw)


def test_summary_json_keeps_labels_as_they_are(run):
    summary = json.loads((run / "summary.json").read_text(encoding="utf-8"))
    labels = [r["group"] for r in summary["groups_table"]]
    assert sorted(labels) == sorted(LABELS)
    assert summary["report_options"]["compare"] == ["=1+2", "plain-name", "@cmd", 'A "quoted", label']
    assert summary["pairwise"]["groups"] == summary["report_options"]["compare"]
    lab = summary["interlab"]
    for key in (
        "consensus",
        "between_sd",
        "repeatability_sd",
        "reproducibility_sd",
        "icc",
        "anova",
        "z_basis",
        "agreement",
    ):
        assert lab[key] is not None, key
    # the per-lab bias and z-scores are columns of every group's row
    assert {"bias_mean", "bias_low_90", "bias_high_90", "z_score", "z_signal"} <= set(summary["groups_table"][0])


def test_csv_columns_agree_with_the_draws(run):
    # Source: the draws in draws.nc, ranked with scipy.stats.rankdata and summarised with numpy;
    # the reporter must reproduce them exactly (up to float round-off).
    post = xr.open_dataset(run / "draws.nc", group="posterior", engine="h5netcdf")
    labels = [str(x) for x in post["group"].values]
    theta = post["theta"].values.reshape(-1, len(labels))
    mu = post["mu"].values.reshape(-1)
    post.close()
    table = pd.DataFrame(json.loads((run / "summary.json").read_text(encoding="utf-8"))["groups_table"])
    assert list(table["group"]) == labels
    ranks = stats.rankdata(theta, axis=1, method="ordinal")  # --best lowest: 1 = lowest theta
    np.testing.assert_allclose(table["rank_mean"], ranks.mean(axis=0), atol=1e-12)
    np.testing.assert_allclose(table["p_best"], (ranks == 1).mean(axis=0), atol=1e-15)
    np.testing.assert_allclose(table["p_top_k"], (ranks <= 2).mean(axis=0), atol=1e-15)
    np.testing.assert_allclose(table["p_above"], (theta > THRESHOLD).mean(axis=0), atol=1e-15)
    np.testing.assert_allclose(table["p_bias_over"], (np.abs(theta - mu[:, None]) > 0.5).mean(axis=0), atol=1e-15)
    lo, hi = np.quantile(theta, [0.05, 0.95], axis=0)
    np.testing.assert_allclose(table["theta_low_90"], lo, rtol=1e-12)
    np.testing.assert_allclose(table["theta_high_90"], hi, rtol=1e-12)
    assert abs(table["p_best"].sum() - 1) < 1e-12
    # and groups.csv holds the same numbers, at full precision
    rows = _csv_rows(run / "groups.csv")
    i = rows[0].index("rank_mean")
    np.testing.assert_array_equal([float(r[i]) for r in rows[1:]], table["rank_mean"].to_numpy())


def test_pairwise_differences_agree_with_the_draws(run):
    # Source: the draws in draws.nc; theta_a - theta_b summarised with numpy (mean, np.quantile's linear
    # method at the run's 90% level). The reporter computes in internal units and scales back, so the two
    # agree to float round-off, not to the bit.
    post = xr.open_dataset(run / "draws.nc", group="posterior", engine="h5netcdf")
    labels = [str(x) for x in post["group"].values]
    theta = post["theta"].values.reshape(-1, len(labels))
    post.close()
    pw = json.loads((run / "summary.json").read_text(encoding="utf-8"))["pairwise"]
    idx = [labels.index(g) for g in pw["groups"]]
    scale = np.abs(theta).max()
    for a, ia in enumerate(idx):
        for b, ib in enumerate(idx):
            got = (pw["difference_mean"][a][b], pw["difference_low_90"][a][b], pw["difference_high_90"][a][b])
            if a == b:
                assert all(v is None for v in got)  # NaN on the diagonal is written as null
                continue
            d = theta[:, ia] - theta[:, ib]
            want = (d.mean(), *np.quantile(d, [0.05, 0.95]))
            np.testing.assert_allclose(got, want, rtol=0, atol=1e-12 * scale)
            assert got[1] <= got[0] <= got[2]
            assert abs(pw["p_row_greater"][a][b] - (d > 0).mean()) < 1e-15
    # the page's head-to-head section lists every pair's difference with the same figures
    from pooling.report.numbers import Values, typical_sd

    page = (run / "report.html").read_text(encoding="utf-8")
    table = pd.DataFrame(json.loads((run / "summary.json").read_text(encoding="utf-8"))["groups_table"])
    v = Values(typical_sd(table["theta_sd"]))
    section = page[page.index('<section id="h2h">') :]
    section = section[: section.index("</section>")]
    assert "90% credible interval" in section
    for a in range(len(idx)):
        for b in range(a + 1, len(idx)):
            assert f'<td class="n">{v(pw["difference_mean"][a][b])}</td>' in section


def test_neutralise_covers_tab_and_carriage_return(tmp_path):
    # Source: OWASP "CSV Injection": the trigger characters are =, +, -, @, tab (0x09) and
    # carriage return (0x0D).
    df = pd.DataFrame({"group": ["\tTab", "\rCR", "=x", "ok", "-1"], "value": [-1.5, 2.0, 3.0, 4.0, 5.0]})
    write_csv(df, tmp_path / "t.csv")
    rows = _csv_rows(tmp_path / "t.csv")
    assert [r[0] for r in rows[1:]] == ["'\tTab", "'\rCR", "'=x", "ok", "'-1"]
    assert [r[1] for r in rows[1:]] == ["-1.5", "2.0", "3.0", "4.0", "5.0"]


def test_terminal_table_shows_shrinkage_and_p_best(tmp_path, capsys):
    code = cli.main(
        [
            "demo",
            "--out",
            str(tmp_path / "demo"),
            "--draws",
            "300",
            "--warmup",
            "200",
            "--max-draws",
            "300",
            "--seed",
            "1",
        ]
    )
    assert code in (0, 3)
    text = capsys.readouterr().out
    assert "shrink" in text and "P(best)" in text


@pytest.mark.parametrize(
    "extra, what",
    [
        (["--lower-limit", "12", "--upper-limit", "8"], "lower specification limit"),
        (["--compare", "no-such-lab"], "no group 'no-such-lab'"),
    ],
)
def test_bad_report_options_write_nothing(tmp_path, capsys, extra, what):
    out = tmp_path / "run"
    code = cli.main(
        ["demo", "--out", str(out), "--quiet", "--draws", "100", "--warmup", "50", "--max-draws", "100"] + extra
    )
    err = capsys.readouterr().err
    assert code == 2 and what in err and err.count("\n") == 1
    assert not out.exists() and not list(tmp_path.iterdir())


def test_a_top_above_the_number_of_groups_is_refused_before_sampling(tmp_path, capsys):
    # the demo holds 36 suppliers: the top 37 would make P(top K) 1 for every group, so it is refused, not cut to 36
    out = tmp_path / "run"
    code = cli.main(["demo", "--out", str(out), "--quiet", "--draws", "100", "--warmup", "50", "--top", "37"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1, err
    for part in ("bad option --top", "top 37", "36 groups", "at most 36"):
        assert part in err, (part, err)
    assert not out.exists() and not list(tmp_path.iterdir())


def test_the_default_top_never_trips_the_check_and_the_run_records_what_it_used(tmp_path, capsys):
    # two groups (a proper prior on tau): --top left out means the top 3, or every group when fewer: here 2
    rng = np.random.default_rng(4)
    rows = [(lab, v) for lab in ("a", "b") for v in 10 + rng.standard_normal(6)]
    data = tmp_path / "two.csv"
    pd.DataFrame(rows, columns=["lab", "y"]).to_csv(data, index=False)
    fit = ["fit", str(data), "--group", "lab", "--value", "y", "--tau", "half-normal:1", "--quiet", "--seed", "2"]
    fit += ["--draws", "200", "--warmup", "200", "--max-draws", "200"]
    assert cli.main([*fit, "--out", str(tmp_path / "run")]) in (0, 3)
    summary = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert summary["report_options"]["k"] == 2
    groups = pd.read_csv(tmp_path / "run" / "groups.csv")
    assert np.allclose(groups["p_top_k"], 1.0)  # both groups are among the top 2 in every draw
    capsys.readouterr()
    assert cli.main([*fit, "--out", str(tmp_path / "run3"), "--top", "3"]) == 2
    assert "bad option --top: asked for the top 3, but the data hold 2 groups" in capsys.readouterr().err
    assert not (tmp_path / "run3").exists()


def test_the_python_options_refuse_a_top_above_the_groups_when_the_answers_are_computed():
    from pooling.asked import TOP_DEFAULT, ReportOptions, check_k
    from pooling.errors import InputError

    assert ReportOptions().k is None and TOP_DEFAULT == 3
    assert [check_k(None, J) for J in (1, 2, 3, 40)] == [1, 2, 3, 3]
    assert check_k(5, 5) == 5
    with pytest.raises(InputError, match=r"bad option k \(the size of the top group\): asked for the top 6, but the"):
        check_k(6, 5)
    with pytest.raises(InputError, match="at least 1"):
        ReportOptions(k=0)
    import pooling
    from pooling.results import compute

    rng = np.random.default_rng(5)
    frame = pd.DataFrame({"g": np.repeat(["a", "b", "c"], 5), "y": rng.standard_normal(15)})
    fit = pooling.fit(pooling.from_frame(frame, "g", "y"), settings=pooling.Settings(seed=1, draws=100, warmup=100))
    with pytest.raises(InputError, match="asked for the top 4, but the data hold 3 groups"):
        compute(fit, ReportOptions(k=4))
    assert compute(fit).options.k == 3 and compute(fit, ReportOptions(k=2)).options.k == 2


@pytest.mark.parametrize(
    "option, value",
    [
        ("--level", "1.5"),
        ("--level", "x"),
        ("--top", "0"),
        ("--allowed-bias", "-1"),
        ("--threshold", "nan"),
        ("--sigma-pt", "0"),
    ],
)
def test_bad_report_numbers_are_refused_before_sampling(tmp_path, capsys, option, value):
    with pytest.raises(SystemExit) as exc:
        cli.main(["demo", "--out", str(tmp_path / "run"), "--quiet", option, value])
    assert exc.value.code == 2
    assert option in capsys.readouterr().err
    assert not (tmp_path / "run").exists()
