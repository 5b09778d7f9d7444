"""Group statistics on Dask, for raw measurements that outgrow one machine.

Only the statistics step is distributed: a folder or glob of CSV or Parquet files is read with
dask.dataframe (on the local machine's threads, or on a dask.distributed cluster given its
scheduler's address) and reduced to n_j, mean_j and M2_j per group. The sampler then runs on one
machine, since it needs only those J groups' statistics.

The reduction is a custom `dask.dataframe.Aggregation`:

    chunk     per partition, per group: the corrected two-pass moments (mean first, then the
              squared deviations from the mean held as hi + lo), as in stats._reduce_chunk;
    agg       per group, over the partitions' results: the Chan-Golub-LeVeque pairwise merge
              with double-double means, stats.merge_moments, applied as a balanced tree;
    finalize  the merged (n, mean_hi, mean_lo, M2) of each group.

The sum-of-squares shortcut (sum y^2 - n ybar^2) that a plain groupby-var may use loses every digit
on data near 1e9; this path equals the pandas path (pooling.read_table, file by file, merged) to
about 1e-13 relative on such data. Groups come out in order of first appearance when the files are
read in the order given (a glob or a folder: sorted by name), as the pandas path orders them.

Requires the optional extra: pip install pooling[dask].
"""

from __future__ import annotations

import glob as _glob
import os
import re
from pathlib import Path

import numpy as np
import pandas as pd

from . import stats as S
from .errors import InputError
from .runmark import read_marker

MISSING_DASK = (
    "reading a folder, a glob of files or a cluster needs Dask, which is not installed: pip install pooling[dask]"
)
_CSV_SUFFIXES = (".csv", ".tsv", ".txt")
_PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")
_ORDER = "__pooling_order__"  # partition number << 40 | row: first appearance, across partitions
_FILE = "__pooling_file__"
_PARQUET_ROWS = 2_000_000  # rows per partition when local Parquet files are split by row groups
_CONNECT_TIMEOUT = "10s"  # how long to wait for a scheduler before calling its address bad
_PARSE_ERROR = re.compile(
    r"could not convert|[Uu]nable to parse|[Mm]ismatched dtypes|invalid literal|cannot safely convert"
)


def _dask():
    try:
        import dask
        import dask.dataframe as dd
    except ImportError:
        raise InputError(MISSING_DASK) from None
    return dask, dd


def looks_like_many(path: str) -> bool:
    """True for a folder, a glob pattern or a URL: inputs that the Dask path reads."""
    text = str(path)
    try:
        if Path(text).is_file():  # a file whose name holds '[' or '*' is that file, not a pattern
            return False
        folder = Path(text).is_dir()
    except OSError:  # a name too long for the file system, say: the file reader names the fault
        return False
    return "://" in text or bool(re.search(r"[*?\[]", text)) or folder


# ---------------------------------------------------------------------------------------------
# which files


def resolve(paths_or_glob, fmt: str | None = None) -> tuple[list[str], str]:
    """The files to read, in reading order, and their format ("csv" or "parquet").

    A folder means every CSV or Parquet file below it (sorted by path); a glob its matches (sorted);
    a list its items as given. URLs (with '://') are handed to Dask as they are.
    """
    items = [paths_or_glob] if isinstance(paths_or_glob, (str, os.PathLike)) else list(paths_or_glob)
    if not items:
        raise InputError("bad input: an empty list of files")
    files: list[str] = []
    for item in map(str, items):
        if "://" in item:
            files.append(item)
        elif Path(item).is_dir():
            found = sorted(
                str(p)
                for p in Path(item).rglob("*")
                if p.is_file()
                and p.suffix.lower() in _CSV_SUFFIXES + _PARQUET_SUFFIXES
                and not _in_run_folder(p, Path(item))
            )
            if not found:
                raise InputError(
                    f"bad input: the folder '{item}' holds no .csv, .tsv, .txt or .parquet file"
                    " (run folders of pooling in it are not read)"
                )
            files.extend(found)
        elif re.search(r"[*?\[]", item) and not Path(item).is_file():
            base = _glob_base(item)
            found = sorted(
                p for p in _glob.glob(item, recursive=True) if Path(p).is_file() and not _in_run_folder(Path(p), base)
            )
            if not found:
                raise InputError(f"bad input: no file matches '{item}'")
            files.extend(found)
        else:
            S._open_check(item)
            files.append(item)
    kinds = {_kind(f, fmt) for f in files}
    if len(kinds) > 1:
        raise InputError(
            f"bad input: '{_show_input(paths_or_glob)}' mixes CSV and Parquet files; "
            "read them with two narrower globs, or convert one kind"
        )
    return files, kinds.pop()


