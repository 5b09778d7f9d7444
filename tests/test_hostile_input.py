"""Hostile and odd input: any CSV or frame either fits or gives one clear line and exit code 2.

The contract is the project's own (README, "Exit codes"): no traceback, no half-written run
folder, and a file that is a valid table is read as that table whatever its dialect. The
references for "valid table" are Python's csv module, which writes the files (RFC 4180 quoting),
and numpy, which computes the expected group statistics from the very values that were written.
Property tests run on the reading layer (pooling.read_table / from_frame); a few named cases run
the whole command line with tiny chains.
"""

from __future__ import annotations

import csv
import io
import re

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import pooling
from pooling import InputError, from_frame, read_table

FAST = settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])

# Characters that real labels hold and that break naive readers: separators, quotes, newlines,
# markup and spreadsheet-formula starters, accents, CJK, an astral-plane letter.
LABEL_CHARS = st.sampled_from(list("abcXYZ019 ,;|\t\n\"'=+-@<>&/\\#.éüß東京☃") + ["\U0001d518", "\u00a0"])
LABEL = st.text(LABEL_CHARS, min_size=1, max_size=24).filter(lambda s: s.strip() != "")
TRICKY = st.sampled_from(["NA", "null", "nan", "None", "N/A", "1", "01", "1.0", "-", "=1+1", "<b>x</b>", "TRUE"])


def _expected(labels, values):
    """(labels in order of first appearance, n, mean, M2) by numpy, two-pass."""
    order = list(dict.fromkeys(labels))
    lab = np.array(labels, dtype=object)
    vals = np.asarray(values, dtype=np.float64)
    n, mean, m2 = [], [], []
    for g in order:
        x = vals[lab == g]
        n.append(len(x))
        mu = float(np.mean(x))
        mean.append(mu)
        m2.append(float(np.sum((x - mu) ** 2)))
    return tuple(order), np.array(n), np.array(mean), np.array(m2)


def _assert_stats(s, labels, values):
    want_labels, n, mean, m2 = _expected(labels, values)
    assert s.labels == want_labels
    assert s.n.tolist() == n.tolist()
    scale = max(1.0, float(np.max(np.abs(values))))
    # the reader and numpy sum in different orders: a few ulps of the largest value per group
    np.testing.assert_allclose(s.raw_mean, mean, rtol=1e-12, atol=1e-12 * scale)
    np.testing.assert_allclose(s.m2 * s.unit**2, m2, rtol=1e-9, atol=1e-9 * scale * scale)


def _one_line(exc: BaseException) -> str:
    text = str(exc)
    assert "\n" not in text and "\r" not in text, repr(text)
    assert text.startswith(("bad input", "bad option", "bad model")), text
    return text


@st.composite
def tables(draw):
    """A valid long table and a random but legal way of writing it."""
    groups = draw(st.lists(st.one_of(LABEL, TRICKY), min_size=1, max_size=6, unique_by=lambda s: s.strip()))
    rows = draw(
        st.lists(
            st.tuples(st.sampled_from(groups), st.floats(-1e6, 1e6, allow_nan=False, allow_infinity=False)),
            min_size=1,
            max_size=30,
        )
    )
    fmt = {
        "delimiter": draw(st.sampled_from([",", ";", "\t", "|"])),
        "quoting": draw(st.sampled_from([csv.QUOTE_MINIMAL, csv.QUOTE_ALL])),
        "lineterminator": draw(st.sampled_from(["\n", "\r\n"])),
        "encoding": draw(st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "cp1252"])),
        "blank_lines": draw(st.lists(st.integers(0, len(rows)), max_size=3)),
        "extra": draw(st.sampled_from([[], ["note"], ["note", "note"], ["x,y"]])),
        "value_first": draw(st.booleans()),
        "header_pad": draw(st.sampled_from(["", " "])),
        "number": draw(st.sampled_from(["repr", "17g", "spaced", "thousands"])),
    }
    return rows, fmt


def _write(path, rows, fmt):
    head = ["grp", "val"][:: -1 if fmt["value_first"] else 1]
    header = [fmt["header_pad"] + h + fmt["header_pad"] for h in head] + fmt["extra"]
    buf = io.StringIO()
    w = csv.writer(buf, delimiter=fmt["delimiter"], quoting=fmt["quoting"], lineterminator=fmt["lineterminator"])
    w.writerow(header)
    lines = [buf.getvalue()]
    for i, (g, v) in enumerate(rows):
        if fmt["number"] == "repr":
            num = repr(v)
        elif fmt["number"] == "17g":
            num = f"{v:.17g}"
        elif fmt["number"] == "spaced":
            num = f"  {v!r}"
        else:
            num = f"{v:,.17g}" if abs(v) < 1e16 else repr(v)
        cells = [g, num][:: -1 if fmt["value_first"] else 1] + [f"n{i}"] * len(fmt["extra"])
        buf = io.StringIO()
        csv.writer(
            buf, delimiter=fmt["delimiter"], quoting=fmt["quoting"], lineterminator=fmt["lineterminator"]
        ).writerow(cells)
        lines.append(buf.getvalue())
    for k in sorted(fmt["blank_lines"], reverse=True):
        lines.insert(k + 1, fmt["lineterminator"])
    text = "".join(lines)
    path.write_bytes(text.encode(fmt["encoding"]))


