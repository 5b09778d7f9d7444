"""Hostile input through the whole command line: every case ends in a documented exit code, one line on
stderr that names what is wrong (no traceback, no "internal error", no Python warning), nothing
half-written, and no data lost.

The contract is the project's own (README, "Exit codes" and "What a file may look like"); checking
it needs no outside reference, and every data file here is invented for the purpose. Most cases run
in-process through pooling.cli.main with stderr captured and warnings recorded; only the cases that
need a real process (closed pipes, SIGTERM and SIGKILL, a user with no home) run as subprocesses.
Store damage is covered with the store (tests/test_store_*.py).

Categories: encodings, numbers, labels, options, paths (--out and inputs), Parquet damage, refit
options, closed pipes, signals, leftovers of killed runs, a user with no writable home.
"""

from __future__ import annotations

import hashlib
import json
import os
import pwd
import shlex
import shutil
import signal
import subprocess
import sys
import tempfile
import textwrap
import warnings
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pooling import cli

TINY = ["--chains", "2", "--draws", "30", "--warmup", "30", "--max-draws", "30", "--seed", "1", "--quiet"]
SMALL = ["--chains", "2", "--draws", "30", "--warmup", "30", "--seed", "1", "--quiet"]  # the cap stays 4 x --draws
HYP = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
ROOT = Path(__file__).resolve().parent.parent


# ---------------------------------------------------------------------------------------------
# the checks every case gets


def run_main(*argv):
    """cli.main in-process: (exit code, stdout, stderr, warnings raised meanwhile)."""
    import contextlib
    import io

    out, err = io.StringIO(), io.StringIO()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = cli.main([str(a) for a in argv])
            except SystemExit as exc:  # argparse's refusals (one line, see cli._Parser)
                code = exc.code
    shown = [
        f"{w.category.__name__}: {w.message}"
        for w in caught
        if not issubclass(w.category, (DeprecationWarning, PendingDeprecationWarning))
    ]
    return code, out.getvalue(), err.getvalue(), shown


def _digests(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and not p.is_symlink()
    }


def leftovers(folder: Path) -> list[str]:
    return sorted(str(p) for p in folder.rglob("*") if ".partial-" in p.name or ".old-" in p.name)


def check_outcome(code, err, caught, want, needles=(), out: Path | None = None):
    """`want`: the expected exit code (a set of codes for cases that may fit). One line on failure."""
    allowed = want if isinstance(want, (set, frozenset)) else {want}
    assert code in allowed, (code, err)
    assert "Traceback" not in err and "internal error" not in err, err
    assert caught == [], caught  # a RuntimeWarning on stderr is noise in a nightly log: stopped at its source
    lines = [ln for ln in err.splitlines() if ln.strip()]
    if code in (0, 3):
        assert all(ln.startswith("warning: diagnostics") for ln in lines), err
        if out is not None:
            assert (out / "summary.json").exists() and (out / ".pooling-run").exists()
        return ""
    assert len(lines) == 1, err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    if out is not None and code != 6:
        assert not out.exists() or out.is_symlink() or out.is_file() or any(out.iterdir()), out
    return lines[0]


# ---------------------------------------------------------------------------------------------
# named cases: (id, files to write, argv, exit code, words the one line must hold)

ROWS = "".join(f"L{j},{10 + j + 0.25 * k}\n" for j in range(4) for k in range(3))
GOOD = "lab,y\n" + ROWS
CAFE = "lab,y\n" + "".join(f"Café{j},{10 + j + 0.25 * k}\n" for j in range(4) for k in range(3))
FIT = ["fit", "in.csv", "--group", "lab", "--value", "y", "--out", "run"]


def _parquet(table) -> bytes:
    import io

    import pyarrow.parquet as pq

    buf = io.BytesIO()
    pq.write_table(table, buf)
    return buf.getvalue()


def _pq(**cols):
    import pyarrow as pa

    return lambda: _parquet(pa.table(cols))


def _pq_binary_labels():
    import pyarrow as pa

    return _parquet(pa.table({"lab": pa.array([b"\xff\xfe", b"ok", b"ok"], pa.binary()), "y": [1.0, 2.0, 3.0]}))


def _pq_damaged():
    """A dictionary-encoded page with some of its index bytes flipped (found by the 266-case sweep)."""
    import pyarrow as pa

    table = pa.table({"lab": [f"G{i % 5}" for i in range(5000)], "y": [float(i % 17) for i in range(5000)]})
    data = bytearray(_parquet(table))
    for k in range(120, 160):
        data[k] ^= 0x55
    return bytes(data)


