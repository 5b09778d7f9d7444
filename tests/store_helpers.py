"""Helpers shared by the store tests (not a test module): both stores, SQLite and PostgreSQL."""

from __future__ import annotations

import sqlite3

import numpy as np

from pooling.store.location import parse_location


def _row_text(table: str, names, row) -> str:
    """One row as text, columns by name, floats by their bits (so -0.0 and 0.0, or 1 ulp, are told apart)."""
    cells = sorted(zip(names, row))
    return f"{table}: " + repr(
        [(k, ("float", np.float64(v).view(np.uint64).item()) if isinstance(v, float) else v) for k, v in cells]
    )


def sql_dump(where) -> list[str]:
    """Every row of every table of a store, as text, in the same form for SQLite and PostgreSQL: 'the store
    exactly as before' means this is unchanged, and two stores holding the same rows give the same lines.
    (PostgreSQL's id sequences are left out: a rolled-back transaction does not give back the ids it took,
    by design.)"""
    loc = parse_location(where)
    out = []
    if not loc.is_postgresql:
        con = sqlite3.connect(str(loc.path))
        try:
            tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' ORDER BY name")]
            for t in tables:
                cur = con.execute(f'SELECT * FROM "{t}" ORDER BY 1, 2')
                names = [d[0] for d in cur.description]
                out += [_row_text(t, names, r) for r in cur]
        finally:
            con.close()
        return out
    import psycopg

    with psycopg.connect(loc.conninfo, autocommit=True) as con:
        cur = con.cursor(binary=True)
        tables = [
            r[0]
            for r in cur.execute(
                "SELECT table_name FROM information_schema.tables WHERE table_schema = %s ORDER BY table_name",
                (loc.name,),
            ).fetchall()
        ]
        for t in tables:
            cur.execute(f'SELECT * FROM "{loc.name}"."{t}" ORDER BY 1, 2')
            names = [d.name for d in cur.description]
            out += [_row_text(t, names, r) for r in cur.fetchall()]
    return out


def store_exists(where) -> bool:
    """Whether the store exists (a file, or a schema holding the pooling_store table)."""
    loc = parse_location(where)
    if not loc.is_postgresql:
        return loc.path.exists()
    import psycopg

    with psycopg.connect(loc.conninfo, autocommit=True) as con:
        return con.execute("SELECT to_regclass(%s)", (f'"{loc.name}".pooling_store',)).fetchone()[0] is not None


def execute(where, sql: str, params=()) -> None:
    """Change a store behind pooling's back (to test what it refuses): one statement, committed."""
    loc = parse_location(where)
    if not loc.is_postgresql:
        con = sqlite3.connect(str(loc.path))
        try:
            con.execute(sql, params)
            con.commit()
        finally:
            con.close()
        return
    import psycopg

    with psycopg.connect(loc.conninfo, autocommit=True) as con:
        con.execute(f'SET search_path TO "{loc.name}"')
        con.execute(sql.replace("?", "%s"), params)
