"""Group statistics: the only thing about the data that reaches the sampler.

For raw measurements a group is summarised by n_j, its mean ybar_j and M2_j = sum_i (y_ij - ybar_j)^2.
Batches (file chunks, nightly deliveries, dask partitions) are merged exactly and stably with the
pairwise update of Chan, Golub and LeVeque (1979):

    n = na + nb;  d = mean_b - mean_a;  mean = mean_a + d*nb/n;  M2 = M2a + M2b + d^2*na*nb/n

A variance is never formed as E[y^2] - E[y]^2, which loses every digit on data near 1e9.

For the `known` structure a group is one estimate with its standard error; n is kept only for
display (it may be unknown, stored as 0).

Data of extreme magnitude (1e-300 or 1e300) are held in a unit: a power of two, so that
mean * unit, m2 * unit^2 and se * unit are the user's values exactly while the stored numbers stay
of order one (a spread of 1e-301 would otherwise square to zero). Nearly all data have unit 1.
"""

from __future__ import annotations

import codecs
import contextlib
import csv
import errno
import hashlib
import math
import os
import re
import stat
import threading
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal

import numpy as np
import pandas as pd

from .errors import InputError

# Only an empty cell counts as missing: a cell reading "n/a" or "NA" is reported as found, and a
# group called "NA" or "null" keeps its name.
_MISSING = [""]
_CHUNK_ROWS = 1_000_000
MAX_COUNT = float(2**53)  # group sizes above this are not whole numbers in float64 arithmetic


@dataclass(frozen=True, eq=False)
class GroupStats:
    """Per-group statistics, aligned with `labels` (unique strings, in order of first appearance).

    kind is "raw" (n, mean, m2 from measurements or from n/mean/sd summaries) or "known"
    (mean holds each group's estimate and se its standard error).

    columns: group-level columns (the predictors of a model that explains why groups differ), name -> one
    text value per group (an object array aligned with labels); numbers are kept as their text and read as
    numbers where a model asks for a numeric predictor (model.build).
    """

    labels: tuple[str, ...]
    n: np.ndarray  # group sizes; fractional only when older batches are down-weighted
    mean: np.ndarray
    m2: np.ndarray
    se: np.ndarray | None = None
    mean_lo: np.ndarray = None  # type: ignore[assignment]  # None means zeros, filled in by __post_init__
    kind: str = "raw"
    unit: float = 1.0
    source: str = "<frame>"
    file_sha256: str | None = None
    meta: dict = field(default_factory=dict)
    columns: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.mean_lo is None:
            object.__setattr__(self, "mean_lo", np.zeros(len(self.labels)))
        for name in ("n", "mean", "mean_lo", "m2") + (("se",) if self.se is not None else ()):
            arr = getattr(self, name)
            if arr.shape != (len(self.labels),):
                raise ValueError(f"GroupStats.{name} has shape {arr.shape}, expected ({len(self.labels)},)")
            arr.setflags(write=False)
        cols = {}
        for name, values in dict(self.columns).items():
            arr = np.asarray(values, dtype=object)
            if arr.shape != (len(self.labels),):
                raise ValueError(f"GroupStats.columns['{name}'] has shape {arr.shape}, expected ({len(self.labels)},)")
            arr.setflags(write=False)
            cols[str(name)] = arr
        object.__setattr__(self, "columns", cols)

    @property
    def J(self) -> int:
        return len(self.labels)

    @property
    def N(self) -> float:
        """Measurements in all; fractional when older batches are down-weighted (store half-life)."""
        total = float(self.n.sum())
        return int(total) if total == int(total) else total

    @property
    def sd(self) -> np.ndarray:
        """Sample standard deviation per group (ddof=1) in stored units; NaN where n < 2."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.n >= 2, np.sqrt(self.m2 / np.maximum(self.n - 1, 1)), np.nan)

    @property
    def raw_mean(self) -> np.ndarray:
        """Each group's mean (the estimate, for `known`) in the user's units."""
        return (self.mean + self.mean_lo) * self.unit

    @property
    def raw_sd(self) -> np.ndarray:
        """Each group's sample standard deviation (ddof=1) in the user's units; NaN where n < 2."""
        return self.sd * self.unit

    @property
    def raw_se(self) -> np.ndarray | None:
        """Each group's standard error (`known`) in the user's units."""
        return None if self.se is None else self.se * self.unit

    def fingerprint(self) -> str:
        """SHA-256 of the statistics themselves: equal for equal data whatever the input form."""
        h = hashlib.sha256()
        h.update(self.kind.encode())
        h.update(repr(float(self.unit)).encode())
        h.update("\x1f".join(self.labels).encode("utf-8", "surrogatepass"))
        for arr in (self.n, self.mean, self.mean_lo, self.m2) + ((self.se,) if self.se is not None else ()):
            h.update(np.ascontiguousarray(arr, dtype=np.float64).tobytes())
        for name in sorted(self.columns):  # group-level columns, when there are any
            h.update(("\x1e" + name + "\x1d" + "\x1f".join(self.columns[name])).encode("utf-8", "surrogatepass"))
        return h.hexdigest()

    def to_frame(self) -> pd.DataFrame:
        """One row per group in the user's units."""
        df = pd.DataFrame({"group": list(self.labels), "n": self.n, "mean": self.raw_mean})
        if self.kind == "known":
            df["std_error"] = self.raw_se
        else:
            df["sd"] = self.raw_sd
        return df

    def subset(self, keep: np.ndarray) -> GroupStats:
        keep = np.asarray(keep)
        return GroupStats(
            tuple(np.asarray(self.labels, dtype=object)[keep]),
            self.n[keep].copy(),
            self.mean[keep].copy(),
            self.m2[keep].copy(),
            None if self.se is None else self.se[keep].copy(),
            self.mean_lo[keep].copy(),
            self.kind,
            self.unit,
            self.source,
            self.file_sha256,
            dict(self.meta),
            {name: v[keep] for name, v in self.columns.items()},
        )

    def with_columns(self, values: dict) -> GroupStats:
        """The same statistics with group-level columns added (or replaced): values maps a column name to a
        mapping label -> value (every group must have one) or to a sequence aligned with the labels. Values
        are kept as text (numbers as their shortest text); an empty value is refused, naming the group.

        >>> s = GroupStats(("a", "b"), np.array([2, 2]), np.array([1.0, 2.0]), np.array([0.5, 0.5]))
        >>> s.with_columns({"method": {"a": "X", "b": "Y"}}).columns["method"].tolist()
        ['X', 'Y']
        """
        cols = dict(self.columns)
        for name, given in values.items():
            if isinstance(given, dict):
                missing = [lab for lab in self.labels if lab not in given]
                if missing:
                    raise InputError(
                        f"bad input in {_where(self.source)}: the group-level column '{name}' has no "
                        f"value for group {_show(missing[0])}"
                    )
                seq = [given[lab] for lab in self.labels]
            else:
                seq = list(given)
                if len(seq) != self.J:
                    raise InputError(
                        f"bad input in {_where(self.source)}: the group-level column '{name}' has "
                        f"{len(seq)} values for {self.J} groups"
                    )
            out = np.empty(self.J, dtype=object)
            for j, (lab, x) in enumerate(zip(self.labels, seq)):
                text = cell_text(x)
                if text is None:
                    raise InputError(
                        f"bad input in {_where(self.source)}, column '{name}', group {_show(lab)}: "
                        "expected a value for the group-level column, found an empty cell"
                    )
                out[j] = text
            cols[str(name)] = out
        return GroupStats(
            self.labels,
            self.n,
            self.mean,
            self.m2,
            self.se,
            self.mean_lo,
            self.kind,
            self.unit,
            self.source,
            self.file_sha256,
            dict(self.meta),
            cols,
        )


def _two_sum(a, b):
    """Knuth's error-free sum: a + b == s + e exactly."""
    s = a + b
    bb = s - a
    return s, (a - (s - bb)) + (b - bb)


def merge_moments(na, ha, la, m2a, nb, hb, lb, m2b):
    """Chan-Golub-LeVeque pairwise merge of (n, mean, M2), elementwise.

    Means are carried as unevaluated sums hi + lo (double-double): a mean near 1e9 stored in one
    float64 is off by up to 6e-8, and that error would enter d^2*na*nb/n and cost M2 about seven
    digits on data with a spread of 0.1. With the low part the merge matches a two-pass computation
    on the concatenated data to about 1e-13 relative. An empty side (n = 0) is returned exactly.
    """
    na = np.asarray(na, dtype=np.float64)
    nb = np.asarray(nb, dtype=np.float64)
    ha, la, m2a = (np.asarray(x, dtype=np.float64) for x in (ha, la, m2a))
    hb, lb, m2b = (np.asarray(x, dtype=np.float64) for x in (hb, lb, m2b))
    n = na + nb
    with np.errstate(invalid="ignore", divide="ignore"):
        d = (hb - ha) + (lb - la)
        frac_b = np.where(n > 0, nb / n, 0.0)
        t = d * frac_b
        s, e = _two_sum(ha, t)
        hi, lo = _two_sum(s, la + e)
        m2 = m2a + m2b + d * d * na * frac_b
    a_empty, b_empty = na == 0, nb == 0
    hi = np.where(a_empty, hb, np.where(b_empty, ha, hi))
    lo = np.where(a_empty, lb, np.where(b_empty, la, lo))
    m2 = np.where(a_empty, m2b, np.where(b_empty, m2a, m2))
    return n, hi, lo, m2