CASES = [
    # encodings
    (
        "enc: utf-8 with one Windows-1252 line",
        {"in.csv": CAFE.encode() + "Café9,3\n".encode("cp1252")},
        FIT,
        2,
        ["line 14", "UTF-8 except for this line", "b'Caf\\xe99,3'", "--encoding"],
    ),
    (
        "enc: the same file with --encoding cp1252",
        {"in.csv": CAFE.encode() + "Café9,3\n".encode("cp1252")},
        FIT + ["--encoding", "cp1252"],
        {0, 3},
        [],
    ),
    ("enc: utf-32 with its byte-order mark", {"in.csv": CAFE.encode("utf-32")}, FIT, {0, 3}, []),
    (
        "enc: utf-32 big-endian with its mark",
        {"in.csv": b"\x00\x00\xfe\xff" + CAFE.encode("utf-32-be")},
        FIT,
        {0, 3},
        [],
    ),
    ("enc: utf-16 with its mark", {"in.csv": CAFE.encode("utf-16")}, FIT, {0, 3}, []),
    ("enc: utf-16 without a mark", {"in.csv": CAFE.encode("utf-16-le")}, FIT, 2, ["NUL bytes", "--encoding"]),
    ("enc: a legacy Windows-1252 file", {"in.csv": CAFE.encode("cp1252")}, FIT, {0, 3}, []),
    (
        "enc: --encoding bogus-enc",
        {"in.csv": GOOD.encode()},
        FIT + ["--encoding", "bogus-enc"],
        2,
        ["--encoding", "'bogus-enc'", "not a text encoding"],
    ),
    (
        "enc: --encoding base64 (bytes codec)",
        {"in.csv": GOOD.encode()},
        FIT + ["--encoding", "base64"],
        2,
        ["'base64'", "not a text encoding"],
    ),
    (
        "enc: --encoding utf-16 on utf-8",
        {"in.csv": CAFE.encode()},
        FIT + ["--encoding", "utf-16"],
        2,
        ["not in the utf-16 encoding", "BOM"],
    ),
    (
        "enc: --encoding ascii on utf-8",
        {"in.csv": CAFE.encode()},
        FIT + ["--encoding", "ascii"],
        2,
        ["line 2", "the byte 0xC3 is not text in the ascii encoding", "b'Caf\\xc3\\xa90,10.0'"],
    ),
    (
        "enc: a byte cp1252 does not define",
        {"in.csv": GOOD.encode() + b"L\x819,3\n"},
        FIT + ["--encoding", "cp1252"],
        2,
        ["line 14", "the byte 0x81", "b'L\\x819,3'", "--encoding"],
    ),
    (
        "enc: the same byte, cp1252 detected",
        {"in.csv": GOOD.encode() + b"L\x819,3\n"},
        FIT,
        2,
        ["line 14", "read as Windows-1252", "the byte 0x81"],
    ),
    ("enc: a character cut at the end", {"in.csv": CAFE.encode() + b"Caf\xc3"}, FIT, 2, ["line 14"]),
    ("enc: lines ended by CR only", {"in.csv": GOOD.replace("\n", "\r").encode()}, FIT, {0, 3}, []),
    ("enc: only a byte-order mark", {"in.csv": b"\xef\xbb\xbf"}, FIT, 2, ["no header and no data"]),
    # numbers
    ("num: 1e999 quoted as written", {"in.csv": GOOD + "L0,1e999\n"}, FIT, 2, ["line 14", "'1e999'", "largest double"]),
    ("num: -1e999", {"in.csv": GOOD + "L0,-1e999\n"}, FIT, 2, ["'-1e999'"]),
    ("num: a written nan", {"in.csv": GOOD + "L0,NaN\n"}, FIT, 2, ["line 14:", "'NaN'"]),
    ("num: hexadecimal", {"in.csv": GOOD + "L0,0x10\n"}, FIT, 2, ["'0x10'"]),
    ("num: full-width digits", {"in.csv": GOOD + "L0,１２\n"}, FIT, 2, ["'１２'"]),
    ("num: --thousands ''", {"in.csv": GOOD}, FIT + ["--thousands", ""], 2, ["--thousands", "one separator"]),
    ("num: --thousands 1", {"in.csv": GOOD}, FIT + ["--thousands", "1"], 2, ["--thousands", "'1'"]),
    ("num: --thousands ab", {"in.csv": GOOD}, FIT + ["--thousands", "ab"], 2, ["--thousands"]),
    ("num: --delimiter ''", {"in.csv": GOOD}, FIT + ["--delimiter", ""], 2, ["--delimiter"]),
    ("num: --delimiter newline", {"in.csv": GOOD}, FIT + ["--delimiter", "\n"], 2, ["--delimiter", "'\\n'"]),
    (
        "num: summary n = 9e18",
        {"in.csv": "lab,n,m,s\na,9e18,1,1\nb,5,2,1\nc,4,3,1\n"},
        ["fit", "in.csv", "--group", "lab", "--size", "n", "--mean", "m", "--sd", "s", "--out", "run"],
        2,
        ["column 'n'", "group 'a'", "2^53", "'9e+18'"],
    ),
    (
        "num: summary n = 1e19",
        {"in.csv": "lab,n,m,s\na,1e19,1,1\nb,5,2,1\nc,4,3,1\n"},
        ["fit", "in.csv", "--group", "lab", "--size", "n", "--mean", "m", "--sd", "s", "--out", "run"],
        2,
        ["group 'a'", "'1e+19'"],
    ),
    (
        "num: summary n = 2^53 fits",
        {"in.csv": f"lab,n,m,s\na,{2**53},1,1\nb,2,2,1\nc,2,3,1\n"},
        ["fit", "in.csv", "--group", "lab", "--size", "n", "--mean", "m", "--sd", "s", "--out", "run"],
        {0, 3},
        [],
    ),
    (
        "num: standard errors of 1e-300",
        {"in.csv": "lab,e,s\na,1,1e-300\nb,2,1e-300\nc,3,1e-300\n"},
        ["fit", "in.csv", "--group", "lab", "--estimate", "e", "--std-error", "s", "--out", "run"],
        {0, 3},
        [],
    ),
    (
        "num: the largest double",
        {
            "in.csv": "lab,y\n"
            + "".join(f"L{j},{1.7976931348623157e308 * (-1) ** k}\n" for j in range(3) for k in range(2))
        },
        FIT,
        2,
        ["magnitude", "times 1e-307"],
    ),
    (
        "num: subnormal values",
        {"in.csv": "lab,y\n" + "".join(f"L{j},{1e-320 * (j + 1) * (k + 1)}\n" for j in range(3) for k in range(2))},
        FIT,
        2,
        ["magnitude", "times 1e+320"],
    ),
    # labels
    ("label: escape code", {"in.csv": GOOD + "\x1b[2J,1\n"}, FIT, 2, ["line 14:", "U+001B"]),
    ("label: NUL byte", {"in.csv": GOOD + "a\x00b,1\n"}, FIT, 2, ["NUL bytes"]),
    ("label: empty", {"in.csv": GOOD + ",1\n"}, FIT, 2, ["line 14:", "empty cell"]),
    ("label: Unicode twins", {"in.csv": GOOD + "Café,1\nCafe\u0301,2\n"}, FIT, 2, ["Unicode form", "U+0301"]),
    ("label: 100,000 characters", {"in.csv": GOOD + "x" * 100_000 + ",1\n" + "x" * 100_000 + ",2\n"}, FIT, {0, 3}, []),
    ("label: formula and markup", {"in.csv": GOOD + "\"=cmd|' /C calc'!A0\",1\n<script>,2\n"}, FIT, {0, 3}, []),
    # options
    (
        "opt: --group lab --value lab",
        {"in.csv": GOOD},
        ["fit", "in.csv", "--group", "lab", "--value", "lab", "--out", "run"],
        2,
        ["--group", "--value", "both 'lab'"],
    ),
    (
        "opt: --size and --mean the same column",
        {"in.csv": "lab,n,s\na,3,1\nb,3,1\nc,3,1\n"},
        ["fit", "in.csv", "--group", "lab", "--size", "n", "--mean", "n", "--sd", "s", "--out", "run"],
        2,
        ["--size", "--mean", "both 'n'"],
    ),
    (
        "opt: --estimate and --std-error the same",
        {"in.csv": GOOD},
        ["fit", "in.csv", "--group", "lab", "--estimate", "y", "--std-error", "y", "--out", "run"],
        2,
        ["both 'y'"],
    ),
    (
        "opt: --draws 1000000000",
        {"in.csv": GOOD},
        FIT + ["--draws", "1000000000", "--quiet"],
        2,
        ["--draws", "at most 10,000,000 sweeps per chain", "1,000,000,000"],
    ),
    (
        "opt: --warmup 1000000000",
        {"in.csv": GOOD},
        FIT + ["--warmup", "1000000000", "--quiet"],
        2,
        ["--warmup", "at most 10,000,000 sweeps per chain"],
    ),
    (
        "opt: draws beyond memory",
        {"in.csv": GOOD},
        FIT + ["--chains", "1000", "--draws", "2500000", "--quiet"],
        2,
        ["--draws", "of memory", "TiB", "the run needs about 2 times that"],
    ),
    ("opt: --max-draws 1e11", {"in.csv": GOOD}, FIT + ["--max-draws", "100000000000", "--quiet"], 2, ["--max-draws"]),
    ("opt: --chains 1000000", {"in.csv": GOOD}, FIT + ["--chains", "1000000"], 2, ["--chains", "at most"]),
    ("opt: --draws abc (argparse)", {"in.csv": GOOD}, FIT + ["--draws", "abc"], 2, ["--draws", "'abc'"]),
    ("opt: no --group (argparse)", {"in.csv": GOOD}, ["fit", "in.csv", "--value", "y", "--out", "run"], 2, ["--group"]),
    ("opt: --nu-grid 1e308", {"in.csv": GOOD}, FIT + ["--nu-grid", "1e308,2e308"], 2, ["--nu-grid", "--within shared"]),
    ("opt: --nu 1e-320", {"in.csv": GOOD}, FIT + ["--nu", "1e-320"], 2, ["--nu", "at least 1e-06"]),
    ("opt: --tau half-cauchy:-1", {"in.csv": GOOD}, FIT + ["--tau", "half-cauchy:-1"], 2, ["tau"]),
    ("opt: --level 1.5", {"in.csv": GOOD}, FIT + ["--level", "1.5"], 2, ["--level"]),
    ("opt: --threshold 1.7e308", {"in.csv": GOOD}, FIT + ["--threshold", "1.7e308"], 2, ["--threshold", "1e+100"]),
    ("opt: --sigma-pt 1e-320", {"in.csv": GOOD}, FIT + ["--sigma-pt", "1e-320"], 2, ["--sigma-pt", "1e-100"]),
    ("opt: --compare unknown", {"in.csv": GOOD}, FIT + ["--compare", "nope"], 2, ["'nope'"]),
    # inputs
    ("in: missing file", {}, FIT, 2, ["'in.csv' does not exist"]),
    ("in: a FIFO", {"in.csv": "fifo"}, FIT, 2, ["named pipe", "not a regular file"]),
    ("in: a symlink loop", {"in.csv": ("link", "in.csv")}, FIT, 2, ["symbolic link that loops"]),
    ("in: a dangling symlink", {"in.csv": ("link", "gone.csv")}, FIT, 2, ["symbolic link to 'gone.csv'"]),
    (
        "in: /dev/null",
        {},
        ["fit", "/dev/null", "--group", "lab", "--value", "y", "--out", "run"],
        2,
        ["character device"],
    ),
    ("in: an empty file", {"in.csv": b""}, FIT, 2, ["empty"]),
    (
        "in: a 300-character name",
        {},
        ["fit", "x" * 300 + ".csv", "--group", "lab", "--value", "y", "--out", "run"],
        2,
        ["too long"],
    ),
    # --out
    ("out: .", {"in.csv": GOOD}, FIT[:-1] + ["."], 2, ["--out", "current folder"]),
    ("out: . --replace", {"in.csv": GOOD}, FIT[:-1] + [".", "--replace"], 2, ["current folder"]),
    ("out: ..", {"in.csv": GOOD}, FIT[:-1] + ["..", "--replace"], 2, ["holds the current folder"]),
    ("out: the input file", {"in.csv": GOOD}, FIT[:-1] + ["in.csv", "--replace"], 2, ["is the input file"]),
    (
        "out: the folder of the input",
        {"d/in.csv": GOOD},
        ["fit", "d/in.csv", "--group", "lab", "--value", "y", "--out", "d", "--replace"],
        2,
        ["'d' holds the input file"],
    ),
    ("out: below a file", {"in.csv": GOOD, "afile": "x"}, FIT[:-1] + ["afile/run"], 6, ["is a file, in the way"]),
    ("out: a 300-character name", {"in.csv": GOOD}, FIT[:-1] + ["x" * 300], 6, ["300 bytes long", "255"]),
    ("out: a 300-character folder on the way", {"in.csv": GOOD}, FIT[:-1] + ["y" * 300 + "/run"], 6, ["300 bytes"]),
    (
        "out: a folder not written by pooling",
        {"in.csv": GOOD, "run/keep.txt": "mine"},
        FIT + ["--replace"],
        6,
        ["not a run folder written by pooling"],
    ),
    (
        "out: a symlink to a folder",
        {"in.csv": GOOD, "real/x": "x", "run": ("link", "real")},
        FIT + ["--replace"],
        6,
        ["symbolic link"],
    ),
    ("out: a symlink loop", {"in.csv": GOOD, "run": ("link", "run")}, FIT, 6, ["loops"]),
    ("out: a NUL in the name", {"in.csv": GOOD}, FIT[:-1] + ["a\x00b"], 2, ["NUL"]),
    ("out: a file in the way", {"in.csv": GOOD, "run": "keep"}, FIT + ["--replace"], 6, ["in the way"]),
    (
        "out: inside the input folder",
        {"d/in.csv": GOOD},
        ["fit", "d", "--group", "lab", "--value", "y", "--out", "d/run"],
        2,
        ["'d/run' is inside the input folder 'd'"],
    ),
    (
        "out: a run folder from before markers",
        {
            "in.csv": GOOD,
            "run/summary.json": '{\n "format": 1,\n "pooling_version": "0.1.0"}',
            "run/draws.nc": "x",
            "run/groups.csv": "x",
        },
        FIT + ["--replace"],
        6,
        ["no '.pooling-run' marker", "pooling 0.1.0", "before run folders were marked", "rm -r -- run"],
    ),
    # Parquet
    ("parquet: non-UTF-8 binary labels", {"in.csv": _pq_binary_labels}, FIT, 2, ["row 1", "UTF-8", "b'\\xff\\xfe'"]),
    ("parquet: damaged pages", {"in.csv": _pq_damaged}, FIT, 2, ["damaged Parquet file"]),
    ("parquet: zero rows", {"in.csv": _pq(lab=[], y=[])}, FIT, 2, ["in.csv", "no rows"]),
    (
        "parquet: cut short",
        {"in.csv": lambda: _pq(lab=["a", "b"], y=[1.0, 2.0])()[:-9]},
        FIT,
        2,
        ["not a readable Parquet file"],
    ),
    ("parquet: inf", {"in.csv": _pq(lab=["a", "b", "c"], y=[1.0, float("inf"), 2.0])}, FIT, 2, ["row 2", "finite"]),
    # ingest (the store's own damage is tested with the store)
    (
        "ingest: --group lab --value lab",
        {"in.csv": GOOD},
        ["ingest", "s.store", "in.csv", "--group", "lab", "--value", "lab"],
        2,
        ["both 'lab'"],
    ),
    (
        "ingest: --encoding bogus-enc",
        {"in.csv": GOOD},
        ["ingest", "s.store", "in.csv", "--group", "lab", "--value", "y", "--encoding", "bogus-enc"],
        2,
        ["--encoding"],
    ),
    (
        "ingest: subnormal values",
        {"in.csv": "lab,y\n" + "".join(f"L{j},{1e-320 * (j + 1) * (k + 1)}\n" for j in range(3) for k in range(2))},
        ["ingest", "s.store", "in.csv", "--group", "lab", "--value", "y"],
        2,
        ["magnitude", "times 1e+320"],
    ),
    (
        "ingest: a mixed file",
        {"in.csv": CAFE.encode() + "Café9,3\n".encode("cp1252")},
        ["ingest", "s.store", "in.csv", "--group", "lab", "--value", "y"],
        2,
        ["line 14"],
    ),
    (
        "ingest: --column not in the file",
        {"in.csv": GOOD},
        ["ingest", "s.store", "in.csv", "--group", "lab", "--value", "y", "--column", "method"],
        2,
        ["no column 'method'"],
    ),
    (
        "ingest: --column the group column",
        {"in.csv": GOOD},
        ["ingest", "s.store", "in.csv", "--group", "lab", "--value", "y", "--column", "lab"],
        2,
        ["'lab' is the column of the group labels"],
    ),
]


