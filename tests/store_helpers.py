"""Helpers shared by the store tests (not a test module)."""
from __future__ import annotations

import sqlite3


def sql_dump(path) -> list[str]:
    """Every row of every table, as SQL text: 'the store exactly as before' means this is unchanged."""
    con = sqlite3.connect(str(path))
    try:
        return list(con.iterdump())
    finally:
        con.close()