def merge(a: GroupStats, b: GroupStats, source: str | None = None) -> GroupStats:
    """Merge two sets of raw-measurement statistics group by group (labels matched by name)."""
    if a.kind != "raw" or b.kind != "raw":
        raise InputError("only raw-measurement statistics can be merged; estimates with standard errors cannot")
    if a.unit != b.unit:
        a, b = to_unit(a, max(a.unit, b.unit)), to_unit(b, max(a.unit, b.unit))
    running = _Running()
    running.add(a.labels, a.n, a.mean, a.mean_lo, a.m2)
    running.add(b.labels, b.n, b.mean, b.mean_lo, b.m2)
    whole = a.n.dtype.kind in "iu" and b.n.dtype.kind in "iu"
    out = running.stats(a.unit, source or f"{a.source} + {b.source}", None, whole=whole)
    if a.columns or b.columns:
        out = out.with_columns(merge_columns(a, b, out.labels))
    return out


def merge_columns(a: GroupStats, b: GroupStats, labels) -> dict:
    """Group-level columns of two sets of statistics, group by group: a group in both must have the same value in
    each column (refused otherwise, naming the group and both values), and every group needs a value."""
    out = {}
    for name in sorted(set(a.columns) | set(b.columns)):
        got: dict[str, str] = {}
        for s in (a, b):
            if name not in s.columns:
                continue
            for lab, x in zip(s.labels, s.columns[name]):
                prev = got.setdefault(lab, x)
                if prev != x and not _same_number(prev, x):
                    raise InputError(
                        f"bad input in {_where(b.source)}, column '{name}', group {_show(lab)}: a "
                        f"group-level column holds one value per group; found {_show(prev)} in "
                        f"{_where(a.source)} and {_show(x)} here"
                    )
        missing = [lab for lab in labels if lab not in got]
        if missing:
            side = a if name not in b.columns else b
            raise InputError(
                f"bad input in {_where(side.source)}: the group-level column '{name}' has no value for "
                f"group {_show(missing[0])}"
            )
        out[name] = got
    return out


def to_unit(s: GroupStats, unit: float) -> GroupStats:
    """The same statistics held in another unit (a power of two, so the change is exact unless it underflows)."""
    if unit == s.unit:
        return s
    f = s.unit / unit
    return GroupStats(
        s.labels,
        s.n.copy(),
        s.mean * f,
        s.m2 * f * f,
        se=None if s.se is None else s.se * f,
        mean_lo=s.mean_lo * f,
        kind=s.kind,
        unit=unit,
        source=s.source,
        file_sha256=s.file_sha256,
        meta=dict(s.meta),
        columns=dict(s.columns),
    )


def choose_unit(*arrays) -> float:
    """1 for ordinary data; for magnitudes beyond 1e+-100, the power of two nearest the largest |value|."""
    top = 0.0
    for a in arrays:
        a = np.abs(np.asarray(a, dtype=np.float64))
        a = a[np.isfinite(a)]
        if a.size:
            top = max(top, float(a.max()))
    if top == 0.0 or 1e-100 < top < 1e100:
        return 1.0
    # 2^floor(log2(top)) from the binary exponent itself: log2 rounds up to 1024 at the largest double
    return math.ldexp(1.0, math.frexp(top)[1] - 1)


def _reduce_chunk(groups: pd.Series, values: np.ndarray):
    """Per-group (labels, n, mean, M2) of one chunk by two passes: mean first, then squared deviations."""
    codes, uniques = pd.factorize(groups, sort=False)
    J = len(uniques)
    n = np.bincount(codes, minlength=J).astype(np.float64)
    mean = np.bincount(codes, weights=values, minlength=J) / n
    # a second pass corrects the rounding of the first mean (Chan, Golub and LeVeque's "corrected
    # two-pass" form), so that data near 1e9 keep their digits
    dev = values - mean[codes]
    corr = np.bincount(codes, weights=dev, minlength=J) / n
    hi, lo = _two_sum(mean, corr)
    dev = (values - hi[codes]) - lo[codes]
    m2 = np.bincount(codes, weights=dev * dev, minlength=J)
    labels = uniques.tolist()  # a list at C speed; the labels are text already, as _check_groups left them
    if not all(type(u) is str for u in labels):
        labels = [str(u) for u in labels]
    return tuple(labels), n, hi, lo, m2


class _Running:
    """Per-group (n, mean hi, mean lo, M2) merged part by part (chunks of a file, or two GroupStats),
    with one label index kept across parts: each part costs O(its groups), not O(all groups so far)
    (with 100,000 groups and chunks of 1e5 rows a rebuild per chunk was half of the reading time).
    Groups that a part lacks are left as they are, which is what merge_moments does with an empty
    side; groups are kept in order of first appearance."""

    def __init__(self):
        self.index: dict[str, int] = {}
        self.labels: list[str] = []
        self.acc = np.zeros((4, 0))

    def add(self, labels, n, hi, lo, m2) -> None:
        idx = self.index
        before = len(idx)
        pos = np.fromiter((idx.setdefault(lab, len(idx)) for lab in labels), dtype=np.int64, count=len(labels))
        if len(idx) > before:
            self.labels.extend(lab for lab, j in zip(labels, pos) if j >= before)
            if len(idx) > self.acc.shape[1]:
                grown = np.zeros((4, max(len(idx), 2 * self.acc.shape[1])))
                grown[:, : self.acc.shape[1]] = self.acc
                self.acc = grown
        a = self.acc[:, pos]
        self.acc[0, pos], self.acc[1, pos], self.acc[2, pos], self.acc[3, pos] = merge_moments(
            a[0], a[1], a[2], a[3], n, hi, lo, m2
        )

    def stats(self, unit: float, source: str, sha: str | None, whole: bool = True) -> GroupStats:
        """whole: the sizes are counts (int64); False keeps them as they are (down-weighted sizes)."""
        J = len(self.labels)
        n, hi, lo, m2 = (self.acc[k, :J].copy() for k in range(4))
        return GroupStats(
            tuple(self.labels),
            n.astype(np.int64) if whole else n,
            hi,
            m2,
            mean_lo=lo,
            unit=unit,
            source=source,
            file_sha256=sha,
        )


def unit_hint(unit: float) -> str:
    """The power of ten that brings values of magnitude `unit` near 1, as text ("1e-300", "1e+320"):
    written from the exponent, since 1/unit itself can overflow."""
    return f"1e{-int(math.floor(math.log10(unit))):+d}"


def _where(source: str) -> str:
    return f"'{source}'" if source != "<frame>" else "the data frame"


@dataclass(frozen=True)
class Rows:
    """How a message names data row r of what was read (r from 1: the first row under the header, or of a frame).

    A CSV file's row is named by its line as a text editor numbers it, 'line N' (the header is line 1; blank
    lines, which the reader skips, and line breaks inside quoted cells are counted, so the number is where the
    row stands in the file); a Parquet file's or a data frame's by the data row, 'row N'. `csv`: the file's
    (path, encoding, separator), or None. The lines are found on the error path only, by reading the file again.
    """

    csv: tuple[str, str, str] | None = None

    def __call__(self, row: int) -> str:
        return self.many([row])[0]

    def many(self, rows) -> list[str]:
        if self.csv is None:
            return [f"row {r}" for r in rows]
        lines = csv_lines(*self.csv, rows)
        # a file the csv module cannot read as pandas did (a cell beyond its size limit): the data row, said so
        return [f"line {lines[r]}" if r in lines else f"data row {r}" for r in rows]


FRAME_ROWS = Rows()


def csv_records(path, enc: str, sep: str):
    """(data row, first line, fields, pandas' line) of each record of a CSV file as the table reader takes them:
    blank lines skipped (pandas' skip_blank_lines: nothing but blanks and tabs, other than the separator, on the
    line), the header the first record left, data row 1 the one after it. Lines count from 1 as a text editor
    counts them (\n, \r\n or \r alone end a line; a quoted cell's line breaks count); pandas' own line numbers
    (in its parser's errors) leave out the line breaks inside quoted cells. For messages, on the error path."""
    # pandas reads cells of any length; the csv module stops at 128 KiB unless told otherwise (raising the
    # limit for a while can only let another reader take a longer cell, and _first_rows copes with either)
    limit = csv.field_size_limit()
    csv.field_size_limit(max(limit, 2**31 - 1))
    try:
        yield from _records(path, enc, sep)
    finally:
        csv.field_size_limit(limit)