def _materialise(folder: Path, files: dict) -> None:
    for name, content in files.items():
        path = folder / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if callable(content):
            content = content()
        if content == "fifo":
            os.mkfifo(path)
        elif isinstance(content, tuple):
            os.symlink(content[1], path)
        else:
            path.write_bytes(content.encode() if isinstance(content, str) else content)


@pytest.mark.parametrize("name,files,argv,want,needles", CASES, ids=[c[0] for c in CASES])
def test_named_case(tmp_path, monkeypatch, name, files, argv, want, needles):
    work = tmp_path / "work"
    work.mkdir()
    _materialise(work, files)
    before = _digests(work)
    monkeypatch.chdir(work)
    # small runs; the case's own options come after these, so they win
    argv = list(argv[:2]) + ([] if argv[0] == "ingest" else SMALL) + list(argv[2:])
    code, _, err, caught = run_main(*argv)
    named = argv[argv.index("--out") + 1] if "--out" in argv else None
    out = work / named if named is not None and "\x00" not in named else None
    check_outcome(code, err, caught, want, needles, out=out if out is not None and out.parent == work else None)
    after = _digests(work)
    for path, digest in before.items():  # nothing the user had was changed or removed
        assert after.get(path) == digest, path
    assert leftovers(tmp_path) == []
    if code not in (0, 3) and out is not None and out.name == "run" and not any(f.startswith("run") for f in files):
        assert not (work / "run").exists()  # a refused run leaves no folder