def _in_run_folder(path: Path, top: Path) -> bool:
    """True when `path` lies in a run folder that pooling wrote (marked: runmark.MARKER) strictly below `top`:
    such a folder is a run's output (groups.csv, changes.csv), never data, though it may sit among the data."""
    folder = path.parent
    seen = 0
    while folder != top and folder != folder.parent and seen < 64:
        if read_marker(folder) is not None:
            return True
        folder, seen = folder.parent, seen + 1
    return False


def _glob_base(pattern: str) -> Path:
    """The folder a glob pattern starts from: its leading parts without wildcards."""
    parts = []
    for part in Path(pattern).parts:
        if re.search(r"[*?\[]", part):
            break
        parts.append(part)
    return Path(*parts) if parts else Path(".")


def _kind(path: str, fmt: str | None) -> str:
    if fmt is not None:
        if fmt not in ("csv", "parquet"):
            raise InputError(f"bad option: the file format must be csv or parquet; found '{fmt}'")
        return fmt
    if "://" not in path:
        S._open_check(path)
        return "parquet" if S._is_parquet(Path(path)) else "csv"
    suffix = Path(path.split("?")[0]).suffix.lower()
    if suffix in _PARQUET_SUFFIXES:
        return "parquet"
    if suffix in _CSV_SUFFIXES:
        return "csv"
    raise InputError(f"bad input: cannot tell whether '{path}' is CSV or Parquet from its name; name the format")


def _show_input(paths_or_glob) -> str:
    if isinstance(paths_or_glob, (str, os.PathLike)):
        return str(paths_or_glob)
    items = [str(p) for p in paths_or_glob]
    return ", ".join(items[:3]) + (f" and {len(items) - 3} more" if len(items) > 3 else "")


# ---------------------------------------------------------------------------------------------
# the aggregation: chunk, agg, finalize


def _moments_by_code(codes: np.ndarray, values: np.ndarray, J: int):
    """Per-code (n, hi, lo, M2) by the corrected two-pass form: sum_i (y_i - (hi + lo))^2."""
    n = np.bincount(codes, minlength=J).astype(np.float64)
    mean = np.bincount(codes, weights=values, minlength=J) / n
    corr = np.bincount(codes, weights=values - mean[codes], minlength=J) / n
    hi, lo = S._two_sum(mean, corr)
    dev = (values - hi[codes]) - lo[codes]
    return n, hi, lo, np.bincount(codes, weights=dev * dev, minlength=J)


def _chunk(grouped):
    """One partition: the two-pass moments of every group, in a power-of-two unit for extreme data."""
    values = grouped.obj.to_numpy(dtype=np.float64)
    number = grouped.ngroup().to_numpy(dtype=np.float64, na_value=np.nan)
    keys = grouped.size().index  # ngroup numbers the groups in this order
    ok = number >= 0  # a missing key (only in Dask's made-up sample data: real labels are checked) is NaN
    values, codes = values[ok], number[ok].astype(np.int64)
    unit = S.choose_unit(values)
    n, hi, lo, m2 = _moments_by_code(codes, values / unit if unit != 1.0 else values, len(keys))
    return tuple(pd.Series(a, index=keys) for a in (n, hi, lo, m2, np.full(len(keys), unit)))