def _records(path, enc: str, sep: str):
    took: list[str] = []  # the lines of the record being read
    blanks = " \t".replace(sep, "")
    with open(path, encoding=enc, newline="") as fh:

        def lines():
            for text in fh:
                took.append(text)
                yield text

        reader = csv.reader(lines(), delimiter=sep, skipinitialspace=True)
        start, row, header, inner = 1, 0, False, 0
        for fields in reader:
            first, start, before = start, reader.line_num + 1, inner
            blank = len(took) == 1 and not took[0].rstrip("\r\n").strip(blanks)
            inner += max(0, len(took) - 1)
            took.clear()
            if blank:
                continue
            if not header:
                header = True
                continue
            row += 1
            yield row, first, fields, first - before


def first_record(path, enc: str, sep: str, stop):
    """The first record (data row, first line, fields, pandas' line) of a CSV file, as csv_records reads them, for
    which stop(record) is true; None when there is none or the csv module cannot read the file (a message helper,
    on the error path: the caller then names the row its own way)."""
    try:
        with contextlib.closing(csv_records(path, enc, sep)) as records:
            for record in records:
                if stop(record):
                    return record
    except (csv.Error, OSError, UnicodeError, LookupError, ValueError):
        pass
    return None


def csv_lines(path, enc: str, sep: str, rows) -> dict[int, int]:
    """The line (as a text editor numbers it) on which each of the data rows `rows` (from 1) of a CSV file begins;
    rows it cannot place (the file unreadable by the csv module, or shorter) are left out."""
    want = {int(r) for r in rows}
    out: dict[int, int] = {}
    if not want:
        return out
    last = max(want)

    def seen(record) -> bool:
        row, line = record[0], record[1]
        if row in want:
            out[row] = line
        return row >= last

    first_record(path, enc, sep, seen)
    return out


def _as_text(raw: pd.Series, source: str, column: str, row_offset: int, rows: Rows = FRAME_ROWS) -> pd.Series:
    """The column as pandas strings; a frame cell holding a lone surrogate (not encodable as UTF-8,
    so not storable in netCDF or JSON) is reported instead of crashing the conversion."""
    try:
        return raw.astype("string")
    except UnicodeDecodeError:  # bytes cells (a Parquet binary column) that are not UTF-8
        for i, cell in enumerate(raw.astype(object)):
            if isinstance(cell, (bytes, bytearray)):
                try:
                    bytes(cell).decode("utf-8")
                except UnicodeDecodeError:
                    raise InputError(
                        f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: "
                        f"expected text in UTF-8, found the bytes {_show_bytes(bytes(cell))}"
                    ) from None
        raise
    except UnicodeEncodeError:
        for i, cell in enumerate(raw.astype(object)):
            if isinstance(cell, str) and re.search("[\ud800-\udfff]", cell):
                ch = re.search("[\ud800-\udfff]", cell).group()  # type: ignore[union-attr]  # found just above
                raise InputError(
                    f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: "
                    f"expected text, found the unpaired surrogate U+{ord(ch):04X}"
                ) from None
        raise


def _number_hint(cell) -> str:
    """A hint for numbers written with a comma, which plain parsing refuses."""
    text = str(cell).strip()
    if re.fullmatch(r"[+-]?\d{1,3}(,\d{3})+(\.\d*)?", text):
        return " (a thousands separator? name it with --thousands ,)"
    if re.fullmatch(r"[+-]?\d*,\d+", text):
        return " (a decimal comma? name it with --decimal-comma)"
    return ""