# ---------------------------------------------------------------------------------------------
# property tests: random damage, random option values, random --out paths


def _valid_csv() -> bytes:
    return GOOD.encode()


@HYP
@given(
    st.lists(
        st.tuples(st.integers(0, len(GOOD) - 1), st.integers(0, 255), st.sampled_from(["flip", "insert", "delete"])),
        min_size=1,
        max_size=4,
    )
)
def test_damaged_csv_fits_or_gives_one_line(tmp_path_factory, edits):
    work = tmp_path_factory.mktemp("csv")
    data = bytearray(_valid_csv())
    for pos, byte, how in edits:
        pos = min(pos, len(data) - 1)
        if how == "flip":
            data[pos] ^= byte or 1
        elif how == "insert":
            data.insert(pos, byte)
        elif len(data) > 1:
            del data[pos]
    (work / "in.csv").write_bytes(bytes(data))
    out = work / "run"
    code, _, err, caught = run_main("fit", work / "in.csv", "--group", "lab", "--value", "y", "--out", out, *TINY)
    check_outcome(code, err, caught, {0, 2, 3}, out=out)
    assert (work / "in.csv").read_bytes() == bytes(data) and leftovers(work) == []


@HYP
@given(st.lists(st.tuples(st.integers(4, 10_000), st.integers(1, 255)), min_size=1, max_size=3))
def test_damaged_parquet_fits_or_gives_one_line(tmp_path_factory, flips):
    import pyarrow as pa

    work = tmp_path_factory.mktemp("pq")
    table = pa.table({"lab": [f"G{i % 5}" for i in range(3000)], "y": [float(i % 13) for i in range(3000)]})
    data = bytearray(_parquet(table))
    for pos, mask in flips:
        data[pos % (len(data) - 8)] ^= mask
    (work / "in.parquet").write_bytes(bytes(data))
    out = work / "run"
    code, _, err, caught = run_main("fit", work / "in.parquet", "--group", "lab", "--value", "y", "--out", out, *TINY)
    check_outcome(code, err, caught, {0, 2, 3}, out=out)
    assert leftovers(work) == []


HOSTILE_TEXT = st.one_of(
    st.sampled_from(
        [
            "",
            " ",
            "-1",
            "0",
            "1e999",
            "nan",
            "inf",
            "-inf",
            "1e308",
            "1e-320",
            "2e9",
            "abc",
            "1,5",
            "\x00",
            "../..",
            "a" * 300,
            "é",
            "half-cauchy:",
            "normal:1:",
            ":",
            "gamma:1e308:1e-308",
            "1e400,1",
            "9999999999999999999999",
            "0x10",
            "1_0",
            "\n",
            "\t",
        ]
    ),
    st.text(max_size=12),
)
OPTIONS = [
    "--chains",
    "--warmup",
    "--draws",
    "--max-draws",
    "--seed",
    "--threads",
    "--tau",
    "--mu",
    "--s2",
    "--sigma2",
    "--nu",
    "--nu-grid",
    "--level",
    "--top",
    "--threshold",
    "--lower-limit",
    "--allowed-bias",
    "--compare",
    "--assigned-value",
    "--sigma-pt",
    "--keep",
    "--keep-sample",
    "--summary-bins",
    "--encoding",
    "--delimiter",
    "--thousands",
    "--within",
    "--best",
    "--summary",
]


