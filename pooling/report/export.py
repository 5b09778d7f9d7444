"""Tables out of the reporter: groups.csv (text cells neutralised against formula injection) and
the reporter's keys in summary.json (labels exactly as they are; JSON is not a spreadsheet).
"""
from __future__ import annotations

import csv
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
    safe_frame(df).to_csv(path, index=False, quoting=csv.QUOTE_NONNUMERIC, lineterminator="\n",
                          float_format=None, na_rep="")


def records(df: pd.DataFrame) -> list[dict]:
    """Rows as JSON-ready dicts (NaN becomes None downstream)."""
    cols = list(df.columns)
    arrays = [df[c].to_numpy() for c in cols]
    out = []
    for i in range(len(df)):
        row = {}
        for c, a in zip(cols, arrays):
            x = a[i]
            if isinstance(x, (np.bool_, bool)):
                x = bool(x)
            elif isinstance(x, np.integer):
                x = int(x)
            elif isinstance(x, np.floating):
                x = float(x)
            row[c] = x
        out.append(row)
    return out