def _check_values(
    raw: pd.Series, source: str, column: str, row_offset: int, written=None, rows: Rows = FRAME_ROWS
) -> np.ndarray:
    """Return the column as finite float64, or raise naming the first bad row (`rows`: a CSV's line, else the row).

    written(row): the cell's text as it stands in the file (the CSV reader turned '1e999' into inf)."""
    if raw.dtype.kind in "fiu":
        vals = raw.to_numpy(dtype=np.float64)
        bad = ~np.isfinite(vals)
        if bad.any():
            i = int(np.argmax(bad))
            text = written(row_offset + i + 1) if written is not None else None
            if text is not None and text.strip():
                text = text.strip()
                huge = np.isinf(vals[i]) and re.search("[0-9]", text)  # '1e999', not a written 'inf'
                found = _show(text) + (" (beyond the largest double, about 1.8e308)" if huge else "")
            else:
                found = "an empty cell" if np.isnan(vals[i]) else _show(raw.iloc[i])
            raise InputError(
                f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: "
                f"expected a finite number, found {found}"
            )
        return vals
    if raw.dtype.kind == "b":
        raise InputError(f"bad input in {_where(source)}, column '{column}': expected numbers, found true/false values")
    as_text = _as_text(raw, source, column, row_offset, rows)
    vals = pd.to_numeric(as_text.str.strip(), errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    bad = ~np.isfinite(vals)
    if bad.any():
        i = int(np.argmax(bad))
        cell = raw.iloc[i]
        found = (
            "an empty cell"
            if cell is None or (isinstance(cell, float) and np.isnan(cell)) or pd.isna(cell)
            else _show(cell)
        )
        found += _number_hint(cell)
        raise InputError(
            f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: "
            f"expected a finite number, found {found}"
        )
    return vals


def _escape(ch: str) -> str:
    if ch == "\\":
        return "\\\\"
    if ch.isprintable() or ch == " ":
        return ch
    return {"\n": "\\n", "\r": "\\r", "\t": "\\t"}.get(ch) or repr(ch)[1:-1]


def _show(text, limit: int = 60) -> str:
    """A label or cell for a one-line message: quoted, long text cut, and every character that is not
    printable escaped as Python writes it (newlines, and the vertical tab, U+2028 and others that
    end a line too)."""
    text = str(text)
    cut = text if len(text) <= limit else text[: limit - 1] + "…"
    return "'" + "".join(_escape(ch) for ch in cut) + "'"


def _show_bytes(data: bytes, limit: int = 60) -> str:
    """Bytes for a one-line message, escaped as Python writes them, cut around the first byte that is
    not UTF-8."""
    data = data.rstrip(b"\r\n")
    try:
        data.decode("utf-8")
        start = 0
    except UnicodeDecodeError as exc:
        start = exc.start
    lo = max(0, start - limit // 2)
    cut = data[lo : lo + limit]
    return ("…" if lo else "") + repr(cut) + ("…" if lo + limit < len(data) else "")


def unicode_twins(labels) -> tuple[str, str] | None:
    """The first two labels that differ only in their Unicode form (a composed "é" against "e" plus a
    combining accent, a Kelvin sign against "K"): equal after NFC normalisation, different as text.
    Labels are kept exactly as they come, so such a pair would silently be two groups. None if none."""
    import unicodedata

    present = set(labels)
    first: dict[str, str] = {}
    for lab in labels:
        if lab.isascii():  # ASCII text is its own normal form
            continue
        key = unicodedata.normalize("NFC", lab)
        if key != lab and key in present:
            return key, lab
        other = first.setdefault(key, lab)
        if other != lab:
            return other, lab
    return None


def _code_points(text: str) -> str:
    return " ".join(f"U+{ord(ch):04X}" for ch in text[:12]) + (" …" if len(text) > 12 else "")


def check_unicode_twins(labels, source: str, what: str = "the group labels") -> None:
    """Refuse labels that unicode_twins finds, with one line naming both and their code points."""
    pair = unicode_twins(labels)
    if pair is not None:
        a, b = pair
        raise InputError(
            f"bad input in {_where(source)}: {what} {_show(a)} ({_code_points(a)}) and {_show(b)} "
            f"({_code_points(b)}) look the same but differ in their Unicode form, so they would be two "
            "groups; write every label one way (for example NFC, composed accents) and try again"
        )


# Control characters break the run folder (HDF5 strings end at NUL) or the terminal (escape codes);
# tab, newline and carriage return are ordinary text in a label. Lone surrogates cannot be UTF-8.
_BAD_LABEL_CHARS = "[\x00-\x08\x0b\x0c\x0e-\x1f\x7f\ud800-\udfff]"


def _check_groups(
    raw: pd.Series, source: str, column: str, row_offset: int, strip: bool = False, rows: Rows = FRAME_ROWS
) -> pd.Series:
    missing = raw.isna().to_numpy().copy()
    if raw.dtype.kind not in "fiub":
        text = _as_text(raw, source, column, row_offset, rows)
        missing |= (text.str.strip() == "").fillna(True).to_numpy(dtype=bool)
    if missing.any():
        i = int(np.argmax(missing))
        raise InputError(
            f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: "
            "expected a group label, found an empty cell"
        )
    labels = raw.astype(str)
    if strip:  # blanks around a label in a CSV are formatting: "A " and "A" are one group
        labels = labels.str.strip()
    # Arrow-backed strings are valid UTF-8 already (no surrogates), and its regex scan is fast
    arrow = getattr(labels.dtype, "storage", None) == "pyarrow"
    pattern = _BAD_LABEL_CHARS.replace("\ud800-\udfff", "") if arrow else _BAD_LABEL_CHARS
    # labels repeat: scan each distinct one once, then find the first row that carries a bad one
    distinct = pd.Series(labels.unique(), dtype=labels.dtype)
    bad_distinct = distinct[distinct.str.contains(pattern, regex=True).to_numpy(dtype=bool, na_value=False)]
    if len(bad_distinct):
        bad = labels.isin(bad_distinct).to_numpy(dtype=bool)
        i = int(np.argmax(bad))
        ch = re.search(_BAD_LABEL_CHARS, labels.iloc[i]).group()  # type: ignore[union-attr]  # a bad label
        raise InputError(
            f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: expected a group label "
            f"of text, found the control character U+{ord(ch):04X} in it (tab and newline are allowed)"
        )
    return labels


# ---------------------------------------------------------------------------------------------
# group-level columns (predictors): one value per group


def cell_text(x) -> str | None:
    """A group-level cell as text: text as it is (blanks around it dropped), a whole number as digits ('2', also for
    2.0), another number by its shortest repr; None for an empty or missing cell."""
    if x is None:
        return None
    if isinstance(x, (bool, np.bool_)):
        return str(bool(x)).lower()
    if isinstance(x, (int, np.integer)):
        return str(int(x))
    if isinstance(x, (float, np.floating)):
        x = float(x)
        if not np.isfinite(x):
            return None
        return str(int(x)) if x.is_integer() and abs(x) < 2**53 else repr(x)
    try:
        if pd.isna(x):
            return None
    except (TypeError, ValueError):
        pass
    text = str(x).strip()
    return text or None


def _same_number(a: str, b: str) -> bool:
    """'5' and '5.0' (or '1e1' and '10'): different text, the same number."""
    try:
        return float(a) == float(b)
    except ValueError:
        return False


def _column_text(raw: pd.Series, source: str, column: str, row_offset: int, rows: Rows = FRAME_ROWS) -> np.ndarray:
    """A group-level column of a chunk as text per row (cell_text); an empty cell or a control character is
    refused, naming the row."""
    if raw.dtype.kind in "fiub":
        values = [cell_text(x) for x in raw.to_numpy()]
    else:
        text = _as_text(raw, source, column, row_offset, rows)
        values = [None if x is pd.NA or x is None else (x.strip() or None) for x in text.to_numpy(dtype=object)]
    out = np.empty(len(values), dtype=object)
    for i, x in enumerate(values):
        if x is None:
            raise InputError(
                f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: expected a "
                "value of the group-level column, found an empty cell"
            )
        out[i] = x
    distinct = pd.unique(out)
    bad = [x for x in distinct if re.search(_BAD_LABEL_CHARS, x)]
    if bad:
        i = int(np.flatnonzero(out == bad[0])[0])
        ch = re.search(_BAD_LABEL_CHARS, bad[0]).group()  # type: ignore[union-attr]  # a bad label
        raise InputError(
            f"bad input in {_where(source)}, column '{column}', {rows(row_offset + i + 1)}: expected text, "
            f"found the control character U+{ord(ch):04X}"
        )
    return out


class _PerGroup:
    """The value of each group-level column per group, read row by row (chunks of a long table): the first value
    of a group and its row are kept, and a later row of the same group with another value is refused, naming the
    group, both rows and both values (numbers written two ways, '5' and '5.0', count as one value)."""

    def __init__(self, names, source: str):
        self.names = tuple(names)
        self.source = source
        self.first: dict[str, dict[str, tuple[str, int]]] = {name: {} for name in self.names}

    def add(self, labels: pd.Series, df: pd.DataFrame, row_offset: int, rows: Rows = FRAME_ROWS) -> None:
        labs = np.asarray(labels.to_numpy(), dtype=object)
        for name in self.names:
            text = _column_text(df[name], self.source, name, row_offset, rows)
            pairs = pd.DataFrame({"g": labs, "v": text})
            first = ~pairs.duplicated(["g", "v"]).to_numpy()  # only distinct (group, value) pairs need a look
            seen = self.first[name]
            for i in np.flatnonzero(first):
                g, v = labs[i], text[i]
                prev = seen.get(g)
                if prev is None:
                    seen[g] = (v, row_offset + int(i) + 1)
                elif prev[0] != v and not _same_number(prev[0], v):
                    there, here = rows.many([prev[1], row_offset + int(i) + 1])
                    raise InputError(
                        f"bad input in {_where(self.source)}, column '{name}', group {_show(g)}: a "
                        f"group-level column must hold one value per group; found {_show(prev[0])} in "
                        f"{there} and {_show(v)} in {here}"
                    )

    def values(self, labels) -> dict[str, list[str]]:
        return {name: [self.first[name][lab][0] for lab in labels] for name in self.names}


def _one_row_columns(
    data: pd.DataFrame, labels: pd.Series, names, source: str, rows: Rows = FRAME_ROWS
) -> dict[str, list[str]]:
    """Group-level columns of a table with one row per group (summaries, estimates)."""
    out = {}
    for name in names:
        out[name] = list(_column_text(data[name], source, name, 0, rows))
    return out


def _check_column_names(group_columns, taken, source: str):
    """Group-level columns must be named once and differ from the columns that hold the statistics."""
    names = [str(c) for c in group_columns]
    for c in names:
        if names.count(c) > 1:
            raise InputError(f"bad options: the group-level column '{c}' is named twice")
        if c in taken:
            raise InputError(
                f"bad options: '{c}' is the column of the {taken[c]}; a group-level column must be another column"
            )
    return tuple(names)


_OPTION = {
    "group": "--group",
    "value": "--value",
    "size": "--size",
    "mean": "--mean",
    "standard deviation": "--sd",
    "estimate": "--estimate",
    "standard error": "--std-error",
}


def _check_distinct(wanted: dict[str, str]) -> None:
    """One column per role: the same column for the group and the value (or the size and the mean) is
    a slip in the options, not a table to read."""
    seen: dict[str, str] = {}
    for role, col in wanted.items():
        if col in seen:
            first = seen[col]
            raise InputError(
                f"bad options: the {first} column ({_OPTION.get(first, first)}) and the {role} column "
                f"({_OPTION.get(role, role)}) are both '{col}'; each needs a column of its own"
            )
        seen[col] = role


def _require_columns(columns, wanted: dict[str, str], source: str):
    _check_distinct(wanted)
    cols = [str(c) for c in columns]
    for role, col in wanted.items():
        if col not in cols:
            shown = ", ".join(_show(c, 40) for c in cols[:12]) + (" ..." if len(cols) > 12 else "")
            raise InputError(
                f"bad input in {_where(source)}: no column '{col}' (the {role} column); found {shown or 'no columns'}"
            )
        if cols.count(col) > 1:
            raise InputError(
                f"bad input in {_where(source)}: the column name '{col}' appears {cols.count(col)} times in the header"
            )


def from_frame(df: pd.DataFrame, group: str, value: str, source: str = "<frame>", group_columns=()) -> GroupStats:
    """Statistics of a long table: one row per measurement, a group column and a value column (and
    `group_columns` that hold one value per group, as in read_table).

    >>> import pandas as pd
    >>> s = from_frame(pd.DataFrame({"lab": ["a", "a", "b"], "y": [1.0, 3.0, 2.0]}), "lab", "y")
    >>> s.labels, s.n.tolist(), s.mean.tolist(), s.m2.tolist()
    (('a', 'b'), [2, 1], [2.0, 2.0], [2.0, 0.0])
    """
    extra = _check_column_names(group_columns, {group: "group labels", value: "measurements"}, source)
    _require_columns(df.columns, {"group": group, "value": value, **_roles([], extra)}, source)
    if len(df) == 0:
        raise InputError(f"bad input in {_where(source)}: no data rows")
    labels_raw = _check_groups(df[group], source, group, 0)
    vals = _check_values(df[value], source, value, 0)
    unit = choose_unit(vals)
    labels, n, hi, lo, m2 = _reduce_chunk(labels_raw, vals / unit if unit != 1.0 else vals)
    out = GroupStats(labels, n.astype(np.int64), hi, m2, mean_lo=lo, unit=unit, source=source)
    if extra:
        per_group = _PerGroup(extra, source)
        per_group.add(labels_raw, df, 0)
        out = out.with_columns(per_group.values(labels))
    return out


def _sha256_file(path: Path) -> str:
    try:
        known = _SCANNED.get(_file_key(path))
    except OSError:
        known = None
    if known is not None:
        return known
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


_KINDS = [
    (stat.S_ISFIFO, "a named pipe (FIFO)"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
]


def _open_check(path) -> Path:
    path = Path(path)
    if "\x00" in str(path):
        raise InputError("bad input: the file's name holds a NUL character, which no file system allows")
    try:
        st = os.stat(path)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise InputError(
                f"bad input: '{path}' is a symbolic link that loops (it leads back to itself); "
                "expected a CSV or Parquet file"
            ) from None
        if exc.errno == errno.ENAMETOOLONG:
            raise InputError(
                f"bad input: the file name '{_show(str(path), 40)[1:-1]}' is too long for the file system"
            ) from None
        if exc.errno == errno.ENOENT and os.path.islink(path):
            raise InputError(
                f"bad input: '{path}' is a symbolic link to '{os.readlink(path)}', which does not exist"
            ) from None
        if exc.errno in (errno.ENOENT, errno.ENOTDIR):
            raise InputError(f"bad input: the file '{path}' does not exist") from None
        raise InputError(f"bad input: the file '{path}' cannot be read ({exc.strerror or exc})") from None
    if stat.S_ISDIR(st.st_mode):
        raise InputError(f"bad input: '{path}' is a folder, expected a CSV or Parquet file")
    if not stat.S_ISREG(st.st_mode):
        kind = next((what for test, what in _KINDS if test(st.st_mode)), "not a regular file")
        raise InputError(
            f"bad input: '{path}' is {kind}, not a regular file; expected a CSV or Parquet file "
            "(copy the data into a file first)"
        )
    if not os.access(path, os.R_OK):
        raise InputError(f"bad input: the file '{path}' cannot be read (permission denied)")
    if st.st_size == 0:
        raise InputError(f"bad input in '{path}': the file is empty")
    return path


def _is_parquet(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(4) == b"PAR1"


_SEPARATORS = ",;\t|"


def _sniff_delimiter(path: Path, encoding: str, columns=()) -> str:
    """The field separator: the one that splits the header into fields naming every wanted column;
    where that does not decide, the csv module's guess, then the most frequent candidate."""
    import csv

    with open(path, encoding=encoding, newline="") as fh:
        sample = fh.read(64 * 1024)
    first = next((ln for ln in sample.splitlines() if ln.strip()), "")
    wanted = set(columns)
    fits = [
        d
        for d in _SEPARATORS
        if wanted and wanted <= {cell.strip() for cell in next(csv.reader([first], delimiter=d), [])}
    ]
    if len(fits) == 1:
        return fits[0]
    candidates = "".join(fits) or _SEPARATORS
    try:
        return csv.Sniffer().sniff(sample, delimiters=candidates).delimiter
    except csv.Error:
        counts = {d: first.count(d) for d in candidates}
        best = max(counts, key=lambda d: counts[d])
        return best if counts[best] > 0 else candidates[0]


def check_encoding(encoding: str) -> str:
    """A text encoding that Python knows, or one line saying it is not."""
    try:
        info = codecs.lookup(encoding)
    except (LookupError, TypeError, ValueError):
        info = None
    # bytes-to-bytes codecs (base64, zlib, rot13) are known to Python but are no text encoding; open()
    # refuses them by this same attribute of the codec's record
    if info is None or not getattr(info, "_is_text_encoding", True):
        raise InputError(
            f"bad option --encoding: {_show(encoding)} is not a text encoding Python knows; for example "
            "utf-8, cp1252, latin-1, utf-16"
        ) from None
    return encoding


# SHA-256 of files scanned for their encoding, so that a read does not hash a file in a second pass:
# keyed by path, size, modification time and inode
_SCANNED: dict[tuple, str] = {}


def _file_key(path: Path) -> tuple:
    st = os.stat(path)
    return (str(Path(path).resolve()), st.st_size, st.st_mtime_ns, st.st_ino)


def _scan_utf8(path: Path) -> tuple[int, bytes] | Literal[False] | None:
    """Read the whole file once (hashing it on the way). None: the whole file is UTF-8; False: some
    lines are not UTF-8 and no non-ASCII line is (a legacy 8-bit file); else (line number, bytes) of
    the first line that is not UTF-8 in a file whose other non-ASCII lines are."""
    h = hashlib.sha256()
    first_bad, some_utf8, line_no, carry = None, False, 0, b""
    key = _file_key(path)
    with open(path, "rb") as fh:
        while True:
            block = fh.read(1 << 20)
            h.update(block)
            data = carry + block
            if block:
                cut = data.rfind(b"\n") + 1
                if cut == 0 and len(data) > (8 << 20):  # one very long line (or '\r' line ends): cut it
                    cut = len(data) - 4  # at the start of a character, so that both halves decode alike
                    while cut > 0 and (0x80 <= data[cut] <= 0xBF or data[cut - 1 : cut + 1] == b"\r\n"):
                        cut -= 1  # (nor between the two bytes of a \r\n, which would count as two line ends)
                data, carry = data[:cut], data[cut:]
            else:
                carry = b""
            if data and not data.isascii() and not (first_bad is not None and some_utf8):
                try:
                    data.decode("utf-8")
                    some_utf8 = True
                except UnicodeDecodeError:  # rare: look line by line (lines as an editor shows them)
                    for k, line in enumerate(re.split(rb"\r\n|\r|\n", data)):
                        if line.isascii():
                            continue
                        try:
                            line.decode("utf-8")
                            some_utf8 = True
                        except UnicodeDecodeError:
                            if first_bad is None:
                                first_bad = (line_no + k + 1, line)
            line_no += data.count(b"\n") + data.count(b"\r") - data.count(b"\r\n")
            if not block:
                break
    if _file_key(path) == key:
        _SCANNED[key] = h.hexdigest()
        while len(_SCANNED) > 16:
            _SCANNED.pop(next(iter(_SCANNED)))
    if first_bad is None:
        return None
    return first_bad if some_utf8 else False


def _detect_encoding(path: Path, encoding: str | None) -> str:
    """The given encoding (checked), or the file's: a byte-order mark (UTF-32, UTF-16, UTF-8) decides;
    otherwise UTF-8 when every line is UTF-8, Windows-1252 when no non-ASCII line is, and a file that is
    UTF-8 except for some lines is refused, naming the first such line and its bytes."""
    if encoding:
        return check_encoding(encoding)
    with open(path, "rb") as fh:
        head = fh.read(1 << 20)
    if head.startswith(b"\xff\xfe\x00\x00") or head.startswith(b"\x00\x00\xfe\xff"):
        return "utf-32"  # checked before UTF-16: its little-endian mark starts the same way
    if head.startswith(b"\xff\xfe") or head.startswith(b"\xfe\xff"):
        return "utf-16"
    if b"\x00" in head:
        raise InputError(
            f"bad input in '{path}': the file is not a text table (it holds NUL bytes); expected a CSV "
            "or Parquet file (UTF-16 or UTF-32 text without a byte-order mark: name it, for example "
            "--encoding utf-16)"
        )
    bad = _scan_utf8(path)
    if bad is None:
        return "utf-8-sig"
    if bad is False:
        return "cp1252"
    line, data = bad
    raise InputError(
        f"bad input in '{path}', line {line}: the file is UTF-8 except for this line, whose bytes "
        f"{_show_bytes(data)} are not (a line from another system, in Windows-1252?); correct the line, "
        "or name the encoding of the whole file with --encoding"
    )


def check_number_format(thousands: str | None, decimal: str | None) -> None:
    """--thousands: one character that is neither a digit, a sign, an exponent letter nor the decimal mark."""
    if thousands is not None and (len(thousands) != 1 or thousands.isalnum() or thousands in "+-"):
        raise InputError(
            f"bad option --thousands: expected one separator character such as ',' '.' or \"'\"; "
            f"found {_show(thousands)}"
        )
    if thousands is not None and thousands == (decimal or "."):
        raise InputError(f"bad options: the thousands separator and the decimal mark are both '{thousands}'")


def _roles(columns, text_columns=()) -> dict[str, str]:
    """Role -> column for the header check: the first columns by their roles, group-level columns by name."""
    roles = dict(zip(("group", "value", "extra", "extra2"), [c for c in columns if c not in text_columns]))
    roles.update({f"group-level '{c}'": c for c in text_columns})
    return roles


def iter_table_chunks(
    path,
    columns: list[str],
    encoding: str | None = None,
    delimiter: str | None = None,
    chunk_rows: int = _CHUNK_ROWS,
    thousands: str | None = None,
    decimal: str | None = None,
    text_columns=(),
):
    """Yield (row_offset, DataFrame) chunks holding `columns` of a CSV or Parquet file.

    `thousands` is a digit-group separator inside numbers (for example ","), `decimal` the decimal mark
    (default "."). A CSV row with more fields than the header is refused rather than read shifted.
    `text_columns` (some of `columns`, after the first) are read as text (group-level columns), the others
    after the first as numbers.
    """
    path = _open_check(path)
    src = str(path)
    if _is_parquet(path):
        pf = open_parquet(path, src)
        offset = 0
        try:
            _require_columns(pf.schema_arrow.names, _roles(columns, text_columns), src)
            check_parquet_footer(pf, columns, src)
            batches = pf.iter_batches(batch_size=chunk_rows, columns=columns)
            while True:
                try:
                    batch = next(batches, None)
                    df = None if batch is None else batch.to_pandas()
                except Exception as exc:  # damaged pages: pyarrow raises ArrowInvalid, OSError and others
                    raise InputError(parquet_damage(src, offset, exc)) from None
                if df is None:
                    break
                _check_parquet_text(batch, src, offset)
                yield offset, df
                offset += len(df)
            if offset == 0:
                raise InputError(explain_no_rows(pf, columns, src))
            if offset != pf.metadata.num_rows:  # a value count damaged in the footer: pyarrow stops early
                raise InputError(
                    f"bad input in '{src}': a damaged Parquet file: its footer says "
                    f"{pf.metadata.num_rows} rows but {offset} could be read"
                )
        finally:
            pf.close()
        return
    enc = _detect_encoding(path, encoding)
    check_number_format(thousands, decimal)
    if delimiter is not None and (len(delimiter) != 1 or delimiter in '\r\n"' or delimiter.isalnum()):
        raise InputError(
            f"bad option --delimiter: expected one separator character such as ',' ';' '|' or a tab; "
            f"found {_show(delimiter)}"
        )
    try:
        sep = delimiter or _sniff_delimiter(path, enc, columns)  # "1,5" with a comma separator works when quoted
        raw_header, first_row = _first_rows(path, enc, sep)
        if raw_header is None:
            raise InputError(f"bad input in '{src}': the file has no header and no data")
        _require_columns(raw_header, _roles(columns, text_columns), src)
        if first_row is not None and any(c.strip() for c in first_row[len(raw_header) :]):
            # pandas would take the surplus as an index and shift every column by one
            raise InputError(
                f"bad input in '{src}', {_first_row_line(src, enc, sep)}: expected {len(raw_header)} fields as in "
                f"the header, found {len(first_row)} (an unquoted '{sep}' inside a label or a number?)"
            )
        header = list(pd.read_csv(path, sep=sep, nrows=0, encoding=enc, skipinitialspace=True).columns)
        names = [str(c).strip() for c in header]
        where = [names.index(c) for c in columns]
        numeric = [header[i] for i in where[1:] if names[i] not in text_columns]
        # every other column is read as text: no type guessing, no mixed-type warnings
        text = {c: str for c in header if c not in numeric}
        rows = chunk_rows if len(header) <= 8 else max(1, chunk_rows * 8 // len(header))
        reader = pd.read_csv(
            path,
            sep=sep,
            index_col=False,
            dtype=text,
            keep_default_na=False,
            na_values={c: _MISSING for c in numeric},
            skip_blank_lines=True,
            encoding=enc,
            chunksize=rows,
            thousands=thousands,
            decimal=decimal or ".",
            skipinitialspace=True,
        )
    except UnicodeError as exc:
        raise InputError(_encoding_message(src, enc, exc, detected=not encoding)) from None
    except pd.errors.EmptyDataError:
        raise InputError(f"bad input in '{src}': the file has no header and no data") from None
    except pd.errors.ParserError as exc:
        raise InputError(_parser_message(src, exc, sep, enc)) from None
    offset = 0
    chunks = iter(reader)
    try:  # the reader holds the file open: closed however the caller stops (closing() in read_table)
        while True:
            try:
                with warnings.catch_warnings():
                    # a trailing separator on the first data row: checked above, the surplus is empty
                    warnings.simplefilter("ignore", pd.errors.ParserWarning)
                    df = next(chunks)
            except StopIteration:
                break
            except UnicodeError as exc:
                raise InputError(_encoding_message(src, enc, exc, detected=not encoding)) from None
            except pd.errors.ParserError as exc:
                raise InputError(_parser_message(src, exc, sep, enc)) from None
            df = df.iloc[:, where]
            df.attrs["pooling_csv"] = (src, enc, sep, header[where[-1]] if len(where) == 2 else None)
            df.columns = list(columns)
            yield offset, df
            offset += len(df)
    finally:
        reader.close()
    if offset == 0:
        raise InputError(f"bad input in '{src}': a header but no data rows")


def open_parquet(path, src: str):
    """A pyarrow ParquetFile that verifies each page's CRC-32 checksum as it reads the page.

    Parquet keeps a checksum only for the pages whose writer chose to write one (pyarrow:
    write_page_checksum=True); a page without one is read unchecked, and so are the page headers and the
    footer, which no checksum covers (check_parquet_counts looks at what the footer says of itself).
    """
    import pyarrow.parquet as pq

    try:
        return pq.ParquetFile(path, page_checksum_verification=True)
    except Exception as exc:  # pyarrow raises several types for a damaged file
        raise InputError(
            f"bad input in '{src}': not a readable Parquet file: its footer, which describes its columns "
            f"and rows, is damaged or cut short (pyarrow: {_one_line(exc)[:160]})"
        ) from None


def parquet_damage(src: str, offset: int, exc: Exception) -> str:
    """The one line for a Parquet page that cannot be read, or whose bytes do not match its checksum."""
    if "CRC checksum verification failed" in str(exc):
        return (
            f"bad input in '{src}': a damaged Parquet file: a page of the rows after row {offset} does not match "
            "the checksum written with it (its bytes changed after it was written); nothing was read from it"
        )
    return (
        f"bad input in '{src}': a damaged Parquet file; the rows after row {offset} cannot be read "
        f"({_one_line(exc)[:200]})"
    )


def _arrow_family(t) -> str:
    """The kind of values an Arrow type holds, as far as a Parquet column's physical type decides it."""
    import pyarrow as pa

    if pa.types.is_dictionary(t):
        t = t.value_type
    checks = [
        (
            "text",
            (
                pa.types.is_string,
                pa.types.is_large_string,
                pa.types.is_binary,
                pa.types.is_large_binary,
                pa.types.is_fixed_size_binary,
                getattr(pa.types, "is_string_view", lambda _: False),
                getattr(pa.types, "is_binary_view", lambda _: False),
            ),
        ),
        ("integer", (pa.types.is_integer,)),
        ("floating", (pa.types.is_floating,)),
        ("decimal", (pa.types.is_decimal,)),
        ("boolean", (pa.types.is_boolean,)),
        ("time", (pa.types.is_temporal,)),
    ]
    return next((name for name, tests in checks if any(test(t) for test in tests)), "other")


def check_parquet_footer(pf, columns, src: str) -> None:
    """Refuse a Parquet file whose footer contradicts itself: no checksum covers the footer.

    Two checks that need nothing the footer might have lost: the file's row count must be the sum of
    its row groups' (a count zeroed by damage would read as fewer rows, or none); and where the writer
    kept the Arrow schema beside the Parquet one (pyarrow and pandas do), each column read must hold
    the same kind of values in both (a damaged type code would make text read as numbers, or numbers
    as other numbers).
    """
    meta = pf.metadata
    damaged = f"bad input in '{src}': a damaged Parquet file"
    total = sum(meta.row_group(k).num_rows for k in range(meta.num_row_groups))
    if meta.num_rows != total:
        raise InputError(f"{damaged}: its footer says {meta.num_rows} rows but its row groups hold {total}")
    stored = (meta.metadata or {}).get(b"ARROW:schema")
    if stored is None:
        return
    import base64

    import pyarrow as pa

    try:
        kept = pa.ipc.read_schema(pa.py_buffer(base64.b64decode(stored)))
        kept.names  # noqa: B018 -- names are decoded here: damaged ones are not UTF-8
    except Exception as exc:  # base64, IPC or UTF-8 errors: the kept schema itself is damaged
        raise InputError(f"{damaged}: its kept Arrow schema cannot be read ({_one_line(exc)[:120]})") from None
    have = pf.schema_arrow
    for name in columns:
        if name in kept.names and name in have.names:
            a, b = kept.field(name).type, have.field(name).type
            if _arrow_family(a) != _arrow_family(b):
                raise InputError(f"{damaged}: column '{name}' was written as {a} but its Parquet type now reads as {b}")


def explain_no_rows(pf, columns, src: str) -> str:
    """Why a Parquet file read no rows: one line, naming damage where the footer shows it.

    For a column that is not repeated, each row group holds one value (or null) per row, so a column chunk
    whose count of values differs from its row group's rows, or a row group of 0 rows whose column chunk
    records a smallest and largest value, was damaged. An empty file written as such (0 rows, 0 values,
    no statistics) is empty.
    Called only after check_parquet_footer, which refuses a damaged type code (pyarrow cannot always
    read a column chunk's statistics under a wrong type).
    """
    meta = pf.metadata
    schema = pf.schema
    wanted = [
        i for i in range(len(schema)) if schema.column(i).path in columns and schema.column(i).max_repetition_level == 0
    ]
    damaged = f"bad input in '{src}': a damaged Parquet file"
    for k in range(meta.num_row_groups):
        rg = meta.row_group(k)
        for i in wanted:
            col = rg.column(i)
            name = schema.column(i).path
            if col.num_values != rg.num_rows:
                return (
                    f"{damaged}: row group {k + 1} says {rg.num_rows} rows but its column '{name}' holds "
                    f"{col.num_values} values"
                )
            st = col.statistics
            if rg.num_rows == 0 and st is not None and st.has_min_max:
                return (
                    f"{damaged}: row group {k + 1} says 0 rows but its column '{name}' records values (from "
                    f"{_show(st.min, 30)} to {_show(st.max, 30)})"
                )
    if meta.num_rows:
        return f"{damaged}: its footer says {meta.num_rows} rows but none could be read"
    groups = (
        "no row group"
        if meta.num_row_groups == 0
        else f"{meta.num_row_groups} empty row group" + ("s" if meta.num_row_groups > 1 else "")
    )
    return f"bad input in '{src}': the Parquet file has the columns but no rows ({groups})"


def _check_parquet_text(batch, src: str, offset: int) -> None:
    """pyarrow reads string pages without checking them: a damaged page can hold bytes that are not
    UTF-8, which fail later, anywhere. Check every text column of the batch here (a fast full check)."""
    import pyarrow as pa

    for name, column in zip(batch.schema.names, batch.columns):
        if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
            try:
                column.validate(full=True)
            except (pa.ArrowInvalid, pa.ArrowException) as exc:
                raise InputError(
                    f"bad input in '{src}', column '{name}', rows {offset + 1} to {offset + len(column)}: "
                    f"text that is not valid UTF-8, a damaged Parquet file? ({_one_line(exc)[:120]})"
                ) from None


def _one_line(exc) -> str:
    return " ".join(str(exc).split())


# the stand-in for undecodable bytes while looking for them (a private-use code point: text holding it
# can at worst misplace the line number of an error message)
_STAND_IN = "\U000ffffd"
_UNDECODABLE = threading.local()


def _stand_in(exc):
    if isinstance(exc, UnicodeDecodeError):
        found = getattr(_UNDECODABLE, "found", None)
        if found is not None and not found:
            found.append((bytes(exc.object[exc.start : exc.end]), exc.reason))
        return _STAND_IN, exc.end
    raise exc


codecs.register_error("pooling-stand-in", _stand_in)


def _line_breaks(text: str) -> int:
    """Line ends in `text` as the CSV readers count them: \n, \r\n, or \r alone."""
    return text.count("\n") + text.count("\r") - text.count("\r\n")


def first_undecodable(path, enc: str) -> tuple[int, bytes, str, bytes | None] | None:
    """(line number, the bytes, the codec's reason, the line's bytes or None) of the first bytes of `path`
    that `enc` does not decode; None when all of it decodes. The line's own bytes are given for
    encodings in which a line ends with the byte 0x0A (ASCII's line end), else None. On the error
    path only: it reads the file once more."""
    _UNDECODABLE.found = []
    try:
        decoder = codecs.getincrementaldecoder(enc)(errors="pooling-stand-in")
        breaks, carry_cr = 0, False
        with open(path, "rb") as fh:
            while True:
                block = fh.read(1 << 20)
                text = decoder.decode(block, final=not block)
                at = text.find(_STAND_IN)
                head = text if at < 0 else text[:at]
                if carry_cr and head.startswith("\n"):
                    breaks -= 1  # a \r\n cut between two blocks is one line end
                breaks += _line_breaks(head)
                carry_cr = head.endswith("\r")
                if at >= 0:
                    bad, reason = _UNDECODABLE.found[0] if _UNDECODABLE.found else (b"", "not decodable")
                    return breaks + 1, bad, reason, _raw_line(path, breaks + 1, enc)
                if not block:
                    return None
    except UnicodeDecodeError:
        return None
    except UnicodeError as exc:  # UTF-16 and UTF-32 refuse a stream without a byte-order mark at its start
        return 1, b"", _one_line(exc), None
    except (LookupError, OSError):
        return None
    finally:
        _UNDECODABLE.found = None


def _raw_line(path, number: int, enc: str) -> bytes | None:
    """Line `number` (1-based) of the file as bytes, for encodings whose line end is the byte 0x0A."""
    try:
        if not "x\r\nx".encode(enc).endswith(b"x\r\nx"):  # (a byte-order mark may come first)
            return None
    except (LookupError, UnicodeError):
        return None
    with open(path, "rb") as fh:
        for k, line in enumerate(re.split(rb"\r\n|\r|\n", fh.read()), start=1):  # error path: one read is fine
            if k == number:
                return line
    return None


def _encoding_message(src: str, enc: str, exc: UnicodeError, detected: bool = False) -> str:
    what = getattr(exc, "reason", None) or _one_line(exc)
    how = detected and enc == "cp1252"
    found = first_undecodable(src, enc) if Path(src).is_file() else None
    if found is None:
        return (
            f"bad input in '{src}': the text is not in the {enc} encoding ({what}); name the right one with --encoding"
        )
    line, bad, reason, raw = found
    if reason in ("truncated data", "unexpected end of data"):  # the codecs' words for a character cut off at the end
        reason = "the file ends inside a character"
    enc = "UTF-8" if enc == "utf-8-sig" else enc  # the detected UTF-8, read past a byte-order mark if one is there
    if not bad:
        return (
            f"bad input in '{src}', line {line}: the text is not in the {enc} encoding ({reason}); name the "
            "file's encoding with --encoding"
        )
    shown = " ".join(f"0x{b:02X}" for b in bad[:8]) + (" …" if len(bad) > 8 else "")
    which = f"the byte {shown} is" if len(bad) == 1 else f"the bytes {shown} are"
    where = f"; the line's bytes are {_show_bytes_at(raw, bad)}" if raw is not None else ""
    if how:
        said = f"the file holds no UTF-8 text and was read as Windows-1252 (cp1252), in which {which} not text"
    else:
        said = f"{which} not text in the {enc} encoding"
    return (
        f"bad input in '{src}', line {line}: {said} ({reason}){where}; correct the line, or name the file's "
        "encoding with --encoding"
    )


def _show_bytes_at(line: bytes, bad: bytes, limit: int = 60) -> str:
    """A line's bytes for a one-line message, cut around the first occurrence of `bad`."""
    start = max(line.find(bad), 0) if bad else 0
    lo = max(0, start - limit // 2)
    cut = line[lo : lo + limit]
    return ("…" if lo else "") + repr(cut) + ("…" if lo + limit < len(line) else "")


def _cell_text(src: str, enc: str, sep: str, column, row: int) -> str | None:
    """The text of one cell of a CSV as it stands in the file (data row `row`, 1-based), read again
    with every cell as text: for messages only, on the error path."""
    try:
        with pd.read_csv(
            src,
            sep=sep,
            dtype=str,
            keep_default_na=False,
            index_col=False,
            usecols=[column],
            skip_blank_lines=True,
            encoding=enc,
            chunksize=100_000,
            skipinitialspace=True,
        ) as reader:
            seen = 0
            for chunk in reader:
                if seen + len(chunk) >= row:
                    return str(chunk.iloc[row - seen - 1, 0])
                seen += len(chunk)
    except Exception:  # a message helper: the caller falls back to the parsed value
        return None
    return None


def _first_row_line(src: str, enc: str, sep: str) -> str:
    """'line N' of the row _first_rows takes for the first data row (the first with a cell that is not blank)."""
    record = first_record(src, enc, sep, lambda r: any(cell.strip() for cell in r[2]))
    return "the first data row" if record is None else f"line {record[1]}"


def _parser_message(src: str, exc, sep: str, enc: str) -> str:
    m = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", str(exc))
    if m:
        # pandas counts blank lines but not the line breaks inside quoted cells: find the line as the file has it
        record = first_record(src, enc, sep, lambda r: r[3] == int(m.group(2)))
        line = m.group(2) if record is None else str(record[1])
        return (
            f"bad input in '{src}', line {line}: expected {m.group(1)} fields as in the header, found "
            f"{m.group(3)} (an unquoted '{sep}' inside a label or a number?)"
        )
    return f"bad input in '{src}': cannot be read as a table ({_one_line(exc)})"


def _first_rows(path: Path, enc: str, sep: str) -> tuple[list[str] | None, list[str] | None]:
    """The header (names stripped) and the first data row, skipping blank lines; pandas renames
    duplicated headers to "x.1", so the check for duplicates looks here."""
    if len(sep) != 1:  # a multi-character separator: the csv module cannot split it; pandas will
        header = pd.read_csv(path, sep=sep, nrows=0, encoding=enc, engine="python").columns
        return [str(c).strip() for c in header], None
    header = None
    try:
        with open(path, encoding=enc, newline="") as fh:
            for row in csv.reader(fh, delimiter=sep, skipinitialspace=True):
                if not any(cell.strip() for cell in row):
                    continue
                if header is None:
                    header = [cell.strip() for cell in row]
                else:
                    return header, row
    except csv.Error as exc:  # e.g. a field beyond the csv module's size limit: pandas reads it
        if header is None:
            header = [str(c).strip() for c in pd.read_csv(path, sep=sep, nrows=0, encoding=enc).columns]
        if "field larger" not in str(exc):
            raise InputError(f"bad input in '{path}': cannot be read as a table ({_one_line(exc)})") from None
    return header, None


def read_table(
    path,
    group: str,
    value: str,
    *,
    encoding: str | None = None,
    delimiter: str | None = None,
    chunk_rows: int = _CHUNK_ROWS,
    thousands: str | None = None,
    decimal: str | None = None,
    group_columns=(),
) -> GroupStats:
    """Statistics of a long table in a CSV or Parquet file, read in chunks of `chunk_rows` rows.

    Peak memory grows with the number of groups and the chunk size, not with the file's rows.
    Blanks around a group label in a CSV are not part of it. `group_columns`: columns that hold one value per
    group (predictors such as a lab's method); a group whose rows disagree is refused, naming both rows.
    """
    src = str(path)
    _check_distinct({"group": group, "value": value})
    running = _Running()
    unit = None
    csv_file = not _is_parquet(_open_check(path))
    extra = _check_column_names(group_columns, {group: "group labels", value: "measurements"}, src)
    per_group = _PerGroup(extra, src) if extra else None
    chunks = iter_table_chunks(
        path, [group, value, *extra], encoding, delimiter, chunk_rows, thousands, decimal, text_columns=extra
    )
    with contextlib.closing(chunks):  # a refused chunk closes the file at once, not when collected
        for offset, df in chunks:
            rows = rows_of(df)
            labels_raw = _check_groups(df[group], src, group, offset, strip=csv_file, rows=rows)
            vals = _check_values(df[value], src, value, offset, written=_written(df), rows=rows)
            unit = choose_unit(vals) if unit is None else unit  # fixed by the first chunk, so chunks merge exactly
            running.add(*_reduce_chunk(labels_raw, vals / unit if unit != 1.0 else vals))
            if per_group is not None:
                per_group.add(labels_raw, df, offset, rows)
    out = running.stats(1.0 if unit is None else unit, src, _sha256_file(Path(path)))
    return out.with_columns(per_group.values(out.labels)) if per_group is not None else out


def rows_of(df: pd.DataFrame) -> Rows:
    """How messages name the rows of a chunk from iter_table_chunks: a CSV's lines, a Parquet file's rows."""
    where = df.attrs.get("pooling_csv")
    return Rows(where[:3]) if where else FRAME_ROWS


def _written(df: pd.DataFrame):
    """written(row) for _check_values: the value cell of a CSV as it stands in the file."""
    where = df.attrs.get("pooling_csv")
    if not where or where[3] is None:
        return None
    return lambda row: _cell_text(where[0], where[1], where[2], where[3], row)


def _read_whole(
    path, columns, encoding=None, delimiter=None, thousands=None, decimal=None, text_columns=()
) -> tuple[pd.DataFrame, Rows]:
    parts = [
        df
        for _, df in iter_table_chunks(
            path, columns, encoding, delimiter, thousands=thousands, decimal=decimal, text_columns=text_columns
        )
    ]
    rows = rows_of(parts[0])
    df = pd.concat(parts, ignore_index=True)
    if not _is_parquet(Path(path)):  # blanks around a label in a CSV are formatting, as in read_table
        df[columns[0]] = df[columns[0]].str.strip()
    return df, rows


def from_summaries(
    data, group: str, n: str, mean: str, sd: str, source: str = "<frame>", group_columns=(), **read
) -> GroupStats:
    """Statistics from one row per group: its size n, mean and sample standard deviation (ddof=1), and
    `group_columns` (predictors: one value per group).

    A group of one measurement has no sample sd, and tables write it as an empty cell: with n = 1 an empty sd
    (or 0) is taken as it is meant (M2 = 0), and any other sd is refused, naming the row and the group, since one
    measurement has no spread. Such a group informs its mean theta_j, not the within-group variance.

    `read` (encoding, delimiter, thousands, decimal) is passed to the CSV reader when `data` is a path."""
    where = str(data) if not isinstance(data, pd.DataFrame) else source
    extra = _check_column_names(
        group_columns, {group: "group labels", n: "sizes", mean: "means", sd: "standard deviations"}, where
    )
    _check_distinct({"group": group, "size": n, "mean": mean, "standard deviation": sd})
    if not isinstance(data, pd.DataFrame):
        source = str(data)
        _open_check(data)
        data, rows = _read_whole(data, [group, n, mean, sd, *extra], text_columns=extra, **read)
        sha = _sha256_file(Path(source))
    else:
        sha, rows = None, FRAME_ROWS
    _require_columns(
        data.columns, {"group": group, "size": n, "mean": mean, "standard deviation": sd, **_roles([], extra)}, source
    )
    labels = _check_groups(data[group], source, group, 0, rows=rows)
    _check_unique(labels, source, group, rows)
    nv = _check_values(data[n], source, n, 0, rows=rows)
    mv = _check_values(data[mean], source, mean, 0, rows=rows)
    sd_cells = data[sd]
    single_empty = (nv == 1) & _empty_cells(sd_cells)
    if single_empty.any():  # n = 1 with no sd: nothing to check, and M2 = 0 whatever the cell says
        sd_cells = sd_cells.astype(object).where(~single_empty, 0.0)
    sv = _check_values(sd_cells, source, sd, 0, rows=rows)
    for i in range(len(nv)):
        if nv[i] < 1 or nv[i] != np.round(nv[i]) or nv[i] > MAX_COUNT:
            found = _show(data[n].iloc[i]) if nv[i] > MAX_COUNT else f"{nv[i]:g}"
            raise InputError(
                f"bad input in {_where(source)}, column '{n}', group {_show(labels.iloc[i])}: "
                f"expected a whole number of at least 1 and at most 2^53 = {MAX_COUNT:.0f} (the counts "
                f"a double holds exactly), found {found}"
            )
        if sv[i] < 0:
            raise InputError(
                f"bad input in {_where(source)}, column '{sd}', group {_show(labels.iloc[i])}: "
                f"expected a standard deviation >= 0, found {sv[i]:g}"
            )
        if nv[i] == 1 and sv[i] != 0:
            # one measurement has no spread: an sd beside n = 1 is a slip in n or in the sd (an sd from a group's
            # other rows, a wrong column), and taking either at its word would misstate the group
            raise InputError(
                f"bad input in {_where(source)}, column '{sd}', {rows(i + 1)}, group {_show(labels.iloc[i])}: "
                f"a group of one measurement (n = 1) has no spread, so its sd must be empty or 0; found {sv[i]:g} "
                f"(correct n in column '{n}', or the sd)"
            )
    unit = choose_unit(mv, sv)
    mv, sv = mv / unit, sv / unit
    m2 = sv * sv * np.maximum(nv - 1, 0)
    out = GroupStats(tuple(labels), nv.astype(np.int64), mv, m2, unit=unit, source=source, file_sha256=sha)
    return out.with_columns(_one_row_columns(data, labels, extra, source, rows)) if extra else out


def _empty_cells(col: pd.Series) -> np.ndarray:
    """True where a cell holds nothing: missing, or only white space."""
    empty = col.isna().to_numpy()
    if col.dtype == object or str(col.dtype) == "string":
        empty |= col.astype("string").str.strip().fillna("").eq("").to_numpy(dtype=bool)
    return empty


def from_estimates(
    data,
    group: str,
    estimate: str,
    std_error: str,
    source: str = "<frame>",
    n: str | None = None,
    group_columns=(),
    **read,
) -> GroupStats:
    """Statistics for the `known` structure: one estimate and its standard error per group (and `group_columns`,
    predictors: one value per group).

    `read` (encoding, delimiter, thousands, decimal) is passed to the CSV reader when `data` is a path."""
    taken = {group: "group labels", estimate: "estimates", std_error: "standard errors", **({n: "sizes"} if n else {})}
    extra = _check_column_names(group_columns, taken, str(data) if not isinstance(data, pd.DataFrame) else source)
    cols = [group, estimate, std_error] + ([n] if n else [])
    _check_distinct(dict(zip(("group", "estimate", "standard error", "size"), cols)))
    cols = cols + list(extra)
    if not isinstance(data, pd.DataFrame):
        source = str(data)
        _open_check(data)
        data, rows = _read_whole(data, cols, text_columns=extra, **read)
        sha = _sha256_file(Path(source))
    else:
        sha, rows = None, FRAME_ROWS
    _require_columns(
        data.columns, {"group": group, "estimate": estimate, "standard error": std_error, **_roles([], extra)}, source
    )
    labels = _check_groups(data[group], source, group, 0, rows=rows)
    _check_unique(labels, source, group, rows)
    est = _check_values(data[estimate], source, estimate, 0, rows=rows)
    se = _check_values(data[std_error], source, std_error, 0, rows=rows)
    bad = se <= 0
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(
            f"bad input in {_where(source)}, column '{std_error}', group {_show(labels.iloc[i])}: "
            f"expected a standard error > 0, found {se[i]:g}"
        )
    nn = (
        np.zeros(len(est), dtype=np.int64)
        if n is None
        else _check_values(data[n], source, n, 0, rows=rows).astype(np.int64)
    )
    unit = choose_unit(est, se)
    out = GroupStats(
        tuple(labels),
        nn,
        est / unit,
        np.zeros(len(est)),
        se=se / unit,
        kind="known",
        unit=unit,
        source=source,
        file_sha256=sha,
    )
    return out.with_columns(_one_row_columns(data, labels, extra, source, rows)) if extra else out


def _check_unique(labels: pd.Series, source: str, column: str, rows: Rows = FRAME_ROWS):
    dup = labels.duplicated()
    if dup.any():
        i = int(np.argmax(dup.to_numpy()))
        first = int(np.argmax((labels == labels.iloc[i]).to_numpy()))
        there, here = rows.many([first + 1, i + 1])
        raise InputError(
            f"bad input in {_where(source)}, column '{column}', {here}: "
            f"expected one row per group, found {_show(labels.iloc[i])} again (first in {there})"
        )