@HYP
@given(st.lists(st.tuples(st.sampled_from(OPTIONS), HOSTILE_TEXT), min_size=1, max_size=3))
def test_hostile_option_values_fit_or_give_one_line(tmp_path_factory, options):
    work = tmp_path_factory.mktemp("opt")
    (work / "in.csv").write_text(GOOD)
    out = work / "run"
    flat = [x for pair in options for x in pair]
    # keep whatever samples small: the run-size options given here come after these defaults
    code, _, err, caught = run_main(
        "fit",
        work / "in.csv",
        "--group",
        "lab",
        "--value",
        "y",
        "--out",
        out,
        "--chains",
        "2",
        "--draws",
        "30",
        "--warmup",
        "30",
        "--max-draws",
        "60",
        "--seed",
        "1",
        "--quiet",
        *[x for x in flat],
    )
    check_outcome(code, err, caught, {0, 2, 3, 6}, out=out)
    assert leftovers(work) == [] and (work / "in.csv").read_text() == GOOD


OUT_PARTS = st.sampled_from(
    [
        ".",
        "..",
        "in.csv",
        "d",
        "d/in.csv",
        "afile",
        "run",
        "x" * 300,
        "",
        "link",
        "é",
        "a b",
        "-run",
        "--replace",
        "new",
    ]
)


@HYP
@given(st.lists(OUT_PARTS, min_size=1, max_size=3), st.booleans())
def test_no_out_path_loses_data(tmp_path_factory, monkeypatch, parts, replace):
    """Property: whatever --out names, no input, no folder of the user's and no file outside the new
    run folder is changed or removed; the outcome is a run folder or one line."""
    work = tmp_path_factory.mktemp("out")
    (work / "d").mkdir()
    (work / "in.csv").write_text(GOOD)
    (work / "d" / "in.csv").write_text(GOOD)
    (work / "afile").write_text("keep")
    (work / "mine").mkdir()
    (work / "mine" / "notes.txt").write_text("keep")
    os.symlink("mine", work / "link")
    before = _digests(work)
    monkeypatch.chdir(work)
    target = "/".join(parts)
    code, _, err, caught = run_main(
        "fit", "in.csv", "--group", "lab", "--value", "y", "--out", target, *TINY, *(["--replace"] if replace else [])
    )
    check_outcome(code, err, caught, {0, 2, 3, 6})
    after = _digests(work)
    written = Path(os.path.abspath(work / target)) if code in (0, 3) else None
    for path, digest in before.items():
        if written is not None and (work / path).resolve().is_relative_to(written):
            continue  # a run folder this very run replaced
        assert after.get(path) == digest, (target, path)
    assert leftovers(work) == []


ENCODINGS = ["utf-8", "utf-8-sig", "utf-16", "utf-32", "cp1252", "latin-1"]
LETTERS = st.sampled_from(["A", "Bé", "Çà", "Ω", "ß", "ü", "€", "東京"])


@HYP
@given(
    st.sampled_from(ENCODINGS),
    st.lists(LETTERS, min_size=3, max_size=8, unique=True),
    st.one_of(st.none(), st.integers(0, 7)),
)
def test_encodings_read_or_name_the_line(tmp_path_factory, encoding, labels, foreign):
    """Property: a table in any of these encodings is read with its labels intact (a file that is not
    UTF-8 is read as Windows-1252, which agrees with Latin-1 on every letter here); a UTF-8 table with
    one line written in Windows-1252 is refused, naming that line, when another line shows the file
    to be UTF-8."""
    import pooling

    work = tmp_path_factory.mktemp("enc")
    lines = ["lab,y"] + [f"{lab},{k}.5" for k, lab in enumerate(labels)]
    try:
        data = ("\n".join(lines) + "\n").encode(encoding)
    except UnicodeEncodeError:
        return  # not writable in that encoding
    bad_line = None
    if foreign is not None and encoding == "utf-8" and foreign < len(labels):
        k = foreign + 1
        try:
            swapped = lines[k].encode("cp1252")
        except UnicodeEncodeError:
            swapped = lines[k].encode("utf-8")
        data = b"\n".join(swapped if i == k else ln.encode("utf-8") for i, ln in enumerate(lines)) + b"\n"
        if swapped != lines[k].encode("utf-8") and any(not ln.isascii() for i, ln in enumerate(lines) if i != k):
            bad_line = k + 1
    (work / "in.csv").write_bytes(data)
    if bad_line is not None:
        code, _, err, caught = run_main(
            "fit", work / "in.csv", "--group", "lab", "--value", "y", "--out", work / "run", *TINY
        )
        check_outcome(code, err, caught, 2, [f"line {bad_line}", "UTF-8 except for this line"])
        assert not (work / "run").exists()
        return
    assert list(pooling.read_table(work / "in.csv", "lab", "y").labels) == labels


# ---------------------------------------------------------------------------------------------
# refit: options of the store's command (store damage itself: tests/test_store_*.py)


@pytest.fixture
def store(tmp_path):
    from pooling.store import jobs

    folder = tmp_path / "st"
    folder.mkdir()
    for k, day in enumerate(["2024-01-01", "2024-03-01"]):
        (folder / f"b{k}.csv").write_text(
            "lab,y\n" + "".join(f"L{j},{10 + j + 0.1 * i + k}\n" for j in range(4) for i in range(3))
        )
        jobs.ingest_file(folder / "s.store", folder / f"b{k}.csv", "lab", "y", at=day)
    return folder / "s.store"


