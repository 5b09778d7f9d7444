"""Where a store is: the store argument of the commands, read without touching the store.

    parts.store                                   a file path: the embedded SQLite store
    postgresql://HOST[:PORT]/DATABASE[?...][#NAME]  a PostgreSQL store (postgres:// also), as a libpq URL
    service=SERVICE[#NAME]                        a PostgreSQL store through a libpq connection service

NAME is the store's name inside the database: each store is one PostgreSQL schema of that name
(default `pooling`), so several stores can share a database. A file whose name really begins with
`service=` is written `./service=...`. Passwords never go on the command line, where the process
list and the shell's history would show them: a URL that holds one is refused, and libpq's own
mechanisms (the password file, a service file, the environment) provide it. Everything printed
about a store uses `display`, which never holds a password.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import parse_qsl, urlsplit

from ..errors import InputError

DEFAULT_NAME = "pooling"
URL_PREFIXES = ("postgresql://", "postgres://")
SERVICE_PREFIX = "service="
_NAME = re.compile(r"[a-z_][a-z0-9_]{0,62}")
_SERVICE = re.compile(r"[A-Za-z0-9_.\-]+")


@dataclass(frozen=True)
class Location:
    """A parsed store argument. `conninfo` (PostgreSQL only) is what libpq is given: no store name, no password."""

    kind: str  # "sqlite" or "postgresql"
    display: str  # how messages and files name the store
    path: Path | None = None  # SQLite
    conninfo: str | None = None
    name: str = DEFAULT_NAME  # PostgreSQL: the schema that holds the store

    @property
    def is_postgresql(self) -> bool:
        return self.kind == "postgresql"


def _strip_password(url: str) -> tuple[str, bool]:
    """The URL with any password removed (from the user part and from a password= parameter)."""
    parts = urlsplit(url)
    had = False
    netloc = parts.netloc
    if "@" in netloc:
        user, _, hosts = netloc.rpartition("@")
        if ":" in user:
            user = user.split(":", 1)[0]
            had = True
        netloc = f"{user}@{hosts}"
    query = parts.query
    if query:
        kept = []
        for piece in query.split("&"):
            if piece.split("=", 1)[0].lower() == "password":
                had = True
            else:
                kept.append(piece)
        query = "&".join(kept)
    shown = f"{parts.scheme}://{netloc}{parts.path}" + (f"?{query}" if query else "")
    return shown, had


def redact(text: str) -> str:
    """Any postgresql:// URL inside `text` with its password removed (for messages from elsewhere)."""
    return re.sub(r"postgres(?:ql)?://[^\s'\"]+", lambda m: _strip_password(m.group(0))[0], text)


def _store_name(text: str, shown: str) -> str:
    if not _NAME.fullmatch(text):
        raise InputError(
            f"bad store '{shown}': the store name after '#' must be lowercase letters, digits and "
            f"underscores (at most 63, not starting with a digit); found '{text}'"
        )
    return text


def parse_location(arg) -> Location:
    """Read a store argument (see the module's docstring). Refuses a password in a URL, with one line."""
    if isinstance(arg, Location):
        return arg
    if isinstance(arg, Path):
        return Location("sqlite", str(arg), path=arg)
    text = str(arg)
    if text.startswith(URL_PREFIXES):
        url, _, name = text.partition("#")
        if "password" in name.lower():  # never echo what follows: it may be the password itself
            raise InputError(
                f"bad store '{_strip_password(url)[0]}#...': the store name after '#' holds 'password'; "
                "a password goes in the password file (~/.pgpass, or the file PGPASSFILE names)"
            )
        shown, had_password = _strip_password(url)
        name = name or DEFAULT_NAME
        display = shown if name == DEFAULT_NAME else f"{shown}#{name}"
        if had_password:
            raise InputError(
                f"bad store '{display}': the URL holds a password, which the process list and the shell "
                "history would show; put it in the password file (~/.pgpass, or the file PGPASSFILE "
                "names) or in a service file, and give the URL without it"
            )
        try:
            params = parse_qsl(urlsplit(url).query, keep_blank_values=True)
        except ValueError:
            params = []
        for key, _ in params:
            if key.lower() == "service":
                raise InputError(f"bad store '{display}': give a service as service=NAME, not inside a URL")
        return Location("postgresql", display, conninfo=url, name=_store_name(name, display))
    if text.startswith(SERVICE_PREFIX):
        service, _, name = text[len(SERVICE_PREFIX) :].partition("#")
        name = name or DEFAULT_NAME
        display = f"service={service}" if name == DEFAULT_NAME else f"service={service}#{name}"
        if not _SERVICE.fullmatch(service):
            raise InputError(
                f"bad store '{display}': expected service=NAME with a libpq service name of letters, "
                f"digits, '_', '-' or '.'; found '{service}' (a file whose name begins with 'service=' "
                "is written ./service=...)"
            )
        return Location("postgresql", display, conninfo=f"service={service}", name=_store_name(name, display))
    return Location("sqlite", text, path=Path(text))