def _tree_merge(codes: np.ndarray, n, hi, lo, m2):
    """Merge the rows of each code pairwise, as a balanced tree of Chan-Golub-LeVeque merges.

    Rows must be sorted by code. Returns one row per code, in code order.
    """
    while True:
        first = np.ones(len(codes), dtype=bool)
        first[1:] = codes[1:] != codes[:-1]
        start = np.maximum.accumulate(np.where(first, np.arange(len(codes)), 0))
        rank = np.arange(len(codes)) - start
        has_next = np.zeros(len(codes), dtype=bool)
        has_next[:-1] = codes[1:] == codes[:-1]
        a = np.flatnonzero((rank % 2 == 0) & has_next)
        if a.size == 0:
            return n, hi, lo, m2
        b = a + 1
        mn, mh, ml, mm = S.merge_moments(n[a], hi[a], lo[a], m2[a], n[b], hi[b], lo[b], m2[b])
        n, hi, lo, m2 = n.copy(), hi.copy(), lo.copy(), m2.copy()
        n[a], hi[a], lo[a], m2[a] = mn, mh, ml, mm
        keep = rank % 2 == 0  # the even rows now hold the pairs; odd rows were merged into them
        codes, n, hi, lo, m2 = codes[keep], n[keep], hi[keep], lo[keep], m2[keep]


def _agg(n_g, hi_g, lo_g, m2_g, unit_g):
    """Several partial results per group (from partitions or earlier merges) merged into one."""
    keys = n_g.obj.index
    codes, uniques = pd.factorize(keys, sort=False)
    order = np.argsort(codes, kind="stable")
    codes = codes[order]
    unit = unit_g.obj.to_numpy(dtype=np.float64)[order]
    top = np.zeros(len(uniques))
    np.maximum.at(top, codes, unit)
    f = unit / top[codes]  # exact: both are powers of two
    n = n_g.obj.to_numpy(dtype=np.float64)[order]
    hi = hi_g.obj.to_numpy(dtype=np.float64)[order] * f
    lo = lo_g.obj.to_numpy(dtype=np.float64)[order] * f
    m2 = m2_g.obj.to_numpy(dtype=np.float64)[order] * f * f
    n, hi, lo, m2 = _tree_merge(codes, n, hi, lo, m2)
    return tuple(pd.Series(a, index=uniques) for a in (n, hi, lo, m2, top))


def _finalize(n, hi, lo, m2, unit):
    """The four moments and the unit of each group, as one tuple per group."""
    return pd.Series(list(zip(n, hi, lo, m2, unit)), index=n.index, dtype=object)


def moments_aggregation():
    """The custom dask Aggregation computing (n, mean_hi, mean_lo, M2, unit) per group."""
    _, dd = _dask()
    return dd.Aggregation("pooling-moments", _chunk, _agg, _finalize)


# ---------------------------------------------------------------------------------------------
# reading and checking partitions