@pytest.mark.parametrize(
    "extra,want,needles",
    [
        (["--half-life", "1e-300"], 2, ["--half-life", "underflows to zero", "oldest batch is", "1e-300 days"]),
        (["--half-life", "0"], 2, ["--half-life"]),
        (["--half-life", "nan"], 2, ["--half-life"]),
        (["--as-of", "yesterday"], 2, ["--as-of"]),
        (["--decide-at", "2"], 2, ["--decide-at"]),
        (["--summary", "on"], 2, ["--summary on"]),
        (["--out-is-store"], 2, ["is the store"]),
        (["--out-holds-store"], 2, ["holds the store"]),
    ],
    ids=[
        "half-life 1e-300",
        "half-life 0",
        "half-life nan",
        "as-of",
        "decide-at",
        "summary on",
        "out is the store",
        "out holds the store",
    ],
)
def test_refit_options(store, tmp_path, monkeypatch, extra, want, needles):
    monkeypatch.chdir(tmp_path)
    before = _digests(tmp_path)
    out = ["--out", str(tmp_path / "run")]
    if extra == ["--out-is-store"]:
        extra, out = ["--replace"], ["--out", str(store)]
    elif extra == ["--out-holds-store"]:
        extra, out = ["--replace"], ["--out", str(store.parent)]
    code, _, err, caught = run_main("refit", store, *out, *extra, *TINY)
    check_outcome(code, err, caught, want, needles)
    assert not (tmp_path / "run").exists() and leftovers(tmp_path) == []
    assert _digests(tmp_path) == before  # the store and its batches untouched


@pytest.mark.parametrize("within", ["separate", "shared"])
def test_a_half_life_that_leaves_too_little_weight_says_so(store, tmp_path, monkeypatch, within):
    """Batches 152 and 92 days old at a half-life of 5 days weigh 2^-30 and 2^-18: every group's effective n
    is far below 2, which the within-group variances need. The message names the half-life, the figures and
    a half-life that is long enough; a fifth shorter than that is refused again (the named one is rounded up
    from a bisection to 2%, so it is at most 1.13 times the shortest that fits)."""
    import re

    monkeypatch.chdir(tmp_path)
    base = ["refit", store, "--out", tmp_path / "run", "--as-of", "2024-06-01", "--within", within, *TINY]
    code, _, err, caught = run_main(*base, "--half-life", "5")
    line = check_outcome(
        code,
        err,
        caught,
        2,
        [
            "--half-life",
            "a half-life of 5 days leaves too little weight",
            "within-group variance",
            "the largest effective n is",
            "the newest batch weighs",
            f"the {within} structure needs",
        ],
    )
    assert "need at least one group" not in line and "one measurement each" not in line
    longer = float(re.search(r"about ([0-9.e+]+) days or more", line).group(1))
    code, _, err, caught = run_main(*base, "--half-life", str(longer / 1.25))
    check_outcome(code, err, caught, 2, ["leaves too little weight"])
    code, _, err, caught = run_main(*base, "--half-life", str(longer))
    check_outcome(code, err, caught, {0, 3}, out=tmp_path / "run")


def test_draws_that_are_not_finite_are_refused_and_not_recorded(store, tmp_path, monkeypatch):
    """With a gamma prior on s^2 the replication check does not apply, and weights of 2^-51 and 2^-31 leave an
    effective n near 1e-9, where the variance block overflows and every draw is NaN (seen by the sweep for
    issue 13). Such a run was written with NaN answers (exit 3) and recorded, and the next refit of the store
    failed on the recorded nulls (an internal error). Now it is refused before anything is written."""
    from pooling.store import jobs

    monkeypatch.chdir(tmp_path)
    code, _, err, caught = run_main(
        "refit",
        store,
        "--out",
        tmp_path / "run",
        "--as-of",
        "2024-06-01",
        "--half-life",
        "3",
        "--s2",
        "gamma:1:1",
        *TINY,
    )
    check_outcome(
        code,
        err,
        caught,
        2,
        ["draws of mu are not finite numbers", "effective n", "nothing was written", "--half-life"],
    )
    assert not (tmp_path / "run").exists() and leftovers(tmp_path) == []
    assert jobs.list_batches(store)[1] == []  # no run recorded


# ---------------------------------------------------------------------------------------------
# run folders: marked, replaced only when marked, leftovers of killed runs cleaned


def test_replace_swaps_in_a_new_run_and_removes_the_old_only_after(tmp_path, monkeypatch):
    from pooling import output

    (tmp_path / "in.csv").write_text(GOOD)
    out = tmp_path / "run"
    code, _, err, _ = run_main("fit", tmp_path / "in.csv", "--group", "lab", "--value", "y", "--out", out, *TINY)
    assert code in (0, 3), err
    marker = json.loads((out / ".pooling-run").read_text())
    assert marker["written_by"] == "pooling" and marker["format"] == 1 and marker["kind"] == "run"
    seen = []
    real_rmtree = shutil.rmtree

    def watch(path, *a, **k):  # when the old run is removed, the new one must be in place already
        if ".old-" in str(path):
            seen.append(json.loads((out / "summary.json").read_text())["run"]["seed"])
        return real_rmtree(path, *a, **k)

    monkeypatch.setattr(output.shutil, "rmtree", watch)
    code, _, err, _ = run_main(
        "fit",
        tmp_path / "in.csv",
        "--group",
        "lab",
        "--value",
        "y",
        "--out",
        out,
        *TINY[:-3],
        "--seed",
        "7",
        "--quiet",
        "--replace",
    )
    assert code in (0, 3), err
    assert seen == [7] and leftovers(tmp_path) == []


def _dead_leftover(parent: Path, kind: str, target: str) -> Path:
    """A hidden working folder as a run killed by SIGKILL leaves it: marked, and its lock released."""
    from pooling import output

    prefix = f".{target}.partial-" if kind == "run" else f".{target}.old-"
    info = {"kind": kind} if kind == "run" else {"kind": "aside", "target": target}
    folder, fd = output._marked_folder(parent, prefix, info)
    os.close(fd)
    return folder


def test_leftovers_of_killed_runs_are_removed_or_put_back(tmp_path):
    from pooling import output

    (tmp_path / "in.csv").write_text(GOOD)
    dead = _dead_leftover(tmp_path, "run", "a")
    (dead / "draws.nc").write_bytes(b"half")
    foreign = tmp_path / ".b.partial-abcdefgh"  # the same name shape, but not ours: no marker
    foreign.mkdir()
    # a replaced run whose successor never arrived (killed between the two renames): it is put back
    aside = _dead_leftover(tmp_path, "aside", "c")
    (aside / "run").mkdir()
    (aside / "run" / output.MARKER).write_text(json.dumps({"written_by": "pooling", "format": 1, "kind": "run"}))
    (aside / "run" / "summary.json").write_text("{}")
    code, _, err, _ = run_main(
        "fit", tmp_path / "in.csv", "--group", "lab", "--value", "y", "--out", tmp_path / "d", *TINY
    )
    assert code in (0, 3), err
    assert not dead.exists() and not aside.exists() and foreign.exists()
    assert (tmp_path / "c" / "summary.json").read_text() == "{}"