@FAST
@given(tables())
def test_any_valid_table_is_read_as_written(tmp_path_factory, case):
    """Property: a table written by the csv module in any legal dialect and encoding is read back
    exactly (labels up to surrounding blanks, which a CSV cannot tell from formatting)."""
    rows, fmt = case
    labels = [g for g, _ in rows]
    if fmt["encoding"] == "cp1252":
        try:
            "".join(labels).encode("cp1252")
        except UnicodeEncodeError:
            assume(False)
    path = tmp_path_factory.mktemp("t") / "table.csv"
    _write(path, rows, fmt)
    thousands = "," if fmt["number"] == "thousands" else None
    encoding = "cp1252" if fmt["encoding"] == "cp1252" else None  # a cp1252 file that is also valid UTF-8 is ambiguous
    s = read_table(path, "grp", "val", thousands=thousands, encoding=encoding)
    _assert_stats(s, [g.strip() for g in labels], [v for _, v in rows])
    assert s.file_sha256 and len(s.file_sha256) == 64


@FAST
@given(st.one_of(st.text(max_size=300), st.binary(max_size=300).map(lambda b: b.decode("latin-1"))))
def test_any_text_fits_or_gives_one_line(tmp_path_factory, text):
    """Property: whatever the file holds, the reader returns statistics or raises InputError with one line."""
    path = tmp_path_factory.mktemp("g") / "junk.csv"
    path.write_bytes(("a,b\n" + text).encode("utf-8"))
    try:
        s = read_table(path, "a", "b")
    except InputError as exc:
        _one_line(exc)
        return
    assert s.J >= 1 and np.all(np.isfinite(s.raw_mean)) and np.all(s.n >= 1)