def _checked_partition(
    df, group: str, value: str, csv: bool, whole: frozenset, csv_read: tuple | None = None, partition_info=None
):
    """Refuse missing labels and non-finite values (naming the file, and the row of a file read as one piece: a
    CSV's line as a text editor numbers it, `csv_read` being the files' (encoding, separator); a Parquet file's
    row), strip CSV labels, add the order key."""
    number = (partition_info or {}).get("number", 0)
    file = str(df[_FILE].iloc[0]) if len(df) and _FILE in df.columns else "the input"
    labels = df[group]
    empty = labels.isna().to_numpy(dtype=bool)
    if not empty.all():
        text = labels.astype("string")
        empty = empty | (text.str.strip() == "").fillna(True).to_numpy(dtype=bool)
    vals = pd.to_numeric(df[value], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    bad_val = ~np.isfinite(vals)
    for bad, col, what in ((empty, group, "a group label"), (bad_val, value, "a finite number")):
        if bad.any():
            i = int(np.argmax(bad))
            where = df[_FILE].iloc[i] if _FILE in df.columns else file
            cell = df[col].iloc[i]
            found = "an empty cell" if pd.isna(cell) or str(cell).strip() == "" else S._show(cell)
            if "__pooling_row__" in df.columns:
                row = f", row {int(df['__pooling_row__'].iloc[i]) + 1}"
            elif str(where) in whole:
                row = ", " + (S.Rows((str(where), *csv_read)) if csv_read else S.FRAME_ROWS)(i + 1)
            else:
                row = ""
            raise InputError(f"bad input in '{where}', column '{col}'{row}: expected {what}, found {found}")
    out = pd.DataFrame(
        {group: labels.astype(str).str.strip() if csv else labels.astype(str), value: vals}, index=df.index
    )
    bad = out[group].astype(object).str.contains(S._BAD_LABEL_CHARS, regex=True).to_numpy(dtype=bool)
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(
            f"bad input in '{file}', column '{group}': expected a group label of text, found a control "
            f"character in {S._show(out[group].iloc[i])}"
        )
    out[_ORDER] = np.arange(len(df), dtype=np.int64) + (np.int64(number) << np.int64(40))
    return out


def _parquet_file(path: str):
    """A Parquet file opened for reading with every page's checksum verified (stats.open_parquet); a URL
    through fsspec (which Dask itself needs), so that its pages are verified too: dask's own
    read_parquet reads them without the check."""
    if "://" not in path:
        return S.open_parquet(path, path)
    import fsspec

    try:
        handle = fsspec.open(path, "rb").open()
    except Exception as exc:  # the file system's own errors, of many types
        raise InputError(f"bad input: cannot open '{path}' ({S._one_line(exc)[:200]})") from None
    try:
        return S.open_parquet(handle, path)
    except BaseException:
        handle.close()
        raise


def _read_parquet_piece(piece, columns):
    """One partition of a Parquet file: a run of row groups (None: all of them), with the file's row numbers."""
    path, groups, first_row, rows = piece
    pf = _parquet_file(path)
    try:
        table = pf.read(columns=columns) if groups is None else pf.read_row_groups(groups, columns=columns)
        if len(table) != rows:  # a value count damaged in the footer: pyarrow stops early
            raise InputError(
                f"bad input in '{path}': a damaged Parquet file: its footer says {rows} rows from row "
                f"{first_row + 1} on, but {len(table)} could be read"
            )
        S._check_parquet_text(table, path, first_row)
        df = table.to_pandas()
    except InputError:
        raise
    except Exception as exc:  # damaged pages, a page whose checksum does not match: several pyarrow types
        raise InputError(S.parquet_damage(path, first_row, exc)) from None
    finally:
        pf.close()
    df[_FILE] = path
    df["__pooling_row__"] = np.arange(first_row, first_row + len(df), dtype=np.int64)
    return df


def _parquet_frame(dd, files: list[str], group: str, value: str):
    pieces = []
    for f in files:
        pf = _parquet_file(f)
        try:
            S._require_columns(pf.schema_arrow.names, {"group": group, "value": value}, f)
            S.check_parquet_footer(pf, [group, value], f)
            meta = pf.metadata
            if meta.num_rows == 0 and len(files) == 1:
                raise InputError(S.explain_no_rows(pf, [group, value], f))
        finally:
            pf.close()
        if "://" in f:  # one partition per remote file: its row groups are read together
            if meta.num_rows:
                pieces.append((f, None, 0, meta.num_rows))
            continue
        run, rows, start = [], 0, 0
        for k in range(meta.num_row_groups):
            run.append(k)
            rows += meta.row_group(k).num_rows
            if rows >= _PARQUET_ROWS:
                pieces.append((f, run, start, rows))
                start += rows
                run, rows = [], 0
        if run:
            pieces.append((f, run, start, rows))
    if not pieces:
        raise InputError("bad input: the Parquet files hold no rows")
    first = _read_parquet_piece(pieces[0], [group, value]).iloc[:0]
    return dd.from_map(_read_parquet_piece, pieces, columns=[group, value], meta=first, enforce_metadata=False)


def _csv_frame(dd, files: list[str], group: str, value: str, encoding, delimiter, thousands, decimal, blocksize):
    """The CSV files as one Dask frame of the group and value columns, and the separator they are read with."""
    local = [f for f in files if "://" not in f]
    S.check_number_format(thousands, decimal)
    enc = S.check_encoding(encoding) if encoding else (S._detect_encoding(Path(local[0]), None) if local else "utf-8")
    sep = delimiter or (S._sniff_delimiter(Path(local[0]), enc, [group, value]) if local else ",")
    names = {}
    for f in local:  # a missing column is named with its file before any work is sent out
        header, _ = S._first_rows(Path(f), enc, sep)
        if header is None:
            raise InputError(f"bad input in '{f}': the file has no header and no data")
        S._require_columns(header, {"group": group, "value": value}, f)
    if local:
        raw = list(pd.read_csv(local[0], sep=sep, nrows=0, encoding=enc, skipinitialspace=True).columns)
        names = {str(c).strip(): c for c in raw}
    g_raw, v_raw = names.get(group, group), names.get(value, value)
    ddf = dd.read_csv(
        files,
        sep=sep,
        usecols=[g_raw, v_raw],
        dtype={g_raw: str, v_raw: "float64"},
        keep_default_na=False,
        na_values={v_raw: S._MISSING},
        skip_blank_lines=True,
        encoding=enc,
        thousands=thousands,
        decimal=decimal or ".",
        skipinitialspace=True,
        include_path_column=_FILE,
        blocksize=blocksize,
    )
    return ddf.rename(columns={g_raw: group, v_raw: value}), sep


def _compute(dask, scheduler, *things):
    """dask.compute on the given scheduler: None (Dask's default), a local scheduler's name, a
    dask.distributed Client, or a scheduler's address (a Client is opened for the call and closed)."""
    if scheduler is None or scheduler in ("threads", "processes", "sync", "synchronous", "single-threaded"):
        return dask.compute(*things, scheduler=scheduler)
    try:
        from distributed import Client
    except ImportError:
        raise InputError(MISSING_DASK) from None
    if isinstance(scheduler, Client):
        return scheduler.compute(list(things), sync=True)
    address = str(getattr(scheduler, "scheduler_address", scheduler))  # a cluster object, or its address
    try:
        client = Client(address, timeout=_CONNECT_TIMEOUT, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"bad option: cannot reach a Dask scheduler at '{address}' ({S._one_line(exc)})") from None
    try:
        return client.compute(list(things), sync=True)
    finally:
        client.close()


def read_table_dask(
    paths_or_glob,
    group: str,
    value: str,
    scheduler=None,
    *,
    format: str | None = None,
    encoding: str | None = None,
    delimiter: str | None = None,
    thousands: str | None = None,
    decimal: str | None = None,
    blocksize="64MB",
) -> S.GroupStats:
    """Statistics of long tables in many CSV or Parquet files, computed on Dask.

    `paths_or_glob` is a folder, a glob pattern ('runs/2026-*/part-*.parquet'), a list of files, or
    URLs that Dask can read. `scheduler` is None (Dask's default: threads of this machine), the
    address of a running dask.distributed scheduler ('tcp://10.0.0.5:8786'), a distributed.Client,
    or a local scheduler's name ('threads', 'processes', 'sync'). The files must be readable
    at the same paths from every worker. Returns the same GroupStats as pooling.read_table would
    give for the files' rows read one after the other.
    """
    S._check_distinct({"group": group, "value": value})
    dask, dd = _dask()
    files, kind = resolve(paths_or_glob, format)
    source = _show_input(paths_or_glob)
    record = _file_record(files)
    enc = None
    try:
        if kind == "parquet":
            ddf = _parquet_frame(dd, files, group, value)
            whole, csv_read = frozenset(), None
        else:
            local = [f for f in files if "://" not in f]
            enc = (
                S.check_encoding(encoding)
                if encoding
                else (S._detect_encoding(Path(local[0]), None) if local else "utf-8")
            )
            ddf, sep = _csv_frame(dd, files, group, value, enc, delimiter, thousands, decimal, blocksize)
            csv_read = (enc, sep)
            limit = dask.utils.parse_bytes(blocksize) if isinstance(blocksize, str) else blocksize
            whole = frozenset(f for f in files if "://" not in f and (limit is None or os.path.getsize(f) <= limit))
        return _reduce(dask, ddf, files, kind, whole, csv_read, group, value, scheduler, source, record)
    except UnicodeError as exc:  # a file (often not the first, whose encoding was detected) in another encoding
        raise InputError(_undecodable(files, enc, exc, detected=not encoding)) from None


def _file_record(files: list[str]) -> list[dict]:
    """What was read, for the run's record (summary.json data.files): each file's path, size and SHA-256 (a URL:
    its address only). Two local files with the same bytes are refused: a delivery copied into the folder twice
    would count every measurement twice."""
    out: list[dict] = []
    seen: dict[str, str] = {}
    for f in files:
        if "://" in f:
            out.append({"path": f, "bytes": None, "sha256": None})
            continue
        sha = S._sha256_file(Path(f))
        if sha in seen:
            raise InputError(
                f"bad input: '{f}' and '{seen[sha]}' hold the same bytes (sha256 {sha[:12]}): the same delivery "
                "twice would count every measurement twice; remove one of them"
            )
        seen[sha] = f
        out.append({"path": f, "bytes": os.path.getsize(f), "sha256": sha})
    return out


def _undecodable(files: list[str], enc: str | None, exc: UnicodeError, detected: bool) -> str:
    """The one line for bytes that the files' encoding does not decode: the first such file and line."""
    local = [f for f in files if "://" not in f]
    for f in local:
        if enc is not None and S.first_undecodable(f, enc) is not None:
            msg = S._encoding_message(f, enc, exc, detected=detected and f == local[0])
            if detected and f != local[0]:
                shown = "UTF-8" if enc == "utf-8-sig" else enc
                msg += f" (all files are read in {shown}, the encoding detected in the first, '{local[0]}')"
            return msg
    return S._encoding_message(local[0] if local else files[0], enc or "utf-8", exc)


def _reduce(dask, ddf, files, kind, whole, csv_read, group, value, scheduler, source, record) -> S.GroupStats:
    """The group statistics of the checked frame, computed on `scheduler`."""
    meta = pd.DataFrame(
        {
            group: pd.Series([], dtype=object).astype(str),
            value: pd.Series([], dtype=np.float64),
            _ORDER: pd.Series([], dtype=np.int64),
        }
    )
    checked = ddf.map_partitions(_checked_partition, group, value, kind == "csv", whole, csv_read, meta=meta)
    grouped = checked.groupby(group)
    # one output partition: J groups' statistics are small by design, and the shuffle-based
    # reduction that Dask picks by itself for many partitions failed with this aggregation (2026.8)
    moments = grouped[value].agg(moments_aggregation(), split_out=1)
    first = grouped[_ORDER].min(split_out=1)
    try:
        moments, first = _compute(dask, scheduler, moments, first)
    except InputError:
        raise
    except (ValueError, TypeError) as exc:
        if not _PARSE_ERROR.search(str(exc)):
            raise
        # the CSV reader meeting text where a number belongs, in some block of some file
        raise InputError(
            f"bad input in '{source}', column '{value}': expected numbers, found something else "
            f"({S._one_line(exc)[:200]})"
        ) from None
    if len(moments) == 0:
        raise InputError(f"bad input in '{source}': no data rows")
    order = np.argsort(first.reindex(moments.index).to_numpy(), kind="stable")
    labels = tuple(str(k) for k in moments.index[order])
    n, hi, lo, m2, unit = (np.array([t[i] for t in moments.to_numpy()[order]], dtype=np.float64) for i in range(5))
    top = float(unit.max())
    f = unit / top  # a common unit for all groups (powers of two: exact)
    return S.GroupStats(
        labels,
        n.astype(np.int64),
        hi * f,
        m2 * f * f,
        mean_lo=lo * f,
        unit=top,
        source=source,
        meta={"files": len(files), "format": kind, "file_list": record},
    )