def test_a_leftover_held_by_a_live_process_is_kept(tmp_path):
    """Another process still writing (its lock held) keeps its folder; once it dies the folder goes."""
    (tmp_path / "in.csv").write_text(GOOD)
    code = textwrap.dedent(f"""
        import sys, time
        from pathlib import Path
        from pooling import output
        folder, fd = output._marked_folder(Path({str(tmp_path)!r}), ".live.partial-", {{"kind": "run"}})
        print(folder, flush=True)
        time.sleep(120)
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        live = Path(proc.stdout.readline().strip())
        assert live.exists()
        rc, _, err, _ = run_main(
            "fit", tmp_path / "in.csv", "--group", "lab", "--value", "y", "--out", tmp_path / "one", *TINY
        )
        assert rc in (0, 3), err
        assert live.exists()  # held: not touched
        proc.send_signal(signal.SIGKILL)  # the way a run dies without cleaning up
        proc.wait(timeout=30)
        rc, _, err, _ = run_main(
            "fit", tmp_path / "in.csv", "--group", "lab", "--value", "y", "--out", tmp_path / "two", *TINY
        )
        assert rc in (0, 3), err
        assert not live.exists()
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.stdout.close()


# ---------------------------------------------------------------------------------------------
# subprocesses: closed pipes and SIGTERM


def _env():
    env = dict(os.environ)
    env.pop("POOLING_DEBUG", None)
    return env


def _closed_pipe(argv, cwd):
    """Run `pooling ARGV` with stdout a pipe whose reader has already gone, as `| head` leaves it."""
    proc = subprocess.Popen(
        [sys.executable, "-m", "pooling.cli", *map(str, argv)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        cwd=cwd,
        env=_env(),
    )
    proc.stdout.close()
    _, err = proc.communicate(timeout=300)
    return proc.returncode, err.decode("utf-8", "replace")


def test_output_into_a_closed_pipe_ends_quietly_and_the_refit_is_recorded(store, tmp_path):
    from pooling.store import jobs

    (tmp_path / "in.csv").write_text(GOOD)
    rc, err = _closed_pipe(["fit", "in.csv", "--group", "lab", "--value", "y", "--out", "run", *TINY[:-1]], tmp_path)
    assert rc in (0, 3) and "Traceback" not in err and "Broken pipe" not in err and "Exception" not in err, err
    assert (tmp_path / "run" / "summary.json").exists()
    rc, err = _closed_pipe(["refit", store, "--out", "refit-run", *TINY[:-1]], tmp_path)
    assert rc in (0, 3) and "Traceback" not in err and "Broken pipe" not in err, err
    _, runs = jobs.list_batches(store)
    assert [Path(r.folder).name for r in runs] == ["refit-run"]  # recorded, though nothing could be printed
    rc, err = _closed_pipe(["batches", store], tmp_path)
    assert rc == 0 and err == "", err
    # and through a real `| head -1`, with output larger than the pipe's buffer
    pipeline = (
        f"{sys.executable} -m pooling.cli batches {store} --json | head -c 10 >/dev/null; echo ${{PIPESTATUS[0]}} >&2"
    )
    r = subprocess.run(["bash", "-c", pipeline], capture_output=True, text=True, env=_env(), timeout=120, check=False)
    assert r.stderr.strip() == "0", r.stderr


SIGTERM_SCRIPT = """
import atexit, os, signal, sys
import pooling.cli as cli
from pooling.store import jobs
when = sys.argv.pop(1)
real = jobs.record_run
def record(*a, **k):
    run = real(*a, **k)
    if when == "just-after-recording":
        os.kill(os.getpid(), signal.SIGTERM)
    return run
jobs.record_run = record
if when == "at-exit":
    real_main = cli.main
    def main(*a, **k):
        code = real_main(*a, **k)
        atexit.register(lambda: os.kill(os.getpid(), signal.SIGTERM))  # runs during the interpreter's exit
        return code
    cli.main = main
cli.run()
"""


@pytest.mark.parametrize("when", ["just-after-recording", "at-exit"])
def test_sigterm_after_the_refit_is_recorded_exits_5(store, tmp_path, when):
    from pooling.store import jobs

    proc = subprocess.run(
        [sys.executable, "-c", SIGTERM_SCRIPT, when, "refit", str(store), "--out", str(tmp_path / "run"), *TINY],
        capture_output=True,
        text=True,
        env=_env(),
        timeout=300,
        check=False,
    )
    assert proc.returncode == 5, (proc.returncode, proc.stderr)  # not -15: the signal is handled to the end
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip() and not ln.startswith("warning: diagnostics")]
    assert len(lines) == 1 and "stopped by the user" in lines[0] and "Traceback" not in proc.stderr, proc.stderr
    if when == "just-after-recording":
        assert "recorded in the store" in lines[0]
    _, runs = jobs.list_batches(store)
    assert len(runs) == 1 and (tmp_path / "run" / "summary.json").exists()


# ---------------------------------------------------------------------------------------------
# a scheduler's user with no writable home and a venv it cannot write (README, nightly recipe)


def _as_nobody(tmp_path: Path, argv: list[str], shared: str | None = None):
    """Run `pooling ARGV` as the user nobody with HOME unset, in a private mount namespace where /root is
    a fresh tmpfs holding only a bind mount of the interpreter's tree (so that nobody can run the venv
    without any change to the machine). Skips where that cannot be arranged."""
    if os.geteuid() != 0:
        pytest.skip(
            "needs root to switch to the user nobody; as another user the package folder is writable, "
            "so the case cannot arise"
        )
    for tool in ("unshare", "runuser", "mount"):
        if shutil.which(tool) is None:
            pytest.skip(f"{tool} is not installed")
    try:
        nobody = pwd.getpwnam("nobody")
    except KeyError:
        pytest.skip("no user nobody on this machine")
    home = nobody.pw_dir
    if home and os.path.isdir(home) and os.access(home, os.W_OK):
        pytest.skip(f"nobody's home '{home}' exists here")
    probe = subprocess.run(
        ["unshare", "-m", "sh", "-c", "mount --make-rprivate / && mount -t tmpfs tmpfs /mnt"],
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    if probe.returncode != 0:
        pytest.skip(f"a private mount namespace is refused here ({probe.stderr.strip()[:120]})")
    box = Path(tempfile.mkdtemp(prefix="pooling-nobody-"))
    box.chmod(0o755)
    for sub in ("tmp", "out"):
        (box / sub).mkdir()
        os.chown(box / sub, nobody.pw_uid, nobody.pw_gid)
    (box / "in.csv").write_text(GOOD)
    (box / "in.csv").chmod(0o644)
    if shared == "foreign":  # another user made the shared cache folder first
        (box / "tmp" / f"pooling-numba-cache-{nobody.pw_uid}").mkdir()
        (box / "tmp" / f"pooling-numba-cache-{nobody.pw_uid}").chmod(0o777)
    # /root is private (0700) and may hold the interpreter (pyenv) or this checkout: in this namespace
    # alone, /root becomes a fresh tmpfs that shows only those trees, bind-mounted, to everyone
    inside = sorted(
        {
            Path(p).relative_to("/root").parts[0]
            for p in (os.path.realpath(sys.base_prefix), str(ROOT))
            if p.startswith("/root/")
        }
    )
    prep = ""
    if inside:
        prep = (
            f"mkdir -p {box}/stage && mount --bind /root {box}/stage && "
            "mount -t tmpfs -o mode=755,size=1m tmpfs /root && "
        )
        prep += "".join(f"mkdir -p /root/{d} && mount --bind {box}/stage/{d} /root/{d} && " for d in inside)
    command = [
        "env",
        "-u",
        "HOME",
        "-u",
        "NUMBA_CACHE_DIR",
        "-u",
        "XDG_CACHE_HOME",
        f"TMPDIR={box}/tmp",
        sys.executable,
        "-m",
        "pooling.cli",
        *argv,
    ]
    script = f"mount --make-rprivate / && {prep}cd {box} && exec runuser -u nobody -- " + " ".join(
        shlex.quote(x) for x in command
    )
    try:
        r = subprocess.run(
            ["unshare", "-m", "sh", "-c", script], capture_output=True, text=True, timeout=300, check=False
        )
    except subprocess.TimeoutExpired:
        shutil.rmtree(box, ignore_errors=True)
        raise
    return r, box


@pytest.mark.slow
def test_a_user_with_no_home_can_fit(tmp_path):
    """The README's systemd recipe: User=pooling, no writable home, the venv owned by another user.
    numba would refuse to decorate the kernel ("no locator available"); the cache falls back to a
    private folder of the user's own under the temporary folder."""
    r, box = _as_nobody(tmp_path, ["fit", "in.csv", "--group", "lab", "--value", "y", "--out", "out/run", *TINY])
    try:
        assert r.returncode in (0, 3), r.stderr
        assert "no locator" not in r.stderr and "internal error" not in r.stderr, r.stderr
        assert (box / "out" / "run" / "summary.json").exists()
        cache = [p for p in (box / "tmp").iterdir() if p.name.startswith("pooling-numba-cache-")]
        assert len(cache) == 1 and (cache[0].stat().st_mode & 0o777) == 0o700 and any(cache[0].rglob("*.nbi"))
    finally:
        shutil.rmtree(box, ignore_errors=True)


