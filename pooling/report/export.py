"""Tables out of the reporter: groups.csv (text cells neutralised against formula injection) and
the reporter's keys in summary.json (labels exactly as they are; JSON is not a spreadsheet).
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pandas as pd

# OWASP's CSV-injection guidance: a cell that starts with one of these may be run as a formula by
# a spreadsheet; a leading apostrophe makes it plain text, and quoting keeps separators inside.
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralise(text):
    """'=1+1' -> "'=1+1": a leading apostrophe on a text cell starting with = + - @, tab or CR."""
    if isinstance(text, str) and text.startswith(FORMULA_START):
        return "'" + text
    return text


def safe_frame(df: pd.DataFrame) -> pd.DataFrame:
    """A copy with every text cell neutralised (numbers are left alone: -3.2 stays a number)."""
    out = df.copy()
    for col in out.columns:
        if out[col].dtype == object or pd.api.types.is_string_dtype(out[col]):
            out[col] = out[col].map(neutralise)
    out.columns = [neutralise(str(c)) for c in out.columns]
    return out


def write_csv(df: pd.DataFrame, path: Path) -> None:
    """UTF-8 CSV, text quoted, numbers at full precision (repr), missing values as empty cells."""
    safe_frame(df).to_csv(
        path, index=False, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\n", float_format=None, na_rep=""
    )


def _plain(x):
    """A numpy scalar as the Python value of the same type (bool, int, float); anything else unchanged."""
    if isinstance(x, (np.bool_, bool)):
        return bool(x)
    if isinstance(x, np.integer):
        return int(x)
    if isinstance(x, np.floating):
        return float(x)
    return x


def _json_safe(x):
    x = _plain(x)
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def records(df: pd.DataFrame) -> list[dict]:
    """Rows as JSON-ready dicts: plain Python values, NaN and infinities as None."""
    cols = list(df.columns)
    values = []
    for c in cols:
        a = df[c].to_numpy()
        if a.dtype.kind in "biu":
            values.append(a.tolist())
        elif a.dtype.kind == "f":
            # a numeric column turns into Python numbers in one call (the same values _plain gives one at a time)
            col = a.tolist()
            for i in np.flatnonzero(~np.isfinite(a)).tolist():
                col[i] = None
            values.append(col)
        else:
            values.append([_json_safe(x) for x in a])
    return [dict(zip(cols, row)) for row in zip(*values)]