@FAST
@given(st.binary(min_size=1, max_size=400))
def test_any_bytes_fit_or_give_one_line(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("b") / "blob.csv"
    path.write_bytes(data)
    try:
        read_table(path, "a", "b")
    except InputError as exc:
        _one_line(exc)


CELLS = st.one_of(
    st.none(),
    st.floats(),
    st.integers(-10, 10),
    st.booleans(),
    st.text(LABEL_CHARS, max_size=6),
    st.sampled_from(["", " ", "nan", "inf", "1e400", "\x00", "\ud800", "1,5"]),
)


@FAST
@given(st.lists(st.tuples(CELLS, CELLS), min_size=0, max_size=12))
def test_any_frame_fits_or_gives_one_line(rows):
    """Property: a data frame of mixed Python objects gives statistics or one clear line."""
    df = pd.DataFrame(rows, columns=["g", "y"], dtype=object) if rows else pd.DataFrame({"g": [], "y": []})
    try:
        s = from_frame(df, "g", "y")
    except InputError as exc:
        _one_line(exc)
        return
    assert np.all(np.isfinite(s.raw_mean))
    for lab in s.labels:
        assert "\x00" not in lab and lab.strip()
        lab.encode("utf-8")  # every label can be written to netCDF and JSON


# ---------------------------------------------------------------------------------------------
# named cases on the reading layer


def _write_text(tmp_path, text, name="in.csv", encoding="utf-8"):
    p = tmp_path / name
    p.write_bytes(text.encode(encoding))
    return p


def test_semicolon_file_with_decimal_commas(tmp_path):
    p = _write_text(tmp_path, "lab;y\nA;1,5\nA;2,25\nB;3,0\n")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "line 2:" in _one_line(e.value) and "'1,5'" in str(e.value) and "--decimal-comma" in str(e.value)
    s = read_table(p, "lab", "y", decimal=",")
    _assert_stats(s, ["A", "A", "B"], [1.5, 2.25, 3.0])


def test_thousands_and_decimal_comma_together(tmp_path):
    p = _write_text(tmp_path, "lab;y\nA;1.234,5\nA;2.000\nB;-12.345.678,25\n")
    s = read_table(p, "lab", "y", thousands=".", decimal=",")
    _assert_stats(s, ["A", "A", "B"], [1234.5, 2000.0, -12345678.25])


def test_quoted_thousands_in_a_comma_file(tmp_path):
    p = _write_text(tmp_path, 'lab,y\nA,"1,234.5"\nB,"2,000"\nB,17\n')
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "--thousands" in _one_line(e.value)
    _assert_stats(read_table(p, "lab", "y", thousands=","), ["A", "B", "B"], [1234.5, 2000.0, 17.0])


def test_same_thousands_and_decimal_is_refused(tmp_path):
    p = _write_text(tmp_path, "lab;y\nA;1\n")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y", thousands=",", decimal=",")
    assert "both ','" in _one_line(e.value)


@pytest.mark.parametrize("encoding", ["utf-8-sig", "utf-16", "utf-16-be", "cp1252", "latin-1"])
def test_encodings_and_byte_order_marks(tmp_path, encoding):
    text = "Prüfstelle,Wert\nMüller & Söhne,1.5\nMüller & Söhne,2.5\nÅström,3\n"
    if encoding == "utf-16-be":
        data = b"\xfe\xff" + text.encode("utf-16-be")  # big-endian with its byte-order mark
    else:
        data = text.encode(encoding)
    p = tmp_path / "enc.csv"
    p.write_bytes(data)
    s = read_table(p, "Prüfstelle", "Wert")
    _assert_stats(s, ["Müller & Söhne", "Müller & Söhne", "Åström"], [1.5, 2.5, 3.0])


def test_utf16_without_bom_is_named(tmp_path):
    p = tmp_path / "u16.csv"
    p.write_bytes("lab,y\na,1\n".encode("utf-16-le"))
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "NUL bytes" in _one_line(e.value) and "--encoding utf-16" in str(e.value)
    _assert_stats(read_table(p, "lab", "y", encoding="utf-16-le"), ["a"], [1.0])


def test_wrong_encoding_named_by_the_user(tmp_path):
    p = _write_text(tmp_path, "lab,y\nMüller,1\n", encoding="utf-8")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y", encoding="ascii")
    assert "ascii" in _one_line(e.value) and "--encoding" in str(e.value)


def test_quoted_fields_with_separators_quotes_and_newlines(tmp_path):
    p = _write_text(tmp_path, 'lab,y\n"a,b",1\n"say ""hi""",2\n"two\nlines",3\n"two\nlines",5\n')
    _assert_stats(read_table(p, "lab", "y"), ["a,b", 'say "hi"', "two\nlines", "two\nlines"], [1, 2, 3, 5])


def test_blank_lines_anywhere(tmp_path):
    p = _write_text(tmp_path, "\n\nlab,y\n\na,1\n\n\nb,2\n   \nb,4\n\n")
    _assert_stats(read_table(p, "lab", "y"), ["a", "b", "b"], [1, 2, 4])


def test_duplicated_header_names(tmp_path):
    # a duplicated name the fit does not use is harmless; a duplicated name it uses is ambiguous
    p = _write_text(tmp_path, "lab,y,note,note\na,1,x,y\nb,2,x,y\n")
    _assert_stats(read_table(p, "lab", "y"), ["a", "b"], [1, 2])
    p = _write_text(tmp_path, "lab,y, y\na,1,2\n", name="dup.csv")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "'y' appears 2 times" in _one_line(e.value)


def test_numbers_as_text(tmp_path):
    p = _write_text(tmp_path, 'lab,y\na," 1.5 "\na,"2e3"\nb,+4\nb,-.5\n')
    _assert_stats(read_table(p, "lab", "y"), ["a", "a", "b", "b"], [1.5, 2000.0, 4.0, -0.5])


def test_group_names_that_look_like_missing_values_or_numbers(tmp_path):
    p = _write_text(tmp_path, "lab,y\nNA,1\nnull,2\nnan,3\n1,4\n01,5\n1.0,6\nTRUE,7\n")
    s = read_table(p, "lab", "y")
    assert s.labels == ("NA", "null", "nan", "1", "01", "1.0", "TRUE")


@pytest.mark.parametrize(
    "text,line", [("lab,y\na,1\n,2\n", 3), ("lab,y\na,1\n   ,2\n", 3), ('lab,y\na,1\nb,2\n"",3\n', 4)]
)
def test_missing_group_values_name_the_line(tmp_path, text, line):
    p = _write_text(tmp_path, text)
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert f"line {line}:" in _one_line(e.value) and "column 'lab'" in str(e.value) and "empty" in str(e.value)


def test_blanks_around_labels_are_formatting(tmp_path):
    p = _write_text(tmp_path, 'lab,y\nA,1\nA ,2\n  A,3\n"  A  ",4\nB,5\n')
    s = read_table(p, "lab", "y")
    assert s.labels == ("A", "B") and s.n.tolist() == [4, 1]


def test_very_long_labels(tmp_path):
    # beyond the csv module's default field limit (128 KiB): pandas reads it, the checks cope
    long = "L" * 200_000 + "-end"
    p = _write_text(tmp_path, f"lab,y\n{long},1\n{long},2\nshort,3\n")
    s = read_table(p, "lab", "y")
    assert s.labels == (long, "short") and s.n.tolist() == [2, 1]
    p = _write_text(tmp_path, f"lab,y\n{long},oops\n", name="bad.csv")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "'oops'" in _one_line(e.value)
    with pytest.raises(InputError) as e:  # a long label in a message is cut, not printed whole
        pooling.from_summaries(pd.DataFrame({"g": [long], "n": [0], "m": [1.0], "s": [1.0]}), "g", "n", "m", "s")
    assert len(_one_line(e.value)) < 300


@pytest.mark.parametrize(
    "text,needle",
    [
        ("lab,y\na,1,3\nb,2,4\n", "line 2: expected 2 fields"),  # pandas would shift every column by one
        ("x,lab,y\n1,a,1,9\n2,b,2,9\n", "line 2: expected 3 fields"),
        ("lab,y\na,1\nb,2,4\n", "line 3: expected 2 fields"),  # pandas would drop the surplus
        ("lab,y\na,1,5\n", "line 2: expected 2 fields"),  # an unquoted decimal comma
        ("\nlab,y\n\na,1,3\nb,2\n", "line 4: expected 2 fields"),  # blank lines before and after the header
        ("lab,y\n,,\na,1,3\n", "line 3: expected 2 fields"),  # the first row with a cell that is not blank
        ('lab,y\na,"1\n2"\nb,2,4\n', "line 4: expected 2 fields"),  # pandas says line 3: it skips quoted breaks
    ],
)
def test_rows_longer_than_the_header_are_refused_not_shifted(tmp_path, text, needle):
    p = _write_text(tmp_path, text)
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert needle in _one_line(e.value)


def test_trailing_separators_are_tolerated(tmp_path):
    p = _write_text(tmp_path, "lab,y\na,1,\nb,2,\n")
    _assert_stats(read_table(p, "lab", "y"), ["a", "b"], [1, 2])
    p = _write_text(tmp_path, "lab,y,\na,1,\nb,2,\n", name="t2.csv")
    _assert_stats(read_table(p, "lab", "y"), ["a", "b"], [1, 2])


def test_rows_shorter_than_the_header(tmp_path):
    p = _write_text(tmp_path, "lab,y\na,1\nb\n")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "line 3:" in _one_line(e.value) and "empty cell" in str(e.value)


@pytest.mark.parametrize(
    "text,line",
    [
        ("lab,y\n\na,1\n\n\nb,oops\n", 6),  # blank lines, which the reader skips, still count in the file
        ("\n\nlab,y\na,1\nb,oops\n", 5),  # blank lines before the header
        ('lab,y\n"L\n01",1\nb,oops\n', 4),  # a line break inside a quoted label
        ('lab,y\na,1\n"b\n\nc",oops\n', 3),  # a row that spans lines is named by its first
        ("lab,y\r\ra,1\rb,oops\r", 4),  # carriage returns alone end lines too; one of them is blank
        ("lab,y\r\na,1\r\n \t \r\nb,oops\r\n", 4),  # Windows line ends and a line of blanks and a tab
        ("lab;y\n;\na;1\nb;oops\n", None),  # a line of one separator is a row (of empty cells), not a blank
    ],
)
def test_csv_rows_are_named_by_their_line_in_the_file(tmp_path, text, line):
    """Messages name a CSV row by the line a text editor shows it on (the header is line 1), whatever the reader
    skips or joins; a Parquet file or a frame by its data row (test_parquet_input_is_checked_as_it_is_read)."""
    p = tmp_path / "in.csv"
    p.write_bytes(text.encode())
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    msg = _one_line(e.value)
    if line is None:
        assert "column 'lab', line 2: expected a group label, found an empty cell" in msg, msg
        return
    assert f"column 'y', line {line}: expected a finite number, found 'oops'" in msg, msg
    # the line named is the one the row begins on, as an editor splits the file into lines
    before = text[: text.index('"b' if '"b' in text else "b,oops")]
    assert len(re.split(r"\r\n|\r|\n", before)) == line


def test_one_row_per_group_files_name_lines_too(tmp_path):
    p = tmp_path / "sums.csv"
    p.write_text("lab,n,mean,sd\na,3,1.0,0.5\n\nb,2,1.5,0.2\na,4,2.0,0.1\n")
    with pytest.raises(InputError) as e:
        pooling.from_summaries(p, "lab", "n", "mean", "sd")
    assert "column 'lab', line 5: expected one row per group, found 'a' again (first in line 2)" in _one_line(e.value)
    p.write_text("lab,est,se\n\na,1.0,0.5\nb,x,0.1\n")
    with pytest.raises(InputError) as e:
        pooling.from_estimates(p, "lab", "est", "se")
    assert "column 'est', line 4: expected a finite number, found 'x'" in _one_line(e.value)
    frame = pd.DataFrame({"lab": ["a", "b", "a"], "n": [3, 2, 4], "mean": [1.0, 1.5, 2.0], "sd": [0.5, 0.2, 0.1]})
    with pytest.raises(InputError) as e:
        pooling.from_summaries(frame, "lab", "n", "mean", "sd")
    assert "row 3: expected one row per group, found 'a' again (first in row 1)" in _one_line(e.value)


def test_separator_inside_labels_does_not_confuse_detection(tmp_path):
    # the csv module's sniffer alone picks ';' or '|' here; the header names the columns and decides
    p = _write_text(tmp_path, 'lab,y\n"a;b|c",1\n"d;e|f",2\n"g;h",3\n"i|j",4\n')
    _assert_stats(read_table(p, "lab", "y"), ["a;b|c", "d;e|f", "g;h", "i|j"], [1, 2, 3, 4])


@pytest.mark.parametrize("label,code", [("a\x00b", None), ("esc\x1b[2J", "U+001B"), ("bell\x07", "U+0007")])
def test_control_characters_in_labels_are_refused(tmp_path, label, code):
    # NUL ends a string in HDF5 (draws.nc could not be written); escape codes rewrite a terminal
    df = pd.DataFrame({"g": [label, "ok", "ok"], "y": [1.0, 2.0, 3.0]})
    with pytest.raises(InputError) as e:
        from_frame(df, "g", "y")
    assert "row 1" in _one_line(e.value) and "control character" in str(e.value)
    if code:
        assert code in str(e.value)
        p = _write_text(tmp_path, f"lab,y\nok,1\n{label},2\n")
        with pytest.raises(InputError) as e:
            read_table(p, "lab", "y")
        assert "line 3:" in _one_line(e.value) and code in str(e.value)


def test_lone_surrogate_in_a_frame_label_is_refused():
    with pytest.raises(InputError) as e:
        from_frame(pd.DataFrame({"g": ["\ud800x", "b"], "y": [1.0, 2.0]}, dtype=object), "g", "y")
    assert "U+D800" in _one_line(e.value) and "row 1" in str(e.value)


def test_tab_newline_and_cr_are_allowed_in_labels():
    s = from_frame(pd.DataFrame({"g": ["a\tb", "c\nd", "e\r\nf"], "y": [1.0, 2.0, 3.0]}), "g", "y")
    assert s.labels == ("a\tb", "c\nd", "e\r\nf")


def test_frames_with_odd_columns():
    df = pd.DataFrame({"g": pd.Categorical(["a", "b", "a"]), "y": pd.array([1, 2, 3], dtype="Int64")})
    _assert_stats(from_frame(df, "g", "y"), ["a", "b", "a"], [1, 2, 3])
    df = pd.DataFrame({"g": [1, 2, 1], "y": ["1.5", " 2 ", "3"]})
    _assert_stats(from_frame(df, "g", "y"), ["1", "2", "1"], [1.5, 2.0, 3.0])
    with pytest.raises(InputError) as e:
        from_frame(pd.DataFrame({"g": ["a", None], "y": [1.0, 2.0]}), "g", "y")
    assert "row 2" in _one_line(e.value)
    with pytest.raises(InputError) as e:
        from_frame(pd.DataFrame({"g": ["a", "b"], "y": [1.0, pd.NA]}, dtype=object), "g", "y")
    assert "row 2" in _one_line(e.value) and "empty cell" in str(e.value)
    with pytest.raises(InputError):
        from_frame(pd.DataFrame({"g": [], "y": []}), "g", "y")


def test_hand_made_statistics_are_checked_before_sampling():
    """GroupStats built in Python skip the readers' checks; build() refuses what would give nonsense."""
    from pooling.stats import GroupStats

    ok = dict(
        labels=("a", "b", "c"), n=np.array([3, 3, 3]), mean=np.array([1.0, 2.0, 3.0]), m2=np.array([1.0, 1.0, 1.0])
    )
    pooling.build(GroupStats(**ok))
    for change, needle in [
        ({"mean": np.array([1.0, np.nan, 3.0])}, "group 'b' has mean"),
        ({"n": np.array([3, 0, 3])}, "group 'b' has n = 0"),
        ({"m2": np.array([1.0, -1.0, 1.0])}, "group 'b' has m2"),
        ({"labels": ("a", "a", "c")}, "distinct strings"),
    ]:
        with pytest.raises(pooling.ModelError) as e:
            pooling.build(GroupStats(**{**ok, **change}))
        assert needle in _one_line(e.value)


# ---------------------------------------------------------------------------------------------
# the whole command line on a few of them


def _cli(run_cli, tmp_path, path, *opts):
    out = tmp_path / "run"
    code, _, err = run_cli(
        "fit", path, "--out", out, "--quiet", "--chains", "2", "--draws", "40", "--warmup", "40", "--seed", "1", *opts
    )
    return code, err, out


def _no_partial(tmp_path):
    return not [p for p in tmp_path.iterdir() if ".partial-" in p.name or ".old-" in p.name]


@pytest.mark.parametrize(
    "text,opts,needle",
    [
        ("lab,y\na,1,3\nb,2,4\nc,3,3\n", [], "expected 2 fields"),
        ("lab;y\nA;1,5\nB;2,5\nC;3,5\n", [], "--decimal-comma"),
        ('lab,y\nA,"1,234.5"\nB,2\nC,3\n', [], "--thousands"),
        ("\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", [], "not a text table"),
        ("lab,y\na,1\n", ["--thousands", ".", "--decimal-comma"], None),
    ],
)
def test_cli_bad_tables_one_line_exit_2_nothing_written(run_cli, tmp_path, text, opts, needle):
    p = tmp_path / "in.csv"
    p.write_bytes(text.encode("latin-1"))
    code, err, out = _cli(run_cli, tmp_path, p, "--group", "lab", "--value", "y", *opts)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err, err
    if needle:
        assert needle in lines[0]
    assert not out.exists() and _no_partial(tmp_path)


def test_cli_european_table_fits_with_its_options(run_cli, tmp_path):
    rows = ["Labor;Messwert"] + [
        f"L{j};{1000 + j + 0.25 * k:.2f}".replace(".", ",") for j in range(4) for k in range(3)
    ]
    p = tmp_path / "eu.csv"
    p.write_bytes(("\n".join(rows) + "\n").encode("cp1252"))
    code, err, out = _cli(run_cli, tmp_path, p, "--group", "Labor", "--value", "Messwert", "--decimal-comma")
    assert code in (0, 3), err
    import json

    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["data"]["groups"] == 4 and summary["data"]["measurements"] == 12
    post = pooling.read_table(p, "Labor", "Messwert", decimal=",")
    np.testing.assert_allclose(post.raw_mean, [1000.25 + j for j in range(4)], rtol=1e-15)


def test_cli_summaries_take_the_reading_options(run_cli, tmp_path):
    p = tmp_path / "sum.csv"
    p.write_bytes("lab;n;mittel;sd\nA;5;10,5;1,25\nB;7;11,0;0,5\nC;4;9,75;2,0\n".encode("cp1252"))
    code, err, out = _cli(
        run_cli,
        tmp_path,
        p,
        "--group",
        "lab",
        "--size",
        "n",
        "--mean",
        "mittel",
        "--sd",
        "sd",
        "--decimal-comma",
        "--within",
        "shared",
    )
    assert code in (0, 3), err
    s = pooling.from_summaries(p, "lab", "n", "mittel", "sd", decimal=",")
    np.testing.assert_allclose(s.raw_mean, [10.5, 11.0, 9.75])
    np.testing.assert_allclose(s.raw_sd, [1.25, 0.5, 2.0])


def test_parquet_odd_columns(tmp_path):
    import decimal

    import pyarrow as pa
    import pyarrow.parquet as pq

    def write(table, name):
        p = tmp_path / name
        pq.write_table(table if isinstance(table, pa.Table) else pa.Table.from_pandas(table), p)
        return p

    p = write(pd.DataFrame({"g": pd.Categorical(["a,b", "<x>", "a,b"]), "y": [1.0, 2.0, 3.0]}), "cat.parquet")
    _assert_stats(read_table(p, "g", "y"), ["a,b", "<x>", "a,b"], [1.0, 2.0, 3.0])
    p = write(
        pa.table(
            {"g": ["a", "b"], "y": pa.array([decimal.Decimal("1.50"), decimal.Decimal("2.25")], pa.decimal128(5, 2))}
        ),
        "dec.parquet",
    )
    _assert_stats(read_table(p, "g", "y"), ["a", "b"], [1.5, 2.25])
    for table, needle in [
        (pa.table({"g": ["a", "b"], "y": pa.array([1.0, None])}), "row 2"),
        (pd.DataFrame({"g": ["a", "b"], "y": pd.to_datetime(["2024-01-01", "2024-01-02"])}), "row 1"),
        (pa.table({"g": ["a"], "y": pa.array([[1.0]])}), "row 1"),
        (pd.DataFrame({"g": ["a\x00", "b"], "y": [1.0, 2.0]}), "U+0000"),
    ]:
        with pytest.raises(InputError) as e:
            read_table(write(table, "bad.parquet"), "g", "y")
        assert needle in _one_line(e.value)
    whole = (tmp_path / "cat.parquet").read_bytes()
    (tmp_path / "cut.parquet").write_bytes(whole[: len(whole) // 2])
    with pytest.raises(InputError) as e:
        read_table(tmp_path / "cut.parquet", "g", "y")
    assert "not a readable Parquet file" in _one_line(e.value)


# ---------------------------------------------------------------------------------------------
# undecodable bytes named by their line; Parquet checked against its own footer and page checksums


@pytest.mark.parametrize("encoding", ["cp1252", None])
def test_a_byte_the_encoding_does_not_define_names_its_line(tmp_path, encoding):
    # Source: Windows-1252 leaves 0x81, 0x8D, 0x8F, 0x90 and 0x9D undefined (Python's cp1252 codec table,
    # which refuses them: "character maps to <undefined>"). Without --encoding a file with no UTF-8 line is
    # read as Windows-1252 (README), so the same byte is refused there too.
    p = tmp_path / "w.csv"
    p.write_bytes(b"lab,y\r\na,1\r\nb,2\r\nL\x813,3\r\nc,4\r\n")
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y", encoding=encoding)
    line = _one_line(e.value)
    for needle in ("line 4", "the byte 0x81", "b'L\\x813,3'", "--encoding"):
        assert needle in line, (needle, line)
    assert ("read as Windows-1252" in line) == (encoding is None)


@pytest.mark.parametrize("end", ["\n", "\r\n", "\r"])
def test_a_line_from_another_encoding_is_named_as_an_editor_numbers_it(tmp_path, end):
    # a UTF-8 file with one Windows-1252 line (0xE9, é): its line whatever the line ends, a blank line counted
    p = tmp_path / "mixed.csv"
    lines = [b"lab,y", "Café,1".encode(), b"", "Zoë,2".encode(), b"Caf\xe9,3", b"b,4", b""]
    p.write_bytes(end.encode().join(lines))
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "line 5: the file is UTF-8 except for this line" in _one_line(e.value), str(e.value)


def test_a_lone_surrogate_in_utf16_names_its_line(tmp_path):
    p = tmp_path / "u16.csv"
    p.write_bytes("lab,y\na,1\nb,2\n".encode("utf-16") + b"\x00\xd8" + "x,3\nc,4\n".encode("utf-16-le"))
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y", encoding="utf-16")
    line = _one_line(e.value)
    assert "line 4" in line and "0x00 0xD8" in line and "utf-16" in line, line


def _pq_bytes(table, **kw) -> bytes:
    import pyarrow.parquet as pq

    buf = io.BytesIO()
    pq.write_table(table, buf, **kw)
    return buf.getvalue()


def _zero_counts(data: bytes, rows: int, which) -> bytes:
    """The file with the chosen footer counts equal to `rows` set to 0, as damage would leave them.

    The footer is Thrift's compact protocol: an i64 field one id after its predecessor is the byte 0x16 and
    a zigzag varint. Each count is overwritten with a varint of 0 of the same length (0x80 ... 0x00), so no
    offset moves. For 3,000 rows the counts are, in footer order: the file's rows, each column chunk's
    values, the row group's rows."""

    def varint(x):
        out = bytearray()
        while True:
            out.append((x & 0x7F) | (0x80 if x >> 7 else 0))
            x >>= 7
            if not x:
                return bytes(out)

    size = int.from_bytes(data[-8:-4], "little")
    start = len(data) - 8 - size
    code = b"\x16" + varint(2 * rows)
    hits = [start + i for i in range(size) if data[start:-8].startswith(code, i)]
    assert len(hits) == 4, hits  # file rows, two column chunks' values, row group rows
    out = bytearray(data)
    for k in which:
        at = hits[k] + 1
        out[at : at + len(code) - 1] = b"\x80" * (len(code) - 2) + b"\x00"
    return bytes(out)


@pytest.mark.parametrize(
    "which,needle",
    [
        ((0,), "its footer says 0 rows but its row groups hold 3000"),
        ((3,), "its footer says 3000 rows but its row groups hold 0"),
        ((1,), "row group 1 says 3000 rows but its column 'lab' holds 0 values"),
        ((0, 1, 2, 3), "row group 1 says 0 rows but its column 'lab' records values (from 'G0' to 'G4')"),
    ],
)
def test_a_parquet_row_count_zeroed_by_damage_is_not_an_empty_file(tmp_path, which, needle):
    import pyarrow as pa

    table = pa.table({"lab": [f"G{i % 5}" for i in range(3000)], "y": [float(i % 13) for i in range(3000)]})
    p = tmp_path / "z.parquet"
    p.write_bytes(_zero_counts(_pq_bytes(table), 3000, which))
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    line = _one_line(e.value)
    assert "a damaged Parquet file" in line and needle in line and "no rows" not in line, line
    # an empty file written as such is still called empty
    empty = tmp_path / "empty.parquet"
    empty.write_bytes(_pq_bytes(table.slice(0, 0)))
    with pytest.raises(InputError) as e:
        read_table(empty, "lab", "y")
    assert "no rows" in _one_line(e.value) and "damaged" not in str(e.value)


def test_a_parquet_type_code_changed_by_damage_is_refused(tmp_path):
    # pyarrow keeps the Arrow schema beside the Parquet one; a flipped physical type (text read as float)
    # would otherwise abort inside pyarrow (its column-chunk statistics cannot be read under the new type)
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.table({"lab": [f"G{i % 5}" for i in range(300)], "y": [float(i % 13) for i in range(300)]})
    data = _pq_bytes(table, write_page_checksum=True)
    size = int.from_bytes(data[-8:-4], "little")
    p = tmp_path / "t.parquet"
    for at in range(len(data) - 8 - size, len(data) - 8):  # every bit of the footer until one turns text to a number
        damaged = bytearray(data)
        for bit in range(8):
            damaged[at] = data[at] ^ (1 << bit)
            p.write_bytes(bytes(damaged))
            try:
                kind = pq.ParquetFile(p).schema_arrow.field("lab").type
            except Exception:  # noqa: BLE001 -- flips that break the footer outright are another test's
                continue
            if pa.types.is_floating(kind) or pa.types.is_integer(kind):
                with pytest.raises(InputError) as e:
                    read_table(p, "lab", "y")
                line = _one_line(e.value)
                assert "damaged Parquet file" in line and "column 'lab' was written as string" in line, line
                return
    pytest.fail("no single-bit flip of the footer turned the text column into numbers")


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.integers(0, 10**9))
def test_every_bit_flip_in_a_parquet_with_page_checksums_is_refused_or_harmless(tmp_path_factory, pick):
    # Page checksums (CRC-32 of each page, written with pyarrow's write_page_checksum=True) are verified on
    # reading; the footer, which no checksum covers, is checked against itself. A flip either is refused
    # with one line or leaves the statistics exactly as they were (a flip in min/max statistics, padding or
    # unused metadata). benchmarks/parquet_flips.py counts every bit of such a file.
    import pyarrow as pa

    table = pa.table(
        {"lab": [f"G{i % 5}" for i in range(3000)], "y": [float(i % 13) + 0.25 * (i % 7) for i in range(3000)]}
    )
    data = _pq_bytes(table, write_page_checksum=True)
    work = tmp_path_factory.mktemp("flip")
    (work / "ref.parquet").write_bytes(data)
    ref = read_table(work / "ref.parquet", "lab", "y")
    bit = pick % (len(data) * 8)
    damaged = bytearray(data)
    damaged[bit // 8] ^= 1 << (bit % 8)
    (work / "f.parquet").write_bytes(bytes(damaged))
    try:
        got = read_table(work / "f.parquet", "lab", "y")
    except InputError as exc:
        _one_line(exc)
        return
    assert got.labels == ref.labels and got.n.tolist() == ref.n.tolist(), bit
    assert np.array_equal(got.mean, ref.mean) and np.array_equal(got.m2, ref.m2), bit


def test_folders_of_files_skip_run_folders_and_verify_parquet_pages(tmp_path):
    # a run folder (marked .pooling-run) inside a data folder is pooling's output, never data; and the
    # folder reader (Dask) verifies page checksums as the single-file reader does
    pytest.importorskip("dask")
    import pyarrow as pa

    from pooling.dask_stats import read_table_dask

    data = tmp_path / "data"
    data.mkdir()
    (data / "a.csv").write_text("lab,y\na,1\na,2\nb,3\n")
    run = data / "run1"
    run.mkdir()
    (run / ".pooling-run").write_text('{"written_by": "pooling", "format": 1, "kind": "run"}\n')
    (run / "groups.csv").write_text("lab,y\nzz,100\n")
    s = read_table_dask(data, "lab", "y", scheduler="sync")
    assert s.labels == ("a", "b") and s.n.tolist() == [2, 1]
    (run / ".pooling-run").unlink()  # not ours: read as data, as any other folder
    assert read_table_dask(data, "lab", "y", scheduler="sync").labels == ("a", "b", "zz")

    table = pa.table(
        {"lab": [f"G{i % 5}" for i in range(3000)], "y": [float(i % 13) + 0.25 * (i % 7) for i in range(3000)]}
    )
    good = _pq_bytes(table, write_page_checksum=True)
    pq_dir = tmp_path / "pq"
    pq_dir.mkdir()
    p = pq_dir / "part.parquet"
    ref = None
    for at in range(200, len(good) - 200):  # a flip inside a data page that changes the values read unchecked
        damaged = bytearray(good)
        damaged[at] ^= 0x10
        p.write_bytes(bytes(damaged))
        import pyarrow.parquet as pq

        try:
            unchecked = pq.ParquetFile(p).read().column("y").to_pylist()
        except Exception:  # noqa: BLE001
            continue
        ref = ref or table.column("y").to_pylist()
        if unchecked != ref:
            break
    else:
        pytest.fail("no flip changed the values")
    with pytest.raises(InputError) as e:
        read_table_dask(pq_dir, "lab", "y", scheduler="sync")
    assert "damaged Parquet file" in _one_line(e.value) and "does not match the checksum written with it" in str(
        e.value
    )
    with pytest.raises(InputError) as e:
        read_table(p, "lab", "y")
    assert "damaged Parquet file" in _one_line(e.value) and "does not match the checksum written with it" in str(
        e.value
    )


def test_folders_of_files_name_the_file_and_line_of_undecodable_bytes(tmp_path):
    # the folder reader detects the encoding in its first file; a later file in another encoding was an
    # internal error (a UnicodeDecodeError from Dask's reader), now one line naming the file and line
    pytest.importorskip("dask")
    from pooling.dask_stats import read_table_dask

    data = tmp_path / "data"
    data.mkdir()
    (data / "a.csv").write_bytes(b"lab,y\na,1\nb,2\n")
    (data / "b.csv").write_bytes(b"lab,y\na,1\nL\x813,3\nc,4\n")
    for encoding, needles in (
        (None, ["b.csv', line 3", "0x81", "UTF-8", "detected in the first"]),
        ("cp1252", ["b.csv', line 3", "the byte 0x81", "cp1252", "b'L\\x813,3'"]),
    ):
        with pytest.raises(InputError) as e:
            read_table_dask(data, "lab", "y", scheduler="sync", encoding=encoding)
        line = _one_line(e.value)
        assert all(n in line for n in needles), (needles, line)