@pytest.mark.slow
def test_a_shared_cache_folder_made_by_another_user_is_not_used(tmp_path):
    """numba loads its cache files as pickles: a cache folder someone else could write is refused, the
    kernel is compiled afresh in a private folder, and one line says so."""
    r, box = _as_nobody(
        tmp_path, ["fit", "in.csv", "--group", "lab", "--value", "y", "--out", "out/run", *TINY], shared="foreign"
    )
    try:
        assert r.returncode in (0, 3), r.stderr
        notes = [ln for ln in r.stderr.splitlines() if ln.startswith("pooling: note:")]
        assert len(notes) == 1 and "compiled afresh" in notes[0] and "NUMBA_CACHE_DIR" in notes[0], r.stderr
        shared = box / "tmp" / f"pooling-numba-cache-{pwd.getpwnam('nobody').pw_uid}"
        assert list(shared.iterdir()) == []  # nothing written into (or read from) the foreign folder
        assert [p.name for p in (box / "tmp").iterdir() if p.name.startswith("pooling-numba-")] == [shared.name]
    finally:
        shutil.rmtree(box, ignore_errors=True)


def test_cache_folder_choice_in_process(tmp_path, monkeypatch):
    """The decision itself, where numba's own places are unusable: a private per-user folder made
    with mode 0700; an existing one that is a link or writable by others is refused."""
    from pooling import _jit_cache as jc

    monkeypatch.setattr(jc, "_numba_finds_a_place", lambda: False)
    monkeypatch.setattr(jc, "choice", None)
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    monkeypatch.setattr(jc.tempfile, "tempdir", None)
    monkeypatch.delenv("NUMBA_CACHE_DIR", raising=False)
    jc.ensure()
    shared = tmp_path / f"pooling-numba-cache-{os.getuid()}"
    assert jc.choice == "shared" and jc.folder == str(shared) and (shared.stat().st_mode & 0o777) == 0o700
    assert os.environ["NUMBA_CACHE_DIR"] == str(shared)
    shutil.rmtree(shared)
    os.symlink(tmp_path, shared)  # a link planted by someone else
    monkeypatch.setattr(jc, "choice", None)
    jc.ensure()
    assert jc.choice == "private" and jc.folder != str(shared) and os.environ["NUMBA_CACHE_DIR"] == jc.folder
    shutil.rmtree(jc.folder, ignore_errors=True)


def test_the_program_exits_as_documented_when_argparse_leaves(tmp_path):
    # The program (`pooling`, cli.run, as the console script and `python -m pooling.cli` run it), not main():
    # --help exits 0 and a command line it refuses exits 2 with one line, as `pooling --help` documents; argparse
    # leaves by SystemExit, which the program's exit must carry through (it once turned every one into 1).
    (tmp_path / "in.csv").write_text(GOOD)
    fit = ["fit", "in.csv", "--group", "lab", "--value", "y", "--out", "run"]
    for argv, code in (
        (["--help"], 0),
        (["fit", "--help"], 0),
        ([], 2),
        (["nosuchcommand"], 2),
        ([*fit, "--top", "0"], 2),
        ([*fit, "--level", "1.5"], 2),
        ([*fit, "--bogus"], 2),
        (["fit", "in.csv", "--value", "y", "--out", "run"], 2),
        (["batches"], 2),
    ):
        r = subprocess.run(
            [sys.executable, "-m", "pooling.cli", *argv], cwd=tmp_path, capture_output=True, text=True, env=_env()
        )
        assert r.returncode == code, (argv, r.returncode, r.stderr)
        if code == 2:
            lines = r.stderr.strip().splitlines()
            assert len(lines) == 1 and lines[0].startswith("pooling: bad option"), (argv, r.stderr)
    assert not (tmp_path / "run").exists()
