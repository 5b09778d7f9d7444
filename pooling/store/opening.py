"""Opening a store from a store argument: the one place that chooses the driver (SQLite or PostgreSQL)."""

from __future__ import annotations

from ..errors import InputError
from .ledger import DEFAULT_BUSY_SECONDS, SqlLedger


def open_store(
    where, *, create: bool = False, missing_ok: bool = False, busy_seconds: float = DEFAULT_BUSY_SECONDS
) -> SqlLedger | None:
    """Open the store named by a store argument (a file path, a postgresql:// URL, or service=NAME).

    `create`: make it when it does not exist (`store.created` says whether this call did);
    `missing_ok`: return None instead of refusing a store that does not exist. psycopg is imported
    only here, and only for a PostgreSQL store.
    """
    from .location import parse_location

    loc = parse_location(where)
    if loc.is_postgresql:
        try:
            from .postgres import open_pg
        except ImportError:
            raise InputError(
                f"bad store '{loc.display}': a PostgreSQL store needs psycopg, which is not installed: "
                "pip install 'pooling[postgresql]'"
            ) from None

        return open_pg(loc, create=create, missing_ok=missing_ok, busy_seconds=busy_seconds)
    from .sqlite import open_sqlite

    return open_sqlite(loc, create=create, missing_ok=missing_ok, busy_seconds=busy_seconds)
