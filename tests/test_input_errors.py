"""Bad input gets one clear line naming the file, column, row or group, exit code 2, and nothing written.

The expected behaviour is the project's own contract (README, "Exit codes"); checking it needs no
outside reference. Each case is a small file a user could plausibly hand over.
"""

from __future__ import annotations

import subprocess
import sys

import pandas as pd
import pytest

import pooling
from pooling.errors import InputError


def _fit(run_cli, path, tmp_path, *extra):
    out = tmp_path / "run"
    code, stdout, stderr = run_cli("fit", path, "--out", out, "--quiet", "--draws", "50", "--warmup", "50", *extra)
    return code, stderr, out


def _one_line(stderr: str) -> str:
    lines = [ln for ln in stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, stderr
    assert "Traceback" not in stderr
    return lines[0]


CASES = [
    (
        "text in value",
        "lab,y\na,1.0\nb,n/a\nc,2\n",
        ["--group", "lab", "--value", "y"],
        ["column 'y'", "line 3:", "'n/a'"],
    ),
    (
        "inf in value",
        "lab,y\na,1.0\nb,inf\nc,2\n",
        ["--group", "lab", "--value", "y"],
        ["column 'y'", "line 3:", "finite"],
    ),
    (
        "empty cell in value",
        "lab,y\na,1.0\nb,\nc,2\n",
        ["--group", "lab", "--value", "y"],
        ["column 'y'", "line 3:", "empty"],
    ),
    (
        "empty group label",
        "lab,y\na,1.0\n,2.0\nc,2\n",
        ["--group", "lab", "--value", "y"],
        ["column 'lab'", "line 3:", "group label"],
    ),
    (
        "missing column",
        "lab,y\na,1\n",
        ["--group", "lab", "--value", "strength"],
        ["no column 'strength'", "'lab'", "'y'"],
    ),
    ("header only", "lab,y\n", ["--group", "lab", "--value", "y"], ["no data rows"]),
    ("duplicated header", "lab,y,y\na,1,2\n", ["--group", "lab", "--value", "y"], ["'y' appears 2 times"]),
    (
        "n = 0 in summaries",
        "lab,n,m,s\na,3,1.0,0.5\nb,0,2.0,0.5\n",
        ["--group", "lab", "--size", "n", "--mean", "m", "--sd", "s"],
        ["column 'n'", "group 'b'", "at least 1", "found 0"],
    ),
    (
        "one measurement with a spread",
        "lab,n,m,s\na,3,1.0,0.5\n\nb,1,2.0,0.4\nc,2,1.5,0.2\n",
        ["--group", "lab", "--size", "n", "--mean", "m", "--sd", "s"],
        ["column 's'", "line 4,", "group 'b'", "(n = 1) has no spread", "found 0.4", "column 'n'"],
    ),
    (
        "non-positive standard error",
        "lab,est,se\na,1.0,0.5\nb,2.0,0\nc,1.5,0.2\n",
        ["--group", "lab", "--estimate", "est", "--std-error", "se"],
        ["column 'se'", "group 'b'", "> 0", "found 0"],
    ),
    (
        "one row per group, repeated",
        "lab,est,se\na,1.0,0.5\na,2.0,0.1\nc,1.5,0.2\n",
        ["--group", "lab", "--estimate", "est", "--std-error", "se"],
        ["line 3:", "one row per group", "'a'", "first in line 2"],
    ),
    # Source: Unicode Standard Annex #15 (normalisation forms): U+00FC and U+0075 U+0308 are
    # canonically equivalent, and so are the Kelvin sign U+212A and the letter K.
    (
        "composed and decomposed label",
        "lab,y\nZ\u00fcrich,1.0\nBern,2.0\nZu\u0308rich,1.5\nBern,2.5\n",
        ["--group", "lab", "--value", "y"],
        ["Unicode form", "U+00FC", "U+0075 U+0308", "two groups"],
    ),
    (
        "Kelvin sign and K",
        "lab,y\nK,1.0\nL,2.0\n\u212a,1.5\nL,2.5\nK,1.2\n",
        ["--group", "lab", "--value", "y"],
        ["Unicode form", "U+212A", "U+004B"],
    ),
]


@pytest.mark.parametrize("name,text,opts,needles", CASES, ids=[c[0] for c in CASES])
def test_bad_file_content(run_cli, tmp_path, name, text, opts, needles):
    path = tmp_path / "bad-input.csv"
    path.write_text(text)
    code, stderr, out = _fit(run_cli, path, tmp_path, *opts)
    line = _one_line(stderr)
    assert code == 2, line
    assert "bad-input.csv" in line or "bad option" in line
    for needle in needles:
        assert needle in line, (needle, line)
    assert not out.exists()
    assert not list(tmp_path.glob(".run.partial-*"))


def test_empty_file(run_cli, tmp_path):
    path = tmp_path / "empty.csv"
    path.write_text("")
    code, stderr, out = _fit(run_cli, path, tmp_path, "--group", "a", "--value", "b")
    assert code == 2 and "empty.csv" in _one_line(stderr) and "empty" in stderr
    assert not out.exists()


def test_missing_file(run_cli, tmp_path):
    code, stderr, out = _fit(run_cli, tmp_path / "nowhere.csv", tmp_path, "--group", "a", "--value", "b")
    assert code == 2 and "nowhere.csv" in _one_line(stderr) and "does not exist" in stderr
    assert not out.exists()


def test_bad_prior_option(run_cli, small_csv, tmp_path):
    code, stderr, out = _fit(
        run_cli, small_csv, tmp_path, "--group", "plant", "--value", "thickness", "--tau", "half-cauchy:abc"
    )
    assert code == 2 and "--tau" in _one_line(stderr) and "'abc'" in stderr
    assert not out.exists()


def test_refusal_of_flat_tau_with_two_groups(run_cli, tmp_path):
    path = tmp_path / "two.csv"
    path.write_text("lab,y\na,1\na,2\nb,3\nb,5\n")
    code, stderr, out = _fit(run_cli, path, tmp_path, "--group", "lab", "--value", "y")
    line = _one_line(stderr)
    assert code == 2 and "fewer than 3 groups" in line and "half-cauchy" in line
    assert not out.exists()


def test_refusal_of_shared_without_replication(run_cli, tmp_path):
    path = tmp_path / "single.csv"
    path.write_text("lab,y\na,1\nb,2\nc,4\nd,3\n")
    code, stderr, out = _fit(run_cli, path, tmp_path, "--group", "lab", "--value", "y", "--within", "shared")
    line = _one_line(stderr)
    assert code == 2 and "replication" in line and "--within known" in line
    assert not out.exists()


def test_no_traceback_in_a_real_process(tmp_path):
    """The installed entry point, as a user runs it: one line on stderr and exit code 2."""
    path = tmp_path / "bad.csv"
    path.write_text("lab,y\na,1\nb,oops\n")
    proc = subprocess.run(
        [
            sys.executable,
            "-m",
            "pooling.cli",
            "fit",
            str(path),
            "--group",
            "lab",
            "--value",
            "y",
            "--out",
            str(tmp_path / "run"),
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stderr.strip().count("\n") == 0 and "Traceback" not in proc.stderr
    assert "'oops'" in proc.stderr and "line 3:" in proc.stderr
    assert not (tmp_path / "run").exists()


def test_unicode_twins_finds_exactly_the_canonically_equivalent_pairs():
    # Source: Python's unicodedata (the Unicode Character Database) as the reference for NFC: a list of
    # distinct labels has twins exactly when NFC maps two of them to one text.
    import unicodedata

    from hypothesis import given, settings
    from hypothesis import strategies as st

    from pooling.stats import unicode_twins

    letters = st.sampled_from(
        ["a", "e", "u", "K", "\u00e9", "\u00fc", "\u0301", "\u0308", "\u212a", "\u00c5", "\u212b", "A", "\u030a", "Z"]
    )
    label = st.lists(letters, min_size=1, max_size=4).map("".join)

    @settings(max_examples=400, deadline=None)
    @given(st.lists(label, min_size=1, max_size=8, unique=True))
    def check(labels):
        twins = unicode_twins(labels)
        clash = len({unicodedata.normalize("NFC", x) for x in labels}) < len(labels)
        assert (twins is not None) == clash
        if twins is not None:
            a, b = twins
            assert a != b and unicodedata.normalize("NFC", a) == unicodedata.normalize("NFC", b)

    check()


def test_sigma2_prior_is_for_the_shared_structure_only(run_cli, small_csv, tmp_path):
    code, stderr, out = _fit(
        run_cli, small_csv, tmp_path, "--group", "plant", "--value", "thickness", "--sigma2", "scaled-inv-chi2:4:0.01"
    )
    line = _one_line(stderr)
    assert code == 2 and "shared structure only" in line and "within='separate'" in line
    assert not out.exists()
    code, stderr, out = _fit(
        run_cli,
        small_csv,
        tmp_path,
        "--group",
        "plant",
        "--value",
        "thickness",
        "--within",
        "shared",
        "--sigma2",
        "scaled-inv-chi2:4",
    )
    assert code == 2 and "--sigma2" in _one_line(stderr) and "takes 2 number(s)" in stderr
    assert not out.exists()


def test_sigma2_prior_record_and_its_checks():
    import json

    import pooling
    from pooling.errors import ModelError

    m = pooling.Model(within="shared", sigma2=pooling.ScaledInvChi2(4.0, 0.25))
    assert pooling.Model.from_dict(json.loads(json.dumps(m.to_dict()))) == m
    assert m.priors()["sigma"] == "scaled-inv-chi2(dof=4, scale2=0.25) on sigma^2"
    # the flat default writes no record of its own: earlier records stay as they were
    assert "sigma2" not in pooling.Model(within="shared").to_dict()
    for dof, scale2 in ((0.0, 1.0), (4.0, -1.0), (float("inf"), 1.0), (4.0, float("nan"))):
        with pytest.raises(ModelError, match="dof > 0 and scale2 > 0"):
            pooling.Model(within="shared", sigma2=pooling.ScaledInvChi2(dof, scale2))


def test_a_group_of_one_takes_an_empty_or_zero_sd_and_refuses_any_other(tmp_path):
    # one measurement has no spread: its sd is empty (as such tables write it) or 0, and M2 is 0 either way
    path = tmp_path / "groups.csv"
    path.write_text("g,n,mean,sd\nA,1,10.2,\nB,1,10.5,0\nC,1,9.9,0.0\nD,3,10.0,0.3\n")
    st = pooling.from_summaries(path, "g", "n", "mean", "sd")
    assert st.n.tolist() == [1, 1, 1, 3] and st.m2[:3].tolist() == [0.0, 0.0, 0.0]
    assert st.m2[3] == pytest.approx(2 * 0.3**2, rel=1e-15)  # (n - 1) sd^2
    frame = pd.DataFrame({"g": ["A", "B"], "n": [4, 1], "mean": [1.0, 2.0], "sd": [0.5, 1e-9]})
    with pytest.raises(InputError) as e:
        pooling.from_summaries(frame, "g", "n", "mean", "sd")
    line = str(e.value)
    assert "the data frame, column 'sd', row 2, group 'B'" in line and "found 1e-09" in line, line
